"""Near-field maps, hot spots, run views and photo registration, on run folders built here."""

import math

import numpy as np
import pytest

from bench.analysis import maps, runview
from bench.errors import AnalysisError
from bench.plots import map_png, photo_transform
from bench.store import TraceMeta, create_run

START_HZ, STOP_HZ, POINTS = 30e6, 300e6, 271  # 1 MHz bins
FREQ = np.linspace(START_HZ, STOP_HZ, POINTS)
# Probe factor table: 10 dB(S/m) at 30 MHz, 30 dB(S/m) at 300 MHz (one decade: +20 dB/decade).
LOOP_CSV = "# role: probe_factor\nfreq_mhz,factor_db_s_per_m\n30,10\n300,30\n"


def loop_factor_db(freq_hz):
    # linear in dB against log10(f) between the two table points (transducers.py docstring)
    return 10.0 + 20.0 * np.log10(np.asarray(freq_hz) / 30e6)


def make_grid_run(tmp_path, levels_at, *, rotations=(0.0, 90.0), skip=(), probe_kind="h-loop",
                  name="nf"):
    """A grid run: 5 x 4 positions (10 mm pitch), ``levels_at(x, y, rot) -> dBuV array``."""
    manifest = {
        "name": name, "software": "emission-bench test", "created": "2026-01-01T00:00:00Z",
        "state": "complete", "simulated": True,
        "steps": [{"label": "scan", "kind": "grid", "unit": "dbua_per_m", "probe": "loop",
                   "probe_kind": probe_kind,
                   "chain": [{"role": "probe_factor", "file": "tables/loop.csv"}]}],
        "board": {"outline_m": [[0.0, 0.0], [0.04, 0.0], [0.04, 0.03], [0.0, 0.03]]},
    }
    run = create_run(tmp_path, name, manifest)
    (run.folder / "tables").mkdir()
    (run.folder / "tables" / "loop.csv").write_text(LOOP_CSV)
    action = 0
    for rot in rotations:
        for y in np.arange(4) * 0.01:
            for x in np.arange(5) * 0.01:
                if (round(x, 3), round(y, 3), rot) in skip:
                    continue
                meta = TraceMeta(action_index=action, step_label="scan", step_kind="grid",
                                 segment=0, start_hz=START_HZ, stop_hz=STOP_HZ, points=POINTS,
                                 rbw_hz=1e6, vbw_hz=3e6, detector="peak",
                                 trace_mode="clear-write", sweeps=1, x_m=float(x), y_m=float(y),
                                 z_m=0.003, rotation_deg=rot, probe="loop")
                run.add_trace(meta, levels_at(x, y, rot), completes_action=True)
                action += 1
    return run


def line(freq_hz, level_db, floor_db=0.0):
    """A flat floor with one bin raised at ``freq_hz``."""
    out = np.full(POINTS, floor_db)
    out[int(np.argmin(np.abs(FREQ - freq_hz)))] = level_db
    return out


def test_peak_of_constructed_map_is_at_the_source(tmp_path):
    # level falls 1 dB per mm from (20 mm, 10 mm): the maximum must be found there
    def levels(x, y, rot):
        return line(50e6, 60.0 - 1000.0 * math.hypot(x - 0.02, y - 0.01))

    run = make_grid_run(tmp_path, levels, rotations=(0.0,))
    m = maps.grid_maps(run, "scan", freq_hz=50.2e6)  # nearest bin is 50 MHz
    x, y, level = m.peak()
    assert (x, y) == pytest.approx((0.02, 0.01), abs=1e-9)
    # H(dBuA/m) = V(dBuV) + AF_H(dB(S/m)) (probe factor AF_H = H/V, common practice)
    assert level == pytest.approx(60.0 + loop_factor_db(50e6), abs=1e-4)
    assert m.unit == "dbua_per_m"
    np.testing.assert_allclose(m.x_m, [0.0, 0.01, 0.02, 0.03, 0.04], atol=1e-12)
    np.testing.assert_allclose(m.y_m, [0.0, 0.01, 0.02, 0.03], atol=1e-12)
    assert m.combined.shape == (4, 5)
    # one orientation: the combined map is that map
    np.testing.assert_array_equal(m.combined, m.by_orientation[0.0])


