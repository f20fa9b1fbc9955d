"""Tests of benchsuite.monitor: held crossings, the stay-converged horizon, the envelope, traces.

Problems are small quadratics built directly (closed forms known); rules are the
tiny classes of ``tests/faulty_rules.py`` or built-in rules by name.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest

from benchsuite.families.quadratic import Quadratic
from benchsuite.monitor import (
    TRACE_DENSE,
    checkpoint_grid,
    envelope_of,
    monitored_pass,
)
from benchsuite.rulespec import build_rule, parse_rule

sys.path.insert(0, str(Path(__file__).parent))
import faulty_rules  # noqa: E402


def _quad(kappa: float = 10.0, d: int = 10) -> Quadratic:
    return Quadratic(d=d, L=1.0, mu=1.0 / kappa, seed=3)


def _pass(q: Quadratic, rule, targets=(1e-2, 1e-4, 1e-6), budget=2000, **kw):
    return monitored_pass(q, rule, x_star=q.x_star, f_star=0.0, targets=targets, budget=budget, **kw)


def test_checkpoint_grid_is_dense_then_geometric() -> None:
    g = checkpoint_grid(1000)
    assert g[:16] == list(range(1, 17))
    assert g[-1] == 1000 and len(set(g)) == len(g) and g == sorted(g)
    for a, b in zip(g[15:-2], g[16:-1]):
        assert b == max(a + 1, int(1.25 * a))  # ratio <= 1.25 after the dense part
    assert checkpoint_grid(0) == [] and checkpoint_grid(1) == [1] and checkpoint_grid(3) == [1, 2, 3]


def test_horizon_runs_after_the_tightest_target_and_stays_converged() -> None:
    q = _quad()
    out = _pass(q, faulty_rules.PlainGD(lr=1.0))
    kstar = out.iters[-1]
    assert out.status == "reached" and out.held == out.iters
    assert out.horizon == max(100, math.ceil(0.5 * kstar)) and out.iterations_run == kstar + out.horizon
    assert out.left_at is None and out.horizon_worst is not None and out.horizon_worst <= 1e-6
    # a custom horizon: 10 steps or 3x the iterations so far
    longer = _pass(q, faulty_rules.PlainGD(lr=1.0), horizon=(10, 3.0))
    assert longer.iters == out.iters and longer.horizon == 3 * kstar


def test_late_blow_up_after_the_tightest_target_is_diverged() -> None:
    q = _quad()
    base = _pass(q, faulty_rules.PlainGD(lr=1.0))
    at = base.iters[-1] + 5  # the step starts growing 5 steps after the tightest target is met
    out = _pass(q, faulty_rules.LateBlowUp(lr=1.0, at=at, grow=1.5))
    assert out.iters == base.iters  # the same crossings: only the horizon sees it
    assert out.status == "diverged" and out.held == (None, None, None)
    assert out.left_at is not None and out.left_at > at


def test_a_kick_after_convergence_sets_left_at_and_unstable_when_not_recovered() -> None:
    q = _quad()
    base = _pass(q, faulty_rules.PlainGD(lr=1.0))
    at = base.iters[-1] + 20
    # back towards the start by half the way: recovered within a long horizon
    recovered = _pass(q, faulty_rules.Kicker(lr=1.0, at=at, kick=0.5), horizon=(2000, 0.0))
    assert recovered.iters == base.iters and recovered.left_at == at and recovered.status == "reached"
    assert recovered.horizon_worst > 1e-6
    assert recovered.held[-1] > at  # held again only after the kick was undone
    # the default horizon ends before it recovers: unstable, tightest target not held
    short = _pass(q, faulty_rules.Kicker(lr=1.0, at=at, kick=0.5), horizon=(25, 0.0))
    assert short.status == "unstable" and short.left_at == at and short.held[-1] is None


def test_transient_crossing_is_not_held() -> None:
    # a kick back to well above 1e-2 after it was first met at k1: 1e-2 is met, left, then held again later
    q = _quad()
    base = _pass(q, faulty_rules.PlainGD(lr=1.0), targets=(1e-2,))
    k1 = base.iters[0]
    out = _pass(q, faulty_rules.Kicker(lr=1.0, at=k1 + 1, kick=0.9), targets=(1e-2, 1e-12), budget=k1 + 3)
    assert out.iters[0] == k1 and out.held[0] is None and out.transient == (True, False)
    assert out.status == "partial"


def test_trace_is_dense_then_geometric_with_crossings_and_the_final_iterate() -> None:
    q = _quad(kappa=100.0, d=20)
    out = _pass(q, faulty_rules.PlainGD(lr=1.0), targets=(0.3, 1e-2, 1e-4, 1e-6, 1e-8), budget=20000)
    tr = out.trace
    it = tr.iteration.tolist()
    assert it[: TRACE_DENSE + 1] == list(range(TRACE_DENSE + 1))
    assert it == sorted(set(it)) and it[-1] == out.iterations_run
    assert set(k for k in out.iters if k is not None) <= set(it)
    later = [k for k in it if k > TRACE_DENSE]
    assert all(b <= max(a + 1, int(1.02 * a)) or b in out.iters or b == it[-1] for a, b in zip(later, later[1:]))
    # the measure and the distance at the trace points are what the pass saw (closed form:
    # GD with step 1/L on a diagonal quadratic, e_k = (1 - lam)^k e_0; relative 1e-9 covers round-off)
    e0 = q.initial_point() - q.x_star
    lam = q.eigenvalues
    for k, m, dist in zip(it[:300], tr.measure[:300], tr.dist[:300]):
        e = (1 - lam) ** k * e0
        assert m == pytest.approx(np.sum(lam * e**2) / np.sum(lam * e0**2), rel=1e-9)
        assert dist == pytest.approx(np.linalg.norm(e) / np.linalg.norm(e0), rel=1e-9)
    assert np.all(np.isnan(tr.seconds))  # filled by the timing replay, not by the pass
    assert tr.grad_calls.tolist() == it  # one gradient call per step


def test_envelope_is_round_off_sized_on_a_contracting_iteration() -> None:
    q = _quad()
    main = _pass(q, faulty_rules.PlainGD(lr=1.0))
    shadows = [_pass(q, faulty_rules.PlainGD(lr=1.0), shadow=s, steps=main.iterations_run) for s in (1, 2)]
    assert all(s.checkpoints == main.checkpoints for s in shadows)
    env = envelope_of(main, shadows)
    assert len(env) == len(main.checkpoints)
    # gradient descent at 1/L contracts every perturbation: a one-ulp-per-step perturbation of the
    # gradient point stays at the round-off level of the measure (1e-12 allows for the measure's
    # own relative round-off as it falls to ~1e-8; measured values are ~1e-15 to 1e-10)
    assert max(env) < 1e-8
    assert max(env) > 0  # the shadows really were perturbed


def test_envelope_grows_where_an_adaptive_rule_amplifies_round_off() -> None:
    # Adam at a fixed step oscillates around the optimum; perturbations are amplified there
    q = _quad(kappa=100.0, d=20)
    rule = lambda: build_rule(parse_rule("adam", {"lr": 0.05}), q.constants()).rule  # noqa: E731
    main = _pass(q, rule(), targets=(1e-2, 1e-4), budget=3000)
    shadows = [_pass(q, rule(), shadow=s, steps=main.iterations_run) for s in (1, 2)]
    env = envelope_of(main, shadows)
    assert env[0] < 1e-12  # the first steps are round-off stable (Adam's first step is lr * sign(g))
    assert max(env) > 1e3 * max(env[:16])  # and the sensitivity grows by orders of magnitude later


def test_envelope_of_a_shadow_that_stopped_early_is_infinite_there() -> None:
    q = _quad()
    main = _pass(q, faulty_rules.PlainGD(lr=1.0))
    short = _pass(q, faulty_rules.PlainGD(lr=1.0), shadow=1, steps=10)
    env = envelope_of(main, [short])
    assert all(math.isfinite(v) for v in env[:10]) and all(math.isinf(v) for v in env[10:])


def test_a_trace_is_sparser_on_large_problems() -> None:
    # each trace point costs one distance (O(d)): above 1e4 unknowns every iteration to 16, then ratio 1.1
    q = Quadratic(d=100_000, L=1.0, mu=1e-3, seed=1)
    out = _pass(q, faulty_rules.PlainGD(lr=1.0), targets=(1e-12,), budget=400)
    it = out.trace.iteration.tolist()
    grid = [0, *range(1, 17)]
    while grid[-1] < 400:
        grid.append(max(grid[-1] + 1, int(grid[-1] * 1.1)))
    assert it == [k for k in grid if k < 400] + [400]  # nothing met: the grid and the final iterate
    assert len(it) < 60
