"""Before/after comparison: spectra differences, suspect matching, map change, refusals."""

import re

import numpy as np
import pandas as pd
import pytest

from bench.compare import compare_runs, compare_spectra, match_suspects, match_tolerance_hz
from bench.errors import AnalysisError
from bench.store import TraceMeta, create_run

POINTS = 971
FREQ = np.linspace(30e6, 1e9, POINTS)  # 1 MHz bins
NF_POINTS = 271
AF_CSV = "# role: antenna_factor\nfreq_mhz,af_db_per_m\n30,10\n1000,30\n"
LOOP_CSV = "# role: probe_factor\nfreq_mhz,factor_db_s_per_m\n30,10\n300,30\n"


def bin_of(freq_hz):
    return int(round((freq_hz - 30e6) / 1e6))


def make_run(root, name, lines, results, *, chain=True, grid_peak=None):
    """A run with a prescan (lines: {freq_hz: dBuV}) and optionally a 5 x 4 grid step."""
    steps = [{"label": "pre", "kind": "prescan", "unit": "dbuv_per_m" if chain else "dbuv",
              "chain": [{"role": "antenna_factor", "file": "tables/af.csv"}] if chain else []}]
    if grid_peak is not None:
        steps.append({"label": "nf", "kind": "grid", "unit": "dbua_per_m", "probe_kind": "h-loop",
                      "chain": [{"role": "probe_factor", "file": "tables/loop.csv"}]})
    run = create_run(root, name, {"name": name, "created": "2026-01-01T00:00:00Z",
                                  "state": "complete", "steps": steps})
    (run.folder / "tables").mkdir()
    (run.folder / "tables" / "af.csv").write_text(AF_CSV)
    (run.folder / "tables" / "loop.csv").write_text(LOOP_CSV)
    levels = np.full(POINTS, 10.0)
    for f, v in lines.items():
        levels[bin_of(f)] = v
    run.add_trace(TraceMeta(action_index=0, step_label="pre", step_kind="prescan", segment=0,
                            start_hz=30e6, stop_hz=1e9, points=POINTS, rbw_hz=120e3,
                            vbw_hz=300e3, detector="peak", trace_mode="max-hold", sweeps=1),
                  levels, completes_action=True)
    run.add_results([{"step_label": "pre", "unit": "dbuv_per_m", "detector": "peak",
                      "limit_level": 40.0, "margin_db": 40.0 - lv, "status": st,
                      "freq_hz": f, "level": lv} for f, lv, st in results])
    if grid_peak is not None:
        action = 1
        for rot in (0.0, 90.0):
            for y in np.arange(4) * 0.01:
                for x in np.arange(5) * 0.01:
                    nf = np.zeros(NF_POINTS)
                    nf[20] = grid_peak - 300.0 * np.hypot(x - 0.01, y - 0.02)
                    run.add_trace(TraceMeta(action_index=action, step_label="nf",
                                            step_kind="grid", segment=0, start_hz=30e6,
                                            stop_hz=300e6, points=NF_POINTS, rbw_hz=1e6,
                                            vbw_hz=3e6, detector="peak", trace_mode="clear-write",
                                            sweeps=1, x_m=float(x), y_m=float(y), z_m=0.003,
                                            rotation_deg=rot),
                                  nf, completes_action=True)
                    action += 1
    run.close()
    return run.folder


def test_delta_of_constructed_spectra_is_the_injected_change():
    before = np.full(POINTS, 20.0)
    before[bin_of(48e6)] = 50.0
    after = before.copy()
    after[bin_of(48e6)] -= 10.0  # the fix: -10 dB on one line (constructed)
    f, delta = compare_spectra(FREQ, before, FREQ, after)
    np.testing.assert_array_equal(f, FREQ)
    expected = np.zeros(POINTS)
    expected[bin_of(48e6)] = -10.0
    np.testing.assert_allclose(delta, expected, atol=1e-12)


def test_different_axes_are_interpolated_in_log_frequency():
    # a level linear in log10(f) is reproduced exactly by interpolation linear in log10(f)
    # (transducers.py / pitfalls: interpolate dB against log10(frequency))
    f1 = np.geomspace(30e6, 1e9, 501)
    f2 = np.linspace(50e6, 2e9, 1201)
    l1 = 10.0 + 20.0 * np.log10(f1 / 1e6)
    l2 = 7.0 + 20.0 * np.log10(f2 / 1e6)  # 3 dB lower everywhere
    f, delta = compare_spectra(f1, l1, f2, l2)
    assert f.min() >= 50e6 and f.max() <= 1e9
    # f1 has fewer bins in the 50 MHz - 1 GHz overlap, so its bins are the common ones
    assert np.all(np.isin(f, f1))
    np.testing.assert_allclose(delta, -3.0, atol=1e-9)


