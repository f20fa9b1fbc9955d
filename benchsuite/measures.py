"""Convergence measures: how far an iterate is from the certified optimum.

Every measure is *relative*, equal to 1 at the starting point ``x_0`` and 0 at
the optimum, so that one list of targets (1e-2 ... 1e-8) means the same thing
on every problem:

* ``"subopt"`` (the default) -- relative suboptimality
  ``(f(x_k) - f*) / (f(x_0) - f*)``;
* ``"dist"`` -- relative distance ``||x_k - x*|| / ||x_0 - x*||`` (Euclidean);
* ``"gradnorm"`` -- relative gradient norm ``||grad f(x_k)|| / ||grad f(x_0)||``.
  It is relative to the gradient at the start (not absolute) for the same
  reason as the other two: objectives differ in scale by many orders of
  magnitude, and a relative target carries from one to the next.

A measure is built once per run from the start point and the optimum
(:func:`make_measure`) and then evaluated per iteration from what the
monitored pass already has at hand (the value and the gradient at ``x_k``), so
that it never costs an extra objective or gradient evaluation with a full
gradient oracle. :attr:`Measure.needs` says which of the two it uses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["MEASURES", "Measure", "make_measure"]

#: measure name -> one-line description
MEASURES: dict[str, str] = {
    "subopt": "relative suboptimality (f(x_k) - f*) / (f(x_0) - f*)",
    "dist": "relative distance ||x_k - x*|| / ||x_0 - x*||",
    "gradnorm": "relative gradient norm ||grad f(x_k)|| / ||grad f(x_0)||",
}


@dataclass(frozen=True)
class Measure:
    """A relative convergence measure, normalised at ``x_0``.

    ``kind`` is one of :data:`MEASURES`; ``scale`` is the denominator
    (``f(x_0) - f*``, ``||x_0 - x*||`` or ``||grad f(x_0)||``); ``needs`` is
    ``"value"``, ``"x"`` or ``"grad"``: what :meth:`__call__` reads.
    """

    kind: str
    f_star: float
    x_star: np.ndarray
    scale: float

    @property
    def needs(self) -> str:
        return {"subopt": "value", "dist": "x", "gradnorm": "grad"}[self.kind]

    def __call__(self, value: float, x: np.ndarray, grad: np.ndarray | None) -> float:
        """The measure at ``x`` with objective ``value`` and full gradient ``grad``.

        Only the input named by :attr:`needs` is read; the others may be
        anything (e.g. ``nan`` or ``None``).
        """
        if self.kind == "subopt":
            return (value - self.f_star) / self.scale
        if self.kind == "dist":
            return distance(x, self.x_star) / self.scale
        assert grad is not None
        return float(np.linalg.norm(grad)) / self.scale

    def distance(self, x: np.ndarray) -> float:
        """``||x - x*||``, not normalised."""
        return distance(x, self.x_star)


def distance(x: np.ndarray, x_star: np.ndarray) -> float:
    """Euclidean distance, accumulated in float64 whatever the dtype of ``x``."""
    return float(np.linalg.norm(np.asarray(x, dtype=np.float64) - x_star))


def make_measure(
    kind: str,
    *,
    f_star: float,
    x_star: np.ndarray,
    x0: np.ndarray,
    f0: float,
    g0: np.ndarray | None,
) -> Measure:
    """The measure ``kind`` normalised at the start point ``x0``.

    ``f0`` is ``f(x0)`` and ``g0`` the full gradient there (only read for
    ``"gradnorm"``). Raises ``ValueError`` when the start point already is the
    optimum for that measure (a zero denominator) or the kind is unknown.
    """
    if kind not in MEASURES:
        raise ValueError(f"unknown measure {kind!r} (known: {', '.join(MEASURES)})")
    xs = np.asarray(x_star, dtype=np.float64)
    if kind == "subopt":
        scale = float(f0) - float(f_star)
    elif kind == "dist":
        scale = distance(x0, xs)
    else:
        if g0 is None:
            raise ValueError("the gradient-norm measure needs the gradient at x0")
        scale = float(np.linalg.norm(g0))
    if not (math.isfinite(scale) and scale > 0):
        raise ValueError(f"measure {kind!r}: the start point gives a zero or invalid scale ({scale!r})")
    return Measure(kind=kind, f_star=float(f_star), x_star=xs, scale=scale)
