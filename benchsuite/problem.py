"""The problem contract: a smooth objective with a first-order oracle.

Every problem family subclasses :class:`Problem`. A family is constructed
from the ``params`` table of a catalogue entry (``Family(**params)``), builds
its data deterministically from a ``seed`` parameter, and then answers:

* ``value(x)`` -> float, ``grad(x, out=None)`` -> ndarray, and
  ``value_and_grad(x)`` (override it where the two share work);
* ``minibatch_grad(x, idx, out=None)`` for finite sums: an **unbiased**
  estimate of ``grad(x)`` from the sample rows ``idx`` chosen by the caller
  (the runner owns the random generator). With ``idx = arange(n_samples)`` it
  equals ``grad(x)`` up to round-off;
* ``initial_point()``: a fresh copy of the deterministic starting point;
* ``constants()``: smoothness ``L`` and strong convexity ``mu`` where known,
  each marked ``"exact"`` or ``"bound"`` (or ``None`` and ``"unknown"``);
* optional extras the certification routes use when present:
  ``closed_form()`` (exact minimiser by a direct solve), ``hessp(x, v)``
  (Hessian-vector product), ``cvxpy_objective(x_var)`` (the same objective
  as a cvxpy expression, convex families only), ``residuals(x)`` /
  ``jacobian(x)`` (least-squares form, see :class:`ResidualProblem`) and
  ``published()`` (a published optimum, with its source).

Conventions: finite-sum families are written as a mean,
``f(x) = (1/n) sum_i f_i(x) + r(x)``; residual families as a plain sum of
squares, ``f(x) = sum_i r_i(x)**2`` (so ``f*`` matches published residual sums
of squares). Arrays are float64 unless the family was built with
``dtype="float32"``. Gradient code never loops over rows in Python.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

__all__ = ["Constants", "Published", "Problem", "ResidualProblem", "as_dtype"]


@dataclass(frozen=True)
class Constants:
    """Smoothness ``L`` and strong convexity ``mu`` of an objective.

    ``L_kind`` / ``mu_kind`` say how each is known: ``"exact"`` (computed
    from eigenvalues or by construction), ``"bound"`` (a certified upper bound
    for L, lower bound for mu) or ``"unknown"`` (value is ``None``). ``note``
    says how they were derived, in one line.
    """

    L: float | None = None
    mu: float | None = None
    L_kind: str = "unknown"
    mu_kind: str = "unknown"
    note: str = ""

    @property
    def kappa(self) -> float | None:
        """Condition number ``L / mu`` when both are known and ``mu > 0``."""
        if self.L is None or not self.mu:
            return None
        return self.L / self.mu


@dataclass(frozen=True)
class Published:
    """An optimum printed in a paper, handbook or standard."""

    f: float
    x: tuple[float, ...] | None
    source: str
    note: str = ""


def as_dtype(dtype: str | np.dtype) -> np.dtype:
    """The working precision of a family; only float64 and float32 are allowed."""
    dt = np.dtype(dtype)
    if dt not in (np.dtype(np.float64), np.dtype(np.float32)):
        raise ValueError(f"dtype must be float64 or float32, got {dtype!r}")
    return dt


class Problem(ABC):
    """Base class of every problem family (see the module docstring)."""

    #: short family name, as used in catalogue files
    family: ClassVar[str] = ""
    #: whether the objective is convex (certification needs two routes then)
    convex: ClassVar[bool] = True

    dim: int
    #: number of samples of a finite sum, or ``None`` when not a finite sum
    n_samples: int | None = None
    dtype: np.dtype = np.dtype(np.float64)

    # -- the oracle -------------------------------------------------------
    @abstractmethod
    def value(self, x: np.ndarray) -> float:
        """Objective value at ``x``."""

    @abstractmethod
    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Gradient at ``x``, written into ``out`` when given."""

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        """Value and gradient together; families override this to share work."""
        return self.value(x), self.grad(x, out=out)

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Unbiased gradient estimate from the sample rows ``idx``."""
        raise NotImplementedError(f"{self.family} is not a finite sum; it has no minibatch gradient")

    @abstractmethod
    def initial_point(self) -> np.ndarray:
        """A fresh copy of the deterministic starting point."""

    @classmethod
    def data_digest(cls, params: dict[str, Any]) -> str | None:
        """A digest of external data files the family reads for these params.

        Families that read files (e.g. a NIST StRD file) return a hash of the
        bytes, so that the catalogue's hashes -- and with them the reference
        cache and the gate's "definition changed" check -- follow the data,
        not only the parameters. The default hashes every string parameter that
        names an existing file; ``None`` when there is none.
        """
        import hashlib
        import os

        h = hashlib.sha256()
        found = False
        for key in sorted(params):
            value = params[key]
            if isinstance(value, str) and len(value) < 4096 and os.path.isfile(value):
                with open(value, "rb") as fh:
                    h.update(key.encode() + b"\0" + fh.read())
                found = True
        return h.hexdigest() if found else None

    # -- what is known about it ------------------------------------------
    def constants(self) -> Constants:
        """L and mu where known; default: unknown."""
        return Constants(note="not derived for this family")

    def published(self) -> Published | None:
        """A published optimum, if there is one."""
        return None

    def closed_form(self) -> np.ndarray | None:
        """The exact minimiser by a direct solve, if the family has one."""
        return None

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray | None:
        """Hessian-vector product, if the family provides one."""
        return None

    def cvxpy_objective(self, x: Any) -> Any | None:
        """The objective as a cvxpy expression of the variable ``x`` (convex only)."""
        return None

    def describe(self) -> dict[str, Any]:
        """Family parameters worth showing in a listing."""
        return {}

    @property
    def is_finite_sum(self) -> bool:
        return self.n_samples is not None

    def __repr__(self) -> str:
        return f"<{type(self).__name__} family={self.family!r} dim={self.dim}>"


class ResidualProblem(Problem):
    """A nonlinear least-squares objective ``f(x) = sum_i r_i(x)**2``.

    Subclasses give ``residuals(x)`` (shape ``(m,)``) and ``jacobian(x)``
    (shape ``(m, dim)``); value, gradient ``2 J^T r`` and the minibatch
    gradient ``(m/|B|) * 2 J_B^T r_B`` follow. ``n_samples`` is ``m``.
    """

    @abstractmethod
    def residuals(self, x: np.ndarray) -> np.ndarray:
        """Residual vector r(x)."""

    @abstractmethod
    def jacobian(self, x: np.ndarray) -> np.ndarray:
        """Jacobian dr/dx, shape (m, dim)."""

    def residuals_rows(self, x: np.ndarray, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Residuals and Jacobian rows for ``idx``; override to avoid full work."""
        return self.residuals(x)[idx], self.jacobian(x)[idx]

    def value(self, x: np.ndarray) -> float:
        r = self.residuals(x)
        return float(r @ r)

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        g = 2.0 * (self.jacobian(x).T @ self.residuals(x))
        if out is None:
            return g
        out[...] = g
        return out

    def value_and_grad(self, x: np.ndarray, out: np.ndarray | None = None) -> tuple[float, np.ndarray]:
        r = self.residuals(x)
        g = 2.0 * (self.jacobian(x).T @ r)
        if out is not None:
            out[...] = g
            g = out
        return float(r @ r), g

    def minibatch_grad(self, x: np.ndarray, idx: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        r, J = self.residuals_rows(x, idx)
        scale = 2.0 * self.n_samples / len(idx)
        g = scale * (J.T @ r)
        if out is None:
            return g
        out[...] = g
        return out

