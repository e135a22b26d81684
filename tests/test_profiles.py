"""Line-device and supply profiles: one loader, one-line errors with file, line and suggestion."""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

import pydantic
import pytest

from bench.drivers.positioner import PositionerProfile
from bench.drivers.profile import builtin_profiles, load_profile
from bench.drivers.stage import StageProfile
from bench.drivers.supply import SupplyProfile, load_supply_profile
from bench.errors import ConfigError

MALFORMED = Path(__file__).parent / "malformed"
EXPECTED = tomllib.loads((MALFORMED / "expected.toml").read_text(encoding="utf-8"))
LOADERS = {"stage": StageProfile.load, "positioner": PositionerProfile.load, "supply": load_supply_profile}
PROFILE_CASES = sorted(name for name in EXPECTED if name.split("-")[0] in LOADERS)


def _builtin_text(name: str) -> str:
    return (resources.files("bench.drivers") / "profiles" / f"{name}.toml").read_text(encoding="utf-8")


def test_the_corpus_has_cases_for_every_profile_kind():
    kinds = {name.split("-")[0] for name in PROFILE_CASES}
    assert kinds == set(LOADERS)


@pytest.mark.parametrize("name", PROFILE_CASES)
def test_malformed_profile_gives_exactly_its_line(name, monkeypatch):
    monkeypatch.chdir(MALFORMED)  # messages name the file as given: the bare file name
    with pytest.raises(ConfigError) as info:
        LOADERS[name.split("-")[0]](name)
    assert str(info.value) == EXPECTED[name]
    text = str(info.value)
    assert "\n" not in text and "pydantic" not in text and "Input should" not in text


@pytest.mark.parametrize(
    ("builtin", "loader", "good", "bad", "key"),
    [
        ("gcode-cartesian", StageProfile.load, "home_timeout =", "home_timout =", "timing.home_timout"),
        ("gcode-cnc", StageProfile.load, "tool_change =", "tool_chnage =", "commands.tool_chnage"),
        ("line-positioner", PositionerProfile.load, "time_margin =", "time_margn =", "busy.time_margn"),
        ("line-positioner", PositionerProfile.load, "decimals = 1\nspeed = \"3 deg/s\"",
         "decimal = 1\nspeed = \"3 deg/s\"", "turntable.decimal"),
        ("scpi-supply", load_supply_profile, "open_timeout =", "open_timeot =", "io.open_timeot"),
    ],
)
def test_a_misspelt_key_is_refused_with_file_line_and_suggestion(tmp_path, builtin, loader, good, bad, key):
    text = _builtin_text(builtin)
    assert good in text
    path = tmp_path / "mine.toml"
    path.write_text(text.replace(good, bad, 1), encoding="utf-8")
    line = text[: text.index(good)].count("\n") + 1
    with pytest.raises(ConfigError) as info:
        loader(path)
    misspelt, right = bad.split()[0], good.split()[0]
    assert str(info.value) == f"{path}:{line}: {key}: unknown key '{misspelt}' (did you mean '{right}'?)"
    assert (info.value.file, info.value.line, info.value.key) == (str(path), line, key)


def test_builtin_profiles_load_with_si_values():
    stage = StageProfile.load("gcode-cartesian")
    assert stage.origin == "builtin:gcode-cartesian"
    assert stage.accel_m_per_s2 == pytest.approx(0.1)  # "100 mm/s2" in the file
    assert stage.timing.home_timeout_s == 180.0 and stage.rotary.feed_deg_per_s == 90.0
    assert stage.commands["home"] == stage.commands.home == "G28"
    assert StageProfile.load("gcode-cnc").handshake.error_codes[3] == "not homed: home first"
    positioner = PositionerProfile.load("line-positioner")
    assert positioner.mast.speed_per_s == pytest.approx(0.05)  # "50 mm/s"
    assert positioner.mast.wire_per_si == 1e3 and positioner.turntable.speed_per_s == 3.0
    assert positioner.busy.poll_interval_s == pytest.approx(0.25)
    supply = load_supply_profile("scpi-supply")
    assert supply.settle_s == 2.0 and supply.io.timeout_s == 5.0
    assert supply.commands["output_on"] == "OUTP ON"


def test_every_builtin_line_and_supply_profile_loads():
    loaded = {name: load_profile({"gcode-cartesian": StageProfile, "gcode-cnc": StageProfile,
                                  "line-positioner": PositionerProfile, "scpi-supply": SupplyProfile}[name], name)
              for name in builtin_profiles() if not name.startswith("scpi-analyzer")}
    assert set(loaded) == {"gcode-cartesian", "gcode-cnc", "line-positioner", "scpi-supply"}


def test_profile_models_are_frozen():
    stage = StageProfile.load("gcode-cartesian")
    with pytest.raises(pydantic.ValidationError, match="frozen"):
        stage.timing.accel_m_per_s2 = 1.0  # type: ignore[misc]


def test_a_relative_path_starts_at_the_bench_file_folder(tmp_path):
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "mine.toml").write_text(_builtin_text("scpi-supply"), encoding="utf-8")
    profile = load_supply_profile("profiles/mine.toml", base_dir=tmp_path)
    assert profile.origin == str(tmp_path / "profiles" / "mine.toml")
