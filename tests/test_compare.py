"""compare: the interval statistics on synthetic log-ratios, the speed limit on planted
effects, and the plumbing with a deterministic virtual clock.

No test here depends on wall-clock speed (performance is measured in
benchmarks/bench_compare.py). Every random draw comes from a seeded generator,
so each test gives the same result on every run.
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import virtual_clock
from benchsuite import timing
from benchsuite.compare import (
    EXIT_CODES,
    MIN_PAIRS,
    CaseComparison,
    Change,
    Comparison,
    Side,
    _assemble,
    _lost,
    _Monitored,
    _plan,
    _shares,
    case_change,
    compare,
    compare_runs,
    pooled_change,
    speed_verdict,
    trimmed_t,
    worktree,
)
from benchsuite.errors import UserError
from benchsuite.report import COMPARE_SCHEMA, compare_json, compare_markdown, compare_table

REPO = Path(__file__).resolve().parents[1]
PROBLEM = "quad-diag-kappa10-d10"

# ------------------------------------------------------------------------------
# Synthetic log-ratios d_i = log(t_B,i / t_A,i) around a true value, under the
# noise models named in benchsuite.compare's docstring.
TRUE = 0.1  # true log-ratio (B 10.5 % slower)


def noise(rng: np.random.Generator, model: str, shape: tuple[int, int]) -> np.ndarray:
    """(data sets, pairs) of paired log-ratio noise."""
    r, n = shape
    if model == "normal":
        return rng.normal(0, 0.05, shape)
    if model == "t3":
        return 0.05 * rng.standard_t(3, shape)
    if model in ("spikes5", "spikes20"):  # replays of either side slowed now and then
        p, f = (0.05, math.log(3.0)) if model == "spikes5" else (0.2, math.log(1.5))
        a = rng.normal(0, 0.05, shape) + f * (rng.random(shape) < p)
        b = rng.normal(0, 0.05, shape) + f * (rng.random(shape) < p)
        return b - a
    if model == "load":  # machine speed drifts as an AR(1) over successive replays; order A B / B A alternates
        s = np.empty((r, 2 * n))
        s[:, 0] = rng.normal(0, 0.1, r)
        for k in range(1, 2 * n):
            s[:, k] = 0.9 * s[:, k - 1] + rng.normal(0, 0.1 * math.sqrt(1 - 0.81), r)
        sign = np.where(np.arange(n) % 2 == 0, 1.0, -1.0)
        return sign * (s[:, 1::2] - s[:, 0::2]) + rng.normal(0, 0.02, shape)
    if model == "skewed":  # one side alone has exponential delays (skewness 2)
        return rng.exponential(0.05, shape)
    raise ValueError(model)


def true_trimmed(model: str) -> float:
    """The population 10 % trimmed mean of TRUE + noise (what the interval estimates)."""
    if model != "skewed":  # symmetric noise: the trimmed mean is the centre
        return TRUE
    big = np.sort(TRUE + noise(np.random.default_rng(99), model, (1, 2_000_000))[0])
    g = int(0.1 * big.size)
    return float(big[g:big.size - g].mean())


def t_coverage(model: str, n: int, reps: int = 2000, seed: int = 0) -> float:
    rng = np.random.default_rng(seed)
    est, se, df = trimmed_t(TRUE + noise(rng, model, (reps, n)))
    half = Change(0.0, 1.0, df).interval[1]  # exp(t quantile): the interval of a unit se, as a ratio
    q = math.log(half)
    truth = true_trimmed(model)
    return float(np.mean((est - q * se <= truth) & (truth <= est + q * se)))


@pytest.mark.parametrize("model", ["normal", "t3", "spikes5", "spikes20", "load"])
def test_t_interval_coverage_holds_from_min_pairs(model: str) -> None:
    """Coverage of the 95 % interval by simulation, at MIN_PAIRS and up to 31 pairs."""
    for n in (MIN_PAIRS, 3, 5, 10, 21, 31):
        cov = t_coverage(model, n, seed=n)
        # 2000 data sets: Monte Carlo sd of a coverage near 0.95 is 0.005. 0.93 is 4 sd
        # below nominal; 0.99 bounds a uselessly wide (over-conservative) interval.
        assert 0.93 <= cov <= 0.99, (model, n, cov)


def test_t_interval_coverage_with_one_sided_skewed_delays() -> None:
    """The documented shortfall: strongly right-skewed noise on one side covers 91-95 %."""
    for n in (MIN_PAIRS, 3, 5, 10, 31):
        cov = t_coverage("skewed", n, seed=n)
        # known for t intervals of a skewed population's trimmed mean; 0.90 is 2 Monte
        # Carlo sd under the lowest value measured (0.909 at 3 pairs, module docstring)
        assert cov >= 0.90, (n, cov)


def test_bca_bootstrap_undercovers_with_few_pairs() -> None:
    """Why the bootstrap was replaced: the paired BCa interval of the trimmed mean at 3 pairs.

    The issue measured 74 %; this reproduces it (normal noise) with the same
    simulation that passes the t interval above, so the simulation can tell.
    """
    import warnings

    from scipy.stats import bootstrap, trim_mean

    rng = np.random.default_rng(5)
    reps, covered = 300, 0
    for i in range(reps):
        d = TRUE + noise(rng, "normal", (1, 3))[0]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = bootstrap((d,), lambda x, axis=-1: trim_mean(x, 0.1, axis=axis), n_resamples=999, method="BCa",
                            rng=np.random.default_rng(i))
        lo, hi = res.confidence_interval
        covered += bool(lo <= TRUE <= hi)
    # 300 sets: sd 0.025 around the 0.74; 0.85 is 4 sd above it and 4 sd below 0.95
    assert covered / reps < 0.85, covered / reps


def test_pooled_interval_coverage() -> None:
    """Geometric mean over 3 cases of unequal noise and pair counts: Welch-Satterthwaite t interval."""
    rng = np.random.default_rng(17)
    reps, covered = 2000, 0
    truths = (0.05, 0.1, -0.02)
    ests = []
    for n, sd, t in zip((5, 11, 31), (0.02, 0.08, 0.05), truths):
        d = t + rng.normal(0, sd, (reps, n))
        ests.append(trimmed_t(d))
    for r in range(reps):
        c = pooled_change([Change(float(e[r]), float(s[r]), float(df)) for e, s, df in ests])
        lo, hi = c.interval
        covered += bool(math.log(lo) <= np.mean(truths) <= math.log(hi))
    assert 0.93 <= covered / reps <= 0.99, covered / reps  # as for the per-case coverage


def test_process_pair_is_the_unit_across_revisions() -> None:
    """A per-process offset (sd 3 %) shared by the pairs of one process pair.

    Treating the 30 pairs as independent undercovers badly; the interval over
    the process pairs' means (what compare uses for git revisions) holds.
    """
    rng = np.random.default_rng(23)
    reps, procs, per = 2000, 5, 6
    groups = np.repeat(np.arange(procs), per)
    naive = grouped = 0
    for _ in range(reps):
        d = TRUE + np.repeat(rng.normal(0, 0.03, procs), per) + rng.normal(0, 0.05, procs * per)
        ta, tb = np.ones(d.size), np.exp(d)
        for c, which in ((case_change(ta, tb), "naive"), (case_change(ta, tb, list(groups)), "grouped")):
            lo, hi = c.interval
            hit = math.log(lo) <= TRUE <= math.log(hi)
            naive += hit and which == "naive"
            grouped += hit and which == "grouped"
    # the failure mode is real: the naive se is ~0.66 of the true one, coverage 2 Phi(1.96 x 0.66) - 1 = 0.80;
    # 0.86 is 6 Monte Carlo sd (0.009) above that and 10 below 0.95
    assert naive / reps < 0.86, naive / reps
    assert 0.93 <= grouped / reps <= 0.99, grouped / reps  # as above


def test_identical_samples_give_a_point_interval() -> None:
    c = case_change([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    assert c.ratio == 1.0 and c.interval == (1.0, 1.0) and c.excludes_no_change is False


def test_trimmed_mean_resists_a_spike() -> None:
    """One replay slowed 10x moves the 10 %-trimmed estimate by nothing (21 pairs: 2 cut per end)."""
    a = np.full(21, 1e-3)
    b = np.full(21, 1.3e-3)
    b[4] *= 10
    assert case_change(a, b).ratio == pytest.approx(1.3, rel=1e-12)  # round-off of exp(log) only


def test_fewer_than_min_pairs_is_an_error() -> None:
    with pytest.raises(ValueError):
        case_change([1.0], [1.0])
    with pytest.raises(UserError, match="--pairs: need at least 2"):
        compare(Side("adam"), Side("adam"), problems=PROBLEM, pairs=1)


def test_one_case_pooled_equals_the_case() -> None:
    """With one case the overall interval is that case's interval, exactly."""
    rng = np.random.default_rng(3)
    c = case_change(np.exp(rng.normal(0, 0.05, 9)), np.exp(0.1 + rng.normal(0, 0.05, 9)))
    p = pooled_change([c])
    assert (p.log_ratio, p.se, p.df, p.interval) == (c.log_ratio, c.se, c.df, c.interval)


