"""The built-in default set (the small tier): it contains the cases that make classic bugs visible.

``benchsuite run`` and ``benchsuite baseline`` use the small tier by default, so a bug
that changes nothing there passes the default gate. Checked here with real runs
(``run_cases``, full gradient, deterministic, no timing):

* the set holds small gradients, badly scaled coordinates, a coordinate whose gradient
  is exactly 0 (and stays 0), a float32 iterate against a tight distance target, and
  long cases (1e4 or more steps of gradient descent at its published step 1/L);
* each planted precision bug of ``tests/broken_rules.py`` (section "precision bugs")
  changes an iteration count on a default-set instance, while its clean twin, which
  computes in the same order without the bug, gives the built-in rule's counts.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchsuite.catalogue import load_catalogue, select
from benchsuite.rulespec import parse_rule
from benchsuite.monitor import built as _built
from benchsuite.runner import Case, run_cases

DEFAULT = {i.name: i for i in select(load_catalogue(), None, "small")}


def _run(instance: str, rules: list[str]) -> list:
    cases = [Case(DEFAULT[instance], parse_rule(r, {})) for r in rules]
    return run_cases(cases, jobs=1, timing=False, progress=False)


# -- what the default set contains ---------------------------------------------------------
def test_small_gradients() -> None:
    # gradients start near 1e-6 and fall below 1e-8 before the tightest target (f = 1/2 e^T A e)
    p = _built(DEFAULT["quad-diag-tiny-kappa10-d20"]).problem
    x0 = p.initial_point()
    assert np.max(np.abs(p.grad(x0))) < 1e-5
    # e = 1e-4 e0 has relative suboptimality exactly 1e-8; its gradient is ~1e-10
    near = p.x_star + 1e-4 * (x0 - p.x_star)
    assert np.linalg.norm(p.grad(near)) < 1e-8


def test_badly_scaled_coordinates() -> None:
    # axis-aligned curvatures over 3.5 decades: per-coordinate gradients differ by as much
    p = _built(DEFAULT["quad-diag-kappa3e3-d30"]).problem
    assert p.Q is None and p.eigenvalues[-1] / p.eigenvalues[0] == pytest.approx(3000.0, rel=1e-12)  # round-off
    # column scales over two decades in the logistic (curvature ratio 1e4 between columns)
    A = _built(DEFAULT["logreg-dense-scaled1e4-300x30"]).problem.A
    norms = np.linalg.norm(np.asarray(A), axis=0)
    assert norms.max() / norms.min() > 30  # 100 by construction, 30 leaves room for the random draw


def test_a_coordinate_whose_gradient_is_exactly_zero_and_stays_zero() -> None:
    # an empty feature column (power-law frequencies): gradient lam x_j = 0 at x0 = 0 and at x* (x*_j = 0)
    built = _built(DEFAULT["logreg-sparse-2pct-1000x500"])
    p = built.problem
    x = p.initial_point()
    zero = np.flatnonzero(p.grad(x) == 0.0)
    assert zero.size >= 1
    assert np.all(built.x_star[zero] == 0.0)
    res = _run("logreg-sparse-2pct-1000x500", ["adam"])[0]
    assert res.status in ("reached", "partial")  # no NaN from 0/0 on those coordinates (eps > 0)
    for _ in range(50):  # the coordinate never moves under a coordinate-wise rule
        x = x - 0.1 * p.grad(x)
    assert np.all(x[zero] == 0.0) and np.all(p.grad(x)[zero] == 0.0)


def test_float32_iterate_against_a_tight_distance_target() -> None:
    inst = DEFAULT["quad-diag-kappa10-d10-float32"]
    assert inst.params_dict()["dtype"] == "float32" and inst.measure == "dist"
    assert min(inst.targets) <= 1e-6 and inst.x_tol <= 1e-6
    res = _run(inst.name, ["gd"])[0]
    assert res.status == "reached" and res.outcomes[0].final_dist <= 1e-6  # reachable in float32


@pytest.mark.parametrize("name", ["quad-diag-kappa3e3-d30", "lsq-kappa3e3-400x40", "logreg-dense-scaled1e4-300x30"])
def test_long_cases_need_1e4_steps_of_gradient_descent(name: str) -> None:
    # GD at its published step 1/L (the rule's problem-aware default) meets the tightest target
    # only after 1e4 steps, inside the budget
    res = _run(name, ["gd"])[0]
    assert res.hyperparams["lr"] == pytest.approx(1.0 / _built(DEFAULT[name]).constants.L, rel=1e-15)
    last = res.outcomes[0].iters[-1]
    assert last is not None and 10_000 <= last <= DEFAULT[name].budget


# -- planted precision bugs change counts on the default set --------------------------------
# (bug class, clean twin, built-in rule, default-set instance where the bug shows)
PRECISION_BUGS = [
    ("AdamEpsUnderRoot", "PrecisionAdam", "adam", "quad-diag-tiny-kappa10-d20"),
    ("AdamClampedV", "PrecisionAdam", "adam", "quad-diag-tiny-kappa10-d20"),
    ("AdamFloat32Moments", "PrecisionAdam", "adam", "quad-diag-kappa3e3-d30"),
    ("AdaGradEpsUnderRoot", "PrecisionAdaGrad", "adagrad", "quad-diag-tiny-kappa10-d20"),
]


@pytest.mark.parametrize(("bug", "clean", "builtin", "instance"), PRECISION_BUGS, ids=[b[0] for b in PRECISION_BUGS])
def test_precision_bug_changes_a_count_on_the_default_set(bug: str, clean: str, builtin: str, instance: str) -> None:
    assert instance in DEFAULT  # the small tier: what `benchsuite run` and `baseline` use by default
    ref, ok, bad = _run(instance, [builtin, f"broken_rules:{clean}", f"broken_rules:{bug}"])
    r, c, b = ref.outcomes[0], ok.outcomes[0], bad.outcomes[0]
    # the clean twin (same maths, another operation order) reproduces the built-in counts exactly;
    # its final distance agrees to 1e-9 relative (measured 1e-14: round-off of the operation order)
    assert c.iters == r.iters, (c.iters, r.iters)
    assert c.final_dist == pytest.approx(r.final_dist, rel=1e-9)
    assert any(x is not None for x in r.iters)  # the built-in rule meets a target here
    # the bug changes at least one first crossing
    assert b.iters != r.iters, (bug, b.iters, r.iters)
