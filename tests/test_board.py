"""Board files of the simulated bench: the malformed corpus, the demo boards, SI values."""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

import pytest

from bench.cli import main
from bench.errors import ConfigError
from bench.sim.board import CableEmitter, demo_board, load_board, parse_board

MALFORMED = Path(__file__).parent / "malformed"
DEMO = Path(str(resources.files("bench.demo")))
EXPECTED = tomllib.loads((MALFORMED / "expected.toml").read_text(encoding="utf-8"))
BOARD_CASES = sorted(name for name in EXPECTED if name.startswith("board-"))
MODEL_NAMES = ("Board", "Emitter", "Probe", "Site", "Ambient", "Stage", "Receiver", "_Dipole")


def _demo_text() -> str:
    return (DEMO / "demo-board.toml").read_text(encoding="utf-8")


def test_the_corpus_has_board_cases():
    assert len(BOARD_CASES) >= 20


@pytest.mark.parametrize("name", BOARD_CASES)
def test_malformed_board_gives_exactly_its_line(name, monkeypatch):
    monkeypatch.chdir(MALFORMED)  # messages name the file as given: the bare file name
    with pytest.raises(ConfigError) as info:
        load_board(name)
    assert str(info.value) == EXPECTED[name]
    assert info.value.all_errors[0].one_line() == EXPECTED[name]
    for error in info.value.all_errors:  # nothing of the validation library shows through
        text = str(error)
        assert "\n" not in text and "pydantic" not in text and "http" not in text
        assert "Input should" not in text and "Value error" not in text
        assert not any(model in text for model in MODEL_NAMES)


