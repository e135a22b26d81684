"""Peak search, suspects and ambient flagging on constructed spectra.

Traces are built from known lines on a noise floor drawn from a seeded RNG. A line's shape is
the Gaussian RBW response, 6*(2*df/B6)^2 dB down at offset df (derived, docs/physics.md section 8), added in
power to the floor. Expected peaks are the lines we put in; scipy.signal.find_peaks is used as
the reference where its semantics apply directly.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.signal import find_peaks

from bench.analysis.limits import load_limit
from bench.analysis.peaks import PEAK_COLUMNS, find_peaks_hz, flag_ambient, select_suspects
from bench.errors import AnalysisError

MHZ = 1e6


def spectrum(freq_hz, lines, *, floor_db=20.0, noise_db=1.0, b6_hz=1 * MHZ, seed=1):
    """Floor + noise (seeded) + Gaussian-RBW lines [(freq_hz, level_db), ...], power sum."""
    rng = np.random.default_rng(seed)
    floor = floor_db + noise_db * rng.standard_normal(freq_hz.size)
    power = 10 ** (floor / 10)
    for f0, level in lines:
        shape_db = level - 6.0 * (2.0 * (freq_hz - f0) / b6_hz) ** 2  # Gaussian RBW (derived)
        power = power + 10 ** (shape_db / 10)
    return 10 * np.log10(power)


FREQ = np.linspace(30 * MHZ, 1000 * MHZ, 19401)  # 50 kHz step
LINES = [(100 * MHZ, 50.0), (250 * MHZ, 35.0), (600 * MHZ, 45.0), (601.5 * MHZ, 41.0)]


def test_finds_the_constructed_lines():
    level = spectrum(FREQ, LINES)
    peaks = find_peaks_hz(FREQ, level, prominence_db=8.0, min_separation_hz=1 * MHZ,
                          floor_window_hz=20 * MHZ)
    assert list(peaks.columns) == list(PEAK_COLUMNS)
    # The four lines (1.5 MHz apart at 600/601.5 MHz, more than min separation), nothing else:
    # 8 dB prominence is > 5 sigma of the 1 dB noise.
    np.testing.assert_allclose(peaks["freq_hz"], [f for f, _ in LINES], atol=50e3)
    np.testing.assert_allclose(peaks["level"], [lvl for _, lvl in LINES], atol=0.5)
    assert np.all(peaks["prominence_db"] >= 8.0)
    np.testing.assert_array_equal(FREQ[peaks["index"]], peaks["freq_hz"])


def test_agrees_with_scipy_inside_the_trace():
    # Reference: scipy.signal.find_peaks with wlen in samples; on evenly spaced points a 20 MHz
    # window is 2*200+1 samples of 50 kHz. With no minimum separation the interior peaks and
    # their prominences must be scipy's (end points are our addition, compared separately).
    level = spectrum(FREQ, LINES, seed=7)
    step = FREQ[1] - FREQ[0]
    idx, props = find_peaks(level, prominence=3.0, wlen=2 * round(10 * MHZ / step) + 1)
    ours = find_peaks_hz(FREQ, level, prominence_db=3.0, min_separation_hz=0.0,
                         floor_window_hz=20 * MHZ)
    interior = ours[(ours["index"] > 0) & (ours["index"] < FREQ.size - 1)]
    assert len(idx) > 100
    np.testing.assert_array_equal(interior["index"], idx)
    np.testing.assert_allclose(interior["prominence_db"], props["prominences"])


def test_min_separation_keeps_the_highest_of_scipy_peaks():
    # Separation in Hz applied to the prominent peaks: every dropped peak has a higher kept
    # peak closer than min_separation_hz (scipy's distance rule, stated in Hz).
    level = spectrum(FREQ, LINES, seed=7)
    every = find_peaks_hz(FREQ, level, prominence_db=3.0, min_separation_hz=0.0,
                          floor_window_hz=20 * MHZ)
    kept = find_peaks_hz(FREQ, level, prominence_db=3.0, min_separation_hz=2 * MHZ,
                         floor_window_hz=20 * MHZ)
    assert set(kept["index"]) <= set(every["index"]) and len(kept) < len(every)
    assert np.all(np.diff(kept["freq_hz"]) >= 2 * MHZ)
    dropped = every[~every["index"].isin(kept["index"])]
    for freq, level_db in zip(dropped["freq_hz"], dropped["level"]):
        near = kept[np.abs(kept["freq_hz"] - freq) < 2 * MHZ]
        assert (near["level"] >= level_db).any()


@pytest.mark.parametrize("grid", ["10k", "100k", "log"])
def test_min_separation_is_in_hz_whatever_the_spacing(grid):
    if grid == "log":
        freq = np.geomspace(50 * MHZ, 200 * MHZ, 4001)  # step 17 kHz .. 69 kHz
    else:
        step = {"10k": 10e3, "100k": 100e3}[grid]
        freq = np.arange(50 * MHZ, 200 * MHZ + step / 2, step)
    # Two lines 0.8 MHz apart (closer than 1 MHz) and two 1.2 MHz apart (further).
    lines = [(100 * MHZ, 40.0), (100.8 * MHZ, 45.0), (150 * MHZ, 40.0), (151.2 * MHZ, 38.0)]
    level = spectrum(freq, lines, noise_db=0.0, b6_hz=200e3)
    peaks = find_peaks_hz(freq, level, prominence_db=6.0, min_separation_hz=1 * MHZ)
    # The higher of the close pair survives; the far pair both stay.
    np.testing.assert_allclose(peaks["freq_hz"], [100.8 * MHZ, 150 * MHZ, 151.2 * MHZ],
                               atol=np.max(np.diff(freq)))


@pytest.mark.parametrize("seed", range(5))
def test_no_two_peaks_closer_than_min_separation(seed):
    freq = np.sort(np.random.default_rng(seed).uniform(30 * MHZ, 300 * MHZ, 5000))
    level = spectrum(freq, [], noise_db=3.0, seed=seed)
    peaks = find_peaks_hz(freq, level, prominence_db=2.0, min_separation_hz=2 * MHZ)
    assert len(peaks) > 5
    assert np.all(np.diff(peaks["freq_hz"]) >= 2 * MHZ)


def test_peaks_at_the_end_points_are_reported():
    # scipy never reports an end point (pitfalls: find_peaks); an emission at the sweep edge
    # must still be seen. Lines centred exactly on the first and last points.
    lines = [(FREQ[0], 45.0), (FREQ[-1], 40.0), (500 * MHZ, 42.0)]
    level = spectrum(FREQ, lines, noise_db=0.0)
    peaks = find_peaks_hz(FREQ, level, prominence_db=6.0, min_separation_hz=1 * MHZ)
    assert list(peaks["index"]) == [0, int(np.argmin(np.abs(FREQ - 500 * MHZ))), FREQ.size - 1]
    assert find_peaks(level, prominence=6.0)[0].size == 1  # scipy alone: only the middle one
    # One-sided prominence: the line height over the floor (45 - 20 = 25 dB at the start).
    assert peaks["prominence_db"].iloc[0] == pytest.approx(25.0, abs=0.1)


def test_nan_gap_does_not_hide_neighbouring_peaks():
    lines = [(100 * MHZ, 40.0), (300 * MHZ, 40.0)]
    level = spectrum(FREQ, lines, noise_db=0.0)
    i100 = int(np.argmin(np.abs(FREQ - 100 * MHZ)))
    level[i100 + 1:i100 + 40] = np.nan  # gap right after the 100 MHz line
    level[5000:5100] = np.nan
    peaks = find_peaks_hz(FREQ, level, prominence_db=6.0, min_separation_hz=1 * MHZ)
    np.testing.assert_allclose(peaks["freq_hz"], [100 * MHZ, 300 * MHZ], atol=50e3)
    assert np.all(np.isfinite(peaks["level"]))
    # scipy on the raw trace loses the peak next to the NaN (pitfalls: find_peaks).
    assert i100 not in find_peaks(level, prominence=6.0)[0]


def test_prominence_is_local():
    # A raised floor band (50 dB between 400 and 600 MHz) carrying a 3 dB bump at 500 MHz:
    # measured against the whole trace the bump stands 33 dB over the 20 dB floor; against
    # its 20 MHz neighbourhood it is 3 dB, below a 6 dB threshold.
    floor = np.where((FREQ > 400 * MHZ) & (FREQ < 600 * MHZ), 50.0, 20.0)
    level = floor + 3.0 * np.exp(-0.5 * ((FREQ - 500 * MHZ) / 1e6) ** 2)
    peaks = find_peaks_hz(FREQ, level, prominence_db=6.0, min_separation_hz=1 * MHZ,
                          floor_window_hz=20 * MHZ)
    assert 500 * MHZ not in set(peaks["freq_hz"])
    idx, props = find_peaks(level, prominence=6.0)  # scipy without wlen: global prominence
    assert FREQ[idx].tolist() == [500 * MHZ] and props["prominences"][0] == pytest.approx(33.0)


def test_input_checks():
    with pytest.raises(AnalysisError, match="strictly increasing"):
        find_peaks_hz([2.0, 1.0, 3.0], [0, 1, 0], prominence_db=1, min_separation_hz=0.5)
    with pytest.raises(AnalysisError, match="equal length"):
        find_peaks_hz([1.0, 2.0], [0.0], prominence_db=1, min_separation_hz=0.5)
    with pytest.raises(AnalysisError, match="prominence_db > 0"):
        find_peaks_hz([1.0, 2.0], [0.0, 1.0], prominence_db=0, min_separation_hz=0.5)
    empty = find_peaks_hz(FREQ[:10], np.full(10, np.nan), prominence_db=1, min_separation_hz=1)
    assert list(empty.columns) == list(PEAK_COLUMNS) and len(empty) == 0


# --------------------------------------------------------------------------- suspects

def peak_table(rows):
    return pd.DataFrame({"freq_hz": [f for f, _ in rows], "level": [lvl for _, lvl in rows],
                         "prominence_db": 10.0, "index": range(len(rows))})


def test_select_suspects_against_cispr32_class_b():
    limit = load_limit("cispr32-class-b-3m")
    peaks = peak_table([(100 * MHZ, 42.0), (229 * MHZ, 36.0), (231 * MHZ, 36.0),
                        (500 * MHZ, 47.0), (2000 * MHZ, 80.0), (60 * MHZ, 20.0)])
    suspects = select_suspects(peaks, lambda f: limit.level("quasi-peak", f), margin_db=6.0)
    # Table A.4 clause A4.2: 40 dBuV/m to 230 MHz, 47 above. By hand: 100 MHz 40-42 = -2
    # (fail); 229 MHz 40-36 = 4 (near); 500 MHz 47-47 = 0 (near: at, not over, the limit).
    # 231 MHz (margin 11) and 60 MHz (20) are not suspects; 2 GHz has no QP limit.
    assert suspects["freq_hz"].tolist() == [100 * MHZ, 229 * MHZ, 500 * MHZ]
    assert suspects["margin_db"].tolist() == [-2.0, 4.0, 0.0]
    assert suspects["status"].tolist() == ["fail", "marginal", "marginal"]
    assert suspects["limit"].tolist() == [40.0, 40.0, 47.0]


def test_select_suspects_with_limit_array():
    peaks = peak_table([(1e8, 30.0), (2e8, 45.0)])
    out = select_suspects(peaks, np.array([40.0, 40.0]), margin_db=3.0)
    assert out["freq_hz"].tolist() == [2e8] and out["margin_db"].tolist() == [-5.0]
    with pytest.raises(AnalysisError, match="one limit per peak"):
        select_suspects(peaks, np.array([40.0]), margin_db=3.0)


# --------------------------------------------------------------------------- ambient

def test_flag_ambient_true_and_false_cases():
    suspects = peak_table([(100 * MHZ, 45.0), (300 * MHZ, 45.0), (500 * MHZ, 45.0),
                           (700 * MHZ, 45.0), (800 * MHZ, 23.0)])
    ambient = spectrum(FREQ, [
        (100.05 * MHZ, 44.0),   # same signal, 50 kHz off, 1 dB lower  -> ambient
        (300 * MHZ, 35.0),      # same frequency but 10 dB lower        -> not ambient
        (502 * MHZ, 45.0),      # 2 MHz off, outside the tolerance      -> not ambient
        (700 * MHZ, 50.0),      # stronger in the ambient capture       -> ambient
    ], noise_db=0.5, seed=3)
    # 800 MHz: the suspect is 3 dB above a 20 dB floor and the ambient shows only floor there
    # (no peak), so it is not ambient even though the floor is within the level tolerance.
    out = flag_ambient(suspects, FREQ, ambient, freq_tol_hz=200e3, level_tol_db=3.0)
    assert out["ambient"].tolist() == [True, False, False, True, False]
    assert out["ambient_freq_hz"].iloc[0] == pytest.approx(100.05 * MHZ, abs=50e3)
    assert math.isnan(out["ambient_level"].iloc[1])
    assert len(out) == len(suspects) and "ambient" not in suspects.columns
