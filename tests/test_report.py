"""HTML report on a run folder built here: self-contained, cautious, escaped."""

import base64
import re

import numpy as np
import pytest

from bench.analysis import runview
from bench.plots import spectrum_png
from bench.report import DISCLAIMER, write_report
from bench.store import TraceMeta, create_run

FF_POINTS, NF_POINTS = 971, 271
FF_FREQ = np.linspace(30e6, 1e9, FF_POINTS)  # 1 MHz bins
NF_FREQ = np.linspace(30e6, 300e6, NF_POINTS)
EVIL = "pre<script>alert(1)</script>"
AF_CSV = "# name: test-af\n# role: antenna_factor\nfreq_mhz,af_db_per_m\n30,10\n1000,30\n"
LOOP_CSV = "# name: test-loop\n# role: probe_factor\nfreq_mhz,factor_db_s_per_m\n30,10\n300,30\n"


def _meta(action, label, kind, start, stop, points, **pose):
    return TraceMeta(action_index=action, step_label=label, step_kind=kind, segment=0,
                     start_hz=start, stop_hz=stop, points=points, rbw_hz=1e6, vbw_hz=3e6,
                     detector="peak", trace_mode="max-hold", sweeps=1, **pose)


def build_run(tmp_path):
    af = [{"role": "antenna_factor", "file": "tables/af.csv"}]
    manifest = {
        "name": "report-test", "software": "emission-bench 0.1.0",
        "created": "2026-12-01T19:30:00Z", "state": "complete", "simulated": True,
        "instruments": {"analyzer": "ACME,SA-1,0001,1.0 <b>"},
        "sequence": {"path": "seq.toml", "sha256": "0f" * 32, "text": 'name = "x"  # <tag>'},
        "plan": ["ambient 30 MHz-1 GHz", "prescan 30 MHz-1 GHz", "grid 5 x 4 x 2"],
        "steps": [
            {"label": "ambient", "kind": "ambient", "unit": "dbuv_per_m", "chain": af},
            {"label": EVIL, "kind": "prescan", "unit": "dbuv_per_m", "chain": af,
             "limit": "cispr32-class-b-3m", "distance_m": 3.0, "ambient": "ambient",
             "margin_db": 6.0},
            {"label": "grid", "kind": "grid", "unit": "dbua_per_m", "probe_kind": "h-loop",
             "chain": [{"role": "probe_factor", "file": "tables/loop.csv"}]},
            {"label": "later", "kind": "sweep"},
        ],
        "board": {"outline_m": [[0.0, 0.0], [0.04, 0.0], [0.04, 0.03], [0.0, 0.03]]},
    }
    run = create_run(tmp_path, "report-test", manifest)
    (run.folder / "tables").mkdir()
    (run.folder / "tables" / "af.csv").write_text(AF_CSV)
    (run.folder / "tables" / "loop.csv").write_text(LOOP_CSV)
    ambient = np.full(FF_POINTS, 5.0)
    ambient[70] = 30.0  # a broadcast carrier at 100 MHz
    run.add_trace(_meta(0, "ambient", "ambient", 30e6, 1e9, FF_POINTS, board_powered=False),
                  ambient, completes_action=True)
    prescan = ambient.copy()
    prescan[18] = 35.0  # 48 MHz emission
    run.add_trace(_meta(1, EVIL, "prescan", 30e6, 1e9, FF_POINTS, height_m=1.0,
                        polarization="vertical", azimuth_deg=0.0), prescan, completes_action=True)
    run.add_results([
        {"step_label": EVIL, "freq_hz": 48e6, "level": 48.2, "unit": "dbuv_per_m",
         "detector": "peak", "limit_level": 40.0, "margin_db": -8.2, "status": "fail",
         "polarization": "vertical", "height_m": 1.0, "azimuth_deg": 0.0, "chain": "af",
         "note": "<i>odd</i>"},
        {"step_label": EVIL, "freq_hz": 100e6, "level": 42.0, "unit": "dbuv_per_m",
         "detector": "peak", "limit_level": 40.0, "margin_db": -2.0, "status": "ambient"},
    ])
    action = 2
    for rot in (0.0, 90.0):
        for y in np.arange(4) * 0.01:
            for x in np.arange(5) * 0.01:
                levels = np.zeros(NF_POINTS)
                # a source at (20 mm, 10 mm) falling 1.5 dB per mm (constructed)
                levels[20] = 50.0 - 1500.0 * np.hypot(x - 0.02, y - 0.01)
                run.add_trace(_meta(action, "grid", "grid", 30e6, 300e6, NF_POINTS, x_m=float(x),
                                    y_m=float(y), z_m=0.003, rotation_deg=rot), levels,
                              completes_action=True)
                action += 1
    run.log_event("warning", "analyzer connection lost; reconnected after 2.0 s")
    return run


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    run = build_run(tmp_path_factory.mktemp("runs"))
    path = write_report(run)
    return run, path, path.read_text(encoding="utf-8")


