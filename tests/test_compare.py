"""Speed-up comparison: the interval statistics on synthetic timings, then real runs.

The real-run checks are checks of the statistics, not timed tests: they assert
that an interval covers a ratio measured independently in the same test, or
that an A/A interval is not called significant, with enough replay pairs that a
loaded 2-core machine (whose noise hits both sides of an interleaved pair
alike) does not decide the outcome.
"""

from __future__ import annotations

import math
import shutil

import numpy as np
import pytest

from benchsuite.compare import overall_interval, ratio_interval


def synthetic_pairs(rng: np.random.Generator, ratio: float, n: int, drift: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Replay times with machine drift shared within a pair, lognormal noise, and rare spikes."""
    base = 1e-3 * (1 + (0.5 * np.sin(np.arange(n) / 3.0) if drift else 0.0))
    a = base * np.exp(rng.normal(0, 0.05, n))
    b = ratio * base * np.exp(rng.normal(0, 0.05, n))
    spikes = rng.random(n) < 0.05  # a busy machine slows the odd replay (of either side) a lot
    a[spikes & (rng.random(n) < 0.5)] *= 3.0
    b[spikes & (rng.random(n) < 0.5)] *= 3.0
    return a, b


def test_identical_samples_give_a_point_interval() -> None:
    r, (lo, hi) = ratio_interval([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    assert r == lo == hi == 1.0


def test_interval_coverage_of_a_known_ratio() -> None:
    """Over 200 synthetic data sets the 95 % interval covers the true ratio ~95 % of the time."""
    rng = np.random.default_rng(7)
    true = 1.3
    covered = 0
    for i in range(200):
        a, b = synthetic_pairs(rng, true, 21)
        _, (lo, hi) = ratio_interval(a, b, seed=i, n_resamples=999)
        covered += lo <= true <= hi
    # binomial(200, 0.95) has sd 3.1 covered sets; bootstrap intervals from 21
    # pairs undercover slightly. 176 = 88 % allows both without letting a
    # broken interval (e.g. one centred on the wrong statistic) through.
    assert covered >= 176, covered


def test_aa_false_positive_rate() -> None:
    """A/A (ratio 1): the interval excludes 1 in about 5 % of data sets."""
    rng = np.random.default_rng(11)
    signif = 0
    for i in range(200):
        a, b = synthetic_pairs(rng, 1.0, 21)
        _, (lo, hi) = ratio_interval(a, b, seed=i, n_resamples=999)
        signif += not (lo <= 1.0 <= hi)
    assert signif <= 24, signif  # 12 % (see the coverage test for the margin)


def test_trimmed_mean_resists_a_spike() -> None:
    """One replay slowed 10x moves the 10 %-trimmed estimate by nothing."""
    a = np.full(21, 1e-3)
    b = np.full(21, 1.3e-3)
    b[4] *= 10
    r, _ = ratio_interval(a, b)
    assert r == pytest.approx(1.3, rel=1e-12)  # round-off of exp(log) only


def test_overall_is_the_geometric_mean() -> None:
    pairs = [([1.0, 1.0], [2.0, 2.0]), ([1.0, 1.0], [0.5, 0.5]), ([1.0, 1.0], [1.5, 1.5])]
    r, (lo, hi) = overall_interval(pairs)
    assert r == pytest.approx((2.0 * 0.5 * 1.5) ** (1 / 3), rel=1e-12)  # round-off only
    assert lo == pytest.approx(r) and hi == pytest.approx(r)
    rng = np.random.default_rng(3)
    noisy = [synthetic_pairs(rng, 1.3, 21) for _ in range(4)]
    r, (lo, hi) = overall_interval(noisy, n_resamples=999)
    assert lo < r < hi and lo <= 1.3 <= hi


def test_fewer_than_two_pairs_is_an_error() -> None:
    with pytest.raises(ValueError):
        ratio_interval([1.0], [1.0])
    assert math.isfinite(ratio_interval([1.0, 1.1], [1.2, 1.3])[0])


# ------------------------------------------------------------------------------
# Real measurements. broken_rules.TextbookAdamExtraWork is TextbookAdam plus
# wasted work in every step (a planted slowdown, about 1.3x on this problem,
# measured independently by direct_ratio).
import subprocess
import sys
import time
from pathlib import Path

from benchsuite.compare import Side, compare, worktree
from benchsuite.errors import UserError

REPO = Path(__file__).resolve().parents[1]


def warm_reference(dest: Path) -> None:
    """Copy the committed reference cache (certified optima) into a scratch project, if there is one."""
    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", dest)
PROBLEM = "quad-diag-kappa10-d10"  # d = 10: the rule's step dominates the time per iteration
PAIRS = 41  # replay pairs per comparison; see direct_ratio for the reasoning


def direct_ratio(k: int, pairs: int = 81) -> tuple[float, tuple[float, float]]:
    """The true time ratio, measured without the comparison machinery.

    Bare loops of k (gradient + step) iterations of each rule, interleaved,
    each sample at least 20 ms of process CPU time (the comparison's default
    clock: other processes competing for the 2 cores do not inflate it); the
    ratio and its interval come from twice as many pairs as the comparison
    uses, so the reference is the more precise of the two.
    """
    from broken_rules import TextbookAdam, TextbookAdamExtraWork

    from benchsuite.catalogue import load_catalogue

    problem = load_catalogue()[PROBLEM].build()

    def once(cls: type, inner: int) -> float:
        t0 = time.process_time()
        for _ in range(inner):
            rule = cls(lr=0.1)
            x = problem.initial_point()
            s = rule.init(x)
            for _ in range(k):
                x, s = rule.step(x, problem.grad(x), s)
        return (time.process_time() - t0) / inner

    inner = max(1, int(0.02 / once(TextbookAdam, 1)))
    ta, tb = [], []
    for i in range(pairs):
        for cls, out in ((TextbookAdam, ta), (TextbookAdamExtraWork, tb))[:: 1 if i % 2 == 0 else -1]:
            out.append(once(cls, inner))
    return ratio_interval(ta, tb, seed=1)


@pytest.mark.slow
def test_planted_slowdown_is_recovered() -> None:
    res = compare(
        Side("broken_rules:TextbookAdam", {"lr": 0.1}),
        Side("broken_rules:TextbookAdamExtraWork", {"lr": 0.1}),
        problems=PROBLEM, repeats=PAIRS, jobs=1,
    )
    (case,) = res.cases
    assert case.iters_a == case.iters_b and "same iterations" in case.note  # same iterates: only the step time differs
    true, (tlo, thi) = direct_ratio(case.iters_a)
    lo, hi = case.ci
    print(f"planted slowdown: compare {case.ratio:.3f} [{lo:.3f}, {hi:.3f}]; direct {true:.3f} [{tlo:.3f}, {thi:.3f}]")
    assert case.significant and lo > 1.0  # the slowdown is found
    # The comparison's interval must be consistent with the independent
    # measurement: the two intervals overlap (the direct estimate carries
    # its own noise, so demanding that its point estimate lie inside would
    # count that noise twice against the comparison).
    assert lo <= thi and tlo <= hi


@pytest.mark.slow
def test_aa_comparison_is_not_significant() -> None:
    """A rule against itself. Three independent A/A comparisons, at most one significant:
    with a 5 % false-positive rate per comparison, two or more happen with
    probability 3 * 0.05**2 * 0.95 + 0.05**3 = 0.7 %; an order effect or a biased
    statistic would make most of them significant."""
    flagged = []
    for _ in range(3):
        res = compare(Side("broken_rules:TextbookAdam", {"lr": 0.1}), Side("broken_rules:TextbookAdam", {"lr": 0.1}),
                      problems=PROBLEM, repeats=PAIRS, jobs=1)
        flagged.append(res.cases[0].significant)
        assert res.cases[0].iters_a == res.cases[0].iters_b
    assert sum(flagged) <= 1, flagged


def test_changed_iteration_counts_are_stated() -> None:
    res = compare(Side("adam", {"lr": 0.1}), Side("adam", {"lr": 0.05}), problems=PROBLEM, repeats=5, jobs=1)
    (case,) = res.cases
    assert case.iters_a != case.iters_b
    assert "changed behaviour" in case.note
    assert case.step_ratio == pytest.approx(case.ratio * case.iters_a / case.iters_b)


def _git(cwd: Path, *args: str) -> str:
    return subprocess.run(["git", *args], cwd=cwd, check=True, capture_output=True, text=True).stdout


@pytest.mark.slow
def test_two_git_revisions(tmp_path: Path) -> None:
    """compare across two commits of a small user repository, each side importing its own version."""
    repo = tmp_path / "teamrepo"
    (repo / "teamopt").mkdir(parents=True)
    src = (REPO / "tests" / "broken_rules.py").read_text()
    (repo / "teamopt" / "__init__.py").write_text("")
    (repo / "teamopt" / "optim.py").write_text(src + "\nTeamAdam = TextbookAdam\n")
    _git(repo, "init", "-q")
    _git(repo, "add", ".")
    _git(repo, "-c", "user.name=t", "-c", "user.email=t@example.invalid", "commit", "-q", "-m", "fast")
    (repo / "teamopt" / "optim.py").write_text(src + "\nTeamAdam = TextbookAdamExtraWork\n")
    _git(repo, "-c", "user.name=t", "-c", "user.email=t@example.invalid", "commit", "-q", "-am", "slow")
    # a third, uncommitted state that neither revision has: must not be imported
    (repo / "teamopt" / "optim.py").write_text("raise ImportError('working tree must not be used')\n")
    warm_reference(repo / "results" / "reference")
    res = compare(
        Side("teamopt.optim:TeamAdam", {"lr": 0.1}, rev="HEAD~1"),
        Side("teamopt.optim:TeamAdam", {"lr": 0.1}, rev="HEAD"),
        problems=PROBLEM, repeats=PAIRS, jobs=1, cwd=repo,
    )
    (case,) = res.cases
    print(f"git revisions: {case.ratio:.3f} [{case.ci[0]:.3f}, {case.ci[1]:.3f}]")
    assert case.iters_a == case.iters_b
    assert case.significant and case.ci[0] > 1.0
    assert res.label_a.endswith("@HEAD~1") and res.label_b.endswith("@HEAD")
    # the temporary worktrees are gone
    assert _git(repo, "worktree", "list").count("\n") == 1


def test_worktree_is_removed_on_error(tmp_path: Path) -> None:
    repo = tmp_path / "r"
    repo.mkdir()
    (repo / "f.txt").write_text("x")
    _git(repo, "init", "-q")
    _git(repo, "add", ".")
    _git(repo, "-c", "user.name=t", "-c", "user.email=t@example.invalid", "commit", "-q", "-m", "one")
    with pytest.raises(RuntimeError, match="boom"):
        with worktree("HEAD", repo) as path:
            assert (path / "f.txt").read_text() == "x"
            raise RuntimeError("boom")
    assert not path.exists()
    assert _git(repo, "worktree", "list").count("\n") == 1
    with pytest.raises(UserError, match="git rev-parse"):
        with worktree("no-such-rev", repo):
            pass


def test_cli_compare_json(tmp_path: Path) -> None:
    """The command prints JSON with the per-case intervals."""
    out = subprocess.run(
        [sys.executable, "-m", "benchsuite", "compare", "adam", "adam", "--param-a", "lr=0.1", "--param-b", "lr=0.1",
         "--problems", PROBLEM, "--repeats", "5", "--jobs", "1", "--json", "--markdown", str(tmp_path / "c.md")],
        cwd=REPO, capture_output=True, text=True, check=False,
    )
    assert out.returncode == 0, out.stderr
    import json

    doc = json.loads(out.stdout)
    assert doc["cases"][0]["iters_a"] == doc["cases"][0]["iters_b"] and len(doc["cases"][0]["times_a"]) == 5
    assert (tmp_path / "c.md").read_text().startswith("## benchsuite compare: B takes")


def _saved_run(out: Path, run_id: str, rule: str, rows: list[tuple[str, int, float, int | None, float | None]]) -> None:
    """A run folder with the runner's table columns that compare_runs reads."""
    import pandas as pd

    d = out / "runs" / run_id
    d.mkdir(parents=True)
    pd.DataFrame(
        [{"instance": i, "rule": rule, "seed": 0, "target_index": j, "target": t, "iterations": k,
          "time_to_target": s, "status": "reached"} for i, j, t, k, s in rows]
    ).to_csv(d / "table.csv", index=False)


def test_compare_saved_runs(tmp_path: Path) -> None:
    from benchsuite.compare import compare_runs
    from benchsuite.report import compare_table

    _saved_run(tmp_path, "r1", "adam", [("q", 0, 1e-2, 10, 1.0), ("q", 1, 1e-4, 40, 4.0), ("p", 0, 1e-2, 5, 2.0)])
    _saved_run(tmp_path, "r2", "adam", [("q", 0, 1e-2, 10, 2.0), ("q", 1, 1e-4, 20, 2.0), ("p", 0, 1e-2, None, None)])
    res = compare_runs("r1", "r2", out=tmp_path)
    q, p = res.cases
    assert (q.target, q.iters_a, q.iters_b, q.ratio) == (1e-4, 40, 20, 0.5)  # the tightest target both reached
    assert "B takes fewer iterations" in q.note and q.ci is None
    assert p.ratio is None and res.ratio == 0.5 and res.ci is None
    assert "no interval" in compare_table(res)
    with pytest.raises(UserError, match="no saved run 'r3'"):
        compare_runs("r1", "r3", out=tmp_path)
    _saved_run(tmp_path, "mixed", "adam", [("q", 0, 1e-2, 10, 1.0)])
    (tmp_path / "runs" / "mixed" / "table.csv").write_text(
        (tmp_path / "runs" / "mixed" / "table.csv").read_text() + "q,gd,0,1,0.0001,30,3.0,reached\n")
    with pytest.raises(UserError, match="holds 2 rules"):
        compare_runs("r1", "mixed", out=tmp_path)


def test_pairs_are_shared_out_over_rounds() -> None:
    from benchsuite.compare import _shares

    assert _shares(31, 3) == [11, 10, 10] and sum(_shares(41, 4)) == 41 and _shares(5, 1) == [5]
    with pytest.raises(UserError, match="--rounds"):
        compare(Side("adam"), Side("adam", rev="HEAD"), repeats=4, rounds=3)
