"""Least squares and ridge: oracle, constants, closed forms, outside references."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.families import resolve_family
from benchsuite.families.least_squares import LeastSquares, Ridge

from derivatives import central_difference_grad, hessian_from_hessp


SMALL = [
    lambda seed=0: LeastSquares(n=40, d=8, kappa=50.0, noise=0.3, seed=seed),
    lambda seed=0: Ridge(n=40, d=8, lam=0.05, rho=0.7, noise=0.3, seed=seed),
    lambda seed=0: Ridge(n=6, d=10, lam=0.1, rho=-0.3, seed=seed),  # n < d: mu = lam exactly
]


def test_registered_by_short_name():
    assert resolve_family("least_squares") is LeastSquares
    assert resolve_family("ridge") is Ridge


@pytest.mark.parametrize("make", SMALL)
@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**31 - 1))
def test_gradient_matches_central_differences(make, seed):
    p = make(seed % 1000)
    x = np.random.default_rng(seed).standard_normal(p.dim)
    # f is quadratic: the central difference has no truncation error; only
    # round-off ~ eps * |f| / h remains (|f| ~ 10, h = 1e-4 -> ~1e-11).
    fd = central_difference_grad(p.value, x, 1e-4)
    np.testing.assert_allclose(p.grad(x), fd, rtol=1e-7, atol=1e-8)


@pytest.mark.parametrize("make", SMALL)
def test_value_and_grad_and_out_buffer_agree(make):
    p = make()
    x = np.random.default_rng(1).standard_normal(p.dim)
    out = np.empty(p.dim)
    f, g = p.value_and_grad(x, out=out)
    assert g is out
    # same arithmetic in the same order: identical to the bit
    assert f == p.value(x)
    np.testing.assert_array_equal(g, p.grad(x))
    r = p.A64 @ x - p.b64
    # direct formula; round-off of two products of length <= 40
    expect = 0.5 * r @ r / p.n_samples + 0.5 * p.lam * x @ x
    assert f == pytest.approx(expect, rel=1e-13)


@pytest.mark.parametrize("make", SMALL)
def test_minibatch_all_rows_and_disjoint_batches(make):
    p = make()
    x = np.random.default_rng(2).standard_normal(p.dim)
    g = p.grad(x)
    full = p.minibatch_grad(x, np.arange(p.n_samples))
    # same sums in a different blocking: float64 round-off only
    np.testing.assert_allclose(full, g, rtol=1e-12, atol=1e-12)
    # unbiasedness: the mean over a partition into equal disjoint batches is the full gradient
    perm = np.random.default_rng(3).permutation(p.n_samples)
    k = next(k for k in (4, 3, 2) if p.n_samples % k == 0)
    batches = np.split(perm, k)
    mean = np.mean([p.minibatch_grad(x, b) for b in batches], axis=0)
    np.testing.assert_allclose(mean, g, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("make", SMALL)
def test_declared_constants_are_hessian_eigenvalues(make):
    p = make()
    ev = np.linalg.eigvalsh(hessian_from_hessp(p, np.zeros(p.dim)))
    c = p.constants()
    assert c.L_kind == c.mu_kind == "exact"
    # exact constants: equal to the Hessian eigenvalues up to eigensolver round-off
    assert c.L == pytest.approx(ev[-1], rel=1e-10)
    assert c.mu == pytest.approx(ev[0], rel=1e-8, abs=1e-12)


@pytest.mark.parametrize("kappa", [1.0, 10.0, 1e4])
def test_condition_number_is_kappa(kappa):
    p = LeastSquares(n=60, d=12, kappa=kappa, seed=4)
    s = np.linalg.svd(p.A64, compute_uv=False)
    # cond(A^T A) from numpy's SVD of the stored matrix; round-off of the product U diag(s) V^T
    assert (s[0] / s[-1]) ** 2 == pytest.approx(kappa, rel=1e-10)
    assert p.constants().L == pytest.approx(1.0, rel=1e-14)
    assert p.constants().kappa == pytest.approx(kappa, rel=1e-12)


def test_closed_forms_match_numpy():
    lsq = LeastSquares(n=80, d=10, kappa=1e3, noise=0.5, seed=5)
    ref = np.linalg.lstsq(lsq.A64, lsq.b64, rcond=None)[0]  # numpy lstsq (SVD)
    # two backward-stable solvers, kappa(A) ~ 32: agreement ~ 1e-14 relative
    np.testing.assert_allclose(lsq.closed_form(), ref, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(lsq.grad(lsq.closed_form()), 0, atol=1e-12)

    rid = Ridge(n=30, d=12, lam=0.2, rho=0.6, seed=6)
    # ridge as an augmented least-squares problem [A; sqrt(n lam) I] x ~ [b; 0], numpy lstsq
    aug = np.vstack([rid.A64, np.sqrt(rid.n_samples * rid.lam) * np.eye(rid.dim)])
    ref = np.linalg.lstsq(aug, np.concatenate([rid.b64, np.zeros(rid.dim)]), rcond=None)[0]
    np.testing.assert_allclose(rid.closed_form(), ref, rtol=1e-10, atol=1e-12)


def test_ridge_matches_scikit_learn_and_scipy():
    from scipy.optimize import minimize
    from sklearn.linear_model import Ridge as SkRidge

    p = Ridge(n=120, d=15, lam=0.03, rho=0.8, noise=1.0, seed=7)
    # scikit-learn Ridge minimises ||y - X w||^2 + alpha ||w||^2 (fit_intercept=False);
    # ours is (1/(2n)) ||A x - b||^2 + (lam/2) ||x||^2 = (1/(2n)) [||A x - b||^2 + n lam ||x||^2],
    # so alpha = n * lam.
    sk = SkRidge(alpha=p.n_samples * p.lam, fit_intercept=False, solver="cholesky").fit(p.A64, p.b64).coef_
    res = minimize(p.value, np.zeros(p.dim), jac=p.grad, hessp=p.hessp, method="trust-ncg",
                   options={"gtol": 1e-10})
    assert res.success
    # strong convexity: ||x - x*|| <= ||grad f(x)|| / mu; plus 1e-12 for sklearn's own round-off
    bound = np.linalg.norm(p.grad(res.x)) / p.constants().mu + 1e-12
    assert np.linalg.norm(res.x - sk) <= bound
    assert bound < 1e-7 * np.linalg.norm(sk)
    # two direct Cholesky solves of the same normal equations (kappa ~ 1e2): round-off only
    np.testing.assert_allclose(p.closed_form(), sk, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("make", SMALL[:2])
def test_cvxpy_objective_equals_value(make):
    cp = pytest.importorskip("cvxpy")
    p = make()
    x = cp.Variable(p.dim)
    x.value = np.random.default_rng(8).standard_normal(p.dim)
    # same formula evaluated by cvxpy's numpy backend: round-off only
    assert p.cvxpy_objective(x).value == pytest.approx(p.value(x.value), rel=1e-12)


def test_deterministic_from_seed():
    a, b, c = (LeastSquares(n=20, d=5, seed=s) for s in (3, 3, 4))
    np.testing.assert_array_equal(a.A, b.A)
    np.testing.assert_array_equal(a.b, b.b)
    assert not np.array_equal(a.A, c.A)
    r1, r2 = Ridge(n=20, d=5, seed=9), Ridge(n=20, d=5, seed=9)
    np.testing.assert_array_equal(r1.b, r2.b)


def test_float32_variant():
    p64 = Ridge(n=50, d=10, seed=1)
    p32 = Ridge(n=50, d=10, seed=1, dtype="float32")
    x = np.random.default_rng(0).standard_normal(10)
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32 and p32.initial_point().dtype == np.float32
    # float32 round-off (eps ~ 6e-8) accumulated over sums of length 50
    np.testing.assert_allclose(g32, p64.grad(x), rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize(
    "cls, params",
    [
        (LeastSquares, {"n": 0}),
        (LeastSquares, {"n": 5, "d": 10}),
        (LeastSquares, {"kappa": 0.5}),
        (LeastSquares, {"noise": -1.0}),
        (LeastSquares, {"d": 2.5}),
        (LeastSquares, {"d": None}),
        (LeastSquares, {"n": float("inf")}),
        (Ridge, {"lam": 0.0}),
        (Ridge, {"rho": 1.0}),
        (Ridge, {"d": -3}),
        (Ridge, {"dtype": "int8"}),
    ],
)
def test_impossible_params_raise(cls, params):
    with pytest.raises(ValueError):
        cls(**params)
