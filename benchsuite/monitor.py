"""The monitored pass: first crossings, held crossings, the stay-converged horizon, traces.

One seed of a case (:func:`run_pass`) builds the problem, its certified
optimum and the rule from the picklable :class:`~benchsuite.cases.Case`, then
runs :func:`monitored_pass`: from ``x_0 = problem.initial_point()``, per
iteration ``k = 1, 2, ...`` the rule's step with the gradient at ``x_{k-1}``,
then the convergence measure (:mod:`benchsuite.measures`) at ``x_k`` against
the certified optimum. With the full oracle that is one ``value_and_grad`` per
iteration (the value at ``x_k`` comes with the gradient the next step needs);
with a minibatch oracle the exact measure costs a full evaluation per
iteration on top of the minibatch gradient -- the price of exact counts, and
why wall time comes from the uninstrumented replay (:mod:`benchsuite.timing`).

What a pass records:

* each target's **first crossing** (iteration, gradient calls, epochs) and
  its **held crossing**: the iteration from which the measure stayed at or
  below the target to the end of the pass (a target met only in a dip of a
  noisy plateau is *transient*: met, not held);
* the **stay-converged horizon**: once the tightest target is met at ``k*``
  the pass runs on for ``max(100, ceil(0.5 k*))`` more steps (the case's
  ``horizon``; it may run past the budget, which bounds the search for the
  targets only). The first iteration the measure rises above the tightest
  target again (``left_at``) and the worst measure over the horizon are
  kept; a pass that ends the horizon above the tightest target is
  ``unstable``, one that diverges there ``diverged``;
* the **fingerprint**: the measure at every iteration 1..16, then on a
  geometric grid of ratio 1.25, and at the final iterate (what ``--exact``
  compares);
* the **trace**: the measure and the relative distance to x* at every
  iteration up to 200, then on a geometric grid of ratio 1.02 (above 1e4
  unknowns, where each point's distance costs a pass over x: to 16, then
  ratio 1.1), plus every first crossing and the final iterate (what the
  report draws).

**Round-off envelope** (``envelope=True``, recorded with baselines): two
shadow passes run the same number of steps, each evaluating the gradient at
``x_k`` perturbed by one unit in the last place per coordinate per step (a
random sign pattern, fixed per shadow), which is the size of perturbation that
another BLAS, another CPU or another order of the same operations makes. Per
checkpoint the envelope is the largest relative difference of a shadow's
measure from the pass's. On a contracting iteration it stays near 1e-15; where
a rule amplifies round-off (adaptive rules at a fixed step near the optimum)
it grows, and shows from which iteration the trajectory is round-off
dominated. Cost: two more passes per seed.

Status of a pass: see :mod:`benchsuite.cases`. A pass past its ``deadline``
stops at the next check (every 16 iterations) with status ``timeout``; the
number of iterations done is written to ``progress.value`` (when given) each
iteration, so a caller that has to kill a hung step still knows how far it got.
"""

from __future__ import annotations

import math
import time
import traceback
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchsuite.cases import DIVERGED_ABOVE, Case, SeedOutcome, Trace, horizon_steps
from benchsuite.errors import UserError
from benchsuite.measures import make_measure
from benchsuite.oracle import OracleSpec, gradient_function

__all__ = [
    "FP_DENSE",
    "FP_RATIO",
    "SHADOWS",
    "TRACE_DENSE",
    "TRACE_RATIO",
    "PassReport",
    "PassTask",
    "build_rule_for",
    "built",
    "checkpoint_grid",
    "failed_outcome",
    "monitored_pass",
    "run_pass",
]

#: fingerprint: every iteration up to this, then a geometric grid of this ratio
FP_DENSE, FP_RATIO = 16, 1.25
#: trace: every iteration up to this, then a geometric grid of this ratio; above TRACE_DENSE_DIM
#: unknowns (a trace point costs one distance, O(d)) every iteration to 16, then a ratio of 1.1
TRACE_DENSE, TRACE_RATIO, TRACE_DENSE_DIM = 200, 1.02, 10_000
TRACE_LARGE = (16, 1.1)
#: shadow passes behind the round-off envelope
SHADOWS = 2
#: distinct sign patterns a shadow cycles through (drawn once per shadow)
_PATTERNS = 8


def _next_point(k: int, dense: int, ratio: float) -> int:
    return k + 1 if k < dense else max(k + 1, int(k * ratio))


