"""Tests of benchsuite.results: atomic writes, run directories, the SQLite history."""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pandas as pd
import pytest

from benchsuite.errors import UserError
from benchsuite.results import (
    TABLE_COLUMNS,
    RunDir,
    atomic_write_bytes,
    atomic_write_json,
    atomic_write_text,
    json_records,
    parse_since,
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
    assert len(query_history(db, rule="ad*")) == 1
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


@pytest.mark.parametrize("umask, mode", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_atomic_write_honours_the_umask(tmp_path: Path, umask: int, mode: int) -> None:
    old = os.umask(umask)
    try:
        atomic_write_bytes(tmp_path / "a.bin", b"x")
        atomic_write_json(tmp_path / "b.json", {"v": 1})
        reference = tmp_path / "plain.txt"
        reference.write_text("x")  # what open() gives under this umask
    finally:
        os.umask(old)
    for name in ("a.bin", "b.json"):
        got = stat.S_IMODE((tmp_path / name).stat().st_mode)
        assert got == mode == stat.S_IMODE(reference.stat().st_mode), (name, oct(got))


def test_json_records_round_trip_float64() -> None:
    tiny = [7.154e-09, 4e-11, 1e-300, 0.1 + 0.2, 123456789.12345678, 5e-324]
    frame = pd.DataFrame({"x": tiny, "k": pd.array([1, None, 3, 4, 5, 6], dtype="Int64"),
                          "nan": [float("nan"), float("inf"), 1.0, 2.0, 3.0, 4.0]})
    back = json.loads(json.dumps(json_records(frame), allow_nan=False))
    assert [r["x"] for r in back] == tiny  # exact equality: repr round-trips a float64
    assert [r["k"] for r in back] == [1, None, 3, 4, 5, 6]
    assert back[0]["nan"] is None and back[1]["nan"] is None  # JSON has no NaN / inf


def _db_with_names(tmp_path: Path) -> Path:
    db = tmp_path / "history.sqlite"
    rules = ["adam", "adam_x", "adamw", "adaxm", "gd", "a%b", "Adam"]
    rows = [{**{c: None for c in TABLE_COLUMNS}, "instance": f"inst_{j}", "rule": r, "bound_violated": None}
            for j, r in enumerate(rules)]
    record_history(db, "r1", {"started": "2026-03-12T10:00:00Z", "status": "complete", "git": {}}, rows)
    return db


@pytest.mark.parametrize("pattern, expected", [
    ("adam*", {"adam", "adam_x", "adamw"}),   # shell-style *, case-sensitive like --problems
    ("adam?", {"adamw"}),
    ("ada?m", {"adaxm"}),
    ("adam_x", {"adam_x"}),                 # _ is an ordinary character, not a one-character wildcard
    ("adam_", set()),
    ("a%b", {"a%b"}),                       # % is an ordinary character
    ("a%", set()),
    ("[ag]d*", {"gd", "adam", "adam_x", "adamw", "adaxm"}),
    ("gd", {"gd"}),
    ("'; DROP TABLE rows; --", set()),      # a parameter, never SQL text
])
def test_history_rule_globs_are_shell_style(tmp_path: Path, pattern: str, expected: set[str]) -> None:
    db = _db_with_names(tmp_path)
    assert set(query_history(db, rule=pattern).rule) == expected
    assert len(query_history(db)) == 7  # the table is still there


def test_history_instance_glob_and_results_folder(tmp_path: Path) -> None:
    _db_with_names(tmp_path)
    assert set(query_history(tmp_path, instance="inst_[01]").rule) == {"adam", "adam_x"}  # the folder works too
    assert len(query_history(str(tmp_path))) == 7
    with pytest.raises(UserError, match="no history yet"):
        query_history(tmp_path / "elsewhere")


@pytest.mark.parametrize("text, key", [
    ("2026-03-12", "2026-03-12"),
    ("2026-03-12T14:30", "2026-03-12T14:30:00"),
    ("2026-03-12 14:30:05", "2026-03-12T14:30:05"),
    ("2026-03-12T14:30:05Z", "2026-03-12T14:30:05"),
    ("2026-03-12T14:30+01:00", "2026-03-12T13:30:00"),  # converted to UTC, as runs record their start
])
def test_parse_since_accepts_iso(text: str, key: str) -> None:
    assert parse_since(text) == key


@pytest.mark.parametrize("text", ["yesterday", "12/03/2026", "2026-13-01", "2026-03-12T25:00", "", "last week"])
def test_parse_since_refuses_anything_else(text: str) -> None:
    with pytest.raises(UserError, match="--since"):
        parse_since(text)


def test_since_filters_by_utc_start(tmp_path: Path) -> None:
    db = tmp_path / "history.sqlite"
    for i, started in enumerate(["2026-03-11T23:59:59Z", "2026-03-12T00:00:00Z", "2026-03-12T14:30:00Z"]):
        record_history(db, f"r{i}", {"started": started, "status": "complete", "git": {}}, _rows(1, "gd"))
    assert list(query_history(db, since="2026-03-12").run_id) == ["r1", "r2"]
    assert list(query_history(db, since="2026-03-12T14:30").run_id) == ["r2"]
    assert list(query_history(db, since="2026-03-12T15:30+01:00").run_id) == ["r2"]
    assert list(query_history(db, since="2026-03-12T14:30:01").run_id) == []
