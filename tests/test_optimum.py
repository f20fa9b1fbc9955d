"""Certified optima: routes agree, x* is the known one, the certificate, the cache."""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from benchsuite import optimum as opt_mod
from benchsuite.catalogue import Instance, instance_from_strd, load_catalogue, select
from benchsuite.families.quadratic import Quadratic
from benchsuite.optimum import Optimum, cache_path, certified_optimum
from benchsuite.problem import Problem

ROOT = Path(__file__).resolve().parents[1]


def quad(name: str = "q", **params: Any) -> Instance:
    base = {"d": 20, "L": 1.0, "mu": 1e-2, "seed": 3}
    base.update(params)
    return Instance(name, "quadratic", tuple(sorted(base.items())), "small", (1e-2, 1e-6), 100)


def test_quadratic_routes_agree_and_find_the_known_minimiser(tmp_path: Path) -> None:
    inst = quad(rotate=True)
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.certified, o.reason
    kinds = {r.kind for r in o.routes if r.ok}
    assert kinds == {"exact", "scipy", "cvxpy"}  # closed form, L-BFGS-B + Newton polish, cvxpy/Clarabel
    assert [r.method for r in o.routes][0] == "closed-form"
    assert any(r.method.startswith("scipy L-BFGS-B") for r in o.routes)
    assert any(r.method == "cvxpy/CLARABEL" and r.duality_gap is not None for r in o.routes)
    truth = Quadratic(d=20, L=1.0, mu=1e-2, seed=3, rotate=True).x_star  # the family draws x* itself
    # known x*: the chosen route is at round-off distance, ~ kappa * eps = 1e2 * 2.2e-16
    assert np.linalg.norm(o.x_star - truth) <= 1e-12 * np.linalg.norm(truth)
    assert abs(o.f_star) <= 1e-25  # f* = 0 by construction; f at a round-off-accurate x* is O(eps^2)
    assert o.grad_norm <= 1e-13  # gradient at round-off level
    # every successful route is near the truth within its own stated tolerance
    for r in o.routes:
        rel = np.linalg.norm(np.asarray(r.x) - truth) / np.linalg.norm(truth)
        assert rel <= o.tolerances["x"], (r.method, rel)
    assert o.agreement_digits >= 5  # Clarabel at its default 1e-8 tolerances still gives >= 5 digits in x here
    assert o.dist_bound is not None and o.dist_bound == o.grad_norm / 1e-2


def test_pair_tolerances_follow_the_stated_rule() -> None:
    a = opt_mod.Route("a", 0.0, (0.0,), "", 0.0, 0.0, kind="exact")
    c = opt_mod.Route("c", 0.0, (0.0,), "", 0.0, 0.0, kind="cvxpy")
    eps, tx = opt_mod._pair_tolerance(a, c, 1e2)
    assert eps == opt_mod.EPS_F["cvxpy"] and tx == pytest.approx((opt_mod.EPS_F["cvxpy"] * 1e2) ** 0.5)
    assert opt_mod._pair_tolerance(a, c, None)[1] == pytest.approx(opt_mod.EPS_F["cvxpy"] ** 0.5)
    assert opt_mod._pair_tolerance(a, c, 1e19)[1] == opt_mod.X_TOL_MAX  # never vacuous (Longley: kappa ~ 2e19)


def test_digits_of_published_values() -> None:
    assert opt_mod._digits_of(238.94212918) == 11
    assert opt_mod._digits_of(5.5015643181e-04) == 11
    assert opt_mod._digits_of(87.9458) == 6
    assert opt_mod._digits_of(0.0) is None and opt_mod._digits_of(3.0) is None