# ------------------------------------------------------------------------------
# The speed limit on planted effects in synthetic data (31 pairs).
def synthetic_case(rng: np.random.Generator, ratio: float, model: str, n: int = 31) -> Change:
    d = math.log(ratio) + noise(rng, model, (1, n))[0]
    return case_change(np.ones(n), np.exp(d))


def verdicts(ratio: float, reps: int, seed: int, model: str = "normal", limit: float = 0.05) -> dict[str, int]:
    rng = np.random.default_rng(seed)
    out = {"pass": 0, "fail": 0, "undecided": 0}
    for _ in range(reps):
        case = CaseComparison(PROBLEM, "reached", "reached", 1e-8, 100, 100, (), (),
                              synthetic_case(rng, ratio, model), None, "")
        out[speed_verdict(_assemble("A", "B", [case], 31, "", 1, limit), limit).outcome] += 1
    return out


def test_speed_limit_on_planted_effects() -> None:
    """Log-ratio sd 5 % per pair: se 0.9 %, half-width 1.8 %. A/A lies 3.4 se (after the
    half-width) below the 5 % limit and 1.10x 3.1 se above it, so >= 99 % decide right."""
    aa = verdicts(1.0, 400, seed=1)
    assert aa["fail"] == 0 and aa["pass"] >= 396, aa
    slow = verdicts(1.10, 400, seed=2)
    assert slow["pass"] == 0 and slow["fail"] >= 396, slow
    edge = verdicts(1.05, 400, seed=3)
    # exactly at the limit the two-sided 95 % interval lies wholly on one side in about
    # 2.5 % of runs each: binomial(400, 0.025) stays under 20 with probability > 99.8 %
    assert edge["fail"] <= 20 and edge["pass"] <= 20 and edge["undecided"] >= 360, edge


