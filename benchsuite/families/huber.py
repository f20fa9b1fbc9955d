"""Huber regression: a smooth, convex, outlier-robust loss.

``f(x) = (1/n) sum_i h_delta(a_i.x - b_i) + lam/2 ||x||^2`` with the Huber function
(Huber 1964, Ann. Math. Statist. 35, 73-101; citation from memory)::

    h_delta(r) = r^2 / 2                 if |r| <= delta
               = delta (|r| - delta/2)   otherwise

which equals ``c (r - c/2)`` with ``c = clip(r, -delta, delta)``; its derivative is
``c`` and its (generalised) second derivative the indicator ``|r| <= delta``, so
``0 <= h'' <= 1`` and ``L <= ||A||_2^2 / n + lam``, ``mu >= lam`` (both bounds;
with ``lam = 0`` the lower bound is 0: the problem need not be strongly
convex). cvxpy's ``huber(r, M)`` is ``r^2`` for ``|r| <= M`` and ``2M|r| - M^2``
otherwise, i.e. ``2 h_M(r)``; the cvxpy objective uses ``huber(r, delta) / (2n)``.

Data: ``A`` standard normal, ``b = A x_true + noise * N(0, 1)``, and a share
``outliers`` of the rows (chosen by the seed) gets a gross error
``outlier_scale * N(0, 1)`` added to ``b``. Start: ``x0 = 0``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.families.least_squares import LinearModel, positive_int
from benchsuite.problem import Constants, as_dtype


class Huber(LinearModel):
    """Huber regression with optional L2 (see module docstring).

    Parameters: ``n`` rows, ``d`` columns, ``delta > 0`` (the Huber threshold),
    ``lam >= 0``, ``outliers`` in ``[0, 1)`` (share of corrupted responses),
    ``outlier_scale > 0``, ``noise >= 0``, ``seed``, ``dtype``.
    """

    family = "huber"
    convex = True

    def __init__(
        self,
        n: int = 500,
        d: int = 50,
        delta: float = 1.0,
        lam: float = 1e-3,
        outliers: float = 0.1,
        outlier_scale: float = 20.0,
        noise: float = 0.3,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        n, d = positive_int("n", n), positive_int("d", d)
        if not (np.isfinite(delta) and delta > 0):
            raise ValueError(f"delta must be > 0, got {delta!r}")
        if not (np.isfinite(lam) and lam >= 0):
            raise ValueError(f"lam must be >= 0, got {lam!r}")
        if not (0 <= outliers < 1):
            raise ValueError(f"outliers must lie in [0, 1), got {outliers!r}")
        if not (np.isfinite(outlier_scale) and outlier_scale > 0):
            raise ValueError(f"outlier_scale must be > 0, got {outlier_scale!r}")
        if not (np.isfinite(noise) and noise >= 0):
            raise ValueError(f"noise must be >= 0, got {noise!r}")
        self.dtype = as_dtype(dtype)
        self.n_samples, self.dim = int(n), int(d)
        self.delta, self.lam = float(delta), float(lam)
        self.outliers, self.outlier_scale, self.noise = float(outliers), float(outlier_scale), float(noise)
        self.seed = int(seed)
        rng = np.random.default_rng(self.seed)
        A = rng.standard_normal((self.n_samples, self.dim))
        self.x_true = rng.standard_normal(self.dim)
        b = A @ self.x_true + self.noise * rng.standard_normal(self.n_samples)
        n_out = int(round(self.outliers * self.n_samples))
        self.outlier_rows = np.sort(rng.choice(self.n_samples, size=n_out, replace=False))
        b[self.outlier_rows] += self.outlier_scale * rng.standard_normal(n_out)
        self.A64, self.b64 = A, b
        self.A = np.ascontiguousarray(A, dtype=self.dtype)
        self.b = b.astype(self.dtype)
        self.norm_A = float(np.linalg.norm(A, 2))
        self._r = np.empty(self.n_samples, dtype=self.dtype)
        self._c = np.empty(self.n_samples, dtype=self.dtype)
        self._t = np.empty(self.dim, dtype=self.dtype)

    # -- oracle -------------------------------------------------------------
    def _loss(self, r: np.ndarray, c: np.ndarray) -> float:
        """Mean of ``h(r) = c (r - c/2)``, ``c = clip(r)`` already in ``c``."""
        return float(c @ r - 0.5 * (c @ c)) / r.size

    def value(self, x: np.ndarray) -> float:
        r = self._residual(x, self.A, self.b, self._r)
        c = np.clip(r, -self.delta, self.delta, out=self._c)
        return self._loss(r, c) + self._reg(x)

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        r = self._residual(x, self.A, self.b, self._r)
        return self._finish(x, np.clip(r, -self.delta, self.delta, out=self._c), self.A, out)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        r = self._residual(x, self.A, self.b, self._r)
        c = np.clip(r, -self.delta, self.delta, out=self._c)
        return self._loss(r, c) + self._reg(x), self._finish(x, c, self.A, out)

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``(1/|B|) A_B^T clip(A_B x - b_B) + lam x``; unbiased for uniform sampling of rows."""
        Ab = self.A[idx]
        r = self._residual(x, Ab, self.b[idx], None)
        return self._finish(x, np.clip(r, -self.delta, self.delta, out=r), Ab, out)

    # -- what is known ---------------------------------------------------
    def constants(self) -> Constants:
        note = "L <= ||A||_2^2/n + lam (0 <= h'' <= 1, ||A||_2 by SVD); mu >= lam"
        if not self.lam:
            note += " (lam = 0: not strongly convex in general, mu bound is 0)"
        return Constants(
            L=self.norm_A**2 / self.n_samples + self.lam,
            mu=self.lam,
            L_kind="bound",
            mu_kind="bound",
            note=note,
        )

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Generalised Hessian: ``A^T diag(|r| <= delta) A v / n + lam v``."""
        v = np.asarray(v, dtype=np.float64)
        r = self.A64 @ np.asarray(x, dtype=np.float64) - self.b64
        inside = np.abs(r) <= self.delta
        return self.A64.T @ (inside * (self.A64 @ v)) / self.n_samples + self.lam * v

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        # cp.huber(r, M) = 2 h_M(r), hence the factor 1/(2n)
        f = cp.sum(cp.huber(self.A64 @ x - self.b64, self.delta)) / (2 * self.n_samples)
        if self.lam:
            f = f + 0.5 * self.lam * cp.sum_squares(x)
        return f

    def describe(self) -> dict[str, Any]:
        return {"delta": self.delta, "lam": self.lam, "outliers": self.outliers, "noise": self.noise}
