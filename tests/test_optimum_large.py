"""The large-scale certification route of benchsuite.optimum, on scaled-down instances (same code path)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import benchsuite.optimum as optimum
from benchsuite.catalogue import Instance, load_catalogue
from benchsuite.families.sparse import SparseLogistic
from benchsuite.optimum import certified_optimum, large_route_applies

ROOT = Path(__file__).resolve().parent.parent


def _inst(name: str, family: str, **params) -> Instance:
    return Instance(name=name, family=family, params=tuple(sorted(params.items())), tier="large",
                    targets=(1e-2, 1e-4), budget=100)


SCALED = {
    "logistic_sparse": _inst("t-logreg-sparse", "logistic_sparse", n=600, d=3000, row_nnz=12, lam=1e-3, seed=3),
    "ridge_sparse": _inst("t-ridge-sparse", "ridge_sparse", n=500, d=2500, row_nnz=10, lam=1e-3, seed=4),
    "logistic": _inst("t-logreg-dense", "logistic", n=300, d=30, lam=1e-2, seed=5),
}


@pytest.fixture
def everything_large(monkeypatch: pytest.MonkeyPatch) -> None:
    """Send every family with a dual through the large-scale route (the size threshold at 0)."""
    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", 0)


def test_dispatch_by_stored_entries(monkeypatch: pytest.MonkeyPatch) -> None:
    p = SCALED["logistic_sparse"].build()
    assert not large_route_applies(p)  # ~7000 non-zeros: the ordinary routes (with cvxpy)
    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", p.A.nnz)
    assert large_route_applies(p)
    lsq = load_catalogue()["lsq-kappa1e2-500x50"].build()
    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", 0)
    assert large_route_applies(lsq)  # has the method; returns None for lam = 0 (see below)
    rosen = load_catalogue()["rosenbrock-2d"].build()
    assert not large_route_applies(rosen)  # no dual


@pytest.mark.parametrize("family", SCALED)
def test_large_route_certifies_and_agrees_with_cvxpy(family: str, tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    inst = SCALED[family]
    # the ordinary routes first (cvxpy with Clarabel, L-BFGS-B + Newton polish) as the reference
    ref = certified_optimum(inst, cache_dir=tmp_path / "ref")
    assert ref.certified and any("cvxpy" in m for m in ref.methods), ref.reason
    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", 0)
    o = certified_optimum(inst, cache_dir=tmp_path / "large")
    assert o.certified, o.reason
    methods = o.methods
    assert any("Newton-CG" in m for m in methods) and any("Fenchel dual" in m for m in methods)
    assert not any("cvxpy" in m for m in methods)
    gap = o.facts["duality_gap"]
    s_f = max(abs(o.f_star), o.f0 - o.f_star)
    # the certificate: |gap| at round-off level of f (1e-10 of S_f is the route's stated accuracy)
    assert abs(gap) <= 1e-10 * s_f
    assert "duality gap" in o.how and set(o.facts["route_seconds"]) == {r.method for r in o.routes}
    # cvxpy/Clarabel is accurate to ~1e-8 relative in f (optimum.EPS_F["cvxpy"] = 1e-7)
    assert abs(o.f_star - ref.f_star) <= 1e-7 * s_f
    s_x = max(np.linalg.norm(o.x_star), 1e-300)
    # both points are within ||grad|| / mu of x* (strong convexity); the routes' gradients are <= 1e-9
    assert np.linalg.norm(o.x_star - ref.x_star) <= 1e-6 * s_x


def test_the_gap_bounds_the_suboptimality_of_any_point() -> None:
    """The certificate is independent of the solver: at points the route never saw, gap >= f(x) - f*."""
    p = SparseLogistic(n=200, d=50, row_nnz=6, lam=1e-2, seed=8)
    cp = pytest.importorskip("cvxpy")
    x = cp.Variable(p.dim)
    prob = cp.Problem(cp.Minimize(p.cvxpy_objective(x)))
    prob.solve(solver=cp.CLARABEL)
    f_star = prob.value  # cvxpy/Clarabel: accurate to ~1e-8
    rng = np.random.default_rng(0)
    for scale in (1.0, 0.1, 0.01):
        z = x.value + scale * rng.standard_normal(p.dim)
        P, D, _ = p.duality_gap(z)
        assert P - D >= p.value(z) - f_star - 1e-8


def test_refused_when_the_dual_does_not_match(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A family whose dual value is too large (a bug) gives a negative gap: not certified, with the reason."""

    class BadDual(SparseLogistic):
        def duality_gap(self, x):
            P, D, w = super().duality_gap(x)
            return P, D + 1e-6, w

    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", 0)
    inst = SCALED["logistic_sparse"]
    p = BadDual(**inst.params_dict())
    o = certified_optimum(inst, cache_dir=tmp_path, problem=p)
    assert not o.certified
    dual = [r for r in o.routes if "Fenchel" in r.method][0]
    assert not dual.ok and "negative duality gap" in dual.status


def test_without_a_dual_an_independent_second_route(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(optimum, "LARGE_ROUTE_MIN_ENTRIES", 0)
    inst = load_catalogue()["lsq-kappa1e2-500x50"]  # lam = 0: duality_gap gives None
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.certified, o.reason
    assert o.facts["duality_gap"] is None
    assert "closed-form" in o.methods and len(o.methods) >= 2


def test_large_x_star_round_trips_through_the_npz_cache(tmp_path: Path, everything_large: None) -> None:
    inst = SCALED["ridge_sparse"]  # 2500 unknowns > NPZ_MIN_DIM: x* beside the JSON
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert list(tmp_path.glob("*.npz"))
    again = certified_optimum(inst, cache_dir=tmp_path)
    assert again.from_cache and np.array_equal(again.x_star, o.x_star)
    doc = json.loads(next(tmp_path.glob("*.json")).read_text())
    gaps = [r["duality_gap"] for r in doc["routes"] if r["duality_gap"] is not None]
    assert gaps and doc["facts"]["duality_gap"] == gaps[0]  # the certificate states the gap


def test_committed_large_tier_has_a_certified_million_unknown_instance() -> None:
    """Read from the committed JSON only (building the 1e6 instance is left to `benchsuite optimum`)."""
    cat = load_catalogue()
    found = []
    for f in (ROOT / "results" / "reference").glob("*.json"):
        doc = json.loads(f.read_text())
        inst = cat.get(doc["name"])
        if inst is None or inst.tier != "large" or doc["facts"]["dim"] < 1_000_000:
            continue
        if doc["problem_hash"] != inst.problem_hash() or not doc["certified"]:
            continue
        gap = doc["facts"].get("duality_gap")
        f_star, f0 = float(doc["f_star"]), float(doc["f0"])
        s_f = max(abs(f_star), f0 - f_star)
        assert gap is not None and abs(gap) <= 1e-10 * s_f, doc["name"]
        assert (f.parent / doc["x_star_npz"]).is_file()
        found.append(doc["name"])
    assert found, "no certified large-tier instance with >= 1e6 unknowns in results/reference"