def test_speed_limit_never_decides_wrong_under_spiky_noise() -> None:
    """5 % of replays slowed 3x on either side: fewer runs decide, none decides wrongly."""
    aa = verdicts(1.0, 400, seed=4, model="spikes5")
    slow = verdicts(1.10, 400, seed=5, model="spikes5")
    assert aa["fail"] == 0 and slow["pass"] == 0, (aa, slow)
    assert aa["pass"] >= 200 and slow["fail"] >= 200, (aa, slow)  # still decides most runs (measured ~3/4)


def test_speed_verdict_words_and_exit_codes() -> None:
    def result(change: Change | None, lost_b: tuple[float, ...] = ()) -> Comparison:
        case = CaseComparison("q", "reached", "reached" if not lost_b else "partial", None, None, None, (), (),
                              change, None, "", (), lost_b)
        return _assemble("A", "B", [case], 31, "", 1, 0.05)

    assert result(Change(math.log(1.2), 0.01, 30)).verdict.outcome == "fail"
    assert result(Change(math.log(0.99), 0.01, 30)).verdict.outcome == "pass"
    assert result(Change(math.log(1.05), 0.01, 30)).verdict.outcome == "undecided"
    lost = result(None, lost_b=(1e-6, 1e-8))
    assert lost.verdict.outcome == "fail" and "loses targets" in lost.verdict.reason
    assert result(None).verdict.outcome == "undecided"
    assert EXIT_CODES == {"pass": 0, "fail": 1, "undecided": 3}


# ------------------------------------------------------------------------------
# Planning: lost targets, per step vs time to target (no timing involved).
def mon(iters: tuple[int | None, ...], status: str = "reached", run: int = 1000) -> _Monitored:
    return _Monitored(status, iters, run, "r")


class _Inst:
    name = "q"
    targets = (1e-2, 1e-4, 1e-6, 1e-8)


def test_a_side_that_loses_targets_gets_no_time_figure() -> None:
    """B reaches no target A reaches (momentum never updated): not timed, the lost targets named."""
    a, b = mon((10, 40, 80, 120)), mon((None, None, None, None), "budget")
    assert _lost(a, b, _Inst.targets) == ((), (1e-2, 1e-4, 1e-6, 1e-8))
    p = _plan(_Inst, a, b)
    assert not p.timed and p.lost_b == _Inst.targets and "B lost 1e-02, 1e-04, 1e-06, 1e-08" in p.note
    partial = _plan(_Inst, mon((10, 40, None, None), "partial"), mon((12, 44, 90, None), "partial"))
    assert not partial.timed and partial.lost_a == (1e-6,)
    same = _plan(_Inst, mon((10, 40, None, None), "partial"), mon((12, 44, None, None), "partial"))
    assert same.timed and (same.target, same.ka, same.kb) == (1e-4, 40, 44)
    transient = _plan(_Inst, mon((10, 40, 80, 120)), _Monitored("unstable", (10, 40, 80, 110), 1000, "r",
                                                                  held=(10, 40, 80, None)))
    assert not transient.timed and transient.lost_b == (1e-8,)  # B only dipped below 1e-8
    none = _plan(_Inst, mon((None,) * 4, "budget", 1000), mon((None,) * 4, "budget", 1000))
    assert none.timed and none.target is None and none.ka == none.kb == 1000


