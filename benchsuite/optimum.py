"""Certified optimum of a catalogue instance: independent routes, a certificate, a cache.

An optimum is *certified* when at least two independent routes reach it and
agree within a stated tolerance (or one route and a published value agree).
The routes, chosen by what the family provides:

* ``closed-form``: ``problem.closed_form()`` (a direct solve, exact up to
  round-off);
* residual families (``f = sum r_i^2``): ``scipy.optimize.least_squares`` with
  the exact Jacobian, method ``trf`` and, independently, method ``lm``
  (MINPACK's Levenberg-Marquardt), both at ``xtol = ftol = gtol = 1e-15``;
* other families: L-BFGS-B with tight tolerances, then, when the family gives
  ``hessp``, a Newton polish (CG-solved Newton steps kept while the gradient
  norm falls: trust-region codes stall there, as the predicted decrease in f
  is below f's own round-off) that takes the gradient norm to round-off; for
  a non-convex problem, or when no other route exists, a second, independent
  run from ``x0`` (trust-ncg with ``hessp``, else nonlinear CG);
* ``cvxpy``: every convex family with ``cvxpy_objective`` is solved by the
  Clarabel interior-point solver (SCS only when Clarabel fails, and the route
  says so), with the solver status and the duality gap ``|p - d|``;
* a published value (``problem.published()``) is compared by the LRE
  (:func:`benchsuite.strd.lre`) per parameter and for ``f``.

Non-convex problems: the certified minimum is the published one when the
family gives it (confirmed by the scipy routes from the instance's start, or
else from the published point, which ``how`` says); otherwise the best of
:data:`N_STARTS` seeded starts, confirmed by an independent code run from the
start that found it.

Published values: every parameter must reach LRE >= 6 (or the printed digits
less one), and ``f`` too, except that an ``f*`` at round-off level (NIST
Lanczos1, 1.4e-25) is judged by the routes' own ``f`` tolerance; a printed
``x`` that does not reproduce the printed ``f`` (a misprint, as in the
shipped Roszman1 copy) is reported in ``how`` and not required.

Agreement (all relative, ``S_f = max(|f*|, f(x0) - f*)`` and
``S_x = max(||x*||, ||x0 - x*||)``: the scales of the runner's relative
measures): each route has an accuracy ``eps_f`` in ``f`` (:data:`EPS_F`); two
routes agree when ``|f_a - f_b| <= max(eps_a, eps_b) S_f`` and
``||x_a - x_b|| <= min(sqrt(max(eps_a, eps_b) * kappa), 1e-2) S_x``. The ``x`` bound is
the strong-convexity inequality ``||x - x*||^2 <= (2/mu)(f - f*)`` combined
with ``f(x0) - f* <= (L/2)||x0 - x*||^2``: a relative error ``eps`` in ``f``
allows a relative error ``sqrt(eps * L/mu)`` in ``x``. Without a known
``kappa`` it is ``max(X_TOL_UNKNOWN_KAPPA, sqrt(eps))`` (the same bound at
``kappa = 1``, floored for codes that are better than their f accuracy); never
looser than :data:`X_TOL_MAX`. ``agreement_digits`` is ``-log10`` of the
largest relative difference (x or f) over all pairs of agreeing routes.

Cache: ``<folder>/<name>-<key12>.json``. New entries go to ``cache_dir`` when
given, else to ``./results/reference`` for an instance of the built-in
catalogue (in the source tree that is the committed cache) and to the user's
cache folder (:func:`user_cache_dir`: ``$BENCHSUITE_CACHE_DIR``, else
``$XDG_CACHE_HOME/benchsuite``, else ``~/.cache/benchsuite``, then
``reference/``) for anything else (the user's catalogue files, StRD files given
by path), so that a user's optima never mix with the committed ones. Entries
are looked up in ``./results/reference``, the committed cache and the user's
cache folder, in that order. The
key hashes the instance's ``problem_hash`` (which covers the content of any
key hashes the instance's ``problem_hash`` (which covers the content of any
data file the problem reads, see ``Problem.data_digest``), the versions of numpy / scipy / cvxpy / Clarabel / SCS and
the certificate format. Plain JSON (floats by ``repr``, exact round trip);
``x*`` of more than :data:`NPZ_MIN_DIM` coordinates goes to an ``.npz``
(``allow_pickle=False``) beside it. Writes are atomic. A cached entry is
checked on load (``f(x*)`` recomputed) and recomputed when it is corrupt or
stale.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
import os
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from benchsuite.problem import Constants, Problem, Published, ResidualProblem

if TYPE_CHECKING:
    from benchsuite.catalogue import Instance

__all__ = [
    "EPS_F",
    "Optimum",
    "Route",
    "cache_path",
    "cached_entry",
    "certified_optimum",
    "default_cache_dir",
    "large_route_applies",
    "user_cache_dir",
]

FORMAT = 2  # bump when the routes or the tolerances change: old entries are then recomputed
#: relative accuracy in f claimed by each kind of route (see the module docstring)
EPS_F: dict[str, float] = {
    # direct solve: backward stable; f at the solution is exact to a few ulps of S_f
    "exact": 1e-12,
    # iterative scipy codes run until the gradient is at round-off level; 1e-10
    # leaves two decades over the ulp-level noise of f evaluated near f*
    "scipy": 1e-10,
    # Clarabel's default tolerances: gap (abs and rel) 1e-8, feasibility 1e-8;
    # cvxpy's reformulation rescales the objective, so one decade of margin
    "cvxpy": 1e-7,
    # SCS (first-order conic solver) run at eps_abs = eps_rel = 1e-9, one decade lower accuracy
    "scs": 1e-6,
}
#: relative x tolerance when kappa is unknown (non-convex or not derived):
#: independent codes at a regular minimum agree to ~1e-9 or better in practice;
#: 1e-6 is common practice, no source
X_TOL_UNKNOWN_KAPPA = 1e-6
#: the x tolerance is never looser than this, whatever kappa: the runner's
#: loosest distance target is 1e-2 relative, so x* must be better than that
#: (an ill-conditioned problem such as Longley, kappa ~ 2e19, would otherwise
#: get a vacuous bound)
X_TOL_MAX = 1e-2
#: LRE a published value must reach (NIST's certified values carry 10-11
#: digits; LRE >= 6 is the level the project asks of every StRD file); a value
#: printed with k significant digits is asked only k - 1 (its own rounding)
LRE_MIN = 6.0
#: number of starts (the instance's x0 plus seeded perturbations) for non-convex
#: problems without a published minimum
N_STARTS = 9
#: x* with more coordinates than this is stored in an .npz beside the JSON
#: (keeps the committed JSON files small and readable)
NPZ_MIN_DIM = 2000
#: each route's own x is stored in the JSON only up to this dimension (for audit)
ROUTE_X_MAX_DIM = 100
#: an exact route is preferred to one with a smaller gradient norm unless that
#: is more than this factor smaller (gradient norms at round-off level differ
#: by small factors from evaluation noise alone)
EXACT_TIE_FACTOR = 4.0
_PACKAGES = ("numpy", "scipy", "cvxpy", "clarabel", "scs")


@dataclass(frozen=True)
class Route:
    """One independent way to the optimum and what it reached."""

    method: str
    f: float
    x: tuple[float, ...]
    status: str
    grad_norm: float
    seconds: float
    duality_gap: float | None = None
    ok: bool = True  # finished without error and with a success status
    kind: str = "scipy"  # accuracy class, a key of EPS_F


@dataclass(frozen=True)
class Optimum:
    """The certified optimum of an instance and its certificate."""

    name: str
    f_star: float
    x_star: np.ndarray
    grad_norm: float
    routes: tuple[Route, ...]
    agreement_digits: float
    certified: bool
    how: str
    published: Published | None
    lre: dict[str, float] | None
    reason: str = ""  # why not certified (empty when certified)
    f0: float = math.nan  # f(x0), the scale of relative suboptimality
    dist_bound: float | None = None  # ||x* - x_true|| <= grad_norm / mu (strongly convex, mu known)
    tolerances: dict[str, float] = field(default_factory=dict)
    facts: dict[str, Any] = field(default_factory=dict)  # dim, n_samples, constants, convex (for listings)
    versions: dict[str, str] = field(default_factory=dict)
    from_cache: bool = False

    @property
    def methods(self) -> list[str]:
        """The routes that reached the optimum."""
        return [r.method for r in self.routes if r.ok]


# -- cache location and key ----------------------------------------------------
#: environment variable naming the user's cache folder (optima go to its ``reference/``)
CACHE_ENV = "BENCHSUITE_CACHE_DIR"


def user_cache_dir() -> Path:
    """The user's cache folder for optima of instances outside the built-in catalogue.

    ``$BENCHSUITE_CACHE_DIR/reference``, else ``$XDG_CACHE_HOME/benchsuite/reference``,
    else ``~/.cache/benchsuite/reference`` (the XDG default). Nothing is created here.
    """
    root = os.environ.get(CACHE_ENV, "").strip()
    if root:
        return Path(root).expanduser() / "reference"
    xdg = os.environ.get("XDG_CACHE_HOME", "").strip()
    base = Path(xdg).expanduser() if xdg and Path(xdg).is_absolute() else Path.home() / ".cache"
    return base / "benchsuite" / "reference"


def default_cache_dir(instance: Instance | None = None) -> Path:
    """Where a new entry goes without ``cache_dir``: ``./results/reference`` for an
    instance of the built-in catalogue (or ``instance=None``), else :func:`user_cache_dir`."""
    if instance is None or instance.builtin:
        return Path("results") / "reference"
    return user_cache_dir()


def _lookup_dirs(cache_dir: Path | None) -> list[Path]:
    """Folders searched for an entry: the given one; by default ``./results/reference``, the
    committed ``results/reference`` (of the source tree, or the copy a wheel installs), then the
    user's cache folder."""
    if cache_dir is not None:
        return [Path(cache_dir)]
    import benchsuite

    package = Path(benchsuite.__file__).resolve().parent
    dirs = [default_cache_dir(), package.parent / "results" / "reference", package / "_reference", user_cache_dir()]
    out: list[Path] = []
    for d in dirs:
        if d.is_dir() and all(d.resolve() != o.resolve() for o in out):
            out.append(d)
    return out or [default_cache_dir()]


