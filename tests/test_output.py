"""What the user reads: the verdict, the board under test, the cautions, the confirmation."""

from __future__ import annotations

import re
import shutil
from importlib import resources
from pathlib import Path

import pandas as pd
import pytest

from bench.analysis.verdict import verdict_of
from bench.cli import main
from bench.store import open_run

DEMO = Path(str(resources.files("bench.demo")))


def _row(label, freq_mhz, level, limit, status, detector="quasi-peak", **pose):
    return dict(step_label=label, freq_hz=freq_mhz * 1e6, level=level, unit="dbuv_per_m", detector=detector,
                limit_level=limit, margin_db=None if limit is None else limit - level, status=status,
                polarization=pose.get("polarization"), height_m=pose.get("height_m"),
                azimuth_deg=pose.get("azimuth_deg"))


def test_verdict_counts_frequencies_by_their_worst_reading():
    # limits of CISPR 32 class B at 3 m (Table A.4): 40 dBuV/m to 230 MHz, 47 dBuV/m above
    results = pd.DataFrame([
        _row("pre", 72.0, 47.0, 40.0, "fail", "peak"),          # superseded by the final reading
        _row("pre", 150.0, 30.0, 40.0, "pass", "peak"),         # passed with margin: counts
        _row("pre", 97.3, 45.0, 40.0, "ambient", "peak"),       # ambient: never decides
        _row("fin", 72.0, 43.5, 40.0, "fail", polarization="horizontal", height_m=1.5, azimuth_deg=90.0),
        _row("fin", 72.0, 30.0, None, "info", "cispr-average"),  # no average line below 1 GHz
        _row("fin", 300.0, 44.0, 47.0, "marginal"),
    ])
    verdict = verdict_of(results, {"pre": "fin"})
    assert verdict.status == "FAIL"
    assert verdict.counts == {"fail": 1, "marginal": 1, "pass": 1}
    assert verdict.line() == ("FAIL     worst margin -3.5 dB at 72.000 MHz (quasi-peak, horizontal, 1.50 m, 90°); "
                              "1 fail, 1 marginal, 1 pass")


def test_a_run_without_limits_says_so():
    results = pd.DataFrame([_row("grid", 72.0, 10.0, None, "info", "peak")])
    assert verdict_of(results, {}).line().startswith("NO LIMIT")


def test_the_run_ends_with_the_verdict_and_names_the_board(tmp_path, capsys):
    assert main(["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots", "--out", str(tmp_path / "runs")]) == 0
    out = capsys.readouterr().out
    assert "board      WSC-2 weather-station controller rev B, serial WSC2-0042" in out
    assert "Analyzer input (profile scpi-analyzer): damaged above +30 dBm or by any DC voltage" in out
    assert "clock is accelerated" in out
    lines = out.splitlines()
    verdict = next(line for line in lines if line.startswith(("FAIL", "MARGINAL", "PASS", "NO LIMIT")))
    assert verdict.startswith("NO LIMIT")  # the quick demo compares nothing with a limit
    (folder,) = (tmp_path / "runs").iterdir()
    manifest = open_run(folder).manifest()
    assert manifest["eut"]["serial"] == "WSC2-0042" and manifest["unattended"] is False
    assert not (folder / "run.lock").exists()