def test_per_step_and_time_to_target_are_pooled_apart() -> None:
    """A case timed to a target with different iteration counts and a per-step-only case."""
    ttt = Change(math.log(0.5), 0.0, 30)  # B reaches the target in half the time ...
    to_target_case = CaseComparison("q1", "reached", "reached", 1e-8, 200, 100, (), (),
                                    ttt.shifted(math.log(100 / 200)), ttt, "")  # ... with half the steps
    step_only = CaseComparison("q2", "budget", "budget", None, 1000, 1000, (), (), Change(math.log(1.21), 0.0, 30),
                               None, "")
    res = _assemble("A", "B", [to_target_case, step_only], 31, "", 1, None)
    assert to_target_case.per_step.ratio == pytest.approx(1.0)  # round-off of exp(log) only
    assert res.per_step.ratio == pytest.approx(math.sqrt(1.0 * 1.21)) and res.per_step.cases == 2
    assert res.to_target.ratio == pytest.approx(0.5) and res.to_target.cases == 1
    lines = res.summary_lines()
    assert lines[0].startswith("time per step, B against A: +10.0 %")
    assert lines[1].startswith("time to target, B against A: -50.0 %")


def test_summary_never_calls_a_side_that_lost_targets_faster() -> None:
    lost = CaseComparison("q1", "reached", "budget", None, None, None, (), (), None, None, "not timed", (),
                          (1e-6, 1e-8))
    fast = CaseComparison("q2", "reached", "reached", 1e-8, 100, 100, (), (), Change(math.log(0.8), 0.01, 30),
                          Change(math.log(0.8), 0.01, 30), "")
    res = _assemble("A", "B", [lost, fast], 31, "", 1, 0.05)
    assert res.headline == ("B loses targets A reaches on 1 case(s): q1 (1e-06, 1e-08); "
                            "no time figure is given for those cases")
    assert "over 1 other case(s)" in res.summary_lines()[1]
    assert res.verdict.outcome == "fail"
    text = compare_table(res) + compare_markdown(res)
    assert "faster" not in text and "speed-up" not in text


