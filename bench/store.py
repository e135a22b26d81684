"""Run storage: one folder per run, a TOML manifest and an SQLite (WAL) database.

Layout of a run folder::

    <runs>/<YYYYmmdd-HHMMSS>-<sequence name>/
        manifest.toml     sequence and bench as run, instruments, plan, state (atomic rewrite)
        data.sqlite       traces (one float32 little-endian BLOB per trace), results, events
        run.log           log lines of the run
        plots/            PNGs written after each step

Each trace is committed as soon as it is measured (``PRAGMA synchronous=NORMAL`` in WAL mode is
durable against a killed process), and the action it completes is marked done in the same
transaction, so a killed run loses at most the action in flight and resumes exactly there.

Stored levels are what the analyzer read at its input, in dBuV (50 ohm); transducer corrections
are applied on the way out (analysis), with the chain that produced them named in the result.
"""

from __future__ import annotations

import copy
import os
import sqlite3
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import tomli_w

from bench.errors import ConfigError, StoreError

__all__ = ["RunStore", "TraceMeta", "open_run", "create_run", "write_manifest_atomic"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS traces (
    id INTEGER PRIMARY KEY,
    action_index INTEGER NOT NULL,
    step_label TEXT NOT NULL,
    step_kind TEXT NOT NULL,
    segment INTEGER NOT NULL,
    start_hz REAL NOT NULL,
    stop_hz REAL NOT NULL,
    points INTEGER NOT NULL,
    rbw_hz REAL NOT NULL,
    vbw_hz REAL NOT NULL,
    detector TEXT NOT NULL,
    trace_mode TEXT NOT NULL,
    sweeps INTEGER NOT NULL,
    unit TEXT NOT NULL,
    board_powered INTEGER NOT NULL,
    x_m REAL, y_m REAL, z_m REAL, rotation_deg REAL, probe TEXT,
    height_m REAL, polarization TEXT, azimuth_deg REAL,
    t_wall REAL NOT NULL,
    data BLOB NOT NULL
);
CREATE INDEX IF NOT EXISTS traces_step ON traces(step_label, segment);
CREATE INDEX IF NOT EXISTS traces_action ON traces(action_index);
CREATE TABLE IF NOT EXISTS actions_done (
    action_index INTEGER PRIMARY KEY,
    t_wall REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS results (
    id INTEGER PRIMARY KEY,
    step_label TEXT NOT NULL,
    freq_hz REAL NOT NULL,
    level REAL,
    unit TEXT NOT NULL,
    detector TEXT NOT NULL,
    limit_level REAL,
    margin_db REAL,
    status TEXT NOT NULL,
    polarization TEXT, height_m REAL, azimuth_deg REAL,
    chain TEXT,
    note TEXT
);
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY,
    t_wall REAL NOT NULL,
    level TEXT NOT NULL,
    text TEXT NOT NULL
);
"""

_META_COLUMNS = ("id", "action_index", "step_label", "step_kind", "segment", "start_hz", "stop_hz",
                 "points", "rbw_hz", "vbw_hz", "detector", "trace_mode", "sweeps", "unit",
                 "board_powered", "x_m", "y_m", "z_m", "rotation_deg", "probe", "height_m",
                 "polarization", "azimuth_deg", "t_wall")


@dataclass(frozen=True)
class TraceMeta:
    """Everything stored beside a trace's values (SI units; unit names the level reference)."""

    action_index: int
    step_label: str
    step_kind: str
    segment: int
    start_hz: float
    stop_hz: float
    points: int
    rbw_hz: float
    vbw_hz: float
    detector: str
    trace_mode: str
    sweeps: int
    unit: str = "dbuv"
    board_powered: bool = True
    x_m: float | None = None
    y_m: float | None = None
    z_m: float | None = None
    rotation_deg: float | None = None
    probe: str | None = None
    height_m: float | None = None
    polarization: str | None = None
    azimuth_deg: float | None = None


def write_manifest_atomic(path: Path, data: dict) -> None:
    """Write TOML through a temporary file and ``os.replace``: never a half-written manifest.

    Raises
    ------
    StoreError
        The folder cannot be written (full disk, read-only); no temporary file is left.
    """
    tmp = path.with_suffix(".toml.tmp")
    try:
        with open(tmp, "wb") as fh:
            tomli_w.dump(_drop_none(data), fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True) if tmp.parent.is_dir() else None
        raise StoreError(f"{path}: cannot write the manifest: {exc.strerror or exc}") from None


#: Columns of a result row as stored (the table's own id aside).
_RESULT_COLUMNS = ("step_label", "freq_hz", "level", "unit", "detector", "limit_level", "margin_db",
                   "status", "polarization", "height_m", "azimuth_deg", "chain", "note")


def _drop_none(value):
    """tomli-w cannot write None: omit such keys (pitfalls: TOML)."""
    if isinstance(value, dict):
        return {k: _drop_none(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple)):
        return [_drop_none(v) for v in value if v is not None]
    return value


def _py(value):
    """sqlite3 stores numpy scalars as BLOBs silently: convert (pitfalls: Storage)."""
    if isinstance(value, np.generic):
        return value.item()
    return value


class RunStore:
    """An open run folder.

    Use :func:`create_run` for a new run and :func:`open_run` for an existing one.
    """

    def __init__(self, folder: Path, *, readonly: bool = False) -> None:
        self.folder = Path(folder)
        self.readonly = readonly
        self._manifest_cache: tuple[int, dict] | None = None
        db = self.folder / "data.sqlite"
        if not _is_file(self.folder / "manifest.toml"):
            # a path the user typed: a mistake in the command line, not a storage failure
            raise ConfigError(f"{self.folder}: not a run folder (no manifest.toml)")
        try:
            if readonly:
                self._db = sqlite3.connect(f"file:{db}?mode=ro", uri=True, check_same_thread=False)
                try:
                    _check_tables(self._db)
                except sqlite3.Error:
                    self._db.close()
                    raise
            else:
                self._db = sqlite3.connect(db, check_same_thread=False)
                self._db.execute("PRAGMA journal_mode=WAL")
                self._db.execute("PRAGMA synchronous=NORMAL")
                self._db.executescript(_SCHEMA)
        except sqlite3.Error as exc:
            raise StoreError(f"{db}: cannot open the run database: {exc}") from exc

    # ------------------------------------------------------------------ manifest
    @property
    def manifest_path(self) -> Path:
        return self.folder / "manifest.toml"

    def manifest(self) -> dict:
        """The parsed manifest (re-read only when the file changed on disk)."""
        try:
            stamp = self.manifest_path.stat().st_mtime_ns
            if self._manifest_cache is None or self._manifest_cache[0] != stamp:
                data = tomllib.loads(self.manifest_path.read_text(encoding="utf-8"))
                self._manifest_cache = (stamp, data)
        except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
            raise StoreError(f"{self.manifest_path}: unreadable manifest: {exc}") from None
        return copy.deepcopy(self._manifest_cache[1])

    def update_manifest(self, **changes) -> dict:
        data = self.manifest()
        data.update(changes)
        write_manifest_atomic(self.manifest_path, data)
        self._manifest_cache = None
        return data

    # ------------------------------------------------------------------ writing
    def add_trace(self, meta: TraceMeta, levels, *, completes_action: bool = False) -> int:
        """Store one trace (float32 LE BLOB); commit now. Optionally mark its action done."""
        arr = np.ascontiguousarray(levels, dtype="<f4")
        if arr.ndim != 1 or arr.size != meta.points:
            raise StoreError(f"trace of shape {arr.shape} does not match {meta.points} points")
        values = [_py(getattr(meta, c)) for c in _META_COLUMNS[1:-1]]
        values[_META_COLUMNS.index("board_powered") - 1] = int(meta.board_powered)
        now = time.time()
        try:
            with self._db:  # one transaction: the trace and (maybe) its action's completion
                cur = self._db.execute(
                    f"INSERT INTO traces ({', '.join(_META_COLUMNS[1:])}, data) "
                    f"VALUES ({', '.join('?' * (len(_META_COLUMNS) - 1))}, ?)",
                    (*values, now, arr.tobytes()),
                )
                if completes_action:
                    self._db.execute("INSERT OR REPLACE INTO actions_done VALUES (?, ?)",
                                     (int(meta.action_index), now))
        except sqlite3.Error as exc:
            raise StoreError(f"{self.folder}: cannot store trace: {exc}") from exc
        return int(cur.lastrowid)

    def _write(self, what: str, sql: str, params=()) -> sqlite3.Cursor:
        """One statement in its own transaction; a storage failure is one StoreError line."""
        try:
            with self._db:
                return self._db.execute(sql, params)
        except sqlite3.Error as exc:
            raise StoreError(f"{self.folder}: cannot {what}: {exc}") from None

    def mark_done(self, action_index: int) -> None:
        self._write("mark an action done", "INSERT OR REPLACE INTO actions_done VALUES (?, ?)",
                    (int(action_index), time.time()))

    def discard_partial(self, action_index: int) -> int:
        """Delete traces of an action that did not finish (resume redoes it whole)."""
        cur = self._write("discard a partial action", "DELETE FROM traces WHERE action_index = ? AND "
                          "action_index NOT IN (SELECT action_index FROM actions_done)", (int(action_index),))
        return cur.rowcount

    def add_results(self, rows: list[dict]) -> None:
        cols = _RESULT_COLUMNS
        with self._db:
            self._db.executemany(
                f"INSERT INTO results ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                [tuple(_py(r.get(c)) for c in cols) for r in rows],
            )

    def replace_results(self, step_label: str, rows: list[dict], *, done_action: int | None = None) -> None:
        """Replace a step's results; with ``done_action``, mark that action done in the same
        transaction, so a killed run has either both or neither."""
        cols = _RESULT_COLUMNS
        try:
            with self._db:
                self._db.execute("DELETE FROM results WHERE step_label = ?", (step_label,))
                self._db.executemany(
                    f"INSERT INTO results ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})",
                    [tuple(_py(r.get(c)) for c in cols) for r in rows])
                if done_action is not None:
                    self._db.execute("INSERT OR REPLACE INTO actions_done VALUES (?, ?)",
                                     (int(done_action), time.time()))
        except sqlite3.Error as exc:
            raise StoreError(f"{self.folder}: cannot store the results of {step_label!r}: {exc}") from exc

    def clear_results(self, step_label: str) -> None:
        self._write("clear results", "DELETE FROM results WHERE step_label = ?", (step_label,))

    def log_event(self, level: str, text: str) -> None:
        self._write("record an event", "INSERT INTO events (t_wall, level, text) VALUES (?, ?, ?)",
                    (time.time(), level, text))

    def checkpoint(self) -> None:
        """Fold the WAL back into the database at the end of a run (pitfalls: Storage).

        The finished database is left as one file (rollback journal mode), so a run folder can
        be copied or opened read-only anywhere; a resume switches it back to WAL.
        """
        try:
            self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            self._db.execute("PRAGMA journal_mode=DELETE")
        except sqlite3.Error:
            pass

    def lock(self) -> None:
        """Hold an exclusive lock on the run folder until :meth:`close` (one writer at a time).

        Raises
        ------
        StoreError
            Another process (a ``bench run`` or ``bench resume``) is writing this run.
        """
        import fcntl

        try:
            fh = open(self.folder / "run.lock", "a+", encoding="utf-8")
        except OSError as exc:
            raise StoreError(f"{self.folder}: cannot write in the run folder: {exc.strerror or exc}") from None
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            fh.close()
            raise StoreError(f"{self.folder}: the run is in use by another bench process; "
                             "wait for it to finish or stop it first") from None
        fh.seek(0)
        fh.truncate()
        fh.write(f"{os.getpid()}\n")
        fh.flush()
        self._lock_file = fh

    def close(self) -> None:
        self._db.close()
        lock = getattr(self, "_lock_file", None)
        if lock is not None:
            # a finished or stopped run leaves no lock file behind; unlinking before the flock is
            # released means no other process can take a lock on a file about to vanish
            (self.folder / "run.lock").unlink(missing_ok=True)
            lock.close()  # releases the flock
            self._lock_file = None

    # ------------------------------------------------------------------ reading
    def done_actions(self) -> set[int]:
        try:
            return {r[0] for r in self._db.execute("SELECT action_index FROM actions_done")}
        except sqlite3.Error as exc:
            raise StoreError(f"{self.folder / 'data.sqlite'}: cannot read the run database: {exc}") from None

    def traces(self, step_label: str | None = None) -> pd.DataFrame:
        """Metadata of stored traces (no values), one row per trace."""
        sql = f"SELECT {', '.join(_META_COLUMNS)} FROM traces"
        args: tuple = ()
        if step_label is not None:
            sql += " WHERE step_label = ?"
            args = (step_label,)
        return self._frame(sql + " ORDER BY id", args)

    def _frame(self, sql: str, params: tuple = ()) -> pd.DataFrame:
        """A query's rows as a frame; a damaged database is one StoreError line."""
        try:
            return pd.read_sql_query(sql, self._db, params=params)
        except (sqlite3.Error, pd.errors.DatabaseError) as exc:
            raise StoreError(f"{self.folder / 'data.sqlite'}: cannot read the run database: "
                             f"{getattr(exc, '__cause__', None) or exc}") from None

    def trace(self, trace_id: int) -> tuple[np.ndarray, np.ndarray]:
        """(freq_hz, level) of one trace; level in the trace's ``unit``."""
        try:
            row = self._db.execute("SELECT start_hz, stop_hz, points, data FROM traces WHERE id = ?",
                                   (int(trace_id),)).fetchone()
        except sqlite3.Error as exc:
            raise StoreError(f"{self.folder / 'data.sqlite'}: cannot read trace {trace_id}: {exc}") from None
        if row is None:
            raise StoreError(f"{self.folder}: no trace {trace_id}")
        start, stop, points, blob = row
        levels = np.frombuffer(blob, dtype="<f4")
        if levels.size != points:
            raise StoreError(f"{self.folder}: trace {trace_id} holds {levels.size} values, expected {points}")
        return np.linspace(start, stop, points), levels.astype(float)

    def step_spectrum(self, step_label: str, reduce: str = "max") -> tuple[np.ndarray, np.ndarray]:
        """All segments of a step joined, reduced over poses (max or mean) point by point.

        Traces of one step share their segment axes (the planner guarantees it).
        """
        meta = self.traces(step_label)
        if meta.empty:
            raise StoreError(f"{self.folder}: step {step_label!r} has no traces")
        freqs, levels = [], []
        for seg, group in meta.groupby("segment", sort=True):
            stack = np.vstack([self.trace(i)[1] for i in group["id"]])
            freqs.append(self.trace(int(group["id"].iloc[0]))[0])
            levels.append(stack.max(axis=0) if reduce == "max" else stack.mean(axis=0))
        return np.concatenate(freqs), np.concatenate(levels)

    def results(self, step_label: str | None = None) -> pd.DataFrame:
        sql = "SELECT * FROM results"
        args: tuple = ()
        if step_label is not None:
            sql += " WHERE step_label = ?"
            args = (step_label,)
        return self._frame(sql + " ORDER BY id", args)

    def events(self) -> pd.DataFrame:
        return self._frame("SELECT * FROM events ORDER BY id")

    def export_csv(self, out_dir: Path) -> list[Path]:
        """Write ``traces.csv`` (metadata), one long ``spectra-<step>.csv`` per step, ``results.csv``."""
        out_dir = Path(out_dir)
        meta = self.traces()  # a damaged database fails here, before anything is written
        if out_dir.exists() and not out_dir.is_dir():
            raise ConfigError(f"{out_dir}: expected a folder for the export, found a file")
        try:
            out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{out_dir}: cannot create the export folder: {exc.strerror or exc}") from None
        written = []
        path = out_dir / "traces.csv"
        meta.to_csv(path, index=False)
        written.append(path)
        for label, group in meta.groupby("step_label", sort=False):
            path = out_dir / f"spectra-{_file_label(label)}.csv"
            with open(path, "w", encoding="utf-8") as fh:
                fh.write("trace_id,freq_hz,level\n")
                for tid, unit in zip(group["id"], group["unit"]):
                    f, v = self.trace(int(tid))
                    np.savetxt(fh, np.column_stack([np.full(f.size, tid), f, v]),
                               fmt=["%d", "%.1f", "%.3f"], delimiter=",")
            written.append(path)
        res = self.results()
        if not res.empty:
            path = out_dir / "results.csv"
            res.to_csv(path, index=False)
            written.append(path)
        return written


def _file_label(label: str) -> str:
    """A step label safe as part of a file name (a hand-edited manifest may hold anything)."""
    import re

    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(label)).strip("._") or "step"


