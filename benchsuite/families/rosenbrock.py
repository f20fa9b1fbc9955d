"""The Rosenbrock function, 2-D and chained (non-convex).

``f(x) = sum_{i=1}^{d-1} 100 (x_{i+1} - x_i^2)^2 + (1 - x_i)^2`` (Rosenbrock 1960,
The Computer Journal 3, 175-184, citation from memory, for ``d = 2``; the chained form for ``d > 2``
is the one ``scipy.optimize.rosen`` evaluates). ``f >= 0`` with ``f = 0`` only at
``x* = (1, ..., 1)``: each term vanishes only if ``x_i = 1`` for ``i < d`` and
``x_d = x_{d-1}^2 = 1``. For ``d >= 4`` the chained form also has a local
minimum near ``x_1 = -1`` (Kok & Sandrock 2009, Evolutionary Computation 17,
from memory; numerically here f = 3.70 at d = 4, about 3.99 for d >= 7), and
a local method may stop there (scipy's BFGS does from ``x0`` at ``d = 10``);
the published and certified minimum is the global one.

Start: the classical ``(-1.2, 1)`` repeated, ``x0 = (-1.2, 1, -1.2, 1, ...)``.
Gradient and Hessian-vector product are vectorised slices; no Python loop.
The curvature is unbounded on R^d, so L and mu are not declared.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from benchsuite.families.least_squares import positive_int
from benchsuite.problem import Constants, Problem, Published, as_dtype


class Rosenbrock(Problem):
    """Rosenbrock's banana valley; ``d = 2`` or the chained form (see module docstring).

    Parameters: ``d >= 2``, ``dtype``.
    """

    family = "rosenbrock"
    convex = False

    def __init__(self, d: int = 2, dtype: str = "float64") -> None:
        self.dim = positive_int("d", d)
        if self.dim < 2:
            raise ValueError(f"d must be an integer >= 2, got {d!r}")
        self.dtype = as_dtype(dtype)
        self._x0 = np.where(np.arange(self.dim) % 2 == 0, -1.2, 1.0)

    # At d = 2 the oracle is a handful of flops: scalar arithmetic, because each
    # numpy ufunc call costs about a microsecond there (bench_runner.py, d = 2).
    def value(self, x: np.ndarray) -> float:
        if self.dim == 2:
            a, b = float(x[0]), float(x[1])
            return 100.0 * (b - a * a) ** 2 + (1.0 - a) ** 2
        head, tail = x[:-1], x[1:]
        return float(np.sum(100.0 * (tail - head**2) ** 2 + (1.0 - head) ** 2))

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        if out is None:
            out = np.empty(self.dim, dtype=self.dtype)
        if self.dim == 2:
            a, b = float(x[0]), float(x[1])
            w = 200.0 * (b - a * a)
            out[0] = -2.0 * a * w - 2.0 * (1.0 - a)
            out[1] = w
            return out
        head = x[:-1]
        w = 200.0 * (x[1:] - head**2)  # d/dx_{i+1} of term i
        out[0] = 0.0
        out[1:] = w
        out[:-1] += -2.0 * head * w - 2.0 * (1.0 - head)
        return out

    def initial_point(self) -> np.ndarray:
        return self._x0.astype(self.dtype, copy=True)

    def constants(self) -> Constants:
        return Constants(note="non-convex, Hessian unbounded on R^d: no global L or mu")

    def published(self) -> Published:
        return Published(
            f=0.0,
            x=(1.0,) * self.dim,
            # the citation is from memory (module docstring); the output names the publication only
            source="Rosenbrock (1960), The Computer Journal 3:175-184 (2-D); chained form: f >= 0, zero only at ones",
            note="global minimum; for d >= 4 there is also a local minimum near x_1 = -1",
        )

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Tridiagonal Hessian times ``v``: diagonal ``1200 x_i^2 - 400 x_{i+1} + 2`` (i < d),
        ``+200`` (i > 1), off-diagonal ``-400 x_i``."""
        x = np.asarray(x, dtype=np.float64)
        v = np.asarray(v, dtype=np.float64)
        head = x[:-1]
        diag = np.zeros(self.dim)
        diag[:-1] = 1200.0 * head**2 - 400.0 * x[1:] + 2.0
        diag[1:] += 200.0
        off = -400.0 * head
        hv = diag * v
        hv[:-1] += off * v[1:]
        hv[1:] += off * v[:-1]
        return hv

    def describe(self) -> dict[str, Any]:
        return {"form": "2-D" if self.dim == 2 else "chained"}
