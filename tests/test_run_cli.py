"""Tests of ``benchsuite run`` / ``benchsuite history``: tables, run records, bad input, interrupt and resume."""

from __future__ import annotations

import json
import os
import re
import signal
import stat
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
    old_umask = os.umask(0o022)
    try:
        code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--rule", "heavy_ball",
                        "--jobs", "1", "--replays", "2", "--out", str(tmp_path))
    finally:
        os.umask(old_umask)
    assert code == 0
    assert "quad-diag-kappa10-d10" in out and "heavy_ball" in out and "(<=" in out and "time/step" in out
    [run_dir] = (tmp_path / "runs").iterdir()
    meta = json.loads((run_dir / "meta.json").read_text())
    assert meta["status"] == "complete" and meta["settings"]["threads"] == 1
    assert {"python", "numpy", "scipy", "blas", "cpu"} <= set(meta["machine"])
    assert "commit" in meta["git"] and meta["rules"] == ["gd", "heavy_ball"]
    for written in (run_dir / "meta.json", run_dir / "table.csv", *(run_dir / "cases").iterdir()):
        assert stat.S_IMODE(written.stat().st_mode) == 0o644, written  # umask 022, as open() would give
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
    assert "minibatch B=50, 2 seeds" in out
    # lsq with a minibatch: two seeds, so each cell is "median [min..max] reached/seeds" (or "median 1/2")
    lsq = out.split("lsq-kappa1e2-500x50")[1].split("\n\n")[0]
    cells = re.findall(r"(\d+(?:\.\d+)?)(?: \[(\d+)\.\.(\d+)\])? ([0-2])/2", lsq)
    assert len(cells) >= 1 and all(n != "0" for *_, n in cells), lsq
    for med, lo, hi, n in cells:
        if lo:  # median between the least and the most
            assert int(lo) <= float(med) <= int(hi) and n == "2"
    assert "skipped (not finite sums" in out and "quad-diag-kappa10-d10" in out.split("skipped")[1]


def test_table_marks_a_count_above_its_bound() -> None:
    from benchsuite.commands.run import format_results
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, CaseResult, SeedOutcome

    inst = load_catalogue()["quad-diag-kappa10-d10"]
    o = SeedOutcome(0, "reached", (5, 50, 60, 70), (5, 50, 60, 70), (None,) * 4, 1e-9, 1e-4, (), 70)
    r = CaseResult(Case(inst, parse_rule("gd")), {"lr": 1.0}, (o,), (10, 20, 80, 90), "reached")
    text = format_results([r])
    assert "50 (<=20 exceeded)" in text and "5 (<=10)" in text and "above its published bound" in text


def test_impossible_instance_sizes_stop_the_run_before_any_work(tmp_path: Path, capsys) -> None:
    cat = tmp_path / "mine.toml"
    cat.write_text('[[instance]]\nname = "lsq-too-wide"\nfamily = "least_squares"\ntargets = [1e-2]\nbudget = 10\n'
                   "[instance.params]\nn = 5\nd = 10\n")
    code, out, err = _run(capsys, "run", "--catalogue", str(cat), "--problems", "lsq-too-wide", "--out", str(tmp_path))
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "mine.toml: [lsq-too-wide].params" in lines[0] and "n >= d" in lines[0]
    assert not (tmp_path / "runs").exists()  # nothing written for a run that never started


# -- exit codes ---------------------------------------------------------------------------------
def _outcome(seed: int, status: str, iters: tuple, **kw):
    from benchsuite.runner import SeedOutcome

    return SeedOutcome(seed, status, iters, iters, (None,) * len(iters), kw.pop("final_measure", 1e-9), 1e-4, (),
                       kw.pop("iterations_run", 70), **kw)


def _result(outcomes: tuple, status: str, rule: str = "gd", instance: str = "quad-diag-kappa10-d10"):
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, CaseResult

    inst = load_catalogue()[instance]
    seeds = tuple(o.seed for o in outcomes)
    case = Case(inst, parse_rule(rule), "minibatch" if len(seeds) > 1 else "full", 5 if len(seeds) > 1 else None,
                True, seeds)
    return CaseResult(case, {"lr": 1.0}, outcomes, (None,) * 4, status)


