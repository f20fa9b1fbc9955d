"""Which targets a working precision can resolve: the float32 (or float64) floor of each measure.

A rule run in float32 stores its iterate and evaluates the oracle with unit
roundoff ``u = 2^-24 ~ 6.0e-8`` (float64: ``u = 2^-53 ~ 1.1e-16``). Below some
level no rule, however good, can push a relative measure further; a target
below that level is *unreachable for this dtype* and is reported as such,
not counted as a failure of the rule.

The rule (first-order error model; "~" means up to a modest constant):

1. **Gradient error.** The oracle's inner products ``a_i.x`` (or ``H x``) carry
   relative errors ``~u`` in their terms; passed through the Hessian, the
   computed gradient near ``x*`` differs from the true one by
   ``||e|| ~ u L ||x*||`` (the terms that cancel at the optimum have size
   ``L ||x*||``; for a quadratic ``g = H x - c`` with ``c = H x*``).
2. **Distance.** The best any method driven by that gradient can do is a point
   where the *computed* gradient vanishes, i.e. ``||grad f(x)|| <= ||e||``; strong
   convexity gives ``||x - x*|| <= ||e|| / mu ~ u kappa ||x*||``, so the relative
   distance floor is::

       dist_floor = u * kappa * ||x*|| / ||x0 - x*||

   (with ``x0 = 0``, as in most families, simply ``u * kappa``). It is never below
   ``u ||x*|| / ||x0 - x*||``, the rounding of ``x*`` itself (``kappa = 1``).
3. **Gradient norm.** The computed gradient cannot fall below ``||e||``::

       gradnorm_floor = u * L * ||x*|| / ||grad f(x0)||    (<= u * kappa * ||x*|| / ||x0 - x*||)

4. **Suboptimality.** Two limits. The iterate: ``f(x) - f* <= ||e||^2 / (2 mu)``
   with ``f(x0) - f* >= (mu/2) ||x0 - x*||^2`` or ``>= ||grad f(x0)||^2 / (2L)``
   gives ``min(dist_floor^2, kappa * gradnorm_floor^2)``. The value: the measure is
   computed from the value at hand, evaluated in the same precision; a sum of
   losses is resolved to ``~u |f*|``, but a least-squares value to about
   ``u sqrt(f* f0)`` (the residual ``A x - b`` cancels terms of size ``~sqrt(f0)``),
   so the value floor is taken as the larger, ``u sqrt(|f*| f0)`` (``f0 >= f*``)::

       subopt_floor = max(min(dist_floor^2, kappa * gradnorm_floor^2), u * sqrt(|f*| f0) / (f0 - f*))

   -- usually the value term: below it the measured suboptimality is round-off
   noise (it even turns negative), so a target there is *unresolvable*: a
   crossing means nothing, and neither does a miss.

A target ``t`` is unreachable when ``t < floor``. Where ``kappa`` (or ``L``) is
unknown, the floors use ``kappa = 1`` (only the rounding of ``x*`` and of ``f``),
which never marks a target the dtype could reach. The constants hidden in "~"
are of order one to ten (sums of k terms grow round-off like ``sqrt(k) u`` in
practice); :data:`SAFETY` is the factor by which a target must clear the floor to
be called reachable with confidence -- it is reported, not used to mark targets.
Checked against float32 gradient descent in tests/test_precision.py: on
quadratics with exact ``kappa`` the best distance GD reaches is 0.3-0.4 of the
distance floor and the best gradient norm 0.5-0.6 of its floor; the measured
suboptimality's noise reaches 0.3-0.5 of the value floor. With a loose bound on
``kappa`` (logistic, softmax) the distance floor is pessimistic by up to ~30.
So: a target below the floor is not judged for this dtype (the runner reports
it "unreachable for this dtype" whether or not the pass crossed it), and a
target between the floor and ``SAFETY`` times the floor is judged but may be
missed by a good rule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from benchsuite.catalogue import Instance

__all__ = ["SAFETY", "UNIT_ROUNDOFF", "Resolution", "resolution_floor", "unit_roundoff", "unreachable_targets"]

#: unit roundoff u = eps / 2 of each working precision
UNIT_ROUNDOFF: dict[str, float] = {"float64": 2.0**-53, "float32": 2.0**-24}
#: a target within this factor above the floor may still fail from the constants the
#: model leaves out (reported in ``how``; common practice, no source)
SAFETY = 10.0


def unit_roundoff(dtype: Any) -> float:
    """``u`` of float64 or float32 (ValueError otherwise)."""
    name = np.dtype(dtype).name
    if name not in UNIT_ROUNDOFF:
        raise ValueError(f"dtype must be float64 or float32, got {dtype!r}")
    return UNIT_ROUNDOFF[name]


@dataclass(frozen=True)
class Resolution:
    """The floor of one measure in one precision, and why."""

    measure: str
    dtype: str
    floor: float
    kappa: float | None
    how: str

    def unreachable(self, targets: tuple[float, ...] | list[float]) -> tuple[bool, ...]:
        """Per target: True when it lies below the floor (unreachable for this dtype)."""
        return tuple(float(t) < self.floor for t in targets)


def resolution_floor(
    measure: str, dtype: Any, *, kappa: float | None, L: float | None, f_star: float, f0: float,
    x_star: np.ndarray, x0: np.ndarray, g0_norm: float | None = None,
) -> Resolution:
    """The floor of ``measure`` ("subopt", "dist", "gradnorm") in ``dtype`` (module docstring).

    ``kappa`` and ``L`` as declared by the family (bounds are fine: a larger
    ``kappa`` only raises the floor); ``f_star``, ``x_star`` the certified
    optimum; ``f0 = f(x0)``; ``g0_norm = ||grad f(x0)||`` (only for "gradnorm").
    """
    u = unit_roundoff(dtype)
    name = np.dtype(dtype).name
    k = float(kappa) if kappa is not None and math.isfinite(kappa) and kappa >= 1 else 1.0
    xs = np.asarray(x_star, dtype=np.float64)
    norm_x = float(np.linalg.norm(xs))
    dist0 = float(np.linalg.norm(np.asarray(x0, dtype=np.float64) - xs))
    ratio = norm_x / dist0 if dist0 > 0 else math.inf
    known = "" if kappa is not None else " (kappa unknown: kappa = 1, the rounding of x* alone)"
    dist_floor = u * k * ratio
    if measure == "dist":
        return Resolution(measure, name, dist_floor, kappa,
                          f"u kappa ||x*||/||x0 - x*|| = {u:.2g} x {k:.3g} x {ratio:.3g}{known}")
    gn_floor = None
    if L is not None and g0_norm is not None and g0_norm > 0 and math.isfinite(L):
        gn_floor = u * float(L) * norm_x / float(g0_norm)
    if measure == "gradnorm":
        if gn_floor is not None:
            return Resolution(measure, name, gn_floor, kappa,
                              f"u L ||x*|| / ||grad f(x0)|| = {u:.2g} x {L:.3g} x {norm_x:.3g} / {g0_norm:.3g}")
        return Resolution(measure, name, u, kappa, "u (L or ||grad f(x0)|| unknown)")
    if measure == "subopt":
        gap0 = float(f0) - float(f_star)
        value_floor = u * math.sqrt(abs(float(f_star)) * abs(float(f0))) / gap0 if gap0 > 0 else math.inf
        iterate = dist_floor**2 if gn_floor is None else min(dist_floor**2, k * gn_floor**2)
        floor = max(iterate, value_floor)
        return Resolution(measure, name, floor, kappa,
                          f"max(iterate {iterate:.2g}, value u sqrt(|f*| f0)/(f0 - f*) = {value_floor:.2g}){known}")
    raise ValueError(f"unknown measure {measure!r}")


def unreachable_targets(instance: Instance, dtype: Any, *, cache_dir: Any = None) -> tuple[Resolution, tuple[bool, ...]]:
    """The floor of ``instance``'s measure in ``dtype`` and, per target, whether it is unreachable.

    Builds the float64 problem and reads (or computes) its certified optimum;
    the runner, which has both at hand, calls :func:`resolution_floor` directly.
    """
    from benchsuite.optimum import certified_optimum

    problem = instance.build()
    opt = certified_optimum(instance, cache_dir=cache_dir, problem=problem)
    c = problem.constants()
    x0 = np.asarray(problem.initial_point(), dtype=np.float64)
    g0 = float(np.linalg.norm(problem.grad(x0)))
    kappa = c.kappa if c.L_kind != "unknown" and c.mu_kind != "unknown" else None
    res = resolution_floor(instance.measure, dtype, kappa=kappa, L=c.L if c.L_kind != "unknown" else None,
                           f_star=opt.f_star, f0=opt.f0, x_star=opt.x_star, x0=x0, g0_norm=g0)
    return res, res.unreachable(instance.targets)
