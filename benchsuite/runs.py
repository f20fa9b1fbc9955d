"""Earlier runs as stored on disk: listing them, opening one, reading its traces.

Reads only what the runner writes under ``<out>/runs/<run-id>/`` (``meta.json``,
``cases/*.json``, ``table.csv``, ``traces/*.npz``), never the SQLite history,
so a run that was interrupted or killed before it was recorded is listed too.

Status of a listed run (from ``meta.json``'s ``status``):

* ``complete`` -- the run finished and closed itself;
* ``partial`` -- stopped by Ctrl-C: it closed itself with the cases that had
  finished (``benchsuite run --resume RUN_ID`` completes it);
* ``running`` -- ``meta.json`` says ``running`` and the process it names
  (host and process id) is alive on this machine;
* ``interrupted`` -- it never closed (``meta.json`` still says ``running``)
  and its process is gone: it was killed, or the machine went down. A run
  recorded on another host, or before the process was recorded, cannot be
  checked and is listed as interrupted.

Every trace is read by :func:`load_traces` (the runner's ``RunDir.load_traces``) and nowhere else.
"""

from __future__ import annotations

import fnmatch
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any


from benchsuite.errors import UserError

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "NO_TRACES",
    "RunInfo",
    "StoredRun",
    "Trace",
    "case_stem",
    "latest_run_id",
    "list_runs",
    "load_traces",
    "open_run",
    "write_traces",
]

#: said wherever a run has no traces to draw
NO_TRACES = "this run has no traces (recorded before traces existed), so it has tables but no curves"

_STATUS = {"complete": "complete", "partial": "partial", "running": "interrupted"}

from benchsuite.cases import Trace  # noqa: E402  (re-exported: the value every reader here returns)


def case_stem(case_key: str) -> str:
    """The file stem of a case inside a run folder (``cases/<stem>.json``, ``traces/<stem>.npz``)."""
    from benchsuite.results import RunDir

    return RunDir.case_stem(case_key)


def load_traces(run_path: str | Path, case_key: str) -> dict[int, Trace]:
    """Seed -> :class:`Trace` of one case; ``{}`` when the run has no traces for it (the runner's reader)."""
    from benchsuite.results import RunDir

    run_path = Path(run_path)
    return dict(RunDir(run_path, run_path.name).load_traces(case_key))


def write_traces(run_path: str | Path, case_key: str, traces: Mapping[int, Trace]) -> Path:
    """Store traces with the runner's writer (for tests and synthetic runs); returns the file."""
    from types import SimpleNamespace

    from benchsuite.results import RunDir

    run_path = Path(run_path)
    rd = RunDir(run_path, run_path.name)
    rd.save_traces(case_key, [SimpleNamespace(seed=s, trace=traces[s]) for s in sorted(traces)])
    return run_path / "traces" / f"{case_stem(case_key)}.npz"


# -- listing -------------------------------------------------------------------------------
@dataclass(frozen=True)
class RunInfo:
    """One line of the run listing."""

    run_id: str
    path: Path
    started: str
    ended: str
    status: str  # complete / partial / interrupted (see the module docstring)
    rules: tuple[str, ...]
    problems: tuple[str, ...]  # instances of the cases stored so far
    cases_done: int
    cases_planned: int | None
    failed: int  # stored cases with status error, timeout or diverged
    commit: str | None
    dirty: bool | None
    selector: str  # what was asked for: --problems or the tier

    @property
    def commit_text(self) -> str:
        if not self.commit:
            return "-"
        return self.commit[:10] + ("+dirty" if self.dirty else "")


def _runs_folder(out: str | Path) -> Path:
    return Path(out) / "runs"


def _read_json(path: Path) -> dict[str, Any] | None:
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None
    return doc if isinstance(doc, dict) else None


def _case_docs(path: Path) -> dict[str, dict[str, Any]]:
    found: dict[str, dict[str, Any]] = {}
    for file in sorted((path / "cases").glob("*.json")):
        doc = _read_json(file)
        if doc is not None and isinstance(doc.get("key"), str):
            found[doc["key"]] = doc
    return found


def _alive(process: Any) -> bool:
    """Whether the process a ``meta.json`` names runs on this machine now."""
    import os
    import platform

    if not isinstance(process, Mapping) or process.get("host") != platform.node():
        return False
    try:
        os.kill(int(process["pid"]), 0)
    except (ProcessLookupError, KeyError, TypeError, ValueError):
        return False
    except PermissionError:  # it exists, under another user
        return True
    return True


def _status(meta: Mapping[str, Any]) -> str:
    raw = str(meta.get("status"))
    if raw == "running" and _alive(meta.get("process")):
        return "running"
    return _STATUS.get(raw, raw)


def _info(path: Path, meta: dict[str, Any]) -> RunInfo:
    cases = _case_docs(path)
    req = meta.get("request") or {}
    git = meta.get("git") or {}
    selector = req.get("problems") or f"tier {req.get('tier') or 'all'}"
    planned = meta.get("n_cases")
    return RunInfo(
        run_id=path.name,
        path=path,
        started=str(meta.get("started") or "-"),
        ended=str(meta.get("ended") or "-"),
        status=_status(meta),
        rules=tuple(meta.get("rules") or req.get("rules") or ()),
        problems=tuple(sorted({k.split(" | ")[0] for k in cases})),
        cases_done=len(cases),
        cases_planned=int(planned) if isinstance(planned, int) else None,
        failed=sum(1 for d in cases.values() if d.get("status") in ("error", "timeout", "diverged")),
        commit=git.get("commit"),
        dirty=git.get("dirty"),
        selector=str(selector),
    )