def checkpoint_grid(last: int, dense: int = FP_DENSE, ratio: float = FP_RATIO) -> list[int]:
    """The grid ``1..dense``, then ``k -> max(k + 1, floor(ratio k))``, up to ``last``, and ``last``."""
    out: list[int] = []
    k = 1
    while k < last:
        out.append(k)
        k = _next_point(k, dense, ratio)
    if last >= 1:
        out.append(last)
    return out


def _perturber(x: np.ndarray, shadow: int) -> Callable[[np.ndarray, int], np.ndarray]:
    """``x -> x * (1 +- eps)`` per coordinate (a fixed random sign pattern per step mod 8)."""
    eps = np.finfo(x.dtype).eps if np.issubdtype(x.dtype, np.floating) else np.finfo(np.float64).eps
    rng = np.random.default_rng([int(shadow), 0x5EED])
    factors = [(1 + eps * rng.choice(np.array([-1.0, 1.0]), size=x.shape)).astype(x.dtype) for _ in range(_PATTERNS)]
    buf = np.empty_like(x)

    def perturb(xk: np.ndarray, k: int) -> np.ndarray:
        return np.multiply(xk, factors[k % _PATTERNS], out=buf)

    return perturb


def monitored_pass(
    problem: Any,
    rule: Any,
    *,
    x_star: np.ndarray,
    f_star: float,
    targets: Sequence[float],
    budget: int,
    measure: str = "subopt",
    oracle: OracleSpec = OracleSpec(),
    problem_key: str = "",
    seed: int = 0,
    deadline: float | None = None,
    check_step: Callable[[Any, tuple[int, ...]], tuple[np.ndarray, Any]] | None = None,
    horizon: tuple[int, float] = (100, 0.5),
    progress: Any = None,
    shadow: int | None = None,
    steps: int | None = None,
) -> SeedOutcome:
    """Run ``rule`` (an object with ``init``/``step``) on ``problem``; see the module docstring.

    ``deadline`` is a ``time.perf_counter()`` value; ``check_step`` validates
    the first step's return value (raising stops the pass with status
    ``error``); ``progress`` is an object whose ``value`` is set to the
    iterations done; ``shadow`` (a pattern seed) perturbs the point at which
    gradients are evaluated by one ulp, and ``steps`` runs exactly that many
    steps (no early stop, no horizon; used for the shadow passes).
    """
    targets = tuple(float(t) for t in targets)
    nt = len(targets)
    iters: list[int | None] = [None] * nt
    calls: list[int | None] = [None] * nt
    epochs: list[float | None] = [None] * nt
    n = problem.n_samples
    full = oracle.kind == "full"
    x = problem.initial_point()
    shape = x.shape
    f, g = problem.value_and_grad(x)
    meas = make_measure(measure, f_star=f_star, x_star=x_star, x0=x, f0=f, g0=g)
    have_opt = x_star.size == x.size
    dist0 = meas.distance(x) if have_opt else math.nan
    need = meas.needs
    grad_fn, sampler = gradient_function(problem, oracle, problem_key, seed)
    perturb = _perturber(x, shadow) if shadow is not None else None
    if perturb is not None and full:
        f, g = problem.value_and_grad(perturb(x, 0))
    stop_at = int(steps) if steps is not None else int(budget)
    cap = stop_at if steps is not None else int(budget) + horizon_steps(horizon, budget)
    ms = np.empty(cap + 1)
    ms[0] = m = meas(f, x, g) if need != "x" or have_opt else 1.0
    tk: list[int] = [0]
    tm: list[float] = [float(m)]
    td: list[float] = [1.0 if dist0 > 0 else math.nan]
    status, error, k, kr = "budget", None, 0, 0
    unmet = nt if steps is None else -1
    loosest = max(targets, default=-math.inf) if steps is None else -math.inf
    reached_at: int | None = None
    next_tp = 1
    dense, ratio = (TRACE_DENSE, TRACE_RATIO) if x.size <= TRACE_DENSE_DIM else TRACE_LARGE
    value = problem.value
    value_and_grad = problem.value_and_grad
    xg = x
    with np.errstate(all="ignore"):
        try:
            state = rule.init(x)
            while k < stop_at:
                if not full:
                    g = grad_fn(xg)
                result = rule.step(x, g, state)
                k += 1
                if k == 1 and check_step is not None:
                    result = check_step(result, shape)
                x, state = result
                if perturb is not None:
                    xg = perturb(x, k)
                else:
                    xg = x
                if full:
                    f, g = value_and_grad(xg)
                    m = meas(f, x, g)
                elif need == "value":
                    m = meas(value(x), x, None)
                elif need == "grad":
                    f, gm = value_and_grad(x)
                    m = meas(f, x, gm)
                else:
                    m = meas(math.nan, x, None)
                ms[k] = m
                kr = k
                if progress is not None:
                    progress.value = k
                if not (m <= DIVERGED_ABOVE) or (full and not math.isfinite(f)):
                    status = "diverged"
                    break
                crossed = m <= loosest
                if k == next_tp or crossed:
                    tk.append(k)
                    tm.append(float(m))
                    td.append(meas.distance(x) / dist0 if dist0 > 0 else math.nan)
                    if k == next_tp:
                        next_tp = _next_point(k, dense, ratio)
                if crossed:  # some unmet target is met now (one comparison otherwise)
                    for j in range(nt):
                        if iters[j] is None and m <= targets[j]:
                            iters[j] = k
                            calls[j] = k
                            if n:
                                epochs[j] = (sampler.samples if sampler is not None else k * n) / n
                            unmet -= 1
                    if not unmet:
                        reached_at = k
                        stop_at = k + horizon_steps(horizon, k)
                        loosest = -math.inf
                    else:
                        loosest = max(t for j, t in enumerate(targets) if iters[j] is None)
                if deadline is not None and not (k & 15) and time.perf_counter() > deadline:
                    status = "timeout"
                    break
        except Exception as exc:  # the rule (or the problem at the rule's iterate) raised
            status = "error"
            error = f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"
            if isinstance(exc, UserError):  # a contract violation: keep the one line
                error = str(exc)
    seen = ms[: kr + 1]  # the measure at every iteration that produced one
    if tk[-1] != kr:
        tk.append(kr)
        tm.append(float(seen[-1]))
        try:
            td.append(meas.distance(x) / dist0 if dist0 > 0 else math.nan)
        except Exception:  # x is not an array after a broken step
            td.append(math.nan)
    tight = targets.index(min(targets)) if nt else -1
    held: list[int | None] = []
    margins: list[float | None] = []
    for t in targets:
        if status in ("error", "diverged") or not seen[-1] <= t:
            held.append(None)
            margins.append(None)
        else:
            above = np.flatnonzero(~(seen <= t))
            h = int(above[-1]) + 1 if above.size else 0
            held.append(h)
            # how far the measure is from the target on either side of the held crossing, relative
            # to the target: a perturbation smaller than this cannot move the crossing
            margins.append(float(min(seen[h - 1] - t, t - seen[h]) / t) if h >= 1 and t > 0 else None)
    left_at: int | None = None
    worst: float | None = None
    span = 0
    if reached_at is not None:
        tail = seen[reached_at + 1 :]
        span = int(tail.size)
        if span:
            worst = float(np.max(tail))
            out = np.flatnonzero(~(tail <= targets[tight]))
            left_at = reached_at + 1 + int(out[0]) if out.size else None
        if status == "budget":
            status = "reached" if held[tight] is not None else "unstable"
    elif status == "budget" and steps is None and unmet < nt:
        status = "partial"
    cps = checkpoint_grid(kr)
    final_dist = td[-1]
    trace = Trace(
        iteration=np.asarray(tk, dtype=np.int64),
        measure=np.asarray(tm, dtype=np.float64),
        dist=np.asarray(td, dtype=np.float64),
        grad_calls=np.asarray(tk, dtype=np.int64),
        seconds=np.full(len(tk), math.nan),
    )
    return SeedOutcome(
        seed=seed,
        status=status,
        iters=tuple(iters),
        grad_calls=tuple(calls),
        epochs=tuple(epochs),
        final_measure=float(seen[-1]),
        final_dist=float(final_dist),
        fingerprint=tuple(float(ms[c]) for c in cps),
        iterations_run=k,
        error=error,
        checkpoints=tuple(cps),
        held=tuple(held),
        margins=tuple(margins),
        horizon=span,
        left_at=left_at,
        horizon_worst=worst,
        trace=trace,
    )