def test_orthogonal_loop_readings_add_as_powers(tmp_path):
    run = make_grid_run(tmp_path, lambda x, y, rot: line(100e6, 40.0))
    m = maps.grid_maps(run, "scan", freq_hz=100e6)
    a = m.by_orientation[0.0]
    np.testing.assert_allclose(a, m.by_orientation[90.0])
    # |H|^2 = Hx^2 + Hy^2: two equal components give +10*log10(2) = 3.0103 dB (definition of dB)
    np.testing.assert_allclose(m.combined - a, 10.0 * math.log10(2.0), atol=1e-9)
    # unequal: 40 dB and 30 dB -> 10*log10(10^4 + 10^3) = 40.4139 dB (direct evaluation)
    assert maps.power_sum_db(40.0, 30.0) == pytest.approx(10 * math.log10(1e4 + 1e3), abs=1e-12)


def test_unmeasured_points_are_nan(tmp_path):
    run = make_grid_run(tmp_path, lambda x, y, rot: line(100e6, 40.0),
                        skip={(0.03, 0.02, 90.0), (0.0, 0.0, 0.0), (0.0, 0.0, 90.0)})
    m = maps.grid_maps(run, "scan")
    assert np.isnan(m.by_orientation[90.0][2, 3]) and np.isfinite(m.by_orientation[0.0][2, 3])
    # a partial power sum would understate the field: combined is NaN where one is missing
    assert np.isnan(m.combined[2, 3]) and np.isnan(m.combined[0, 0])
    assert np.isfinite(m.combined).sum() == 20 - 2


def test_band_maximum_and_e_probe_combination(tmp_path):
    def levels(x, y, rot):
        out = line(60e6, 30.0 + 100.0 * x)
        out[int(np.argmin(np.abs(FREQ - 200e6)))] = 50.0 if rot == 90.0 else 20.0
        return out

    run = make_grid_run(tmp_path, levels, probe_kind="e-probe")
    band = maps.grid_maps(run, "scan", band_hz=(50e6, 70e6))
    expected = 30.0 + 100.0 * np.arange(5) * 0.01 + loop_factor_db(60e6)
    np.testing.assert_allclose(band.by_orientation[0.0], np.tile(expected, (4, 1)), atol=1e-4)
    # no component decomposition for an E probe: the stronger reading per point
    whole = maps.grid_maps(run, "scan", freq_hz=200e6)
    np.testing.assert_allclose(whole.combined, 50.0 + loop_factor_db(200e6), atol=1e-4)
    with pytest.raises(AnalysisError, match="within the scan"):
        maps.grid_maps(run, "scan", freq_hz=1e9)


def test_emission_peaks_find_two_lines_at_their_positions(tmp_path):
    def levels(x, y, rot):
        out = np.zeros(POINTS)
        # line A, 50 MHz, strongest at (10 mm, 20 mm) seen by the 0-deg loop
        d_a = math.hypot(x - 0.01, y - 0.02)
        out[20] = 55.0 - 500.0 * d_a - (6.0 if rot == 90.0 else 0.0)
        # line B, 120 MHz, strongest at (30 mm, 0 mm) seen by the 90-deg loop
        d_b = math.hypot(x - 0.03, y - 0.0)
        out[90] = 45.0 - 500.0 * d_b - (0.0 if rot == 90.0 else 6.0)
        return out

    run = make_grid_run(tmp_path, levels)
    table = maps.emission_peaks(run, "scan", prominence_db=6.0)
    assert list(table.columns) == list(maps.EMISSION_COLUMNS)
    assert len(table) == 2
    a, b = table.iloc[0], table.iloc[1]
    # constructed: peak bins 20 and 90 of a 1 MHz grid from 30 MHz
    assert a.freq_hz == pytest.approx(50e6) and b.freq_hz == pytest.approx(120e6)
    assert (a.x_m, a.y_m, a.rotation_deg) == pytest.approx((0.01, 0.02, 0.0))
    assert (b.x_m, b.y_m, b.rotation_deg) == pytest.approx((0.03, 0.0, 90.0))
    assert a.level == pytest.approx(55.0 + loop_factor_db(50e6), abs=1e-4)
    assert b.level == pytest.approx(45.0 + loop_factor_db(120e6), abs=1e-4)
    assert table["level"].is_monotonic_decreasing
    assert len(maps.emission_peaks(run, "scan", top=1)) == 1


