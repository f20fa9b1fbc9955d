"""L2-regularised logistic regression: binary (dense or sparse features) and softmax.

Binary (:class:`Logistic`), labels ``y_i in {-1, +1}``::

    f(x) = (1/n) sum_i log(1 + exp(-y_i a_i.x)) + lam/2 ||x||^2
    grad = -(1/n) A^T (y * sigma(-y * A x)) + lam x,   sigma(t) = 1 / (1 + exp(-t))

evaluated stably as ``log1p(exp(-|t|)) + max(t, 0)`` and
``1 / (1 + exp(-t))``. The loss
Hessian is ``A^T D A / n`` with ``D = diag(sigma(m)(1 - sigma(m)))`` and
``0 <= sigma(1 - sigma) <= 1/4``, so ``L <= ||A||_2^2 / (4n) + lam`` and
``mu >= lam``: both are **bounds**.

Multinomial (:class:`Softmax`), ``K`` classes, ``x = vec(W)`` with ``W`` of
shape ``(d, K)`` flattened row-major::

    f(W) = (1/n) sum_i [logsumexp(a_i W) - a_i w_{y_i}] + lam/2 ||W||_F^2
    grad = A^T (P - Y) / n + lam W,   P = softmax(A W) row-wise, Y one-hot

The per-sample Hessian of ``logsumexp`` is ``diag(p) - p p^T``, bounded by
Böhning's bound ``1/2 (I - 11^T/K) <= 1/2 I`` (Böhning 1992, Ann. Inst. Stat.
Math. 44, 197-200; citation from memory), so ``L <= ||A||_2^2 / (2n) + lam`` and ``mu >= lam``.

Data: features are seeded Gaussian (optionally with column scales on a
geometric grid) or, for ``sparse = true``, a scipy.sparse CSR matrix whose
columns are non-zero with power-law frequencies (column ``j`` is non-zero in
a share of rows proportional to ``(j + 1)^-zipf``) — the regime in which
per-coordinate adaptive step sizes are said to help. Labels are drawn from a
seeded ground-truth model scaled so that its margins ``a_i.w`` have standard
deviation ``signal``, so the problem is neither separable noise nor trivial.
The starting point is ``x0 = 0``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.families.least_squares import positive_int
from benchsuite.problem import Constants, Problem, as_dtype


def _check_lam(lam: float) -> float:
    if not (np.isfinite(lam) and lam > 0):
        raise ValueError(f"lam must be > 0, got {lam!r}")
    return float(lam)


def dense_features(rng: np.random.Generator, n: int, d: int, scale_range: float) -> np.ndarray:
    """Standard normal features; column ``j`` scaled by ``scale_range^(-j/(d-1))``."""
    if not (np.isfinite(scale_range) and scale_range >= 1):
        raise ValueError(f"scale_range must be >= 1, got {scale_range!r}")
    A = rng.standard_normal((n, d))
    if scale_range > 1 and d > 1:
        A *= np.geomspace(1.0, 1.0 / scale_range, d)
    return A


def sparse_features(rng: np.random.Generator, n: int, d: int, density: float, zipf: float) -> Any:
    """CSR ``n x d`` matrix with about ``density * n * d`` standard normal non-zeros.

    Column ``j`` is drawn with probability proportional to ``(j + 1)^-zipf``,
    rows uniformly; repeated (row, column) pairs are kept once, so the actual
    density is at most ``density``.
    """
    import scipy.sparse as sp

    if not (0 < density <= 1):
        raise ValueError(f"density must lie in (0, 1], got {density!r}")
    if not (np.isfinite(zipf) and zipf >= 0):
        raise ValueError(f"zipf must be >= 0, got {zipf!r}")
    nnz = max(1, int(round(density * n * d)))
    weights = (np.arange(1, d + 1, dtype=np.float64)) ** -zipf
    cols = rng.choice(d, size=nnz, p=weights / weights.sum())
    rows = rng.integers(0, n, size=nnz)
    flat = np.unique(rows.astype(np.int64) * d + cols)
    vals = rng.standard_normal(flat.size)
    A = sp.csr_matrix((vals, (flat // d, flat % d)), shape=(n, d))
    A.sort_indices()
    return A


def spectral_norm(A: Any) -> float:
    """``||A||_2``: an SVD for dense ``A``, ``scipy.sparse.linalg.svds`` for sparse ``A``.

    ``svds`` is run to machine precision (``tol = 0``); its Ritz value can only
    underestimate ``sigma_max``, so it is padded by a relative ``1e-10`` to keep
    the derived L a bound.
    """
    import scipy.sparse as sp

    if sp.issparse(A):
        if min(A.shape) < 3:  # svds needs k < min(shape); tiny matrices go dense
            return float(np.linalg.norm(A.toarray(), 2))
        from scipy.sparse.linalg import svds

        s = svds(A, k=1, tol=0, return_singular_vectors=False, random_state=0)
        return float(s[0]) * (1 + 1e-10)
    return float(np.linalg.norm(A, 2))


def _margins(rng: np.random.Generator, A: Any, shape: tuple[int, ...], signal: float) -> tuple[np.ndarray, np.ndarray]:
    """A ground-truth ``w`` of ``shape`` and ``Z = A w`` scaled so that ``std(Z) = signal``."""
    if not (np.isfinite(signal) and signal > 0):
        raise ValueError(f"signal must be > 0, got {signal!r}")
    w = rng.standard_normal(shape)
    z = A @ w
    sd = float(np.std(z))
    if sd == 0:
        return w, z
    return w * (signal / sd), z * (signal / sd)


class _Features(Problem):
    """Feature matrix storage shared by the two families."""

    _norm_A: float | None = None

    def _store(self, A: Any, dtype: str) -> None:
        import scipy.sparse as sp

        self.dtype = as_dtype(dtype)
        self.sparse = sp.issparse(A)
        if self.sparse and A.format != "csr":
            A = A.tocsr()
        self.A64 = A
        # float64: the working copy is the float64 data itself (no second copy in memory)
        if self.sparse:
            self.A = A if A.dtype == self.dtype else A.astype(self.dtype)
        else:
            self.A = np.ascontiguousarray(A, dtype=self.dtype)
        self.At = self.A.T.tocsr() if self.sparse else self.A.T
        self.n_samples = A.shape[0]
        self._inv_n = 1.0 / self.n_samples
        self._norm_A = None

    @property
    def norm_A(self) -> float:
        """``||A||_2`` (:func:`spectral_norm`), computed on first use and kept."""
        if self._norm_A is None:
            self._norm_A = spectral_norm(self.A64)
        return self._norm_A

    def _matvec(self, x: np.ndarray, out: np.ndarray) -> np.ndarray:
        """``out = A x`` (dense: BLAS into ``out``; sparse: the CSR kernel into ``out``)."""
        if self.sparse:
            from benchsuite.families.sparse import csr_matvec_into

            return csr_matvec_into(self.A, x, out)
        return np.matmul(self.A, x, out=out)

    def _tmatvec(self, r: np.ndarray, out: np.ndarray) -> np.ndarray:
        """``out = A^T r`` (dense: BLAS into ``out``; sparse: CSR product of the stored transpose)."""
        if self.sparse:
            from benchsuite.families.sparse import csr_matvec_into

            return csr_matvec_into(self.At, r, out)
        return np.matmul(self.At, r, out=out)


class Logistic(_Features):
    """Binary logistic regression with L2 (see module docstring).

    Parameters: ``n`` samples, ``d`` features, ``lam > 0``, ``sparse`` (CSR
    features), ``density`` in ``(0, 1]`` and ``zipf >= 0`` (sparse only),
    ``scale_range >= 1`` (dense only: ratio of largest to smallest column
    scale), ``signal > 0`` (margin scale of the ground truth), ``seed``,
    ``dtype``. ``L = ||A||_2^2/(4n) + lam`` (bound), ``mu = lam`` (bound).
    """

    family = "logistic"
    convex = True

    def __init__(
        self,
        n: int = 500,
        d: int = 50,
        lam: float = 1e-2,
        sparse: bool = False,
        density: float = 0.01,
        zipf: float = 1.0,
        scale_range: float = 1.0,
        signal: float = 3.0,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)  # fail before generating any data
        n = positive_int("n", n)
        self.dim = positive_int("d", d)
        self.lam = _check_lam(lam)
        self.seed = int(seed)
        rng = np.random.default_rng(self.seed)
        if sparse:
            A = sparse_features(rng, n, self.dim, density, zipf)
        else:
            A = dense_features(rng, n, self.dim, scale_range)
        self.w_true, z = _margins(rng, A, (self.dim,), signal)
        # y = +1 with probability sigma(z): a well-specified logistic model
        y = np.where(rng.random(n) < 1.0 / (1.0 + np.exp(-z)), 1.0, -1.0)
        self._setup(A, y, self.lam, dtype, {"sparse": bool(sparse), "density": density if sparse else 1.0,
                                             "zipf": zipf if sparse else None, "scale_range": scale_range,
                                             "signal": signal})

    def _setup(self, A: Any, y: np.ndarray, lam: float, dtype: str, params: dict[str, Any]) -> None:
        """Store features ``A`` (dense or sparse), labels ``y`` in {-1, +1} and scratch buffers.

        Subclasses that build or read their data another way (large seeded CSR
        data, a user's file) call this instead of ``Logistic.__init__``.
        """
        n, d = A.shape
        self.dim = int(d)
        self.lam = float(lam)
        self._store(A, dtype)
        self.y64 = np.asarray(y, dtype=np.float64)
        self.y = self.y64.astype(self.dtype)
        self._negy = -self.y
        self._negy_n = self._negy * self.dtype.type(self._inv_n)  # -y/n: the gradient weights' factor
        self._params = params
        self._z = np.empty(n, dtype=self.dtype)
        self._a = np.empty(n, dtype=self.dtype)
        self._b = np.empty(n, dtype=self.dtype)
        self._t = np.empty(self.dim, dtype=self.dtype)

    # -- oracle -------------------------------------------------------------
    def _neg_margin(self, x: np.ndarray, A: Any, negy: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        """``t = -y * (A x)``, written into ``out`` for the full dense data."""
        z = A @ x if (self.sparse or out is None) else np.matmul(A, x, out=out)
        return np.multiply(z, negy, out=z)

    def _weights(self, t: np.ndarray, negy: np.ndarray) -> np.ndarray:
        """``-y * sigma(-y a.x)``, the derivative of each loss term in ``a.x``, in place of ``t``.

        ``sigma(t) = 1 / (1 + exp(-t))`` by SIMD ``exp`` (about 3x faster than
        ``scipy.special.expit``); ``exp`` overflowing to ``inf`` gives the correct
        limit 0, and both tails keep full relative accuracy.
        """
        np.negative(t, out=t)
        with np.errstate(over="ignore"):
            np.exp(t, out=t)
        t += 1.0
        np.reciprocal(t, out=t)
        return np.multiply(t, negy, out=t)

    def _full_margin(self, x: np.ndarray) -> np.ndarray:
        """``m = y * (A x)`` over all rows, in the scratch buffer (no temporaries)."""
        m = self._matvec(x, self._z)
        return np.multiply(m, self.y, out=m)

    def _full_grad(self, x: np.ndarray, m: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        """``A^T s + lam x`` with ``s_i = -(y_i / n) sigma(-m_i) = -(y_i/n) / (1 + exp(m_i))``; overwrites ``m``.

        Four in-place passes over the margins (``exp``, ``+1``, a division into
        the precomputed ``-y/n``) and the transposed product accumulated onto
        ``lam x`` in ``out``: no temporaries, no extra pass over ``d`` for the
        ``1/n`` scaling. ``exp`` overflowing to ``inf`` gives the correct limit
        ``s_i = 0``; both tails keep full relative accuracy.
        """
        with np.errstate(over="ignore"):
            np.exp(m, out=m)
        m += 1.0
        s = np.divide(self._negy_n, m, out=m)
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        if self.sparse:
            from benchsuite.families.sparse import csr_matvec_into

            np.multiply(x, self.lam, out=out)
            return csr_matvec_into(self.At, s, out, accumulate=True)
        np.matmul(self.At, s, out=out)
        out += np.multiply(x, self.lam, out=self._t)
        return out

    def _finish(self, x: np.ndarray, s: np.ndarray, out: np.ndarray | None, scale: float, At: Any) -> np.ndarray:
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        if At is None:
            self._tmatvec(s, out)
        else:
            out[...] = At @ s
        out *= scale
        out += np.multiply(x, self.lam, out=self._t)
        return out

    def _mean_softplus_neg(self, m: np.ndarray) -> float:
        """Mean of ``log(1 + exp(-m)) = log1p(exp(-|m|)) - min(m, 0)``, stable, in two buffers."""
        a = np.abs(m, out=self._a)
        np.negative(a, out=a)
        np.exp(a, out=a)
        np.log1p(a, out=a)
        return (float(a.sum()) - float(np.minimum(m, 0.0, out=self._b).sum())) * self._inv_n

    def value(self, x: np.ndarray) -> float:
        return self._mean_softplus_neg(self._full_margin(x)) + 0.5 * self.lam * float(x @ x)

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        return self._full_grad(x, self._full_margin(x), out)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        m = self._full_margin(x)
        f = self._mean_softplus_neg(m) + 0.5 * self.lam * float(x @ x)
        return f, self._full_grad(x, m, out)

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``(1/|B|) sum_{i in B} grad f_i(x) + lam x``; unbiased for uniform sampling of rows."""
        Ab, negy = self.A[idx], self._negy[idx]
        t = self._neg_margin(x, Ab, negy, None)
        return self._finish(x, self._weights(t, negy), out, 1.0 / len(idx), Ab.T)

    def initial_point(self) -> np.ndarray:
        return np.zeros(self.dim, dtype=self.dtype)

    # -- what is known ---------------------------------------------------
    def constants(self) -> Constants:
        how = "svds" if self.sparse else "SVD"
        return Constants(
            L=self.norm_A**2 / (4 * self.n_samples) + self.lam,
            mu=self.lam,
            L_kind="bound",
            mu_kind="bound",
            note=f"L <= ||A||_2^2/(4n) + lam (sigma' <= 1/4, ||A||_2 by {how}); mu >= lam",
        )

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        from scipy.special import expit

        x = np.asarray(x, dtype=np.float64)
        v = np.asarray(v, dtype=np.float64)
        p = expit(self.y64 * (self.A64 @ x))
        return self.A64.T @ (p * (1 - p) * (self.A64 @ v)) / self.n_samples + self.lam * v

    def hessian_operator(self, x: np.ndarray) -> Any:
        """``v -> H(x) v`` with the curvature weights ``sigma(1 - sigma) / n`` computed once (Newton-CG)."""
        from scipy.special import expit

        x = np.asarray(x, dtype=np.float64)
        p = expit(self.y64 * (self.A64 @ x))
        p *= 1.0 - p
        p *= 1.0 / self.n_samples
        A, lam = self.A64, self.lam
        return lambda v: A.T @ (p * (A @ v)) + lam * v

    def duality_gap(self, x: np.ndarray) -> tuple[float, float, np.ndarray]:
        """``(P(x), D(alpha), w(alpha))``: the primal, the entropy dual at the dual point matched to ``x``.

        With ``phi(m) = log(1 + exp(-m))`` and labels ``y_i``, the Fenchel dual of
        ``P(x) = (1/n) sum_i phi(y_i a_i.x) + lam/2 ||x||^2`` is::

            D(alpha) = (1/n) sum_i H(alpha_i) - lam/2 ||w(alpha)||^2,   alpha_i in [0, 1],
            w(alpha) = A^T (alpha * y) / (lam n),   H(a) = -a log a - (1 - a) log(1 - a)

        (``-phi*(-a) = H(a)``: the binary entropy). Weak duality gives
        ``D(alpha) <= P* <= P(x)`` for every feasible ``alpha``, so
        ``P(x) - D(alpha)`` bounds ``P(x) - P*`` whatever produced ``x``. The dual
        point matched to ``x`` is ``alpha_i = sigma(-y_i a_i.x)`` (``-phi'``);
        at the optimum ``w(alpha*) = x*`` and the gap is 0. Computed in float64.
        """
        from scipy.special import entr, expit

        x = np.asarray(x, dtype=np.float64)
        m = self.y64 * (self.A64 @ x)
        n = self.n_samples
        primal = float(np.logaddexp(0.0, -m).sum()) / n + 0.5 * self.lam * float(x @ x)
        alpha = expit(-m)
        w = (self.A64.T @ (alpha * self.y64)) / (self.lam * n)
        # 1 - alpha = sigma(m), evaluated directly: no cancellation when alpha is near 1
        dual = float((entr(alpha) + entr(expit(m))).sum()) / n - 0.5 * self.lam * float(w @ w)
        return primal, dual, w

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        m = cp.multiply(self.y64, self.A64 @ x)
        return cp.sum(cp.logistic(-m)) / self.n_samples + 0.5 * self.lam * cp.sum_squares(x)

    def describe(self) -> dict[str, Any]:
        out = dict(self._params, lam=self.lam)
        if self.sparse:
            out["nnz_density"] = self.A.nnz / (self.n_samples * self.dim)
        return out


class Softmax(_Features):
    """Multinomial (softmax) regression with L2 (see module docstring).

    Parameters: ``n`` samples, ``d`` features, ``K >= 2`` classes, ``lam > 0``,
    ``scale_range >= 1``, ``signal > 0``, ``seed``, ``dtype``. The variable is
    ``x = W.ravel()`` (``W`` of shape ``(d, K)``, row-major), so ``dim = d K``.
    Labels are drawn from ``softmax(a_i W_true)``. ``L = ||A||_2^2/(2n) + lam``
    (bound, by Böhning's bound on the softmax Hessian), ``mu = lam`` (bound).
    """

    family = "softmax"
    convex = True

    def __init__(
        self,
        n: int = 500,
        d: int = 20,
        K: int = 5,
        lam: float = 1e-2,
        scale_range: float = 1.0,
        signal: float = 3.0,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)  # fail before generating any data
        n = positive_int("n", n)
        self.d = positive_int("d", d)
        self.K = positive_int("K", K)
        if self.K < 2:
            raise ValueError(f"K must be >= 2 classes, got {K!r}")
        self.dim = self.d * self.K
        self.lam = _check_lam(lam)
        self.seed = int(seed)
        rng = np.random.default_rng(self.seed)
        A = dense_features(rng, n, self.d, scale_range)
        self.W_true, Z = _margins(rng, A, (self.d, self.K), signal)
        P = _softmax_rows(Z)
        # inverse-CDF draw of one class per row from P
        u = rng.random((n, 1))
        labels = np.minimum((np.cumsum(P, axis=1) < u).sum(axis=1), self.K - 1)
        self.scale_range = float(scale_range)
        self.signal = float(signal)
        self._setup(A, labels, self.K, self.lam, dtype)

    def _setup(self, A: Any, labels: np.ndarray, K: int, lam: float, dtype: str) -> None:
        """Store features ``A`` (dense or CSR), class labels in ``0..K-1`` and scratch buffers.

        Subclasses that read their data (a user's file) call this instead of ``Softmax.__init__``.
        """
        n, d = A.shape
        self.d, self.K, self.dim, self.lam = int(d), int(K), int(d) * int(K), float(lam)
        self.labels = np.asarray(labels, dtype=np.int64)
        self._store(A, dtype)
        self.Y64 = np.zeros((n, self.K))
        self.Y64[np.arange(n), self.labels] = 1.0
        self.Y = self.Y64.astype(self.dtype)
        self._S = np.empty((n, self.K), dtype=self.dtype)
        self._t = np.empty(self.dim, dtype=self.dtype)

    # -- oracle -------------------------------------------------------------
    def _scores(self, x: np.ndarray, A: Any, out: np.ndarray | None) -> np.ndarray:
        W = x.reshape(self.d, self.K)
        if out is None:
            return np.asarray(A @ W)
        if self.sparse:
            out[...] = A @ W
            return out
        return np.matmul(A, W, out=out)

    def _loss(self, S: np.ndarray, Y: np.ndarray) -> float:
        """Mean of ``logsumexp(s_i) - s_{i, y_i}``; leaves ``S`` shifted by its row maxima."""
        S -= S.max(axis=1, keepdims=True)
        lse = np.log(np.exp(S).sum(axis=1))
        return float(lse.mean() - np.einsum("ik,ik->", S, Y) / S.shape[0])

    def _finish(self, x: np.ndarray, S: np.ndarray, Y: np.ndarray, A: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        """Gradient ``A^T (softmax(S) - Y) / n_rows + lam x``, overwriting ``S`` (row-shifted scores)."""
        np.exp(S, out=S)
        S /= S.sum(axis=1, keepdims=True)
        S -= Y
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        if self.sparse:
            out.reshape(self.d, self.K)[...] = A.T @ S
        else:
            np.matmul(A.T, S, out=out.reshape(self.d, self.K))
        out *= 1.0 / A.shape[0]
        out += np.multiply(x, self.lam, out=self._t)
        return out

    def value(self, x: np.ndarray) -> float:
        S = self._scores(x, self.A, self._S)
        return self._loss(S, self.Y) + 0.5 * self.lam * float(x @ x)

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        S = self._scores(x, self.A, self._S)
        S -= S.max(axis=1, keepdims=True)
        return self._finish(x, S, self.Y, self.A, out)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        S = self._scores(x, self.A, self._S)
        f = self._loss(S, self.Y) + 0.5 * self.lam * float(x @ x)
        return f, self._finish(x, S, self.Y, self.A, out)

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``(1/|B|) A_B^T (softmax(A_B W) - Y_B) + lam x``; unbiased for uniform sampling of rows."""
        Ab = self.A[idx]
        S = self._scores(x, Ab, None)
        S -= S.max(axis=1, keepdims=True)
        return self._finish(x, S, self.Y[idx], Ab, out)

    def initial_point(self) -> np.ndarray:
        return np.zeros(self.dim, dtype=self.dtype)

    # -- what is known ---------------------------------------------------
    def constants(self) -> Constants:
        return Constants(
            L=self.norm_A**2 / (2 * self.n_samples) + self.lam,
            mu=self.lam,
            L_kind="bound",
            mu_kind="bound",
            note="L <= ||A||_2^2/(2n) + lam (Böhning: diag(p) - pp^T <= (I - 11^T/K)/2 <= I/2); mu >= lam",
        )

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        """``A^T [P * U - P * rowsum(P * U)] / n + lam v`` with ``U = A V``."""
        W = np.asarray(x, dtype=np.float64).reshape(self.d, self.K)
        V = np.asarray(v, dtype=np.float64).reshape(self.d, self.K)
        P = _softmax_rows(self.A64 @ W)
        U = self.A64 @ V
        PU = P * U
        HU = PU - P * PU.sum(axis=1, keepdims=True)
        return (self.A64.T @ HU / self.n_samples).ravel() + self.lam * V.ravel()

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        S = self.A64 @ cp.reshape(x, (self.d, self.K), order="C")
        loss = cp.sum(cp.log_sum_exp(S, axis=1)) - cp.sum(cp.multiply(self.Y64, S))
        return loss / self.n_samples + 0.5 * self.lam * cp.sum_squares(x)

    def describe(self) -> dict[str, Any]:
        return {"K": self.K, "lam": self.lam, "scale_range": self.scale_range, "signal": self.signal}


def _softmax_rows(Z: np.ndarray) -> np.ndarray:
    E = np.exp(Z - Z.max(axis=1, keepdims=True))
    return E / E.sum(axis=1, keepdims=True)
