"""What travels between the stages of a run: cases, seed outcomes, traces, case results.

A :class:`Case` is a catalogue instance x a rule (with hyperparameters) x a
gradient oracle x targets x budget x seeds; it is a small picklable value (the
instance is its definition, never its data), so any executor can ship it. One
seed's monitored pass (:mod:`benchsuite.monitor`) gives a :class:`SeedOutcome`
with its :class:`Trace`; a case's seeds together give a :class:`CaseResult`.
``result_to_dict`` / ``result_from_dict`` are the JSON form kept in a run
folder (traces are stored beside it, see :mod:`benchsuite.results`).

**Statuses** of a seed: ``reached`` (every target met and the tightest one
still met at the end of the stay-converged horizon), ``partial`` (some targets,
then the budget ran out), ``budget`` (none), ``unstable`` (every target was
met, but at the end of the horizon the measure was back above the tightest
target), ``diverged`` (a non-finite value or measure, or a measure above
:data:`DIVERGED_ABOVE`), ``error`` (the rule -- or the problem at the rule's
iterate -- raised) or ``timeout`` (the per-pass wall-clock limit). A case's
status is the first of ``error``, ``timeout``, ``diverged``, ``unstable``
present in any seed, else ``reached`` when every seed reached, ``budget`` when
no seed reached anything, else ``partial``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Any

import numpy as np

from benchsuite.oracle import OracleSpec

if TYPE_CHECKING:
    from benchsuite.catalogue import Instance
    from benchsuite.rulespec import RuleSpec

__all__ = [
    "BAD_STATUSES",
    "DIVERGED_ABOVE",
    "STATUSES",
    "Case",
    "CaseResult",
    "SeedOutcome",
    "Trace",
    "aggregate_status",
    "horizon_steps",
    "result_from_dict",
    "result_to_dict",
]

#: a measure above this (relative to the start) counts as divergence
DIVERGED_ABOVE = 1e12
STATUSES = ("reached", "partial", "budget", "unstable", "diverged", "error", "timeout")
#: statuses that mean the rule failed (in the order a case's aggregate picks them)
BAD_STATUSES = ("error", "timeout", "diverged", "unstable")


@dataclass(frozen=True)
class Case:
    """Instance x rule x oracle x targets x budget x seeds (see the module docstring).

    ``horizon`` is the stay-converged horizon after the tightest target is
    first reached: ``max(horizon[0] steps, ceil(horizon[1] x iterations so
    far))``. ``dtype`` overrides the instance's dtype (``None``: as catalogued).
    """

    instance: Instance
    rule: RuleSpec
    oracle: str = "full"
    batch: int | None = None
    replace: bool = True
    seeds: tuple[int, ...] = (0,)
    targets: tuple[float, ...] = ()
    budget: int | None = None
    measure: str | None = None
    horizon: tuple[int, float] = (100, 0.5)
    dtype: str | None = None

    @property
    def oracle_spec(self) -> OracleSpec:
        return OracleSpec(self.oracle, self.batch, self.replace)

    @property
    def run_targets(self) -> tuple[float, ...]:
        return tuple(self.targets) if self.targets else tuple(self.instance.targets)

    @property
    def run_budget(self) -> int:
        return int(self.budget if self.budget is not None else self.instance.budget)

    @property
    def run_measure(self) -> str:
        return self.measure or self.instance.measure

    def key(self) -> str:
        """Stable, human-readable id: instance, rule label, oracle, and any overrides."""
        parts = [self.instance.name, self.rule.label, self.oracle]
        if self.oracle == "minibatch":
            parts.append(f"B={self.batch}," + ("replace" if self.replace else "no-replace"))
        parts.append("seeds=" + ",".join(str(s) for s in self.seeds))
        if self.targets:
            parts.append("targets=" + ",".join(repr(t) for t in self.targets))
        if self.budget is not None:
            parts.append(f"budget={self.budget}")
        if self.measure:
            parts.append(f"measure={self.measure}")
        if tuple(self.horizon) != (100, 0.5):
            parts.append(f"horizon={self.horizon[0]},{self.horizon[1]!r}")
        if self.dtype:
            parts.append(f"dtype={self.dtype}")
        return " | ".join(parts)


@dataclass(frozen=True, eq=False)
class Trace:
    """One seed's convergence trace: a subsample of the pass with its exact crossings.

    Points: every iteration up to :data:`benchsuite.monitor.TRACE_DENSE`, then a
    geometric grid (ratio :data:`benchsuite.monitor.TRACE_RATIO`; a sparser grid
    above 1e4 unknowns, :data:`benchsuite.monitor.TRACE_LARGE`), plus each
    target's first crossing and the final iterate. ``dist`` is the relative
    distance to x* (nan where no optimum is known); ``seconds`` the wall-clock
    position from the timing replay (nan where not replayed).
    """

    iteration: np.ndarray
    measure: np.ndarray
    dist: np.ndarray
    grad_calls: np.ndarray
    seconds: np.ndarray

    COLUMNS = ("iteration", "measure", "dist", "grad_calls", "seconds")

    def __len__(self) -> int:
        return int(self.iteration.size)

    def with_seconds(self, seconds: np.ndarray) -> Trace:
        return Trace(self.iteration, self.measure, self.dist, self.grad_calls, np.asarray(seconds, dtype=np.float64))


@dataclass(frozen=True)
class SeedOutcome:
    """What one seed's monitored pass (and its replay) found.

    ``iters`` holds each target's first crossing; ``held`` the iteration from
    which the measure stayed at or below the target through the end of the
    pass (``None``: above it at the end). ``checkpoints`` / ``fingerprint``:
    the measure on the dense-then-geometric checkpoint grid; ``envelope``: per
    checkpoint, the relative round-off sensitivity measured by shadow passes
    (empty unless recorded). ``horizon``, ``left_at`` and ``horizon_worst``
    describe the stay-converged horizon after the tightest target.
    """

    seed: int
    status: str
    iters: tuple[int | None, ...]
    grad_calls: tuple[int | None, ...]
    epochs: tuple[float | None, ...]
    final_measure: float
    final_dist: float
    fingerprint: tuple[float, ...]
    iterations_run: int
    error: str | None = None
    time_to_target: tuple[float | None, ...] = ()
    time_spread: tuple[float | None, ...] = ()
    time_per_step: float | None = None
    checkpoints: tuple[int, ...] = ()
    envelope: tuple[float, ...] = ()
    held: tuple[int | None, ...] = ()
    #: per target: min(m_{h-1} - t, t - m_h) / t at the held crossing h (None: not held)
    margins: tuple[float | None, ...] = ()
    horizon: int = 0
    left_at: int | None = None
    horizon_worst: float | None = None
    #: the machine the timing replay ran on (host name; empty until timed)
    timed_on: str = ""
    trace: Trace | None = field(default=None, compare=False, repr=False)

    @property
    def transient(self) -> tuple[bool, ...]:
        """Per target: met at some point but not held to the end of the pass."""
        if not self.held:
            return tuple(False for _ in self.iters)
        return tuple(k is not None and h is None for k, h in zip(self.iters, self.held))


@dataclass(frozen=True)
class CaseResult:
    """A case with the hyperparameters actually used, its seeds' outcomes and the theory bound."""

    case: Case
    hyperparams: dict[str, Any]
    outcomes: tuple[SeedOutcome, ...]
    theory_bound: tuple[int | None, ...]
    status: str
    #: the published rate behind ``theory_bound`` (empty when none applies)
    bound_source: str = ""
    #: per target, the fewest iterations any gradient-span method can need on this instance
    #: (conjugate gradients' count; ``None`` where it does not apply): a count below it is impossible
    theory_lower: tuple[int | None, ...] = ()
    #: per target: below what the problem's precision (float32) can resolve -- neither reached nor failed
    unreachable: tuple[bool, ...] = ()

    @property
    def timed(self) -> bool:
        """Whether every seed that can be replayed has its timing."""
        from benchsuite.timing import needs_replay

        return all(not needs_replay(o) for o in self.outcomes)

    def bound_violated(self) -> tuple[bool, ...]:
        """Per target: some seed needed more iterations than the theory bound allows."""
        return tuple(
            b is not None and any(o.iters[j] is not None and o.iters[j] > b for o in self.outcomes)
            for j, b in enumerate(self.theory_bound)
        )

    def below_lower(self) -> tuple[bool, ...]:
        """Per target: some seed needed fewer iterations than the lower bound allows (a measurement error)."""
        return tuple(
            b is not None and any(o.iters[j] is not None and o.iters[j] < b for o in self.outcomes)
            for j, b in enumerate(self.theory_lower)
        )