# ------------------------------------------------------------------------------
# Plumbing with the virtual clock: each CostedAdam step costs `cost` virtual seconds.
@pytest.fixture
def vclock(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(timing.CLOCKS, "cpu", virtual_clock.clock)


def costed(cost: float, lr: float = 0.1, jitter: float = 0.0) -> Side:
    return Side("virtual_clock:CostedAdam", {"lr": lr, "cost": cost, "jitter": jitter})


def test_planted_slowdown_is_recovered(vclock: None) -> None:
    """A planted 10 % per-step slowdown with 5 % per-replay noise: the interval covers it and excludes 0."""
    res = compare(costed(1e-4, jitter=0.05), costed(1.1e-4, jitter=0.05), problems=PROBLEM, pairs=31, jobs=1,
                  fail_above=0.05)
    (case,) = res.cases
    assert case.iters_a == case.iters_b and "same iterations" in case.note
    lo, hi = case.per_step.interval
    assert lo <= 1.1 <= hi and case.per_step.direction == "higher"
    assert case.to_target.log_ratio == case.per_step.log_ratio  # same iterations: the same figure
    assert res.per_step.interval == case.per_step.interval  # one case: the pooled interval is the case's
    # se about 0.05 * sqrt(2) / sqrt(31) = 1.3 %: 1.10 lies ~4 se above the 5 % limit
    assert res.verdict.outcome == "fail" and res.verdict.exit_code == 1


def test_aa_comparison_includes_no_change(vclock: None) -> None:
    res = compare(costed(1e-4, jitter=0.05), costed(1e-4, jitter=0.05), problems=PROBLEM, pairs=31, jobs=1,
                  fail_above=0.05)
    assert res.per_step.excludes_no_change is False and res.verdict.outcome == "pass"


def test_changed_iteration_counts_keep_the_two_figures_apart(vclock: None) -> None:
    """Without jitter the ratios are exact: per step the planted cost ratio, to target times the iteration ratio."""
    res = compare(costed(1e-4), costed(1.25e-4, lr=0.05), problems=PROBLEM, pairs=MIN_PAIRS, jobs=1)
    (case,) = res.cases
    assert case.iters_a != case.iters_b and "B takes" in case.note and "behaviour" in case.note
    # exact up to the round-off of summing the virtual step costs
    assert case.per_step.ratio == pytest.approx(1.25, rel=1e-9)
    assert case.to_target.ratio == pytest.approx(1.25 * case.iters_b / case.iters_a, rel=1e-9)
    assert case.per_step.interval == (case.per_step.ratio, case.per_step.ratio)


def test_lost_targets_end_to_end(vclock: None) -> None:
    """B's steps are cheaper but it reaches no target (lr far too small): no speed-up is reported."""
    res = compare(costed(1e-4), costed(0.5e-4, lr=1e-9), problems=PROBLEM, pairs=MIN_PAIRS, jobs=1, fail_above=0.05)
    (case,) = res.cases
    assert case.per_step is None and case.lost_b == (1e-2, 1e-4, 1e-6, 1e-8) and res.per_step is None
    assert res.headline.startswith("B loses targets A reaches on 1 case(s)")
    assert res.verdict.outcome == "fail"
    doc = json.loads(compare_json(res))
    assert doc["lost"]["B"] == [{"instance": PROBLEM, "targets": [1e-2, 1e-4, 1e-6, 1e-8]}]
    assert doc["per_step"] is None and doc["speed_limit"]["verdict"] == "fail"


def test_json_schema_and_keys(vclock: None) -> None:
    res = compare(costed(1e-4, jitter=0.05), costed(1.1e-4, jitter=0.05), problems=PROBLEM, pairs=5, jobs=1)
    doc = json.loads(compare_json(res))
    assert doc["schema"] == COMPARE_SCHEMA == "benchsuite-compare/2"
    assert doc["pairs"] == 5 and doc["per_step"]["excludes_no_change"] is True
    assert doc["per_step"]["direction"] == "higher" and doc["speed_limit"] is None
    case = doc["cases"][0]
    assert len(case["times_a"]) == 5 and case["per_step"]["change"] == pytest.approx(res.per_step.change)
    assert set(doc) == {"schema", "a", "b", "method", "pairs", "process_pairs", "per_step", "to_target", "lost",
                        "speed_limit", "summary", "cases"}
    assert set(doc["per_step"]) == {"ratio", "change", "interval", "change_interval", "excludes_no_change",
                                    "direction", "cases"}
    assert set(case) == {"instance", "status_a", "status_b", "target", "iters_a", "iters_b", "iter_ratio", "per_step",
                         "to_target", "lost_a", "lost_b", "times_a", "times_b", "process_pair", "note"}
    header = compare_table(res).splitlines()[4].split("  ")
    assert [h.strip() for h in header if h.strip()] == ["instance", "target", "iters A/B", "time per step, B vs A",
                                        "time to target, B vs A", "note"]


def test_pairs_are_shared_out_over_process_pairs() -> None:
    assert _shares(31, 3) == [11, 10, 10] and sum(_shares(41, 4)) == 41 and _shares(5, 1) == [5]
    with pytest.raises(UserError, match="--process-pairs"):
        compare(Side("adam"), Side("adam", rev="HEAD"), pairs=4, process_pairs=5)
    with pytest.raises(UserError, match="--process-pairs: only with --rev-a/--rev-b"):
        compare(Side("adam"), Side("adam"), pairs=4, process_pairs=2)


# ------------------------------------------------------------------------------
# Saved runs: no interval, so "unknown" in text and null in JSON.
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
    _saved_run(tmp_path, "r1", "adam", [("q", 0, 1e-2, 10, 1.0), ("q", 1, 1e-4, 40, 4.0), ("p", 0, 1e-2, 5, 2.0),
                                        ("s", 0, 1e-2, 5, 2.0)])
    _saved_run(tmp_path, "r2", "adam", [("q", 0, 1e-2, 10, 2.0), ("q", 1, 1e-4, 20, 2.0), ("p", 0, 1e-2, None, None),
                                        ("s", 0, 1e-2, 5, 3.0)])
    res = compare_runs("r1", "r2", out=tmp_path)
    q, p, s = res.cases
    assert (q.target, q.iters_a, q.iters_b, q.to_target.ratio) == (1e-4, 40, 20, 0.5)  # tightest target both reached
    assert q.per_step.ratio == pytest.approx(1.0)  # 2 s / 20 steps vs 4 s / 40 steps (round-off only)
    assert "B takes fewer iterations" in q.note and q.to_target.interval is None
    assert p.per_step is None and p.lost_b == (1e-2,)  # r2 lost the target on p: no time figure
    assert res.to_target.ratio == pytest.approx(math.sqrt(0.5 * 1.5)) and res.to_target.se is None
    text = compare_table(res)
    assert "no interval" in text and "whether it excludes no change is unknown" in text
    doc = json.loads(compare_json(res))
    assert doc["per_step"]["excludes_no_change"] is None and doc["cases"][0]["to_target"]["excludes_no_change"] is None
    with pytest.raises(UserError, match="no saved run 'r3'"):
        compare_runs("r1", "r3", out=tmp_path)
    _saved_run(tmp_path, "mixed", "adam", [("q", 0, 1e-2, 10, 1.0)])
    (tmp_path / "runs" / "mixed" / "table.csv").write_text(
        (tmp_path / "runs" / "mixed" / "table.csv").read_text() + "q,gd,0,1,0.0001,30,3.0,reached\n")
    with pytest.raises(UserError, match="holds 2 rules"):
        compare_runs("r1", "mixed", out=tmp_path)


# ------------------------------------------------------------------------------
# The command line.
def cli(*args: str, cwd: Path = REPO, **kw) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "benchsuite", "compare", *args], cwd=cwd, capture_output=True,
                          text=True, check=False, **kw)


