"""Iteration bounds from published convergence rates, to set beside measurements.

For a problem with known smoothness ``L`` and strong convexity ``mu``
(``kappa = L / mu``) and a built-in rule run with its textbook parameters on
the full gradient, a published rate bounds the relative measure after ``k``
iterations by ``B(k)``. The iteration count the bound guarantees for a target
``t`` is the first ``k`` with ``B(k) <= t``; a measured first crossing above it
is a bug (in the rule, the problem's constants or the runner). Each bound
below is stated with its conditions; :func:`applicable_bound` returns one
only when all of them hold, else ``None``.

Notation: ``Delta_k = f(x_k) - f*``, ``e_k = x_k - x*``; the measures are those
of :mod:`benchsuite.measures` (relative to ``x_0``). ``L`` may be exact or a
certified *upper* bound and ``mu`` exact or a certified *lower* bound: a
function that is ``L``-smooth and ``mu``-strongly convex is also
``L'``-smooth and ``mu'``-strongly convex for ``L' >= L``, ``mu' <= mu``, so
every rate below holds with the constants the rule was actually tuned with.

1. **Gradient descent, step 1/L** (rule ``gd`` with ``lr = 1/L``), ``q = 1/kappa``:

   * ``Delta_k <= (1 - q)^k Delta_0`` -- from ``Delta_{k+1} <= Delta_k -
     ||g_k||^2 / (2L)`` and ``||g_k||^2 >= 2 mu Delta_k`` (Polyak 1963; e.g.
     Karimi, Nutini & Schmidt 2016, Thm 1; from memory);
   * ``||e_k||^2 <= (1 - 2 mu / (mu + L))^k ||e_0||^2`` (Nesterov 2004,
     Thm 2.1.15 with ``h = 1/L``; from memory), so relative distance
     ``<= ((kappa - 1)/(kappa + 1))^(k/2)``;
   * relative gradient norm ``<= kappa ((kappa - 1)/(kappa + 1))^(k/2)``, from
     the distance bound and ``mu ||e|| <= ||grad f|| <= L ||e||``.

2. **Nesterov's constant-momentum method** (rule ``nesterov_sc`` with
   ``lr = 1/L``, ``momentum = beta = (sqrt(kappa) - 1)/(sqrt(kappa) + 1)``),
   ``q = 1/sqrt(kappa)``. Nesterov (2004, scheme 2.2.19, Thm 2.2.3; from
   memory) bounds the gradient-step sequence ``x_k``:
   ``Delta(x_k) <= (1 - q)^k (Delta_0 + mu/2 ||e_0||^2) <= 2 (1 - q)^k Delta_0``
   (as ``mu/2 ||e_0||^2 <= Delta_0``). Under the runner's rule contract the
   gradient is taken at the point the rule returns, so the iterate the runner
   measures is the *extrapolated* point ``y_k = x_k + beta (x_k - x_{k-1})``
   (for ``k >= 1``; ``x_{-1} = x_0``). From ``||e(x_k)||^2 <= 2 Delta(x_k)/mu``:
   ``||e(y_k)|| <= (1 + beta) ||e(x_k)|| + beta ||e(x_{k-1})||
   <= sqrt(4 Delta_0 / mu) (1 + 2 beta) (1 - q)^((k-1)/2)``, hence (derived here)

   * relative suboptimality ``Delta(y_k)/Delta_0 <= L/2 ||e(y_k)||^2 / Delta_0
     <= 2 kappa (1 + 2 beta)^2 (1 - q)^(k-1)``;
   * relative distance ``<= sqrt(2 kappa) (1 + 2 beta) (1 - q)^((k-1)/2)``
     (using ``Delta_0 <= L/2 ||e_0||^2``);
   * relative gradient norm ``<= kappa`` times the distance bound.

   These are loose (factor ``kappa``) but valid; they catch a rule that is
   not accelerated at all.

3. **Heavy ball with Polyak's parameters on a strongly convex quadratic**
   (rule ``heavy_ball`` with ``lr = 4 / (sqrt(L) + sqrt(mu))^2``,
   ``momentum = beta = rho^2``, ``rho = (sqrt(kappa) - 1)/(sqrt(kappa) + 1)``;
   and no dampening; Polyak 1964). In the eigenbasis of the Hessian each mode with eigenvalue
   ``lam`` obeys ``e_{k+1} = (1 + beta - lr lam) e_k - beta e_{k-1}``. The roots
   ``r1, r2`` of ``r^2 - (1 + beta - lr lam) r + beta = 0`` have ``r1 r2 = beta``;
   with Polyak's parameters ``|1 + beta - lr lam| <= 2 sqrt(beta)`` for every
   ``lam`` in ``[mu, L]`` (equality at both ends), so the roots are complex
   conjugate or double and ``|r1| = |r2| = rho``. Let
   ``h_k = sum_{j=0}^{k} r1^j r2^(k-j)`` (``h_{-1} = 0``, ``h_0 = 1``); ``h``
   satisfies the same recurrence, and ``e_k = h_k e_0 - beta h_{k-1} e_{-1}``
   matches ``e_0`` and ``e_1 = (r1 + r2) e_0 - beta e_{-1}``. The rule starts
   with zero momentum (``x_{-1} = x_0``), so ``e_k = (h_k - beta h_{k-1}) e_0``
   and, as ``|h_k| <= (k + 1) rho^k``,
   ``|e_k| <= ((k + 1) rho^k + rho^2 k rho^(k-1)) |e_0| <= (2k + 1) rho^k |e_0|``
   per mode (derived here). Hence relative distance and relative gradient
   norm ``<= (2k + 1) rho^k`` and relative suboptimality ``<= (2k + 1)^2
   rho^(2k)``. Quadratic families only (the bound is false in general for
   strongly convex functions).

4. **Quadratic families, tighter rates** (``QUADRATIC_FAMILIES``: the Hessian
   ``H`` is constant with spectrum in ``[mu, L]``; the measures are ratios of
   weighted sums over eigen-modes, so a per-mode contraction bounds them).

   * **Gradient descent, step 1/L**: each eigen-component of ``e_k`` is
     multiplied by ``1 - lam/L`` per step and ``0 <= 1 - lam/L <= 1 - 1/kappa``,
     so ``Delta_k / Delta_0 <= (1 - 1/kappa)^(2k)`` and relative distance and
     gradient norm ``<= (1 - 1/kappa)^k`` (closed form; e.g. Polyak 1987,
     "Introduction to Optimization", section 3.1; Nesterov 2004, section
     1.2.3; from memory). This replaces 1. on quadratics: a GD that takes
     0.45/L while claiming 1/L needs about 2.2x the count and is flagged.
   * **Nesterov's constant-momentum method** (rule ``nesterov_sc`` as in 2.):
     per mode with ``h = lam/L`` in ``[1/kappa, 1]`` the measured point obeys
     ``y_{k+1} = (1 + beta)(1 - h) y_k - beta (1 - h) y_{k-1}`` with
     ``y_1 = ((1 + beta)(1 - h) - beta) y_0``. The characteristic roots have
     product ``beta (1 - h)`` and a discriminant ``<= 0`` exactly when
     ``1 - h <= 4 beta/(1 + beta)^2 = 1 - 1/kappa``, so for every mode they are
     complex conjugate or double with modulus ``sqrt(beta (1 - h)) <= rho =
     1 - 1/sqrt(kappa)`` (equality, a double root, at ``h = 1/kappa``). That
     ``1 - 1/sqrt(kappa)`` is the worst-case rate of these parameters on
     quadratics (Lessard, Recht & Packard 2016, SIAM J. Optim. 26(1),
     section 2.2, from memory; Nesterov 1983 / 2004 scheme 2.2.19 for the
     method). With ``h_k = sum_j r1^j r2^(k-j)`` as in 3.,
     ``y_k = (h_k - beta h_{k-1}) y_0`` and ``|h_k| <= (k + 1) rho^k``, so per
     mode ``|y_k| <= ((k + 1) + k beta/rho) rho^k |y_0| <= (2k + 1) rho^k |y_0|``
     (``beta/rho = sqrt(kappa)/(sqrt(kappa) + 1) < 1``; derived here). Hence
     relative distance and gradient norm ``<= (2k + 1)(1 - 1/sqrt(kappa))^k``
     and relative suboptimality ``<= (2k + 1)^2 (1 - 1/sqrt(kappa))^(2k)``.
     At kappa = 10 this allows 36 steps to 1e-8; plain GD needs 61 on
     quad-diag-kappa10-d10 (and up to 88 by its bound), so a Nesterov whose
     momentum is lost is flagged there (the general bound 2. allows 62).
   * Heavy ball: 3. is already the quadratic rate (Polyak 1964; Lessard,
     Recht & Packard 2016, section 2.2).

5. **Lower bound on quadratics** (:func:`lower_bound_iterations`). A method
   whose iterates stay in ``x_0 + span{g_0, ..., g_{k-1}}`` (rules ``gd``,
   ``heavy_ball``, ``nesterov``, ``nesterov_sc`` on the full gradient; not the
   diagonally scaled adaptive rules) has, on a quadratic, ``x_k`` in the
   Krylov space ``x_0 + K_k(H, g_0)``, i.e. ``e_k = p(H) e_0`` for a polynomial
   ``p`` of degree ``<= k`` with ``p(0) = 1``. Conjugate gradients minimise
   ``||e_k||_H`` (hence ``f - f*``) over that space at every ``k``
   (Hestenes & Stiefel 1952; Nesterov 2004, section 2.1.2, where the same
   argument gives the lower complexity bound; from memory); the same
   least-squares problem with weight ``1`` (distance) or ``H^2`` (gradient
   norm, MINRES's criterion) gives the best possible value of the other
   measures. :func:`krylov_optimal_measures` solves it exactly on the
   instance (Arnoldi with full reorthogonalisation in the Hessian's
   eigenbasis), so no rule of that class can meet a target in fewer
   iterations than the count returned: a measured count below it means the
   measurement or the oracle is wrong.

All bounds assume exact arithmetic; they are compared with measurements at
targets well above round-off.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = [
    "KRYLOV_RULES",
    "QUADRATIC_FAMILIES",
    "Bound",
    "applicable_bound",
    "iterations_for",
    "krylov_optimal_measures",
    "lower_bound_iterations",
    "theory_iterations",
]

#: families whose objective is a quadratic (the heavy-ball bound needs one)
QUADRATIC_FAMILIES = frozenset({"quadratic", "least_squares", "ridge", "longley"})

#: relative tolerance when matching a rule's hyperparameter to its textbook
#: value: the rule and this module evaluate the same formula in float64, in a
#: possibly different order (a few ulps apart)
_MATCH_RTOL = 1e-9


@dataclass(frozen=True)
class Bound:
    """A rate: the measure after ``k`` iterations is at most ``log_bound(k)`` (natural log)."""

    rule: str
    measure: str
    formula: str
    source: str
    log_bound: Callable[[int], float]

    def __call__(self, k: int) -> float:
        return math.exp(self.log_bound(k))


def _close(value: Any, expected: float) -> bool:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    return math.isclose(float(value), expected, rel_tol=_MATCH_RTOL, abs_tol=0.0)


def _get(hyper: Mapping[str, Any], *names: str) -> Any:
    for name in names:
        if name in hyper:
            return hyper[name]
    return None


def applicable_bound(
    rule: str,
    hyperparams: Mapping[str, Any],
    constants: Any,
    *,
    family: str,
    oracle: str,
    measure: str,
    dtype: Any = None,
) -> Bound | None:
    """The published bound for this setting, or ``None`` when a condition fails.

    ``rule`` is the built-in rule name (an import path never matches),
    ``constants`` a :class:`benchsuite.problem.Constants`, ``family`` the
    problem's short family name, ``oracle`` ``"full"`` or ``"minibatch"``,
    ``dtype`` the problem's working precision (``None``: float64). The rates
    hold in exact arithmetic; a float32 iterate carries ~6e-8 relative
    round-off per operation, the same order as the tight targets of a float32
    case (a relative distance of 1e-6 is ~20 ulps), so no bound is given there.
    """
    if oracle != "full" or constants is None:
        return None
    if dtype is not None:
        import numpy as np

        if np.dtype(dtype) != np.float64:
            return None
    L, mu = constants.L, constants.mu
    if L is None or mu is None or constants.L_kind not in ("exact", "bound") or constants.mu_kind not in ("exact", "bound"):
        return None
    if not (0 < mu <= L and math.isfinite(L)):
        return None
    kappa = L / mu
    lr = _get(hyperparams, "lr")
    if rule == "gd":
        if not _close(lr, 1.0 / L) or kappa == 1.0:
            return _gd_trivial(measure) if kappa == 1.0 and _close(lr, 1.0 / L) else None
        if family in QUADRATIC_FAMILIES:
            a = math.log1p(-1.0 / kappa)
            src = "per-mode contraction 1 - lam/L on a quadratic (closed form; Polyak 1987 s3.1)"
            if measure == "subopt":
                return Bound(rule, measure, "(1 - 1/kappa)^(2k)", src, lambda k: 2.0 * k * a)
            if measure in ("dist", "gradnorm"):
                return Bound(rule, measure, "(1 - 1/kappa)^k", src, lambda k: k * a)
            return None
        c = (kappa - 1.0) / (kappa + 1.0)
        if measure == "subopt":
            a = math.log1p(-1.0 / kappa)
            return Bound(rule, measure, "(1 - 1/kappa)^k", "Polyak 1963; Karimi et al. 2016 Thm 1", lambda k: k * a)
        if measure == "dist":
            return Bound(rule, measure, "((kappa-1)/(kappa+1))^(k/2)", "Nesterov 2004 Thm 2.1.15",
                         lambda k: 0.5 * k * math.log(c))
        if measure == "gradnorm":
            return Bound(rule, measure, "kappa ((kappa-1)/(kappa+1))^(k/2)", "Nesterov 2004 Thm 2.1.15",
                         lambda k: math.log(kappa) + 0.5 * k * math.log(c))
        return None
    if rule == "nesterov_sc":
        s = math.sqrt(kappa)
        beta = (s - 1.0) / (s + 1.0)
        if not (_close(lr, 1.0 / L) and _close(_get(hyperparams, "momentum", "beta"), beta)) or kappa == 1.0:
            return None
        a = math.log1p(-1.0 / s)
        if family in QUADRATIC_FAMILIES:
            src = ("rate 1 - 1/sqrt(kappa) on quadratics (Lessard, Recht & Packard 2016 s2.2); "
                   "per-mode envelope derived in benchsuite.theory")
            if measure == "subopt":
                return Bound(rule, measure, "(2k+1)^2 (1 - 1/sqrt(kappa))^(2k)", src,
                             lambda k: 2.0 * (math.log(2 * k + 1) + k * a))
            if measure in ("dist", "gradnorm"):
                return Bound(rule, measure, "(2k+1) (1 - 1/sqrt(kappa))^k", src,
                             lambda k: math.log(2 * k + 1) + k * a)
            return None
        src = "Nesterov 2004 Thm 2.2.3, at the extrapolated point"
        if measure == "subopt":
            c0 = math.log(2.0 * kappa) + 2.0 * math.log1p(2.0 * beta)
            return Bound(rule, measure, "2 kappa (1+2 beta)^2 (1 - 1/sqrt(kappa))^(k-1)", src,
                         lambda k: 0.0 if k == 0 else c0 + (k - 1) * a)
        c1 = 0.5 * math.log(2.0 * kappa) + math.log1p(2.0 * beta)
        if measure == "dist":
            return Bound(rule, measure, "sqrt(2 kappa) (1+2 beta) (1 - 1/sqrt(kappa))^((k-1)/2)", src,
                         lambda k: 0.0 if k == 0 else c1 + 0.5 * (k - 1) * a)
        if measure == "gradnorm":
            return Bound(rule, measure, "kappa sqrt(2 kappa) (1+2 beta) (1 - 1/sqrt(kappa))^((k-1)/2)", src,
                         lambda k: 0.0 if k == 0 else math.log(kappa) + c1 + 0.5 * (k - 1) * a)
        return None
    if rule == "heavy_ball":
        if family not in QUADRATIC_FAMILIES or kappa == 1.0:
            return None
        s = math.sqrt(kappa)
        rho = (s - 1.0) / (s + 1.0)
        want_lr = 4.0 / (math.sqrt(L) + math.sqrt(mu)) ** 2
        if not (_close(lr, want_lr) and _close(_get(hyperparams, "momentum", "beta"), rho * rho)):
            return None
        if _get(hyperparams, "dampening") not in (None, 0, 0.0):
            return None
        lr_ = math.log(rho)
        src = "Polyak 1964 parameters; per-mode recurrence bound derived in benchsuite.theory"
        if measure == "subopt":
            return Bound(rule, measure, "(2k+1)^2 rho^(2k)", src, lambda k: 2.0 * (math.log(2 * k + 1) + k * lr_))
        if measure in ("dist", "gradnorm"):
            return Bound(rule, measure, "(2k+1) rho^k", src, lambda k: math.log(2 * k + 1) + k * lr_)
        return None
    return None


def _gd_trivial(measure: str) -> Bound | None:
    """kappa = 1: one step of length 1/L lands on x* (all measures 0 after k >= 1)."""
    if measure not in ("subopt", "dist", "gradnorm"):
        return None
    return Bound("gd", measure, "0 for k >= 1 (kappa = 1)", "exact for kappa = 1",
                 lambda k: 0.0 if k == 0 else -math.inf)


def iterations_for(bound: Bound, target: float, limit: int = 10**8) -> int | None:
    """The first ``k >= 0`` with ``bound(k) <= target``, or ``None`` if above ``limit``.

    Every log-bound here is concave in ``k`` (linear, or linear plus
    ``log(2k + 1)``; the Nesterov one is ``0`` at ``k = 0`` then linear), so the
    set of ``k`` where it exceeds the target is an interval starting at 0 when
    ``target < 1``: doubling brackets the first ``k`` below the target and a
    bisection finds it.
    """
    if not 0 < target < 1:
        # every measure is 1 at x_0: a target >= 1 is met before any step, and a
        # bound saying "0 iterations" would call every first crossing a violation
        return None
    lt = math.log(target)
    if bound.log_bound(0) <= lt:
        return 0
    lo, hi = 0, 1
    while bound.log_bound(hi) > lt:
        lo, hi = hi, hi * 2
        if hi > limit:
            return None
    while hi - lo > 1:  # invariant: bound(lo) > target >= bound(hi)
        mid = (lo + hi) // 2
        if bound.log_bound(mid) > lt:
            lo = mid
        else:
            hi = mid
    return hi


def theory_iterations(bound: Bound | None, targets: Sequence[float]) -> tuple[int | None, ...]:
    """Per target, the iteration count the bound guarantees (``None`` without a bound)."""
    if bound is None:
        return tuple(None for _ in targets)
    return tuple(iterations_for(bound, t) for t in targets)


# -- lower bound on quadratics: the Krylov optimum -------------------------------------
#: rules whose iterates stay in x_0 + span of the gradients seen so far (full gradient)
KRYLOV_RULES = frozenset({"gd", "heavy_ball", "nesterov", "nesterov_sc"})

#: the weight exponent a of ||H^(a/2) e||: the measure each Krylov optimum minimises
_WEIGHT = {"subopt": 1, "dist": 0, "gradnorm": 2}

#: relative slack on the target when reading the lower-bound count off the exact
#: Krylov optimum: the optimum is computed in float64 (orthonormal basis to ~1e-15),
#: so a value within 1e-6 relative of the target counts as meeting it -- the count
#: can only come out lower (a safe lower bound), never higher
_LOWER_SLACK = 1e-6

#: a new Krylov direction whose norm after orthogonalisation falls below this
#: fraction of its norm before means the space is exhausted (invariant subspace:
#: the optimum is exact from then on)
_BREAKDOWN = 1e-13

#: smallest eigenvalue, relative to the largest, that a dense eigh resolves to ~1e-6
_EIGH_RELIABLE = 1e-10

_SPECTRA: Any = None  # WeakKeyDictionary problem -> (eigenvalues, e0 in the eigenbasis), made lazily


def _spectrum_of(problem: Any) -> tuple[Any, Any] | None:
    """``(lam, w)``: Hessian eigenvalues and ``x_0 - x*`` in the eigenbasis, or ``None``.

    Only for a float64 problem of a quadratic family with a Hessian: the
    ``quadratic`` family's own spectrum (``eigenvalues``, ``Q``), else a dense
    Hessian assembled from ``hessp`` and ``numpy.linalg.eigh``. ``x_0 - x*``
    comes from the gradient at ``x_0`` (``g_0 = H (x_0 - x*)``), no optimiser.
    """
    import weakref

    import numpy as np

    global _SPECTRA
    if _SPECTRA is None:
        _SPECTRA = weakref.WeakKeyDictionary()
    try:
        hit = _SPECTRA.get(problem)
    except TypeError:  # not weak-referenceable: compute each time
        hit = None
    if hit is not None:
        return hit
    if getattr(problem, "family", None) not in QUADRATIC_FAMILIES or np.dtype(problem.dtype) != np.float64:
        return None
    x0 = np.asarray(problem.initial_point(), dtype=np.float64)
    g0 = np.asarray(problem.grad(x0.copy()), dtype=np.float64)
    lam_attr = getattr(problem, "eigenvalues", None)
    if lam_attr is not None:
        lam = np.asarray(lam_attr, dtype=np.float64)
        lam_attr = lam
        Q = getattr(problem, "Q", None)
        gq = g0 if Q is None else Q.T @ g0
    else:
        d = x0.size
        cols = [problem.hessp(x0, v) for v in np.eye(d)]
        if any(c is None for c in cols):
            return None
        H = np.array(cols, dtype=np.float64).T
        lam, V = np.linalg.eigh(0.5 * (H + H.T))
        gq = V.T @ g0
    if not (lam.size and np.all(np.isfinite(lam)) and lam[0] > 0):
        return None
    if lam_attr is None and lam.min() < _EIGH_RELIABLE * lam.max():
        # eigh's eigenvalues carry an absolute error ~ 1e-16 lam_max: below 1e-10 lam_max
        # they are off by more than 1e-6 relative (e.g. Longley, kappa ~ 2e19): no bound
        return None
    out = (lam, gq / lam)
    try:
        _SPECTRA[problem] = out
    except TypeError:
        pass
    return out


def krylov_optimal_measures(lam: Any, w: Any, measure: str, kmax: int) -> Any:
    """The best relative measure over ``x_0 + K_k(H, g_0)`` for ``k = 0 .. kmax``.

    ``lam``: the Hessian's eigenvalues, ``w``: ``x_0 - x*`` in its eigenbasis.
    ``e_k = p(H) e_0`` with ``p(0) = 1``, ``deg p <= k``: minimise
    ``||D (w + lam q(lam) w)||`` over polynomials ``q`` of degree ``< k`` with
    ``D = diag(lam^(a/2))`` (``a`` = 1 subopt: conjugate gradients; 0 dist;
    2 gradnorm: MINRES). An orthonormal basis of ``D lam K`` is grown by
    Arnoldi (multiply by ``lam``) with two passes of Gram-Schmidt, and the
    residual of ``D w`` is projected off it one direction at a time. Returns a
    float64 array of length ``kmax + 1`` (entry 0 is 1): relative
    suboptimality ``||r_k||^2 / ||D w||^2`` for ``subopt``, the ratio of norms
    for ``dist`` and ``gradnorm`` (as :mod:`benchsuite.measures` defines them).
    """
    import numpy as np

    if measure not in _WEIGHT:
        raise ValueError(f"no Krylov optimum for measure {measure!r}")
    lam = np.asarray(lam, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    dw = lam ** (0.5 * _WEIGHT[measure]) * w
    n0 = float(np.linalg.norm(dw))
    out = np.zeros(kmax + 1)
    out[0] = 1.0
    if n0 == 0.0:
        return out
    r = dw / n0  # residual, scaled: ||r_0|| = 1
    basis = np.empty((min(kmax, lam.size), lam.size))
    v = lam * r  # the direction of q = const: D lam w (scaled)
    m = 0
    for k in range(1, kmax + 1):
        if m < basis.shape[0] and v is not None:
            nv = float(np.linalg.norm(v))
            if m:
                for _ in range(2):  # classical Gram-Schmidt, twice: orthogonal to ~1e-15
                    v = v - basis[:m].T @ (basis[:m] @ v)
            nn = float(np.linalg.norm(v))
            if nv > 0 and nn > _BREAKDOWN * nv:
                u = v / nn
                basis[m] = u
                m += 1
                r = r - u * float(u @ r)
                v = lam * u
            else:
                v = None  # invariant subspace: the optimum is attained, it stays
        val = float(np.linalg.norm(r))
        out[k] = val * val if measure == "subopt" else val
    return out


def lower_bound_iterations(
    rule: str,
    problem: Any,
    targets: Sequence[float],
    *,
    measure: str = "subopt",
    oracle: str = "full",
    limit: int | None = None,
) -> tuple[int | None, ...]:
    """Per target, the fewest iterations any Krylov-subspace method needs on this instance.

    ``rule`` is the built-in rule name (only ``KRYLOV_RULES`` get a bound),
    ``problem`` the built :class:`~benchsuite.problem.Problem` (a float64
    instance of a family in ``QUADRATIC_FAMILIES`` with a Hessian), ``targets``
    the run's targets on ``measure``, ``oracle`` ``"full"`` or
    ``"minibatch"``. Returns ``None`` per target when no bound applies (other
    rules or families, minibatch gradients, float32, a target not met by the
    Krylov optimum within ``limit`` iterations; ``limit`` defaults to the
    dimension, where the optimum is exact). A measured first crossing
    *below* the returned count means the measurement or the oracle is wrong
    (see 5. in the module docstring: Hestenes & Stiefel 1952; Nesterov 2004,
    section 2.1.2).
    """
    none = tuple(None for _ in targets)
    if rule not in KRYLOV_RULES or oracle != "full" or measure not in _WEIGHT:
        return none
    spec = _spectrum_of(problem)
    if spec is None:
        return none
    lam, w = spec
    kmax = int(lam.size if limit is None else min(limit, lam.size))
    curve = krylov_optimal_measures(lam, w, measure, kmax)
    out: list[int | None] = []
    for t in targets:
        hit = [k for k in range(curve.size) if 0 < t < 1 and curve[k] <= t * (1.0 + _LOWER_SLACK)]
        out.append(hit[0] if hit else None)
    return tuple(out)