def solver_versions() -> dict[str, str]:
    """Versions of the numerical packages (read from metadata, nothing imported)."""
    return dict(_versions())


@functools.lru_cache(maxsize=1)
def _versions() -> tuple[tuple[str, str], ...]:
    out = []
    for name in _PACKAGES:
        try:
            out.append((name, metadata.version(name)))
        except metadata.PackageNotFoundError:
            out.append((name, "absent"))
    return tuple(out)


def cache_key(instance: Instance) -> str:
    payload = {
        "format": FORMAT,
        "problem": instance.problem_hash(),  # includes a digest of any data file it reads
        "versions": solver_versions(),
    }
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest()


def cache_path(instance: Instance, cache_dir: Path | None = None) -> Path:
    safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in instance.name)
    return Path(cache_dir or default_cache_dir(instance)) / f"{safe}-{cache_key(instance)[:12]}.json"


# -- small numerical helpers -----------------------------------------------------
def _norm(v: np.ndarray) -> float:
    return float(np.linalg.norm(v))


def _grad_norm(problem: Problem, x: np.ndarray) -> float:
    g = problem.grad(np.array(x, dtype=np.float64))
    return _norm(g) if np.all(np.isfinite(g)) else math.inf


def _overrides(problem: Problem, name: str) -> bool:
    return getattr(type(problem), name) is not getattr(Problem, name)


def _make_route(
    problem: Problem, method: str, x: np.ndarray | None, status: str, ok: bool, seconds: float, kind: str,
    duality_gap: float | None = None,
) -> Route:
    if x is None or not np.all(np.isfinite(x)):
        return Route(method, math.nan, (), status, math.inf, seconds, duality_gap, False, kind)
    x = np.asarray(x, dtype=np.float64)
    f = float(problem.value(x))
    return Route(method, f, tuple(float(v) for v in x), status, _grad_norm(problem, x), seconds, duality_gap,
                 ok and math.isfinite(f), kind)


def _failed(method: str, kind: str, exc: BaseException, seconds: float) -> Route:
    msg = str(exc).splitlines()[0] if str(exc) else ""
    return Route(method, math.nan, (), f"error: {type(exc).__name__}: {msg}"[:200], math.inf, seconds, None, False, kind)


# -- the routes --------------------------------------------------------------------
def _route_closed_form(problem: Problem) -> Route | None:
    if not _overrides(problem, "closed_form"):
        return None
    t = time.perf_counter()
    try:
        x = problem.closed_form()
    except Exception as exc:  # a family bug is reported as a failed route, not a crash
        return _failed("closed-form", "exact", exc, time.perf_counter() - t)
    if x is None:
        return None
    return _make_route(problem, "closed-form", x, "exact direct solve", True, time.perf_counter() - t, "exact")


