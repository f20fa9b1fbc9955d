"""Tests of benchsuite.theory: the bounds hold along real trajectories, and apply only when they should.

The trajectories here are hand-written loops of the textbook methods on diagonal
quadratics (not the package's rules): the bounds are checked at every iteration.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchsuite.problem import Constants
from benchsuite.theory import applicable_bound, iterations_for, theory_iterations

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
    c = Constants(L=float(lam[-1]), mu=float(lam[0]), **EXACT)
    rng = np.random.default_rng(0)
    e0 = rng.standard_normal(lam.size)
    bounds = {m: applicable_bound(rule, hyper, c, family="quadratic", oracle="full", measure=m)
              for m in ("subopt", "dist", "gradnorm")}
    assert all(b is not None for b in bounds.values())
    state = None
    e = e0.copy()
    for k in range(1, iters + 1):
        e, state = step(e, lam * e, state)
        got = _measures(lam, e, e0)
        for m, b in bounds.items():
            # the bound is for exact arithmetic; 1e-12 relative slack covers float64 round-off
            assert got[m] <= b(k) * (1 + 1e-12), (rule, m, k, got[m], b(k))


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