def envelope_of(main: SeedOutcome, shadows: Sequence[SeedOutcome]) -> tuple[float, ...]:
    """Per checkpoint of ``main``: the largest relative difference of a shadow's measure.

    A checkpoint a shadow did not reach (it stopped early) counts as infinitely
    sensitive. Relative to ``max(|m|, 1e-300)``.
    """
    env = []
    for i, (k, m) in enumerate(zip(main.checkpoints, main.fingerprint)):
        worst = 0.0
        for s in shadows:
            if i < len(s.checkpoints) and s.checkpoints[i] == k:
                v = s.fingerprint[i]
                d = abs(v - m) / max(abs(m), 1e-300) if math.isfinite(v) and math.isfinite(m) else math.inf
            else:
                d = math.inf
            worst = max(worst, d)
        env.append(worst)
    return tuple(env)


# -- building a case's pieces (in a worker or for a replay) -------------------------
class Built:
    """A case's problem, certified optimum and constants, built from its Instance."""

    __slots__ = ("problem", "f_star", "x_star", "constants", "key")

    def __init__(self, instance: Any, with_optimum: bool = True, dtype: str | None = None) -> None:
        self.problem = instance.build_for_run(dtype)
        self.constants = self.problem.constants()
        self.key = instance.problem_hash()
        self.f_star = math.nan
        self.x_star = np.empty(0)
        if with_optimum:
            from benchsuite.optimum import certified_optimum

            f64 = self.problem.dtype == np.float64  # the optimum is certified in float64
            opt = certified_optimum(instance, problem=self.problem if f64 else None)
            self.f_star = float(opt.f_star)
            self.x_star = np.asarray(opt.x_star, dtype=np.float64)


