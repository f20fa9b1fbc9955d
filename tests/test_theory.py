"""Tests of benchsuite.theory: the bounds hold along real trajectories, and apply only when they should.

The trajectories here are hand-written loops of the textbook methods on diagonal
quadratics (not the package's rules): the bounds are checked at every iteration.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchsuite.problem import Constants
from benchsuite.catalogue import load_catalogue
from benchsuite.rules import GD, NesterovSC
from benchsuite.rulespec import parse_rule
from benchsuite.monitor import built as _built
from benchsuite.runner import Case, monitored_pass, run_cases
from benchsuite.theory import (
    applicable_bound,
    iterations_for,
    krylov_optimal_measures,
    lower_bound_iterations,
    theory_iterations,
)

EXACT = dict(L_kind="exact", mu_kind="exact")


def _spectrum(kappa: float, d: int = 40) -> np.ndarray:
    return np.geomspace(1.0 / kappa, 1.0, d)


def _measures(lam: np.ndarray, e: np.ndarray, e0: np.ndarray) -> dict[str, float]:
    return {
        "subopt": float(lam @ e**2 / (lam @ e0**2)),
        "dist": float(np.linalg.norm(e) / np.linalg.norm(e0)),
        "gradnorm": float(np.linalg.norm(lam * e) / np.linalg.norm(lam * e0)),
    }


def _check_along(rule: str, hyper: dict, lam: np.ndarray, step, iters: int = 600) -> None:
    """The bound for a quadratic family and the general one (family "logistic") both hold."""
    c = Constants(L=float(lam[-1]), mu=float(lam[0]), **EXACT)
    rng = np.random.default_rng(0)
    e0 = rng.standard_normal(lam.size)
    for family in ("quadratic", "logistic"):
        if rule == "heavy_ball" and family == "logistic":
            continue  # the heavy-ball bound is for quadratics only
        _check_family(rule, hyper, c, family, lam, e0, step, iters)


def _check_family(rule: str, hyper: dict, c: Constants, family: str, lam: np.ndarray, e0: np.ndarray, step,
                  iters: int) -> None:
    bounds = {m: applicable_bound(rule, hyper, c, family=family, oracle="full", measure=m)
              for m in ("subopt", "dist", "gradnorm")}
    assert all(b is not None for b in bounds.values())
    state = None
    e = e0.copy()
    for k in range(1, iters + 1):
        e, state = step(e, lam * e, state)
        got = _measures(lam, e, e0)
        for m, b in bounds.items():
            # the bound is for exact arithmetic; 1e-12 relative slack covers float64 round-off
            assert got[m] <= b(k) * (1 + 1e-12), (rule, family, m, k, got[m], b(k))


@pytest.mark.parametrize("kappa", [3.0, 50.0, 1e3])
def test_gd_bounds_hold(kappa: float) -> None:
    lam = _spectrum(kappa)

    def step(e, g, s):
        return e - g / lam[-1], s

    _check_along("gd", {"lr": 1.0 / lam[-1]}, lam, step)


@pytest.mark.parametrize("kappa", [3.0, 50.0, 1e3])
def test_heavy_ball_bounds_hold(kappa: float) -> None:
    lam = _spectrum(kappa)
    L, mu = lam[-1], lam[0]
    lr = 4.0 / (math.sqrt(L) + math.sqrt(mu)) ** 2
    beta = ((math.sqrt(kappa) - 1) / (math.sqrt(kappa) + 1)) ** 2

    def step(e, g, prev):
        prev = e if prev is None else prev  # x_{-1} = x_0
        return e - lr * g + beta * (e - prev), e

    _check_along("heavy_ball", {"lr": lr, "momentum": beta}, lam, step)


@pytest.mark.parametrize("kappa", [3.0, 50.0, 1e3])
def test_nesterov_bounds_hold_at_the_extrapolated_point(kappa: float) -> None:
    lam = _spectrum(kappa)
    L = lam[-1]
    beta = (math.sqrt(kappa) - 1) / (math.sqrt(kappa) + 1)

    def step(y, g, x_prev):
        x_prev = y if x_prev is None else x_prev
        x = y - g / L
        return x + beta * (x - x_prev), x

    _check_along("nesterov_sc", {"lr": 1.0 / L, "momentum": beta}, lam, step)


def test_heavy_ball_bound_is_tight_in_rate() -> None:
    # the (2k+1) rho^k envelope is attained in rate by the double-root modes at mu and L:
    # the measured distance after 300 steps is within a factor 1e3 of the bound (not vacuous)
    lam = np.array([0.01, 1.0])
    kappa = 100.0
    lr = 4.0 / (1.0 + 0.1) ** 2
    rho = 9.0 / 11.0
    e0 = np.array([1.0, 0.0])
    e, prev = e0.copy(), e0.copy()
    for _ in range(300):
        e, prev = e - lr * lam * e + rho**2 * (e - prev), e
    bound = applicable_bound("heavy_ball", {"lr": lr, "momentum": rho**2},
                             Constants(L=1.0, mu=0.01, **EXACT), family="quadratic", oracle="full", measure="dist")
    assert bound is not None and kappa == 1.0 / 0.01
    assert bound(300) / 1e3 < np.linalg.norm(e) <= bound(300)


def test_conditions() -> None:
    c = Constants(L=2.0, mu=0.1, **EXACT)
    kw = dict(family="quadratic", oracle="full", measure="subopt")
    assert applicable_bound("gd", {"lr": 0.5}, c, **kw) is not None
    assert applicable_bound("gd", {"lr": 0.4}, c, **kw) is None  # not 1/L
    assert applicable_bound("gd", {"lr": 0.5}, c, family="quadratic", oracle="minibatch", measure="subopt") is None
    assert applicable_bound("my.mod:GD", {"lr": 0.5}, c, **kw) is None
    assert applicable_bound("gd", {"lr": 0.5}, Constants(L=2.0, L_kind="exact"), **kw) is None  # mu unknown
    # an upper bound on L is fine: the rate holds with the L the step was tuned with
    assert applicable_bound("gd", {"lr": 0.25}, Constants(L=4.0, mu=0.1, L_kind="bound", mu_kind="exact"), **kw)
    hb = {"lr": 4.0 / (math.sqrt(2.0) + math.sqrt(0.1)) ** 2,
          "momentum": ((math.sqrt(20.0) - 1) / (math.sqrt(20.0) + 1)) ** 2}
    assert applicable_bound("heavy_ball", hb, c, **kw) is not None
    assert applicable_bound("heavy_ball", hb, c, family="logistic", oracle="full", measure="subopt") is None
    assert applicable_bound("heavy_ball", {**hb, "momentum": 0.9}, c, **kw) is None


@pytest.mark.parametrize("rule", ["gd", "heavy_ball", "nesterov_sc"])
@pytest.mark.parametrize("target", [0.5, 1e-2, 1e-5, 1e-9])
def test_iterations_for_is_the_first_k_below_target(rule: str, target: float) -> None:
    L, mu = 1.0, 1e-2
    s = 10.0
    hyper = {"gd": {"lr": 1.0}, "heavy_ball": {"lr": 4.0 / 1.1**2, "momentum": (9 / 11) ** 2},
             "nesterov_sc": {"lr": 1.0, "momentum": (s - 1) / (s + 1)}}[rule]
    b = applicable_bound(rule, hyper, Constants(L=L, mu=mu, **EXACT), family="quadratic", oracle="full", measure="subopt")
    assert b is not None
    k = iterations_for(b, target)
    brute = next(j for j in range(100000) if b(j) <= target)  # plain scan
    assert k == brute
    assert theory_iterations(b, [target]) == (k,)
    assert theory_iterations(None, [target, 0.1]) == (None, None)


# -- tighter bounds on quadratics -----------------------------------------------------------
def _kappa10() -> tuple[Constants, dict, dict]:
    s = math.sqrt(10.0)
    return (Constants(L=1.0, mu=0.1, **EXACT), {"lr": 1.0}, {"lr": 1.0, "momentum": (s - 1) / (s + 1)})


def test_quadratic_bounds_are_the_squared_rates() -> None:
    c, gd, nes = _kappa10()
    kw = dict(oracle="full", measure="subopt")
    q = applicable_bound("gd", gd, c, family="least_squares", **kw)
    general = applicable_bound("gd", gd, c, family="logistic", **kw)
    assert q is not None and general is not None
    assert q(7) == pytest.approx(0.9**14, rel=1e-12) and general(7) == pytest.approx(0.9**7, rel=1e-12)  # round-off
    n = applicable_bound("nesterov_sc", nes, c, family="ridge", **kw)
    assert n is not None and n(5) == pytest.approx(11**2 * (1 - 1 / math.sqrt(10)) ** 10, rel=1e-12)
    # at kappa = 10 the quadratic Nesterov bound sits far below GD's count, the general one does not
    assert theory_iterations(n, [1e-8]) == (36,)
    assert theory_iterations(applicable_bound("nesterov_sc", nes, c, family="logistic", **kw), [1e-8]) == (62,)


class _MomentumLost(NesterovSC):
    """BROKEN on purpose: reports the textbook momentum but steps with none (plain GD at 1/L)."""

    def step(self, x, g, state):
        state["k"] += 1
        from benchsuite.rules import _XYNesterov

        return _XYNesterov.step_xy(self.lr, 0.0, x, g, state), state


class _ShortStep(GD):
    """BROKEN on purpose: reports lr but steps 0.45 lr."""

    def step(self, x, g, state):
        state.axpy(-0.45 * self.lr, g, x)
        return x, state


def _count(name: str, rule, targets) -> tuple[int | None, ...]:
    built = _built(load_catalogue()[name])
    out = monitored_pass(built.problem, rule, x_star=built.x_star, f_star=built.f_star, targets=targets, budget=10_000)
    return out.iters


@pytest.mark.parametrize("broken", ["momentum", "step"])
def test_broken_rules_violate_the_quadratic_bound_and_not_the_general_one(broken: str) -> None:
    name = "quad-diag-kappa10-d10"  # kappa = 10 exactly (L = 1, mu = 0.1)
    inst = load_catalogue()[name]
    c = _built(inst).constants
    _, gd, nes = _kappa10()
    rule_name, hyper, good, bad = (
        ("nesterov_sc", nes, NesterovSC(**nes), _MomentumLost(**nes)) if broken == "momentum"
        else ("gd", gd, GD(**gd), _ShortStep(**gd))
    )
    t = inst.targets
    tight = theory_iterations(applicable_bound(rule_name, hyper, c, family="quadratic", oracle="full",
                                               measure="subopt"), t)
    loose = theory_iterations(applicable_bound(rule_name, hyper, c, family="logistic", oracle="full",
                                               measure="subopt"), t)
    ok, wrong = _count(name, good, t), _count(name, bad, t)
    assert all(m is not None and m <= b for m, b in zip(ok, tight)), (ok, tight)
    assert wrong[-1] is not None and wrong[-1] > tight[-1], (wrong, tight)  # flagged now
    assert wrong[-1] <= loose[-1], (wrong, loose)  # ... and it was not under the general rate


# -- lower bound: the Krylov optimum --------------------------------------------------------
def _textbook_cg(lam: np.ndarray, w: np.ndarray, steps: int) -> list[float]:
    """Relative suboptimality of plain conjugate gradients (Hestenes & Stiefel 1952) on diag(lam)."""
    e = w.copy()
    r = -lam * e  # residual b - A x = -A e
    p = r.copy()
    f0 = lam @ w**2
    out = [1.0]
    for _ in range(steps):
        ap = lam * p
        a = (r @ r) / (p @ ap)
        e = e + a * p
        r_new = r - a * ap
        p = r_new + (r_new @ r_new) / (r @ r) * p
        r = r_new
        out.append(float(lam @ e**2 / f0))
    return out


def test_krylov_optimum_is_conjugate_gradients() -> None:
    lam = np.geomspace(0.1, 1.0, 10)
    w = np.random.default_rng(3).standard_normal(10)
    got = krylov_optimal_measures(lam, w, "subopt", 9)
    want = _textbook_cg(lam, w, 9)
    # kappa = 10, 9 steps: plain CG keeps orthogonality to ~1e-13 here; 1e-8 relative (closed form recurrence)
    np.testing.assert_allclose(got, want, rtol=1e-8, atol=1e-22)
    assert krylov_optimal_measures(lam, w, "subopt", 10)[10] < 1e-20  # exact after d distinct eigenvalues


@pytest.mark.parametrize("measure", ["subopt", "dist", "gradnorm"])
def test_krylov_optimum_beats_gradient_descent_at_every_step(measure: str) -> None:
    lam = np.geomspace(1e-3, 1.0, 60)
    w = np.random.default_rng(4).standard_normal(60)
    best = krylov_optimal_measures(lam, w, measure, 60)
    assert np.all(np.diff(best) <= 1e-15)  # nested spaces: never worse (1e-15: round-off)
    a = {"subopt": 1, "dist": 0, "gradnorm": 2}[measure]
    e = w.copy()
    for k in range(1, 61):
        e = e * (1 - lam)  # GD with step 1/L = 1 lies in the same Krylov space
        ratio = np.sqrt(lam**a @ e**2 / (lam**a @ w**2))
        gd = ratio**2 if measure == "subopt" else ratio
        assert best[k] <= gd * (1 + 1e-9), (k, best[k], gd)  # 1e-9: round-off of both sides


QUAD_SMALL = ["quad-diag-kappa10-d10", "quad-diag-kappa100-d50", "quad-rot-kappa1e3-d100", "lsq-kappa1e2-500x50",
              "ridge-rho0.7-500x50", "quad-diag-tiny-kappa10-d20", "quad-diag-kappa3e3-d30", "lsq-kappa3e3-400x40"]


def test_builtin_counts_lie_between_lower_and_upper_bounds() -> None:
    cat = load_catalogue()
    rules = ("gd", "nesterov_sc", "heavy_ball", "nesterov")
    cases = [Case(cat[n], parse_rule(r, {})) for n in QUAD_SMALL for r in rules]
    for res in run_cases(cases, jobs=1, timing=False, progress=False):
        case = res.case
        lower = lower_bound_iterations(case.rule.name, _built(case.instance).problem, case.run_targets,
                                       measure=case.run_measure, oracle=case.oracle)
        got = res.outcomes[0].iters
        assert all(lb is not None for lb in lower), (case.key(), lower)
        for j, (lb, m) in enumerate(zip(lower, got)):
            assert m is not None and lb <= m, (case.key(), j, lb, m)
            ub = res.theory_bound[j]
            if case.rule.name != "nesterov":  # no published linear rate for the convex schedule
                assert ub is not None and m <= ub, (case.key(), j, m, ub)
        # the lower bound is not vacuous: the accelerated methods come within a factor 4 of it
        # where the dimension is not far below sqrt(kappa) ln(1/t) (on quad-diag-kappa3e3-d30,
        # d = 30, CG's finite termination puts the bound at 29 and accelerated methods need ~370)
        if case.rule.name in ("nesterov_sc", "heavy_ball") and case.instance.name in QUAD_SMALL[:5]:
            assert got[-1] <= 4 * lower[-1], (case.key(), got, lower)


def test_lower_bound_applies_only_where_it_holds() -> None:
    cat = load_catalogue()
    quad = _built(cat["quad-diag-kappa10-d10"]).problem
    t = (1e-2, 1e-8)
    assert lower_bound_iterations("gd", quad, t) == (3, 10)  # 10 distinct eigenvalues: exact at k = 10
    assert lower_bound_iterations("adam", quad, t) == (None, None)  # diagonal scaling leaves the Krylov space
    assert lower_bound_iterations("gd", quad, t, oracle="minibatch") == (None, None)
    assert lower_bound_iterations("my.mod:GD", quad, t) == (None, None)
    logreg = _built(cat["logreg-dense-500x50"]).problem
    assert lower_bound_iterations("gd", logreg, t) == (None, None)  # not a quadratic
    f32 = cat["quad-diag-kappa10-d10"].build(dtype="float32")
    assert lower_bound_iterations("gd", f32, t) == (None, None)
    # Longley (kappa ~ 2e19): a dense eigh cannot resolve the small eigenvalues, so no bound
    assert lower_bound_iterations("gd", cat["nist-longley"].build(), t) == (None, None)


def test_a_wrong_measurement_shows_below_the_lower_bound() -> None:
    # a monitored pass fed an f* that is too high (off by 1e-3 of f(x0) - f*) "meets" 1e-8
    # as soon as the true suboptimality is 1e-3: nesterov_sc then lands below the Krylov bound
    name = "quad-rot-kappa1e3-d100"
    built = _built(load_catalogue()[name])
    f0 = built.problem.value(built.problem.initial_point())
    wrong_f_star = built.f_star + 1e-3 * (f0 - built.f_star)
    hyper = {"lr": 1.0 / built.constants.L,
             "momentum": (math.sqrt(1e3) - 1) / (math.sqrt(1e3) + 1)}
    out = monitored_pass(built.problem, NesterovSC(**hyper), x_star=built.x_star, f_star=wrong_f_star,
                         targets=(1e-8,), budget=10_000)
    (lower,) = lower_bound_iterations("nesterov_sc", built.problem, (1e-8,))
    assert out.iters[0] is not None and lower is not None and out.iters[0] < lower, (out.iters, lower)


def test_targets_at_or_above_one_get_no_bound() -> None:
    # a measure is 1 at x_0: a bound of "0 iterations" for t >= 1 would flag every crossing
    c, gd, _ = _kappa10()
    b = applicable_bound("gd", gd, c, family="quadratic", oracle="full", measure="subopt")
    assert theory_iterations(b, [1.0, 2.0, 0.5]) == (None, None, 4)  # 0.9^6 = 0.53 > 0.5 >= 0.9^8 = 0.43
    quad = _built(load_catalogue()["quad-diag-kappa10-d10"]).problem
    assert lower_bound_iterations("gd", quad, (1.0, 5.0)) == (None, None)


def test_no_upper_bound_for_a_float32_iterate() -> None:
    # round-off of float32 (~6e-8 per operation) is the size of its tight targets: no exact-arithmetic rate
    c, gd, _ = _kappa10()
    kw = dict(family="quadratic", oracle="full", measure="dist")
    assert applicable_bound("gd", gd, c, dtype="float64", **kw) is not None
    assert applicable_bound("gd", gd, c, dtype=np.float64, **kw) is not None
    assert applicable_bound("gd", gd, c, dtype="float32", **kw) is None
    assert applicable_bound("gd", gd, c, dtype=np.dtype(np.float32), **kw) is None