# -- the cache ---------------------------------------------------------------------
def test_cache_hit_does_not_solve(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    inst = quad()
    first = certified_optimum(inst, cache_dir=tmp_path)
    assert not first.from_cache
    path = cache_path(inst, tmp_path)
    assert path.exists() and path.name.startswith("q-") and len(path.stem) == len("q-") + 12

    def boom(*a: Any, **k: Any) -> Optimum:
        raise AssertionError("solved again")

    monkeypatch.setattr(opt_mod, "_compute", boom)
    second = certified_optimum(inst, cache_dir=tmp_path)
    assert second.from_cache and second.certified
    assert np.array_equal(second.x_star, first.x_star)  # repr floats: exact round trip
    assert second.f_star == first.f_star and second.grad_norm == first.grad_norm
    assert [r.method for r in second.routes] == [r.method for r in first.routes]
    with pytest.raises(AssertionError, match="solved again"):
        certified_optimum(inst, cache_dir=tmp_path, refresh=True)


def test_cache_file_is_plain_json(tmp_path: Path) -> None:
    inst = quad()
    o = certified_optimum(inst, cache_dir=tmp_path)
    doc = json.loads(cache_path(inst, tmp_path).read_text())
    assert doc["problem_hash"] == inst.problem_hash() and doc["certified"] is True
    assert doc["x_star"] == [float(v) for v in o.x_star]
    assert set(doc["versions"]) == {"numpy", "scipy", "cvxpy", "clarabel", "scs"}
    assert not list(tmp_path.glob("*.tmp"))  # atomic write leaves no temporary behind


@pytest.mark.parametrize("damage", ["garbage {", "", f'{{"format": {opt_mod.FORMAT}}}', "null", "[1, 2]"])
def test_corrupt_cache_is_recomputed(tmp_path: Path, damage: str) -> None:
    inst = quad()
    good = certified_optimum(inst, cache_dir=tmp_path)
    path = cache_path(inst, tmp_path)
    path.write_text(damage)
    again = certified_optimum(inst, cache_dir=tmp_path)
    assert not again.from_cache and again.certified
    assert np.array_equal(again.x_star, good.x_star)
    json.loads(path.read_text())  # rewritten, valid


def test_stale_cache_is_recomputed(tmp_path: Path) -> None:
    inst = quad()
    certified_optimum(inst, cache_dir=tmp_path)
    path = cache_path(inst, tmp_path)
    doc = json.loads(path.read_text())
    doc["x_star"] = [v + 1.0 for v in doc["x_star"]]  # as if the family's data had changed
    path.write_text(json.dumps(doc))
    again = certified_optimum(inst, cache_dir=tmp_path)
    assert not again.from_cache and again.f_star == 0.0


def test_large_x_star_goes_to_npz(tmp_path: Path) -> None:
    inst = quad(name="big", d=opt_mod.NPZ_MIN_DIM + 1, mu=0.5)
    o = certified_optimum(inst, cache_dir=tmp_path)
    doc = json.loads(cache_path(inst, tmp_path).read_text())
    assert doc["x_star"] is None and doc["x_star_npz"].endswith(".npz")
    with np.load(tmp_path / doc["x_star_npz"], allow_pickle=False) as z:
        assert np.array_equal(z["x_star"], o.x_star)
    assert np.array_equal(certified_optimum(inst, cache_dir=tmp_path).x_star, o.x_star)


# -- disagreement and non-convex problems -----------------------------------------------
class WrongCvxpy(Quadratic):
    """A quadratic whose cvxpy expression is centred elsewhere: a family bug."""

    def cvxpy_objective(self, x: Any) -> Any:
        import cvxpy as cp

        return 0.5 * cp.sum(cp.multiply(self.eigenvalues, cp.square(x - self.x_star - 0.1)))


class DoubleWell(Problem):
    """f(x) = sum_i (x_i^2 - 1)^2 + 0.3 x_i: local minima near +0.96, global near -1.04 per coordinate."""

    family = "double_well"
    convex = False

    def __init__(self, d: int = 1) -> None:
        self.dim = d

    def value(self, x: np.ndarray) -> float:
        return float(np.sum((x**2 - 1) ** 2 + 0.3 * x))

    def grad(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        return 4 * x * (x**2 - 1) + 0.3

    def hessp(self, x: np.ndarray, v: np.ndarray) -> np.ndarray:
        return (12 * x**2 - 4) * v

    def initial_point(self) -> np.ndarray:
        return np.ones(self.dim)


def test_disagreeing_routes_are_not_certified(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("benchsuite.families.BUILTIN", {"wrong": f"{__name__}:WrongCvxpy"})
    inst = Instance("wrong", "wrong", (("d", 5), ("seed", 1)), "small", (1e-2,), 10)
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert not o.certified
    assert "disagree" in o.reason and "cvxpy" in o.reason
    assert json.loads(cache_path(inst, tmp_path).read_text())["certified"] is False


def test_non_convex_without_published_value_uses_seeded_starts(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("benchsuite.families.BUILTIN", {"double_well": f"{__name__}:DoubleWell"})
    inst = Instance("dw", "double_well", (("d", 1),), "small", (1e-2,), 10)
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.certified, o.reason
    assert f"best minimum over {opt_mod.N_STARTS} starts" in o.how
    # brute force on a fine grid (spacing 1e-5): the global minimum is near -1.04, not the start's +0.96
    grid = np.linspace(-2, 2, 400001)
    fg = (grid**2 - 1) ** 2 + 0.3 * grid
    assert o.x_star[0] == pytest.approx(grid[np.argmin(fg)], abs=1e-5)
    assert o.f_star <= fg.min() + 1e-12  # never worse than the grid (1e-12: round-off of f near -0.3)
    assert o.grad_norm <= 1e-12
    assert any("other stationary point" in r.status for r in o.routes)  # the start x0 = 1 ends at the local one


class PublishedQuadratic(Quadratic):
    """A quadratic that 'publishes' its optimum, optionally with a misprint in x or f."""

    def __init__(self, misprint: str = "", **kw: Any) -> None:
        super().__init__(**kw)
        self.misprint = misprint

    def published(self) -> Any:
        from benchsuite.problem import Published

        x = [float(v) for v in self.x_star]
        f = 0.0
        if self.misprint == "x":
            x[0] += 1.0
        if self.misprint == "f":
            f = 1.0
        return Published(f=f, x=tuple(x), source="test")


@pytest.mark.parametrize("misprint", ["", "x", "f"])
def test_published_value_checks(misprint: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("benchsuite.families.BUILTIN", {"pq": f"{__name__}:PublishedQuadratic"})
    inst = Instance("pq", "pq", (("d", 4), ("misprint", misprint), ("seed", 2)), "small", (1e-2,), 10)
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.lre is not None
    if misprint == "":
        assert o.certified and o.lre["min"] >= 14  # x* is exact: LRE at (or near) the cap of 15
    elif misprint == "x":
        # the printed x does not reproduce the printed f = 0: reported, not required
        assert o.certified and "does not reproduce the published f" in o.how and o.lre["b1"] < 1
    else:
        assert not o.certified and "does not match the published value: f LRE" in o.reason


# -- published values (NIST StRD) and the whole catalogue -----------------------------------
def test_lanczos1_round_off_rss(tmp_path: Path) -> None:
    # NIST StRD Lanczos1: certified RSS 1.4307867721E-25, far below what float64 residuals of O(1) data
    # can reproduce (f LRE ~3); the parameters still match to LRE >= 6 and the f check uses the routes'
    # own tolerance
    inst = load_catalogue()["nist-lanczos1"]
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.certified, o.reason
    assert o.lre is not None and o.lre["min"] >= 6 and o.lre["f"] < 6
    assert o.published is not None and o.published.f == 1.4307867721e-25



def test_strd_file_by_path_reaches_the_certified_values(tmp_path: Path) -> None:
    inst = instance_from_strd(ROOT / "benchsuite" / "data" / "strd" / "Misra1a.dat")
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.certified, o.reason
    # NIST StRD certified values for Misra1a (in the file): b1 = 2.3894212918E+02, b2 = 5.5015643181E-04,
    # residual sum of squares 1.2455138894E-01
    assert o.published is not None and o.published.x == (2.3894212918e02, 5.5015643181e-04)
    assert o.published.f == pytest.approx(1.2455138894e-01, rel=0)
    assert o.lre is not None and o.lre["min"] >= 6  # LRE >= 6 on every certified parameter
    assert {r.method for r in o.routes if r.ok} == {"scipy least_squares trf", "scipy least_squares lm"}


def small_tier() -> list[Instance]:
    return select(load_catalogue(), None, tier="small")


@pytest.fixture(scope="module")
def warm_cache(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A copy of the committed reference cache (misses are computed into the copy, not the repo)."""
    d = tmp_path_factory.mktemp("reference")
    for f in (ROOT / "results" / "reference").glob("*"):
        shutil.copy(f, d / f.name)
    return d


@pytest.mark.parametrize("inst", small_tier(), ids=lambda i: i.name)
def test_every_small_instance_is_certified(inst: Instance, warm_cache: Path) -> None:
    o = certified_optimum(inst, cache_dir=warm_cache)
    assert o.certified, f"{inst.name}: {o.reason}"
    assert len(o.methods) >= 2 or o.published is not None
    p = inst.build()
    # the cached x* is this problem's optimum: its gradient norm is recomputed here, not read
    g = np.linalg.norm(p.grad(o.x_star))
    g0 = np.linalg.norm(p.grad(p.initial_point()))
    assert g <= 1e-6 * max(1.0, g0)  # relative 1e-6: every route stops orders of magnitude below this


COLD = ["quad-rot-kappa1e3-d100", "lsq-kappa1e2-500x50", "logreg-dense-500x50", "mgh-beale", "rosenbrock-2d"]


@pytest.mark.parametrize("name", COLD)
def test_a_few_cold(name: str, tmp_path: Path) -> None:
    inst = load_catalogue()[name]
    o = certified_optimum(inst, cache_dir=tmp_path, refresh=True)
    assert o.certified, o.reason
    assert not o.from_cache


def test_every_catalogue_instance_has_a_committed_certified_entry() -> None:
    """The committed cache covers every tier: a changed or added instance needs `benchsuite optimum`.

    Matched by name and problem hash (family, params, data files), not by the
    full cache key, which also holds solver versions that differ between machines.
    """
    committed: dict[str, list[dict]] = {}
    for f in (ROOT / "results" / "reference").glob("*.json"):
        doc = json.loads(f.read_text())
        committed.setdefault(doc["name"], []).append(doc)
    missing = []
    for name, inst in load_catalogue().items():
        docs = [d for d in committed.get(name, []) if d["problem_hash"] == inst.problem_hash()]
        if not any(d["certified"] for d in docs):
            missing.append(name)
    assert not missing, f"no committed certified optimum for {missing}: run `benchsuite optimum NAME` and commit"


# -- what the output says about a published value ---------------------------------------
PUBLISHED_FAMILIES = ("longley", "mgh", "rosenbrock", "nist_strd")


def test_published_sources_name_the_publication_only() -> None:
    """Where a recalled value came from is a note in the source and tests, never output text."""
    cat = load_catalogue()
    seen = set()
    for inst in cat.values():
        if inst.family in PUBLISHED_FAMILIES:  # all cheap to build (at most d = 100)
            pub = inst.build().published()
            assert pub is not None and "memory" not in pub.source and "memory" not in pub.note, inst.name
            seen.add(inst.family)
    assert {"longley", "mgh", "rosenbrock"} <= seen
    for f in (ROOT / "results" / "reference").glob("*.json"):  # the committed cache is shown as is
        assert "from memory" not in f.read_text(), f.name


def test_a_cache_entry_with_an_old_label_is_shown_with_the_current_one(tmp_path: Path) -> None:
    inst = load_catalogue()["nist-longley"]
    src = cache_path(inst, ROOT / "results" / "reference")
    doc = json.loads(src.read_text())
    doc["published"]["source"] += " (an older wording)"
    (tmp_path / src.name).write_text(json.dumps(doc))
    o = certified_optimum(inst, cache_dir=tmp_path)
    assert o.from_cache and o.published.source == "NIST StRD Longley certified values"


def test_optimum_command_output_names_the_publication() -> None:
    import subprocess
    import sys

    proc = subprocess.run(
        [sys.executable, "-m", "benchsuite", "optimum", "nist-longley,mgh-wood,rosenbrock-2d"],
        cwd=ROOT, capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stderr
    assert "published (NIST StRD Longley certified values): f = " in proc.stdout
    assert "published (Moré, Garbow & Hillstrom (1981), ACM TOMS 7(1):17-41, function 14): f = 0.0" in proc.stdout
    assert "published (Rosenbrock (1960), The Computer Journal 3:175-184 (2-D);" in proc.stdout
    assert "memory" not in proc.stdout


# -- where new cache entries go ---------------------------------------------------------------
STRD = ROOT / "benchsuite" / "data" / "strd"


def test_user_cache_dir_follows_the_environment(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.setenv("BENCHSUITE_CACHE_DIR", str(tmp_path / "mine"))
    assert opt_mod.user_cache_dir() == tmp_path / "mine" / "reference"
    monkeypatch.delenv("BENCHSUITE_CACHE_DIR")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert opt_mod.user_cache_dir() == tmp_path / "xdg" / "benchsuite" / "reference"
    monkeypatch.setenv("XDG_CACHE_HOME", "relative/ignored")  # the XDG spec: relative paths are invalid
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert opt_mod.user_cache_dir() == tmp_path / "home" / ".cache" / "benchsuite" / "reference"


def test_new_entries_of_builtin_instances_go_to_results_and_others_to_the_user_cache(tmp_path: Path) -> None:
    builtin = load_catalogue()["quad-diag-kappa10-d10"]
    assert cache_path(builtin).parent == Path("results") / "reference"
    user = instance_from_strd(STRD / "Misra1a.dat")
    assert cache_path(user).parent == opt_mod.user_cache_dir()
    assert cache_path(quad()).parent == opt_mod.user_cache_dir()  # made in code: not the committed cache
    assert cache_path(user, tmp_path).parent == tmp_path  # an explicit folder wins


def test_optimum_of_a_dat_file_never_writes_beside_the_committed_cache(tmp_path: Path) -> None:
    import os
    import subprocess
    import sys

    env = {**os.environ, "BENCHSUITE_CACHE_DIR": str(tmp_path / "cache")}
    (tmp_path / "results" / "reference").mkdir(parents=True)  # as in a checkout: the committed cache
    cmd = [sys.executable, "-m", "benchsuite", "optimum", str(STRD / "Misra1a.dat")]
    first = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stderr
    assert list((tmp_path / "results" / "reference").iterdir()) == []
    [entry] = (tmp_path / "cache" / "reference").glob("Misra1a-start1-*.json")
    assert json.loads(entry.read_text())["certified"] is True
    second = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
    assert "CERTIFIED [from cache]" in second.stdout.splitlines()[0]


def test_mgh17_from_a_cold_cache_prints_no_overflow_warning(tmp_path: Path) -> None:
    import warnings

    before = np.geterr()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        o = certified_optimum(instance_from_strd(STRD / "MGH17.dat"), cache_dir=tmp_path)
    assert o.certified and not o.from_cache, o.reason
    assert [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)] == []
    assert np.geterr() == before  # silenced around the solver call only, not globally