def _is_file(path: Path) -> bool:
    """``Path.is_file`` that says False for a path the system cannot look up (too long, ...)."""
    try:
        return path.is_file()
    except (OSError, ValueError):
        return False


def _check_tables(db: sqlite3.Connection) -> None:
    """Raise ``sqlite3.Error`` unless ``db`` is a run database (garbage, empty, truncated)."""
    found = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    missing = sorted({"traces", "actions_done", "results", "events"} - found)
    if missing:
        raise sqlite3.DatabaseError(f"not a run database (no table {', '.join(missing)})")
    db.execute("SELECT id FROM traces LIMIT 1").fetchone()


def create_run(root: Path, name: str, manifest: dict) -> RunStore:
    """Create a new run folder with its manifest and an empty database."""
    root = Path(root)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    folder = root / f"{stamp}-{name}"
    n = 1
    while folder.exists():
        n += 1
        folder = root / f"{stamp}-{name}-{n}"
    try:
        folder.mkdir(parents=True)
        (folder / "plots").mkdir()
    except OSError as exc:
        raise StoreError(f"cannot create run folder {folder}: {exc}") from exc
    write_manifest_atomic(folder / "manifest.toml", manifest)
    db = sqlite3.connect(folder / "data.sqlite")
    db.execute("PRAGMA page_size=16384")  # before the first table: large BLOBs (pitfalls: Storage)
    db.execute("PRAGMA journal_mode=WAL")
    db.close()
    return RunStore(folder)


def open_run(folder: str | Path, *, readonly: bool = True) -> RunStore:
    """Open an existing run folder (read-only by default) for analysis or export."""
    return RunStore(Path(folder), readonly=readonly)
