"""Longley's regression: the NIST StRD linear least-squares benchmark.

``f(b) = ||X b - y||^2`` (plain sum of squares, so ``f*`` is NIST's certified
residual sum of squares) with ``y`` = total employment and ``X`` = a column of
ones and six macro-economic series (GNP deflator, GNP, unemployed, armed
forces, population, year), 16 annual observations 1947-1962: the model
``y = b0 + b1 x1 + ... + b6 x6``. The data come from statsmodels
(``statsmodels.datasets.longley``, the same 16 rows NIST publishes).

The design is famously ill-conditioned: ``cond(X)`` is about 4.9e9, so
``cond(X^T X) = kappa`` is about 2.4e19, beyond float64. Hence

* :meth:`Longley.closed_form` solves by Householder QR of the column-scaled
  design (scaling each column to unit norm brings ``cond`` down to about 1e4..1e5
  and QR never forms ``X^T X``), then one step of iterative refinement;
* :meth:`Longley.constants` computes ``X^T X`` **exactly** in rational
  arithmetic from the float64 data (``fractions.Fraction``), then
  ``L = 2 lambda_max(X^T X)`` from its float64 rounding and
  ``mu = 2 / lambda_max((X^T X)^{-1})`` from the exactly computed inverse,
  rounded: both extreme eigenvalues are then well-conditioned problems and
  exact to float64 round-off, while ``eigvalsh`` of the rounded ``X^T X``
  would return noise for ``mu``.
"""

from __future__ import annotations

from fractions import Fraction
from typing import Any

import numpy as np

from benchsuite.problem import Constants, Published, ResidualProblem, as_dtype

# NIST StRD Longley certified values (from memory; the tests check them
# against statsmodels OLS and an exact rational solve of the same data).
CERTIFIED: tuple[float, ...] = (
    -3482258.63459582,
    15.0618722713733,
    -0.358191792925910e-01,
    -2.02022980381683,
    -1.03322686717359,
    -0.511041056535807e-01,
    1829.15146461355,
)
CERTIFIED_SD: tuple[float, ...] = (
    890420.383607373,
    84.9149257747669,
    0.334910077722432e-01,
    0.488399681651699,
    0.214274163161675,
    0.226073200069370,
    455.478499142212,
)
RESIDUAL_SD: float = 304.854073561965
RSS: float = 836424.055505915
R_SQUARED: float = 0.995479004577296
SOURCE = "NIST StRD Longley certified values"


_COLUMNS = ("GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR")


