"""A run folder that cannot be written: one line, a resumable state, no temporary files.

A full disk is imitated with a file-size limit (RLIMIT_FSIZE, SIGXFSZ ignored): every write
past it fails with EFBIG, as writes to a full disk fail with ENOSPC. Tests run as root in CI,
where permission bits do not stop writes, so a read-only folder is imitated by putting a file
or a folder where the tool must write the other.
"""

from __future__ import annotations

import resource
import signal
import subprocess
import sys
from importlib import resources
from pathlib import Path

from bench.cli import main
from bench.store import open_run

DEMO = Path(str(resources.files("bench.demo")))
_CLI = "import sys; from bench.cli import main; sys.exit(main(sys.argv[1:]))"


def _small_disk():
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (400_000, 400_000))


def test_a_full_disk_stops_the_run_with_one_line_and_keeps_it_resumable(tmp_path):
    proc = subprocess.run([sys.executable, "-c", _CLI, "run", str(DEMO / "demo-near-field.toml"), "--sim",
                           "--no-plots", "--out", str(tmp_path / "runs")], preexec_fn=_small_disk,
                          capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert proc.returncode == 1
    assert "Traceback" not in proc.stderr
    last = proc.stderr.strip().splitlines()[-1]
    assert last.startswith("emission-bench: ") and "cannot store trace" in last and "bench resume" in last
    (folder,) = list((tmp_path / "runs").iterdir())
    assert not list(folder.glob("*.tmp")) and not (folder / "run.lock").exists()
    run = open_run(folder)
    assert run.manifest()["state"] == "interrupted"
    stored = len(run.traces())
    run.close()
    assert 0 < stored < 1197  # some traces kept, the rest still to do
    # with room again, the run resumes to completion
    assert main(["resume", str(folder), "--no-plots"]) == 0
    run = open_run(folder)
    assert run.manifest()["state"] == "complete" and len(run.traces()) == 1197
    run.close()


def _quick_run(tmp_path: Path) -> Path:
    assert main(["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots", "--out", str(tmp_path / "runs")]) == 0
    (folder,) = list((tmp_path / "runs").iterdir())
    return folder


def test_a_report_that_cannot_be_written_is_one_line(tmp_path, capsys):
    folder = _quick_run(tmp_path)
    (folder / "plots").rmdir()
    (folder / "plots").write_text("in the way", encoding="utf-8")  # the pictures cannot go there
    capsys.readouterr()
    assert main(["report", str(folder)]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot write the report" in err[0]


def test_a_run_folder_that_cannot_be_locked_is_one_line(tmp_path, capsys):
    folder = _quick_run(tmp_path)
    manifest = (folder / "manifest.toml").read_text(encoding="utf-8")
    (folder / "manifest.toml").write_text(manifest.replace('state = "complete"', 'state = "interrupted"'),
                                          encoding="utf-8")
    (folder / "run.lock").mkdir()  # the lock file cannot be created
    capsys.readouterr()
    assert main(["resume", str(folder), "--no-plots"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot write in the run folder" in err[0]
