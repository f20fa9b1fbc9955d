"""Moré–Garbow–Hillstrom test functions: published minima, starting values, exact Jacobians."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, example, given, settings
from hypothesis import strategies as st
from scipy.optimize import least_squares, root

from benchsuite.families import resolve_family
from benchsuite.families.mgh import FUNCTIONS, MGH, _theta

NAMES = sorted(FUNCTIONS)


def test_registered_by_short_name():
    assert resolve_family("mgh") is MGH


@pytest.mark.parametrize("name", NAMES)
def test_published_minimum_is_a_zero_of_the_residuals(name):
    p = MGH(name)
    pub = p.published()
    assert "Moré, Garbow & Hillstrom (1981)" in pub.source and pub.f == 0.0
    xs = np.array(pub.x)
    # Moré, Garbow & Hillstrom 1981, from memory: f* = 0 at x*; the residuals vanish up to
    # the round-off of evaluating them (Box 3-D: exp(-t) - exp(-10 t) cancels to ~1e-17)
    assert p.value(xs) <= 1e-30
    assert np.linalg.norm(p.grad(xs)) <= 1e-14


# Moré, Garbow & Hillstrom 1981: f at the standard starting point. Beale's value is the hand
# sum 1.5^2 + 2.25^2 + 2.625^2; the others are from memory (Box 3-D to the 6 digits recalled).
START_VALUES = {
    "beale": (14.203125, 1e-15),
    "helical_valley": (2500.0, 1e-15),
    "box3d": (1031.15, 1e-5),
    "powell_singular": (215.0, 1e-15),
    "wood": (19192.0, 1e-15),
    "extended_rosenbrock": (5 * 24.2, 1e-14),  # n = 10: five times 24.2
}


@pytest.mark.parametrize("name", NAMES)
def test_value_at_the_standard_start(name):
    p = MGH(name)
    value, rel = START_VALUES[name]
    assert p.value(p.initial_point()) == pytest.approx(value, rel=rel)


@pytest.mark.parametrize("name", [n for n in NAMES if n != "helical_valley"])
def test_jacobian_matches_complex_step(name):
    p = MGH(name)
    rng = np.random.default_rng(FUNCTIONS[name].number)
    x = p.initial_point() + rng.standard_normal(p.dim)
    h = 1e-30
    cs = np.column_stack([(p.spec.residuals(x + 1j * h * e, p.m)).imag / h for e in np.eye(p.dim)])
    # complex step: no subtractive cancellation, exact to float64 round-off
    np.testing.assert_allclose(p.jacobian(x), cs, rtol=1e-13, atol=1e-13)


@settings(max_examples=30, deadline=None)
@given(x=st.tuples(st.floats(-3, 3), st.floats(-3, 3), st.floats(-3, 3)).filter(lambda t: np.hypot(t[0], t[1]) > 0.1))
# regression: at x2 = -0.0 the step x + h e1 has x2 = +0.0 and x - h e1 keeps -0.0; theta once
# returned -1/2 for the one and 1/2 for the other (arctan2 tells the zeros apart)
@example(x=(-1.0, -0.0, 0.0))
@example(x=(-2.5, 0.0, 1.0))
def test_helical_valley_jacobian_matches_central_differences(x):
    p = MGH("helical_valley")
    x = np.array(x)
    # theta jumps by 1 across the half-line x1 = 0, x2 < 0 (where the paper's two branches meet)
    assume(not (abs(x[0]) < 1e-3 and x[1] < 0))
    h = 1e-6
    fd = np.column_stack([(p.residuals(x + h * e) - p.residuals(x - h * e)) / (2 * h) for e in np.eye(3)])
    # truncation h^2 |r'''| / 6 with |r'''| <= 100 / rho^3 <= 1e5 -> <= 2e-8; round-off eps |r| / h ~ 1e-8
    np.testing.assert_allclose(p.jacobian(x), fd, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("name", NAMES)
def test_gradient_matches_central_differences(name):
    p = MGH(name)
    x = p.initial_point() + 0.1 * np.random.default_rng(0).standard_normal(p.dim)
    h = 1e-6
    fd = np.array([(p.value(x + h * e) - p.value(x - h * e)) / (2 * h) for e in np.eye(p.dim)])
    # |f| <= ~2e4 near the starts: round-off eps |f| / h ~ 4e-6, truncation h^2 |f'''| ~ 1e-8
    np.testing.assert_allclose(p.grad(x), fd, rtol=1e-7, atol=1e-4)


def test_helical_valley_branch_of_theta():
    p = MGH("helical_valley")
    # theta = arctan(x2 / x1) / (2 pi) + 1/2 for x1 < 0 (Moré, Garbow & Hillstrom 1981, from memory)
    for x1, x2 in [(-1.0, 0.5), (-1.0, -0.5), (2.0, -1.0), (0.5, 3.0)]:
        theta = np.arctan(x2 / x1) / (2 * np.pi) + (0.5 if x1 < 0 else 0.0)
        r = p.residuals(np.array([x1, x2, 0.0]))
        assert r[0] == pytest.approx(-100 * theta, rel=1e-14)  # round-off only


def test_theta_is_continuous_across_the_negative_x1_axis_and_jumps_only_at_x1_0_x2_negative():
    # theta = arctan(x2 / x1) / (2 pi) + 1/2 for x1 < 0 (Moré, Garbow & Hillstrom 1981, from memory):
    # arctan(+-0 / x1) = -+0, so both signed zeros of x2 give exactly 1/2
    assert _theta(-1.0, -0.0) == _theta(-1.0, 0.0) == 0.5
    for x1 in (-3.0, -1.0, -1e-3):
        for tiny in (1e-300, 1e-12, 1e-6):
            # continuous: the two sides differ by 2 arctan(tiny / |x1|) / (2 pi) <= tiny / (pi |x1|),
            # plus the round-off of two values near 1/2 (ulp 1.1e-16; 1e-15 allows a few ulps each)
            assert abs(_theta(x1, tiny) - _theta(x1, -tiny)) <= tiny / (np.pi * abs(x1)) + 1e-15
    # the one discontinuity: across x1 = 0 below the axis, a jump of exactly 1 (3/4 vs -1/4 in the limit)
    assert _theta(-1e-300, -1.0) == 0.75 and _theta(1e-300, -1.0) == -0.25
    # on x1 = 0 (undefined in the paper) both signed zeros take the limit from x1 > 0
    assert _theta(0.0, -1.0) == _theta(-0.0, -1.0) == -0.25
    assert _theta(0.0, 1.0) == _theta(-0.0, 1.0) == 0.25 == _theta(-1e-300, 1.0)
    p = MGH("helical_valley")
    np.testing.assert_array_equal(p.residuals(np.array([-1.0, -0.0, 0.0])), p.residuals(np.array([-1.0, 0.0, 0.0])))


def test_box3d_other_minima_and_the_certified_one():
    p = MGH("box3d")
    # the published alternatives (from memory): f = 0 at (10, 1, -1) and on x1 = x2, x3 = 0
    for x in ([10.0, 1.0, -1.0], [2.5, 2.5, 0.0], [7.0, 7.0, 0.0]):
        assert p.value(np.array(x)) <= 1e-30  # residual round-off only
    # from the standard start a Levenberg-Marquardt solve (scipy least_squares 'lm') reaches
    # (1, 10, 1): the minimum the catalogue certifies
    res = least_squares(p.residuals, p.initial_point(), jac=p.jacobian, method="lm", xtol=1e-15, ftol=1e-15)
    np.testing.assert_allclose(res.x, p.published().x, rtol=1e-8)  # LM converges quadratically here
    assert MGH("box3d", m=20).m == 20 and MGH("box3d", m=20).residuals(np.ones(3)).shape == (20,)


def test_wood_saddle_point_named_in_the_docstring():
    p = MGH("wood")
    sol = root(p.grad, np.array([-0.97, 0.95, -0.97, 0.95]), tol=1e-14)
    # a stationary point: the gradient (terms ~1e3) vanishes to round-off
    assert np.linalg.norm(p.grad(sol.x)) < 1e-9
    np.testing.assert_allclose(sol.x, [-0.968, 0.947, -0.970, 0.951], atol=1e-3)
    assert p.value(sol.x) == pytest.approx(7.877, abs=1e-3)
    h = 1e-6
    H = np.column_stack([(p.grad(sol.x + h * e) - p.grad(sol.x - h * e)) / (2 * h) for e in np.eye(4)])
    ev = np.linalg.eigvalsh(0.5 * (H + H.T))
    # one negative eigenvalue (about -0.12), far outside the ~1e-4 finite-difference error
    assert ev[0] < -0.05 and ev[1] > 1


@pytest.mark.parametrize("name", ["box3d", "wood", "extended_rosenbrock"])
def test_minibatch_all_rows_and_disjoint_batches(name):
    p = MGH(name)
    x = p.initial_point() + 0.3
    g = p.grad(x)
    # same sum, different grouping: float64 round-off relative to |g| ~ 1e4
    np.testing.assert_allclose(p.minibatch_grad(x, np.arange(p.n_samples)), g, rtol=1e-12, atol=1e-10)
    batches = np.split(np.random.default_rng(1).permutation(p.n_samples), 2)
    mean = np.mean([p.minibatch_grad(x, b) for b in batches], axis=0)
    np.testing.assert_allclose(mean, g, rtol=1e-12, atol=1e-10)


def test_extended_rosenbrock_sizes_and_float32():
    p = MGH("extended_rosenbrock", n=6)
    np.testing.assert_array_equal(p.initial_point(), [-1.2, 1, -1.2, 1, -1.2, 1])
    q = MGH("wood", dtype="float32")
    x = q.initial_point()
    assert x.dtype == np.float32 and q.grad(x).dtype == np.float32
    assert q.constants().L is None and q.convex is False


@pytest.mark.parametrize(
    "params",
    [
        {"function": "no_such_function"},
        {"function": ["wood"]},
        {"function": "box3d", "m": "ten"},
        {"function": "wood", "n": 5},
        {"function": "extended_rosenbrock", "n": 7},
        {"function": "extended_rosenbrock", "n": 0},
        {"function": "box3d", "m": 2},
        {"function": "beale", "m": 4},
        {"function": "wood", "dtype": "int32"},
    ],
)
def test_impossible_params_raise(params):
    with pytest.raises(ValueError):
        MGH(**params)