def test_report_is_written_with_identity_and_disclaimer(report):
    run, path, text = report
    assert path == run.folder / "report.html"
    assert text.startswith("<!DOCTYPE html>")
    assert DISCLAIMER.split(".")[0] in text  # the estimate-not-verdict notice
    assert "accredited test house" in text
    assert "report-test" in text and "2026-12-01T19:30:00Z" in text
    assert "emission-bench 0.1.0" in text and "yes" in text  # simulated
    assert "ambient 30 MHz-1 GHz" in text  # plan


def test_report_has_the_safety_section(report):
    _, _, text = report
    assert "<h2>Safety</h2>" in text
    # design brief "Safety": input damage level, DC, protection, voltage, stage, RF exposure
    for phrase in ("+30 dBm", "0 V DC", "attenuator", "DC block", "limiter", "mains",
                   "high voltage", "stage", "RF exposure"):
        assert phrase in text, phrase


def test_report_embeds_png_images_and_links_nothing_outside(report):
    run, _, text = report
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', text)
    assert len(images) >= 3  # prescan spectrum, ambient spectrum, grid spectrum and maps
    for data in images:
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec §5.2)
    assert not re.search(r'(src|href)\s*=\s*["\']?\s*(https?:)?//', text, re.I)
    assert "<script" not in text.lower() and "<link" not in text.lower()
    written = sorted(p.name for p in (run.folder / "plots").glob("*.png"))
    assert "grid-map.png" in written and "ambient-spectrum.png" in written


def test_report_escapes_text_from_the_run(report):
    _, _, text = report
    assert "pre&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "&lt;i&gt;odd&lt;/i&gt;" in text and "<i>odd</i>" not in text
    assert "SA-1,0001,1.0 &lt;b&gt;" in text
    # files are named by their name and checksum, never by the machine's absolute path
    assert "# &lt;tag&gt;" in text and "seq.toml (SHA-256 " + "0f" * 8 in text


def test_report_tables_events_chain_and_missing_step(report):
    _, _, text = report
    # results table: 48 MHz in MHz with margin, and the status class on the row
    assert "48.0000" in text and "-8.2" in text and '<tr class="fail">' in text
    # emission peak at 50 MHz (bin 20 of 1 MHz bins from 30 MHz), rank an integer (constructed)
    assert "Emission peaks" in text and re.search(r"<tr><td>1</td><td[^>]*>50\.0000</td>", text)
    # its hot spot on each map at (20 mm, 10 mm), numbered 1 on its own map (constructed)
    for name in ("rotation 0 deg", "rotation 90 deg", "combined"):
        assert re.search(rf"<tr><td>{name}</td><td>1</td><td[^>]*>20\.0</td><td[^>]*>10\.0</td>",
                         text), name
    assert "reconnected after 2.0 s" in text
    assert "dBuV/m = reading dBuV + test-af" in text  # the chain used
    assert "No data: the run did not reach this step." in text  # step "later"


def test_corrected_ambient_and_limit_feed_the_plot(report, tmp_path):
    run, _, _ = report
    spec = runview.corrected_spectrum(run, EVIL)
    # E = V + AF (AF = E/V, common practice); AF linear in log10(f) between 30 MHz (10 dB/m) and
    # 1 GHz (30 dB/m) (transducers.py docstring)
    af_48 = 10.0 + 20.0 * np.log10(48 / 30) / np.log10(1000 / 30)
    assert spec.level[18] == pytest.approx(35.0 + af_48, abs=1e-4)
    limit = runview.step_limit(run, EVIL)
    # CISPR 32 Table A.4 clause A4.2, class B 3 m: 40 dBuV/m at 30-230 MHz
    assert limit.level("quasi-peak", 100e6) == pytest.approx(40.0)
    # a 40k-point trace plots (min/max envelope keeps it quick)
    freq = np.linspace(30e6, 1e9, 40001)
    level = np.random.default_rng(1).normal(20.0, 2.0, freq.size)
    out = spectrum_png(tmp_path / "big.png", freq, level, unit="dbuv_per_m", title="big",
                       limits=limit, suspects=run.results(EVIL))
    assert out.stat().st_size > 1000


def test_extra_map_views_are_drawn(tmp_path):
    from bench.report import MapViews

    run = build_run(tmp_path)
    write_report(run, MapViews(peaks=1, freqs_hz=(100e6,), bands_hz=((50e6, 150e6),)))
    written = {p.name for p in (run.folder / "plots").iterdir()}
    # a map at a chosen frequency, a band maximum and one per flagged peak (issue: near-field maps)
    assert {"grid-map-100MHz.png", "grid-map-50-150MHz.png"} <= written
    assert any(name.startswith("grid-map-peak1") for name in written)