def test_stochastic_cells_show_median_min_max_and_seeds_reached() -> None:
    from benchsuite.commands.run import format_results

    outs = (_outcome(0, "partial", (10, 40, None, None)), _outcome(1, "partial", (12, 60, 90, None)),
            _outcome(2, "reached", (15, 50, 70, 99)))
    text = format_results([_result(outs, "partial")])
    # medians over the seeds that reached: 12 of (10, 12, 15); 50 of (40, 50, 60); 80 of (70, 90)
    assert "12 [10..15] 3/3" in text and "50 [40..60] 3/3" in text and "80 [70..90] 2/3" in text
    assert "99 1/3" in text  # one seed: no range


def test_clean_statuses_exit_0_and_failures_exit_1(tmp_path: Path, capsys) -> None:
    # partial / budget are measurements: exit 0 (a budget far too small to reach anything)
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--budget", "3",
                          "--no-timing", "--jobs", "1", "--out", str(tmp_path))
    assert code == 0 and "budget" in out and "problems:" not in out, (out, err)
    # error and diverged: exit 1, each case explained below the table
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "faulty_rules:Raiser",
                          "--rule", "faulty_rules:NaNer", "--rule", "gd", "--no-timing", "--jobs", "1",
                          "--out", str(tmp_path))
    assert code == 1, err
    problems = out.split("problems:")[1]
    assert "faulty_rules:Raiser: error: ZeroDivisionError: planted failure in step" in problems
    assert "faulty_rules:NaNer: diverged at iteration 3: the measure became non-finite" in problems
    assert not any(line.strip().startswith("quad-diag-kappa10-d10 gd:") for line in problems.splitlines())
    assert "Traceback" not in err


def test_timeout_exits_1(tmp_path: Path, capsys) -> None:
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "faulty_rules:Hanger",
                          "--timeout", "0.5", "--no-timing", "--jobs", "1", "--out", str(tmp_path))
    assert code == 1 and "timeout" in out.split("problems:")[1], (out, err)


def test_json_run_exit_code_and_failed_list(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "faulty_rules:NaNer",
                        "--no-timing", "--jobs", "1", "--json", "--out", str(tmp_path))
    doc = json.loads(out)
    assert code == 1
    assert doc["failed"] == [{"instance": "quad-diag-kappa10-d10", "rule": "faulty_rules:NaNer", "status": "diverged"}]


@pytest.mark.parametrize("rule, fragment", [
    ("user_rules:WrongShape", "shape"),
    ("user_rules:WrongDtype", "dtype float32"),
    ("user_rules:NotTuple", "tuple"),
])
def test_contract_violation_is_a_usage_error_said_once(tmp_path: Path, capsys, rule: str, fragment: str) -> None:
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10,quad-diag-kappa100-d50", "--rule", rule,
                          "--rule", "gd", "--no-timing", "--jobs", "2", "--out", str(tmp_path))
    assert code == 2
    errors = [line for line in err.splitlines() if line.startswith("benchsuite: error:")]
    assert len(errors) == 1, err  # once for the rule, not once per case
    assert errors[0].startswith(f"benchsuite: error: rule {rule}:") and fragment in errors[0]
    assert "and 1 more case" in errors[0]
    assert "Traceback" not in err and "Traceback" not in out
    assert fragment not in out  # not repeated per case below the table
    assert "gd" in out and "reached" in out  # the other rule's results are still shown


def test_param_of_the_wrong_type_for_a_user_rule_is_a_usage_error(tmp_path: Path, capsys) -> None:
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "faulty_rules:PlainGD",
                          "--param", "lr=fast", "--no-timing", "--jobs", "1", "--out", str(tmp_path))
    errors = [line for line in err.splitlines() if line.startswith("benchsuite: error:")]
    assert code == 2 and len(errors) == 1, (out, err)
    assert "lr" in errors[0] and "fast" in errors[0] and "Traceback" not in err


# -- output ---------------------------------------------------------------------------------------
def test_json_keeps_float64_precision(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa100-d50", "--rule", "gd", "--no-timing",
                        "--jobs", "1", "--json", "--out", str(tmp_path))
    assert code == 0
    rows = json.loads(out)["rows"]
    [case_file] = (tmp_path / "runs" / json.loads(out)["run_id"] / "cases").iterdir()
    [seed] = json.loads(case_file.read_text())["outcomes"]
    # the final measure is below the tightest target 1e-8: 10-decimal rounding would have lost it
    assert 0 < rows[0]["final_measure"] < 1e-8
    assert rows[0]["final_measure"] == seed["final_measure"] and rows[0]["final_dist"] == seed["final_dist"]
    assert [r["target"] for r in rows] == [1e-2, 1e-4, 1e-6, 1e-8]


