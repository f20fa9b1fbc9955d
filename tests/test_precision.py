"""float32 support: the resolution floors of benchsuite.precision, checked against float32 runs; Instance.dtype."""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from benchsuite.catalogue import Instance, load_catalogue, select
from benchsuite.errors import UserError
from benchsuite.optimum import certified_optimum
from benchsuite.precision import SAFETY, resolution_floor, unit_roundoff, unreachable_targets

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def warm_cache(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A copy of the committed reference cache (misses are computed into the copy, not the repo)."""
    d = tmp_path_factory.mktemp("reference")
    for f in (ROOT / "results" / "reference").glob("*.json"):
        shutil.copy(f, d / f.name)
    return d


def test_unit_roundoff():
    assert unit_roundoff("float32") == 2.0**-24 == np.finfo(np.float32).eps / 2
    assert unit_roundoff(np.float64) == 2.0**-53 == np.finfo(np.float64).eps / 2
    with pytest.raises(ValueError):
        unit_roundoff("float16")


def test_floor_formulas():
    u = 2.0**-24
    xs, x0 = np.array([3.0, 4.0]), np.zeros(2)  # ||x*|| = ||x0 - x*|| = 5
    kw = dict(L=10.0, f_star=0.5, f0=4.5, x_star=xs, x0=x0, g0_norm=20.0)
    d = resolution_floor("dist", "float32", kappa=100.0, **kw)
    assert d.floor == pytest.approx(u * 100.0)  # u kappa ||x*|| / ||x0 - x*||
    assert resolution_floor("dist", "float32", kappa=None, **kw).floor == pytest.approx(u)  # kappa unknown: 1
    g = resolution_floor("gradnorm", "float32", kappa=100.0, **kw)
    assert g.floor == pytest.approx(u * 10.0 * 5.0 / 20.0)  # u L ||x*|| / ||g0||
    s = resolution_floor("subopt", "float32", kappa=100.0, **kw)
    value = u * math.sqrt(0.5 * 4.5) / 4.0
    iterate = min((u * 100.0) ** 2, 100.0 * g.floor**2)
    assert s.floor == pytest.approx(max(value, iterate))
    assert s.unreachable([1e-2, 1e-6, 1e-8]) == (False, False, True)
    # float64 is 2^29 times finer
    assert resolution_floor("dist", "float64", kappa=100.0, **kw).floor == pytest.approx(d.floor * 2.0**-29)
    with pytest.raises(ValueError):
        resolution_floor("loss", "float32", kappa=1.0, **kw)


def _gd_float32(name: str, steps: int):
    """Gradient descent with step 1/L in float32; best float32-measured subopt, distance and gradient norm."""
    inst = load_catalogue()[name]
    p64, p32 = inst.build(), inst.build_for_run("float32")
    opt = certified_optimum(inst, problem=p64)
    c = p64.constants()
    x0 = p64.initial_point()
    g0 = float(np.linalg.norm(p64.grad(x0)))
    d0 = float(np.linalg.norm(x0 - opt.x_star))
    x, g = p32.initial_point(), np.empty(p32.dim, dtype=np.float32)
    lr = np.float32(1.0 / c.L)
    best = {"subopt": math.inf, "dist": math.inf, "gradnorm": math.inf}
    for _ in range(steps):
        f, g = p32.value_and_grad(x, out=g)
        best["subopt"] = min(best["subopt"], (float(f) - opt.f_star) / (opt.f0 - opt.f_star))
        best["gradnorm"] = min(best["gradnorm"], float(np.linalg.norm(g.astype(np.float64))) / g0)
        best["dist"] = min(best["dist"], float(np.linalg.norm(x.astype(np.float64) - opt.x_star)) / d0)
        x -= lr * g
    floors = {m: resolution_floor(m, "float32", kappa=c.kappa, L=c.L, f_star=opt.f_star, f0=opt.f0,
                                  x_star=opt.x_star, x0=x0, g0_norm=g0).floor for m in best}
    return best, floors


@pytest.mark.parametrize("name, steps", [("lsq-kappa1e2-500x50", 4000), ("ridge-rho0.7-500x50", 2500)])
def test_floors_match_float32_gradient_descent_on_quadratics(name: str, steps: int) -> None:
    best, floors = _gd_float32(name, steps)
    for m in ("dist", "gradnorm"):
        # the floor is where float32 GD stalls, within SAFETY either way: targets SAFETY x above it
        # are reached, targets SAFETY x below are not (measured 0.3-0.6 x the floor)
        assert floors[m] / SAFETY <= best[m] <= floors[m] * SAFETY, (m, best[m], floors[m])
    # below the value floor the float32-measured suboptimality is noise: it turns negative, by a
    # fraction of the floor (measured 0.3-0.5); so targets there cannot be judged
    assert -floors["subopt"] <= best["subopt"] <= -floors["subopt"] / SAFETY, (best["subopt"], floors["subopt"])


def test_logistic_float32_cannot_resolve_1e8_suboptimality(warm_cache: Path) -> None:
    inst = load_catalogue()["logreg-dense-500x50"]  # targets 1e-2 .. 1e-8, f* ~ 0.35, f0 = ln 2
    res, flags = unreachable_targets(inst, "float32", cache_dir=warm_cache)
    assert flags == (False, False, False, True), res
    _, flags64 = unreachable_targets(inst, "float64", cache_dir=warm_cache)
    assert not any(flags64)
    best, floors = _gd_float32("logreg-dense-500x50", 1500)
    # float32 GD "crosses" 1e-8 only through noise: its measured suboptimality goes below zero
    assert best["subopt"] < 0 and -best["subopt"] <= floors["subopt"]


# -- Instance.dtype --------------------------------------------------------------------------
ENTRY = """
[[instance]]
name = "q32"
family = "quadratic"
targets = [1e-2, 1e-4]
budget = 100
{extra}
[instance.params]
d = 5
{params}
"""


def test_instance_dtype_field(tmp_path: Path) -> None:
    f = tmp_path / "c.toml"
    f.write_text(ENTRY.format(extra='dtype = "float32"', params=""))
    inst = load_catalogue([f])["q32"]
    assert inst.dtype == "float32"
    assert inst.build_for_run().dtype == np.float32
    assert inst.build_for_run("float64").dtype == np.float64  # --dtype overrides the instance
    assert inst.build().dtype == np.float64  # what certification builds
    f.write_text(ENTRY.format(extra="", params=""))
    inst64 = load_catalogue([f])["q32"]
    # same objective (one certified optimum), different benchmark case
    assert inst.problem_hash() == inst64.problem_hash()
    assert inst.definition_hash() != inst64.definition_hash()
    assert inst64.build_for_run("float32").dtype == np.float32
    with pytest.raises(UserError, match="--dtype: unknown dtype 'float16'"):
        inst64.build_for_run("float16")


@pytest.mark.parametrize("extra, params, words", [
    ('dtype = "float16"', "", r"\[q32\].dtype: unknown dtype 'float16'"),
    ("dtype = 32", "", r"\[q32\].dtype: expected a string"),
])
def test_bad_dtype_is_one_line(tmp_path: Path, extra: str, params: str, words: str) -> None:
    f = tmp_path / "c.toml"
    f.write_text(ENTRY.format(extra=extra, params=params))
    with pytest.raises(UserError, match=words):
        load_catalogue([f])


def test_dtype_in_params_still_works_and_an_override_replaces_it(tmp_path: Path) -> None:
    f = tmp_path / "c.toml"
    f.write_text(ENTRY.format(extra="", params='dtype = "float32"'))
    inst = load_catalogue([f])["q32"]
    assert inst.build_for_run().dtype == np.float32
    assert inst.build_for_run("float64").dtype == np.float64


def test_float64_definition_hashes_unchanged_by_the_dtype_field() -> None:
    inst = load_catalogue()["lsq-kappa1e2-500x50"]
    legacy = Instance(**{k: v for k, v in inst.__dict__.items() if k != "dtype"})
    assert legacy.definition_hash() == inst.definition_hash()


@pytest.mark.parametrize("inst", select(load_catalogue(), None, tier="small"), ids=lambda i: i.name)
def test_every_small_instance_builds_in_float32(inst: Instance) -> None:
    p64, p32 = inst.build(), inst.build_for_run("float32")
    x = p64.initial_point() + 0.1
    g32 = p32.grad(x.astype(np.float32))
    assert g32.dtype == np.float32 and p32.initial_point().dtype == np.float32
    g64 = p64.grad(x)
    # float32 round-off relative to the gradient's scale; 1e-3 allows sums over ~1e3 terms and
    # ill-conditioned families (relative to max |g|, not per coordinate)
    assert np.max(np.abs(g32 - g64)) <= 1e-3 * max(1.0, np.max(np.abs(g64)))


def test_catalogued_float32_instances(warm_cache: Path) -> None:
    cat = load_catalogue()
    inst = cat["data-breast-cancer-logreg-float32"]
    assert inst.dtype == "float32" and inst.build_for_run().dtype == np.float32
    # one objective, one certified optimum: the float64 instance's
    assert inst.problem_hash() == cat["data-breast-cancer-logreg"].problem_hash()
    res, flags = unreachable_targets(inst, inst.dtype, cache_dir=warm_cache)
    assert flags == (False, False, False, True), res  # 1e-8 is below the float32 value floor (~1e-7)
