"""Linear least squares with a prescribed condition number, and ridge regression.

Both families minimise ``f(x) = 1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` over
``x in R^d`` (``lam = 0`` for plain least squares), a finite sum over the ``n``
rows of ``A``. The gradient is ``A^T (A x - b) / n + lam x`` (two BLAS
matrix-vector products into preallocated buffers) and the Hessian is the
constant ``A^T A / n + lam I``, so L and mu are its extreme eigenvalues:
``L = s_max^2 / n + lam`` and ``mu = s_min^2 / n + lam`` from the singular
values ``s`` of ``A`` (``s_min = 0`` when ``n < d``).

* :class:`LeastSquares` builds ``A = U diag(s) V^T`` from seeded orthonormal
  ``U`` (n x d) and ``V`` (d x d) with ``s^2 / n`` on a geometric grid from
  ``1/kappa`` to ``1``: hence ``L = 1`` and ``mu = 1/kappa`` by construction.
* :class:`Ridge` uses a plain Gaussian design whose columns are correlated
  (rows drawn from ``N(0, Sigma)``, ``Sigma_ij = rho^|i-j|``), the usual ridge
  setting; L and mu come from an SVD of ``A``.

In both, ``b = A x_true + noise * N(0, 1)`` with ``x_true`` standard normal, and
the start is ``x0 = 0``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.problem import Constants, Problem, as_dtype


def orthonormal_columns(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    """An ``n x d`` matrix with orthonormal columns, Haar-distributed (QR with sign fix)."""
    q, r = np.linalg.qr(rng.standard_normal((n, d)))
    return q * np.sign(np.diag(r))


def positive_int(name: str, value: Any) -> int:
    """``value`` as an int, or ValueError naming ``name`` unless it is a positive integer."""
    try:
        ok = not isinstance(value, bool) and int(value) == value and value >= 1
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


class LinearModel(Problem):
    """Shared pieces of losses of the residual ``A x - b`` plus ``lam/2 ||x||^2``.

    Subclasses (least squares, ridge, Huber) store ``A``, ``b`` in the working
    dtype, ``lam`` and a scratch vector ``_t`` of length ``dim``. Rows may be a
    minibatch ``A_B``, ``b_B``: the gradient is ``A^T c / rows + lam x`` for
    the loss derivative ``c`` of each row, an unbiased estimate for uniformly
    sampled rows. The start point is ``x0 = 0``.
    """

    lam: float = 0.0

    def _residual(self, x: np.ndarray, A: np.ndarray, b: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        r = A @ x if out is None else np.matmul(A, x, out=out)
        return np.subtract(r, b, out=r)

    def _finish(self, x: np.ndarray, c: np.ndarray, A: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        """``A^T c / rows(A) + lam x`` into ``out`` (allocated when ``None``)."""
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        np.matmul(A.T, c, out=out)
        out *= 1.0 / A.shape[0]
        if self.lam:
            out += np.multiply(x, self.lam, out=self._t)
        return out

    def _reg(self, x: np.ndarray) -> float:
        return 0.5 * self.lam * float(x @ x) if self.lam else 0.0

    def initial_point(self) -> np.ndarray:
        return np.zeros(self.dim, dtype=self.dtype)


class SquaredLoss(LinearModel):
    """The oracle of ``1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` through two hooks.

    ``_res(x)`` returns the residual ``A x - b`` (in a scratch buffer) and
    ``_grad_from(x, r, out)`` turns a residual into the gradient; the dense
    defaults use BLAS, a sparse family overrides both with its CSR kernel.
    Needs ``A``, ``b``, ``lam``, ``_inv_n``, ``_r`` and ``_t``.
    """

    def _res(self, x: np.ndarray) -> np.ndarray:
        return self._residual(x, self.A, self.b, self._r)

    def _grad_from(self, x: np.ndarray, r: np.ndarray, out: np.ndarray | None) -> np.ndarray:
        return self._finish(x, r, self.A, out)

    def value(self, x: np.ndarray) -> float:
        r = self._res(x)
        return 0.5 * self._inv_n * float(r @ r) + self._reg(x)

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        return self._grad_from(x, self._res(x), out)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        r = self._res(x)
        f = 0.5 * self._inv_n * float(r @ r) + self._reg(x)
        return f, self._grad_from(x, r, out)

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``(1/|B|) A_B^T (A_B x - b_B) + lam x``; unbiased for uniform sampling of rows (dense or CSR rows)."""
        Ab = self.A[idx]
        r = Ab @ x - self.b[idx]
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        out[...] = Ab.T @ r
        out *= 1.0 / len(idx)
        if self.lam:
            out += np.multiply(x, self.lam, out=self._t)
        return out

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        v = np.asarray(v, dtype=np.float64)
        return self.A64.T @ (self.A64 @ v) / self.n_samples + self.lam * v

    def hessian_operator(self, x: np.ndarray) -> Any:
        """``v -> H v`` (the Hessian ``A^T A / n + lam I`` is constant)."""
        return lambda v: self.hessp(x, v)

    def duality_gap(self, x: np.ndarray) -> tuple[float, float, np.ndarray] | None:
        """``(P(x), D(alpha), w(alpha))`` of the ridge dual at ``alpha = b - A x``; None when ``lam = 0``.

        See :func:`benchsuite.families.sparse.ridge_dual` (without regularisation
        the dual needs ``A^T alpha = 0`` and has no point matched to ``x``).
        """
        if not self.lam:
            return None
        from benchsuite.families.sparse import ridge_dual

        return ridge_dual(self.A64, self.b64, self.lam, np.asarray(x, dtype=np.float64))

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        f = cp.sum_squares(self.A64 @ x - self.b64) / (2 * self.n_samples)
        if self.lam:
            f = f + 0.5 * self.lam * cp.sum_squares(x)
        return f


class _LinearRegression(SquaredLoss):
    """Shared oracle of ``1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` (see module docstring)."""

    _constants_note = ""

    def _setup(self, A: np.ndarray, b: np.ndarray, lam: float, s: np.ndarray, dtype: str) -> None:
        """Store the data; ``s`` are the singular values of ``A``, descending, zero-padded to ``d``."""
        self.singular_values = s
        self.dtype = as_dtype(dtype)
        self.n_samples, self.dim = A.shape
        self.lam = float(lam)
        self.A64 = A
        self.b64 = b
        self.A = np.ascontiguousarray(A, dtype=self.dtype)
        self.b = b.astype(self.dtype)
        self._inv_n = 1.0 / self.n_samples
        self._r = np.empty(self.n_samples, dtype=self.dtype)
        self._t = np.empty(self.dim, dtype=self.dtype)

    # -- what is known ---------------------------------------------------
    def constants(self) -> Constants:
        s = self.singular_values
        return Constants(
            L=float(s[0] ** 2 / self.n_samples + self.lam),
            mu=float(s[-1] ** 2 / self.n_samples + self.lam),
            L_kind="exact",
            mu_kind="exact",
            note=self._constants_note,
        )

class LeastSquares(_LinearRegression):
    """Least squares ``1/(2n) ||A x - b||^2`` with ``cond(A^T A) = kappa`` exactly.

    Parameters: ``n`` rows, ``d`` columns (``n >= d``), ``kappa >= 1``,
    ``noise >= 0`` (standard deviation of the Gaussian noise in ``b``), ``seed``,
    ``dtype``. ``A = U diag(s) V^T`` with ``s_j^2 / n`` geometric from ``1/kappa``
    to ``1``, so ``L = 1`` and ``mu = 1/kappa`` exactly (by construction; equal to
    the SVD of the stored ``A`` to round-off). ``closed_form()`` solves by
    ``scipy.linalg.lstsq`` on ``A`` (not by the construction).
    """

    family = "least_squares"
    convex = True
    _constants_note = "s_max^2/n and s_min^2/n of A = U diag(s) V^T, by construction"

    def __init__(
        self,
        n: int = 500,
        d: int = 50,
        kappa: float = 100.0,
        noise: float = 0.1,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)  # fail before generating any data
        n = positive_int("n", n)
        d = positive_int("d", d)
        if n < d:
            raise ValueError(f"need n >= d for a prescribed condition number, got n={n}, d={d}")
        if not (np.isfinite(kappa) and kappa >= 1):
            raise ValueError(f"kappa must be a finite number >= 1, got {kappa!r}")
        if not (np.isfinite(noise) and noise >= 0):
            raise ValueError(f"noise must be >= 0, got {noise!r}")
        self.kappa = float(kappa)
        self.noise = float(noise)
        self.seed = int(seed)
        rng = np.random.default_rng(self.seed)
        U = orthonormal_columns(rng, n, d)
        V = orthonormal_columns(rng, d, d)
        # descending singular values with s^2/n from 1 down to 1/kappa
        s = np.sqrt(n * np.geomspace(1.0, 1.0 / self.kappa, d))
        A = (U * s) @ V.T
        self.x_true = rng.standard_normal(d)
        b = A @ self.x_true + self.noise * rng.standard_normal(n)
        self._setup(A, b, 0.0, s, dtype)

    def closed_form(self) -> np.ndarray:
        from scipy.linalg import lstsq

        return lstsq(self.A64, self.b64)[0]

    def describe(self) -> dict[str, Any]:
        return {"kappa": self.kappa, "noise": self.noise}


class Ridge(_LinearRegression):
    """Ridge regression ``1/(2n) ||A x - b||^2 + lam/2 ||x||^2`` on a correlated design.

    Parameters: ``n``, ``d`` (any sizes, ``n < d`` allowed), ``lam > 0``,
    ``rho`` in ``(-1, 1)`` (correlation ``rho^|i-j|`` between columns ``i``, ``j``),
    ``noise >= 0``, ``seed``, ``dtype``. L and mu are exact: the extreme
    eigenvalues ``s^2/n + lam`` from an SVD of ``A``. ``closed_form()`` solves the
    normal equations ``(A^T A + n lam I) x = A^T b`` by Cholesky (``cho_solve``).
    """

    family = "ridge"
    convex = True
    _constants_note = "s_max^2/n + lam and s_min^2/n + lam from an SVD of A (s_min = 0 if n < d)"

    def __init__(
        self,
        n: int = 500,
        d: int = 50,
        lam: float = 1e-2,
        rho: float = 0.5,
        noise: float = 0.1,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        as_dtype(dtype)  # fail before generating any data
        n = positive_int("n", n)
        d = positive_int("d", d)
        if not (np.isfinite(lam) and lam > 0):
            raise ValueError(f"lam must be > 0 (use least_squares for lam = 0), got {lam!r}")
        if not (-1 < rho < 1):
            raise ValueError(f"rho must lie in (-1, 1), got {rho!r}")
        if not (np.isfinite(noise) and noise >= 0):
            raise ValueError(f"noise must be >= 0, got {noise!r}")
        self.rho = float(rho)
        self.noise = float(noise)
        self.seed = int(seed)
        rng = np.random.default_rng(self.seed)
        # rows ~ N(0, Sigma) with Sigma_ij = rho^|i-j|: A = Z C^T, C C^T = Sigma (Cholesky)
        j = np.arange(d)
        C = np.linalg.cholesky(self.rho ** np.abs(j[:, None] - j[None, :]))
        A = rng.standard_normal((n, d)) @ C.T
        self.x_true = rng.standard_normal(d)
        b = A @ self.x_true + self.noise * rng.standard_normal(n)
        s = np.linalg.svd(A, compute_uv=False)
        self._setup(A, b, lam, np.concatenate([s, np.zeros(d - s.size)]), dtype)

    def closed_form(self) -> np.ndarray:
        from scipy.linalg import cho_factor, cho_solve

        H = self.A64.T @ self.A64
        H[np.diag_indices_from(H)] += self.n_samples * self.lam
        return cho_solve(cho_factor(H), self.A64.T @ self.b64)

    def describe(self) -> dict[str, Any]:
        return {"lam": self.lam, "rho": self.rho, "noise": self.noise}
