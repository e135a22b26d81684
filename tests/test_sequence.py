"""Sequence files: the malformed corpus, the demo sequences, key-path line finding."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pydantic
import pytest

from bench.errors import ConfigError
from bench.sequence import GridStep, PrescanStep, load_sequence
from bench.tomlsource import format_key_path, read_toml

MALFORMED = Path(__file__).parent / "malformed"
DEMO = Path(__file__).parent.parent / "sequences"
EXPECTED = tomllib.loads((MALFORMED / "expected.toml").read_text(encoding="utf-8"))
SEQUENCE_CASES = sorted(name for name in EXPECTED if name.startswith("seq-"))


def test_every_malformed_file_has_its_expected_message():
    files = {p.name for p in MALFORMED.glob("*.toml")} - {"expected.toml"}
    assert files == set(EXPECTED)
    assert len(SEQUENCE_CASES) >= 30


@pytest.mark.parametrize("name", SEQUENCE_CASES)
def test_malformed_sequence_gives_exactly_its_line(name, monkeypatch):
    monkeypatch.chdir(MALFORMED)  # messages name the file as given: the bare file name
    with pytest.raises(ConfigError) as info:
        load_sequence(name)
    assert str(info.value) == EXPECTED[name]
    assert info.value.all_errors[0].one_line() == EXPECTED[name]
    for error in info.value.all_errors:  # nothing of the validation library shows through
        text = str(error)
        assert "\n" not in text and "pydantic" not in text and "http" not in text
        assert "Input should" not in text and "SweepSettings" not in text


def test_all_errors_are_kept_in_file_order(monkeypatch):
    monkeypatch.chdir(MALFORMED)
    with pytest.raises(ConfigError) as info:
        load_sequence("seq-grid-multiple-errors.toml")
    lines = [(e.line, e.key) for e in info.value.all_errors]
    # the file has a bare number at line 6 and an unknown key at line 38 (count by hand)
    assert lines == [(6, "sweeps.band-cd.start"), (38, "steps[3].probe_speed")]


@pytest.mark.parametrize("name", ["demo-quick", "demo-near-field", "demo-far-field"])
def test_demo_sequences_load_without_warnings(name):
    sequence = load_sequence(DEMO / f"{name}.toml")
    assert sequence.name == name
    assert sequence.warnings == ()


def test_quantities_become_si_floats():
    sequence = load_sequence(DEMO / "demo-quick.toml")
    sweep = sequence.sweeps["band-cd"]
    assert (sweep.start_hz, sweep.stop_hz, sweep.rbw_hz) == (30e6, 1e9, 120e3)
    # step = B6/2 = 60 kHz for the 120 kHz CISPR C/D bandwidth (step <= B6/2: CISPR 16-2-x practice, from memory)
    assert sweep.freq_step_hz == 60e3
    # VBW defaults to 3 x RBW: VBW >= 3 RBW for peak readings (from memory)
    assert sweep.vbw_hz == pytest.approx(360e3)
    hold = sequence.sweeps["band-cd-hold"]
    assert hold.step_hz is None and hold.freq_step_hz == 60e3  # default rbw/2 (common practice)


def test_far_field_demo_covers_the_standard_search():
    sequence = load_sequence(DEMO / "demo-far-field.toml")
    prescan = sequence.step("prescan")
    assert isinstance(prescan, PrescanStep)
    # receive-antenna height scan 1-4 m, both polarizations, EUT turned through 360 deg
    # (CISPR 16-2-3 radiated method; ANSI C63.4)
    assert prescan.heights.values() == (1.0, 2.0, 3.0, 4.0)
    assert set(prescan.polarizations) == {"horizontal", "vertical"}
    assert prescan.azimuths.values() == tuple(45.0 * k for k in range(8))
    final = sequence.step("final")
    assert final.dwell_s == 1.0  # QP dwell >= 1 s for unknown signals (receiver manuals; common practice)
    assert final.height_search.offsets() == tuple(0.25 * k for k in range(-4, 5))
    assert sequence.sweep_of(final) is sequence.sweeps["band-cd"]


def test_near_field_demo_grids():
    sequence = load_sequence(DEMO / "demo-near-field.toml")
    top = sequence.step("hloop-top")
    assert isinstance(top, GridStep)
    assert top.area.x_m == pytest.approx((0.0, 0.1)) and top.area.y_m == pytest.approx((0.0, 0.08))
    assert top.orientations_deg == (0.0, 90.0) and top.pitch_x_m == pytest.approx(0.005)
    assert len(sequence.step("hloop-clock").polygon) == 4


def test_one_polarization_gives_a_warning_not_an_error(tmp_path):
    text = (DEMO / "demo-far-field.toml").read_text().replace(
        'polarizations = ["horizontal", "vertical"]', 'polarizations = ["vertical"]')
    path = tmp_path / "one-pol.toml"
    path.write_text(text)
    sequence = load_sequence(path)
    assert len(sequence.warnings) == 1 and "one polarization (vertical)" in sequence.warnings[0]


def test_models_are_frozen():
    sequence = load_sequence(DEMO / "demo-quick.toml")
    with pytest.raises(pydantic.ValidationError):
        sequence.sweeps["band-cd"].rbw_hz = 1.0


# --- line finding: positions follow TOML 1.0 (arrays of tables, sub-tables of their last
# --- element, dotted keys, inline tables, multi-line arrays)

LOCATOR_TEXT = '''\
schema = 1
[[steps]]
kind = "grid"
[[steps]]
kind = "prescan"   # a comment with = and [brackets]
note = """two
lines"""
orientations = [
    "0 deg",
    "90 deg",
]
[steps.area]
x = ["0 mm", "100 mm"]
[[steps]]
site.distance = "3 m"
pose = { height = "1 m", polarization = "vertical" }
'''


def test_locator_finds_lines_of_key_paths(tmp_path):
    path = tmp_path / "x.toml"
    path.write_text(LOCATOR_TEXT)
    lines = read_toml(path).line_of
    assert lines(("steps", 0)) == 2
    assert lines(("steps", 1, "kind")) == 5
    assert lines(("steps", 1, "orientations", 1)) == 10
    assert lines(("steps", 1, "area", "x", 1)) == 13  # [steps.area] belongs to steps[1]
    assert lines(("steps", 2, "site", "distance")) == 15
    assert lines(("steps", 2, "pose", "polarization")) == 16
    assert lines(("steps", 2, "missing-key")) == 14  # falls back to the table
    assert lines(("nothing",)) == 1


def test_key_paths_read_like_the_file():
    assert format_key_path(("steps", 2, "area", "x")) == "steps[2].area.x"
    assert format_key_path(("sweeps", "band cd", "rbw")) == 'sweeps."band cd".rbw'


def test_unreadable_file_is_one_line(tmp_path):
    with pytest.raises(ConfigError) as info:
        load_sequence(tmp_path / "absent.toml")
    assert str(info.value).endswith("absent.toml: expected a readable UTF-8 TOML file, "
                                    "found no such file")