def _route_least_squares(problem: ResidualProblem, x0: np.ndarray, method: str) -> Route:
    """scipy least_squares (trf or lm) with the exact Jacobian, at 1e-15 tolerances."""
    from scipy.optimize import least_squares

    label = f"scipy least_squares {method}"
    t = time.perf_counter()
    try:
        # a trial step far out (e.g. NIST MGH17's exponentials from start 1) can overflow the
        # residuals or their sum of squares; trf then sees a non-finite cost and shrinks its trust
        # region, lm rejects the step: expected and handled, so numpy's overflow warning is silenced
        # here only (a non-finite final x is still a failed route, see _make_route)
        with np.errstate(over="ignore"):
            res = least_squares(
                problem.residuals, x0, jac=problem.jacobian, method=method,
                xtol=1e-15, ftol=1e-15, gtol=1e-15, x_scale="jac", max_nfev=20000 * max(1, problem.dim),
            )
    except Exception as exc:  # e.g. lm needs m >= n
        return _failed(label, "scipy", exc, time.perf_counter() - t)
    status = f"status {res.status}: {res.message}"
    return _make_route(problem, label, res.x, status, res.status > 0, time.perf_counter() - t, "scipy")


def _fun(problem: Problem) -> Callable[[np.ndarray], tuple[float, np.ndarray]]:
    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        f, g = problem.value_and_grad(x)
        return float(f), np.array(g, dtype=np.float64)

    return fun


def _newton_polish(problem: Problem, x: np.ndarray, max_steps: int = 8) -> tuple[np.ndarray, int]:
    """Newton steps ``H s = -g`` solved by CG with ``hessp``, kept while ``||g||`` falls.

    Near a minimum, trust-region codes reject steps because the predicted
    decrease in ``f`` is below the round-off of ``f`` itself; judging a step by
    the gradient norm (and ``f`` not rising beyond round-off) takes the
    gradient down to round-off level in one or two steps.
    """
    from scipy.sparse.linalg import LinearOperator, cg

    f, g = _fun(problem)(x)
    gn = _norm(g)
    steps = 0
    for _ in range(max_steps):
        if gn == 0:
            break
        xk = x
        H = LinearOperator((problem.dim, problem.dim), matvec=lambda v: np.asarray(problem.hessp(xk, v), float),
                           dtype=np.float64)
        s, _info = cg(H, -g, rtol=1e-14, atol=0.0, maxiter=min(10 * problem.dim, 5000))
        if not np.all(np.isfinite(s)):
            break
        fn, gnew = _fun(problem)(x + s)
        gnn = _norm(gnew)
        if not (gnn < gn and fn <= f + 1e-12 * max(1.0, abs(f))):
            break
        x, f, g, gn = x + s, fn, gnew, gnn
        steps += 1
    return x, steps


def _polish(problem: Problem, x: np.ndarray, status: str) -> tuple[np.ndarray, str]:
    if not _overrides(problem, "hessp") or not np.all(np.isfinite(x)):
        return x, status
    xp, steps = _newton_polish(problem, x)
    return xp, f"{status}; Newton polish: {steps} step(s)"


def _route_lbfgs(problem: Problem, x0: np.ndarray) -> Route:
    """L-BFGS-B to a tight tolerance, then the Newton polish when the family has ``hessp``."""
    from scipy.optimize import minimize

    label = "scipy L-BFGS-B + Newton polish" if _overrides(problem, "hessp") else "scipy L-BFGS-B"
    t = time.perf_counter()
    try:
        g0 = max(1.0, float(np.max(np.abs(problem.grad(x0)))))
        # with hessp the Newton polish takes the gradient from 1e-10 to round-off in a step or two
        gtol = (1e-10 if _overrides(problem, "hessp") else 1e-14) * g0
        res = minimize(_fun(problem), x0, jac=True, method="L-BFGS-B",
                       options={"ftol": 1e-16, "gtol": gtol, "maxiter": 100000, "maxfun": 200000, "maxcor": 30})
        x, status = _polish(problem, res.x, f"L-BFGS-B: {res.message}")
    except Exception as exc:
        return _failed(label, "scipy", exc, time.perf_counter() - t)
    # L-BFGS-B stops with "ABNORMAL" when round-off blocks the last line search;
    # the gradient norm, compared between routes, is the judge of the point
    return _make_route(problem, label, x, status, True, time.perf_counter() - t, "scipy")


def _route_second_smooth(problem: Problem, x0: np.ndarray) -> Route:
    """An independent smooth route from x0: trust-ncg with hessp (then the polish), else nonlinear CG."""
    from scipy.optimize import minimize

    t = time.perf_counter()
    g0 = max(1.0, float(np.max(np.abs(problem.grad(x0)))))
    if _overrides(problem, "hessp"):
        label = "scipy trust-ncg + Newton polish"
        kw: dict[str, Any] = {"hessp": problem.hessp, "method": "trust-ncg",
                              "options": {"gtol": 1e-14 * g0, "maxiter": 5000}}
    else:
        label = "scipy CG"
        kw = {"method": "CG", "options": {"gtol": 1e-14 * g0, "maxiter": 200000}}
    try:
        res = minimize(_fun(problem), x0, jac=True, **kw)
        x, status = _polish(problem, res.x, str(res.message))
    except Exception as exc:
        return _failed(label, "scipy", exc, time.perf_counter() - t)
    return _make_route(problem, label, x, status, True, time.perf_counter() - t, "scipy")


