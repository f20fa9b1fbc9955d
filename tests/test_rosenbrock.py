"""Rosenbrock, 2-D and chained: against scipy.optimize's reference implementation."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.optimize import minimize, rosen, rosen_der, rosen_hess, rosen_hess_prod

from benchsuite.families import resolve_family
from benchsuite.families.rosenbrock import Rosenbrock

points = st.integers(2, 12).flatmap(
    lambda d: st.tuples(
        arrays(np.float64, d, elements=st.floats(-3, 3)),
        arrays(np.float64, d, elements=st.floats(-3, 3)),
    )
)


def test_registered_by_short_name():
    assert resolve_family("rosenbrock") is Rosenbrock


@settings(max_examples=100, deadline=None)
@given(xv=points)
def test_matches_scipy_rosen_der_and_hess_prod(xv):
    x, v = xv
    p = Rosenbrock(x.size)
    # scipy.optimize.rosen / rosen_der / rosen_hess_prod: the same polynomial evaluated in a
    # different order; |terms| <= ~1e4 here, so agreement to 1e-12 relative plus 1e-9 absolute
    assert p.value(x) == pytest.approx(rosen(x), rel=1e-12, abs=1e-9)
    np.testing.assert_allclose(p.grad(x), rosen_der(x), rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(p.hessp(x, v), rosen_hess_prod(x, v), rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize("d", [2, 3, 10])
def test_gradient_matches_central_differences(d):
    p = Rosenbrock(d)
    rng = np.random.default_rng(d)
    for _ in range(5):
        x = rng.uniform(-2, 2, d)
        h = 1e-5
        fd = np.array([(p.value(x + h * e) - p.value(x - h * e)) / (2 * h) for e in np.eye(d)])
        # quartic: central-difference truncation is h^2 |f'''| / 6 <= 1e-10 * 2400 |x| / 6 ~ 1e-7;
        # round-off eps |f| / h ~ 1e-8 for |f| ~ 1e3
        np.testing.assert_allclose(p.grad(x), fd, rtol=1e-7, atol=1e-6)


def test_hessian_from_hessp_equals_scipy_rosen_hess():
    x = np.random.default_rng(1).uniform(-2, 2, 6)
    p = Rosenbrock(6)
    H = np.column_stack([p.hessp(x, e) for e in np.eye(6)])
    # scipy.optimize.rosen_hess: polynomial entries, round-off only
    np.testing.assert_allclose(H, rosen_hess(x), rtol=1e-13, atol=1e-10)


@pytest.mark.parametrize("d", [2, 3, 4, 9])
def test_start_and_published_minimum(d):
    p = Rosenbrock(d)
    x0 = p.initial_point()
    np.testing.assert_array_equal(x0[:4], [-1.2, 1.0, -1.2, 1.0][: min(d, 4)])
    pub = p.published()
    # Rosenbrock (1960): minimum 0 at (1, ..., 1)
    assert pub.f == 0.0 and pub.x == (1.0,) * d
    assert p.value(np.ones(d)) == 0.0 and not np.any(p.grad(np.ones(d)))  # exact in floating point
    H = np.column_stack([p.hessp(np.ones(d), e) for e in np.eye(d)])
    assert np.linalg.eigvalsh(H)[0] > 0.3  # a strict (isolated) minimum


def test_classic_start_value():
    # f(-1.2, 1) = 100 (1 - 1.44)^2 + 2.2^2 = 24.2 (Rosenbrock 1960; the classic start, from memory)
    assert Rosenbrock(2).value(np.array([-1.2, 1.0])) == pytest.approx(24.2, rel=1e-15)


def test_chained_form_has_a_local_minimum_near_minus_one():
    # the docstring's claim: from x_1 = -1 a local method stops at f ~ 3.99 > 0 (d = 10)
    p = Rosenbrock(10)
    start = np.ones(10)
    start[0] = -1.0
    res = minimize(p.value, start, jac=p.grad, hessp=p.hessp, method="trust-ncg", options={"gtol": 1e-10})
    assert res.success and res.x[0] < -0.9
    assert 3.9 < res.fun < 4.0
    H = np.column_stack([p.hessp(res.x, e) for e in np.eye(10)])
    assert np.linalg.eigvalsh(H)[0] > 0  # positive definite: a genuine local minimum


def test_constants_unknown_and_not_convex():
    p = Rosenbrock(5)
    assert p.convex is False
    c = p.constants()
    assert c.L is None and c.mu is None and c.kappa is None


def test_out_buffer_and_float32():
    p = Rosenbrock(7, dtype="float32")
    x = p.initial_point()
    assert x.dtype == np.float32
    out = np.empty(7, dtype=np.float32)
    g = p.grad(x, out=out)
    assert g is out
    # float32 round-off on terms of size ~1e3 (eps ~ 6e-8)
    np.testing.assert_allclose(g, rosen_der(x.astype(np.float64)), rtol=1e-5, atol=1e-3)


@pytest.mark.parametrize("d", [1, 0, 2.5, True, "x", None, float("inf")])
def test_impossible_dimension_raises(d):
    with pytest.raises(ValueError):
        Rosenbrock(d)