def test_runview_corrects_with_the_manifest_chain(tmp_path):
    run = make_grid_run(tmp_path, lambda x, y, rot: line(100e6, 40.0, floor_db=5.0),
                        rotations=(0.0,))
    spec = runview.corrected_spectrum(run, "scan")
    np.testing.assert_allclose(spec.freq_hz, FREQ)
    expected = line(100e6, 40.0, floor_db=5.0) + loop_factor_db(FREQ)  # AF_H = H/V
    np.testing.assert_allclose(spec.level, expected, atol=1e-4)
    assert spec.unit == "dbua_per_m" and "loop" in spec.chain_text
    assert runview.step_chain(run, "scan").result_quantity == "dbua_per_m"
    assert runview.step_limit(run, "scan") is None
    with pytest.raises(AnalysisError, match="no step 'nope'"):
        runview.step_info(run, "nope")


def _far_field_run(tmp_path, distance_m, limit="cispr32-class-b-10m", unit="dbuv"):
    manifest = {"name": "ff", "steps": [{"label": "pre", "kind": "prescan", "unit": unit,
                                         "limit": limit, "distance_m": distance_m}]}
    run = create_run(tmp_path, "ff", manifest)
    meta = TraceMeta(action_index=0, step_label="pre", step_kind="prescan", segment=0,
                     start_hz=30e6, stop_hz=1e9, points=11, rbw_hz=120e3, vbw_hz=300e3,
                     detector="peak", trace_mode="max-hold", sweeps=1)
    run.add_trace(meta, np.zeros(11), completes_action=True)
    return run


def test_step_limit_moves_to_the_step_distance(tmp_path):
    run = _far_field_run(tmp_path, 3.0, unit="dbuv_per_m")
    with pytest.raises(AnalysisError, match="chain produces 'dbuv'"):
        runview.step_limit(run, "pre")
    run.update_manifest(steps=[{"label": "pre", "kind": "prescan", "limit": "cispr32-class-b-10m",
                                "distance_m": 3.0, "unit": "dbuv"}])
    with pytest.raises(AnalysisError, match="is in dbuv_per_m"):
        runview.step_limit(run, "pre")


def test_step_limit_extrapolation_and_near_field_warning(tmp_path):
    # an E-field chain so the step is in dBuV/m like the limit
    run = _far_field_run(tmp_path, 1.0)
    (run.folder / "tables").mkdir()
    (run.folder / "tables" / "af.csv").write_text(
        "# role: antenna_factor\nfreq_mhz,af_db_per_m\n30,10\n1000,30\n")
    run.update_manifest(steps=[{"label": "pre", "kind": "prescan", "unit": "dbuv_per_m",
                                "limit": "cispr32-class-b-10m", "distance_m": 1.0,
                                "chain": [{"role": "antenna_factor", "file": "tables/af.csv"}]}])
    warnings = []
    limit = runview.step_limit(run, "pre", warnings=warnings)
    # CISPR 32 Table A.4 class B 10 m: 30 dBuV/m at 30-230 MHz; 10 m -> 1 m at 20 dB/decade
    # adds 20 dB (FCC 47 CFR 15.31(f)(1), 20 dB/decade)
    assert limit.level("quasi-peak", 100e6) == pytest.approx(30.0 + 20.0, abs=1e-9)
    assert limit.distance_m == 1.0
    # lambda/2pi at 30 MHz = 1.59 m > 1 m (Ott; derived): a near-field warning
    assert any("lambda/2pi" in w for w in warnings)