def _route_cvxpy(problem: Problem, x0: np.ndarray) -> tuple[Route | None, str]:
    """cvxpy with Clarabel (SCS if Clarabel fails). Returns the route and a formulation note."""
    if not (problem.convex and _overrides(problem, "cvxpy_objective")):
        return None, ""
    import cvxpy as cp

    t = time.perf_counter()
    try:
        var = cp.Variable(problem.dim)
        obj = problem.cvxpy_objective(var)
        if obj is None:
            return None, ""
        prob = cp.Problem(cp.Minimize(obj))
    except Exception as exc:
        return _failed("cvxpy", "cvxpy", exc, time.perf_counter() - t), ""
    method, kind, gap, status, clarabel_note = "cvxpy/CLARABEL", "cvxpy", None, "", ""
    try:
        # the raw Clarabel solution carries the primal and dual objective values
        data, chain, inverse = prob.get_problem_data(cp.CLARABEL, solver_opts={})
        raw = chain.solver.solve_via_data(data, False, False, {})
        prob.unpack_results(raw, chain, inverse)
        status = f"{prob.status} (Clarabel {raw.status}, {raw.iterations} iterations)"
        gap = abs(float(raw.obj_val) - float(raw.obj_val_dual))
        if prob.status != "optimal":
            clarabel_note = f"Clarabel: {raw.status}"
    except Exception as exc:
        clarabel_note = f"Clarabel failed: {type(exc).__name__}: {exc}"
    if clarabel_note:
        method, kind = f"cvxpy/SCS (fallback; {clarabel_note})", "scs"
        try:
            prob.solve(solver=cp.SCS, eps_abs=1e-9, eps_rel=1e-9, max_iters=200000)
            info = prob.solver_stats.extra_stats or {}
            status = f"{prob.status} (SCS {info.get('status', '')}, {prob.solver_stats.num_iters} iterations)"
            gap = abs(float(info["gap"])) if "gap" in info else None
        except Exception as exc:
            return _failed(method, kind, exc, time.perf_counter() - t), ""
    seconds = time.perf_counter() - t
    if var.value is None:
        return Route(method, math.nan, (), status, math.inf, seconds, gap, False, kind), ""
    route = _make_route(problem, method, var.value, status, prob.status == "optimal", seconds, kind, gap)
    # the cvxpy expression must be the family's objective: compare its value with f(x)
    note = ""
    if route.ok and prob.value is not None:
        diff = abs(float(prob.value) - route.f)
        scale = max(abs(route.f), abs(float(problem.value(x0)) - route.f), np.finfo(float).tiny)
        if diff > EPS_F[kind] * scale:
            note = (f"cvxpy objective {float(prob.value)!r} differs from the family's f = {route.f!r} at the "
                    f"cvxpy solution (relative {diff / scale:.1e}): cvxpy_objective does not match value()")
    return route, note


# -- agreement ---------------------------------------------------------------------
def _kappa(constants: Constants) -> float | None:
    if constants.L_kind == "unknown" or constants.mu_kind == "unknown":
        return None
    k = constants.kappa
    return k if k is not None and math.isfinite(k) and k >= 1 else None


def _pair_disagreement(a: Route, b: Route, s_f: float, s_x: float) -> tuple[float, float]:
    rel_f = abs(a.f - b.f) / s_f
    rel_x = _norm(np.asarray(a.x) - np.asarray(b.x)) / s_x
    return rel_f, rel_x


def _pair_tolerance(a: Route, b: Route, kappa: float | None) -> tuple[float, float]:
    eps = max(EPS_F[a.kind], EPS_F[b.kind])
    tol_x = math.sqrt(eps * kappa) if kappa is not None else max(X_TOL_UNKNOWN_KAPPA, math.sqrt(eps))
    return eps, min(tol_x, X_TOL_MAX)


def _agreement(routes: list[Route], s_f: float, s_x: float, kappa: float | None) -> tuple[bool, float, str]:
    """Whether all routes agree pairwise; the digits of the worst pair; the first failure."""
    worst, first_fail = 0.0, ""
    for i, a in enumerate(routes):
        for b in routes[i + 1:]:
            rf, rx = _pair_disagreement(a, b, s_f, s_x)
            tf, tx = _pair_tolerance(a, b, kappa)
            worst = max(worst, rf, rx)
            if not first_fail and (rf > tf or rx > tx):
                first_fail = (f"{a.method} and {b.method} disagree: relative f difference {rf:.1e} "
                              f"(tolerance {tf:.0e}), relative x difference {rx:.1e} (tolerance {tx:.1e})")
    digits = 16.0 if worst == 0 else min(16.0, -math.log10(worst))
    return not first_fail, digits, first_fail


def _digits_of(value: float) -> int | None:
    """Significant digits of a published value as printed; None for an integer (exact)."""
    if value == round(value):
        return None
    mant = repr(abs(value)).split("e")[0].replace(".", "").strip("0")
    return len(mant)


def _lre_table(x: np.ndarray, f: float, pub: Published) -> dict[str, float]:
    from benchsuite.strd import lre

    out: dict[str, float] = {}
    if pub.x is not None:
        for i, t in enumerate(pub.x):
            out[f"b{i + 1}"] = float(lre(float(x[i]), float(t)))
    out["f"] = float(lre(float(f), float(pub.f)))
    params = [v for k, v in out.items() if k != "f"]
    out["min"] = min(params) if params else out["f"]
    return out


def _published_ok(
    problem: Problem, x: np.ndarray, f: float, pub: Published, s_f: float
) -> tuple[bool, dict[str, float], str, str]:
    """Compare a computed optimum with a published one.

    ``f`` matches when its LRE reaches the required digits or, for an ``f*``
    at round-off level (e.g. NIST Lanczos1, RSS 1.4e-25, which float64
    residuals cannot reproduce to more than a few digits), when it is within
    the routes' own tolerance ``EPS_F["scipy"] * S_f``. The published ``x`` is
    compared parameter by parameter (LRE) only when it is consistent, i.e.
    ``f(x_pub)`` passes the same test against the published ``f``; a printed
    ``x`` that does not reproduce the printed ``f`` (a misprint) is reported,
    not required. Returns (ok, LRE table, what failed, note).
    """
    table = _lre_table(x, f, pub)
    bad, note = [], ""

    def need(t: float) -> float:
        k = _digits_of(t)
        return LRE_MIN if k is None else min(LRE_MIN, k - 1)

    def f_matches(value: float, lre_value: float) -> bool:
        return lre_value >= need(pub.f) or abs(value - pub.f) <= EPS_F["scipy"] * s_f

    if not f_matches(f, table["f"]):
        bad.append(f"f LRE {table['f']:.1f} < {need(pub.f):g}")
    if pub.x is not None:
        from benchsuite.strd import lre

        f_pub_x = float(problem.value(np.asarray(pub.x, dtype=np.float64)))
        if f_matches(f_pub_x, float(lre(f_pub_x, pub.f))):
            for i, t in enumerate(pub.x):
                if table[f"b{i + 1}"] < need(t):
                    bad.append(f"b{i + 1} LRE {table[f'b{i + 1}']:.1f} < {need(t):g}")
        else:
            worst = min((k for k in table if k not in ("f", "min")), key=lambda k: table[k])
            note = (f"the published x does not reproduce the published f (f(x_pub) = {f_pub_x:.6g}, published "
                    f"f = {pub.f:.6g}; lowest LRE at {worst}): x compared for information only")
    return not bad, table, "; ".join(bad), note


def _choose(routes: list[Route]) -> Route:
    best = min(routes, key=lambda r: r.grad_norm)
    exact = [r for r in routes if r.kind == "exact"]
    if exact and exact[0].grad_norm <= EXACT_TIE_FACTOR * best.grad_norm:
        return exact[0]
    return best


