"""End to end: drivers against the simulated bench over real loopback sockets, and `bench` runs.

The simulated instruments are network peers (SCPI over TCP through pyvisa-py, G-code over
socket:// and a pseudo-terminal); nothing here patches a driver.
"""

from __future__ import annotations

import dataclasses
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import tomli_w

from bench.cli import main
from bench.drivers.analyzer import Analyzer, SweepSettings, load_analyzer_profile
from bench.simbench import SimulatedBench
from bench.sim.board import demo_board, parse_board
from bench.store import open_run
from bench.transports import TransportSettings, open_transport

DEMO = Path(str(resources.files("bench.demo")))


@pytest.fixture
def sim():
    bench = SimulatedBench(demo_board(), seed=3)
    bench.start()
    yield bench
    bench.stop()


def _analyzer(sim, big_endian=False):
    profile = load_analyzer_profile("scpi-analyzer")
    order = "FORM:BORD NORM" if big_endian else "FORM:BORD SWAP"  # NORMal = big-endian (SCPI FORMat:BORDer)
    trace = dataclasses.replace(profile.trace, big_endian=big_endian, byte_order_command=order)
    tr = open_transport(sim.addresses["analyzer"], TransportSettings(timeout_s=5.0))
    return Analyzer(tr, dataclasses.replace(profile, trace=trace))


@pytest.mark.parametrize("big_endian", [False, True])
def test_driver_and_simulator_over_pyvisa_py(sim, big_endian):
    an = _analyzer(sim, big_endian=big_endian)
    try:
        ident = an.initialize()
        # IEEE 488.2 *IDN?: four comma-separated fields
        assert len(ident.split(",")) == 4
        sim.state.tool = 0  # far field: antenna on the mast
        an.configure(SweepSettings(start_hz=96e6, stop_hz=99e6, rbw_hz=120e3, vbw_hz=360e3, points=1001))
        an.sweep()
        trace_dbm = an.fetch_trace(1001)
    finally:
        an.transport.close()
    freq = np.linspace(96e6, 99e6, 1001)
    # The FM ambient carrier near 97.3 MHz is a CW line: the peak of the trace must read the world's
    # line level within the worst-case scalloping at a 3 kHz step (Gaussian RBW
    # filter, derived: docs/physics.md)
    lines = [ln for ln in sim.world.lines(sim.state, 96e6, 99e6) if ln.source.startswith("fm-broadcast-97")]
    assert lines, "the demo board has an FM ambient carrier at 97.3 MHz"
    expected = 10 * np.log10(sum(10 ** (ln.level_dbm / 10) for ln in lines))
    i = int(np.argmax(trace_dbm))
    assert abs(freq[i] - lines[0].freq_hz) <= 3e3
    step_db = 6 * (2 * 1.5e3 / 120e3) ** 2  # 6*(2*df/B6)^2 at df = step/2 (derived)
    assert trace_dbm[i] == pytest.approx(expected, abs=step_db + 0.3)


def test_instrument_error_reaches_the_user_with_scpi_code(sim):
    an = _analyzer(sim)
    try:
        an.initialize()
        an.transport.write("FREQ:STAR 99 GHZ")  # outside 9 kHz..7 GHz of the simulated analyzer
        with pytest.raises(Exception) as info:
            an.check_errors("FREQ:STAR 99 GHZ")
    finally:
        an.transport.close()
    # SCPI-1999 error -222 "Data out of range"
    assert info.value.code == -222
    assert "Data out of range" in str(info.value)


def _write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


QUICK = """
schema = 1
name = "e2e-quick"
[sweeps.cd]
start = "30 MHz"
stop = "300 MHz"
rbw = "120 kHz"
points = 4501
[[steps]]
kind = "ambient"
label = "ambient"
sweep = "cd"
[[steps]]
kind = "sweep"
label = "on"
sweep = "cd"
ambient = "ambient"
limit = "cispr32-class-b-3m"
"""


