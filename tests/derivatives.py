"""Derivative helpers shared by the family tests (reference computations, not package code)."""

from __future__ import annotations

import numpy as np


def central_difference_grad(f, x: np.ndarray, h: float) -> np.ndarray:
    """Central finite differences, one coordinate at a time (truncation error O(h^2))."""
    g = np.empty_like(x)
    for i in range(x.size):
        e = np.zeros_like(x)
        e[i] = h
        g[i] = (f(x + e) - f(x - e)) / (2 * h)
    return g


def hessian_from_hessp(p, x: np.ndarray) -> np.ndarray:
    """The Hessian as columns of Hessian-vector products with the unit vectors, symmetrised."""
    H = np.column_stack([p.hessp(x, e) for e in np.eye(p.dim)])
    return 0.5 * (H + H.T)
