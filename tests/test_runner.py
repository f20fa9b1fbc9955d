"""Tests of benchsuite.runner: exact first crossings, theory bounds, determinism, containment.

Rules used here are tiny classes written in the tests (``tests/faulty_rules.py``)
or the built-in ones by name; problems are the Quadratic family built directly
or small catalogue instances.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.catalogue import load_catalogue, select
from benchsuite.families.quadratic import Quadratic
from benchsuite.optimum import certified_optimum
from benchsuite.oracle import OracleSpec
from benchsuite.rulespec import parse_rule
from benchsuite.runner import (
    Case,
    aggregate_status,
    monitored_pass,
    replay_seconds,
    result_from_dict,
    result_to_dict,
    run_cases,
    to_frame,
)

TESTS = Path(__file__).parent
sys.path.insert(0, str(TESTS))  # faulty_rules importable in this process and its forked workers

import faulty_rules  # noqa: E402


@pytest.fixture(scope="module")
def catalogue():
    return load_catalogue()


@pytest.fixture(scope="module")
def quad(catalogue):
    inst = catalogue["quad-diag-kappa10-d10"]
    certified_optimum(inst)  # warm the reference cache once, before workers start
    return inst


@pytest.fixture(scope="module")
def lsq(catalogue):
    inst = catalogue["lsq-kappa1e2-500x50"]
    certified_optimum(inst)
    return inst


# -- exactness -----------------------------------------------------------------------
def _closed_form_subopt(lam: np.ndarray, e0: np.ndarray, lr: float, k: int) -> float:
    # Closed form for gradient descent on f(x) = 1/2 sum_i lam_i (x_i - x*_i)^2:
    # e_{k+1} = e_k - lr * lam * e_k, so e_{k,i} = (1 - lr lam_i)^k e_{0,i} and
    # f(x_k) - f* = 1/2 sum_i lam_i (1 - lr lam_i)^(2k) e_{0,i}^2; dividing by
    # f(x_0) - f* = 1/2 sum_i lam_i e_{0,i}^2 gives the relative suboptimality.
    return float(np.sum(lam * (1 - lr * lam) ** (2 * k) * e0**2) / np.sum(lam * e0**2))


SPECTRA = {
    "three": [0.1, 0.5, 1.0],
    "geometric-1e2": list(np.geomspace(1e-2, 1.0, 10)),
    "linear-20": list(np.linspace(0.05, 2.0, 20)),
}


@pytest.mark.parametrize("spectrum", sorted(SPECTRA))
@pytest.mark.parametrize("step", [1.0, 1.5, 0.3])
def test_gd_first_crossings_equal_the_closed_form(spectrum: str, step: float) -> None:
    q = Quadratic(eigenvalues=SPECTRA[spectrum], seed=7)
    lam = q.eigenvalues
    lr = step / lam[-1]  # step in units of 1/L; all below 2/L so every mode contracts
    e0 = q.initial_point() - q.x_star
    targets = [0.3, 1e-2, 3.7e-4, 1e-6, 2e-9, 1e-11]
    budget = 4000
    out = monitored_pass(q, faulty_rules.PlainGD(lr=lr), x_star=q.x_star, f_star=0.0, targets=targets, budget=budget)
    # the pass may run past the budget by the stay-converged horizon, max(100, ceil(k*/2)) steps
    r = [_closed_form_subopt(lam, e0, lr, k) for k in range(budget + max(100, math.ceil(budget / 2)) + 1)]
    checked = 0
    for j, t in enumerate(targets):
        k_exact = next((k for k in range(budget + 1) if r[k] <= t), None)
        if k_exact is not None:
            near = [r[k_exact]] + ([r[k_exact - 1]] if k_exact > 0 else [])
            # a crossing within 1e-9 relative of the target could flip on float64 round-off
            # (the iterate carries ~k * 1e-16 relative error): not a fair exactness check
            if any(abs(v - t) <= 1e-9 * t for v in near):
                continue
        assert out.iters[j] == k_exact, (t, out.iters[j], k_exact)
        assert out.grad_calls[j] == k_exact and out.epochs[j] is None  # not a finite sum
        checked += 1
    assert checked >= 4
    # fingerprint: the measure at each checkpoint (every iteration to 16, then a geometric
    # grid of ratio 1.25, then the final iterate); rel 1e-9 covers accumulated round-off
    assert len(out.checkpoints) == len(out.fingerprint)
    assert list(out.checkpoints[: min(16, out.iterations_run)]) == list(range(1, min(16, out.iterations_run) + 1))
    assert all(a < b <= max(a + 1, int(1.25 * a)) for a, b in zip(out.checkpoints[:-2], out.checkpoints[1:-1]))
    assert out.checkpoints[-1] == out.iterations_run
    # Checked where r >= 1e-12: deeper (the horizon runs into it) the measure is
    # (|x_k - x*| / |x_0 - x*|)^2 with x_k - x* itself at the round-off of x* (~1e-16 |x*|), so
    # 1e-9 relative is no longer a fair demand there; the crossings above cover down to 1e-11.
    for k, v in zip(out.checkpoints, out.fingerprint):
        if r[k] >= 1e-12:
            assert v == pytest.approx(r[k], rel=1e-9, abs=1e-300)
    # GD below 2/L decreases f monotonically on a quadratic: every crossing is held
    assert out.held == out.iters
    if all(k is not None for k in out.iters):  # the horizon ran, and the pass stayed converged
        kstar = out.iters[-1]
        assert out.horizon == max(100, math.ceil(kstar / 2)) and out.iterations_run == kstar + out.horizon
        assert out.left_at is None and out.horizon_worst <= targets[-1]
    else:
        assert out.iterations_run == budget and out.horizon == 0
    assert out.status == ("reached" if all(k is not None for k in out.iters) else "partial")


@given(
    lam=st.lists(st.floats(0.01, 1.0), min_size=1, max_size=8),
    step=st.floats(0.05, 1.9),
    target=st.sampled_from([1e-1, 1e-3, 1e-6, 1e-9]),
    seed=st.integers(0, 1000),
)
@settings(max_examples=40, deadline=None)
def test_gd_first_crossing_property(lam: list[float], step: float, target: float, seed: int) -> None:
    q = Quadratic(eigenvalues=lam, seed=seed)
    lams = q.eigenvalues
    lr = step / lams[-1]
    e0 = q.initial_point() - q.x_star
    budget = 3000
    k_exact = next((k for k in range(budget + 1) if _closed_form_subopt(lams, e0, lr, k) <= target), None)
    if k_exact is not None:
        near = [_closed_form_subopt(lams, e0, lr, k) for k in {k_exact, max(k_exact - 1, 0)}]
        # skip crossings within 1e-9 relative of the target (float64 round-off could flip them)
        if any(abs(v - target) <= 1e-9 * target for v in near):
            return
    out = monitored_pass(q, faulty_rules.PlainGD(lr=lr), x_star=q.x_star, f_star=0.0, targets=[target], budget=budget)
    assert out.iters[0] == k_exact


def test_dist_and_gradnorm_crossings_equal_the_closed_form() -> None:
    q = Quadratic(eigenvalues=[0.2, 0.7, 1.0, 3.0], seed=2)
    lam, lr = q.eigenvalues, 0.5 / 3.0
    e0 = q.initial_point() - q.x_star
    for measure, weight in (("dist", np.ones_like(lam)), ("gradnorm", lam**2)):
        # |e_k|^2 (dist) or |lam e_k|^2 (gradnorm), per mode (1 - lr lam)^(2k) times the start
        def rel(k: int) -> float:
            return math.sqrt(np.sum(weight * (1 - lr * lam) ** (2 * k) * e0**2) / np.sum(weight * e0**2))

        targets = [1e-1, 1e-3, 1e-5]
        out = monitored_pass(q, faulty_rules.PlainGD(lr=lr), x_star=q.x_star, f_star=0.0, targets=targets,
                             budget=2000, measure=measure)
        for j, t in enumerate(targets):
            assert out.iters[j] == next(k for k in range(2001) if rel(k) <= t)


def test_budget_and_partial_status() -> None:
    q = Quadratic(eigenvalues=[0.01, 1.0], seed=1)
    out = monitored_pass(q, faulty_rules.PlainGD(lr=1.0), x_star=q.x_star, f_star=0.0, targets=[0.5, 1e-12], budget=50)
    assert out.status == "partial" and out.iters[1] is None and out.iterations_run == 50
    out = monitored_pass(q, faulty_rules.PlainGD(lr=1e-9), x_star=q.x_star, f_star=0.0, targets=[0.5], budget=20)
    assert out.status == "budget" and out.iters == (None,)
    assert aggregate_status(["reached", "partial"]) == "partial"
    assert aggregate_status(["reached", "timeout", "error"]) == "error"
    assert aggregate_status(["budget", "budget"]) == "budget"


def test_minibatch_counts_gradients_and_epochs(lsq) -> None:
    problem = lsq.build()
    opt = certified_optimum(lsq)
    out = monitored_pass(problem, faulty_rules.PlainGD(lr=0.2), x_star=opt.x_star, f_star=opt.f_star,
                         targets=[0.5, 0.1], budget=500, oracle=OracleSpec("minibatch", 50, True),
                         problem_key=lsq.problem_hash(), seed=3)
    n = problem.n_samples
    for k, calls, ep in zip(out.iters, out.grad_calls, out.epochs):
        assert k is not None and calls == k
        assert ep == pytest.approx(k * 50 / n, rel=1e-15)  # B samples per step, exactly


# -- the theory bound over the catalogue -----------------------------------------------
def test_measured_iterations_never_exceed_the_theory_bound(catalogue) -> None:
    # every small-tier instance whose L and mu are known (exact or certified bounds)
    instances = []
    for inst in select(catalogue, None, tier="small"):
        c = inst.build().constants()
        if c.L is not None and c.mu:
            certified_optimum(inst)
            instances.append(inst)
    quadratic = {"quadratic", "least_squares", "ridge"}
    assert {i.family for i in instances} >= quadratic | {"logistic"}
    cases = [Case(i, parse_rule(r)) for i in instances for r in ("gd", "heavy_ball", "nesterov_sc")]
    results = run_cases(cases, jobs=2, timing=False, progress=False)
    with_bound = 0
    for r in results:
        for j, b in enumerate(r.theory_bound):
            k = r.outcomes[0].iters[j]
            if b is not None and k is not None:
                with_bound += 1
                assert k <= b, (r.case.key(), j, k, b)
        assert not any(r.bound_violated())
        assert not any(r.below_lower()), (r.case.key(), r.theory_lower)  # the Krylov lower bound holds
        float32 = dict(r.case.instance.params).get("dtype") == "float32"  # round-off at the targets' size: no bound
        if r.case.instance.family in quadratic and not float32:
            # textbook parameters on a quadratic: every target has a bound, and it is reached
            assert r.status == "reached" and None not in r.theory_bound, r.case.key()
    assert with_bound > 3 * 4 * len([i for i in instances if i.family in quadratic])  # logistic etc. add more


# -- determinism --------------------------------------------------------------------------
def _fingerprints(results):
    return [(r.case.key(), r.status, [(o.seed, o.iters, o.grad_calls, o.epochs, o.fingerprint, o.final_measure)
                                      for o in r.outcomes]) for r in results]


def test_identical_across_reruns_and_job_counts(quad, lsq) -> None:
    cases = [Case(quad, parse_rule(r)) for r in ("gd", "heavy_ball", "adam")]
    cases += [Case(lsq, parse_rule("gd", ["lr=0.3"]), "minibatch", 25, replace, (0, 1, 2), budget=300)
              for replace in (True, False)]
    a = run_cases(cases, jobs=1, timing=False, progress=False)
    b = run_cases(cases, jobs=2, timing=False, progress=False)
    c = run_cases(cases, jobs=2, timing=False, progress=False)
    assert _fingerprints(a) == _fingerprints(b) == _fingerprints(c)
    # different seeds draw different minibatches (the stochastic cases are really stochastic)
    fm = [o.fingerprint for o in a[3].outcomes]
    assert fm[0] != fm[1]


# -- containment of misbehaving rules ----------------------------------------------------------
def test_raising_nan_hanging_and_contract_breaking_rules_are_contained(quad) -> None:
    spec = lambda name: parse_rule(f"faulty_rules:{name}")  # noqa: E731
    cases = [Case(quad, spec(n)) for n in ("Raiser", "NaNer", "Hanger", "WrongShape")]
    cases.append(Case(quad, parse_rule("gd")))
    results = run_cases(cases, jobs=2, timing=True, repeats=2, timeout=1.0, progress=False)
    status = {r.case.rule.name.split(":")[1] if ":" in r.case.rule.name else r.case.rule.name: r for r in results}
    raised = status["Raiser"].outcomes[0]
    assert raised.status == "error" and "planted failure" in raised.error and "Traceback" in raised.error
    assert raised.iterations_run == 2  # steps 1 and 2 ran, step 3 raised
    assert status["NaNer"].status == "diverged" and status["NaNer"].outcomes[0].iterations_run == 3
    hung = status["Hanger"].outcomes[0]
    assert hung.status == "timeout" and "worker terminated" in hung.error
    # the worker was killed inside step 3: the two steps it finished are still known
    assert hung.iterations_run == 2 and "after 2 iterations" in hung.error
    assert status["WrongShape"].status == "error" and "shape" in status["WrongShape"].outcomes[0].error
    good = status["gd"]
    assert good.status == "reached"
    o = good.outcomes[0]
    assert all(t is not None and t > 0 for t in o.time_to_target) and o.time_per_step > 0
    # time to a later target is not shorter than to an earlier one (same replays, cumulative)
    assert list(o.time_to_target) == sorted(o.time_to_target)
    # broken cases get no replay
    assert status["Raiser"].outcomes[0].time_to_target == ()


def test_replay_seconds_and_round_trip(quad) -> None:
    case = Case(quad, parse_rule("gd"))
    [res] = run_cases([case], jobs=1, timing=True, repeats=3, progress=False)
    k = res.outcomes[0].iters[-1]
    assert replay_seconds(case, res.hyperparams, 0, k) > 0
    again = result_from_dict(case, result_to_dict(res))
    assert again == res
    df = to_frame([res])
    assert len(df) == len(case.run_targets) and list(df.iterations) == list(res.outcomes[0].iters)


# -- per-rule hyperparameters and plan notes ---------------------------------------------------
def test_split_rule_reads_the_printed_label_form() -> None:
    from benchsuite.errors import UserError
    from benchsuite.runner import split_rule

    assert split_rule("adam") == ("adam", {})
    assert split_rule("adam(lr=0.01, beta2=0.99)") == ("adam", {"lr": 0.01, "beta2": 0.99})
    assert split_rule("mod.sub:Rule(betas=(0.9, 0.999), lr=1e-3)") == ("mod.sub:Rule", {"betas": (0.9, 0.999), "lr": 1e-3})
    # the label the tool prints round-trips
    spec = parse_rule("adam", {"lr": 0.01, "eps": 1e-6, "betas": (0.8, 0.99)})
    assert split_rule(spec.label) == ("adam", dict(spec.params))
    for bad in ("adam(lr)", "adam(lr=1, lr=2)", "(lr=1)"):
        with pytest.raises(UserError, match="--rule"):
            split_rule(bad)


def test_one_run_gives_different_hyperparameters_to_different_rules() -> None:
    from benchsuite.errors import UserError
    from benchsuite.runner import RunRequest, plan_cases

    req = RunRequest.make(rules=["adam(lr=0.01)", "gd", "rmsprop(lr=0.001)"], problems="quad-diag-kappa10-d10")
    plan = plan_cases(req, None)
    assert [c.rule.label for c in plan.cases] == ["adam(lr=0.01)", "gd", "rmsprop(lr=0.001)"]
    with pytest.raises(UserError, match="both in the rule and in --param"):
        plan_cases(RunRequest.make(rules=["adam(lr=0.01)"], params=["lr=0.1"], problems="quad-diag-kappa10-d10"), None)


def test_request_horizon_dtype_and_start_are_validated_and_reach_the_cases(tmp_path) -> None:
    from benchsuite.errors import UserError
    from benchsuite.runner import RunRequest, parse_horizon, plan_cases

    assert parse_horizon(None) == (100, 0.5) and parse_horizon("10,2") == (10, 2.0) and parse_horizon([0, 0]) == (0, 0.0)
    for bad in ("10", "a,b", "-1,0.5", "1,inf"):
        with pytest.raises(UserError, match="--horizon"):
            parse_horizon(bad)
    req = RunRequest.make(rules="gd", problems="quad-diag-kappa10-d10", horizon="10,2", dtype="float32")
    (case,) = plan_cases(req, None).cases
    assert case.horizon == (10, 2.0) and case.dtype == "float32"
    assert RunRequest.from_dict(req.to_dict()) == req
    old = req.to_dict()
    del old["horizon"], old["dtype"], old["start"]  # meta.json of a run recorded before these existed
    assert RunRequest.from_dict(old).horizon == (100, 0.5)
    with pytest.raises(UserError, match="--dtype"):
        RunRequest.make(dtype="float16")
    with pytest.raises(UserError, match="--start"):
        RunRequest.make(start=3)
    with pytest.raises(UserError, match="catalogue instance"):
        plan_cases(RunRequest.make(rules="gd", problems="nist-misra1a", start=2), None)
    # a StRD file given by path runs from its second certified start
    dat = Path(__file__).parents[1] / "benchsuite" / "data" / "strd" / "Misra1a.dat"
    (case,) = plan_cases(RunRequest.make(rules="gd", problems=str(dat), start=2), None).cases
    assert case.instance.name == "Misra1a-start2" and dict(case.instance.params)["start"] == 2


def test_progress_reaches_the_total_when_cases_fail(quad, capsys) -> None:
    spec = lambda name: parse_rule(f"faulty_rules:{name}")  # noqa: E731
    cases = [Case(quad, spec("Raiser")), Case(quad, spec("NaNer")), Case(quad, parse_rule("gd"))]
    run_cases(cases, jobs=1, timing=True, repeats=2, progress=None)
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("benchsuite: [")]
    # 3 cases run + 3 counted for timing (the failed ones need no replay but are still counted)
    assert lines[-1].startswith("benchsuite: [6/6]"), lines
    assert [int(ln.split("[")[1].split("/")[0]) for ln in lines] == list(range(1, 7))


def test_float32_targets_below_the_resolution_floor_are_neither_reached_nor_failed(catalogue) -> None:
    # logreg-dense-500x50 in float32: 1e-8 relative suboptimality lies below what float32 resolves
    # there (benchsuite.precision: the floor is u sqrt(|f*| f0)/(f0 - f*) for the value, u = 6e-8),
    # so the runner drops it from the pass and marks it; the float64 run marks nothing
    inst = catalogue["logreg-dense-500x50"]
    certified_optimum(inst)
    r32, r64 = run_cases([Case(inst, parse_rule("gd"), dtype="float32"), Case(inst, parse_rule("gd"))],
                         jobs=1, timing=False, progress=False)
    assert any(r32.unreachable) and not any(r64.unreachable)
    assert r32.unreachable[-1]  # the tightest is the first to go
    for j, u in enumerate(r32.unreachable):
        if u:
            assert r32.outcomes[0].iters[j] is None and r32.outcomes[0].held[j] is None
    assert r32.status == "reached"  # every target it can resolve was met and held
    again = result_from_dict(r32.case, result_to_dict(r32))
    assert again.unreachable == r32.unreachable
    assert to_frame([r32])["unreachable"].tolist() == [bool(u) for u in r32.unreachable]


def test_minibatch_plan_skips_problems_with_fewer_samples_than_the_batch() -> None:
    from benchsuite.runner import RunRequest, plan_cases

    plan = plan_cases(RunRequest.make(rules="gd", problems="mgh-beale,lsq-kappa1e2-500x50", batch=32), None)
    assert [c.instance.name for c in plan.cases] == ["lsq-kappa1e2-500x50"]
    assert any("mgh-beale has only 3 samples" in n for n in plan.notes)
