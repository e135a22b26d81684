"""The analyzer end to end against the simulated bench: other wires, other dialects.

``bench run ... --sim --bench FILE`` simulates the instruments of FILE; an analyzer the bench file
reaches at a ``socket://`` URL is reached at the simulator's ``socket://`` URL (pyserial), not at
its VISA resource, so these runs exercise the wire a real bench with that address would use.
"""

from __future__ import annotations

import sqlite3
from importlib import resources
from pathlib import Path

from bench.benchfile import load_bench
from bench.cli import main
from bench.simbench import start_simulated_bench
from bench.store import open_run

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