def test_photo_similarity_from_two_points():
    # board = s * R(30 deg) * (col, -row) + t  (rows grow downwards in an image)
    s, theta, t = 2.5e-4, math.radians(30.0), np.array([0.012, 0.095])
    rot = np.array([[math.cos(theta), -math.sin(theta)], [math.sin(theta), math.cos(theta)]])
    linear = s * rot @ np.diag([1.0, -1.0])
    pixels = np.array([[40.0, 310.0], [520.0, 25.0]])
    board = pixels @ linear.T + t
    m = photo_transform(pixels, board)
    np.testing.assert_allclose(m[:, :2], linear, atol=1e-9)
    np.testing.assert_allclose(m[:, 2], t, atol=1e-9)
    # right-handed pixel axes: no flip
    plain = s * rot
    m2 = photo_transform(pixels, pixels @ plain.T + t, image_y_down=False)
    np.testing.assert_allclose(m2, np.column_stack([plain, t]), atol=1e-9)


def test_photo_affine_from_three_or_more_points():
    s, theta, t = 1.7e-4, math.radians(30.0), np.array([-0.004, 0.07])
    rot = np.array([[math.cos(theta), -math.sin(theta)], [math.sin(theta), math.cos(theta)]])
    linear = rot @ np.diag([s, -1.3 * s])  # anisotropic scale and a flip: a true affine map
    for pixels in (np.array([[10.0, 20.0], [600.0, 35.0], [300.0, 420.0]]),
                   np.array([[10.0, 20.0], [600.0, 35.0], [300.0, 420.0], [80.0, 390.0]])):
        m = photo_transform(pixels, pixels @ linear.T + t)
        np.testing.assert_allclose(m[:, :2], linear, atol=1e-9)
        np.testing.assert_allclose(m[:, 2], t, atol=1e-9)
    with pytest.raises(AnalysisError, match="collinear"):
        photo_transform([[0, 0], [1, 1], [2, 2]], [[0, 0], [1, 1], [2, 2]])


def test_map_png_with_registered_photo(tmp_path):
    import matplotlib.image

    run = make_grid_run(tmp_path, lambda x, y, rot: line(100e6, 40.0 + 100 * x))
    m = maps.grid_maps(run, "scan")
    photo = tmp_path / "board.png"
    matplotlib.image.imsave(photo, np.linspace(0, 1, 80 * 60).reshape(60, 80), cmap="gray")
    points = [{"pixel": [0, 59], "board_m": [0.0, 0.0]},
              {"pixel": [79, 0], "board_m": [0.04, 0.03]},
              {"pixel": [79, 59], "board_m": [0.04, 0.0]}]
    out = map_png(tmp_path / "map.png", m, outline_m=[[0, 0], [0.04, 0], [0.04, 0.03], [0, 0.03]],
                  photo=photo, photo_points=points, title="scan", unit=m.unit,
                  hot_spots=m.hot_spots())
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec §5.2)


