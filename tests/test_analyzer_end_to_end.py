"""The analyzer end to end against the simulated bench: other wires, other dialects.

``bench run ... --sim --bench FILE`` simulates the instruments of FILE; an analyzer the bench file
reaches at a ``socket://`` URL is reached at the simulator's ``socket://`` URL (pyserial), not at
its VISA resource, so these runs exercise the wire a real bench with that address would use.
"""

from __future__ import annotations

import sqlite3
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from bench.benchfile import load_bench
from bench.cli import main
from bench.drivers.analyzer import Analyzer, SweepSettings, load_analyzer_profile
from bench.sim.board import demo_board
from bench.simbench import SimulatedBench, start_simulated_bench
from bench.store import open_run
from bench.transports import open_transport

DEMO = Path(str(resources.files("bench.demo")))


def _bench(tmp_path: Path, name: str, **analyzer_changes: str) -> Path:
    """The demo bench with absolute table paths and the given [analyzer] keys replaced."""
    text = (DEMO / "demo-bench.toml").read_text(encoding="utf-8").replace('"tables/', f'"{DEMO}/tables/')
    defaults = {"address": '"sim://analyzer"', "profile": '"scpi-analyzer"'}
    for key, value in analyzer_changes.items():
        text = text.replace(f"{key} = {defaults[key]}", f"{key} = {value}", 1)
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _traces(folder: Path) -> list[bytes]:
    with sqlite3.connect(folder / "data.sqlite") as con:
        return [row[0] for row in con.execute("SELECT data FROM traces ORDER BY action_index, segment")]


def _run(tmp_path: Path, out: str, *extra: str) -> Path:
    code = main(["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots", "--out", str(tmp_path / out), *extra])
    assert code == 0
    (folder,) = list((tmp_path / out).iterdir())
    assert open_run(folder).manifest()["state"] == "complete"
    return folder


def test_sim_keeps_the_socket_scheme_of_the_bench_file(tmp_path):
    bench = load_bench(_bench(tmp_path, "socket.toml", address='"socket://192.0.2.10:5025"'))
    sim, simulated = start_simulated_bench(bench)
    try:
        assert simulated.analyzer.address == sim.addresses["analyzer_socket"]
        assert simulated.analyzer.address.startswith("socket://127.0.0.1:")
        assert simulated.supply.address.startswith("TCPIP::127.0.0.1::")  # a sim:// placeholder
    finally:
        sim.stop()


def test_an_analyzer_at_a_socket_url_runs_the_demo_like_one_at_a_visa_resource(tmp_path, capsys):
    socket_bench = _bench(tmp_path, "socket.toml", address='"socket://192.0.2.10:5025"')
    over_socket = _run(tmp_path, "socket", "--bench", str(socket_bench))
    over_visa = _run(tmp_path, "visa")
    capsys.readouterr()
    traces = _traces(over_socket)
    assert len(traces) == 3  # ambient, one sweep, one max-hold of 5 sweeps (demo-quick)
    assert traces == _traces(over_visa)  # same seed, same simulator: the wire changes nothing


# ------------------------------------------------------------------ another dialect, end to end


def _sweep_once(address: str, profile_name: str, sleeps: list) -> np.ndarray:
    profile = load_analyzer_profile(profile_name)
    analyzer = Analyzer(open_transport(address, profile.io), profile, sleep=sleeps.append)
    try:
        analyzer.initialize()
        analyzer.configure(SweepSettings(start_hz=30e6, stop_hz=1e9, rbw_hz=30e3, vbw_hz=100e3, points=2001))
        analyzer.sweep()
        return analyzer.fetch_trace(2001)
    finally:
        analyzer.close()


@pytest.mark.parametrize("wire", ["analyzer", "analyzer_socket"])
def test_the_polled_dialect_against_the_simulator_reads_the_same_trace(wire):
    traces, sleeps = {}, []
    for name in ("scpi-analyzer", "scpi-analyzer-polled"):
        sim = SimulatedBench(demo_board(), seed=3)  # a fresh simulator: the same noise for sweep 1
        sim.start()
        try:
            traces[name] = _sweep_once(sim.addresses[wire], name, sleeps if name.endswith("polled") else [])
        finally:
            sim.stop()
    # REAL,64 big-endian and REAL,32 little-endian carry one trace, stored as float32
    np.testing.assert_array_equal(traces["scpi-analyzer-polled"], traces["scpi-analyzer"])
    # ST = 2.5 * 970 MHz / (30 kHz)^2 = 2.69 s: the simulator shows SWEeping for 53 polls of 50 ms,
    # the 54th poll finds it clear; the driver waits its poll interval between two polls
    assert sleeps == [0.05] * 53


def test_bench_run_with_the_polled_dialect_stores_what_the_default_dialect_stores(tmp_path, capsys):
    polled = _bench(tmp_path, "polled.toml", profile='"scpi-analyzer-polled"')
    with_polled = _run(tmp_path, "polled", "--bench", str(polled))
    with_default = _run(tmp_path, "default")
    capsys.readouterr()
    assert _traces(with_polled) == _traces(with_default)


def test_a_profile_the_simulator_contradicts_stops_the_run_with_one_line_naming_the_key(tmp_path, capsys):
    # the profile declares big-endian data but its byte_order_big command asks for little-endian
    text = (resources.files("bench.drivers") / "profiles" / "scpi-analyzer.toml").read_text(encoding="utf-8")
    text = text.replace('byte_order = "little"', 'byte_order = "big"').replace(
        'byte_order_big = "FORM:BORD NORM"', 'byte_order_big = "FORM:BORD SWAP"')
    profile = tmp_path / "wrong-order.toml"
    profile.write_text(text, encoding="utf-8")
    bench = _bench(tmp_path, "wrong.toml", profile=f'"{profile}"')
    code = main(["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots", "--bench", str(bench),
                 "--out", str(tmp_path / "runs")])
    err = capsys.readouterr().err.strip().splitlines()
    line = text[:text.index('byte_order = "big"')].count("\n") + 1
    assert code == 2
    assert err[-1].startswith(f"emission-bench: {profile}:{line}: trace.byte_order: TCPIP::127.0.0.1::")
    assert "emission-bench resume" in err[-1]  # the run is kept: fix the profile, then resume
    assert "sends little-endian real32 values" in err[-1]
    (folder,) = list((tmp_path / "runs").iterdir())
    manifest = open_run(folder).manifest()
    assert manifest["state"] == "interrupted"
    assert "reconnect" not in (folder / "run.log").read_text(encoding="utf-8")  # no retry loop
