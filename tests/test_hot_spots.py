"""Hot spots of near-field maps measured on simulated boards built here.

The boards are the demo board with its emitters replaced by current loops placed by the test
(board format: docs/board-format.md), scanned by the 10 mm H loop in two orientations over the
simulated bench, end to end.
"""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import tomli_w

from bench.analysis.maps import EDGE_NOTE, grid_maps
from bench.cli import main
from bench.sim.board import parse_board
from bench.store import open_run

DEMO = Path(str(resources.files("bench.demo")))
STEP_M = 0.005  # grid pitch of the scans below

SEQUENCE = """
schema = 1
name = "hot-spot-grid"
[sweeps.nf]
start = "145 MHz"
stop = "155 MHz"
rbw = "120 kHz"
points = 401
[[steps]]
kind = "grid"
label = "hloop"
sweep = "nf"
probe = "hloop-10mm"
area = {{ x = ["{x0} mm", "{x1} mm"], y = ["{y0} mm", "{y1} mm"] }}
step_size = "5 mm"
height = "3 mm"
"""


def _board(tmp_path: Path, loops: list[tuple[float, float, str]], axis=(0, 0, 1)) -> Path:
    """The demo board with only current loops at 150 MHz: (x mm, y mm, current); flat by default."""
    data = tomllib.loads((DEMO / "demo-board.toml").read_text(encoding="utf-8"))
    spur = next(e for e in data["emitters"] if e["kind"] == "spur")
    data["emitters"] = [dict(spur, name=f"loop-{i}", position=[f"{x} mm", f"{y} mm"],
                             axis=list(axis), frequency="150 MHz", current=current,
                             tolerance_ppm=0)
                        for i, (x, y, current) in enumerate(loops)]
    data["ambient"] = []
    path = tmp_path / "board.toml"
    path.write_text(tomli_w.dumps(data), encoding="utf-8")
    parse_board(path.read_text(encoding="utf-8"), str(path))  # a valid board file
    return path


def _scan(tmp_path: Path, board: Path, area_mm: tuple[float, float, float, float]):
    seq = tmp_path / "grid.toml"
    x0, x1, y0, y1 = area_mm
    seq.write_text(SEQUENCE.format(x0=x0, x1=x1, y0=y0, y1=y1), encoding="utf-8")
    code = main(["run", str(seq), "--sim", "--board", str(board), "--no-plots", "--out",
                 str(tmp_path / "runs")])
    assert code == 0
    (folder,) = list((tmp_path / "runs").iterdir())
    return open_run(folder)


def _near(spots, x_m: float, y_m: float):
    """The hot spots within one grid step of (x_m, y_m) along both axes."""
    return spots[(np.abs(spots["x_m"] - x_m) <= STEP_M + 1e-9)
                 & (np.abs(spots["y_m"] - y_m) <= STEP_M + 1e-9)]


@pytest.mark.slow
def test_two_emitters_of_different_strength_are_both_listed(tmp_path):
    # a strong loop (20 mA) and one 12 dB weaker (5 mA: 20*log10(20/5) = 12.04 dB, same
    # moment area) 35 mm apart, both well inside the scanned area
    board = _board(tmp_path, [(20.0, 25.0, "20 mA"), (55.0, 20.0, "5 mA")])
    run = _scan(tmp_path, board, (0.0, 75.0, 0.0, 45.0))
    maps = grid_maps(run, "hloop", freq_hz=150e6)
    spots = maps.hot_spots("combined")
    strong, weak = _near(spots, 0.020, 0.025), _near(spots, 0.055, 0.020)
    # each within one grid step of its true position: a flat loop's tangential H peaks at
    # rho = z/2 from its axis (Balanis eq. 5-18, static limit), 1.5 mm here
    assert len(strong) == 1 and len(weak) == 1, spots
    assert strong["rank"].iloc[0] == 1 and weak["rank"].iloc[0] == 2
    # 1/r^3 near field: the col between them lies far below the weaker peak (derived)
    assert weak["prominence_db"].iloc[0] >= 6.0
    assert strong["level"].iloc[0] - weak["level"].iloc[0] == pytest.approx(12.04, abs=2.0)
    assert not spots["at_edge"].any()
    # the single strongest reading knows only the strong loop; the weak one shows on the map
    x, y, _ = maps.peak()
    assert abs(x - 0.020) <= STEP_M and abs(y - 0.025) <= STEP_M
    run.close()


@pytest.mark.slow
def test_an_emitter_on_the_edge_of_the_scanned_area_is_flagged(tmp_path):
    # one loop on the left border of the scan (x = 0 mm), one well inside. Their axes lie along
    # x, so the tangential field, and the map, peak right above each centre: over a flat loop
    # the map is a ring whose highest cell, one step off the centre, the noise would choose.
    board = _board(tmp_path, [(0.0, 20.0, "20 mA"), (40.0, 20.0, "20 mA")], axis=(1, 0, 0))
    run = _scan(tmp_path, board, (0.0, 60.0, 0.0, 40.0))
    maps = grid_maps(run, "hloop", freq_hz=150e6)
    spots = maps.hot_spots("combined")
    edge, inner = _near(spots, 0.0, 0.020), _near(spots, 0.040, 0.020)
    assert len(edge) == 1 and len(inner) == 1, spots
    assert bool(edge["at_edge"].iloc[0]) and not bool(inner["at_edge"].iloc[0])
    # the report says so in the table (and rings it on the map)
    from bench.report import write_report

    text = write_report(run).read_text(encoding="utf-8")
    assert EDGE_NOTE in text
    run.close()