def test_non_overlapping_spans_are_refused():
    with pytest.raises(AnalysisError, match="spans do not overlap"):
        compare_spectra([1e6, 2e6], [0, 0], [3e6, 4e6], [0, 0])


def test_suspects_matched_by_frequency_with_tolerance():
    # tolerance = max(RBW, 0.1 % of f): at 48 MHz with RBW 120 kHz -> 120 kHz; at 500 MHz ->
    # 500 kHz (brief's matching rule, common practice)
    assert match_tolerance_hz([48e6, 500e6], 120e3) == pytest.approx([120e3, 500e3])
    before = pd.DataFrame({"freq_hz": [48.00e6, 100e6, 500.0e6], "level": [45.0, 38.0, 41.0],
                           "detector": "peak", "margin_db": [-5.0, 2.0, -1.0],
                           "status": ["fail", "marginal", "fail"]})
    after = pd.DataFrame({"freq_hz": [48.05e6, 500.4e6, 700e6], "level": [35.0, 43.5, 39.0],
                          "detector": "peak", "margin_db": [5.0, -3.5, 1.0],
                          "status": ["marginal", "fail", "marginal"]})
    table = match_suspects(before, after, 120e3)
    rows = {r.change + str(round((r.freq_before_hz if r.change != "new" else r.freq_after_hz)
                                 / 1e6)): r for r in table.itertuples()}
    assert set(rows) == {"matched48", "vanished100", "matched500", "new700"}
    assert rows["matched48"].delta_db == pytest.approx(-10.0)
    assert rows["matched48"].delta_margin_db == pytest.approx(+10.0)
    assert rows["matched500"].delta_db == pytest.approx(+2.5)  # 400 kHz apart < 500 kHz
    # 48 MHz vs 48.2 MHz is beyond the 120 kHz tolerance: not the same emission
    far = after.assign(freq_hz=[48.2e6, 500.4e6, 700e6])
    assert "vanished" in set(match_suspects(before, far, 120e3).query(
        "freq_before_hz == 48e6")["change"])


def test_compare_runs_writes_html_with_summary(tmp_path):
    before = make_run(tmp_path, "before", {48e6: 50.0, 100e6: 40.0},
                      [(48e6, 53.3, "fail"), (100e6, 45.0, "fail")], grid_peak=60.0)
    after = make_run(tmp_path, "after", {48e6: 40.0, 300e6: 41.0},
                     [(48e6, 43.3, "fail"), (300e6, 41.0, "fail")], grid_peak=48.0)
    result = compare_runs(before, after)
    path = result.path
    assert path == after / f"compare-{before.name}" / "compare.html"
    text = path.read_text(encoding="utf-8")
    summary = (path.parent / "summary.txt").read_text(encoding="utf-8")
    assert summary.splitlines() == result.lines()
    # matched suspect 48 MHz: 53.3 -> 43.3 = -10.0 dB (constructed)
    assert "matched suspects (1 suspect): largest improvement -10.0 dB at 48.0 MHz" in summary
    assert "matched 1, new 1, vanished 1" in summary
    # grid: every node drops by the injected 12 dB (60 -> 48 dBuV at the same bin)
    (nf,) = [line for line in result.lines() if line.startswith("nf: ")]
    assert "spectrum peaks (1 peak): largest improvement -12.0 dB at 50.0 MHz, no increase" in nf
    assert "combined map (20 positions): largest improvement -12.0 dB at x = " in nf
    assert "combined map (20 positions): largest improvement -12.0 dB" in text
    assert len(re.findall(r'src="data:image/png;base64,', text)) == 3
    assert not re.search(r'(src|href)\s*=\s*["\']?\s*(https?:)?//', text, re.I)
    assert "Hot spots before" in text and "Hot spots after" in text


def test_unit_mismatch_is_refused(tmp_path):
    before = make_run(tmp_path, "before", {48e6: 50.0}, [])
    after = make_run(tmp_path, "after", {48e6: 40.0}, [], chain=False)
    with pytest.raises(AnalysisError, match=r"step 'pre': cannot compare dbuv_per_m \(before\) "
                                            r"with dbuv \(after\)"):
        compare_runs(before, after, out=tmp_path / "cmp")


