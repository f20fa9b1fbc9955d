"""Where runs are kept: run directories, atomic writes, the SQLite history.

A run lives in ``<out>/runs/<run-id>/`` (``<out>`` defaults to ``results``):

* ``meta.json`` -- what was run and on what (tool version, rule specs, the
  request, the user's git commit and dirty flag, Python / numpy / scipy / BLAS
  versions, CPU model, thread settings, start and end time, ``status``
  ``"running"`` / ``"partial"`` / ``"complete"``, sweep selections);
* ``cases/<hash>.json`` -- one file per finished case, written as soon as the
  case finishes, so an interrupted run keeps what it finished and
  ``--resume RUN_ID`` runs only the missing cases;
* ``traces/<hash>.npz`` -- the convergence traces of the case's seeds
  (columns ``seed``, ``iteration``, ``measure``, ``dist``, ``grad_calls``,
  ``seconds``; see :class:`benchsuite.cases.Trace`); runs recorded before
  traces existed have none, and load without curves;
* ``table.csv`` -- the tidy table (one row per case x seed x target).

Every file is written atomically: to a temporary file in the same folder,
flushed and ``fsync``-ed, then ``os.replace``-d over the target, so a killed
process leaves either the old file or the new one, never half of one.

The history ``<out>/history.sqlite`` (stdlib :mod:`sqlite3`) has two tables,
``runs`` (one row per run: id, times, status, version, git commit, meta JSON)
and ``rows`` (the tidy table, keyed by run id). A run is recorded in **one
transaction** (its old rows deleted, the new ones inserted), so a killed
process never leaves a half-recorded run; :func:`query_history` returns rows
joined with their run as a DataFrame.
"""

from __future__ import annotations

import contextlib
import fnmatch
import hashlib
import json
import math
import os
import re
import secrets
import sqlite3
import tempfile
import threading
import time
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchsuite.errors import UserError

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "TABLE_COLUMNS",
    "RunDir",
    "atomic_write_bytes",
    "atomic_write_json",
    "atomic_write_text",
    "history_path",
    "json_records",
    "json_value",
    "new_run_id",
    "parse_since",
    "query_history",
    "record_history",
]

#: columns of the tidy table (one row per case x seed x target), in order
TABLE_COLUMNS: tuple[str, ...] = (
    "case",
    "instance",
    "rule",
    "hyperparams",
    "oracle",
    "batch",
    "replace",
    "measure",
    "seed",
    "target_index",
    "target",
    "iterations",
    "held_from",
    "grad_calls",
    "epochs",
    "time_to_target",
    "time_spread",
    "time_per_step",
    "timed_on",
    "status",
    "case_status",
    "final_measure",
    "final_dist",
    "iterations_run",
    "left_at",
    "theory_bound",
    "bound_violated",
    "theory_lower",
    "below_lower",
    "unreachable",
    "budget",
    "selected",
)

_RUN_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


# -- atomic writes ------------------------------------------------------------
_UMASK_LOCK = threading.Lock()


