"""Run store: one folder per run, SQLite WAL, float32 LE BLOBs committed per trace."""

import os
import signal
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from bench.errors import ConfigError, StoreError
from bench.store import TraceMeta, create_run, open_run


def meta(i, points=101, label="scan", action=None):
    return TraceMeta(action_index=i if action is None else action, step_label=label, step_kind="sweep",
                     segment=0, start_hz=30e6, stop_hz=1e9, points=points, rbw_hz=120e3, vbw_hz=300e3,
                     detector="peak", trace_mode="clear-write", sweeps=1, x_m=np.float64(0.01), y_m=0.02, z_m=0.003)


def test_round_trip_and_dataframe(tmp_path):
    run = create_run(tmp_path, "demo", {"name": "demo", "state": "running"})
    levels = np.linspace(0, 50, 101)
    tid = run.add_trace(meta(0), levels, completes_action=True)
    f, v = run.trace(tid)
    # frequency axis f_i = start + i*(stop-start)/(N-1) (common practice)
    assert f[0] == 30e6 and f[-1] == 1e9 and f[1] == pytest.approx(30e6 + 970e6 / 100)
    np.testing.assert_allclose(v, levels.astype(np.float32))
    df = run.traces()
    assert list(df["step_label"]) == ["scan"]
    # numpy scalars are stored as numbers, not BLOBs (pitfalls: sqlite3)
    assert isinstance(df["x_m"].iloc[0], float)
    assert run.done_actions() == {0}
    run.close()
    ro = open_run(run.folder)
    assert ro.manifest()["state"] == "running"
    with pytest.raises(Exception):
        ro.add_trace(meta(1), levels)


def test_shape_mismatch_refused(tmp_path):
    run = create_run(tmp_path, "demo", {"name": "demo"})
    with pytest.raises(StoreError, match="does not match 101 points"):
        run.add_trace(meta(0), np.zeros(5))


def test_discard_partial_keeps_finished_actions(tmp_path):
    run = create_run(tmp_path, "demo", {"name": "demo"})
    run.add_trace(meta(0), np.zeros(101), completes_action=True)
    run.add_trace(meta(1), np.zeros(101), completes_action=False)
    assert run.discard_partial(1) == 1
    assert run.discard_partial(0) == 0
    assert len(run.traces()) == 1


def test_manifest_rewrite_is_atomic(tmp_path):
    run = create_run(tmp_path, "demo", {"name": "demo", "state": "running"})
    run.update_manifest(state="complete", note=None)
    assert run.manifest()["state"] == "complete"
    assert "note" not in run.manifest()  # tomli-w cannot write None: key omitted (pitfalls: TOML)
    assert not list(run.folder.glob("*.tmp"))


def test_not_a_run_folder(tmp_path):
    with pytest.raises(ConfigError, match="not a run folder"):
        open_run(tmp_path)


def test_export_csv(tmp_path):
    run = create_run(tmp_path, "demo", {"name": "demo"})
    run.add_trace(meta(0), np.full(101, 12.5), completes_action=True)
    files = run.export_csv(tmp_path / "csv")
    names = sorted(p.name for p in files)
    assert names == ["spectra-scan.csv", "traces.csv"]
    rows = (tmp_path / "csv" / "spectra-scan.csv").read_text().splitlines()
    assert rows[0] == "trace_id,freq_hz,level"
    assert len(rows) == 102
    assert rows[1] == "1,30000000.0,12.500"


def test_kill_minus_9_loses_at_most_the_trace_in_flight(tmp_path):
    # A writer process is killed with SIGKILL mid-run; every committed trace must read back intact
    # (pitfalls: Storage - SQLite WAL with a commit per trace survived kill -9).
    script = textwrap.dedent(f"""
        import sys, numpy as np
        from bench.store import create_run, TraceMeta
        run = create_run({str(tmp_path)!r}, "crash", {{"name": "crash"}})
        print(run.folder, flush=True)
        i = 0
        while True:
            m = TraceMeta(action_index=i, step_label="s", step_kind="sweep", segment=0, start_hz=1e6,
                          stop_hz=2e6, points=2001, rbw_hz=1e3, vbw_hz=3e3, detector="peak",
                          trace_mode="clear-write", sweeps=1)
            run.add_trace(m, np.full(2001, float(i)), completes_action=True)
            print(i, flush=True)
            i += 1
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True,
                            cwd=tmp_path)  # not the repository: its bench/ folder would shadow the install
    folder = proc.stdout.readline().strip()
    last = -1
    while last < 40:
        last = int(proc.stdout.readline())
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    proc.stdout.close()
    run = open_run(folder)
    df = run.traces()
    assert len(df) >= last + 1  # everything reported as committed is there
    for tid, action in zip(df["id"], df["action_index"]):
        _, v = run.trace(int(tid))
        assert np.all(v == action)
    assert run.done_actions() == set(df["action_index"])