# -- computing an optimum ------------------------------------------------------------
def _smooth_routes(problem: Problem, x0: np.ndarray) -> list[Route]:
    if isinstance(problem, ResidualProblem):
        return [_route_least_squares(problem, x0, "trf"), _route_least_squares(problem, x0, "lm")]
    return [_route_lbfgs(problem, x0)]


def _multistart(problem: Problem, x0: np.ndarray) -> tuple[list[Route], list[np.ndarray], str]:
    """The primary route from x0 and from N_STARTS - 1 seeded starts ``x0 + s_k N(0, I)``.

    The spreads ``s_k`` double every two starts (1, 1, 2, 2, 4, 4, ... times
    ``max(1, rms(x0))``), so that both the start's neighbourhood and distant
    basins are visited. A heuristic: it finds the best of the minima it visits.
    """
    rng = np.random.default_rng(0)
    base = max(1.0, _norm(x0) / math.sqrt(max(1, x0.size)))
    routes, starts = [], []
    for k in range(N_STARTS):
        spread = base * 2.0 ** ((k - 1) // 2)
        start = x0 if k == 0 else x0 + spread * rng.standard_normal(x0.size)
        r = _smooth_routes(problem, start)[0]
        starts.append(start)
        routes.append(Route(f"{r.method} from start {k}", r.f, r.x, r.status, r.grad_norm, r.seconds,
                            r.duality_gap, r.ok, r.kind))
    return routes, starts, (f"x0 and {N_STARTS - 1} starts x0 + s N(0, I), s = {base:.3g} x 1, 1, 2, 2, 4, ... "
                    "(numpy default_rng(0))")


def _compute(instance: Instance, problem: Problem) -> Optimum:
    if large_route_applies(problem):  # large data: no cvxpy; L-BFGS + Newton-CG and a duality gap
        return _compute_large(instance, problem)
    x0 = np.asarray(problem.initial_point(), dtype=np.float64)
    f0 = float(problem.value(x0))
    constants = problem.constants()
    kappa = _kappa(constants)
    pub = problem.published()
    routes: list[Route] = []
    notes: list[str] = []

    cf = _route_closed_form(problem)
    if cf is not None:
        routes.append(cf)
    cvx, cvx_note = _route_cvxpy(problem, x0)
    if cvx_note:
        notes.append(cvx_note)

    how = ""
    if problem.convex:
        routes += _smooth_routes(problem, x0)
        if cvx is not None:
            routes.append(cvx)
        if len([r for r in routes if r.ok]) < 2 and not isinstance(problem, ResidualProblem):
            routes.append(_route_second_smooth(problem, x0))
        how = "convex: unique minimum"
    elif pub is not None:
        routes += _smooth_routes(problem, x0)
        if not isinstance(problem, ResidualProblem):
            routes.append(_route_second_smooth(problem, x0))
        how = f"non-convex: the published minimum ({pub.source})"
    else:
        starts, points, desc = _multistart(problem, x0)
        how = f"non-convex: the best minimum over {N_STARTS} starts ({desc})"
        ok = [r for r in starts if r.ok]
        if ok:
            best = min(ok, key=lambda r: r.f)
            s_f = max(abs(best.f), f0 - best.f, np.finfo(float).tiny)
            s_x = max(_norm(np.asarray(best.x)), _norm(x0 - np.asarray(best.x)), np.finfo(float).tiny)
            reached = {id(r) for r in ok if _agreement([best, r], s_f, s_x, None)[0]}
            how += f"; {len(reached)} of {N_STARTS} starts reached it"
            # starts that ended elsewhere stay in the record, outside the agreement
            starts = [r if (id(r) in reached or not r.ok) else
                      Route(r.method, r.f, r.x, r.status + " (ended at another stationary point)", r.grad_norm,
                            r.seconds, r.duality_gap, False, r.kind) for r in starts]
            # an independent code from the start that found the best minimum confirms it
            origin = points[next(k for k, r in enumerate(starts) if r.x == best.x)]
            confirm = (_route_least_squares(problem, origin, "lm") if isinstance(problem, ResidualProblem)
                       else _route_second_smooth(problem, origin))
            starts.append(Route(f"{confirm.method} (confirmation from the same start)", confirm.f, confirm.x,
                                confirm.status, confirm.grad_norm, confirm.seconds, None, confirm.ok, confirm.kind))
        routes += starts
    return _certify(instance, problem, routes, x0, f0, constants, kappa, pub, how, notes)


def _certify(
    instance: Instance, problem: Problem, routes: list[Route], x0: np.ndarray, f0: float,
    constants: Constants, kappa: float | None, pub: Published | None, how: str, notes: list[str],
) -> Optimum:
    ok = [r for r in routes if r.ok]
    reason = ""
    lre_table: dict[str, float] | None = None
    agree, digits = False, 0.0
    if not ok:
        reason = "no route succeeded: " + "; ".join(f"{r.method}: {r.status}" for r in routes)
        chosen = None
    else:
        chosen = _choose(ok)
        s_f = max(abs(chosen.f), f0 - chosen.f, np.finfo(float).tiny)
        s_x = max(_norm(np.asarray(chosen.x)), _norm(x0 - np.asarray(chosen.x)), np.finfo(float).tiny)
        agree, digits, fail = _agreement(ok, s_f, s_x, kappa)
        if not agree:
            reason = fail
        if pub is not None:
            pub_ok, lre_table, bad, pub_note = _published_ok(problem, np.asarray(chosen.x), chosen.f, pub, s_f)
            if pub_note:
                how += f"; {pub_note}"
            if not pub_ok and pub.x is not None and not problem.convex:
                # the standard start may lead elsewhere: run the routes from the published point
                retry = _smooth_routes(problem, np.asarray(pub.x, dtype=np.float64))
                retry = [Route(r.method + " from the published point", r.f, r.x, r.status, r.grad_norm,
                               r.seconds, r.duality_gap, r.ok, r.kind) for r in retry]
                rok = [r for r in retry if r.ok]
                if rok:
                    cand = _choose(rok)
                    r_pub_ok, r_table, r_bad, _ = _published_ok(problem, np.asarray(cand.x), cand.f, pub, s_f)
                    r_agree, r_digits, r_fail = _agreement(rok, s_f, s_x, kappa)
                    if r_pub_ok:
                        how += (f"; from the instance's start the routes reach f = {chosen.f!r}, so they "
                                f"were run from the published point")
                        routes = routes + retry
                        ok, chosen, agree, digits, lre_table = rok, cand, r_agree, r_digits, r_table
                        pub_ok, reason = True, r_fail
                    else:
                        bad += f" (from the published point as well: {r_bad})"
            if not pub_ok:
                reason = (reason + "; " if reason else "") + f"does not match the published value: {bad}"
            elif len(ok) < 2:
                how += "; one computed route, confirmed by the published value"
        if len(ok) < 2 and pub is None:
            reason = (reason + "; " if reason else "") + "only one route succeeded"
    for n in notes:
        reason = (reason + "; " if reason else "") + n
    if chosen is None:
        x_star, f_star, gnorm = np.full(problem.dim, np.nan), math.nan, math.inf
    else:
        x_star, f_star, gnorm = np.asarray(chosen.x, dtype=np.float64), chosen.f, chosen.grad_norm
    dist_bound = None
    if constants.mu and constants.mu_kind in ("exact", "bound") and problem.convex and math.isfinite(gnorm):
        dist_bound = gnorm / constants.mu  # strong convexity: ||x - x_true|| <= ||grad f(x)|| / mu
    tolerances = {"eps_f": max((EPS_F[r.kind] for r in ok), default=math.nan),
                  "kappa": kappa if kappa is not None else math.nan}
    if chosen is not None:
        tolerances["x"] = _pair_tolerance(chosen, max(ok, key=lambda r: EPS_F[r.kind]), kappa)[1]
    how = f"{how}; x* from {chosen.method} (smallest gradient norm)" if chosen is not None else how
    return Optimum(
        name=instance.name, f_star=f_star, x_star=x_star, grad_norm=gnorm, routes=tuple(routes),
        agreement_digits=digits, certified=not reason, how=how, published=pub, lre=lre_table, reason=reason,
        f0=f0, dist_bound=dist_bound, tolerances=tolerances, facts=_facts(problem, constants),
        versions=solver_versions(),
    )


def _facts(problem: Problem, constants: Constants) -> dict[str, Any]:
    return {
        "family": problem.family, "dim": int(problem.dim), "n_samples": problem.n_samples,
        "convex": bool(problem.convex), "L": constants.L, "mu": constants.mu, "L_kind": constants.L_kind,
        "mu_kind": constants.mu_kind, "note": constants.note,
    }


# -- JSON (de)serialisation ------------------------------------------------------------
def _num(v: float | None) -> float | str | None:
    """Finite floats as JSON numbers (repr: exact round trip), others as strings."""
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else repr(v)


def _unnum(v: Any) -> float | None:
    return None if v is None else float(v)


def _to_json(opt: Optimum, instance: Instance, key: str, npz_name: str | None) -> dict[str, Any]:
    big = npz_name is not None
    return {
        "format": FORMAT, "name": opt.name, "family": instance.family, "params": dict(instance.params),
        "problem_hash": instance.problem_hash(), "key": key, "versions": opt.versions,
        "certified": opt.certified, "how": opt.how, "reason": opt.reason,
        "f_star": _num(opt.f_star), "f0": _num(opt.f0), "grad_norm": _num(opt.grad_norm),
        "dist_bound": _num(opt.dist_bound), "agreement_digits": _num(opt.agreement_digits),
        "x_star": None if big else [_num(v) for v in opt.x_star], "x_star_npz": npz_name,
        "tolerances": {k: _num(v) for k, v in opt.tolerances.items()}, "facts": opt.facts,
        "routes": [
            {"method": r.method, "f": _num(r.f), "x": [_num(v) for v in r.x] if len(r.x) <= ROUTE_X_MAX_DIM else None,
             "status": r.status,
             "grad_norm": _num(r.grad_norm), "seconds": r.seconds, "duality_gap": _num(r.duality_gap),
             "ok": r.ok, "kind": r.kind}
            for r in opt.routes
        ],
        "published": None if opt.published is None else {
            "f": _num(opt.published.f),
            "x": None if opt.published.x is None else [_num(v) for v in opt.published.x],
            "source": opt.published.source, "note": opt.published.note,
        },
        "lre": None if opt.lre is None else {k: _num(v) for k, v in opt.lre.items()},
    }


def _from_json(doc: dict[str, Any], folder: Path) -> Optimum:
    if doc.get("format") != FORMAT:
        raise ValueError("unknown format")
    if doc.get("x_star_npz"):
        with np.load(folder / doc["x_star_npz"], allow_pickle=False) as z:
            x_star = np.asarray(z["x_star"], dtype=np.float64)
    else:
        x_star = np.array([float(v) for v in doc["x_star"]], dtype=np.float64)
    pub = doc["published"]
    routes = tuple(
        Route(r["method"], float(r["f"]), tuple(float(v) for v in (r["x"] or ())), r["status"],
              float(r["grad_norm"]), float(r["seconds"]), _unnum(r["duality_gap"]), bool(r["ok"]), r["kind"])
        for r in doc["routes"]
    )
    return Optimum(
        name=doc["name"], f_star=float(doc["f_star"]), x_star=x_star, grad_norm=float(doc["grad_norm"]),
        routes=routes, agreement_digits=float(doc["agreement_digits"]), certified=bool(doc["certified"]),
        how=doc["how"], reason=doc["reason"],
        published=None if pub is None else Published(
            f=float(pub["f"]), x=None if pub["x"] is None else tuple(float(v) for v in pub["x"]),
            source=pub["source"], note=pub.get("note", "")),
        lre=None if doc["lre"] is None else {k: float(v) for k, v in doc["lre"].items()},
        f0=float(doc["f0"]), dist_bound=_unnum(doc["dist_bound"]),
        tolerances={k: float(v) for k, v in doc["tolerances"].items()}, facts=dict(doc["facts"]),
        versions=dict(doc["versions"]), from_cache=True,
    )


def _atomic_write(path: Path, write: Callable[[Any], None], mode: str = "w") -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, mode) as fh:
            write(fh)
        os.chmod(tmp, 0o644)  # mkstemp creates 0600; a cache is shared, readable data
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _save(opt: Optimum, instance: Instance, path: Path, key: str) -> None:
    npz_name = None
    if opt.x_star.size > NPZ_MIN_DIM:
        npz_name = path.with_suffix(".npz").name
        _atomic_write(path.with_suffix(".npz"), lambda fh: np.savez(fh, x_star=opt.x_star), mode="wb")
    doc = _to_json(opt, instance, key, npz_name)
    _atomic_write(path, lambda fh: (json.dump(doc, fh, indent=1), fh.write("\n")))


