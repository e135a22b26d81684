"""Damaged run folders, unusable paths and ports: one line and no traceback (found by the census).

Each case is one line of ``tests/benchmarks/census_bad_input.py`` that used to end in a
traceback or a stray file; the census lists them with their reproducers.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import sys
from importlib import resources
from pathlib import Path

import pytest

from bench.analysis.transducers import load_table
from bench.cli import main
from bench.errors import ConfigError

DEMO = Path(str(resources.files("bench.demo")))
_CLI = "import sys; from bench.cli import main; sys.exit(main(sys.argv[1:]))"

TINY = """\
schema = 1
name = "tiny"
[sweeps.band]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 1001
[[steps]]
kind = "sweep"
label = "one"
sweep = "band"
"""


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory) -> Path:
    """A finished one-sweep run on the simulated bench (made once, copied by each test)."""
    root = tmp_path_factory.mktemp("tiny")
    seq = root / "tiny.toml"
    seq.write_text(TINY, encoding="utf-8")
    assert main(["run", str(seq), "--sim", "--no-plots", "--out", str(root / "runs")]) == 0
    (folder,) = list((root / "runs").iterdir())
    return folder


def _copy(run: Path, tmp_path: Path) -> Path:
    folder = tmp_path / "run"
    shutil.copytree(run, folder)
    return folder


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("emission-bench: ")
    return err[0]


def test_a_manifest_that_is_not_utf8_is_one_line(finished_run, tmp_path, capsys):
    run = _copy(finished_run, tmp_path)
    (run / "manifest.toml").write_bytes(b"\x00\xff garbage = = =\n")
    for args in (["report", str(run)], ["resume", str(run)], ["compare", str(run), str(run)]):
        assert main(args) == 1
        assert "unreadable manifest" in _one_line(capsys)


@pytest.mark.parametrize("content", [b"", bytes(range(256)) * 64], ids=["empty", "garbage"])
def test_a_damaged_database_is_one_line_and_exports_nothing(finished_run, tmp_path, capsys, content):
    run = _copy(finished_run, tmp_path)
    (run / "data.sqlite").write_bytes(content)
    assert main(["export", str(run), "--csv", str(tmp_path / "out")]) == 1
    assert "run database" in _one_line(capsys)
    assert not (tmp_path / "out").exists()
    assert main(["compare", str(run), str(run), "--out", str(tmp_path / "cmp")]) == 1
    assert "run database" in _one_line(capsys)


def test_an_export_into_a_file_is_refused(finished_run, tmp_path, capsys):
    target = tmp_path / "taken.csv"
    target.write_text("mine\n", encoding="utf-8")
    assert main(["export", str(finished_run), "--csv", str(target)]) == 2
    assert "expected a folder for the export" in _one_line(capsys)
    assert target.read_text(encoding="utf-8") == "mine\n"


def test_a_path_too_long_for_the_file_system_is_a_missing_file(tmp_path, capsys):
    bench = (DEMO / "demo-bench.toml").read_text(encoding="utf-8")
    shutil.copytree(DEMO / "tables", tmp_path / "tables")
    for old, new in (('factor = "tables/eprobe.csv"', 'factor = "' + "x" * 300 + '.csv"'),
                     ('profile = "scpi-supply"', 'profile = "' + "y" * 300 + '"')):
        (tmp_path / "bench.toml").write_text(bench.replace(old, new), encoding="utf-8")
        assert main(["check", str(DEMO / "demo-quick.toml"), "--bench", str(tmp_path / "bench.toml")]) == 2
        line = _one_line(capsys)
        assert "no file at" in line or "unknown instrument profile" in line


@pytest.mark.parametrize("port", ["-1", "65536"])
def test_a_port_out_of_range_is_refused(capsys, port):
    assert main(["sim", "--port", port]) == 2
    assert "expected a TCP port number 0-65535" in _one_line(capsys)


def test_a_port_in_use_is_one_line(tmp_path):
    with socket.create_server(("127.0.0.1", 0)) as taken:
        port = taken.getsockname()[1]
        proc = subprocess.run([sys.executable, "-c", _CLI, "sim", "--port", str(port)], capture_output=True,
                              text=True, timeout=120, cwd=tmp_path)
    assert proc.returncode == 2
    err = proc.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("emission-bench: ") and f"port {port}" in err[0]


def test_a_transducer_value_beyond_200_db_is_refused(tmp_path):
    text = (DEMO / "tables" / "preamp-30db.csv").read_text(encoding="utf-8").splitlines()
    data = [i for i, line in enumerate(text) if line and line[0].isdigit()]
    freq = text[data[1]].split(",")[0]
    text[data[1]] = f"{freq},1e308"  # a typo, not a preamp
    path = tmp_path / "preamp.csv"
    path.write_text("\n".join(text) + "\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"expected values within \+-200 dB, found 1e\+308 dB"):
        load_table(path, role="preamp_gain")


@pytest.mark.parametrize(("old", "new", "fragment"), [
    ('distance = "3 m"', 'distance = "1e300 m"', 'distance: expected a length of at most 1000 m, found "1e300 m"'),
    ('bandwidth = "120 kHz"', 'bandwidth = "1e300 kHz"',
     'bandwidth: expected a frequency of at most 100 MHz, found "1e300 kHz"'),
])
def test_a_limit_file_with_a_huge_distance_or_bandwidth_is_refused(tmp_path, old, new, fragment):
    from bench.analysis.limits import load_limit

    text = (resources.files("bench") / "data" / "limits" / "cispr32-class-b-3m.toml").read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / "mine.toml"
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        load_limit(path)
    assert fragment in str(info.value) and "\n" not in str(info.value)