def test_history_json_round_trips_small_floats_and_globs(tmp_path: Path, capsys) -> None:
    from benchsuite.results import TABLE_COLUMNS, record_history

    base = {c: None for c in TABLE_COLUMNS}
    rows = [{**base, "instance": "inst-a", "rule": "adam(lr=0.1)", "final_measure": 7.154e-09, "target": 4e-11},
            {**base, "instance": "inst-a", "rule": "adamw", "final_measure": 4e-11, "target": 1e-8},
            {**base, "instance": "inst-a", "rule": "gd", "final_measure": 1.0, "target": 1e-8}]
    record_history(tmp_path / "history.sqlite", "r1",
                   {"started": "2026-03-12T10:00:00Z", "status": "complete", "git": {}}, rows)
    code, out, _ = _run(capsys, "history", "--out", str(tmp_path), "--rule", "adam*", "--json")
    doc = json.loads(out)
    assert code == 0 and [r["rule"] for r in doc] == ["adam(lr=0.1)", "adamw"]
    assert doc[0]["final_measure"] == 7.154e-09 and doc[0]["target"] == 4e-11 and doc[1]["final_measure"] == 4e-11
    code, out, _ = _run(capsys, "history", "--out", str(tmp_path), "--rule", "adam%")
    assert code == 0 and out.strip() == "no matching rows"  # % is not a wildcard
    code, out, _ = _run(capsys, "history", "--out", str(tmp_path), "--since", "2026-03-12T09:59", "--json")
    assert len(json.loads(out)) == 3
    code, out, _ = _run(capsys, "history", "--out", str(tmp_path), "--since", "2026-03-13", "--json")
    assert json.loads(out) == []


@pytest.mark.parametrize("since", ["yesterday", "12/03/2026", "2026-02-30"])
def test_history_since_is_validated(tmp_path: Path, capsys, since: str) -> None:
    code, out, err = _run(capsys, "history", "--out", str(tmp_path), "--since", since)
    lines = err.strip().splitlines()
    assert code == 2 and out == "" and len(lines) == 1
    assert "--since" in lines[0] and since in lines[0] and "ISO" in lines[0]


def test_explanations_for_unstable_and_timeout() -> None:
    from benchsuite.commands.run import explain

    unstable = _outcome(0, "unstable", (5, 9, 20, 31), iterations_run=131, final_measure=3e-8, left_at=47,
                        horizon=100, horizon_worst=2.5e-6, held=(5, 9, 20, None))
    line = explain(unstable, (1e-2, 1e-4, 1e-6, 1e-8))
    assert line == ("unstable: reached 1e-08 at iteration 31 but rose above it at iteration 47 and was above it "
                    "at the end of the 100 steps run after (worst measure 2.5e-06)")
    timeout = _outcome(0, "timeout", (5, None), iterations_run=4096, final_measure=0.1)
    assert explain(timeout, (1e-2, 1e-4)) == "timeout: stopped at iteration 4096 by the per-pass limit (--timeout)"
    clean = _outcome(0, "partial", (5, None), iterations_run=10, final_measure=0.1)
    assert explain(clean, (1e-2, 1e-4)) is None
    diverged = _outcome(0, "diverged", (None, None), iterations_run=40, final_measure=3e13)
    assert explain(diverged, (1e-2, 1e-4)) == ("diverged at iteration 40: the measure reached 3e+13, above 1e+12 x its "
                                              "start; a smaller step size may help")


def test_failed_statuses_are_the_runners_bad_ones() -> None:
    from benchsuite.cases import BAD_STATUSES
    from benchsuite.commands.run import FAILED, STRICT_FAILED

    assert set(STRICT_FAILED) == set(BAD_STATUSES) and set(STRICT_FAILED) - set(FAILED) == {"unstable"}