def test_bench_run_writes_a_complete_run(tmp_path, capsys):
    seq = _write(tmp_path / "quick.toml", QUICK)
    code = main(["run", str(seq), "--sim", "--out", str(tmp_path / "runs")])
    out = capsys.readouterr()
    assert code == 0, out.err
    (folder,) = list((tmp_path / "runs").iterdir())
    run = open_run(folder)
    manifest = run.manifest()
    assert manifest["state"] == "complete"
    assert manifest["instruments"]["analyzer"].count(",") == 3
    meta = run.traces()
    assert list(meta["step_label"]) == ["ambient", "on"]
    assert list(meta["board_powered"]) == [0, 1]  # the supply switched the board off for the ambient
    assert (folder / "report.html").is_file()
    assert (folder / "plots" / "on-spectrum.png").is_file()
    # The board adds emissions: its 72 MHz clock harmonic (3 x 24 MHz, demo board) stands far
    # above the ambient capture, while the FM ambient carrier at 97.3 MHz is in both
    f, amb = run.trace(int(meta.id[0]))
    _, on = run.trace(int(meta.id[1]))
    near_72 = np.abs(f - 72e6) < 150e3
    near_fm = np.abs(f - 97.3e6) < 150e3
    assert on[near_72].max() > amb[near_72].max() + 10.0
    assert abs(on[near_fm].max() - amb[near_fm].max()) < 3.0
    run.close()
    assert "run folder " in out.out and out.out.splitlines()[-1].startswith("This pre-scan is an estimate")