def horizon_steps(horizon: tuple[int, float], reached_at: int) -> int:
    """``max(steps, ceil(multiple x reached_at))`` for a horizon ``(steps, multiple)``."""
    fixed, mult = horizon
    return max(int(fixed), math.ceil(float(mult) * reached_at))


def aggregate_status(statuses: Sequence[str]) -> str:
    """A case's status from its seeds' (see the module docstring)."""
    for bad in BAD_STATUSES:
        if bad in statuses:
            return bad
    if statuses and all(s == "reached" for s in statuses):
        return "reached"
    if all(s == "budget" for s in statuses):
        return "budget"
    return "partial"


# -- JSON form (run directories, resume) ------------------------------------------------
def enc(v: Any) -> Any:
    """JSON-safe: non-finite floats as strings, tuples as lists (recursively)."""
    if isinstance(v, float) and not math.isfinite(v):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return [enc(u) for u in v]
    if isinstance(v, dict):
        return {k: enc(u) for k, u in v.items()}
    if isinstance(v, np.generic):
        return enc(v.item())
    return v


def dec_float(v: Any) -> Any:
    if isinstance(v, str) and v in ("nan", "inf", "-inf"):
        return float(v)
    return v


def result_to_dict(r: CaseResult) -> dict[str, Any]:
    """A JSON-ready record of a result (the case itself is stored by its key; traces apart)."""
    outs = []
    for o in r.outcomes:
        d = {f.name: getattr(o, f.name) for f in fields(o) if f.name != "trace"}
        outs.append(d)
    return enc({
        "key": r.case.key(),
        "hyperparams": r.hyperparams,
        "theory_bound": list(r.theory_bound),
        "bound_source": r.bound_source,
        "theory_lower": list(r.theory_lower),
        "unreachable": list(r.unreachable),
        "status": r.status,
        "outcomes": outs,
    })


