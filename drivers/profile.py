"""Instrument profiles: TOML files that hold what differs between instruments of one kind.

A profile is named by the bench file either as a built-in name (``scpi-analyzer`` reads
``drivers/profiles/scpi-analyzer.toml`` from the installed package) or as a path to a TOML file.

Every line-device and supply profile kind is a frozen pydantic model derived from
:class:`ProfileModel` and read by the one loader :func:`load_profile`, through the same TOML
helper as sequences and bench files (:mod:`bench.tomlsource`): unknown keys are refused at every
level with a suggestion, quantities (``"180 s"``, ``"100 mm/s2"``) are parsed to SI once, and
every problem is one line ``FILE:LINE: key.path: expected ..., found ...``.
"""

from __future__ import annotations

import dataclasses
import re
import string
import tomllib
import typing
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal, TypeVar

import pydantic
from pydantic import BaseModel, ConfigDict, Field

from bench.errors import ConfigError
from bench.tomlsource import (
    TomlSource,
    bench_error,
    check_schema,
    format_value,
    is_file,
    quantity,
    read_toml,
    suggest,
    validation_to_config_error,
)

__all__ = [
    "PROFILE_KINDS",
    "ProfileModel",
    "ProfileTable",
    "Pattern",
    "builtin_profiles",
    "load_profile",
    "load_profile_source",
    "pattern_with",
    "template_with",
    "duration",
    "AsciiWord",
    "Terminator",
    "MAX_DURATION_S",
]

#: Profile kinds and how messages name them.
PROFILE_KINDS = {
    "analyzer": "an analyzer profile",
    "gcode-stage": "a G-code stage profile",
    "line-positioner": "a mast/turntable profile",
    "supply": "a supply profile",
}

M = TypeVar("M", bound="ProfileModel")


def builtin_profiles() -> dict[str, str]:
    """Built-in profile names mapped to their one-line descriptions."""
    out: dict[str, str] = {}
    folder = resources.files("bench.drivers") / "profiles"
    for entry in sorted(folder.iterdir(), key=lambda p: p.name):
        if entry.name.endswith(".toml"):
            try:
                data = tomllib.loads(entry.read_text(encoding="utf-8"))
            except tomllib.TOMLDecodeError:
                data = {}
            out[entry.name[:-5]] = str(data.get("description", ""))
    return out


def load_profile_source(name_or_path: str | Path, *, base_dir: Path | None = None) -> TomlSource:
    """Read a profile's TOML with the line of every key (for one-line errors).

    Parameters
    ----------
    name_or_path : str or Path
        Built-in name (no ``.toml``) or a path, relative to ``base_dir`` when not absolute.
    base_dir : Path, optional
        Folder of the file that named the profile (the bench file).

    Returns
    -------
    bench.tomlsource.TomlSource
        Its ``file`` is the path, or ``builtin:<name>`` for a built-in profile.
    """
    text_name = str(name_or_path)
    if not text_name.endswith(".toml") and "/" not in text_name and "\\" not in text_name:
        entry = resources.files("bench.drivers") / "profiles" / f"{text_name}.toml"
        if not _builtin_exists(entry):
            known = ", ".join(builtin_profiles())
            raise ConfigError(f"unknown instrument profile {text_name!r} (built-in: {known}; or give a path to a .toml)")
        with resources.as_file(entry) as path:
            source = read_toml(path)
        return dataclasses.replace(source, file=f"builtin:{text_name}")
    path = Path(text_name)
    if not path.is_absolute() and base_dir is not None:
        path = base_dir / path
    if not is_file(path):
        raise ConfigError(f"profile file not found: {path}")
    return read_toml(path)


def _builtin_exists(entry) -> bool:
    """True when a built-in profile file exists (a name too long to look up is none)."""
    try:
        return entry.is_file()
    except (OSError, ValueError):
        return False


# ---------------------------------------------------------------------------- the models


class ProfileModel(BaseModel):
    """Base of every profile model: frozen, unknown keys refused, ``schema``, ``kind``, ``description``.

    Subclasses declare ``kind: Literal["<their kind>"]``; :func:`load_profile` checks it first.
    Nested tables derive from :class:`ProfileTable` (same strictness).
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    schema_version: Literal[1] = Field(alias="schema")
    description: str = ""
    _origin: str = pydantic.PrivateAttr("")

    @property
    def origin(self) -> str:
        """Where the profile came from: the file path, or ``builtin:<name>``."""
        return self._origin

    @property
    def name(self) -> str:
        """The profile's name in messages (same as :attr:`origin`)."""
        return self._origin

    @classmethod
    def profile_kind(cls) -> str:
        """The ``kind`` value this model reads (from its ``Literal`` annotation)."""
        return typing.get_args(cls.model_fields["kind"].annotation)[0]

    @classmethod
    def load(cls: type[M], name_or_path: str | Path, *, base_dir: Path | None = None) -> M:
        """Read a built-in profile by name or a profile file by path (see :func:`load_profile`)."""
        return load_profile(cls, name_or_path, base_dir=base_dir)


class ProfileTable(BaseModel):
    """A table inside a profile: frozen, unknown keys refused."""

    model_config = ConfigDict(frozen=True, extra="forbid")


