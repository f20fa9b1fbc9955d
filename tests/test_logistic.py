"""Binary logistic and softmax regression: oracle, bounds, outside references."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.families import resolve_family
from benchsuite.families.logistic import Logistic, Softmax, spectral_norm

from derivatives import central_difference_grad, hessian_from_hessp


SMALL = {
    "dense": lambda seed=0: Logistic(n=60, d=6, lam=0.05, scale_range=10.0, seed=seed),
    "sparse": lambda seed=0: Logistic(n=80, d=12, lam=0.02, sparse=True, density=0.2, zipf=1.5, seed=seed),
    "softmax": lambda seed=0: Softmax(n=50, d=4, K=3, lam=0.05, seed=seed),
}


def test_registered_by_short_name():
    assert resolve_family("logistic") is Logistic
    assert resolve_family("softmax") is Softmax


@pytest.mark.parametrize("kind", SMALL)
@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), scale=st.floats(0.1, 5.0))
def test_gradient_matches_central_differences(kind, seed, scale):
    p = SMALL[kind](seed % 1000)
    x = scale * np.random.default_rng(seed).standard_normal(p.dim)
    # h = 1e-5: truncation h^2 |f'''| / 6 ~ 1e-11 (|f'''| <= ||a||^3 ~ 10 here), round-off
    # eps |f| / h ~ 1e-10 for |f| ~ 10; 1e-7 absolute leaves a factor ~100 of room.
    fd = central_difference_grad(p.value, x, 1e-5)
    np.testing.assert_allclose(p.grad(x), fd, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("kind", SMALL)
def test_hessp_matches_differences_of_the_gradient(kind):
    p = SMALL[kind]()
    rng = np.random.default_rng(4)
    x, v = rng.standard_normal(p.dim), rng.standard_normal(p.dim)
    h = 1e-5
    fd = (p.grad(x + h * v) - p.grad(x - h * v)) / (2 * h)
    # central difference of the exact gradient: O(h^2) truncation plus eps/h round-off ~ 1e-10
    np.testing.assert_allclose(p.hessp(x, v), fd, rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("kind", SMALL)
def test_value_and_grad_and_out_buffer_agree(kind):
    p = SMALL[kind]()
    x = np.random.default_rng(1).standard_normal(p.dim)
    out = np.empty(p.dim)
    f, g = p.value_and_grad(x, out=out)
    assert g is out
    # identical arithmetic: equal to the bit
    assert f == p.value(x)
    np.testing.assert_array_equal(g, p.grad(x))


def test_logistic_value_by_direct_formula_and_stable_for_huge_margins():
    p = SMALL["dense"]()
    A = p.A64.toarray() if p.sparse else p.A64
    x = np.random.default_rng(5).standard_normal(p.dim)
    direct = np.mean(np.log1p(np.exp(-p.y64 * (A @ x)))) + 0.5 * p.lam * x @ x
    # same quantity, different association: round-off only
    assert p.value(x) == pytest.approx(direct, rel=1e-13)
    big = 1e4 * x  # margins ~ 1e4: exp overflows in a naive formula
    f, g = p.value_and_grad(big)
    assert np.isfinite(f) and np.all(np.isfinite(g))
    # for |t| >> 1, log(1 + exp(-t)) = max(0, -t) to double precision
    hinge = np.mean(np.maximum(0.0, -p.y64 * (A @ big))) + 0.5 * p.lam * big @ big
    assert f == pytest.approx(hinge, rel=1e-12)
    from scipy.special import expit

    for z in (x, 30 * x, big):
        # reference gradient with scipy.special.expit; the family's own sigmoid is exp-based:
        # both accurate to a few ulps, also in the tails
        ref = -A.T @ (p.y64 * expit(-p.y64 * (A @ z))) / p.n_samples + p.lam * z
        np.testing.assert_allclose(p.grad(z), ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())


@pytest.mark.parametrize("kind", SMALL)
def test_minibatch_all_rows_and_disjoint_batches(kind):
    p = SMALL[kind]()
    x = np.random.default_rng(2).standard_normal(p.dim)
    g = p.grad(x)
    # same sums with different blocking: float64 round-off
    np.testing.assert_allclose(p.minibatch_grad(x, np.arange(p.n_samples)), g, rtol=1e-12, atol=1e-13)
    batches = np.split(np.random.default_rng(3).permutation(p.n_samples), 5)
    mean = np.mean([p.minibatch_grad(x, b) for b in batches], axis=0)
    np.testing.assert_allclose(mean, g, rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize("kind", SMALL)
def test_declared_bounds_bracket_hessian_eigenvalues(kind):
    p = SMALL[kind]()
    c = p.constants()
    assert c.L_kind == c.mu_kind == "bound"
    rng = np.random.default_rng(6)
    # at x = 0 all sigma' = 1/4 (binary), the tightest point for L; elsewhere smaller
    for x in [np.zeros(p.dim), rng.standard_normal(p.dim), 3 * rng.standard_normal(p.dim)]:
        ev = np.linalg.eigvalsh(hessian_from_hessp(p, x))
        # bound checks with a round-off allowance of 1e-12 relative
        assert ev[-1] <= c.L * (1 + 1e-12)
        assert ev[0] >= c.mu * (1 - 1e-12)


def test_binary_L_bound_is_attained_at_zero():
    p = SMALL["dense"]()
    ev = np.linalg.eigvalsh(hessian_from_hessp(p, np.zeros(p.dim)))
    # at x = 0 the Hessian is A^T A / (4n) + lam I exactly, so the bound is tight (round-off)
    assert ev[-1] == pytest.approx(p.constants().L, rel=1e-10)


def test_spectral_norm_sparse_matches_dense_svd():
    p = Logistic(n=300, d=200, sparse=True, density=0.05, seed=3)
    dense = np.linalg.norm(p.A64.toarray(), 2)  # numpy SVD
    # svds to machine precision, padded by 1e-10 relative to stay an upper bound
    assert dense <= spectral_norm(p.A64) <= dense * (1 + 1e-9)


def test_sparse_features_are_csr_with_skewed_frequencies():
    p = Logistic(n=2000, d=500, sparse=True, density=0.01, zipf=1.0, seed=1)
    assert sp.issparse(p.A) and p.A.format == "csr"
    assert 0 < p.describe()["nnz_density"] <= 0.01
    counts = np.diff(p.A.tocsc().indptr)
    # power law with exponent 1: the first column is drawn ~ (sum_j 1/j) / 1 ~ 6.8 times the
    # average rate, the last one 500 / 6.8 ~ 74 times less than the average
    assert counts[0] > 5 * counts.mean()
    assert counts[-100:].mean() < 0.2 * counts.mean()
    assert set(np.unique(p.y64)) == {-1.0, 1.0}


def test_logistic_matches_scikit_learn_and_scipy():
    from scipy.optimize import minimize
    from sklearn.linear_model import LogisticRegression

    for p in (Logistic(n=200, d=8, lam=1e-2, seed=9),
              Logistic(n=300, d=40, lam=1e-2, sparse=True, density=0.1, seed=10)):
        A = p.A64
        # scikit-learn LogisticRegression minimises C sum_i log(1 + exp(-y_i a_i.w)) + 1/2 ||w||^2;
        # ours is (1/n) sum_i (...) + lam/2 ||w||^2 = lam [ (1/(n lam)) sum_i (...) + 1/2 ||w||^2 ],
        # so C = 1 / (n lam) (no intercept).
        sk = LogisticRegression(C=1.0 / (p.n_samples * p.lam), fit_intercept=False, tol=1e-12,
                                max_iter=10000, solver="lbfgs").fit(A, p.y64).coef_.ravel()
        res = minimize(p.value, np.zeros(p.dim), jac=p.grad, hessp=p.hessp, method="trust-ncg",
                       options={"gtol": 1e-10})
        assert res.success
        # strong convexity (mu = lam): ||x - x*|| <= ||grad f(x)|| / lam for each of the two
        bound = (np.linalg.norm(p.grad(sk)) + np.linalg.norm(p.grad(res.x))) / p.lam
        assert np.linalg.norm(sk - res.x) <= bound
        # both solvers converged: the certified distance is below 1e-5 of ||x*|| (sklearn's
        # lbfgs stops with a gradient norm near 1e-8; trust-ncg at 1e-10)
        assert bound <= 1e-5 * np.linalg.norm(res.x)


def test_softmax_labels_follow_the_model_and_reduce_to_logistic_for_two_classes():
    p = Softmax(n=40, d=5, K=2, lam=0.1, seed=2)
    assert set(np.unique(p.labels)) <= {0, 1}
    W = np.random.default_rng(0).standard_normal((5, 2))
    # two classes: softmax loss = log(1 + exp(-(s_y - s_other))) = binary logistic in w1 - w0
    y = np.where(p.labels == 1, 1.0, -1.0)
    m = y * (p.A64 @ (W[:, 1] - W[:, 0]))
    expect = np.mean(np.logaddexp(0, -m)) + 0.05 * np.sum(W**2)
    # identical mathematics, different evaluation order: round-off only
    assert p.value(W.ravel()) == pytest.approx(expect, rel=1e-12)
    q = Softmax(n=3000, d=5, K=4, seed=3)
    # labels are drawn from the ground truth: the true W classifies well above chance (1/4)
    acc = np.mean(np.argmax(q.A64 @ q.W_true, axis=1) == q.labels)
    assert acc > 0.5


@pytest.mark.parametrize("kind", SMALL)
def test_cvxpy_objective_equals_value(kind):
    cp = pytest.importorskip("cvxpy")
    p = SMALL[kind]()
    x = cp.Variable(p.dim)
    x.value = np.random.default_rng(8).standard_normal(p.dim)
    # cvxpy evaluates the same formula with numpy: round-off only
    assert p.cvxpy_objective(x).value == pytest.approx(p.value(x.value), rel=1e-10)


def test_deterministic_and_float32():
    a, b = Logistic(n=50, d=30, sparse=True, seed=4), Logistic(n=50, d=30, sparse=True, seed=4)
    assert (a.A != b.A).nnz == 0 and np.array_equal(a.y, b.y)
    p64, p32 = Softmax(n=40, d=6, K=3, seed=1), Softmax(n=40, d=6, K=3, seed=1, dtype="float32")
    x = np.random.default_rng(0).standard_normal(p64.dim)
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32
    # float32 round-off (eps ~ 6e-8) over sums of length 40
    np.testing.assert_allclose(g32, p64.grad(x), rtol=1e-4, atol=1e-5)
    s32 = Logistic(n=40, d=30, sparse=True, seed=1, density=0.2, dtype="float32")
    assert s32.grad(np.zeros(30, dtype=np.float32)).dtype == np.float32


@pytest.mark.parametrize(
    "cls, params",
    [
        (Logistic, {"n": 0}),
        (Logistic, {"lam": 0.0}),
        (Logistic, {"sparse": True, "density": 0.0}),
        (Logistic, {"sparse": True, "density": 1.5}),
        (Logistic, {"scale_range": 0.5}),
        (Logistic, {"signal": -1.0}),
        (Softmax, {"K": 1}),
        (Softmax, {"d": 0}),
        (Softmax, {"dtype": "float16"}),
    ],
)
def test_impossible_params_raise(cls, params):
    with pytest.raises(ValueError):
        cls(**params)