def _umask() -> int:
    """The process's umask (read by setting and restoring it, under a lock)."""
    with _UMASK_LOCK:
        mask = os.umask(0o022)
        os.umask(mask)
    return mask


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically (temp file in the same folder + ``os.replace``).

    The file gets the permissions the umask gives a new file (``0o666 & ~umask``),
    like a file written with ``open(path, "w")``.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        # mkstemp creates the file 0600; give it the mode a plain open() would (0644 under umask 022)
        with contextlib.suppress(AttributeError, OSError):  # os.fchmod: POSIX only
            os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def atomic_write_text(path: str | Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def atomic_write_json(path: str | Path, obj: Any) -> None:
    """JSON with sorted keys and indentation (diffs well); NaN/inf are refused."""
    atomic_write_text(path, json.dumps(obj, indent=2, sort_keys=True, allow_nan=False) + "\n")


# -- run directories -----------------------------------------------------------
def new_run_id() -> str:
    """``YYYYmmdd-HHMMSS-xxxxxx`` (UTC time and 6 random hex digits)."""
    return time.strftime("%Y%m%d-%H%M%S", time.gmtime()) + "-" + secrets.token_hex(3)


class RunDir:
    """The folder of one run: ``meta.json``, ``cases/*.json``, ``table.csv``."""

    def __init__(self, path: Path, run_id: str) -> None:
        self.path = path
        self.run_id = run_id

    @classmethod
    def create(cls, out: str | Path, run_id: str | None = None) -> RunDir:
        run_id = run_id or new_run_id()
        path = Path(out) / "runs" / run_id
        path.mkdir(parents=True, exist_ok=False)
        (path / "cases").mkdir()
        return cls(path, run_id)

    @classmethod
    def open(cls, out: str | Path, run_id: str) -> RunDir:
        """An existing run (for ``--resume``); ``UserError`` when there is none."""
        if not _RUN_ID.match(run_id):
            raise UserError(f"--resume: {run_id!r} is not a run id")
        path = Path(out) / "runs" / run_id
        if not (path / "meta.json").is_file():
            raise UserError(f"--resume: no run {run_id!r} under {Path(out) / 'runs'}")
        (path / "cases").mkdir(exist_ok=True)
        return cls(path, run_id)

    @property
    def meta_path(self) -> Path:
        return self.path / "meta.json"

    @property
    def table_path(self) -> Path:
        return self.path / "table.csv"

    def read_meta(self) -> dict[str, Any]:
        try:
            return json.loads(self.meta_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise UserError(f"{self.meta_path}: cannot read run metadata ({exc})") from None

    def write_meta(self, meta: Mapping[str, Any]) -> None:
        atomic_write_json(self.meta_path, dict(meta))

    @staticmethod
    def case_stem(key: str) -> str:
        """The file stem of a case's files (``cases/<stem>.json``, ``traces/<stem>.npz``)."""
        return hashlib.sha256(key.encode()).hexdigest()[:24]

    def _case_path(self, key: str) -> Path:
        return self.path / "cases" / (self.case_stem(key) + ".json")

    def _trace_path(self, key: str) -> Path:
        return self.path / "traces" / (self.case_stem(key) + ".npz")

    def save_traces(self, key: str, outcomes: Sequence[Any]) -> None:
        """Store the seeds' traces of one case as one ``.npz`` (rows stacked, a ``seed`` column)."""
        import io

        import numpy as np

        parts = [(o.seed, o.trace) for o in outcomes if getattr(o, "trace", None) is not None]
        if not parts:
            return
        cols = {"seed": np.concatenate([np.full(len(t), s, dtype=np.int64) for s, t in parts])}
        for name in ("iteration", "measure", "dist", "grad_calls", "seconds"):
            cols[name] = np.concatenate([getattr(t, name) for _, t in parts])
        buf = io.BytesIO()
        np.savez_compressed(buf, **cols)
        atomic_write_bytes(self._trace_path(key), buf.getvalue())

    def load_traces(self, key: str) -> dict[int, Any]:
        """Seed -> :class:`~benchsuite.cases.Trace` of one case; ``{}`` for a run recorded without traces."""
        import numpy as np

        from benchsuite.cases import Trace

        path = self._trace_path(key)
        if not path.is_file():
            return {}
        try:
            with np.load(path, allow_pickle=False) as z:
                cols = {name: z[name] for name in ("seed", *Trace.COLUMNS)}
        except (OSError, ValueError, KeyError) as exc:
            raise UserError(f"{path}: cannot read traces ({exc})") from None
        out: dict[int, Any] = {}
        for seed in np.unique(cols["seed"]):
            sel = cols["seed"] == seed
            out[int(seed)] = Trace(*(cols[name][sel] for name in Trace.COLUMNS))
        return out

    def save_case(self, key: str, payload: Mapping[str, Any]) -> None:
        """Store one finished case (``payload`` must hold ``key``); replaces an earlier one."""
        atomic_write_json(self._case_path(key), {"key": key, **payload})

    def load_cases(self) -> dict[str, dict[str, Any]]:
        """Every stored case by key (files that do not parse are ignored: never half-written)."""
        found: dict[str, dict[str, Any]] = {}
        for file in sorted((self.path / "cases").glob("*.json")):
            try:
                payload = json.loads(file.read_text(encoding="utf-8"))
            except (OSError, json.JSONDecodeError):
                continue
            found[payload["key"]] = payload
        return found

    def write_table(self, frame: pd.DataFrame) -> None:
        atomic_write_text(self.table_path, frame.to_csv(index=False))


# -- history -------------------------------------------------------------------
def history_path(out: str | Path) -> Path:
    return Path(out) / "history.sqlite"


_SQL_TYPES = {
    "batch": "INTEGER",
    "seed": "INTEGER",
    "target_index": "INTEGER",
    "target": "REAL",
    "iterations": "INTEGER",
    "held_from": "INTEGER",
    "left_at": "INTEGER",
    "grad_calls": "INTEGER",
    "epochs": "REAL",
    "time_to_target": "REAL",
    "time_spread": "REAL",
    "time_per_step": "REAL",
    "final_measure": "REAL",
    "final_dist": "REAL",
    "iterations_run": "INTEGER",
    "theory_bound": "INTEGER",
    "bound_violated": "INTEGER",
    "theory_lower": "INTEGER",
    "below_lower": "INTEGER",
    "unreachable": "INTEGER",
    "replace": "INTEGER",
    "budget": "INTEGER",
    "selected": "INTEGER",
}


@contextlib.contextmanager
def _connect(db: Path) -> Iterator[sqlite3.Connection]:
    db.parent.mkdir(parents=True, exist_ok=True)
    conn = sqlite3.connect(db, timeout=30.0)
    try:
        conn.execute("PRAGMA foreign_keys = ON")
        with conn:
            conn.execute(
                "CREATE TABLE IF NOT EXISTS runs (run_id TEXT PRIMARY KEY, started TEXT, ended TEXT, "
                "status TEXT, version TEXT, git_commit TEXT, git_dirty INTEGER, meta TEXT)"
            )
            cols = ", ".join(f'"{c}" {_SQL_TYPES.get(c, "TEXT")}' for c in TABLE_COLUMNS)
            conn.execute(
                f"CREATE TABLE IF NOT EXISTS rows (run_id TEXT NOT NULL REFERENCES runs(run_id) "
                f"ON DELETE CASCADE, {cols})"
            )
            conn.execute("CREATE INDEX IF NOT EXISTS rows_run ON rows(run_id)")
            have = {row[1] for row in conn.execute("PRAGMA table_info(rows)")}
            for c in TABLE_COLUMNS:  # a history written before a column existed gains it (NULL for old rows)
                if c not in have:
                    conn.execute(f'ALTER TABLE rows ADD COLUMN "{c}" {_SQL_TYPES.get(c, "TEXT")}')
        yield conn
    finally:
        conn.close()


def _sql_value(v: Any) -> Any:
    if v is None:
        return None
    if hasattr(v, "item"):  # numpy scalar
        v = v.item()
    if isinstance(v, float) and v != v:  # NaN -> NULL
        return None
    if isinstance(v, bool):
        return int(v)
    return v


def record_history(db: str | Path, run_id: str, meta: Mapping[str, Any], rows: Sequence[Mapping[str, Any]]) -> None:
    """Record (or re-record, after a resume) one run and its rows in one transaction."""
    git = meta.get("git") or {}
    with _connect(Path(db)) as conn, conn:
        conn.execute("DELETE FROM rows WHERE run_id = ?", (run_id,))
        conn.execute(
            "INSERT OR REPLACE INTO runs VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (
                run_id,
                meta.get("started"),
                meta.get("ended"),
                meta.get("status"),
                meta.get("version"),
                git.get("commit"),
                None if git.get("dirty") is None else int(bool(git.get("dirty"))),
                json.dumps(meta, sort_keys=True, allow_nan=False),
            ),
        )
        marks = ", ".join("?" for _ in TABLE_COLUMNS)
        names = ", ".join(f'"{c}"' for c in TABLE_COLUMNS)
        conn.executemany(
            f"INSERT INTO rows (run_id, {names}) VALUES (?, {marks})",
            [(run_id, *(_sql_value(r.get(c)) for c in TABLE_COLUMNS)) for r in rows],
        )


def _glob(name: str | None, pattern: str) -> int:
    """SQL function ``glob_match(value, pattern)``: the shell-style match ``--problems`` uses."""
    return int(name is not None and fnmatch.fnmatchcase(name, pattern))


def parse_since(text: str) -> str:
    """An ISO date or date/time as the string compared with a run's ``started`` (UTC, to the second).

    ``2026-03-12`` (that whole day onwards), ``2026-03-12T14:30``,
    ``2026-03-12 14:30:05``, ``2026-03-12T14:30+01:00`` (converted to UTC; a time
    without an offset is taken as UTC, as runs record it). Anything else is a
    :class:`UserError`.
    """
    import datetime as dt

    s = str(text).strip()
    try:
        if len(s) <= 10 and "T" not in s and " " not in s:
            return dt.date.fromisoformat(s).isoformat()
        when = dt.datetime.fromisoformat(s)
    except ValueError:
        raise UserError(f"--since {text!r}: expected an ISO date or date/time, e.g. 2026-03-12 or "
                        "2026-03-12T14:30 (UTC unless an offset such as +01:00 is given)") from None
    if when.tzinfo is not None:
        when = when.astimezone(dt.timezone.utc).replace(tzinfo=None)
    return when.strftime("%Y-%m-%dT%H:%M:%S")


def _history_file(db: str | Path) -> Path:
    """The history file of a results folder, or ``db`` itself when it names a file."""
    db = Path(db)
    if db.is_file() or (not db.is_dir() and db.suffix in (".sqlite", ".sqlite3", ".db")):
        return db
    return history_path(db)


def query_history(
    db: str | Path,
    *,
    instance: str | None = None,
    rule: str | None = None,
    run_id: str | None = None,
    since: str | None = None,
    commit: str | None = None,
) -> pd.DataFrame:
    """Rows of the history joined with their run, filtered, oldest run first.

    ``db`` is the results folder (``results``) or its ``history.sqlite``.
    ``instance`` and ``rule`` are names or shell-style globs, as ``--problems``
    takes them (``*`` any characters, ``?`` one, ``[abc]`` a set; case-sensitive;
    ``%`` and ``_`` are ordinary characters); ``since`` an ISO date or date/time
    (see :func:`parse_since`) compared with the run's start; ``commit`` a prefix
    of the git commit.
    """
    import pandas as pd

    db = _history_file(db)
    since_key = parse_since(since) if since else None  # a malformed date fails before the file is looked at
    if not db.is_file():
        raise UserError(f"{db}: no history yet (run `benchsuite run` first)")
    where, args = [], []
    if instance:
        where.append("glob_match(rows.instance, ?)")
        args.append(instance)
    if rule:
        where.append("glob_match(rows.rule, ?)")
        args.append(rule)
    if run_id:
        where.append("rows.run_id = ?")
        args.append(run_id)
    if since_key:
        where.append("runs.started >= ?")
        args.append(since_key)
    if commit:
        where.append("substr(runs.git_commit, 1, ?) = ?")
        args.extend([len(commit), commit])
    sql = (
        "SELECT rows.run_id, runs.started, runs.status AS run_status, runs.git_commit, runs.git_dirty, "
        + ", ".join(f'rows."{c}"' for c in TABLE_COLUMNS)
        + " FROM rows JOIN runs USING (run_id)"
        + (" WHERE " + " AND ".join(where) if where else "")
        + " ORDER BY runs.started, rows.rowid"
    )
    with _connect(db) as conn:
        conn.create_function("glob_match", 2, _glob, deterministic=True)
        df = pd.read_sql_query(sql, conn, params=args)
    for col, kind in _SQL_TYPES.items():
        if kind == "INTEGER" and col in df:
            df[col] = df[col].astype("Int64")
    return df


# -- JSON output ------------------------------------------------------------------
def json_value(v: Any) -> Any:
    """A table cell as plain JSON: numpy scalars unwrapped, NaN / inf / NA as ``None``.

    Floats are left as Python floats, which :mod:`json` writes with ``repr``:
    the shortest text that reads back as the same float64 (no rounding).
    """
    if v is None:
        return None
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):  # numpy scalar
        v = v.item()
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, (bool, int, str)):
        return v
    try:  # pandas NA / NaT
        import pandas as pd

        if pd.isna(v):
            return None
    except (TypeError, ValueError, ImportError):
        pass
    return v


def json_records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """The rows of ``frame`` as JSON-ready dicts that keep every float64 exactly (see :func:`json_value`)."""
    cols = [str(c) for c in frame.columns]
    return [{c: json_value(v) for c, v in zip(cols, row)} for row in frame.itertuples(index=False, name=None)]
