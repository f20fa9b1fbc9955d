"""Tests of benchsuite.results: atomic writes, run directories, the SQLite history."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd
import pytest

from benchsuite.errors import UserError
from benchsuite.results import (
    TABLE_COLUMNS,
    RunDir,
    atomic_write_json,
    atomic_write_text,
    query_history,
    record_history,
)


def test_atomic_write_failure_leaves_old_file_and_no_temporaries(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    target = tmp_path / "a.json"
    atomic_write_json(target, {"v": 1})

    def broken_replace(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError):
        atomic_write_json(target, {"v": 2})
    monkeypatch.undo()
    assert target.read_text() == '{\n  "v": 1\n}\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.json"]


def test_atomic_write_refuses_nan_without_touching_the_file(tmp_path: Path) -> None:
    target = tmp_path / "m.json"
    atomic_write_text(target, "old")
    with pytest.raises(ValueError):
        atomic_write_json(target, {"x": float("nan")})
    assert target.read_text() == "old"


def test_run_dir_cases_round_trip_and_resume(tmp_path: Path) -> None:
    rd = RunDir.create(tmp_path, "r1")
    rd.write_meta({"status": "running"})
    rd.save_case("inst|gd", {"status": "reached", "n": 1})
    rd.save_case("inst|adam", {"status": "budget"})
    rd.save_case("inst|gd", {"status": "reached", "n": 2})  # replaced, not duplicated
    (rd.path / "cases" / "junk.json").write_text("{half")  # a torn file is ignored
    again = RunDir.open(tmp_path, "r1")
    cases = again.load_cases()
    assert set(cases) == {"inst|gd", "inst|adam"} and cases["inst|gd"]["n"] == 2
    assert again.read_meta() == {"status": "running"}
    with pytest.raises(UserError, match="no run"):
        RunDir.open(tmp_path, "r2")
    with pytest.raises(UserError, match="not a run id"):
        RunDir.open(tmp_path, "../etc")


def _rows(n: int, rule: str) -> list[dict]:
    base = {c: None for c in TABLE_COLUMNS}
    return [{**base, "instance": f"i{j}", "rule": rule, "target": 10.0**-j, "iterations": j, "bound_violated": False}
            for j in range(n)]


def test_history_records_one_run_per_transaction_and_queries(tmp_path: Path) -> None:
    db = tmp_path / "history.sqlite"
    record_history(db, "r1", {"started": "2026-01-01T00:00:00", "status": "partial", "git": {"commit": "abc", "dirty": True}},
                   _rows(2, "gd"))
    # re-recording the same run (after a resume) replaces its rows
    record_history(db, "r1", {"started": "2026-01-01T00:00:00", "status": "complete", "git": {"commit": "abc", "dirty": True}},
                   _rows(3, "gd"))
    record_history(db, "r2", {"started": "2026-01-02T00:00:00", "status": "complete", "git": {}}, _rows(1, "adam"))
    df = query_history(db)
    assert isinstance(df, pd.DataFrame) and len(df) == 4
    assert list(df.run_id) == ["r1", "r1", "r1", "r2"]
    assert set(df[df.run_id == "r1"].run_status) == {"complete"}
    assert len(query_history(db, rule="ad%")) == 1
    assert len(query_history(db, since="2026-01-02")) == 1
    assert len(query_history(db, commit="ab")) == 3
    # a failing insert rolls the whole run back: no half-recorded run
    bad = _rows(2, "gd")
    bad[1]["iterations"] = object()  # sqlite cannot bind this
    with pytest.raises(Exception):
        record_history(db, "r3", {"started": "2026-01-03"}, bad)
    assert "r3" not in set(query_history(db).run_id)
    with pytest.raises(UserError, match="no history"):
        query_history(tmp_path / "none.sqlite")