def test_one_param_for_both_sides() -> None:
    from benchsuite.cli import build_parser
    from benchsuite.commands.compare import _side_params

    args = build_parser().parse_args(["compare", "adam", "adam", "--param", "lr=0.1", "--param-b", "lr=0.2",
                                      "--param", "beta1=0.8"])
    assert _side_params(args.param, args.param_a) == {"lr": 0.1, "beta1": 0.8}
    assert _side_params(args.param, args.param_b) == {"lr": 0.2, "beta1": 0.8}  # the side's own value wins
    with pytest.raises(UserError, match="given twice"):
        _side_params([], ["lr=0.1", "lr=0.2"])


def test_fail_above_parsing() -> None:
    from benchsuite.commands.compare import parse_limit

    assert parse_limit("5%") == pytest.approx(0.05) and parse_limit("2.5") == pytest.approx(0.025)
    assert parse_limit("-3 %") == pytest.approx(-0.03)
    with pytest.raises(UserError, match="--fail-above: 'fast' is not a percentage"):
        parse_limit("fast")


def test_cli_compare_json_with_one_param(tmp_path: Path) -> None:
    """The command takes one --param for both sides and prints the schema-2 JSON and Markdown."""
    out = cli("adam", "adam", "--param", "lr=0.1", "--problems", PROBLEM, "--pairs", "2", "--jobs", "1", "--json",
              "--markdown", str(tmp_path / "c.md"), "--html", str(tmp_path / "c.html"))
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["schema"] == "benchsuite-compare/2" and doc["a"] == doc["b"] == "adam(lr=0.1)"
    assert doc["cases"][0]["iters_a"] == doc["cases"][0]["iters_b"] and len(doc["cases"][0]["times_a"]) == 2
    md = (tmp_path / "c.md").read_text()
    assert md.startswith("## benchsuite compare: time per step, B against A: ")
    assert md.rstrip().endswith("(c-forest.png)") and (tmp_path / "c-forest.png").read_bytes()[:4] == b"\x89PNG"
    page = (tmp_path / "c.html").read_text()
    assert page.startswith("<!DOCTYPE html>") and "data:image/png;base64," in page and "http" not in page.lower()


def test_cli_compare_in_float32(tmp_path: Path) -> None:
    """--dtype float32 reaches compare: both sides run the problem in single precision, with equal counts."""
    out32 = cli("gd", "gd", "--problems", PROBLEM, "--pairs", "2", "--jobs", "1", "--json", "--dtype", "float32")
    out64 = cli("gd", "gd", "--problems", PROBLEM, "--pairs", "2", "--jobs", "1", "--json")
    assert out32.returncode == 0 and out64.returncode == 0, out32.stderr + out64.stderr
    c32, c64 = json.loads(out32.stdout)["cases"][0], json.loads(out64.stdout)["cases"][0]
    assert c32["iters_a"] == c32["iters_b"] and c64["iters_a"] == c64["iters_b"]