def _real_bench(tmp_path: Path) -> Path:
    """The demo bench with addresses of instruments that are not there (nothing listens)."""
    shutil.copytree(DEMO / "tables", tmp_path / "tables")
    text = (DEMO / "demo-bench.toml").read_text(encoding="utf-8")
    for role, address in (("analyzer", "TCPIP::127.0.0.1::9::SOCKET"), ("stage", "socket://127.0.0.1:9"),
                          ("mast", "socket://127.0.0.1:9"), ("turntable", "socket://127.0.0.1:9"),
                          ("supply", "TCPIP::127.0.0.1::9::SOCKET")):
        text = text.replace(f'address = "sim://{role}"', f'address = "{address}"')
    path = tmp_path / "bench.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_a_real_run_without_a_terminal_asks_for_unattended(tmp_path, capsys):
    bench = _real_bench(tmp_path)
    args = ["run", str(DEMO / "demo-far-field.toml"), "--bench", str(bench), "--out", str(tmp_path / "runs")]
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no terminal to confirm" in err[0] and "--unattended" in err[0]
    assert not (tmp_path / "runs").exists()
    # with --unattended it goes on, and stops at the missing instruments with one line
    assert main(args + ["--unattended"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "127.0.0.1" in err[0]
    assert not (tmp_path / "runs").exists()


FAR_SMALL = """
schema = 1
name = "out-far"
[sweeps.cd]
start = "30 MHz"
stop = "300 MHz"
rbw = "120 kHz"
[[steps]]
kind = "prescan"
label = "prescan"
sweep = "cd"
heights = { from = "1 m", to = "1 m", step = "1 m" }
polarizations = ["horizontal", "vertical"]
azimuths = { from = "0 deg", to = "0 deg", step = "90 deg" }
limit = "cispr32-class-b-3m"
"""


def _far_run(tmp_path: Path) -> Path:
    seq = tmp_path / "far.toml"
    seq.write_text(FAR_SMALL, encoding="utf-8")
    assert main(["run", str(seq), "--sim", "--no-plots", "--out", str(tmp_path / "runs")]) == 0
    (folder,) = (tmp_path / "runs").iterdir()
    return folder


def test_maps_are_refused_where_there_is_nothing_to_map(tmp_path, capsys):
    folder = _far_run(tmp_path)
    capsys.readouterr()
    assert main(["report", str(folder), "--map-at", "100 MHz"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--map-at" in err[0] and "grid step to map, found none" in err[0]


def test_export_names_columns_with_units_and_corrects_each_reading(tmp_path, capsys):
    folder = _far_run(tmp_path)
    capsys.readouterr()
    assert main(["export", str(folder), "--csv", str(tmp_path / "csv"), "--parquet"]) == 0
    out = capsys.readouterr().out
    assert "spectra-prescan.csv" in out and "spectra.parquet" in out
    spectra = pd.read_csv(tmp_path / "csv" / "spectra-prescan.csv")
    assert list(spectra.columns) == ["Trace", "Frequency (Hz)", "Reading (dBµV)", "Level (dBµV/m)"]
    # corrected = reading + antenna factor + cable loss - preamp gain (the demo bench's chain);
    # at 30 MHz the demo antenna factor is 20 log10(30) - (-9 dBi) - 29.774 = 8.77 dB/m (demo table)
    first = spectra.iloc[0]
    assert first["Frequency (Hz)"] == pytest.approx(30e6)
    assert first["Level (dBµV/m)"] - first["Reading (dBµV)"] == pytest.approx(8.77 + 0.29 - 30.0, abs=0.6)
    results = pd.read_csv(tmp_path / "csv" / "results.csv")
    assert {"Level (dBµV/m)", "Limit (dBµV/m)", "Margin (dB)"} <= set(results.columns)
    long = pd.read_parquet(tmp_path / "csv" / "spectra.parquet")
    assert {"freq_hz", "reading_dbuv", "level", "unit"} <= set(long.columns) and len(long) == 2 * 4501  # 270 MHz / (RBW/2) + 1 points


def test_info_prints_a_limit_with_its_source(capsys):
    assert main(["info", "--limit", "cispr32-class-b-3m"]) == 0
    out = capsys.readouterr().out
    assert "source: CISPR 32" in out
    # CISPR 32 Table A.4 (class B, 3 m): 40 dBuV/m from 30 to 230 MHz, 47 dBuV/m to 1 GHz
    assert re.search(r"30\.000 MHz to\s+230\.000 MHz\s+40\.0 dBµV/m", out)
    assert re.search(r"230\.000 MHz to\s+1000\.000 MHz\s+47\.0 dBµV/m", out)


def test_a_stored_run_is_judged_again_against_another_limit(tmp_path, capsys):
    folder = _far_run(tmp_path)  # judged against CISPR 32 class B at 3 m when measured
    capsys.readouterr()
    assert main(["report", str(folder), "--limit", "cispr32-class-a-10m", "--margin", "3 dB"]) == 0
    path = Path(capsys.readouterr().out.strip())
    assert path.name == "report-cispr32-class-a-10m.html" and (folder / "report.html").exists() is False
    text = path.read_text(encoding="utf-8")
    # the class A 10 m line (CISPR 32 Table A.2: 40 dBuV/m to 230 MHz) moved to the 3 m site
    # at 20 dB/decade is 50.5 dBuV/m, 10.5 dB above the class B line the run was measured against
    assert "judged again against cispr32-class-a-10m" in text and "class A" in text
    assert "Source: CISPR 32" in text
    stored = open_run(folder).results("prescan")
    assert not stored.empty  # the run itself is unchanged: its rows are still judged against class B
    assert main(["report", str(folder), "--limit", "fcc15-class-b-3m", "--margin", "two"]) == 2