def cached_entry(instance: Instance, cache_dir: Path | None = None) -> dict[str, Any] | None:
    """The raw cached JSON of an instance (no problem built, nothing checked), or None."""
    key = cache_key(instance)
    for folder in _lookup_dirs(cache_dir):
        try:
            doc = json.loads(cache_path(instance, folder).read_text())
        except (OSError, ValueError):
            continue
        if isinstance(doc, dict) and doc.get("key") == key:
            return doc
    return None


def _load(instance: Instance, problem: Problem | None, path: Path, key: str) -> Optimum | None:
    """The cached optimum if the file is sound and f(x*) still matches; else None."""
    try:
        doc = json.loads(path.read_text())
        if doc.get("key") != key:
            return None
        opt = _from_json(doc, path.parent)
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return None  # corrupt or from another format: recompute
    if opt.x_star.shape != (problem.dim,):
        return None
    if math.isfinite(opt.f_star):
        f = float(problem.value(opt.x_star))
        scale = max(abs(opt.f_star), opt.f0 - opt.f_star, np.finfo(float).tiny)
        if not abs(f - opt.f_star) <= EPS_F["exact"] * scale:  # stale: the family's objective changed
            return None
    return _current_labels(opt, problem)


def _current_labels(opt: Optimum, problem: Problem) -> Optimum:
    """``opt`` with the published source and note as the family words them now.

    The labels are not part of the cache key (they do not change the optimum),
    so an entry written before a family reworded its citation keeps the old
    wording; the output names the publication as the code does.
    """
    pub = problem.published()
    old = opt.published
    if pub is None or old is None or (pub.source, pub.note) == (old.source, old.note):
        return opt
    how = opt.how.replace(f"({old.source})", f"({pub.source})") if old.source else opt.how
    return dataclasses.replace(opt, published=dataclasses.replace(old, source=pub.source, note=pub.note), how=how)


