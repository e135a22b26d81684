"""Planner: segmentation, time estimates, grids, limits, far-field order, plan text."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from matplotlib.path import Path as MplPath

from bench.benchfile import load_bench
from bench.errors import PlanError, SafetyLimitError
from bench.planner import make_plan
from bench.planning import (
    AnalyzerCaps,
    BenchCaps,
    FarFieldPose,
    MastCaps,
    ProbeCaps,
    StageCaps,
    StagePose,
    TurntableCaps,
    bench_caps,
    scalloping_db,
    segment_sweep,
    stage_move_time_s,
    sweep_time_s,
    transfer_time_s,
    trapezoid_move_time_s,
)
from bench.stagelimits import StageLimits
from bench.steps.grid import grid_positions, inside_polygon
from bench.sequence import load_sequence

DEMO = Path(__file__).parent.parent / "sequences"

# A stage like the demo bench: 300 x 200 x 60 mm, travel at 40 mm, 50 mm/s, 0.5 m/s^2.
STAGE = StageCaps(limits=StageLimits(x_m=(0.0, 0.3), y_m=(0.0, 0.2), z_m=(0.0, 0.06), safe_z_m=0.04,
                                     max_feed_m_per_s=0.05, rotary_axis=True),
                  accel_m_per_s2=0.5, board_origin_m=(0.05, 0.04, 0.01))
PROBES = {"hloop-10mm": ProbeCaps("h-loop", 1), "eprobe": ProbeCaps("e-probe", 3)}
CAPS = BenchCaps(analyzer=AnalyzerCaps(), stage=STAGE,
                 mast=MastCaps((1.0, 4.0), speed_m_per_s=0.2, polarization_change_s=5.0),
                 turntable=TurntableCaps((0.0, 360.0), speed_deg_per_s=10.0), probes=PROBES)


def sequence_from(tmp_path, sweeps: str, steps: str):
    path = tmp_path / "seq.toml"
    path.write_text(f'schema = 1\nname = "t"\n{sweeps}\n{steps}')
    return load_sequence(path)


BAND_CD = '[sweeps.s]\nstart = "30 MHz"\nstop = "1 GHz"\nrbw = "120 kHz"\n'


RECT = 'area = { x = ["0 mm", "100 mm"], y = ["0 mm", "80 mm"] }'


def grid_step(extra: str = "", area: str = RECT):
    return (f'[[steps]]\nkind = "grid"\nlabel = "g"\nsweep = "s"\nprobe = "hloop-10mm"\n'
            f'{area}\nstep_size = "5 mm"\nheight = "3 mm"\n{extra}')


# --------------------------------------------------------------------------- frequency axis


def test_scalloping_matches_derived_table():
    # Gaussian RBW, worst case at step/2 (derived, docs/physics.md section 8): step B6/2 ->
    # 1.50 dB, B6/3 -> 0.67 dB, B6/4 -> 0.38 dB
    # (the table gives two decimals, so compare at two decimals)
    b6_hz = 120e3
    table = {2: "1.50", 3: "0.67", 4: "0.38"}
    assert {n: f"{scalloping_db(b6_hz / n, b6_hz):.2f}" for n in table} == table


def test_band_cd_is_split_into_two_equal_segments(tmp_path):
    sweep = sequence_from(tmp_path, BAND_CD, '[[steps]]\nkind = "sweep"\nlabel = "a"\n'
                          'sweep = "s"\n').sweeps["s"]
    segments = segment_sweep(sweep, AnalyzerCaps(max_points=10001))
    # span 970 MHz at step rbw/2 = 60 kHz: ceil(970e6/60e3) + 1 = 16168 points > 10001;
    # 2 segments of 485 MHz: ceil(485e6/60e3) + 1 = 8084 + 1 = 8085 points each,
    # spacing 485e6/8084 = 59.995 kHz <= 60 kHz
    assert [(s.start_hz, s.stop_hz, s.points) for s in segments] == [
        (30e6, 515e6, 8085), (515e6, 1e9, 8085)]
    assert max(s.step_hz for s in segments) <= 60e3
    assert segments[0].vbw_hz == pytest.approx(360e3) and segments[0].detector == "peak"


def test_one_segment_when_the_analyzer_has_points_enough(tmp_path):
    sweep = sequence_from(tmp_path, BAND_CD, '[[steps]]\nkind = "sweep"\nlabel = "a"\n'
                          'sweep = "s"\n').sweeps["s"]
    (segment,) = segment_sweep(sweep, AnalyzerCaps(max_points=40001))
    assert segment.points == 16168  # ceil(970e6 / 60e3) + 1 = 16167 + 1


def test_points_honour_the_analyzer_minimum(tmp_path):
    sweeps = '[sweeps.s]\nstart = "100 MHz"\nstop = "101 MHz"\nrbw = "120 kHz"\n'
    sweep = sequence_from(tmp_path, sweeps, '[[steps]]\nkind = "sweep"\nlabel = "a"\n'
                          'sweep = "s"\n').sweeps["s"]
    # ceil(1 MHz / 60 kHz) + 1 = 17 + 1 = 18 < min_points 101
    (segment,) = segment_sweep(sweep, AnalyzerCaps(min_points=101))
    assert segment.points == 101


@pytest.mark.parametrize("start_hz, stop_hz, rbw_hz, expected_s", [
    # ST = k span / RBW^2 with k = 2.5 (Witte; Engelson; a swept-analyzer application note),
    # the values derived:
    (30e6, 1e9, 120e3, 0.168),   # 30-1000 MHz @ 120 kHz
    (150e3, 30e6, 9e3, 0.93),    # 0.15-30 MHz @ 9 kHz
    (0.0, 1e9, 1e6, 2.5e-3),     # 1 GHz span @ 1 MHz
])
def test_sweep_time_matches_reference_examples(start_hz, stop_hz, rbw_hz, expected_s):
    caps = AnalyzerCaps(sweep_time_k=2.5, min_sweep_time_s=1e-3)
    assert sweep_time_s(stop_hz - start_hz, rbw_hz, 3 * rbw_hz, caps) == pytest.approx(
        expected_s, rel=0.01)


def test_sweep_time_floor_and_narrow_vbw():
    caps = AnalyzerCaps(sweep_time_k=2.5, min_sweep_time_s=1e-3)
    # 1 MHz span at 1 MHz RBW: 2.5e-6 s < 1 ms floor
    assert sweep_time_s(1e6, 1e6, 3e6, caps) == 1e-3
    # VBW < RBW: ST = k span / (RBW VBW) (from memory)
    # 2.5 * 970e6 / (120e3 * 12e3) = 1.684 s
    assert sweep_time_s(970e6, 120e3, 12e3, caps) == pytest.approx(1.684, rel=1e-3)


def test_transfer_time_is_float32_bytes_over_rate_plus_overhead():
    caps = AnalyzerCaps(transfer_bytes_per_s=4e6, command_overhead_s=2e-3)
    # 10001 points * 4 bytes / 4e6 B/s = 10.001 ms, plus 2 ms
    assert transfer_time_s(10001, caps) == pytest.approx(0.012001)


def test_max_hold_count_multiplies_sweep_time(tmp_path):
    sweeps = BAND_CD + 'trace = "max-hold"\ncount = 5\n'
    sweep = sequence_from(tmp_path, sweeps, '[[steps]]\nkind = "sweep"\nlabel = "a"\n'
                          'sweep = "s"\n').sweeps["s"]
    segments = segment_sweep(sweep, AnalyzerCaps(max_points=40001))
    # 5 sweeps x 2.5 * 970e6 / 120e3^2 = 5 x 0.16840 s (ST = k span / RBW^2, Witte)
    assert segments[0].est_sweep_time_s == pytest.approx(5 * 2.5 * 970e6 / 120e3**2)
    assert segments[0].trace_mode == "max-hold" and segments[0].count == 5


def test_coarse_step_warns_with_worst_case_scalloping(tmp_path):
    sweeps = '[sweeps.s]\nstart = "30 MHz"\nstop = "300 MHz"\nrbw = "120 kHz"\npoints = 1001\n'
    sequence = sequence_from(tmp_path, sweeps, '[[steps]]\nkind = "sweep"\nlabel = "a"\n'
                             'sweep = "s"\n')
    plan = make_plan(sequence, CAPS)
    # step = 270 MHz / 1000 = 270 kHz; 6 * (2 * 135 kHz / 120 kHz)^2 = 30.375 dB (Gaussian RBW, derived)
    assert any("worst-case scalloping 30.38 dB" in w for w in plan.warnings)


def test_rbw_the_analyzer_lacks_is_refused(tmp_path):
    sequence = sequence_from(tmp_path, BAND_CD.replace("120 kHz", "100 kHz"),
                             '[[steps]]\nkind = "sweep"\nlabel = "a"\nsweep = "s"\n')
    caps = BenchCaps(analyzer=AnalyzerCaps(rbw_steps_hz=(30e3, 120e3, 300e3)))
    with pytest.raises(PlanError, match=r"nearest: 30 kHz, 120 kHz\), found 100 kHz"):
        make_plan(sequence, caps)


# --------------------------------------------------------------------------- motion


def test_trapezoidal_move_reaches_full_speed():
    # d = 100 mm, v = 50 mm/s, a = 0.5 m/s^2: v^2/a = 5 mm <= d
    # t = d/v + v/a = 2.0 + 0.1 = 2.1 s
    assert trapezoid_move_time_s(0.1, 0.05, 0.5) == pytest.approx(2.1)


def test_triangular_move_never_reaches_full_speed():
    # d = 2 mm < v^2/a = 5 mm: t = 2 sqrt(d/a) = 2 sqrt(0.004) = 0.126491 s
    assert trapezoid_move_time_s(0.002, 0.05, 0.5) == pytest.approx(0.126491, rel=1e-5)
    # both cases meet at d = v^2/a: t = 2 v / a = 0.2 s
    assert trapezoid_move_time_s(0.005, 0.05, 0.5) == pytest.approx(0.2)
    assert trapezoid_move_time_s(0.005 * (1 - 1e-12), 0.05, 0.5) == pytest.approx(0.2)


def test_xy_move_is_lift_travel_lower():
    a = StagePose(0.05, 0.04, 0.013, 0.0, 1, 0.0, 0.0)
    b = StagePose(0.055, 0.04, 0.013, 0.0, 1, 0.005, 0.0)
    # lift 40 - 13 = 27 mm: 0.027/0.05 + 0.1 = 0.64 s; travel 5 mm: 2 sqrt(0.005/0.5) = 0.2 s;
    # lower 0.64 s: total 1.48 s
    assert stage_move_time_s(a, b, STAGE) == pytest.approx(1.48)
    # a 90 deg probe turn at 90 deg/s adds 1 s
    turned = StagePose(0.055, 0.04, 0.013, 90.0, 1, 0.005, 0.0)
    assert stage_move_time_s(a, turned, STAGE) == pytest.approx(2.48)


# --------------------------------------------------------------------------- grids


def test_rectangle_grid_counts_and_both_h_loop_orientations(tmp_path):
    sequence = sequence_from(tmp_path, BAND_CD, grid_step())
    plan = make_plan(sequence, CAPS)
    # 100 mm / 5 mm + 1 = 21 columns, 80 mm / 5 mm + 1 = 17 rows: 357 per orientation;
    # orientations default to 0 and 90 deg for an H loop (common practice): 714
    assert len(plan.actions) == 714
    assert {a.pose.rotation_deg for a in plan.actions} == {0.0, 90.0}
    first = plan.actions[0].pose
    assert (first.x_m, first.y_m, first.z_m) == pytest.approx((0.05, 0.04, 0.013))
    assert first.tool == 1 and plan.warnings == ()


def test_serpentine_and_raster_orders(tmp_path):
    area = 'area = { x = ["0 mm", "10 mm"], y = ["0 mm", "10 mm"] }'
    serpentine = grid_positions(sequence_from(tmp_path, BAND_CD, grid_step(
        area=area)).steps[0])
    mm = [(round(x * 1e3), round(y * 1e3)) for x, y in serpentine]
    assert mm == [(0, 0), (5, 0), (10, 0), (10, 5), (5, 5), (0, 5), (0, 10), (5, 10), (10, 10)]
    raster = grid_positions(sequence_from(tmp_path, BAND_CD, grid_step(
        'path = "raster"\n', area=area)).steps[0])
    mm = [(round(x * 1e3), round(y * 1e3)) for x, y in raster]
    assert mm == [(x, y) for y in (0, 5, 10) for x in (0, 5, 10)]


def test_polygon_grid_keeps_points_inside_and_on_the_outline(tmp_path):
    polygon = 'polygon = [["0 mm", "0 mm"], ["100 mm", "0 mm"], ["0 mm", "100 mm"]]'
    step = sequence_from(tmp_path, BAND_CD, grid_step(area=polygon).replace(
        'step_size = "5 mm"', 'step_size = "10 mm"')).steps[0]
    positions = grid_positions(step)
    # lattice points with x + y <= 100 mm at 10 mm pitch: sum_{i=0..10} (11 - i) = 66
    assert len(positions) == 66
    assert all(x + y <= 0.1 + 1e-12 for x, y in positions)


def test_point_in_polygon_agrees_with_matplotlib():
    rng = np.random.default_rng(7)
    polygon = np.array([[0, 0], [4, 0], [4, 3], [2, 1.5], [0, 3]], dtype=float)  # concave
    points = rng.uniform(-1, 5, size=(2000, 2))
    reference = MplPath(polygon).contains_points(points)  # matplotlib.path as the oracle
    assert np.array_equal(inside_polygon(points, polygon, tol=0.0), reference)


def test_out_of_limit_position_is_refused_by_name(tmp_path):
    area = 'area = { x = ["0 mm", "300 mm"], y = ["0 mm", "10 mm"] }'
    sequence = sequence_from(tmp_path, BAND_CD, grid_step(area=area))
    # stage x = 50 mm + board x; limit 300 mm: board x = 255 mm (the 52nd position of the
    # first row, 0..255 by 5 mm) is the first past it, at stage x = 305 mm.
    # 61 columns x 3 rows x 2 orientations = 366 positions
    with pytest.raises(SafetyLimitError) as info:
        make_plan(sequence, CAPS)
    assert str(info.value) == (
        "steps[0] 'g': position 52 of 366 (board x = 255 mm, y = 0 mm): expected stage x "
        "within [0 mm, 300 mm], found 305 mm")


def test_single_orientation_h_loop_warns_e_probe_does_not(tmp_path):
    one = grid_step('orientations = ["0 deg"]\n')
    plan = make_plan(sequence_from(tmp_path, BAND_CD, one), CAPS)
    assert len(plan.warnings) == 1 and "H-loop scanned in one orientation" in plan.warnings[0]
    e_probe = one.replace('probe = "hloop-10mm"', 'probe = "eprobe"')
    assert make_plan(sequence_from(tmp_path, BAND_CD, e_probe), CAPS).warnings == ()


def test_grid_needs_a_stage_and_a_known_probe(tmp_path):
    sequence = sequence_from(tmp_path, BAND_CD, grid_step())
    with pytest.raises(PlanError, match=r"expected a \[stage\]"):
        make_plan(sequence, BenchCaps(probes=PROBES))
    unknown = sequence_from(tmp_path, BAND_CD, grid_step().replace("hloop-10mm", "hloop-1mm"))
    with pytest.raises(PlanError, match=r"found 'hloop-1mm'"):
        make_plan(unknown, CAPS)


# --------------------------------------------------------------------------- far field


def test_prescan_order_and_travel():
    plan = make_plan(load_sequence(DEMO / "demo-far-field.toml"), CAPS)
    prescan = [a for a in plan.actions if a.step_kind == "prescan" and not a.analysis]
    # 4 heights x 2 polarizations x 8 azimuths (demo sequence; CISPR 16-2-3 asks for both
    # polarizations and a height scan from 1 m to 4 m)
    assert len(prescan) == 64
    # then one analysis action, which measures nothing
    analysis = [a for a in plan.actions if a.analysis]
    assert [(a.step_label, a.segments, a.index) for a in analysis] == [("prescan", (), prescan[-1].index + 1)]
    poses = [(a.pose.height_m, a.pose.polarization, a.pose.azimuth_deg) for a in prescan]
    assert poses[:8] == [(1.0, "horizontal", 0.0), (2.0, "horizontal", 0.0),
                         (3.0, "horizontal", 0.0), (4.0, "horizontal", 0.0),
                         (4.0, "horizontal", 45.0), (3.0, "horizontal", 45.0),
                         (2.0, "horizontal", 45.0), (1.0, "horizontal", 45.0)]
    assert poses[32][1:] == ("vertical", 315.0)  # second polarization walks azimuths back
    # mast 1 m at 0.2 m/s = 5 s; turntable 45 deg at 10 deg/s = 4.5 s
    assert prescan[1].motion_time_s == pytest.approx(5.0)
    assert prescan[4].motion_time_s == pytest.approx(4.5)
    # polarization change (5 s) and no other motion at the turn-around
    assert prescan[32].motion_time_s == pytest.approx(5.0)


def test_ambient_is_unpowered_and_final_is_a_dynamic_placeholder():
    plan = make_plan(load_sequence(DEMO / "demo-far-field.toml"), CAPS)
    assert plan.actions[0].step_kind == "ambient" and not plan.actions[0].board_powered
    assert isinstance(plan.actions[0].pose, FarFieldPose)
    final = plan.actions[-1]
    assert final.dynamic and final.segments == () and final.est_time_s > 0
    assert any("assumed 10 suspects" in line for line in plan.summary_lines())


def test_far_field_outside_mast_limits_is_refused(tmp_path):
    steps = ('[[steps]]\nkind = "prescan"\nlabel = "p"\nsweep = "s"\n'
             'heights = { from = "1 m", to = "5 m", step = "1 m" }\n'
             'polarizations = ["horizontal", "vertical"]\n'
             'azimuths = { from = "0 deg", to = "90 deg", step = "45 deg" }\nlimit = "l"\n')
    with pytest.raises(SafetyLimitError, match=r"antenna height within \[1 m, 4 m\], found 5 m"):
        make_plan(sequence_from(tmp_path, BAND_CD, steps), CAPS)


# --------------------------------------------------------------------------- totals


def test_totals_and_summary_for_the_quick_demo():
    bench = load_bench(DEMO / "demo-bench.toml", check_files=False)
    caps = bench_caps(bench, analyzer=AnalyzerCaps(max_points=10001))
    plan = make_plan(load_sequence(DEMO / "demo-quick.toml"), caps)
    # 3 steps x 2 segments of 8085 points (see the segmentation test above)
    assert plan.n_traces == 6
    # data: 6 traces x (8085 points x 4 bytes + 512 bytes overhead) = 197 112 bytes
    assert plan.data_bytes == 6 * (8085 * 4 + 512)
    assert plan.total_time_s == pytest.approx(sum(a.est_time_s for a in plan.actions))
    lines = plan.summary_lines()
    assert lines[-1] == "total: 0:00:02, 6 traces, 197.1 kB"
    assert lines[1].startswith("[0] ambient 'ambient': 2 segments, 16170 points, 1 sweep")


def test_bench_caps_from_the_demo_bench():
    caps = bench_caps(load_bench(DEMO / "demo-bench.toml", check_files=False),
                      stage_accel_m_per_s2=0.8)
    assert caps.stage.limits.x_m == pytest.approx((0.0, 0.3))
    assert caps.stage.accel_m_per_s2 == 0.8 and caps.stage.limits.rotary_axis
    assert caps.probes["hloop-3mm"] == ProbeCaps("h-loop", 2)
    assert caps.mast.height_limits_m == (1.0, 4.0)
    assert math.isclose(caps.turntable.limits_deg[1], 360.0)


@settings(derandomize=True, database=None, max_examples=200, deadline=None)
@given(start_mhz=st.floats(0.01, 1000.0), span_mhz=st.floats(0.1, 6000.0),
       rbw_khz=st.sampled_from([1.0, 9.0, 10.0, 30.0, 100.0, 120.0, 1000.0]),
       max_points=st.integers(101, 40001))
def test_segments_always_cover_the_span_within_the_step(start_mhz, span_mhz, rbw_khz,
                                                         max_points):
    # the contract of segmentation: contiguous, equal, within max_points, step <= rbw/2
    from bench.sequence import SweepSettings

    sweep = SweepSettings.model_validate({"start": f"{start_mhz} MHz",
                                          "stop": f"{start_mhz + span_mhz} MHz",
                                          "rbw": f"{rbw_khz} kHz"})
    segments = segment_sweep(sweep, AnalyzerCaps(max_points=max_points, min_points=101))
    assert segments[0].start_hz == sweep.start_hz
    assert segments[-1].stop_hz == pytest.approx(sweep.stop_hz, rel=1e-12)
    for left, right in zip(segments, segments[1:]):
        assert right.start_hz == left.stop_hz
    assert all(s.points <= max_points for s in segments)
    assert max(s.step_hz for s in segments) <= sweep.rbw_hz / 2 * (1 + 1e-9)


def test_orientations_outside_the_a_limits_are_refused_at_planning(tmp_path):
    # the bench file's A-axis limits reach the planner: a 90 deg turn on a stage limited to
    # +-45 deg is refused before anything moves
    narrow = dataclasses.replace(STAGE, limits=dataclasses.replace(STAGE.limits, a_deg=(-45.0, 45.0)))
    caps = dataclasses.replace(CAPS, stage=narrow)
    sequence = sequence_from(tmp_path, BAND_CD, grid_step('orientations = ["0 deg", "90 deg"]'))
    with pytest.raises(SafetyLimitError, match=r"A limits \[-45 deg, 45 deg\], found 90 deg"):
        make_plan(sequence, caps)
    make_plan(sequence, caps=CAPS)  # within the default one turn either way