# ----------------------------------------------------------------------------- one summary

PAIR_SEQUENCE = """
schema = 1
name = "compare-pair"
[sweeps.cd]
start = "30 MHz"
stop = "1 GHz"
rbw = "120 kHz"
[sweeps.nf]
start = "30 MHz"
stop = "300 MHz"
rbw = "1 MHz"
points = 541
[[steps]]
kind = "sweep"
label = "far"
sweep = "cd"
limit = "cispr32-class-b-3m"
[[steps]]
kind = "grid"
label = "buck-area"
sweep = "nf"
probe = "hloop-10mm"
area = { x = ["60 mm", "100 mm"], y = ["0 mm", "40 mm"] }
step_size = "10 mm"
height = "3 mm"
"""


@pytest.mark.slow
def test_the_page_summary_is_the_terminal_summary(tmp_path, capsys):
    import html
    from importlib import resources
    from pathlib import Path

    from bench.cli import main

    demo = Path(str(resources.files("bench.demo")))
    seq = tmp_path / "pair.toml"
    seq.write_text(PAIR_SEQUENCE, encoding="utf-8")
    folders = []
    for name, board in (("before", "demo-board.toml"), ("after", "demo-board-fixed.toml")):
        assert main(["run", str(seq), "--sim", "--board", str(demo / board), "--no-plots",
                     "--out", str(tmp_path / name)]) == 0
        (folder,) = list((tmp_path / name).iterdir())
        folders.append(folder)
    capsys.readouterr()
    assert main(["compare", str(folders[0]), str(folders[1])]) == 0
    printed = capsys.readouterr().out.strip().splitlines()
    terminal, page_path = printed[:-1], Path(printed[-1])
    text = page_path.read_text(encoding="utf-8")
    (block,) = re.findall(r'<ul class="summary">(.*?)</ul>', text)
    on_page = [html.unescape(item) for item in re.findall(r"<li>(.*?)</li>", block)]
    # the same lines, hence the same numbers, on the terminal and at the top of the page
    assert terminal == on_page and len(terminal) == 2
    number = r"[-+]?\d+\.\d+"
    assert re.findall(number, " ".join(terminal)) == re.findall(number, " ".join(on_page))
    # the map sentence of the grid section is the map part of the grid's summary line
    (grid_line,) = [line for line in terminal if line.startswith("buck-area: ")]
    (sentence,) = re.findall(r"<p>Map change, [^:]*: (.*?)\.</p>", text)
    assert html.unescape(sentence) in grid_line
    # the tighter buck loop (0.5 -> 0.2 cm2) lowers its moment by 20*log10(0.2/0.5) = -7.96 dB
    # (derived: moment = current x loop area, docs/board-format.md): a map improvement shows
    improvement = float(re.search(r"combined map \(25 positions\): largest improvement "
                                  rf"({number}) dB", grid_line).group(1))
    assert improvement <= -5.0


def test_change_extremes_say_no_change_below_the_shown_resolution():
    from bench.analysis.changes import ChangeExtremes, StepChange

    # changes of a few hundredths of a dB print as 0.0 dB: they are "no change" (constructed)
    small = ChangeExtremes.of("spectrum peaks", "peak", [0.04, -0.04, np.nan], ["a", "b", "c"])
    assert small.count == 2 and small.text() == "spectrum peaks (2 peaks): no change"
    one = ChangeExtremes.of("matched suspects", "suspect", [-8.74], ["48.0 MHz"])
    assert one.text() == ("matched suspects (1 suspect): largest improvement -8.7 dB at "
                          "48.0 MHz, no increase")
    # equal changes (to float noise) name the first place
    ties = ChangeExtremes.of("combined map", "position", [-3.0 - 1e-12, -3.0, -3.0 + 1e-12],
                             ["p1", "p2", "p3"])
    assert ties.improvement.where == "p1"
    assert ChangeExtremes.of("x", "y", [np.nan], ["p"]) is None
    line = StepChange("nf", "grid", (one,), (1, 0, 2)).line()
    assert line == ("nf: matched suspects (1 suspect): largest improvement -8.7 dB at 48.0 MHz, "
                    "no increase; suspects matched 1, new 0, vanished 2")
    assert StepChange("nf", "grid", ()).line() == "nf: no emissions to compare"
