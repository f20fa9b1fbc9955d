"""Tests of benchsuite.measures: the three relative measures and their normalisation."""

from __future__ import annotations

import numpy as np
import pytest

from benchsuite.families.quadratic import Quadratic
from benchsuite.measures import make_measure


@pytest.fixture
def quad() -> Quadratic:
    return Quadratic(d=5, L=4.0, mu=0.5, seed=3)


def _measures(q: Quadratic) -> dict[str, object]:
    x0 = q.initial_point()
    f0, g0 = q.value_and_grad(x0)
    return {k: make_measure(k, f_star=0.0, x_star=q.x_star, x0=x0, f0=f0, g0=g0.copy()) for k in ("subopt", "dist", "gradnorm")}


def test_measures_are_one_at_start_and_zero_at_optimum(quad: Quadratic) -> None:
    ms = _measures(quad)
    x0 = quad.initial_point()
    f0, g0 = quad.value_and_grad(x0)
    for m in ms.values():
        # 1 up to float64 round-off of a ratio of equal numbers
        assert m(f0, x0, g0) == pytest.approx(1.0, rel=1e-15)
    xs = quad.x_star.copy()
    fs, gs = quad.value_and_grad(xs)
    for m in ms.values():
        assert m(fs, xs, gs) == 0.0  # exact: x* is the stored array, e = 0 exactly


def test_measures_match_their_definitions(quad: Quadratic) -> None:
    ms = _measures(quad)
    x0 = quad.initial_point()
    x = 0.5 * (x0 + quad.x_star) + 0.01
    f, g = quad.value_and_grad(x)
    lam, e, e0 = quad.eigenvalues, x - quad.x_star, x0 - quad.x_star
    # definitions written out for the diagonal quadratic; 1e-13: float64 round-off of short sums
    assert ms["subopt"](f, x, g) == pytest.approx((lam @ e**2) / (lam @ e0**2), rel=1e-13)
    assert ms["dist"](f, x, g) == pytest.approx(np.linalg.norm(e) / np.linalg.norm(e0), rel=1e-13)
    assert ms["gradnorm"](f, x, g) == pytest.approx(np.linalg.norm(lam * e) / np.linalg.norm(lam * e0), rel=1e-13)


def test_start_at_optimum_is_rejected(quad: Quadratic) -> None:
    xs = quad.x_star.copy()
    with pytest.raises(ValueError, match="zero or invalid scale"):
        make_measure("subopt", f_star=0.0, x_star=xs, x0=xs, f0=0.0, g0=None)
    with pytest.raises(ValueError, match="unknown measure"):
        make_measure("loss", f_star=0.0, x_star=xs, x0=xs, f0=0.0, g0=None)