def test_bad_sequence_is_one_line_and_writes_nothing(tmp_path, capsys):
    seq = _write(tmp_path / "bad.toml", QUICK.replace('rbw = "120 kHz"', "rbw = 120000"))
    code = main(["run", str(seq), "--sim", "--out", str(tmp_path / "runs")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert err == [f'emission-bench: {seq}:7: sweeps.cd.rbw: expected a frequency like "120 kHz", found the bare '
                   'number 120000 (write the unit, in quotes)']
    assert not (tmp_path / "runs").exists()


def test_missing_file_and_bad_fault_option_are_one_line(tmp_path, capsys):
    assert main(["check", str(tmp_path / "nope.toml"), "--sim"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "nope.toml" in err[0]
    seq = _write(tmp_path / "quick.toml", QUICK)
    assert main(["run", str(seq), "--sim", "--fault", "explode=1", "--out", str(tmp_path / "runs")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--fault" in err[0]
    assert not (tmp_path / "runs").exists()


def test_check_prints_plan_without_touching_instruments(tmp_path, capsys):
    # addresses of a real bench (documentation range, RFC 5737): check must not contact them
    bench = _bench_variant(tmp_path, lambda t: t)
    seq = _write(tmp_path / "quick.toml", QUICK)
    assert main(["check", str(seq), "--bench", str(bench)]) == 0
    out = capsys.readouterr().out
    # 270 MHz span at the default step RBW/2 = 60 kHz -> but points = 4501 given: 2 traces of 4501 points
    assert "4501 points" in out and "check: OK" in out


def test_dropped_connection_is_recovered_within_the_run(tmp_path, capsys):
    seq = _write(tmp_path / "quick.toml", QUICK)
    code = main(["run", str(seq), "--sim", "--no-plots", "--fault", "drop-after-sweeps=1",
                 "--out", str(tmp_path / "runs")])
    assert code == 0, capsys.readouterr().err
    (folder,) = list((tmp_path / "runs").iterdir())
    run = open_run(folder)
    assert run.manifest()["faults_recovered"] >= 1
    assert len(run.traces()) == 2  # no duplicate, no missing trace
    assert any("connection" in t or "reply" in t for t in run.events()["text"])
    run.close()


def test_interrupted_run_resumes_exactly(tmp_path, capsys):
    seq = _write(tmp_path / "quick.toml", QUICK + """
[[steps]]
kind = "sweep"
label = "again"
sweep = "cd"
""")
    # the analyzer drops the link after its 2nd sweep and then refuses more connections than the
    # reconnect policy tries: the run must stop cleanly as 'interrupted'
    code = main(["run", str(seq), "--sim", "--no-plots", "--fault", "drop-after-sweeps=2",
                 "--fault", "refuse-after-drop=50", "--out", str(tmp_path / "runs")])
    err = capsys.readouterr().err
    assert code == 3, err
    assert "bench resume" in err
    (folder,) = list((tmp_path / "runs").iterdir())
    ro = open_run(folder)
    assert ro.manifest()["state"] == "interrupted"
    done_before = len(ro.traces())
    ro.close()
    assert done_before == 1  # the 2nd trace was in flight when the link dropped
    assert main(["resume", str(folder), "--no-plots"]) == 0, capsys.readouterr().err
    run = open_run(folder)
    meta = run.traces()
    assert run.manifest()["state"] == "complete"
    assert list(meta["step_label"]) == ["ambient", "on", "again"]
    assert meta["action_index"].is_unique
    resumed = [run.trace(int(i))[1] for i in meta.id]
    run.close()
    # the same sequence and seed without the interruption measures the same traces, bit for bit
    assert main(["run", str(seq), "--sim", "--no-plots", "--out", str(tmp_path / "whole")]) == 0
    for got, want in zip(resumed, _all_traces(tmp_path / "whole"), strict=True):
        np.testing.assert_array_equal(got, want)


def _all_traces(runs: Path) -> list[np.ndarray]:
    """Levels of every trace of the single run in ``runs``, in measurement order."""
    (folder,) = list(runs.iterdir())
    run = open_run(folder)
    try:
        return [run.trace(int(i))[1] for i in run.traces().id]
    finally:
        run.close()


def test_two_runs_of_one_sequence_and_seed_give_identical_traces(tmp_path, capsys):
    seq = _write(tmp_path / "quick.toml", QUICK)
    for name in ("first", "second"):
        code = main(["run", str(seq), "--sim", "--seed", "4", "--no-plots",
                     "--out", str(tmp_path / name)])
        assert code == 0, capsys.readouterr().err
    first, second = _all_traces(tmp_path / "first"), _all_traces(tmp_path / "second")
    assert len(first) == len(second) == 2
    for a, b in zip(first, second, strict=True):
        np.testing.assert_array_equal(a, b)


def _single_emitter_board(tmp_path: Path, x_mm: float, y_mm: float) -> Path:
    data = tomllib.loads((DEMO / "demo-board.toml").read_text(encoding="utf-8"))
    spur = next(e for e in data["emitters"] if e["kind"] == "spur")
    spur.update(position=[f"{x_mm} mm", f"{y_mm} mm"], axis=[0, 0, 1], frequency="150 MHz", current="20 mA")
    data["emitters"] = [spur]
    data["ambient"] = []
    path = tmp_path / "one-emitter.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    parse_board(path.read_text(encoding="utf-8"), str(path))  # valid board file
    return path


def test_grid_scan_puts_the_hot_spot_on_a_known_emitter(tmp_path, capsys):
    from bench.analysis.maps import grid_maps

    board = _single_emitter_board(tmp_path, 37.0, 52.0)
    seq = _write(tmp_path / "grid.toml", """
schema = 1
name = "one-emitter-grid"
[sweeps.nf]
start = "140 MHz"
stop = "160 MHz"
rbw = "120 kHz"
points = 2001
[[steps]]
kind = "grid"
label = "hloop"
sweep = "nf"
probe = "hloop-10mm"
area = { x = ["0 mm", "100 mm"], y = ["0 mm", "80 mm"] }
step_size = "5 mm"
height = "3 mm"
""")
    code = main(["run", str(seq), "--sim", "--board", str(board), "--no-plots", "--out", str(tmp_path / "runs")])
    assert code == 0, capsys.readouterr().err
    (folder,) = list((tmp_path / "runs").iterdir())
    run = open_run(folder)
    maps = grid_maps(run, "hloop", freq_hz=150e6)
    x, y, _ = maps.peak()
    # A flat current loop: the tangential H above it peaks at rho = z/2 from the axis (magnetic
    # dipole, Balanis eq. 5-18 static limit H_rho ~ 3 rho z / r^5), i.e. within one 5 mm grid step
    assert np.hypot(x - 0.037, y - 0.052) <= 0.005 * np.sqrt(2) + 1e-9
    assert set(run.traces()["rotation_deg"]) == {0.0, 90.0}  # H loop tried in both orientations
    run.close()


FAR = """
schema = 1
name = "e2e-far"
[sweeps.cd]
start = "30 MHz"
stop = "1 GHz"
rbw = "120 kHz"
[[steps]]
kind = "ambient"
label = "ambient"
sweep = "cd"
height = "1 m"
polarization = "horizontal"
azimuth = "0 deg"
[[steps]]
kind = "prescan"
label = "prescan"
sweep = "cd"
heights = { from = "1 m", to = "4 m", step = "1 m" }
polarizations = ["horizontal", "vertical"]
azimuths = { from = "0 deg", to = "270 deg", step = "90 deg" }
limit = "cispr32-class-b-3m"
ambient = "ambient"
margin = "3 dB"
[[steps]]
kind = "final"
label = "final"
of = "prescan"
detectors = ["quasi-peak", "cispr-average"]
"""


def test_far_field_prescan_suspects_ambient_and_finals(tmp_path, capsys):
    seq = _write(tmp_path / "far.toml", FAR)
    code = main(["run", str(seq), "--sim", "--no-plots", "--out", str(tmp_path / "runs")])
    assert code == 0, capsys.readouterr().err
    (folder,) = list((tmp_path / "runs").iterdir())
    run = open_run(folder)
    pre = run.results("prescan")
    fin = run.results("final")
    run.close()
    # The FM broadcast carrier (97.3 MHz) is over the 40 dBuV/m line (CISPR 32 Table A.4 clause A4.2)
    # but the ambient capture shows it: it must be marked ambient, not fail.
    fm = pre[(pre.freq_hz - 97.3e6).abs() < 0.3e6]
    assert list(fm.status) == ["ambient"]
    # The demo board's cable resonance makes its 72 MHz clock harmonic fail (demo scenario)
    assert "fail" in set(pre[(pre.freq_hz - 72e6).abs() < 0.3e6].status)
    # Every non-ambient suspect has final readings with peak, quasi-peak and average
    suspects = pre[pre.status.isin(["fail", "marginal"])]
    assert len(suspects) > 0
    for f in suspects.freq_hz:
        # the final step re-centres on the signal within +-RBW before reading it
        dets = set(fin[(fin.freq_hz - f).abs() <= 120e3].detector)
        assert dets == {"peak", "quasi-peak", "cispr-average"}
    # No ambient signal is remeasured
    assert fin[(fin.freq_hz - 97.3e6).abs() < 0.3e6].empty
    # On one signal at one pose: peak >= quasi-peak >= average (CISPR 16-1-1
    # detector definitions; common practice); a small
    # allowance for the receiver noise of separate sweeps
    for f, g in fin.groupby("freq_hz"):
        lv = dict(zip(g.detector, g.level))
        assert lv["peak"] >= lv["quasi-peak"] - 0.5 >= lv["cispr-average"] - 1.0
    # The burst-modulated radio harmonic (867.84 MHz, 10 % duty) reads far lower on the average
    # detector: AVG ~ peak + 20 log10(duty) = -20 dB for a long dwell
    # (derived; CISPR 16-1-1 average detector)
    burst = fin[(fin.freq_hz - 867.84e6).abs() < 0.3e6]
    if not burst.empty:
        lv = dict(zip(burst.detector, burst.level))
        assert lv["peak"] - lv["cispr-average"] > 10.0
    # Final readings under 1 GHz are compared with the quasi-peak line; CISPR 32 has no average
    # line there (Table A.4), so the average reading is information only
    assert set(fin[fin.detector == "cispr-average"].status) == {"info"}
    assert set(fin[fin.detector == "quasi-peak"].status) <= {"pass", "marginal", "fail"}


@pytest.mark.parametrize(
    ("change", "fragment"),
    [
        (('limit = "cispr32-class-b-3m"', 'limit = "cispr99-class-z"'), "limit 'cispr99-class-z' cannot be used"),
        (('start = "30 MHz"', 'start = "1 kHz"'), "outside 9 kHz-7 GHz"),
        (('limit = "cispr32-class-b-3m"', 'limit = "my-limits/none.toml"'), "cannot be used"),
    ],
)
def test_check_catches_what_would_fail_mid_run(tmp_path, capsys, change, fragment):
    seq = _write(tmp_path / "quick.toml", QUICK.replace(*change))
    code = main(["check", str(seq), "--sim"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and fragment in err[0], err


def _bench_variant(tmp_path: Path, edit) -> Path:
    text = (DEMO / "demo-bench.toml").read_text(encoding="utf-8")
    text = text.replace('"tables/', f'"{DEMO}/tables/')
    # addresses of a real bench (documentation range, RFC 5737): checks must never contact them
    for placeholder, address in (("sim://analyzer", "TCPIP::192.0.2.10::5025::SOCKET"),
                                 ("sim://supply", "TCPIP::192.0.2.11::5025::SOCKET"),
                                 ("sim://stage", "/dev/ttyUSB0"), ("sim://mast", "/dev/ttyUSB1"),
                                 ("sim://turntable", "/dev/ttyUSB2")):
        text = text.replace(f'"{placeholder}"', f'"{address}"')
    path = tmp_path / "bench-variant.toml"
    path.write_text(edit(text), encoding="utf-8")
    return path


def test_placeholder_address_without_sim_is_refused(tmp_path, capsys):
    seq = _write(tmp_path / "quick.toml", QUICK)
    assert main(["run", str(seq), "--bench", str(DEMO / "demo-bench.toml"), "--out", str(tmp_path / "runs")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "placeholder for the simulated bench" in err[0]
    assert not (tmp_path / "runs").exists()


def test_limit_in_the_wrong_unit_is_refused(tmp_path, capsys):
    # a conducted limit (dBuV, CISPR 32 Table A.10) on a radiated step (dBuV/m): a silent pass otherwise
    seq = _write(tmp_path / "quick.toml", QUICK.replace("cispr32-class-b-3m", "cispr32-conducted-class-b"))
    assert main(["check", str(seq), "--sim"]) == 2
    assert "is in dbuv, but the step's readings are in dbuv_per_m" in capsys.readouterr().err


def test_ambient_without_supply_is_refused_before_running(tmp_path, capsys):
    bench = _bench_variant(tmp_path, lambda t: t.split("[supply]")[0])
    seq = _write(tmp_path / "quick.toml", QUICK)
    assert main(["check", str(seq), "--bench", str(bench)]) == 2
    assert "no [supply]" in capsys.readouterr().err


def test_two_orientations_need_a_rotary_axis(tmp_path, capsys):
    bench = _bench_variant(tmp_path, lambda t: t.replace("rotary_axis = true", "rotary_axis = false"))
    seq = _write(tmp_path / "grid.toml", """
schema = 1
name = "g"
[sweeps.nf]
start = "30 MHz"
stop = "60 MHz"
rbw = "120 kHz"
points = 501
[[steps]]
kind = "grid"
label = "hloop"
sweep = "nf"
probe = "hloop-10mm"
area = { x = ["0 mm", "20 mm"], y = ["0 mm", "20 mm"] }
step_size = "10 mm"
height = "3 mm"
""")
    assert main(["check", str(seq), "--bench", str(bench)]) == 2
    assert "no rotary axis" in capsys.readouterr().err


def test_ctrl_c_keeps_a_resumable_run(tmp_path):
    """SIGINT mid-run: exit 130, the run marked interrupted with a resume hint, then resumed exactly."""
    import os
    import signal
    import subprocess
    import sys
    import time

    many = QUICK + "".join(f'\n[[steps]]\nkind = "sweep"\nlabel = "s{i}"\nsweep = "cd"\n' for i in range(400))
    seq = _write(tmp_path / "many.toml", many)
    runs = tmp_path / "runs"
    # the simulated analyzer stops answering after sweep 50 (until the 10 s reply deadline): the
    # run cannot end before the SIGINT, however slowly this process polls on a loaded machine
    proc = subprocess.Popen([sys.executable, "-c", "import sys; from bench.cli import main; sys.exit(main())",
                             "run", str(seq), "--sim", "--no-plots", "--out", str(runs),
                             "--fault", "hang-after-sweeps=50"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            cwd=tmp_path)  # not the repository: its bench/ folder would shadow the install
    try:
        deadline = time.monotonic() + 60
        # wait for a condition (traces committed), not for a time window
        while time.monotonic() < deadline:
            dbs = list(runs.glob("*/data.sqlite")) if runs.exists() else []
            if dbs:
                try:
                    ro = open_run(dbs[0].parent)
                    n = len(ro.traces())
                    ro.close()
                except Exception:  # noqa: BLE001 - the database may be mid-creation
                    n = 0
                if n >= 5:
                    break
            time.sleep(0.05)
        os.kill(proc.pid, signal.SIGINT)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, err
    assert "bench resume" in err
    (folder,) = list(runs.iterdir())
    ro = open_run(folder)
    assert ro.manifest()["state"] == "interrupted"
    assert ro.manifest()["interrupted_reason"] == "stopped by the operator"
    ro.close()
    assert main(["resume", str(folder), "--no-plots"]) == 0
    run = open_run(folder)
    meta = run.traces()
    assert run.manifest()["state"] == "complete"
    assert len(meta) == 402 and meta["action_index"].is_unique  # every planned action exactly once
    run.close()