def load_longley(via_loader: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The design ``X`` (16 x 7, a column of ones first) and response ``y`` from statsmodels.

    Reads the CSV file statsmodels ships (``statsmodels/datasets/longley/longley.csv``)
    directly, which imports only the light top-level package (``statsmodels.datasets``
    pulls in most of statsmodels, ~2 s); falls back to statsmodels' own loader when
    that file is not where this version keeps it, or when ``via_loader`` is set.
    """
    if not via_loader:
        import csv
        from importlib import resources

        try:
            text = (resources.files("statsmodels") / "datasets" / "longley" / "longley.csv").read_text()
        except (ModuleNotFoundError, FileNotFoundError, NotADirectoryError):
            text = None
        if text is not None:
            rows = list(csv.DictReader(text.splitlines()))
            exog = np.array([[float(r[c]) for c in _COLUMNS] for r in rows])
            y = np.array([float(r["TOTEMP"]) for r in rows])
            return np.ascontiguousarray(np.column_stack([np.ones(len(rows)), exog])), y
    from statsmodels.datasets import longley

    data = longley.load_pandas()
    exog = data.exog[list(_COLUMNS)].to_numpy(dtype=np.float64)
    X = np.column_stack([np.ones(exog.shape[0]), exog])
    return np.ascontiguousarray(X), data.endog.to_numpy(dtype=np.float64).copy()


def exact_gram(X: np.ndarray) -> list[list[Fraction]]:
    """``X^T X`` in exact rational arithmetic from the float64 entries of ``X``."""
    cols = [[Fraction(float(v)) for v in X[:, j]] for j in range(X.shape[1])]
    d = len(cols)
    G = [[Fraction(0)] * d for _ in range(d)]
    for i in range(d):
        for j in range(i, d):
            s = sum((a * b for a, b in zip(cols[i], cols[j])), Fraction(0))
            G[i][j] = G[j][i] = s
    return G


def exact_inverse(M: list[list[Fraction]]) -> list[list[Fraction]]:
    """Inverse of a nonsingular rational matrix by Gauss-Jordan elimination (exact)."""
    n = len(M)
    A = [row[:] + [Fraction(int(i == j)) for j in range(n)] for i, row in enumerate(M)]
    for c in range(n):
        p = next(r for r in range(c, n) if A[r][c] != 0)
        A[c], A[p] = A[p], A[c]
        piv = A[c][c]
        A[c] = [v / piv for v in A[c]]
        for r in range(n):
            if r != c and A[r][c] != 0:
                f = A[r][c]
                A[r] = [a - f * b for a, b in zip(A[r], A[c])]
    return [row[n:] for row in A]


class Longley(ResidualProblem):
    """``f(b) = ||X b - y||^2`` on Longley's data (see the module docstring).

    Parameters: ``dtype`` only (the data are fixed). Start ``b = 0``. Residuals
    ``r = X b - y``, Jacobian ``X``; ``n_samples = 16``, ``dim = 7``.
    """

    family = "longley"
    convex = True

    def __init__(self, dtype: str = "float64") -> None:
        self.dtype = as_dtype(dtype)
        self.X64, self.y64 = load_longley()
        self.n_samples, self.dim = self.X64.shape
        self.X = self.X64.astype(self.dtype)
        self.y = self.y64.astype(self.dtype)
        self._r = np.empty(self.n_samples, dtype=self.dtype)

    # -- oracle --------------------------------------------------------------------
    def residuals(self, x: np.ndarray) -> np.ndarray:
        return self.X @ x - self.y

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        return self.X

    def residuals_rows(self, x: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        Xb = self.X[idx]
        return Xb @ x - self.y[idx], Xb

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        r = np.matmul(self.X, x, out=self._r)
        r -= self.y
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        np.matmul(r, self.X, out=out)
        out *= 2.0
        return float(r @ r), out

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        return self.value_and_grad(x, out=out)[1]

    def value(self, x: np.ndarray) -> float:
        r = np.matmul(self.X, x, out=self._r)
        r -= self.y
        return float(r @ r)

    def initial_point(self) -> np.ndarray:
        return np.zeros(self.dim, dtype=self.dtype)

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        v = np.asarray(v, dtype=np.float64)
        return 2.0 * (self.X64.T @ (self.X64 @ v))

    # -- what is known ------------------------------------------------------------------
    def closed_form(self) -> np.ndarray:
        """Least-squares solution by QR of the column-scaled design plus one refinement step.

        ``X = Xs D`` with ``D`` the column norms; ``Xs = Q R`` (Householder);
        ``b = D^{-1} R^{-1} Q^T y``; then ``b += D^{-1} R^{-1} Q^T (y - X b)``
        corrects the error of the first solve (the correction equation is the
        same least-squares problem with the current residual as right-hand side).
        """
        from scipy.linalg import qr, solve_triangular

        D = np.linalg.norm(self.X64, axis=0)
        Q, R = qr(self.X64 / D, mode="economic")
        b = solve_triangular(R, Q.T @ self.y64) / D
        r = self.y64 - self.X64 @ b
        b = b + solve_triangular(R, Q.T @ r) / D
        return b

    def constants(self) -> Constants:
        G = exact_gram(self.X64)
        Ginv = exact_inverse(G)
        lam_max = float(np.linalg.eigvalsh(np.array([[float(v) for v in row] for row in G]))[-1])
        inv_max = float(np.linalg.eigvalsh(np.array([[float(v) for v in row] for row in Ginv]))[-1])
        return Constants(
            L=2.0 * lam_max,
            mu=2.0 / inv_max,
            L_kind="exact",
            mu_kind="exact",
            note=(
                "Hessian 2 X^T X formed exactly in rational arithmetic; L = 2 lambda_max(X^T X), "
                "mu = 2 / lambda_max((X^T X)^-1) (exact inverse); kappa ~ 2.4e19, beyond float64"
            ),
        )

    def published(self) -> Published:
        return Published(
            f=RSS,
            x=CERTIFIED,
            source=SOURCE,  # recalled from memory: see CERTIFIED above
            note=f"residual SD {RESIDUAL_SD!r}, R^2 {R_SQUARED!r}; f = residual sum of squares",
        )

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        return cp.sum_squares(self.X64 @ x - self.y64)

    def describe(self) -> dict[str, Any]:
        return {"data": "Longley (statsmodels)", "model": "y = b0 + b1 x1 + ... + b6 x6"}