def test_cli_option_names() -> None:
    """The options of `compare`, in the tool's own vocabulary (replay pairs, process pairs, a speed limit)."""
    from benchsuite.cli import build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "command").choices["compare"]
    names = {o for a in sub._actions for o in a.option_strings}
    assert names == {"-h", "--help", "--param", "--param-a", "--param-b", "--rev-a", "--rev-b", "--runs", "--out",
                     "--problems", "--tier", "--catalogue", "--batch", "--pairs", "--process-pairs", "--fail-above",
                     "--clock", "--jobs", "--markdown", "--html", "--json", "--cluster", "--dtype"}


def test_readme_prints_no_machine_dependent_figure() -> None:
    """The README's compare example shows the output's shape, not a percentage or ratio from one machine."""
    import re

    text = (REPO / "README.md").read_text()
    section = text[text.index("## Measure a speed-up"):text.index("## Command reference")]
    example = section[section.index("```"):section.index("```", section.index("```") + 3)]
    assert "benchsuite compare" in example and "164/164" in example  # iteration counts are deterministic
    assert not re.search(r"[+-]?\d+(\.\d+)? ?%|\d\.\d+x", example.replace("95 % interval", "")), example


def _git(cwd: Path, *args: str) -> str:
    return subprocess.run(["git", *args], cwd=cwd, check=True, capture_output=True, text=True).stdout


def _commit(repo: Path, message: str) -> None:
    _git(repo, "add", ".")
    _git(repo, "-c", "user.name=t", "-c", "user.email=t@example.invalid", "commit", "-q", "-m", message)


def _warm_reference(dest: Path) -> None:
    """Copy the committed reference cache (certified optima) into a scratch project, if there is one."""
    import shutil

    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", dest)


def test_bad_git_revision_is_one_line(tmp_path: Path) -> None:
    repo = tmp_path / "r"
    repo.mkdir()
    (repo / "f.txt").write_text("x")
    _git(repo, "init", "-q")
    _commit(repo, "one")
    out = cli("adam", "--rev-a", "nosuchrev", "--problems", PROBLEM, cwd=repo)
    assert out.returncode == 2
    assert out.stderr == f"benchsuite: error: --rev-a: 'nosuchrev' is not a commit of the git repository {repo.resolve()}\n"
    outside = tmp_path / "plain"
    outside.mkdir()
    with pytest.raises(UserError, match="--rev-b: .* is not inside a git repository"):
        with worktree("HEAD", outside, "--rev-b"):
            pass


def test_worktree_is_removed_on_error(tmp_path: Path) -> None:
    repo = tmp_path / "r"
    repo.mkdir()
    (repo / "f.txt").write_text("x")
    _git(repo, "init", "-q")
    _commit(repo, "one")
    with pytest.raises(RuntimeError, match="boom"):
        with worktree("HEAD", repo) as path:
            assert (path / "f.txt").read_text() == "x"
            raise RuntimeError("boom")
    assert not path.exists()
    assert _git(repo, "worktree", "list").count("\n") == 1


def _team_repo(tmp_path: Path, first: str, second: str) -> Path:
    """A user repository whose teamopt/optim.py differs between HEAD~1 (``first``) and HEAD (``second``)."""
    repo = tmp_path / "teamrepo"
    (repo / "teamopt").mkdir(parents=True)
    (repo / "teamopt" / "__init__.py").write_text("")
    src = (REPO / "tests" / "virtual_clock.py").read_text()
    (repo / "teamopt" / "optim.py").write_text(src + first)
    _git(repo, "init", "-q")
    _commit(repo, "first")
    (repo / "teamopt" / "optim.py").write_text(src + second)
    _commit(repo, "second")
    # a third, uncommitted state that neither revision has: must not be imported
    (repo / "teamopt" / "optim.py").write_text("raise ImportError('working tree must not be used')\n")
    _warm_reference(repo / "results" / "reference")
    return repo


def test_two_git_revisions(tmp_path: Path) -> None:
    """Each side imports its own revision; the virtual clock makes the planted 10 % exact."""
    repo = _team_repo(
        tmp_path,
        "\ninstall()\nclass TeamAdam(CostedAdam):\n    def __init__(self, lr=1e-3):\n        super().__init__(lr, cost=1e-4)\n",
        "\ninstall()\nclass TeamAdam(CostedAdam):\n    def __init__(self, lr=1e-3):\n        super().__init__(lr, cost=1.1e-4)\n",
    )
    res = compare(
        Side("teamopt.optim:TeamAdam", {"lr": 0.1}, rev="HEAD~1"),
        Side("teamopt.optim:TeamAdam", {"lr": 0.1}, rev="HEAD"),
        problems=PROBLEM, pairs=4, process_pairs=2, jobs=1, cwd=repo,
    )
    (case,) = res.cases
    assert case.iters_a == case.iters_b and case.groups == (0, 0, 1, 1)
    assert case.per_step.ratio == pytest.approx(1.1, rel=1e-9)  # round-off of summing virtual costs only
    assert res.label_a.endswith("@HEAD~1") and res.label_b.endswith("@HEAD")
    assert "2 pairs of fresh worker processes" in res.method
    assert _git(repo, "worktree", "list").count("\n") == 1  # the temporary worktrees are gone


