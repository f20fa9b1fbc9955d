"""Quadratic with a prescribed spectrum.

``f(x) = 1/2 (x - x*)^T A (x - x*)`` with ``A = Q diag(lam) Q^T``; ``Q`` is the
identity (``rotate = false``) or a seeded Haar-random orthogonal matrix. The
eigenvalues ``lam`` run from ``mu`` to ``L`` on a geometric or a linear grid,
or are given outright. Hence ``f* = 0``, ``L = max lam`` and ``mu = min lam``
exactly, and gradient descent has a closed-form trajectory per eigen-direction
(the runner's exactness test relies on it).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.problem import Constants, Problem, as_dtype


def eigen_grid(d: int, L: float, mu: float, kind: str) -> np.ndarray:
    """``d`` eigenvalues from ``mu`` to ``L`` (ascending): geometric or linear grid."""
    if d == 1:
        return np.array([L])
    if kind == "geometric":
        return np.geomspace(mu, L, d)
    if kind == "linear":
        return np.linspace(mu, L, d)
    raise ValueError(f"spectrum must be 'geometric' or 'linear', got {kind!r}")


class Quadratic(Problem):
    """Strongly convex quadratic ``1/2 (x - x*)^T A (x - x*)`` with known spectrum.

    Parameters: ``d`` (dimension), ``L`` and ``mu`` (largest and smallest
    eigenvalue) or ``eigenvalues`` (an explicit list), ``spectrum``
    (``"geometric"`` or ``"linear"``), ``rotate`` (seeded orthogonal basis),
    ``seed`` (x* and x0 are standard normal draws from it).
    """

    family = "quadratic"
    convex = True

    def __init__(
        self,
        d: int | None = None,
        L: float = 1.0,
        mu: float = 1e-2,
        spectrum: str = "geometric",
        eigenvalues: list[float] | None = None,
        rotate: bool = False,
        seed: int = 0,
        dtype: str = "float64",
    ) -> None:
        self.dtype = as_dtype(dtype)
        if eigenvalues is not None:
            lam = np.sort(np.asarray(eigenvalues, dtype=np.float64))
            if lam.ndim != 1 or lam.size == 0:
                raise ValueError("eigenvalues must be a non-empty list of numbers")
            if d is not None and d != lam.size:
                raise ValueError(f"d = {d} but {lam.size} eigenvalues are given")
        else:
            if d is None or int(d) != d or d < 1:
                raise ValueError(f"d must be a positive integer, got {d!r}")
            if not (0 < mu <= L) or not np.isfinite(L):
                raise ValueError(f"need 0 < mu <= L < inf, got mu={mu!r}, L={L!r}")
            lam = eigen_grid(int(d), float(L), float(mu), spectrum)
        if not np.all(lam > 0) or not np.all(np.isfinite(lam)):
            raise ValueError("eigenvalues must be positive and finite")
        self.dim = int(lam.size)
        self.eigenvalues = lam
        self.rotate = bool(rotate)
        self.seed = int(seed)
        self.spectrum_kind = spectrum if eigenvalues is None else "explicit"
        rng = np.random.default_rng(self.seed)
        self.x_star = rng.standard_normal(self.dim)
        self._x0 = rng.standard_normal(self.dim)
        if self.rotate:
            from scipy.stats import ortho_group

            self.Q = ortho_group.rvs(self.dim, random_state=rng)
            self.A = (self.Q * lam) @ self.Q.T
            self.A = 0.5 * (self.A + self.A.T)
            self.A = self.A.astype(self.dtype)
        else:
            self.Q = None
            self.A = None
        self._lam = lam.astype(self.dtype)
        self._xs = self.x_star.astype(self.dtype)
        self._buf = np.empty(self.dim, dtype=self.dtype)

    # -- oracle -------------------------------------------------------------
    def _apply(self, v: np.ndarray, out: np.ndarray) -> np.ndarray:
        if self.A is None:
            return np.multiply(self._lam, v, out=out)
        return np.matmul(self.A, v, out=out)

    def value(self, x: np.ndarray) -> float:
        e = np.subtract(x, self._xs, out=self._buf)
        return 0.5 * float(e @ self._apply(e, np.empty_like(e)))

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        e = np.subtract(x, self._xs, out=self._buf)
        return self._apply(e, out)

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        g = self.grad(x, out=out)
        return 0.5 * float(self._buf @ g), g

    def initial_point(self) -> np.ndarray:
        return self._x0.astype(self.dtype, copy=True)

    # -- what is known ---------------------------------------------------
    def constants(self) -> Constants:
        return Constants(
            L=float(self.eigenvalues[-1]),
            mu=float(self.eigenvalues[0]),
            L_kind="exact",
            mu_kind="exact",
            note="largest and smallest eigenvalue of A, by construction",
        )

    def closed_form(self) -> np.ndarray:
        return self.x_star.copy()

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        v = np.asarray(v, dtype=np.float64)
        if self.Q is None:
            return self.eigenvalues * v
        return self.Q @ (self.eigenvalues * (self.Q.T @ v))

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        e = x - self.x_star
        if self.Q is None:
            return 0.5 * cp.sum(cp.multiply(self.eigenvalues, cp.square(e)))
        # A = Q diag(lam) Q^T  ->  1/2 e^T A e = 1/2 || diag(sqrt(lam)) Q^T e ||^2
        return 0.5 * cp.sum_squares(np.sqrt(self.eigenvalues)[:, None] * self.Q.T @ e)

    def describe(self) -> dict[str, Any]:
        return {"spectrum": self.spectrum_kind, "rotate": self.rotate}