_BUILT_CACHE: dict[tuple[str, bool, str | None], Built] = {}


def built(instance: Any, with_optimum: bool = True, dtype: str | None = None) -> Built:
    """Cached per process (the last few instances): building a big problem twice is waste."""
    key = (instance.definition_hash() + instance.name, with_optimum, dtype)
    hit = _BUILT_CACHE.get(key)
    if hit is None:
        if len(_BUILT_CACHE) >= 4:
            _BUILT_CACHE.pop(next(iter(_BUILT_CACHE)))
        hit = _BUILT_CACHE[key] = Built(instance, with_optimum, dtype)
    return hit


def build_rule_for(case: Case, b: Built, params: Mapping[str, Any] | None = None) -> Any:
    """The case's rule (or the rule with ``params`` instead of the case's) for the built problem."""
    from benchsuite.rulespec import build_rule, parse_rule

    spec = case.rule if params is None else parse_rule(case.rule.name, dict(params))
    return build_rule(spec, b.constants, dtype=b.problem.dtype)


def _theory(case: Case, b: Built, hyperparams: Mapping[str, Any]) -> tuple[tuple[int | None, ...], str,
                                                                          tuple[int | None, ...]]:
    """The published upper bound per target (and its source), and the Krylov lower bound per target."""
    from benchsuite.theory import applicable_bound, lower_bound_iterations, theory_iterations

    bound = applicable_bound(
        case.rule.name,
        hyperparams,
        b.constants,
        family=b.problem.family,
        oracle=case.oracle,
        measure=case.run_measure,
        dtype=b.problem.dtype,
    )
    its = theory_iterations(bound, case.run_targets)
    lower = lower_bound_iterations(case.rule.name, b.problem, case.run_targets, measure=case.run_measure,
                                   oracle=case.oracle)
    return its, (f"{bound.formula} ({bound.source})" if bound else ""), tuple(lower)


@dataclass(frozen=True)
class PassTask:
    """One seed of one case: what an executor ships to where the pass runs."""

    case: Case
    seed: int
    timeout: float | None = None
    envelope: bool = False


@dataclass(frozen=True)
class PassReport:
    """What a pass sends back for one (case, seed)."""

    outcome: SeedOutcome
    hyperparams: dict[str, Any]
    theory_bound: tuple[int | None, ...]
    bound_source: str
    theory_lower: tuple[int | None, ...] = ()
    #: per target: below what the problem's precision can resolve (float32 only)
    unreachable: tuple[bool, ...] = ()