def list_runs(out: str | Path = "results") -> list[RunInfo]:
    """Every run folder with a readable ``meta.json``, oldest first (by start time, then id)."""
    folder = _runs_folder(out)
    if not folder.is_dir():
        return []
    infos = []
    for path in folder.iterdir():
        meta = _read_json(path / "meta.json") if path.is_dir() else None
        if meta is not None:
            infos.append(_info(path, meta))
    return sorted(infos, key=lambda i: (i.started, i.run_id))


def latest_run_id(out: str | Path = "results") -> str:
    runs = list_runs(out)
    if not runs:
        raise UserError(f"{_runs_folder(out)}: no runs yet (run `benchsuite run` first)")
    return runs[-1].run_id


# -- one run -------------------------------------------------------------------------------
@dataclass(frozen=True)
class StoredRun:
    """A run folder read for presentation: its metadata, stored cases and table."""

    run_id: str
    path: Path
    meta: dict[str, Any]
    cases: dict[str, dict[str, Any]]  # case key -> the stored case record (runner.result_to_dict)
    frame: pd.DataFrame  # the tidy table (table.csv, or rebuilt from the cases of an unclosed run)
    info: RunInfo = field(repr=False)

    def traces(self, case_key: str) -> dict[int, Trace]:
        return load_traces(self.path, case_key)

    def has_traces(self) -> bool:
        return (self.path / "traces").is_dir() and any((self.path / "traces").glob("*.npz"))

    def failed_cases(self, pattern: str | None = None) -> list[dict[str, Any]]:
        """Stored cases with a seed that has an error message, optionally only keys matching a glob."""
        out = []
        for key, doc in sorted(self.cases.items()):
            if pattern and not (fnmatch.fnmatchcase(key, pattern) or fnmatch.fnmatchcase(key.split(" | ")[0], pattern)):
                continue
            if doc.get("status") in ("error", "timeout", "diverged") or any(
                    o.get("error") for o in doc.get("outcomes", ())):
                out.append(doc)
        return out


def open_run(out: str | Path = "results", run_id: str | None = None) -> StoredRun:
    """The run ``run_id`` (default: the latest) under ``out``; ``UserError`` when there is none."""
    import pandas as pd

    if run_id is None:
        run_id = latest_run_id(out)
    path = _runs_folder(out) / run_id
    if "/" in run_id or run_id in (".", "..") or not (path / "meta.json").is_file():
        known = [i.run_id for i in list_runs(out)][-3:]
        hint = f" (latest: {', '.join(known)})" if known else ""
        raise UserError(f"run {run_id!r}: no such run under {_runs_folder(out)}{hint}")
    meta = _read_json(path / "meta.json")
    if meta is None:
        raise UserError(f"{path / 'meta.json'}: cannot read run metadata")
    cases = _case_docs(path)
    table = path / "table.csv"
    if table.is_file():
        try:
            frame = pd.read_csv(table)
        except (OSError, ValueError, pd.errors.ParserError) as exc:
            raise UserError(f"{table}: cannot read the results table ({exc})") from None
    else:
        frame = _frame_from_cases(cases, _catalogue_targets(meta))
    return StoredRun(run_id, path, meta, cases, frame, _info(path, meta))


def _num(v: Any) -> float | None:
    if v is None:
        return None
    if isinstance(v, str):
        return float(v) if v in ("nan", "inf", "-inf") else None
    return float(v)


def _catalogue_targets(meta: Mapping[str, Any]) -> dict[str, tuple[float, ...]]:
    """Instance name -> its targets, from the catalogue the run used ({} when it cannot be read here)."""
    from benchsuite.catalogue import load_catalogue

    try:
        cat = load_catalogue(list((meta.get("request") or {}).get("catalogue") or ()) or None)
    except UserError:
        return {}
    return {name: tuple(float(t) for t in inst.targets) for name, inst in cat.items()}


def _frame_from_cases(cases: Mapping[str, Mapping[str, Any]],
                      targets: Mapping[str, Sequence[float]] | None = None) -> pd.DataFrame:
    """A table for a run that never wrote ``table.csv`` (killed): the columns the report uses.

    The key holds the instance, rule and oracle; the case record has no
    targets, so they come from the catalogue (``targets``), or from the key
    when the run overrode them; ``nan`` when neither knows.
    """
    import pandas as pd

    from benchsuite.results import TABLE_COLUMNS

    rows = []
    for key, doc in cases.items():
        parts = key.split(" | ")
        tgt: Sequence[float] = (targets or {}).get(parts[0], ())
        for p in parts:
            if p.startswith("targets="):
                tgt = [float(t) for t in p[len("targets="):].split(",")]
        for o in doc.get("outcomes", ()):
            for j, k in enumerate(o.get("iters") or ()):
                ttt = o.get("time_to_target") or ()
                rows.append({
                    "case": key, "instance": parts[0], "rule": parts[1] if len(parts) > 1 else "?",
                    "oracle": parts[2] if len(parts) > 2 else "full", "seed": o.get("seed"),
                    "target_index": j, "target": tgt[j] if j < len(tgt) else math.nan, "iterations": k,
                    "grad_calls": (o.get("grad_calls") or [None] * (j + 1))[j],
                    "time_to_target": ttt[j] if j < len(ttt) else None, "status": o.get("status"),
                    "case_status": doc.get("status"), "final_measure": _num(o.get("final_measure")),
                    "iterations_run": o.get("iterations_run"),
                })
    return pd.DataFrame(rows, columns=list(TABLE_COLUMNS))
