"""A session: one sequence on one bench, with everything loaded once and passed down.

The sequence and bench files, the instrument profiles, the plan and (on the simulated bench)
the running simulator, plus the limit lines the run compares with, loaded on first use and kept.
Built by the use cases (:mod:`bench.app`) before anything is written or moved.
"""

from __future__ import annotations

from pathlib import Path

from bench.instruments import capabilities, profiles_for
from bench.planner import make_plan
from bench.preflight import Checks, preflight, resolve_limit
from bench.provenance import builtin_digest, digest
from bench.steps import kind_of

__all__ = ["Session", "build_plan"]


def build_plan(sequence, bench, profiles: dict, *, sequence_dir: Path | None = None):
    """Check a sequence against a bench and expand it into actions (no I/O).

    Besides the planner's own checks (stage travel, mast and turntable limits, probes), every
    problem that would otherwise stop a run half-way is caught here, before anything moves:
    sweep settings the analyzer cannot do, limit lines that cannot be loaded, transducer tables
    that do not cover a sweep, an ambient capture with no way to switch the board off.
    """
    plan = make_plan(sequence, capabilities(bench, profiles))
    preflight(Checks(plan, sequence, bench, profiles, sequence_dir))
    return plan


class Session:
    """A loaded sequence and bench, their profiles, a plan and (with ``--sim``) the simulator.

    Parameters
    ----------
    sequence : bench.sequence.Sequence
    sequence_path : Path
    bench : bench.benchfile.Bench
    bench_path : Path
    sim : bench.simbench.SimulatedBench or None
    profiles : dict, optional
        Profiles by role; loaded from the bench file when not given.
    sim_settings : dict, optional
        On the simulated bench: ``board`` (path, or ``"demo"``), ``seed``, ``realtime``.
    """

    def __init__(self, sequence, sequence_path: Path, bench, bench_path: Path, sim=None,
                 profiles: dict | None = None, sim_settings: dict | None = None) -> None:
        self.sequence = sequence
        self.sequence_path = Path(sequence_path)
        self.bench = bench
        self.bench_path = Path(bench_path)
        self.sim = sim
        self.profiles = profiles if profiles is not None else profiles_for(bench)
        self.sim_settings = sim_settings
        self.accepted_changes: list[str] = []
        self.resumed = 0
        self.plan = None
        self._limits: dict[str, object] = {}

    @property
    def sequence_dir(self) -> Path:
        """Folder of the sequence file (limit files are found relative to it)."""
        return self.sequence_path.parent

    def make_plan(self):
        """Plan the sequence on the bench and run the pre-run checks; keeps and returns the plan."""
        self.plan = build_plan(self.sequence, self.bench, self.profiles, sequence_dir=self.sequence_dir)
        return self.plan

    def limit(self, name: str):
        """The limit set ``name`` (built-in, or a file relative to the sequence), loaded once."""
        from bench.analysis.limits import load_limit

        resolved = resolve_limit(name, self.sequence_dir)
        if resolved not in self._limits:
            self._limits[resolved] = load_limit(resolved)
        return self._limits[resolved]

    def used_files(self) -> dict[str, str]:
        """SHA-256 of every file the session reads, by path (or ``builtin:<name>``).

        The sequence and bench files, the limit files, the transducer tables, the instrument
        profiles and, on the simulated bench, the board file.
        """
        files = {str(self.sequence_path.resolve()): digest(self.sequence_path),
                 str(self.bench_path.resolve()): digest(self.bench_path)}
        for step in self.sequence.steps:
            kind = kind_of(step)
            for _, path in kind.chain(self.bench, step)[0]:
                files[str(Path(path).resolve())] = digest(path)
            limit = kind.limit_name(self.sequence, step)
            if limit is not None:
                files.update(_limit_file(resolve_limit(limit, self.sequence_dir)))
        for profile in self.profiles.values():
            files.update(_profile_file(profile))
        board = (self.sim_settings or {}).get("board")
        if board and board != "demo":
            files[str(Path(board).resolve())] = digest(board)
        return files


def _limit_file(resolved: str) -> dict[str, str]:
    if resolved.endswith(".toml") or "/" in resolved or "\\" in resolved:
        return {resolved: digest(resolved)}
    return {f"builtin:limits/{resolved}": builtin_digest("bench", "data", "limits", f"{resolved}.toml")}


def _profile_file(profile) -> dict[str, str]:
    origin = str(getattr(profile, "origin", None) or getattr(profile, "name", ""))
    if not origin:
        return {}
    if origin.startswith("builtin:"):
        name = origin.split(":", 1)[1]
        return {f"builtin:profiles/{name}": builtin_digest("bench.drivers", "profiles", f"{name}.toml")}
    return {str(Path(origin).resolve()): digest(origin)}