def unreachable_in(case: Case, b: Built) -> tuple[bool, ...]:
    """Per target of ``case``: below the resolution floor of a float32 problem (:mod:`benchsuite.precision`).

    float64 problems get no such marks: the floor rule is meant for the
    precision a rule runs in, and in float64 the catalogue's targets are chosen
    above it (Longley's kappa ~ 2e19 would otherwise mark them all).
    """
    if b.problem.dtype == np.float64 or b.x_star.size == 0:
        return tuple(False for _ in case.run_targets)
    from benchsuite.precision import resolution_floor

    c = b.constants
    x0 = np.asarray(b.problem.initial_point(), dtype=np.float64)
    f0, g0 = b.problem.value_and_grad(b.problem.initial_point())
    known = c.L_kind != "unknown" and c.mu_kind != "unknown"
    res = resolution_floor(case.run_measure, b.problem.dtype, kappa=c.kappa if known else None,
                           L=c.L if c.L_kind != "unknown" else None, f_star=b.f_star, f0=float(f0),
                           x_star=b.x_star, x0=x0, g0_norm=float(np.linalg.norm(np.asarray(g0, dtype=np.float64))))
    return tuple(res.unreachable(case.run_targets))


def _expand(outcome: SeedOutcome, keep: Sequence[bool]) -> SeedOutcome:
    """A pass over the reachable targets only, with None at the unreachable ones."""
    from dataclasses import replace

    def spread(values: Sequence[Any]) -> tuple[Any, ...]:
        it = iter(values)
        return tuple(next(it) if k else None for k in keep)

    return replace(outcome, iters=spread(outcome.iters), grad_calls=spread(outcome.grad_calls),
                   epochs=spread(outcome.epochs), held=spread(outcome.held) if outcome.held else (),
                   margins=spread(outcome.margins) if outcome.margins else ())


def failed_outcome(case: Case, seed: int, status: str, message: str, iterations: int = 0) -> SeedOutcome:
    nt = len(case.run_targets)
    none = tuple(None for _ in range(nt))
    return SeedOutcome(seed, status, none, none, none, math.nan, math.nan, (), int(iterations), message,
                       held=none)


def failed_report(case: Case, seed: int, status: str, message: str, iterations: int = 0) -> PassReport:
    return PassReport(failed_outcome(case, seed, status, message, iterations), {},
                      tuple(None for _ in case.run_targets), "")


def _pass(case: Case, b: Built, rule: Any, seed: int, timeout: float | None, check: Any, progress: Any,
          unreachable: Sequence[bool] = (), **extra: Any) -> SeedOutcome:
    deadline = None if timeout is None else time.perf_counter() + timeout
    keep = [not u for u in unreachable] if any(unreachable) else None
    targets = case.run_targets if keep is None else tuple(t for t, k in zip(case.run_targets, keep) if k)
    out = monitored_pass(
        b.problem,
        rule,
        x_star=b.x_star,
        f_star=b.f_star,
        targets=targets,
        budget=case.run_budget,
        measure=case.run_measure,
        oracle=case.oracle_spec,
        problem_key=b.key,
        seed=seed,
        deadline=deadline,
        check_step=check,
        horizon=case.horizon,
        progress=progress,
        **extra,
    )
    return out if keep is None else _expand(out, keep)


def run_pass(task: PassTask, ready: Callable[[], None] | None = None, progress: Any = None) -> PassReport:
    """Build everything for one (case, seed) and run its monitored pass (and shadows)."""
    case, seed = task.case, task.seed
    try:
        b = built(case.instance, dtype=case.dtype)
        br = build_rule_for(case, b)
        bound, source, lower = _theory(case, b, br.hyperparams)
        unreachable = unreachable_in(case, b)
    except Exception as exc:  # UserError from a rule or family, a failed certification, ...
        msg = str(exc) if isinstance(exc, UserError) else f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"
        if ready is not None:
            ready()
        return failed_report(case, seed, "error", msg)
    if ready is not None:
        ready()
    try:
        outcome = _pass(case, b, br.rule, seed, task.timeout, br.check_step, progress, unreachable)
        if task.envelope and outcome.status not in ("error", "diverged", "timeout") and outcome.iterations_run:
            shadows = [
                _pass(case, b, build_rule_for(case, b).rule, seed, task.timeout, None, None, unreachable,
                      shadow=s, steps=outcome.iterations_run)
                for s in range(1, SHADOWS + 1)
            ]
            from dataclasses import replace

            outcome = replace(outcome, envelope=envelope_of(outcome, shadows))
    except Exception as exc:  # e.g. rule.init raised outside the loop, or a zero measure scale
        outcome = failed_outcome(case, seed, "error", f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return PassReport(outcome, dict(br.hyperparams), bound, source, lower, unreachable)