def test_sweep_summary_has_one_row_per_rule(tmp_path: Path, capsys) -> None:
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10,quad-diag-kappa100-d50", "--rule", "gd",
                        "--sweep", "lr=0.3:1.2:3", "--no-timing", "--jobs", "2", "--out", str(tmp_path))
    assert code == 0
    summary = out.split("summary over 2 instances (cases by status)\n")[1].split("\n\n")[0].strip().splitlines()
    assert [line.split()[0] for line in summary] == ["rule", "gd"]  # not one row per swept lr
    assert summary[1].split()[1:] == ["2"]  # gd reached on both instances


def test_sweep_diverged_grid_points_do_not_fail_the_run(tmp_path: Path, capsys) -> None:
    # lr = 1/L (L = 1 here) converges; lr = 10/L diverges: an expected part of the search
    code, out, _ = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd", "--sweep", "lr=1:10:2",
                        "--no-timing", "--jobs", "1", "--json", "--out", str(tmp_path))
    rows = json.loads(out)["rows"]
    assert {r["case_status"] for r in rows} == {"reached", "diverged"}
    assert code == 0 and json.loads(out)["failed"] == []


def test_tier_all_is_accepted(tmp_path: Path, capsys) -> None:
    code, out, err = _run(capsys, "run", "--tier", "all", "--problems", "quad-diag-kappa10-d10", "--rule", "gd",
                          "--no-timing", "--jobs", "1", "--out", str(tmp_path))
    assert code == 0 and "quad-diag-kappa10-d10" in out, err


def test_run_creates_results_in_the_current_folder(tmp_path: Path) -> None:
    r = subprocess.run([sys.executable, "-m", "benchsuite", "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd",
                        "--no-timing", "--jobs", "1"], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "results" / "history.sqlite").is_file()
    assert len(list((tmp_path / "results" / "runs").iterdir())) == 1


# -- signals --------------------------------------------------------------------------------------
def test_sigterm_keeps_finished_cases_marks_partial_and_exits_143(tmp_path: Path) -> None:
    env = {**os.environ, "PYTHONPATH": str(TESTS)}
    argv = [sys.executable, "-m", "benchsuite", "run", "--problems", "quad-diag-kappa10-d10", "--rule",
            "faulty_rules:SlowGD", "--param", "delay=0.01", "--sweep", "lr=0.3:0.9:6", "--no-timing", "--jobs", "1",
            "--out", str(tmp_path)]
    proc = subprocess.Popen(argv, cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seen = []
    for line in proc.stderr:
        seen.append(line)
        if "[2/" in line:
            proc.send_signal(signal.SIGTERM)  # what a CI system sends on cancel
            break
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, (seen, err)
    assert "terminated (SIGTERM); finished cases kept" in err and "--resume" in err and "Traceback" not in err
    [run_dir] = (tmp_path / "runs").iterdir()
    meta = json.loads((run_dir / "meta.json").read_text())
    assert meta["status"] == "partial" and "ended" in meta
    assert 2 <= len(list((run_dir / "cases").glob("*.json"))) < 6


def test_sigterm_during_any_command_is_an_interrupt(monkeypatch: pytest.MonkeyPatch, capsys) -> None:
    import benchsuite.commands.rules as rules_command

    def killed(args):
        os.kill(os.getpid(), signal.SIGTERM)
        raise AssertionError("SIGTERM did not interrupt the command")

    before = signal.getsignal(signal.SIGTERM)
    monkeypatch.setattr(rules_command, "run", killed)
    code, out, err = _run(capsys, "rules")
    assert code == 143 and err.strip() == "benchsuite: terminated (SIGTERM)"
    assert signal.getsignal(signal.SIGTERM) is before  # the handler is removed again


def test_replays_flag_replaces_repeats(tmp_path: Path, capsys) -> None:
    code, _, err = _run(capsys, "run", "--replays", "0", "--out", str(tmp_path))
    assert code == 2 and "--replays must be >= 1" in err
    with pytest.raises(SystemExit) as exc:
        main(["run", "--repeats", "3"])
    assert exc.value.code == 2


def test_dir_of_the_package_lists_run_and_stays_lazy() -> None:
    code = ("import sys, benchsuite; d = dir(benchsuite); "
            "print('run' in d, 'benchsuite.runner' in sys.modules, callable(benchsuite.run))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.stdout.split() == ["True", "False", "True"], r.stderr


def test_contract_violation_in_a_sweep_is_said_once(tmp_path: Path, capsys) -> None:
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "gd",
                          "--rule", "faulty_rules:WrongShape", "--sweep", "lr=0.1:1:3", "--no-timing", "--jobs", "2",
                          "--out", str(tmp_path))
    errors = [line for line in err.splitlines() if line.startswith("benchsuite: error:")]
    assert code == 2 and len(errors) == 1 and "and 2 more cases" in errors[0], err


KICKED = """
import numpy as np


class Kicked:
    \"\"\"Gradient descent that, from step ``at`` on, adds ``kick`` to every coordinate (a planted bug).\"\"\"

    def __init__(self, lr: float = 1.0, at: int = 80, kick: float = 1e-3) -> None:
        self.lr, self.at, self.kick = lr, at, kick

    def init(self, x0):
        return 0

    def step(self, x, g, k):
        x = x - self.lr * g
        if k + 1 >= self.at:
            x = x + self.kick
        return x, k + 1
"""


def test_unstable_case_is_explained_and_fails_with_strict(tmp_path: Path, capsys,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "kicked_rule.py").write_text(KICKED)
    monkeypatch.syspath_prepend(str(tmp_path))  # forked workers inherit sys.path
    # gd with lr = 1/L reaches 1e-8 on this instance at iteration 61 (see the first test); the kick from step 80
    # moves the fixed point away from x*, so the pass ends its horizon above the tightest target
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "kicked_rule:Kicked",
                          "--no-timing", "--jobs", "1", "--out", str(tmp_path / "out"))
    assert code == 0, (out, err)  # a measurement, like partial: fails only with --strict
    [row] = [line.split() for line in out.splitlines() if line.strip().startswith("kicked_rule:Kicked ")]
    assert row[1] == "unstable"
    problems = out.split("problems:")[1]
    assert "unstable: reached 1e-08 at iteration 61 but rose above it at iteration 80" in problems, problems
    code, out, err = _run(capsys, "run", "--problems", "quad-diag-kappa10-d10", "--rule", "kicked_rule:Kicked",
                          "--strict", "--no-timing", "--jobs", "1", "--json", "--out", str(tmp_path / "out"))
    assert code == 1 and json.loads(out)["failed"] == [
        {"instance": "quad-diag-kappa10-d10", "rule": "kicked_rule:Kicked", "status": "unstable"}]