def certified_optimum(
    instance: Instance, *, cache_dir: Path | None = None, refresh: bool = False, problem: Problem | None = None
) -> Optimum:
    """The certified optimum of ``instance``, from the cache or computed (and cached).

    Without ``cache_dir`` an entry is looked up in ``./results/reference``, the
    repository's committed ``results/reference`` and the user's cache folder; a
    new entry is written to ``./results/reference`` for a built-in instance and
    to :func:`user_cache_dir` for any other (see the module docstring).

    ``problem`` may pass an already built float64 problem to save building it
    again. ``refresh`` recomputes even when a cache entry exists.
    """
    key = cache_key(instance)
    if problem is None or problem.dtype != np.float64:
        problem = instance.build()
    if not refresh:
        for folder in _lookup_dirs(cache_dir):
            path = cache_path(instance, folder)
            opt = _load(instance, problem, path, key) if path.exists() else None
            if opt is not None:
                return opt
    opt = _compute(instance, problem)
    _save(opt, instance, cache_path(instance, cache_dir), key)
    return opt


# -- the large-scale route ---------------------------------------------------------------
# Families with a Fenchel dual (``duality_gap``) and much data are certified without
# cvxpy: a primal route (L-BFGS-B, then Newton-CG with Hessian-vector products) and the
# duality gap at the point it reaches, an independent certificate of f(x) - f*.

#: stored data entries (non-zeros of a sparse design, entries of a dense one) from which
#: a family that gives a duality gap is certified by the large-scale route: from about
#: here on the cvxpy route (Clarabel, one cone per sample) needs minutes and gigabytes
LARGE_ROUTE_MIN_ENTRIES = 2_000_000
#: the dual value's accuracy class: a sum of n terms in float64 (pairwise summation),
#: round-off ~1e-15 relative; 1e-10 as for the scipy routes leaves five decades
EPS_F["dual"] = 1e-10
#: a computed gap below -NEGATIVE_GAP * S_f cannot be round-off: the dual does not match
#: the primal (a family bug), and the certificate is refused
NEGATIVE_GAP = 1e-12
#: L-BFGS memory: the scipy code keeps about (2 m + 5) vectors of length dim; m = 30
#: up to 1e6 unknowns, fewer above so that the route stays under ~1 GB of work space
LBFGS_WORK_BYTES = 1 << 30


def _data_entries(problem: Problem) -> int:
    """Stored entries of the problem's design matrix ``A`` (nnz when sparse); ``dim`` without one."""
    A = getattr(problem, "A64", None)
    if A is None:
        A = getattr(problem, "A", None)
    if A is None:
        return int(problem.dim)
    nnz = getattr(A, "nnz", None)
    return int(nnz) if nnz is not None else int(np.size(A))


def large_route_applies(problem: Problem) -> bool:
    """Whether ``problem`` is certified by the large-scale route.

    It is when the family is convex, gives a duality gap (``duality_gap(x)``,
    see :func:`_route_dual`) and stores at least :data:`LARGE_ROUTE_MIN_ENTRIES`
    data entries.
    """
    has_gap = callable(getattr(problem, "duality_gap", None))
    return bool(problem.convex and has_gap and _data_entries(problem) >= LARGE_ROUTE_MIN_ENTRIES)


