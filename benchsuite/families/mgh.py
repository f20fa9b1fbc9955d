"""Moré, Garbow & Hillstrom (1981) unconstrained test functions.

Source: J. J. Moré, B. S. Garbow, K. E. Hillstrom, "Testing unconstrained
optimization software", ACM Trans. Math. Software 7(1):17-41, 1981 (citation
from memory). Each
function is a sum of squares ``f(x) = sum_i r_i(x)^2`` (as in the paper) with
the paper's standard starting point and exact, hand-derived Jacobians. The
functions and their numbers in the paper:

====================  ====  ========  =====================================
name                  no.   n, m      published minimum (f* = 0 for all)
====================  ====  ========  =====================================
beale                 5     2, 3      x* = (3, 0.5)
helical_valley        7     3, 3      x* = (1, 0, 0)
box3d                 12    3, m >= 3 (1, 10, 1); also (10, 1, -1) and the
                                      line x1 = x2, x3 = 0 — not unique
powell_singular       13    4, 4      x* = 0 (singular Hessian there)
wood                  14    4, 6      x* = (1, 1, 1, 1)
extended_rosenbrock   21    n even    x* = (1, ..., 1)
====================  ====  ========  =====================================

The definitions, starting points and minima are written from memory of the
paper (its section 3 lists them); the tests check each ``f*`` and ``x*`` by
evaluation (residuals exactly zero) and the starting values where recalled.
All are non-convex; L and mu are not declared.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchsuite.families.least_squares import positive_int
from benchsuite.problem import Constants, Published, ResidualProblem, as_dtype

SOURCE = "Moré, Garbow & Hillstrom (1981), ACM TOMS 7(1):17-41"

Residuals = Callable[[np.ndarray, int], np.ndarray]


@dataclass(frozen=True)
class MGHFunction:
    """One test function: residuals ``r(x, m)``, Jacobian ``J(x, m)`` and what the paper gives."""

    number: int
    residuals: Residuals
    jacobian: Residuals
    x0: Callable[[int], np.ndarray]
    n: int | None  # fixed dimension, or None when the user chooses n
    m: int | None  # fixed number of residuals, or None when m is chosen (default below)
    default: int  # default n (variable n) or m (variable m)
    x_star: Callable[[int], tuple[float, ...]]
    note: str = ""


# -- Beale (no. 5) -------------------------------------------------------------
_BEALE_Y = np.array([1.5, 2.25, 2.625])
_I3 = np.arange(1, 4)


def _beale_r(x: np.ndarray, m: int) -> np.ndarray:
    return _BEALE_Y - x[0] * (1 - x[1] ** _I3)


def _beale_j(x: np.ndarray, m: int) -> np.ndarray:
    return np.column_stack([-(1 - x[1] ** _I3), x[0] * _I3 * x[1] ** (_I3 - 1)])


# -- helical valley (no. 7) ------------------------------------------------------
def _theta(x1: float, x2: float) -> float:
    """``arctan(x2/x1) / (2 pi)``, plus ``1/2`` when ``x1 < 0`` (the paper's two branches).

    Values lie in ``[-1/4, 3/4]``. The function is continuous everywhere except
    across the half-line ``x1 = 0, x2 < 0``, where it jumps by 1 (from ``-1/4``
    on the ``x1 > 0`` side to ``3/4`` on the ``x1 < 0`` side). In particular it
    is continuous across the negative ``x1`` axis: for ``x1 < 0``, ``x2 = +0.0``
    and ``x2 = -0.0`` both give exactly ``1/2``. ``arctan2`` alone would not:
    it tells the two zeros apart (``+pi`` and ``-pi``), so the branch is chosen
    by the sign of the angle, not by ``x2 < 0``. On the line ``x1 = 0``, where
    the paper leaves theta undefined, the value is the limit from ``x1 > 0``
    (``+1/4`` above the axis, ``-1/4`` below), for ``x1 = +0.0`` and ``-0.0`` alike.
    """
    t = float(np.arctan2(x2, x1)) / (2 * np.pi)  # in [-1/2, 1/2]
    return t + 1.0 if (x1 < 0 and t < 0) else t


def _helical_r(x: np.ndarray, m: int) -> np.ndarray:
    rho = np.hypot(x[0], x[1])
    return np.array([10 * (x[2] - 10 * _theta(x[0], x[1])), 10 * (rho - 1), x[2]])


def _helical_j(x: np.ndarray, m: int) -> np.ndarray:
    rho2 = x[0] ** 2 + x[1] ** 2
    rho = np.sqrt(rho2)
    c = 100 / (2 * np.pi * rho2)  # d theta / dx = (-x2, x1) / (2 pi rho^2)
    return np.array(
        [
            [c * x[1], -c * x[0], 10.0],
            [10 * x[0] / rho, 10 * x[1] / rho, 0.0],
            [0.0, 0.0, 1.0],
        ]
    )


# -- Box three-dimensional (no. 12) ------------------------------------------------
def _box_t(m: int) -> np.ndarray:
    return 0.1 * np.arange(1, m + 1)


def _box_r(x: np.ndarray, m: int) -> np.ndarray:
    t = _box_t(m)
    return np.exp(-t * x[0]) - np.exp(-t * x[1]) - x[2] * (np.exp(-t) - np.exp(-10 * t))


def _box_j(x: np.ndarray, m: int) -> np.ndarray:
    t = _box_t(m)
    return np.column_stack([-t * np.exp(-t * x[0]), t * np.exp(-t * x[1]), -(np.exp(-t) - np.exp(-10 * t))])


# -- Powell singular (no. 13) ---------------------------------------------------------
_S5, _S10 = np.sqrt(5.0), np.sqrt(10.0)


def _powell_r(x: np.ndarray, m: int) -> np.ndarray:
    return np.array([x[0] + 10 * x[1], _S5 * (x[2] - x[3]), (x[1] - 2 * x[2]) ** 2, _S10 * (x[0] - x[3]) ** 2])


def _powell_j(x: np.ndarray, m: int) -> np.ndarray:
    u, w = 2 * (x[1] - 2 * x[2]), 2 * _S10 * (x[0] - x[3])
    return np.array([[1.0, 10.0, 0, 0], [0, 0, _S5, -_S5], [0, u, -2 * u, 0], [w, 0, 0, -w]])


# -- Wood (no. 14) ------------------------------------------------------------------
_S90 = np.sqrt(90.0)


def _wood_r(x: np.ndarray, m: int) -> np.ndarray:
    return np.array(
        [
            10 * (x[1] - x[0] ** 2),
            1 - x[0],
            _S90 * (x[3] - x[2] ** 2),
            1 - x[2],
            _S10 * (x[1] + x[3] - 2),
            (x[1] - x[3]) / _S10,
        ]
    )


def _wood_j(x: np.ndarray, m: int) -> np.ndarray:
    return np.array(
        [
            [-20 * x[0], 10.0, 0, 0],
            [-1.0, 0, 0, 0],
            [0, 0, -2 * _S90 * x[2], _S90],
            [0, 0, -1.0, 0],
            [0, _S10, 0, _S10],
            [0, 1 / _S10, 0, -1 / _S10],
        ]
    )


# -- extended Rosenbrock (no. 21) --------------------------------------------------
def _extros_r(x: np.ndarray, m: int) -> np.ndarray:
    r = np.empty_like(x)
    r[0::2] = 10 * (x[1::2] - x[0::2] ** 2)
    r[1::2] = 1 - x[0::2]
    return r


def _extros_j(x: np.ndarray, m: int) -> np.ndarray:
    n = x.size
    J = np.zeros((n, n))
    odd = np.arange(0, n, 2)  # 0-based index of x_{2i-1}
    J[odd, odd] = -20 * x[odd]
    J[odd, odd + 1] = 10.0
    J[odd + 1, odd] = -1.0
    return J


FUNCTIONS: dict[str, MGHFunction] = {
    "beale": MGHFunction(5, _beale_r, _beale_j, lambda n: np.array([1.0, 1.0]), 2, 3, 0,
                         lambda n: (3.0, 0.5)),
    "helical_valley": MGHFunction(7, _helical_r, _helical_j, lambda n: np.array([-1.0, 0.0, 0.0]), 3, 3, 0,
                                  lambda n: (1.0, 0.0, 0.0)),
    "box3d": MGHFunction(
        12, _box_r, _box_j, lambda n: np.array([0.0, 10.0, 20.0]), 3, None, 10, lambda n: (1.0, 10.0, 1.0),
        note="f = 0 also at (10, 1, -1) and wherever x1 = x2, x3 = 0; (1, 10, 1) is the one certified "
        "(reached by Levenberg-Marquardt and trust-region methods from the standard start)",
    ),
    "powell_singular": MGHFunction(13, _powell_r, _powell_j, lambda n: np.array([3.0, -1.0, 0.0, 1.0]), 4, 4, 0,
                                   lambda n: (0.0, 0.0, 0.0, 0.0),
                                   note="Hessian singular at x*: convergence is sublinear for Newton-type methods"),
    "wood": MGHFunction(14, _wood_r, _wood_j, lambda n: np.array([-3.0, -1.0, -3.0, -1.0]), 4, 6, 0,
                        lambda n: (1.0, 1.0, 1.0, 1.0),
                        note="a saddle point near (-0.968, 0.947, -0.970, 0.951) with f = 7.877 slows "
                        "first-order methods (found numerically here)"),
    "extended_rosenbrock": MGHFunction(21, _extros_r, _extros_j, lambda n: np.tile([-1.2, 1.0], n // 2), None, None,
                                       10, lambda n: (1.0,) * n),
}


class MGH(ResidualProblem):
    """One Moré–Garbow–Hillstrom function as a sum of squares (see module docstring).

    Parameters: ``function`` (a key of :data:`FUNCTIONS`), ``n`` (only for
    ``extended_rosenbrock``: an even dimension, default 10), ``m`` (only for
    ``box3d``: number of residuals, ``m >= 3``, default 10), ``dtype``.
    """

    family = "mgh"
    convex = False

    def __init__(self, function: str = "wood", n: int | None = None, m: int | None = None,
                 dtype: str = "float64") -> None:
        spec = FUNCTIONS.get(function) if isinstance(function, str) else None
        if spec is None:
            raise ValueError(f"function must be one of {', '.join(sorted(FUNCTIONS))}; got {function!r}")
        self.function, self.spec = function, spec
        self.dtype = as_dtype(dtype)
        if spec.n is not None:
            if n is not None and n != spec.n:
                raise ValueError(f"{function} has fixed n = {spec.n}, got n = {n!r}")
            self.dim = spec.n
        else:
            self.dim = positive_int("n", spec.default if n is None else n)
            if self.dim % 2:
                raise ValueError(f"{function} needs an even n >= 2, got n = {n!r}")
        if spec.m is not None or spec.n is None:
            if m is not None and m != (spec.m or self.dim):
                raise ValueError(f"{function} has fixed m = {spec.m or 'n'}, got m = {m!r}")
            self.m = spec.m or self.dim
        else:
            self.m = positive_int("m", spec.default if m is None else m)
            if self.m < self.dim:
                raise ValueError(f"{function} needs an integer m >= {self.dim}, got m = {m!r}")
        self.n_samples = self.m
        self._x0 = spec.x0(self.dim).astype(np.float64)

    def residuals(self, x: np.ndarray) -> np.ndarray:
        return self.spec.residuals(x, self.m).astype(self.dtype, copy=False)

    def jacobian(self, x: np.ndarray) -> np.ndarray:
        return self.spec.jacobian(x, self.m).astype(self.dtype, copy=False)

    def initial_point(self) -> np.ndarray:
        return self._x0.astype(self.dtype, copy=True)

    def constants(self) -> Constants:
        return Constants(note="non-convex: no global L or mu")

    def published(self) -> Published:
        return Published(
            f=0.0,
            x=self.spec.x_star(self.dim),
            source=f"{SOURCE}, function {self.spec.number}",  # values recalled from memory: see the module docstring
            note=self.spec.note,
        )

    def describe(self) -> dict[str, Any]:
        return {"function": self.function, "mgh_number": self.spec.number, "m": self.m}
