"""Which files a session reads, and their SHA-256, so a resumed run can refuse changed inputs.

A run's results depend on more than its sequence and bench files: the limit lines it compares
with, the transducer tables that correct its readings, the instrument profiles, and on the
simulated bench the board file. Each is recorded by a name a person recognises (a path, or
``builtin:<name>`` for a file shipped with the package) with the SHA-256 of its bytes.
"""

from __future__ import annotations

import hashlib
from importlib import resources
from pathlib import Path

__all__ = ["digest", "builtin_digest", "changed_files"]


def digest(path: str | Path) -> str:
    """SHA-256 (hex) of a file's bytes; ``"missing"`` when it cannot be read."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return "missing"


def builtin_digest(package: str, *parts: str) -> str:
    """SHA-256 (hex) of a file shipped inside the installed package."""
    try:
        return hashlib.sha256(resources.files(package).joinpath(*parts).read_bytes()).hexdigest()
    except (OSError, ModuleNotFoundError):
        return "missing"


def changed_files(recorded: dict[str, str], current: dict[str, str]) -> list[str]:
    """Names whose checksum differs (or that appear or vanish), sorted, each with what changed."""
    out = []
    for name in sorted(set(recorded) | set(current)):
        before, now = recorded.get(name), current.get(name)
        if before == now:
            continue
        if before is None:
            out.append(f"{name} (not used before)")
        elif now is None:
            out.append(f"{name} (no longer used)")
        elif now == "missing":
            out.append(f"{name} (missing)")
        else:
            out.append(f"{name} (changed)")
    return out