def _opt_tuple(v: Any) -> tuple[Any, ...]:
    return tuple(v or ())


def result_from_dict(case: Case, d: Mapping[str, Any], traces: Mapping[int, Trace] | None = None) -> CaseResult:
    """Inverse of :func:`result_to_dict` for the given case (older records load with defaults)."""
    outs = []
    traces = traces or {}
    for o in d["outcomes"]:
        seed = int(o["seed"])
        outs.append(SeedOutcome(
            seed=seed,
            status=o["status"],
            iters=tuple(o["iters"]),
            grad_calls=tuple(o["grad_calls"]),
            epochs=tuple(o["epochs"]),
            final_measure=float(dec_float(o["final_measure"])),
            final_dist=float(dec_float(o["final_dist"])),
            fingerprint=tuple(float(dec_float(v)) for v in o["fingerprint"]),
            iterations_run=int(o["iterations_run"]),
            error=o.get("error"),
            time_to_target=_opt_tuple(o.get("time_to_target")),
            time_spread=_opt_tuple(o.get("time_spread")),
            time_per_step=o.get("time_per_step"),
            checkpoints=tuple(int(k) for k in o.get("checkpoints") or ()),
            envelope=tuple(float(dec_float(v)) for v in o.get("envelope") or ()),
            held=_opt_tuple(o.get("held")),
            margins=tuple(None if v is None else float(dec_float(v)) for v in o.get("margins") or ()),
            horizon=int(o.get("horizon") or 0),
            left_at=o.get("left_at"),
            horizon_worst=None if o.get("horizon_worst") is None else float(dec_float(o["horizon_worst"])),
            timed_on=str(o.get("timed_on") or ""),
            trace=traces.get(seed),
        ))
    hp = {k: tuple(v) if isinstance(v, list) else v for k, v in d["hyperparams"].items()}
    return CaseResult(case, hp, tuple(outs), tuple(d["theory_bound"]), d["status"], d.get("bound_source", ""),
                      tuple(d.get("theory_lower") or ()), tuple(bool(u) for u in d.get("unreachable") or ()))