_SLOW_RULE = """
import os, time
class Sleepy(CostedAdam):
    def init(self, x0):
        open(os.environ["COMPARE_TEST_MARKER"], "w").close()  # the monitored pass has started
        return super().init(x0)
    def step(self, x, g, s):
        time.sleep(0.05)
        return super().step(x, g, s)
"""


@pytest.mark.parametrize("how", ["ctrl-c", "sigterm-group", "sigterm-parent"])
def test_interrupt_during_revision_compare(tmp_path: Path, how: str) -> None:
    """Ctrl-C (SIGINT to the process group) or SIGTERM: one line, exit 130, no traceback, no worktree left."""
    repo = _team_repo(tmp_path, _SLOW_RULE, _SLOW_RULE + "\n# second\n")
    marker = tmp_path / "started"
    env = dict(os.environ, COMPARE_TEST_MARKER=str(marker))
    proc = subprocess.Popen(
        [sys.executable, "-m", "benchsuite", "compare", "teamopt.optim:Sleepy", "--param", "lr=0.1",
         "--rev-a", "HEAD~1", "--rev-b", "HEAD", "--problems", PROBLEM, "--jobs", "1"],
        cwd=repo, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
    )
    deadline = time.monotonic() + 120  # generous: process start-up on a loaded machine; not a timing check
    while not marker.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert marker.exists(), proc.communicate()[1] if proc.poll() is not None else "no marker"
    if how == "ctrl-c":
        os.killpg(proc.pid, signal.SIGINT)
    elif how == "sigterm-group":
        os.killpg(proc.pid, signal.SIGTERM)
    else:
        os.kill(proc.pid, signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert err == "benchsuite: interrupted\n", err  # nothing from the worker processes
    assert _git(repo, "worktree", "list").count("\n") == 1


# ------------------------------------------------------------------------------
# Laws of the interval.
_times = st.lists(st.floats(1e-4, 1e-2), min_size=2, max_size=40)


@settings(max_examples=60, deadline=None)
@given(_times, st.floats(0.5, 2.0), st.integers(0, 2**32 - 1))
def test_scaling_b_scales_the_ratio_and_swapping_inverts_it(ta: list[float], c: float, seed: int) -> None:
    tb = np.asarray(ta) * np.exp(np.random.default_rng(seed).normal(0, 0.05, len(ta)))
    base = case_change(ta, tb)
    scaled = case_change(ta, c * tb)
    swapped = case_change(tb, ta)
    # exact in exact arithmetic; 1e-9 relative covers the round-off of logs and sorting
    assert scaled.ratio == pytest.approx(c * base.ratio, rel=1e-9)
    assert scaled.interval[0] == pytest.approx(c * base.interval[0], rel=1e-9)
    assert swapped.ratio == pytest.approx(1 / base.ratio, rel=1e-9)
    assert swapped.interval[1] == pytest.approx(1 / base.interval[0], rel=1e-9)


def test_saved_runs_timed_on_different_machines_give_no_ratio(tmp_path: Path) -> None:
    """A ratio never mixes machines: a case timed on host x in one run and host y in the other has no figure."""
    import pandas as pd

    for run_id, host, secs in (("a", "node-1", 1.0), ("b", "node-2", 2.0), ("c", "node-1", 2.0)):
        d = tmp_path / "runs" / run_id
        d.mkdir(parents=True)
        pd.DataFrame([{"instance": "q", "rule": "adam", "seed": 0, "target_index": 0, "target": 1e-2,
                       "iterations": 10, "time_to_target": secs, "status": "reached", "timed_on": host}]
                     ).to_csv(d / "table.csv", index=False)
    (case,) = compare_runs("a", "b", out=tmp_path).cases
    assert case.per_step is None and case.to_target is None
    assert "different machines" in case.note and "node-1" in case.note and "node-2" in case.note
    (same,) = compare_runs("a", "c", out=tmp_path).cases  # the same machine: the ratio is given
    assert same.to_target.ratio == pytest.approx(2.0)