def test_segments_sharing_an_edge_join_into_one_axis(tmp_path):
    run = make_grid_run(tmp_path, lambda x, y, rot: line(100e6, 40.0), rotations=(0.0,))
    # add a second segment 300-400 MHz at one node: its first bin repeats 300 MHz
    f2 = np.linspace(300e6, 400e6, 101)
    seg = np.zeros(101)
    seg[0], seg[50] = 3.0, 30.0  # 3 dB above segment 0's 0 dB floor at 300 MHz; a line at 350
    run.add_trace(TraceMeta(action_index=999, step_label="scan", step_kind="grid", segment=1,
                            start_hz=300e6, stop_hz=400e6, points=101, rbw_hz=1e6, vbw_hz=3e6,
                            detector="peak", trace_mode="clear-write", sweeps=1, x_m=0.04,
                            y_m=0.03, z_m=0.003, rotation_deg=0.0), seg, completes_action=True)
    (run.folder / "tables" / "loop.csv").write_text(
        "# role: probe_factor\nfreq_mhz,factor_db_s_per_m\n30,10\n300,30\n3000,50\n")
    freq, level = runview.join_segments(*run.step_spectrum("scan"))
    assert np.all(np.diff(freq) > 0) and freq.size == POINTS + 100
    assert level[POINTS - 1] == pytest.approx(3.0)  # the louder reading of the shared bin
    spots = maps.emission_peaks(run, "scan")
    assert set(np.round(spots["freq_hz"] / 1e6)) == {100.0, 350.0}
    # factor linear in log10(f) per table interval (transducers.py docstring):
    # 350 MHz: 30 dBuV + 30 + 20*log10(350/300) = 61.34; 100 MHz: 40 dBuV + 10 + 20*log10(100/30)
    # = 60.46 -> the 350 MHz line ranks first
    top, second = spots.iloc[0], spots.iloc[1]
    assert (top.freq_hz, top.x_m, top.y_m) == pytest.approx((350e6, 0.04, 0.03))
    assert top.level == pytest.approx(30.0 + 30.0 + 20.0 * math.log10(350 / 300), abs=1e-4)
    assert second.level == pytest.approx(40.0 + 10.0 + 20.0 * math.log10(100 / 30), abs=1e-4)
    m = maps.grid_maps(run, "scan", freq_hz=350e6)
    assert np.isfinite(m.combined).sum() == 1 and m.peak()[:2] == pytest.approx((0.04, 0.03))


# ----------------------------------------------------------------------------- hot spots per map

AXIS_X = np.arange(9) * 0.005
AXIS_Y = np.arange(7) * 0.005


def cone(x0, y0, peak_db, slope_db_per_m=2000.0):
    """A source on the 9 x 7 grid (5 mm pitch): level falling linearly with distance."""
    xx, yy = np.meshgrid(AXIS_X, AXIS_Y)
    return peak_db - slope_db_per_m * np.hypot(xx - x0, yy - y0)


def test_a_weaker_second_source_is_a_hot_spot_of_its_own():
    # constructed: 60 dB at (10, 15) mm and 50 dB at (30, 15) mm, 2 dB per mm, floor 20 dB
    z = np.maximum(np.maximum(cone(0.01, 0.015, 60.0), cone(0.03, 0.015, 50.0)), 20.0)
    spots = maps.hot_spots(AXIS_X, AXIS_Y, z)
    assert list(spots.columns) == list(maps.HOT_SPOT_COLUMNS)
    np.testing.assert_allclose(spots[["x_m", "y_m"]].to_numpy(), [[0.01, 0.015], [0.03, 0.015]],
                               atol=1e-12)
    assert spots["rank"].tolist() == [1, 2] and spots["level"].tolist() == [60.0, 50.0]
    # prominence: the col between them is 40 dB (x = 20 and 25 mm on y = 15 mm), so the weaker
    # peak stands 50 - 40 = 10 dB; the highest one 60 - 20 (the lowest level) = 40 dB.
    assert spots["prominence_db"].tolist() == pytest.approx([40.0, 10.0])
    assert not spots["at_edge"].any()
    # a dip of less than 6 dB does not separate two sources (HOT_SPOT_PROMINENCE_DB): a broad
    # 44 dB bump (0.5 dB per mm) meets the big cone at 40 dB (x = 20 mm): 4 dB of prominence
    shallow = np.maximum(np.maximum(cone(0.01, 0.015, 60.0), cone(0.03, 0.015, 44.0, 500.0)),
                         20.0)
    assert maps.peak_prominences(shallow)[3 * 9 + 6] == pytest.approx(4.0)
    assert len(maps.hot_spots(AXIS_X, AXIS_Y, shallow)) == 1


