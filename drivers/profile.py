"""Instrument profiles: TOML files that hold what differs between instruments of one kind.

A profile is named by the bench file either as a built-in name (``scpi-analyzer`` reads
``drivers/profiles/scpi-analyzer.toml`` from the installed package) or as a path to a TOML file.
"""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

from bench.errors import ConfigError

__all__ = ["load_profile_data", "builtin_profiles"]


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


def load_profile_source(name_or_path: str | Path, *, base_dir: Path | None = None):
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
    from bench.tomlsource import read_toml

    text_name = str(name_or_path)
    if not text_name.endswith(".toml") and "/" not in text_name and "\\" not in text_name:
        entry = resources.files("bench.drivers") / "profiles" / f"{text_name}.toml"
        if not entry.is_file():
            known = ", ".join(builtin_profiles())
            raise ConfigError(f"unknown instrument profile {text_name!r} (built-in: {known}; or give a path to a .toml)")
        import dataclasses

        with resources.as_file(entry) as path:
            source = read_toml(path)
        return dataclasses.replace(source, file=f"builtin:{text_name}")
    path = Path(text_name)
    if not path.is_absolute() and base_dir is not None:
        path = base_dir / path
    if not path.is_file():
        raise ConfigError(f"profile file not found: {path}")
    return read_toml(path)


def load_profile_data(name_or_path: str | Path, *, base_dir: Path | None = None) -> tuple[dict, str]:
    """Read a profile's TOML: (parsed data, origin: the path or ``builtin:<name>``)."""
    source = load_profile_source(name_or_path, base_dir=base_dir)
    return source.data, source.file
