"""Huber regression: oracle, generalised Hessian, bounds, robustness."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.families import resolve_family
from benchsuite.families.huber import Huber

from derivatives import central_difference_grad, hessian_from_hessp


def small(seed: int = 0, delta: float = 1.0, lam: float = 0.05) -> Huber:
    return Huber(n=60, d=6, delta=delta, lam=lam, outliers=0.2, noise=1.0, seed=seed)


def test_registered_by_short_name():
    assert resolve_family("huber") is Huber


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), delta=st.floats(0.05, 10.0), lam=st.sampled_from([0.0, 0.1]))
def test_gradient_matches_central_differences(seed, delta, lam):
    p = small(seed % 1000, delta, lam)
    x = 2 * np.random.default_rng(seed).standard_normal(p.dim)
    h = 1e-6
    fd = central_difference_grad(p.value, x, h)
    # f is C^1 with an L-Lipschitz gradient, so a central difference is off by at most L h / 2
    # (kinks of h'' included); round-off adds eps |f| / h ~ 1e-8 for |f| ~ 50.
    np.testing.assert_allclose(p.grad(x), fd, rtol=0, atol=p.constants().L * h + 1e-7)


def test_value_is_the_piecewise_huber_function():
    p = small(1, delta=0.7)
    x = np.random.default_rng(1).standard_normal(p.dim)
    r = p.A64 @ x - p.b64
    assert np.any(np.abs(r) <= 0.7) and np.any(np.abs(r) > 0.7)  # both branches exercised
    h = np.where(np.abs(r) <= 0.7, 0.5 * r**2, 0.7 * (np.abs(r) - 0.35))
    # the definition (Huber 1964) against c (r - c/2): round-off only
    assert p.value(x) == pytest.approx(h.mean() + 0.5 * p.lam * x @ x, rel=1e-13)


def test_large_delta_is_ridge_least_squares():
    p = Huber(n=40, d=5, delta=1e6, lam=0.1, outliers=0.0, seed=2)
    x = np.random.default_rng(2).standard_normal(5)
    r = p.A64 @ x - p.b64
    # every residual is inside the quadratic zone: h(r) = r^2/2 exactly
    assert p.value(x) == pytest.approx(0.5 * r @ r / 40 + 0.05 * x @ x, rel=1e-13)
    np.testing.assert_allclose(p.grad(x), p.A64.T @ r / 40 + 0.1 * x, rtol=1e-13)


def test_hessp_is_exact_away_from_the_kinks():
    p = small(3)
    rng = np.random.default_rng(3)
    x, v = rng.standard_normal(p.dim), rng.standard_normal(p.dim)
    h = 1e-6
    r = p.A64 @ x - p.b64
    # no residual crosses +-delta within the step: the gradient is affine there
    assert np.min(np.abs(np.abs(r) - p.delta)) > 10 * h * np.max(np.abs(p.A64 @ v))
    fd = (p.grad(x + h * v) - p.grad(x - h * v)) / (2 * h)
    # gradient affine on the segment: only round-off eps |g| / h ~ 1e-9
    np.testing.assert_allclose(p.hessp(x, v), fd, rtol=1e-6, atol=1e-8)


def test_declared_bounds_bracket_hessian_eigenvalues():
    for lam in (0.05, 0.0):
        p = small(4, lam=lam)
        c = p.constants()
        assert c.L_kind == c.mu_kind == "bound" and c.mu == lam
        rng = np.random.default_rng(4)
        for x in [p.x_true, np.zeros(p.dim), 3 * rng.standard_normal(p.dim)]:
            ev = np.linalg.eigvalsh(hessian_from_hessp(p, x))
            # bounds, with 1e-12 relative allowance for eigensolver round-off
            assert ev[-1] <= c.L * (1 + 1e-12)
            assert ev[0] >= c.mu - 1e-12 * c.L
    # with every residual inside the quadratic zone the L bound is attained
    q = Huber(n=40, d=5, delta=1e6, lam=0.1, outliers=0.0, seed=2)
    ev = np.linalg.eigvalsh(hessian_from_hessp(q, np.zeros(5)))
    assert ev[-1] == pytest.approx(q.constants().L, rel=1e-10)  # eigensolver round-off


def test_minibatch_all_rows_and_disjoint_batches():
    p = small(5)
    x = np.random.default_rng(5).standard_normal(p.dim)
    g = p.grad(x)
    # same sums, different blocking: float64 round-off
    np.testing.assert_allclose(p.minibatch_grad(x, np.arange(p.n_samples)), g, rtol=1e-12, atol=1e-13)
    batches = np.split(np.random.default_rng(6).permutation(p.n_samples), 4)
    mean = np.mean([p.minibatch_grad(x, b) for b in batches], axis=0)
    np.testing.assert_allclose(mean, g, rtol=1e-12, atol=1e-13)
    out = np.empty(p.dim)
    f, g2 = p.value_and_grad(x, out=out)
    assert g2 is out and f == p.value(x)  # identical arithmetic: equal to the bit
    np.testing.assert_array_equal(g2, g)


def test_minimiser_resists_outliers_where_least_squares_does_not():
    from scipy.optimize import minimize

    p = Huber(n=400, d=10, delta=1.0, lam=1e-4, outliers=0.2, outlier_scale=50.0, noise=0.3, seed=7)
    res = minimize(p.value, np.zeros(p.dim), jac=p.grad, hessp=p.hessp, method="trust-ncg",
                   options={"gtol": 1e-10})
    assert res.success and np.linalg.norm(p.grad(res.x)) < 1e-9
    ls = np.linalg.lstsq(p.A64, p.b64, rcond=None)[0]
    err_huber = np.linalg.norm(res.x - p.x_true)
    err_ls = np.linalg.norm(ls - p.x_true)
    # 20 % gross errors of size ~50: least squares is pulled off by ~50 * sqrt(0.2 d / n) ~ 5,
    # the Huber fit stays within a few noise levels (0.3 sqrt(d / n) ~ 0.05) of the truth
    assert err_huber < 0.2 < 2.0 < err_ls


def test_cvxpy_objective_equals_value():
    cp = pytest.importorskip("cvxpy")
    p = small(8, delta=0.5)
    x = cp.Variable(p.dim)
    x.value = np.random.default_rng(8).standard_normal(p.dim)
    # cp.huber(r, M) = 2 h_M(r): the mapping is built in; round-off only
    assert p.cvxpy_objective(x).value == pytest.approx(p.value(x.value), rel=1e-12)


def test_deterministic_and_float32():
    a, b = small(9), small(9)
    np.testing.assert_array_equal(a.b, b.b)
    np.testing.assert_array_equal(a.outlier_rows, b.outlier_rows)
    assert len(a.outlier_rows) == 12  # 20 % of 60 rows
    p32 = Huber(n=60, d=6, seed=9, dtype="float32")
    p64 = Huber(n=60, d=6, seed=9)
    x = np.random.default_rng(0).standard_normal(6)
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32
    # float32 round-off over sums of 60 terms
    np.testing.assert_allclose(g32, p64.grad(x), rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize(
    "params",
    [{"n": 0}, {"d": 1.5}, {"delta": 0.0}, {"lam": -1.0}, {"outliers": 1.0}, {"outliers": -0.1},
     {"outlier_scale": 0.0}, {"noise": float("nan")}, {"dtype": "complex128"}],
)
def test_impossible_params_raise(params):
    with pytest.raises(ValueError):
        Huber(**params)
