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

All bounds assume exact arithmetic; they are compared with measurements at
targets well above round-off.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["QUADRATIC_FAMILIES", "Bound", "applicable_bound", "iterations_for", "theory_iterations"]

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
) -> Bound | None:
    """The published bound for this setting, or ``None`` when a condition fails.

    ``rule`` is the built-in rule name (an import path never matches),
    ``constants`` a :class:`benchsuite.problem.Constants`, ``family`` the
    problem's short family name, ``oracle`` ``"full"`` or ``"minibatch"``.
    """
    if oracle != "full" or constants is None:
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
    if not target > 0:
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
