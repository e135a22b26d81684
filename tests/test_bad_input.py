"""Bad input on the command line: one line, exit code 2, nothing written, no traceback."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from importlib import resources
from pathlib import Path

import pytest

from bench.cli import main

DEMO = Path(str(resources.files("bench.demo")))


@pytest.mark.parametrize(("faults", "fragment"), [
    (["drop-after-sweeps=0"], "expected a whole number >= 1, found 0"),
    (["hang-after-sweeps=-3"], "expected a whole number >= 1, found -3"),
    (["refuse-after-drop=-1"], "expected a whole number >= 0, found -1"),
    (["drop-after-sweeps=1", "drop-after-sweeps=2"], "expected each fault once, found it again"),
    (["drop-after-sweeps=two"], "expected a whole number, found 'two'"),
])
def test_fault_options_no_bench_could_mean_are_refused(tmp_path, capsys, faults, fragment):
    args = ["run", str(DEMO / "demo-quick.toml"), "--sim", "--out", str(tmp_path / "runs")]
    for fault in faults:
        args += ["--fault", fault]
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and fragment in err[0]
    assert not (tmp_path / "runs").exists()


def test_a_scpi_error_code_may_be_negative(tmp_path, capsys):
    # SCPI error codes are negative (SCPI-1999 vol. 2, chapter 21): -222 is "data out of range"
    args = ["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots", "--out", str(tmp_path / "runs"),
            "--fault", "error-code=-222"]
    assert main(args) == 0, capsys.readouterr().err


def test_a_closed_pipe_ends_quietly(tmp_path):
    # `bench info | head -1`: the reader leaves early; the writer must not print a traceback
    cmd = [sys.executable, "-c", "import sys; from bench.cli import main; sys.exit(main(['info']))"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=tmp_path)
    proc.stdout.readline()
    proc.stdout.close()  # the reader goes away after one line
    with proc.stderr:
        err = proc.stderr.read().decode()
    proc.wait(timeout=60)
    assert "Traceback" not in err


def test_a_pose_outside_the_mast_names_the_sequence_line(tmp_path, capsys):
    text = (DEMO / "demo-far-field.toml").read_text(encoding="utf-8")
    seq = tmp_path / "tall.toml"
    seq.write_text(text.replace('heights = { from = "1 m", to = "4 m"', 'heights = { from = "1 m", to = "6 m"'),
                   encoding="utf-8")
    assert main(["check", str(seq), "--sim"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    line = next(n for n, t in enumerate(seq.read_text().splitlines(), start=1) if t.startswith("kind = \"prescan\"")) - 1
    assert len(err) == 1 and f"{seq}:{line} " in err[0] and "expected antenna height within [1 m, 4 m]" in err[0]


def test_command_line_mistakes_found_by_the_census(tmp_path, capsys):
    quick = str(DEMO / "demo-quick.toml")
    afile = tmp_path / "afile"
    afile.write_text("", encoding="utf-8")
    cases = [
        (["run", quick, "--sim", "--no-plots", "--out", str(afile)], "--out: expected a folder"),
        (["check", quick, "--bench", str(DEMO / "demo-bench.toml"), "--seed", "3"], "use it with --sim"),
    ]
    for args, fragment in cases:
        assert main(args) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and fragment in err[0], err
    # a run folder whose manifest names no sequence cannot be resumed: one line, not a KeyError
    folder = tmp_path / "damaged"
    folder.mkdir()
    (folder / "manifest.toml").write_text('state = "interrupted"\n', encoding="utf-8")
    sqlite3.connect(folder / "data.sqlite").close()  # an empty database beside it
    assert main(["resume", str(folder), "--no-plots"]) in (1, 2)  # a storage or a file mistake
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("emission-bench: ") and "Traceback" not in err[0]