def load_profile(model_cls: type[M], name_or_path: str | Path, *, base_dir: Path | None = None,
                 kind: str | None = None) -> M:
    """Read, check and validate one profile into ``model_cls``.

    Parameters
    ----------
    model_cls : type
        A :class:`ProfileModel` subclass (``StageProfile``, ``PositionerProfile``, ...).
    name_or_path : str or Path
        Built-in name or path (see :func:`load_profile_source`).
    base_dir : Path, optional
        Folder relative paths start from (the bench file's).
    kind : str, optional
        Expected ``kind`` value (default: the one ``model_cls`` declares).

    Returns
    -------
    ProfileModel
        The frozen, validated profile; quantities in SI; ``origin`` names the file.

    Raises
    ------
    ConfigError
        One line ``FILE:LINE: key.path: expected ..., found ...`` for the first problem in file
        order (``.all_errors`` holds every problem of the validation).
    """
    source = load_profile_source(name_or_path, base_dir=base_dir)
    check_schema(source)
    _check_kind(source, kind or model_cls.profile_kind())
    try:
        profile = model_cls.model_validate(source.data)
    except pydantic.ValidationError as exc:
        raise validation_to_config_error(source, exc, model_cls) from None
    profile._origin = source.file
    return profile


def _check_kind(source: TomlSource, kind: str) -> None:
    found = source.data.get("kind")
    if found == kind:
        return
    wanted = f"expected kind = \"{kind}\" ({PROFILE_KINDS.get(kind, 'this profile kind')})"
    if "kind" not in source.data:
        raise ConfigError(f"{wanted}, found no kind key", file=source.file, line=1, key="kind")
    what = f" ({PROFILE_KINDS[found]})" if isinstance(found, str) and found in PROFILE_KINDS else ""
    hint = suggest(found, PROFILE_KINDS) if isinstance(found, str) and not what else ""
    raise source.error(("kind",), f"{wanted}, found {format_value(found)}{what}{hint}")


# ------------------------------------------------------------------- field types for profiles


def _compile(value: Any) -> re.Pattern[str]:
    if not isinstance(value, str):
        raise bench_error(f"expected a regular expression in quotes, found {format_value(value)}")
    try:
        pattern = re.compile(value)
    except re.error as exc:
        raise bench_error(f"expected a valid regular expression, found {format_value(value)} ({exc})") from None
    if pattern.search("") is not None:
        # '' or '.*' would take every line (an empty one too) for an 'ok', an error, a banner
        raise bench_error(f"expected a regular expression that an empty line does not match, "
                          f"found {format_value(value)}")
    return pattern


#: A regular expression written as a TOML string, compiled once.
Pattern = Annotated[re.Pattern, pydantic.BeforeValidator(_compile)]


@dataclasses.dataclass(frozen=True)
class _GroupCheck:
    groups: tuple[str, ...]

    def __call__(self, pattern: re.Pattern[str]) -> re.Pattern[str]:
        missing = [g for g in self.groups if g not in pattern.groupindex]
        if missing:
            names = ", ".join(f"(?P<{g}>...)" for g in self.groups)
            raise bench_error(f"expected a regular expression with the group(s) {names}, found one "
                              f"without {', '.join(missing)}")
        return pattern


def pattern_with(*groups: str) -> Any:
    """A :data:`Pattern` that must define the named ``groups`` (``pattern_with("x", "y")``)."""
    return Annotated[Pattern, pydantic.AfterValidator(_GroupCheck(tuple(groups)))]


@dataclasses.dataclass(frozen=True)
class _TemplateCheck:
    fields: tuple[str, ...]

    def __call__(self, value: Any) -> str:
        if not isinstance(value, str) or not value.strip():
            raise bench_error(f"expected a command in quotes, found {format_value(value)}")
        if not _printable_ascii(value):
            # commands go out as ASCII bytes; a control character (a line end) would split one
            raise bench_error(f"expected a command of printable ASCII characters, found {format_value(value)}")
        try:
            found = {name for _, name, _, _ in string.Formatter().parse(value) if name is not None}
        except ValueError:
            found = None
        if found != set(self.fields):
            names = " and ".join("{" + f + "}" for f in self.fields) or "no {...} fields"
            raise bench_error(f"expected a command template with {names}, found {format_value(value)}")
        return value


def _printable_ascii(text: str) -> bool:
    return all(" " <= c <= "~" for c in text)


def _ascii_terminator(value: Any) -> Any:
    if isinstance(value, str) and value and not value.isascii():
        raise bench_error(f"expected a line terminator of ASCII characters (such as \"\\n\"), found "
                          f"{format_value(value)}")
    return value


#: A line terminator: ASCII characters (sent and matched as bytes).
Terminator = Annotated[str, pydantic.BeforeValidator(_ascii_terminator), Field(min_length=1, strict=True)]

#: Longest time a profile may give (one day), as for the bench file's timeouts: no instrument
#: needs more, and a typo such as "1e12 s" would otherwise hang a run for ever.
MAX_DURATION_S = 86_400.0


def duration(*, positive: bool = True) -> Any:
    """A time quantity in seconds, > 0 (or >= 0 with ``positive=False``), at most one day."""
    return quantity("time", positive=positive, non_negative=not positive, at_most=f"{MAX_DURATION_S:g} s")


def _ascii_word(value: Any) -> Any:
    if isinstance(value, str) and not _printable_ascii(value):
        raise bench_error(f"expected printable ASCII characters (it is sent in a command), found {format_value(value)}")
    return value


#: A code sent inside a command or compared with a reply: printable ASCII, not empty.
AsciiWord = Annotated[str, pydantic.BeforeValidator(_ascii_word), Field(min_length=1, strict=True)]


def template_with(*fields: str) -> Any:
    """A command template string holding exactly the ``{fields}`` named (none: a plain command)."""
    return Annotated[str, pydantic.BeforeValidator(_TemplateCheck(tuple(fields)))]
