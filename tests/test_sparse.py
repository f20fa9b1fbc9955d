"""Large sparse families (scaled down here: same code path): generator, oracle, bounds, duals, references."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.families import resolve_family
from benchsuite.families.logistic import Logistic
from benchsuite.families.sparse import SparseLogistic, SparseRidge, csr_matvec_into, power_law_rows

from derivatives import central_difference_grad, hessian_from_hessp

SMALL = {
    "logistic": lambda seed=0, **kw: SparseLogistic(n=120, d=40, lam=0.02, row_nnz=6, zipf=1.0, seed=seed, **kw),
    "ridge": lambda seed=0, **kw: SparseRidge(n=100, d=30, lam=0.05, row_nnz=5, zipf=0.8, seed=seed, **kw),
}


def test_registered_by_short_name():
    assert resolve_family("logistic_sparse") is SparseLogistic
    assert resolve_family("ridge_sparse") is SparseRidge


def test_generator_unit_rows_power_law_and_deterministic():
    A = power_law_rows(np.random.default_rng(5), 20000, 5000, 12.0, 1.0)
    B = power_law_rows(np.random.default_rng(5), 20000, 5000, 12.0, 1.0)
    assert A.format == "csr" and A.has_canonical_format  # sorted, merged columns
    assert (A != B).nnz == 0  # same seed, same matrix
    rows = np.sqrt(np.asarray(A.multiply(A).sum(axis=1)).ravel())
    # unit rows up to round-off of a sum of ~12 squares
    np.testing.assert_allclose(rows, 1.0, rtol=1e-14)
    counts = np.diff(A.indptr)
    assert counts.min() >= 1  # never an empty row
    # 1 + Poisson(11) non-zeros, minus merged repeats (a few % in the head columns)
    assert 10.5 < counts.mean() <= 12.0
    freq = np.bincount(A.indices, minlength=5000)
    # density ~ (j + 1.5)^-1 / ln(5001): column 0 holds ~ ln(2.5/1.5)/ln(5001) = 6 % of the draws,
    # columns 4000.. hold ~ ln(5001/4001)/ln(5001) = 2.6 % spread over 1000 columns
    share0 = freq[0] / A.nnz
    assert 0.04 < share0 < 0.07
    assert freq[4000:].mean() < 0.01 * freq[0]


def test_zipf_zero_is_uniform():
    A = power_law_rows(np.random.default_rng(1), 5000, 100, 10.0, 0.0)
    freq = np.bincount(A.indices, minlength=100)
    # 50 000 draws over 100 columns: 500 each, Poisson sd ~ 22; 6 sd either way
    assert abs(freq - freq.mean()).max() < 6 * np.sqrt(freq.mean())


def test_csr_matvec_into_equals_the_product():
    A = power_law_rows(np.random.default_rng(2), 300, 200, 8.0, 1.0)
    x = np.random.default_rng(3).standard_normal(200)
    out = np.full(300, np.nan)
    # the same kernel as A @ x: identical to the bit
    np.testing.assert_array_equal(csr_matvec_into(A, x, out), A @ x)
    acc = np.ones(300)
    # accumulating onto 1 sums in another order: a few ulps of 1 + |A| |x| (~10 terms)
    bound = 1e-14 * (1.0 + abs(A) @ abs(x))
    assert np.all(np.abs(csr_matvec_into(A, x, acc, accumulate=True) - (1.0 + A @ x)) <= bound)
    # mixed dtypes take the fallback (one temporary), same values
    out32 = np.empty(300, dtype=np.float32)
    np.testing.assert_allclose(csr_matvec_into(A, x, out32), A @ x, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("kind", SMALL)
@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), scale=st.floats(0.1, 5.0))
def test_gradient_matches_central_differences(kind, seed, scale):
    p = SMALL[kind](seed % 1000)
    x = scale * np.random.default_rng(seed).standard_normal(p.dim)
    # h = 1e-5: truncation h^2 |f'''|/6 ~ 1e-11 (unit rows, |x| <= ~20), round-off eps |f| / h ~ 1e-10
    # for |f| ~ 10; 1e-7 absolute leaves a factor ~100
    fd = central_difference_grad(p.value, x, 1e-5)
    np.testing.assert_allclose(p.grad(x), fd, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("kind", SMALL)
def test_value_grad_out_and_minibatch_agree(kind):
    p = SMALL[kind]()
    x = np.random.default_rng(1).standard_normal(p.dim)
    out = np.empty(p.dim)
    f, g = p.value_and_grad(x, out=out)
    assert g is out and f == p.value(x)  # identical arithmetic: equal to the bit
    np.testing.assert_array_equal(g, p.grad(x))
    # the same sums blocked differently: float64 round-off
    np.testing.assert_allclose(p.minibatch_grad(x, np.arange(p.n_samples)), g, rtol=1e-12, atol=1e-13)
    batches = np.split(np.random.default_rng(3).permutation(p.n_samples), 4)
    np.testing.assert_allclose(np.mean([p.minibatch_grad(x, b) for b in batches], axis=0), g,
                               rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("kind", SMALL)
def test_hessp_and_operator_match_gradient_differences(kind):
    p = SMALL[kind]()
    rng = np.random.default_rng(4)
    x, v = rng.standard_normal(p.dim), rng.standard_normal(p.dim)
    h = 1e-5
    fd = (p.grad(x + h * v) - p.grad(x - h * v)) / (2 * h)
    # central difference of the exact gradient: O(h^2) truncation plus eps/h round-off ~ 1e-10
    np.testing.assert_allclose(p.hessp(x, v), fd, rtol=1e-6, atol=1e-8)
    # the operator precomputes the curvature weights: the same products to round-off
    np.testing.assert_allclose(p.hessian_operator(x)(v), p.hessp(x, v), rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("kind", SMALL)
def test_declared_bounds_bracket_hessian_eigenvalues_and_unit_row_bound(kind):
    p = SMALL[kind]()
    c = p.constants()
    assert c.L_kind == c.mu_kind == "bound"
    # unit rows: ||A||^2 <= ||A||_F^2 = n, so L <= 1/4 + lam (logistic) or 1 + lam (ridge)
    assert c.L <= (0.25 if kind == "logistic" else 1.0) + p.lam
    rng = np.random.default_rng(6)
    for x in [np.zeros(p.dim), rng.standard_normal(p.dim)]:
        ev = np.linalg.eigvalsh(hessian_from_hessp(p, x))
        # round-off allowance 1e-12 relative
        assert ev[-1] <= c.L * (1 + 1e-12)
        assert ev[0] >= c.mu * (1 - 1e-12)


def test_logistic_matches_scikit_learn():
    from sklearn.linear_model import LogisticRegression

    p = SparseLogistic(n=400, d=60, lam=1e-2, row_nnz=8, seed=3)
    # scikit-learn LogisticRegression: C sum_i log(1 + exp(-y_i a_i.w)) + 1/2 ||w||^2 equals ours
    # times 1/lam with C = 1/(n lam), no intercept
    sk = LogisticRegression(C=1.0 / (p.n_samples * p.lam), fit_intercept=False, tol=1e-12, max_iter=10000,
                            solver="lbfgs").fit(p.A64, p.y64).coef_.ravel()
    # sklearn stops near a gradient norm of 1e-8 (relative): strong convexity bounds its distance
    # to our stationary point by ||grad f(sk)|| / lam; 1e-6 absolute in the gradient is ample
    assert np.linalg.norm(p.grad(sk)) <= 1e-6


def test_ridge_matches_scikit_learn_and_closed_form():
    from sklearn.linear_model import Ridge

    p = SparseRidge(n=300, d=80, lam=1e-2, row_nnz=10, seed=4)
    # scikit-learn Ridge: ||b - A w||^2 + alpha ||w||^2 equals ours times 2n with alpha = n lam
    sk = Ridge(alpha=p.n_samples * p.lam, fit_intercept=False, solver="cholesky").fit(p.A64, p.b64).coef_
    A = p.A64.toarray()
    direct = np.linalg.solve(A.T @ A / p.n_samples + p.lam * np.eye(p.dim), A.T @ p.b64 / p.n_samples)
    # two direct solves of the same normal equations (kappa <= 101): round-off
    np.testing.assert_allclose(sk, direct, rtol=1e-9, atol=1e-12)
    assert np.linalg.norm(p.grad(direct)) <= 1e-12


def _logistic_optimum(p):
    from scipy.optimize import minimize

    res = minimize(p.value_and_grad, np.zeros(p.dim), jac=True, hess=None, hessp=p.hessp, method="trust-ncg",
                   options={"gtol": 1e-13})
    return res.x


@pytest.mark.parametrize("kind", SMALL)
def test_duality_gap_bounds_suboptimality_and_vanishes_at_the_optimum(kind):
    p = SMALL[kind]()
    if kind == "logistic":
        x_star = _logistic_optimum(p)  # scipy trust-ncg with the exact Hessian-vector product
    else:
        A = p.A64.toarray()
        x_star = np.linalg.solve(A.T @ A / p.n_samples + p.lam * np.eye(p.dim), A.T @ p.b64 / p.n_samples)
    f_star = p.value(x_star)
    rng = np.random.default_rng(7)
    for scale in (1.0, 1e-2, 1e-4):
        x = x_star + scale * rng.standard_normal(p.dim)
        P, D, w = p.duality_gap(x)
        assert P == pytest.approx(p.value(x), rel=1e-13)  # the same primal, another evaluation order
        # weak duality: D <= f* <= P, so the gap bounds the suboptimality (1e-14 round-off allowance)
        assert D <= f_star + 1e-14
        assert P - D >= p.value(x) - f_star - 1e-14
    P, D, w = p.duality_gap(x_star)
    # at the optimum the gap is ||grad||^2 / (2 lam) ~ 0 up to round-off of two O(1) sums
    assert abs(P - D) <= 1e-14
    np.testing.assert_allclose(w, x_star, rtol=1e-9, atol=1e-11)  # w(alpha*) = x*


def test_logistic_entropy_dual_against_cvxpy():
    cp = pytest.importorskip("cvxpy")
    p = SMALL["logistic"]()
    x = cp.Variable(p.dim)
    prob = cp.Problem(cp.Minimize(p.cvxpy_objective(x)))
    prob.solve(solver=cp.CLARABEL)
    # Clarabel (interior point, gap 1e-8): f* to ~1e-8; the dual at cvxpy's x is a lower bound
    P, D, _ = p.duality_gap(x.value)
    assert D <= prob.value + 1e-8
    assert P - D <= 1e-6  # near-optimal point: a small gap


def test_existing_sparse_logistic_fused_gradient_matches_the_expit_formula():
    from scipy.special import expit

    p = Logistic(n=300, d=100, lam=1e-3, sparse=True, density=0.05, seed=2)
    A = p.A64
    for scale in (0.1, 10.0, 1e4):  # moderate and overflowing margins
        x = scale * np.random.default_rng(1).standard_normal(p.dim)
        # scipy.special.expit reference; the family's fused exp/divide is accurate to a few ulps
        ref = -A.T @ (p.y64 * expit(-p.y64 * (A @ x))) / p.n_samples + p.lam * x
        np.testing.assert_allclose(p.grad(x), ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())


@pytest.mark.parametrize("kind", SMALL)
def test_float32(kind):
    p64, p32 = SMALL[kind](), SMALL[kind](dtype="float32")
    assert p32.A.dtype == np.float32 and p64.A is p64.A64  # float64: no second copy of the data
    x = np.random.default_rng(0).standard_normal(p64.dim)
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32
    # float32 round-off (u ~ 6e-8) over sums of at most ~100 terms of size ~1
    np.testing.assert_allclose(g32, p64.grad(x), rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize(
    "cls, params",
    [
        (SparseLogistic, {"n": 0}),
        (SparseLogistic, {"lam": 0.0}),
        (SparseLogistic, {"row_nnz": 0.5}),
        (SparseLogistic, {"d": 10, "row_nnz": 11}),
        (SparseLogistic, {"zipf": -1.0}),
        (SparseLogistic, {"signal": 0.0}),
        (SparseRidge, {"lam": -1.0}),
        (SparseRidge, {"noise": -0.1}),
        (SparseRidge, {"dtype": "float16"}),
    ],
)
def test_impossible_params_raise(cls, params):
    with pytest.raises(ValueError):
        cls(**{"n": 50, "d": 40, **params})


@pytest.mark.parametrize("kind", SMALL)
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), scale=st.floats(1e-3, 30.0))
def test_weak_duality_holds_at_every_point(kind, seed, scale):
    """alpha(x) is dual feasible for every x, so P(x) - D(alpha(x)) >= 0 (a law, not a property of x*)."""
    p = SMALL[kind](seed % 50)
    x = scale * np.random.default_rng(seed).standard_normal(p.dim)
    P, D, _ = p.duality_gap(x)
    # round-off of two sums of ~100 terms of size up to ~scale^2: 1e-13 relative to |P| + |D|
    assert P - D >= -1e-13 * (abs(P) + abs(D) + 1.0)
