"""Bench files: malformed corpus, the demo bench, paths relative to the bench file."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from bench.benchfile import load_bench
from bench.errors import ConfigError
from bench.stagelimits import StageLimits

MALFORMED = Path(__file__).parent / "malformed"
DEMO = Path(__file__).parent.parent / "sequences"
EXPECTED = tomllib.loads((MALFORMED / "expected.toml").read_text(encoding="utf-8"))
BENCH_CASES = sorted(name for name in EXPECTED if name.startswith("bench-"))


@pytest.mark.parametrize("name", BENCH_CASES)
def test_malformed_bench_gives_exactly_its_line(name, monkeypatch):
    monkeypatch.chdir(MALFORMED)
    with pytest.raises(ConfigError) as info:
        load_bench(name, check_files=(name == "bench-missing-table.toml"))
    assert str(info.value) == EXPECTED[name]


def test_demo_bench_values_in_si():
    bench = load_bench(DEMO / "demo-bench.toml", check_files=False)
    stage = bench.stage
    assert stage.limits.x_m == pytest.approx((0.0, 0.3))
    assert stage.board_origin_m == pytest.approx((0.06, 0.04, 0.015))
    assert stage.safe_z_m == pytest.approx(0.04)
    assert stage.max_feed_m_per_s == pytest.approx(0.05)
    assert bench.site.distance_m == 3.0  # 3 m test distance (CISPR 32 Table A.4 clause A4.2)
    assert bench.mast.height_limits_m == (1.0, 4.0)  # 1-4 m height scan (CISPR 16-2-3)
    assert bench.turntable.azimuth_limits_deg == (0.0, 360.0)  # 0-360 deg (CISPR 16-2-3)
    assert {n: (p.kind, p.tool) for n, p in bench.probes.items()} == {
        "hloop-10mm": ("h-loop", 1), "hloop-3mm": ("h-loop", 2), "eprobe": ("e-probe", 4)}
    assert bench.warnings == ()


def test_stage_section_produces_the_driver_limits():
    stage = load_bench(DEMO / "demo-bench.toml", check_files=False).stage
    limits = stage.safety_limits
    assert isinstance(limits, StageLimits)  # the one type the stage driver and the planner take
    assert (limits.x_m, limits.y_m, limits.z_m) == (stage.limits.x_m, stage.limits.y_m, stage.limits.z_m)
    assert (limits.safe_z_m, limits.max_feed_m_per_s, limits.position_tolerance_m) == (
        stage.safe_z_m, stage.max_feed_m_per_s, stage.position_tolerance_m)
    assert limits.rotary_axis is True
    assert limits.a_deg == (-360.0, 360.0)  # no `a` in the demo bench: one turn either way


def test_stage_baudrate_defaults_to_the_profile(tmp_path):
    text = (DEMO / "demo-bench.toml").read_text(encoding="utf-8").replace("baudrate = 115200\n", "")
    (tmp_path / "bench.toml").write_text(text, encoding="utf-8")
    assert load_bench(tmp_path / "bench.toml", check_files=False).stage.baudrate is None


def test_demo_bench_tables_exist():
    bench = load_bench(DEMO / "demo-bench.toml")  # check_files: every table is there
    assert bench.transducers.antenna == DEMO / "tables" / "bilog-af.csv"


def test_paths_resolve_relative_to_the_bench_file(tmp_path, monkeypatch):
    folder = tmp_path / "station"
    (folder / "tables").mkdir(parents=True)
    (folder / "tables" / "af.csv").write_text("freq_hz,af_db_per_m\n")
    (folder / "bench.toml").write_text(
        'schema = 1\nname = "b"\n[analyzer]\naddress = "TCPIP::127.0.0.1::5025::SOCKET"\n'
        '[transducers]\nantenna = "tables/af.csv"\n')
    monkeypatch.chdir(tmp_path)  # elsewhere: the path must not depend on the working folder
    bench = load_bench("station/bench.toml")
    assert bench.transducers.antenna == Path("station") / "tables" / "af.csv"
    assert bench.transducers.antenna.is_file()
    assert bench.stage is None and bench.probes == {}
    assert bench.analyzer.timeout_s == 10.0 and bench.analyzer.profile == "scpi-analyzer"
