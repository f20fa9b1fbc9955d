"""Stored runs: listing (also interrupted runs), opening one, the traces file layout, `benchsuite runs`."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from benchsuite.catalogue import load_catalogue
from benchsuite.cli import main
from benchsuite.errors import UserError
from benchsuite.runs import Trace, case_stem, list_runs, load_traces, open_run, write_traces

import runfolders  # tests/ is on sys.path: pytest prepends the folder of each test module


@pytest.fixture(scope="module")
def results(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("results")
    run_id = runfolders.real_run(out)
    runfolders.interrupted_copy(out, run_id, "zz-killed", drop=2, status="running")
    runfolders.interrupted_copy(out, run_id, "zz-ctrl-c", drop=1, status="partial")
    return out, run_id


def test_listing_includes_interrupted_runs(results: tuple[Path, str]) -> None:
    out, run_id = results
    runs = {r.run_id: r for r in list_runs(out)}
    assert set(runs) == {run_id, "zz-killed", "zz-ctrl-c"}
    full = runs[run_id]
    n = 2 * len(runfolders.RULES)  # two problems x three rules
    assert (full.status, full.cases_done, full.cases_planned) == ("complete", n, n)
    assert full.problems == ("quad-diag-kappa10-d10", "quad-diag-kappa100-d50")
    assert set(full.rules) == {"gd", "nesterov", "faulty_rules:Raiser"}
    assert full.failed == 2  # the planted raiser on both problems
    assert runs["zz-killed"].status == "interrupted" and runs["zz-killed"].cases_done == n - 2
    assert runs["zz-ctrl-c"].status == "partial" and runs["zz-ctrl-c"].cases_done == n - 1
    assert list_runs(out / "nowhere") == []


def test_open_latest_and_rebuild_table_of_killed_run(results: tuple[Path, str]) -> None:
    out, run_id = results
    run = open_run(out, run_id)
    cat = load_catalogue()
    per_case = {k: len(cat[k.split(" | ")[0]].targets) for k in run.cases}
    assert len(run.frame) == sum(per_case.values())  # one seed: one row per target
    killed = open_run(out, "zz-killed")  # no table.csv: rebuilt from the stored cases
    assert len(killed.frame) == sum(per_case[k] for k in killed.cases)
    for key in set(killed.frame["case"]):
        for col in ("iterations", "target"):
            rows = run.frame[run.frame["case"] == key][col].tolist()
            again = killed.frame[killed.frame["case"] == key][col].tolist()
            assert [None if v != v else float(v) for v in rows] == [None if v is None or v != v else float(v)
                                                                    for v in again]
    with pytest.raises(UserError, match="no such run"):
        open_run(out, "nope")
    with pytest.raises(UserError, match="no such run"):
        open_run(out, "../x")


def test_traces_round_trip_in_the_agreed_layout(tmp_path: Path) -> None:
    key = "quad | gd | full | seeds=0,1"
    a = runfolders.synthetic_trace(1e-6, 300, 1e-5)
    b = runfolders.synthetic_trace(1e-3, 50, None)
    path = write_traces(tmp_path, key, {0: a, 1: b})
    assert path == tmp_path / "traces" / f"{case_stem(key)}.npz"
    with np.load(path, allow_pickle=False) as z:  # the PLAN.md contract: stacked rows, one per (seed, point)
        assert set(z.files) == {"seed", "iteration", "measure", "dist", "grad_calls", "seconds"}
        assert z["seed"].shape == (len(a.iteration) + len(b.iteration),)
        assert z["iteration"].dtype == np.int64 and z["measure"].dtype == np.float64
    got = load_traces(tmp_path, key)
    assert sorted(got) == [0, 1]
    for want, have in ((a, got[0]), (b, got[1])):
        for f in ("iteration", "measure", "dist", "grad_calls", "seconds"):
            assert np.array_equal(getattr(want, f), getattr(have, f), equal_nan=True)
    assert isinstance(got[0], Trace)
    assert load_traces(tmp_path, "another case") == {}  # no file: no traces, not an error


def test_contract_grid() -> None:
    g = runfolders.contract_grid(1000)
    assert g[0] == 0 and np.array_equal(g[:201], np.arange(201)) and g[-1] == 1000
    steps = g[201:-1]
    assert np.all(steps[1:] == np.maximum(steps[:-1] + 1, np.floor(1.02 * steps[:-1]).astype(int)))


def test_runs_command(results: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    out, run_id = results
    assert main(["runs", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert run_id in text and "interrupted" in text and "partial" in text and "6/6 (2 failed)" in text
    assert main(["runs", "--out", str(out), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["status"] for r in rows] == ["complete", "partial", "interrupted"]  # by start, then id
    assert main(["runs", run_id, "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "error" in text and "--errors" in text


def test_runs_errors_show_stored_traceback(results: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    out, run_id = results
    assert main(["runs", run_id, "--out", str(out), "--errors", "--case", "quad-diag-kappa10-*"]) == 0
    text = capsys.readouterr().out
    assert text.count("== ") == 1 and "faulty_rules:Raiser" in text
    assert "ZeroDivisionError: planted failure in step" in text and "Traceback" in text
    assert main(["runs", "latest", "--out", str(out), "--errors", "--case", "no-such-*"]) == 0
    assert "no failed case" in capsys.readouterr().out


def test_runs_bad_input_is_one_line(results: tuple[Path, str], capsys: pytest.CaptureFixture[str]) -> None:
    out, _ = results
    assert main(["runs", "nope", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no such run" in err
    assert main(["runs", "--errors", "--out", str(out)]) == 2
    assert "need a RUN_ID" in capsys.readouterr().err