def test_malformed_board_is_exit_code_2_and_writes_nothing(tmp_path, capsys):
    code = main(["run", str(DEMO / "demo-quick.toml"), "--sim", "--no-plots",
                 "--board", str(MALFORMED / "board-unknown-key.toml"), "--out", str(tmp_path / "runs")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert err == [f"emission-bench: {MALFORMED / 'board-unknown-key.toml'}:19: emitters[0].loop_aera: "
                   "unknown key 'loop_aera' (did you mean 'loop_area'?)"]
    assert not (tmp_path / "runs").exists()


def test_board_that_is_not_utf8_is_one_line(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes(_demo_text().replace("invented product", "invented product \xb5").encode("latin-1"))
    with pytest.raises(ConfigError) as info:
        load_board(path)
    assert str(info.value) == f"{path}: expected a readable UTF-8 TOML file, found bytes that are not UTF-8"


def test_every_problem_is_kept_in_file_order():
    text = _demo_text().replace('rise_time = "1.5 ns"', 'rise_time = "1.5 parsec"').replace(
        'noise_figure = "24 dB"', 'noise_figure = 24')
    with pytest.raises(ConfigError) as info:
        parse_board(text, "demo.toml")
    keys = [error.key for error in info.value.all_errors]
    assert keys == ["emitters[0].rise_time", "receiver.noise_figure"]
    assert text.splitlines()[info.value.line - 1].startswith("rise_time")


@pytest.mark.parametrize("old, new, expected", [
    ('["30 MHz", "-9 dBi"]', '["0 MHz", "-9 dBi"]',
     'site.antenna_gain[0][0]: expected a positive frequency, found "0 MHz"'),
    ("ring_q = 4.0\n", "",
     "emitters[1].ring_q: expected ring_q with ring_frequency (they go together), found no "
     "ring_q key"),
    ('length = "30 mm"', 'length = "30 mm"\nloop_area = "1 cm2"',
     'emitters[2].loop_area: expected no loop_area with dipole = "electric" (it takes length), '
     "found loop_area = 0.0001 m2"),
    ('inductance = "32 nH"', 'inductance = "32 nH"\nwire_radius = "0.1 mm"',
     "probes[2].wire_radius: expected inductance or wire_radius, found both"),
    ('name = "mcu-clock"', 'name = ""',
     'emitters[0].name: expected a string of at least 1 character, found ""'),
    ('duty = 0.1\n', "duty = 1.5\n", "emitters[3].duty: expected a value <= 1.0, found 1.5"),
    ('ground_plane = true', 'ground_plane = "yes"',
     'site.ground_plane: expected true or false, found "yes"'),
])
def test_more_board_rules(old, new, expected):
    text = _demo_text()
    assert text.count(old) >= 1
    with pytest.raises(ConfigError) as info:
        parse_board(text.replace(old, new, 1), "demo.toml")
    assert str(info.value).split(": ", 1)[1] == expected


@pytest.mark.parametrize("name", ["demo-board.toml", "demo-board-fixed.toml"])
def test_demo_boards_load(name):
    board = load_board(DEMO / name)
    assert board.schema_version == 1
    assert {e.kind for e in board.emitters} == {"clock", "switcher", "spur", "burst", "cable"}
    assert len(board.ambient) == 4 and len(board.probes) == 4


def test_demo_board_from_package_equals_the_file(tmp_path):
    copy = tmp_path / "b.toml"
    copy.write_text(_demo_text(), encoding="utf-8")
    assert load_board(copy) == demo_board() == parse_board(_demo_text(), "x.toml")


def test_units_parsed_to_si():
    board = demo_board()
    clock = board.emitter("mcu-clock")
    assert clock.frequency_hz == 24e6
    assert clock.rise_time_s == pytest.approx(1.5e-9)
    assert clock.loop_area_m2 == pytest.approx(1.5e-4)
    assert clock.coupling_m_or_m2 == clock.loop_area_m2
    assert clock.tolerance_ppm == 30.0
    assert board.emitter("display-spi").coupling_m_or_m2 == pytest.approx(0.03)
    assert board.site.distance_m == 3.0
    assert board.site.antenna_gain[0] == (30e6, -9.0)
    assert board.stage.board_origin_m == pytest.approx((0.06, 0.04, 0.015))
    assert board.probe(1).radius_m == pytest.approx(5e-3)
    assert board.probe(4).capacitance_f == pytest.approx(1e-12)
    assert board.probe(9) is None
    assert board.receiver.noise_figure_db == 24.0


def test_directions_are_unit_vectors():
    cable = demo_board().emitter("sensor-cable")
    assert isinstance(cable, CableEmitter)
    assert cable.axis == (-1.0, 0.0, 0.0)
    text = _demo_text().replace("axis = [1, 0, 0]", "axis = [3, 4, 0]", 1)
    assert parse_board(text, "x.toml").emitter("pll-spur").axis == pytest.approx((0.6, 0.8, 0.0))


def test_defaults():
    board = parse_board(_demo_text().replace('thickness = "1.6 mm"\n', ""), "x.toml")
    assert board.board.thickness_m == pytest.approx(1.6e-3)
    cable = board.emitter("sensor-cable")
    assert cable.resistance_ohm == 36.5  # radiation resistance of a quarter-wave monopole, from memory
    spur = board.emitter("pll-spur")
    assert spur.tolerance_ppm == 20.0


def test_a_burst_repetition_may_be_written_in_millihertz():
    # a packet every 2 s repeats at 500 mHz: milli is m, mega is M (SI Brochure, BIPM, 9th
    # edition 2019, section 3), and a repetition frequency below 1 Hz is plausible
    text = _demo_text().replace('repetition = "10 Hz"', 'repetition = "500 mHz"')
    board = parse_board(text, "x.toml")
    burst = next(e for e in board.emitters if e.kind == "burst")
    assert burst.repetition_hz == pytest.approx(0.5)
    with pytest.raises(ConfigError, match="did you mean 500 MHz"):
        parse_board(text.replace('"500 mHz"', '"500 mhz"'), "x.toml")


def test_antenna_gain_interpolates_in_log_frequency():
    site = demo_board().site
    # the geometric mean of 30 and 60 MHz lies halfway in log f, so halfway in dB; beyond the
    # table the end value holds
    gain = site.antenna_gain_dbi([30e6, (30e6 * 60e6) ** 0.5, 60e6, 10e9])
    assert gain == pytest.approx([-9.0, -5.5, -2.0, 6.5])


def test_board_models_are_frozen():
    board = demo_board()
    with pytest.raises(Exception):
        board.site.distance_m = 10.0  # type: ignore[misc]


def test_the_example_in_the_docs_is_a_valid_board():
    docs = Path(__file__).parent.parent / "docs" / "board-format.md"
    text = docs.read_text(encoding="utf-8")
    example = text.split("```toml\n", 1)[1].split("```", 1)[0]
    board = parse_board(example, "docs/board-format.md")
    assert [e.kind for e in board.emitters] == ["clock", "cable"]