def _hess_operator(problem: Problem, x: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    make = getattr(problem, "hessian_operator", None)
    if callable(make):
        return make(x)
    return lambda v: np.asarray(problem.hessp(x, v), dtype=np.float64)


def _newton_cg(problem: Problem, x: np.ndarray, max_steps: int = 50) -> tuple[np.ndarray, int, int]:
    """Inexact Newton steps ``H s = -g`` by CG, with a backtracking line search, to round-off.

    The CG tolerance follows the forcing sequence ``eta = min(0.5, sqrt(||g|| / ||g_0||))``
    (superlinear convergence; Eisenstat & Walker 1996 style, from memory), never
    below 1e-14. A step is kept when ``f`` falls by the Armijo rule or, at round-off
    level where ``f`` cannot resolve the decrease, when ``||g||`` falls without ``f``
    rising beyond ``1e-14 |f|``. Stops when a step no longer lowers ``||g||``
    (round-off). Returns ``x``, Newton steps, Hessian-vector products.
    """
    from scipy.sparse.linalg import LinearOperator, cg

    fun = _fun(problem)
    f, g = fun(x)
    gn = g_ref = _norm(g)
    steps = hvps = 0
    n = problem.dim
    for _ in range(max_steps):
        if gn == 0 or not math.isfinite(gn):
            break
        op = _hess_operator(problem, x)
        count = [0]

        def matvec(v: np.ndarray, op: Callable[[np.ndarray], np.ndarray] = op, count: list[int] = count) -> np.ndarray:
            count[0] += 1
            return np.asarray(op(np.ravel(v)), dtype=np.float64)

        H = LinearOperator((n, n), matvec=matvec, dtype=np.float64)
        eta = max(1e-14, min(0.5, math.sqrt(gn / g_ref)))
        s, _info = cg(H, -g, rtol=eta, atol=0.0, maxiter=min(10 * n, 2000))
        hvps += count[0]
        if not np.all(np.isfinite(s)):
            break
        slope = float(g @ s)
        step, accepted = 1.0, False
        for _ in range(40):
            fn, gnew = fun(x + step * s)
            gnn = _norm(gnew)
            if fn <= f + 1e-4 * step * slope or (gnn < gn and fn <= f + 1e-14 * max(1.0, abs(f))):
                accepted = True
                break
            step *= 0.5
        if not accepted or not gnn < gn:
            break
        x = x + step * s
        f, g, gn = fn, gnew, gnn
        steps += 1
    return x, steps, hvps


def _lbfgs_memory(dim: int) -> int:
    return int(max(5, min(30, LBFGS_WORK_BYTES // (8 * max(1, dim)) // 2 - 3)))


def _route_large_primal(problem: Problem, x0: np.ndarray) -> tuple[Route, np.ndarray | None]:
    """L-BFGS-B to a moderate gradient, then Newton-CG to round-off. Returns the route and its x."""
    from scipy.optimize import minimize

    label = "scipy L-BFGS-B + Newton-CG (Hessian-vector products)"
    t0 = time.perf_counter()
    m = _lbfgs_memory(problem.dim)
    try:
        g0 = max(1.0, float(np.max(np.abs(problem.grad(x0)))))
        # Newton-CG converges fast from a moderately accurate point: 1e-7 of the start's gradient
        res = minimize(_fun(problem), x0, jac=True, method="L-BFGS-B",
                       options={"ftol": 1e-15, "gtol": 1e-7 * g0, "maxiter": 50000, "maxcor": m})
        t1 = time.perf_counter()
        x, steps, hvps = _newton_cg(problem, np.asarray(res.x, dtype=np.float64))
        t2 = time.perf_counter()
    except Exception as exc:
        return _failed(label, "scipy", exc, time.perf_counter() - t0), None
    if not np.all(np.isfinite(x)):
        return Route(label, math.nan, (), "non-finite point", math.inf, t2 - t0, None, False, "scipy"), None
    f = float(problem.value(x))
    status = (f"L-BFGS-B (m = {m}): {res.message}, {res.nit} iterations, {t1 - t0:.1f} s; "
              f"Newton-CG: {steps} step(s), {hvps} Hessian-vector products, {t2 - t1:.1f} s")
    x.setflags(write=False)
    return Route(label, f, x, status, _grad_norm(problem, x), t2 - t0, None, math.isfinite(f), "scipy"), x


def _route_dual(problem: Problem, x: np.ndarray, s_f: float) -> Route | None:
    """The Fenchel dual at the dual point matched to ``x``: ``D(alpha) <= f* <= f(x)``.

    ``problem.duality_gap(x)`` returns ``(P(x), D(alpha(x)), w(alpha(x)))``
    (None when the family has no dual for these parameters). The route's ``f``
    is ``D``, a lower bound on ``f*`` by weak duality; its ``duality_gap`` is
    ``P(x) - D``, which bounds ``f(x) - f*`` whatever produced ``x``. The route
    carries ``x`` itself (the dual certifies that point; ``||x - w(alpha)||`` is
    in the status). A gap below ``-NEGATIVE_GAP * S_f`` is refused (not round-off).
    """
    label = "Fenchel dual at alpha(x*) (weak duality: D(alpha) <= f* <= f(x*))"
    t = time.perf_counter()
    try:
        out = problem.duality_gap(x)
    except Exception as exc:
        return _failed(label, "dual", exc, time.perf_counter() - t)
    if out is None:
        return None
    primal, dual, w = out
    seconds = time.perf_counter() - t
    gap = float(primal) - float(dual)
    ok = math.isfinite(gap) and gap >= -NEGATIVE_GAP * s_f
    status = (f"P(x*) - D(alpha) = {gap:.3e} (relative {gap / s_f:.1e}); ||x* - w(alpha)|| = "
              f"{_norm(np.asarray(w) - x):.3e}; P recomputed = {float(primal)!r}")
    if not ok:
        status = "negative duality gap beyond round-off (the dual does not match the primal): " + status
    return Route(label, float(dual), x, status, _grad_norm(problem, x), seconds, gap, ok, "dual")


def _compute_large(instance: Instance, problem: Problem) -> Optimum:
    """The large-scale certificate: a primal route and the duality gap at its point (module section)."""
    import scipy.linalg  # noqa: F401  load scipy's BLAS now: the limit below covers loaded libraries only
    import scipy.optimize  # noqa: F401
    import scipy.sparse.linalg  # noqa: F401
    from threadpoolctl import threadpool_limits

    # one BLAS thread: the routes' dense work is vector operations and small (m x m) products,
    # where threads only add overhead (100x on a loaded 2-core machine, measured)
    with threadpool_limits(limits=1):
        return _compute_large_pinned(instance, problem)


def _compute_large_pinned(instance: Instance, problem: Problem) -> Optimum:

    x0 = np.asarray(problem.initial_point(), dtype=np.float64)
    f0 = float(problem.value(x0))
    constants = problem.constants()
    kappa = _kappa(constants)
    routes: list[Route] = []
    cf = _route_closed_form(problem)
    if cf is not None:
        routes.append(cf)
    primal, x = _route_large_primal(problem, x0)
    routes.append(primal)
    gap, notes, dual = None, [], None
    if x is not None and primal.ok:
        s_f = max(abs(primal.f), f0 - primal.f, np.finfo(float).tiny)
        dual = _route_dual(problem, x, s_f)
        if dual is not None:
            routes.append(dual)
            gap = dual.duality_gap
            if not dual.ok:  # a certificate that fails is a finding, not replaced by another route
                notes.append(f"the duality-gap certificate failed: {dual.status}")
    if dual is None and len([r for r in routes if r.ok]) < 2:  # no dual for these parameters
        routes.append(_route_second_smooth(problem, x0))
    how = (f"convex: unique minimum; large-scale route ({_data_entries(problem)} stored entries >= "
           f"{LARGE_ROUTE_MIN_ENTRIES}: cvxpy not run)")
    if gap is not None:
        how += (f"; duality gap P(x*) - D(alpha) = {gap:.2e}, so f(x*) - f* <= {max(gap, 0.0):.2e} "
                "(up to the round-off of f itself)")
    opt = _certify(instance, problem, routes, x0, f0, constants, kappa, None, how, notes)
    seconds = {r.method: r.seconds for r in routes}
    finite_gap = gap if gap is not None and math.isfinite(gap) else None  # the JSON stays strict
    facts = {**opt.facts, "duality_gap": finite_gap, "route_seconds": seconds,
             "data_entries": _data_entries(problem)}
    return dataclasses.replace(opt, facts=facts)