def test_run_cli_takes_per_rule_hyperparameters_horizon_and_notes(tmp_path) -> None:
    """--rule 'adam(lr=0.05)' gives that rule its own value; --horizon reaches the cases; notes are printed."""
    import subprocess
    import sys

    proc = subprocess.run(
        [sys.executable, "-m", "benchsuite", "run", "--rule", "adam(lr=0.05)", "--rule", "gd",
         "--problems", "quad-diag-kappa10-d10", "--no-timing", "--jobs", "1", "--horizon", "0,0",
         "--json", "--out", str(tmp_path / "out")],
        capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stderr
    import json

    doc = json.loads(proc.stdout)
    rules = {r["rule"] for r in doc["rows"]}
    assert rules == {"adam(lr=0.05)", "gd"}
    # --horizon 0,0: the passes stop where the tightest target is met (nothing after it)
    assert all(r["iterations_run"] == max(q["iterations"] for q in doc["rows"] if q["case"] == r["case"])
               for r in doc["rows"] if r["case_status"] == "reached")
    bad = subprocess.run([sys.executable, "-m", "benchsuite", "run", "--horizon", "ten", "--out", str(tmp_path / "o2")],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and "--horizon" in bad.stderr and "Traceback" not in bad.stderr


def test_table_marks_a_count_below_the_lower_bound() -> None:
    from benchsuite.commands.run import format_results
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, CaseResult, SeedOutcome

    inst = load_catalogue()["quad-diag-kappa10-d10"]
    o = SeedOutcome(0, "reached", (5, 50, 60, 70), (5, 50, 60, 70), (None,) * 4, 1e-9, 1e-4, (), 70)
    r = CaseResult(Case(inst, parse_rule("gd")), {"lr": 1.0}, (o,), (None,) * 4, "reached",
                   theory_lower=(3, 55, 55, 60))
    assert r.below_lower() == (False, True, False, False)
    text = format_results([r])
    assert "50 (below the lower bound 55)" in text and "5 (" not in text and "no gradient-span" in text
