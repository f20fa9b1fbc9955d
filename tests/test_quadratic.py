"""Quadratic with a prescribed spectrum: oracle, exact constants, invariance laws."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from benchsuite.families import resolve_family
from benchsuite.families.quadratic import Quadratic, eigen_grid

from derivatives import hessian_from_hessp


def test_registered_by_short_name():
    assert resolve_family("quadratic") is Quadratic


def test_eigen_grids():
    np.testing.assert_allclose(eigen_grid(4, 8.0, 1.0, "geometric"), [1, 2, 4, 8], rtol=1e-15)
    np.testing.assert_allclose(eigen_grid(3, 3.0, 1.0, "linear"), [1, 2, 3], rtol=1e-15)
    np.testing.assert_array_equal(eigen_grid(1, 5.0, 1.0, "geometric"), [5.0])
    with pytest.raises(ValueError):
        eigen_grid(3, 1.0, 0.1, "cubic")


@pytest.mark.parametrize("rotate", [False, True])
@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31 - 1))
def test_gradient_matches_central_differences(rotate, seed):
    p = Quadratic(d=7, L=10.0, mu=0.1, rotate=rotate, seed=seed % 1000)
    x = np.random.default_rng(seed).standard_normal(7)
    h = 1e-4
    fd = np.array([(p.value(x + h * e) - p.value(x - h * e)) / (2 * h) for e in np.eye(7)])
    # quadratic: central differences are exact up to round-off eps |f| / h ~ 1e-11
    np.testing.assert_allclose(p.grad(x), fd, rtol=1e-7, atol=1e-8)


@pytest.mark.parametrize("rotate", [False, True])
def test_value_formula_constants_and_closed_form(rotate):
    p = Quadratic(d=6, L=4.0, mu=0.25, spectrum="linear", rotate=rotate, seed=3)
    H = hessian_from_hessp(p, np.zeros(6))
    x = np.random.default_rng(1).standard_normal(6)
    e = x - p.x_star
    # 1/2 e^T A e against the Hessian built from hessp: round-off only
    assert p.value(x) == pytest.approx(0.5 * e @ H @ e, rel=1e-12)
    ev = np.linalg.eigvalsh(H)
    c = p.constants()
    assert c.L_kind == c.mu_kind == "exact"
    # exact constants: equal to the Hessian's extreme eigenvalues to eigensolver round-off
    assert c.L == pytest.approx(ev[-1], rel=1e-12) and c.mu == pytest.approx(ev[0], rel=1e-12)
    assert c.kappa == pytest.approx(16.0, rel=1e-15)
    np.testing.assert_array_equal(p.closed_form(), p.x_star)
    np.testing.assert_allclose(p.grad(p.closed_form()), 0, atol=1e-15)  # e = 0 exactly, round-off of A @ 0


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), e=arrays(np.float64, 5, elements=st.floats(-10, 10)))
def test_rotation_preserves_values_along_rotated_offsets(seed, e):
    # law: with Q the seeded rotation, f_rot(x* + Q e) = f_diag(x* + e) (same seed -> same x*)
    diag = Quadratic(d=5, L=3.0, mu=0.5, seed=seed)
    rot = Quadratic(d=5, L=3.0, mu=0.5, rotate=True, seed=seed)
    np.testing.assert_array_equal(diag.x_star, rot.x_star)
    a, b = rot.value(rot.x_star + rot.Q @ e), diag.value(diag.x_star + e)
    # one orthogonal product of norm-1 columns: round-off eps * L * ||e||^2
    assert a == pytest.approx(b, rel=1e-12, abs=1e-12)


def test_gradient_descent_contracts_each_eigendirection():
    # law: x+ = x - lr A e gives e+ = (I - lr A) e, i.e. each eigen-coordinate times (1 - lr lam_i)
    p = Quadratic(d=5, eigenvalues=[0.5, 1.0, 2.0, 3.0, 4.0], seed=2)
    x = p.initial_point()
    lr = 0.2
    e0 = x - p.x_star
    for _ in range(10):
        x = x - lr * p.grad(x)
    # ten steps of the closed form; round-off only
    np.testing.assert_allclose(x - p.x_star, (1 - lr * p.eigenvalues) ** 10 * e0, rtol=1e-12, atol=1e-14)


def test_value_and_grad_and_out_buffer():
    p = Quadratic(d=8, rotate=True, seed=4)
    x = np.random.default_rng(4).standard_normal(8)
    out = np.empty(8)
    f, g = p.value_and_grad(x, out=out)
    assert g is out
    assert f == pytest.approx(p.value(x), rel=1e-14)  # e.A e vs e.g: same numbers, round-off
    np.testing.assert_array_equal(g, p.grad(x))
    assert not p.is_finite_sum
    with pytest.raises(NotImplementedError):
        p.minibatch_grad(x, np.arange(2))


def test_cvxpy_objective_equals_value():
    cp = pytest.importorskip("cvxpy")
    for rotate in (False, True):
        p = Quadratic(d=6, rotate=rotate, seed=5)
        x = cp.Variable(6)
        x.value = np.random.default_rng(5).standard_normal(6)
        # cvxpy evaluates the same quadratic form with numpy: round-off only
        assert p.cvxpy_objective(x).value == pytest.approx(p.value(x.value), rel=1e-12)


def test_deterministic_and_float32():
    a, b = Quadratic(d=4, rotate=True, seed=7), Quadratic(d=4, rotate=True, seed=7)
    np.testing.assert_array_equal(a.A, b.A)
    np.testing.assert_array_equal(a.initial_point(), b.initial_point())
    p32 = Quadratic(d=4, rotate=True, seed=7, dtype="float32")
    x = np.random.default_rng(0).standard_normal(4)
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32 and p32.initial_point().dtype == np.float32
    np.testing.assert_allclose(g32, a.grad(x), rtol=1e-5, atol=1e-6)  # float32 round-off


@pytest.mark.parametrize(
    "params",
    [
        {"d": 0},
        {"d": None},
        {"d": 3, "mu": 2.0, "L": 1.0},
        {"d": 3, "mu": 0.0},
        {"d": 3, "L": float("inf")},
        {"d": 3, "spectrum": "cubic"},
        {"eigenvalues": []},
        {"eigenvalues": [1.0, -1.0]},
        {"eigenvalues": [1.0, 2.0], "d": 3},
        {"d": 3, "dtype": "float16"},
    ],
)
def test_impossible_params_raise(params):
    with pytest.raises(ValueError):
        Quadratic(**params)