def test_prominence_of_a_flat_top_counts_it_once_and_nan_blocks_paths():
    z = np.full((3, 5), 10.0)
    z[1, 1] = z[1, 2] = 30.0  # a flat top of two positions
    assert maps.peak_prominences(z) == {6: 20.0}
    # an unmeasured column splits the map: each side has its own highest peak
    z = np.array([[10.0, 40.0, np.nan, 20.0, 35.0]])
    assert maps.peak_prominences(z) == {1: 30.0, 4: 15.0}


def test_hot_spots_on_the_border_of_the_measured_area_are_flagged():
    z = np.maximum(np.maximum(cone(0.0, 0.015, 60.0), cone(0.025, 0.015, 55.0)), 20.0)
    spots = maps.hot_spots(AXIS_X, AXIS_Y, z)
    edge = spots.set_index("x_m")["at_edge"]
    assert bool(edge[0.0]) and not bool(edge[0.025])
    # a neighbour not measured (a polygon scan) is a border too
    z[3, 6] = np.nan
    spots = maps.hot_spots(AXIS_X, AXIS_Y, z)
    assert spots["at_edge"].all()


def test_a_map_of_noise_has_no_hot_spot():
    # Rayleigh envelope readings in dB (seeded): a noise bump exceeds the median by 12 dB with
    # probability 2**-(10**1.2) = 1.7e-5 per position (derived in docs/physics.md, section 4)
    rng = np.random.default_rng(7)
    noise = 20.0 * np.log10(rng.rayleigh(1.0, size=(40, 50)))
    assert maps.hot_spots(np.arange(50) * 0.005, np.arange(40) * 0.005, noise).empty
    assert maps.hot_spots(AXIS_X, AXIS_Y, np.full((7, 9), 30.0)).empty  # flat: nothing stands out


def test_each_map_has_its_own_hot_spots(tmp_path):
    # line at 50 MHz: the 0-deg loop sees a source at (10, 20) mm, the 90-deg loop one at
    # (30, 0) mm, each 30 dB down at the other's place (constructed)
    def levels(x, y, rot):
        out = np.zeros(POINTS)
        x0, y0 = (0.01, 0.02) if rot == 0.0 else (0.03, 0.0)
        out[20] = 60.0 - 1500.0 * math.hypot(x - x0, y - y0)
        return out

    run = make_grid_run(tmp_path, levels)
    m = maps.grid_maps(run, "scan", freq_hz=50e6)
    assert [name for name, _, _ in m.panels()] == ["rotation 0 deg", "rotation 90 deg",
                                                   "combined"]
    spots = m.hot_spots()
    by_map = {name: sorted(map(tuple, np.round(group[["x_m", "y_m"]].to_numpy(), 9)))
              for name, group in spots.groupby("map")}
    assert by_map["rotation 0 deg"] == [(0.01, 0.02)]
    assert by_map["rotation 90 deg"] == [(0.03, 0.0)]
    assert by_map["combined"] == [(0.01, 0.02), (0.03, 0.0)]
    # (30, 0) mm lies on the border of the 5 x 4 grid: flagged on the maps that show it
    assert spots.query("x_m > 0.025")["at_edge"].all()
    assert not spots.query("x_m < 0.015")["at_edge"].any()
    assert m.hot_spots("rotation 90 deg")["map"].unique().tolist() == ["rotation 90 deg"]


def test_change_map_scale_is_at_least_three_db():
    from bench.plots import DELTA_SCALE_MIN_DB, delta_scale_db

    # a 0.2 dB change must look small: the colour scale keeps +-3 dB (issue: change maps)
    assert DELTA_SCALE_MIN_DB == 3.0
    assert delta_scale_db([[0.2, -0.1], [np.nan, 0.0]]) == 3.0
    assert delta_scale_db([[-8.7, 1.0]]) == pytest.approx(8.7)
    assert delta_scale_db([[np.nan]]) == 3.0
