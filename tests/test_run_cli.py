"""Tests of ``benchsuite run`` / ``benchsuite history``: tables, run records, bad input, interrupt and resume."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from benchsuite.catalogue import load_catalogue
from benchsuite.cli import main
from benchsuite.optimum import certified_optimum

REPO = Path(__file__).resolve().parents[1]
TESTS = Path(__file__).parent
sys.path.insert(0, str(TESTS))


@pytest.fixture(scope="module", autouse=True)
def warm_references():
    cat = load_catalogue()
    for name in ("quad-diag-kappa10-d10", "quad-diag-kappa100-d50", "lsq-kappa1e2-500x50"):
        certified_optimum(cat[name])


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def test_run_prints_table_and_records_run_and_history(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--rule", "heavy_ball",
                        "--jobs", "1", "--repeats", "2", "--out", str(tmp_path))
    assert code == 0
    assert "quad-diag-kappa10-d10" in out and "heavy_ball" in out and "(<=" in out and "time/step" in out
    [run_dir] = (tmp_path / "runs").iterdir()
    meta = json.loads((run_dir / "meta.json").read_text())
    assert meta["status"] == "complete" and meta["settings"]["threads"] == 1
    assert {"python", "numpy", "scipy", "blas", "cpu"} <= set(meta["machine"])
    assert "commit" in meta["git"] and meta["rules"] == ["gd", "heavy_ball"]
    table = pd.read_csv(run_dir / "table.csv")
    assert len(table) == 2 * 4 and set(table.status) == {"reached"}
    assert (table.time_to_target > 0).all()
    code, out, _ = _run(capsys, "history", "--out", str(tmp_path), "--rule", "gd")
    assert code == 0 and out.count("quad-diag-kappa10-d10") == 4


def test_json_output(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--no-timing",
                        "--jobs", "1", "--json", "--out", str(tmp_path))
    assert code == 0
    doc = json.loads(out)
    assert doc["status"] == "complete" and len(doc["rows"]) == 4
    assert [r["iterations"] for r in doc["rows"]] == sorted(r["iterations"] for r in doc["rows"])


@pytest.mark.parametrize(
    "argv, needle",
    [
        (["--problems", "no-such-problem"], "no-such-problem"),
        (["--rule", "adamm"], "adamm"),
        (["--sweep", "lr=1:2"], "--sweep"),
        (["--param", "lr"], "lr"),
        (["--budget", "0"], "--budget"),
        (["--batch", "0"], "--batch"),
        (["--problems", "lsq-kappa1e2-500x50", "--batch", "100000"], "--batch"),
        (["--jobs", "0"], "--jobs"),
        (["--rule", "gd", "--param", "lr=-1"], "lr"),
        (["--resume", "nope"], "nope"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(tmp_path: Path, capsys, argv: list[str], needle: str) -> None:
    code, out, err = _run(capsys, "run", "--no-timing", "--out", str(tmp_path), *argv)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and needle in lines[0] and "Traceback" not in err


def test_sweep_selects_per_problem_and_params_from_reuses_it(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--sweep", "lr=0.2:1.8:5",
                        "--no-timing", "--jobs", "2", "--out", str(tmp_path))
    assert code == 0
    [run_dir] = (tmp_path / "runs").iterdir()
    meta = json.loads((run_dir / "meta.json").read_text())
    [sel] = meta["selected"]
    table = pd.read_csv(run_dir / "table.csv")
    assert table.case.nunique() == 5  # every grid point stays in the table
    tight = table[table.target_index == 3].copy()
    tight["lr"] = [json.loads(h)["lr"] for h in tight.hyperparams]
    best = tight.sort_values(["iterations", "lr"]).iloc[0]  # all reach every target here: fewest, then smaller
    assert sel["value"] == pytest.approx(best.lr, rel=1e-15) and sel["param"] == "lr"
    assert table[table.selected].case.nunique() == 1
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--params-from",
                        run_dir.name, "--no-timing", "--jobs", "1", "--json", "--out", str(tmp_path))
    rows = json.loads(out)["rows"]
    assert json.loads(rows[0]["hyperparams"])["lr"] == sel["value"]
    assert [r["iterations"] for r in rows] == table[table.selected].sort_values("target_index").iterations.tolist()


def test_interrupt_keeps_finished_cases_and_resume_completes_them(tmp_path: Path) -> None:
    # each step sleeps 10 ms, so a case lasts about a second: the interrupt after the second
    # case lands well before the sixth, even on a loaded machine (the counts do not depend on it)
    env = {**os.environ, "PYTHONPATH": str(TESTS)}
    argv = [sys.executable, "-m", "benchsuite", "run", "--problems", "quad-diag-kappa10-d10", "--rule",
            "faulty_rules:SlowGD", "--param", "delay=0.01", "--sweep", "lr=0.3:0.9:6", "--no-timing", "--jobs", "1", "--out", str(tmp_path)]
    proc = subprocess.Popen(argv, cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seen = []
    for line in proc.stderr:  # plain progress lines (not a terminal)
        seen.append(line)
        if "[2/" in line:
            proc.send_signal(signal.SIGINT)
            break
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, (seen, err)
    assert "--resume" in err
    [run_dir] = (tmp_path / "runs").iterdir()
    meta = json.loads((run_dir / "meta.json").read_text())
    assert meta["status"] == "partial"
    kept = len(list((run_dir / "cases").glob("*.json")))
    assert 2 <= kept < 6
    res = subprocess.run([sys.executable, "-m", "benchsuite", "run", "--resume", run_dir.name, "--no-timing",
                          "--jobs", "2", "--out", str(tmp_path)], cwd=REPO, env=env, capture_output=True, text=True,
                         timeout=120)
    assert res.returncode == 0, res.stderr
    assert res.stderr.count("benchsuite: [") == 6 - kept  # only the missing cases ran
    meta = json.loads((run_dir / "meta.json").read_text())
    assert meta["status"] == "complete" and len(meta["resumed"]) == 1
    resumed = pd.read_csv(run_dir / "table.csv")
    # an uninterrupted run of the same request, in this process
    from benchsuite.runner import run

    full = run(["faulty_rules:SlowGD"], ["delay=0.01"], problems="quad-diag-kappa10-d10", sweep="lr=0.3:0.9:6", timing=False,
               jobs=2, out=None)
    a = resumed.sort_values(["case", "target_index"]).iterations.tolist()
    b = full.sort_values(["case", "target_index"]).iterations.tolist()
    assert a == b and len(a) == 6 * 4


def test_minibatch_run_reports_seeds_reached(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "lsq-kappa1e2-500x50,quad-diag-kappa10-d10", "--rule", "gd",
                        "--param", "lr=0.3", "--batch", "50", "--no-replace", "--seeds", "2", "--budget", "200",
                        "--no-timing", "--jobs", "2", "--out", str(tmp_path))
    assert code == 0
    assert "[2/2]" in out and "minibatch B=50" in out
    assert "skipped (not finite sums" in out and "quad-diag-kappa10-d10" in out.split("skipped")[1]


def test_table_marks_a_count_above_its_bound() -> None:
    from benchsuite.commands.run import format_results
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, CaseResult, SeedOutcome

    inst = load_catalogue()["quad-diag-kappa10-d10"]
    o = SeedOutcome(0, "reached", (5, 50, 60, 70), (5, 50, 60, 70), (None,) * 4, 1e-9, 1e-4, (), 70)
    r = CaseResult(Case(inst, parse_rule("gd")), {"lr": 1.0}, (o,), (10, 20, 80, 90), "reached")
    text = format_results([r])
    assert "50 (<=20!)" in text and "5 (<=10)" in text and "above its published bound" in text


def test_impossible_instance_sizes_stop_the_run_before_any_work(tmp_path: Path, capsys) -> None:
    cat = tmp_path / "mine.toml"
    cat.write_text('[[instance]]\nname = "lsq-too-wide"\nfamily = "least_squares"\ntargets = [1e-2]\nbudget = 10\n'
                   "[instance.params]\nn = 5\nd = 10\n")
    code, out, err = _run(capsys, "run", "--catalogue", str(cat), "--problems", "lsq-too-wide", "--out", str(tmp_path))
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "mine.toml: [lsq-too-wide].params" in lines[0] and "n >= d" in lines[0]
    assert not (tmp_path / "runs").exists()  # nothing written for a run that never started
