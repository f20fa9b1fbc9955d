"""The merge gate: rerun a baseline's cases with a candidate rule and judge each.

Every seed of the candidate is judged against the **same seed** of the baseline:
the gate reruns with the same seeds, the runner's sampling depends only on the
seed, so a clean rerun of a stochastic case draws the same minibatches and is
bit-identical to its baseline, exactly like a deterministic case. A case
**fails** when, seed by seed:

1. the candidate diverged, raised or timed out, or it left its tightest target
   during the stay-converged horizon (status ``unstable``; the gate names the
   iteration) where the baseline seed stayed below it;
2. a target the baseline **held** (stayed below through the end of its pass)
   is not held by the candidate: "lost" (a target the baseline met only
   transiently is not held against the candidate; the gate says so);
3. the held crossing of a target comes later than the baseline's by more than
   the allowance (below): "slower";
4. (stochastic cases) the seeds shift the same way: a one-sided **sign test**
   over the seeds whose held crossing moved by more than ``slack_iters``
   (lost counts as later, gained as earlier) gives ``p = P(Bin(n, 1/2) >= #later)
   <= sign_alpha`` (0.05). It catches a systematic shift that hides inside the
   per-seed allowance of round-off-dominated seeds (below). With 5 seeds it
   needs all 5 to move later; under the null hypothesis of a rewrite that
   only changes round-off (shifts of either sign equally likely) that happens
   with probability 1/32 per target, and only on seeds whose count is
   round-off-dominated at all, since elsewhere a clean rewrite moves no count
   by more than one iteration;
5. its final point is not within the instance's ``x_tol`` of the certified
   optimum (``||x_K - x*|| / ||x0 - x*|| <= x_tol``) where the baseline's was,
   checked on **every** seed (also seeds that missed the tightest target);
6. with ``exact``: the fingerprint departs from the baseline's (below).

**The default allowance** (deterministic full-gradient cases and each seed
of a stochastic case): **none** where the held crossing is *robust to
round-off* -- the measure lies farther from the target on both sides of the
crossing (``SeedRecord.margins``, relative to the target) than ``K x`` the
round-off envelope there, so no perturbation of the size another summation
order, BLAS or CPU makes can move it by a step: the count must match exactly;
``slack_iters`` (1) iteration where the crossing is within that reach of the
target; and ``max(slack_iters, ceil(slack_rel * baseline))`` (1 %) where the
baseline's trajectory is *round-off-dominated* at the crossing. On one
machine a pass is deterministic and counts are exact, so one step in a hundred
skipped (+1 %) fails, and so does a change that moves a robust crossing by one
step (moments stored in float32, say). What the default promises: on the
machine that recorded the baseline, a clean rerun passes and any change that
moves a robust held crossing at all, or any held crossing by more than one
iteration, fails; on another machine (the gate says when the baseline's CPU,
BLAS or numpy differ) the same holds, since a robust crossing is by definition
out of round-off's reach; where the trajectory is round-off-dominated, changes
above 1 % fail. An explicit ``--slack-iters N`` replaces the robust exact count
by N iterations everywhere.
Schema-1 baselines carry no envelope: every crossing gets the one-iteration
allowance and the gate says so (on another machine re-record the baseline).

**The round-off envelope** (schema 2; recorded by ``benchsuite baseline``):
per checkpoint, the largest relative difference of the measure between the
pass and shadow passes whose gradients are perturbed by about one ulp per
step -- the size of the difference another summation order, BLAS or CPU
makes. A trajectory is **round-off-dominated** from the first checkpoint whose
envelope reaches :data:`ROUNDOFF_DOMINATED` (1e-3): there ``K x envelope``
(see below) is 10 % of the measure, so a count near that checkpoint can move
by several steps without any change of the rule. Each case reports that
iteration (``roundoff_from``).

**Exact mode** compares the fingerprints on the checkpoints both passes
recorded (every iteration to 16, then a geometric grid of ratio 1.25, then
the final iterate), and the final measure and final distance when both passes
ran the same number of iterations. At a checkpoint with baseline value ``m``
and envelope ``e`` it allows ``|a - b| <= max(rtol max(|a|, |b|) + atol, K e |m|)``:

* the floor ``rtol = 1e-9``, ``atol = 1e-12``: on contracting iterations a
  reordering of floating-point operations perturbs each iterate by a few ulps
  (~1e-16 relative) per step and these add up at most linearly, to ~1e-12
  over 1e4 steps, so 1e-9 leaves a thousandfold margin; ``atol`` covers the
  cancellation in ``f(x) - f*`` once the suboptimality is ~1e-12 or below.
  Without an envelope (schema 1) the floor alone applies and the gate says so.
  In a lower working precision the floor is at least ``K`` ulps of it
  (``100 x 1.2e-7`` in float32): a rewrite rounds each iterate differently by
  about one ulp, which the envelope does not see where a step is insensitive
  to its gradient's round-off (Adam's first step is ``-lr sign(g)``); measured
  on quad-diag-kappa10-d10-float32, an independent Adam differs by 6e-9 at
  iteration 1 where the float64 floor allows 1e-9.
* ``K = 100`` (:data:`ENVELOPE_K`): the envelope is the spread of two shadow
  passes, i.e. an estimate of the round-off divergence from a sample of two
  perturbations; another machine's perturbation is a different draw of the
  same size. Measured (adam and rmsprop at lr = 0.01 on lsq-kappa1e2,
  huber-outliers10pct, quad-rot-kappa1e3, logreg-dense, softmax-5class, where
  round-off is amplified until it decides the trajectory): clean rewrites
  (RMSProp with its moments scaled another way, independent textbook Adam and
  RMSProp, ``A^T c`` summed in another order) differ from the baseline by at
  most 5 x its envelope at any checkpoint below the chaotic level; the planted
  bugs (bias correction missing or one step ahead, a state reset) by 7e11 to
  7e15 x the envelope, 6e-3 to 0.9 relative at the first checkpoint they touch.
  100 leaves a factor 20 over the largest clean difference and nine orders of
  magnitude under the smallest bug.

The envelope also sets three regimes for the iteration counts: below
:data:`ROUNDOFF_DOMINATED` a count is exact up to the one-iteration
allowance; from there the allowance is relative (1 %); where ``K x envelope >=
1`` (the orbit is chaotic at that level: adaptive rules at a fixed step
hovering at their noise floor) round-off alone moves a crossing anywhere, so
its count is not compared (the gate says so; lost targets, the sign test, the
x_tol check and the horizon still apply). A held crossing in a dominated
region falls back to the first crossing, and leaving the tightest target
during the horizon is then judged by level: where the baseline left it too, or
its horizon is round-off-dominated, the candidate's worst measure over the
horizon may reach :data:`HORIZON_LEVEL` (10) x the baseline's (its worst, or
the target) -- a rule hovering at its floor stays within a factor 2 of the
baseline's worst on the cases above, a blow-up near the optimum goes orders of
magnitude beyond.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from benchsuite.baseline import Baseline, CaseRecord, SeedRecord
from benchsuite.errors import UserError

__all__ = [
    "ENVELOPE_K",
    "HORIZON_LEVEL",
    "ROUNDOFF_DOMINATED",
    "GateConfig",
    "TargetCheck",
    "CaseVerdict",
    "GateReport",
    "judge_case",
    "judge",
    "check_definitions",
    "gate_cases",
    "machine_differences",
    "rule_difference",
    "run_gate",
    "sign_test_p",
]

#: exact mode allows K x the recorded round-off envelope (see the module docstring)
ENVELOPE_K = 100.0
#: envelope level from which a trajectory counts as round-off-dominated
ROUNDOFF_DOMINATED = 1e-3
#: where the horizon is round-off-dominated (or the baseline left its target too), the candidate's
#: worst measure over the horizon may reach this multiple of the baseline's level (see the module docstring)
HORIZON_LEVEL = 10.0
_BAD_STATUS = ("diverged", "error", "timeout")


@dataclass(frozen=True)
class GateConfig:
    """How strict the gate is (see the module docstring for the rules).

    ``noise_factor`` (default 0) loosens the per-seed allowance of stochastic
    cases by ``noise_factor x`` the baseline's seed-to-seed range; since the
    seeds are judged in pairs this only lets real changes through, and it is
    kept for users who want a deliberately loose gate.
    """

    #: None (default): 0 iterations at crossings robust to round-off, 1 elsewhere; a number: that, everywhere
    slack_iters: int | None = None
    slack_rel: float = 0.01
    noise_factor: float = 0.0
    exact: bool = False
    exact_rtol: float = 1e-9
    exact_atol: float = 1e-12
    envelope_k: float = ENVELOPE_K
    sign_alpha: float = 0.05

    def __post_init__(self) -> None:
        if self.slack_iters is not None and self.slack_iters < 0:
            raise UserError(f"--slack-iters: must be >= 0, got {self.slack_iters}")
        if not (self.slack_rel >= 0 and math.isfinite(self.slack_rel)):
            raise UserError(f"--slack-rel: must be a finite number >= 0, got {self.slack_rel}")
        if not (self.noise_factor >= 0 and math.isfinite(self.noise_factor)):
            raise UserError(f"--noise-factor: must be a finite number >= 0, got {self.noise_factor}")
        if not (self.envelope_k >= 1 and math.isfinite(self.envelope_k)):
            raise UserError(f"--envelope-k: must be a finite number >= 1, got {self.envelope_k}")
        if not (0 < self.sign_alpha < 1):
            raise UserError(f"--sign-alpha: must be between 0 and 1, got {self.sign_alpha}")

    @property
    def slack(self) -> int:
        """The iterations a crossing may move where round-off can reach it (1 unless set)."""
        return 1 if self.slack_iters is None else self.slack_iters

    def deterministic_allowance(self, baseline_iters: float, dominated: bool = False, robust: bool = False) -> int:
        """0 at a crossing robust to round-off (unless ``slack_iters`` is set), else ``slack``;
        ``max(slack, ceil(slack_rel * baseline_iters))`` where round-off-dominated."""
        if dominated:
            return max(self.slack, math.ceil(self.slack_rel * baseline_iters))
        if robust and self.slack_iters is None:
            return 0
        return self.slack

    def describe(self) -> str:
        exact = "0 iterations where the crossing is out of round-off's reach, " if self.slack_iters is None else ""
        text = (f"allowance {exact}{self.slack} iteration(s) per seed elsewhere; max({self.slack}, "
                f"{100 * self.slack_rel:g} %) where round-off-dominated; not compared where round-off decides the crossing")
        text += f"; stochastic: seeds in pairs + sign test at {self.sign_alpha:g}"
        if self.noise_factor:
            text += f", also {self.noise_factor:g} x seed range of the baseline"
        if self.exact:
            text += (f"; exact fingerprint (max(rtol {self.exact_rtol:g} + atol {self.exact_atol:g}, "
                     f"{self.envelope_k:g} x round-off envelope))")
        return text


@dataclass(frozen=True)
class TargetCheck:
    """One target of one case: baseline vs candidate held crossings (medians over seeds).

    ``outcome``: ``same`` | ``slower`` | ``faster`` | ``lost`` | ``gained`` |
    ``unreached`` | ``transient`` (the baseline met it only transiently: not
    held against the candidate) | ``shifted`` (every seed later: the sign test).
    """

    target: float
    baseline: float  # math.inf when not held
    candidate: float
    allowance: float
    outcome: str
    seeds_later: int = 0
    seeds_earlier: int = 0
    sign_p: float | None = None  # stochastic cases: the sign test's p-value
    dominated: bool = False  # round-off-dominated at the baseline's crossing (some seed)

    def delta(self) -> float | None:
        if math.isinf(self.baseline) or math.isinf(self.candidate):
            return None
        return self.candidate - self.baseline


@dataclass(frozen=True)
class CaseVerdict:
    """The gate's verdict on one case."""

    key: str
    instance: str
    verdict: str  # "pass" | "improved" | "fail"
    reasons: tuple[str, ...]  # why it failed (empty unless "fail")
    notes: tuple[str, ...]  # improvements and other observations
    targets: tuple[TargetCheck, ...]
    baseline_status: str
    candidate_status: str
    #: first checkpoint from which the baseline's trajectory is round-off-dominated (None: never, or unknown)
    roundoff_from: int | None = None
    #: whether the baseline recorded a round-off envelope for this case
    has_envelope: bool = False

    @property
    def failed(self) -> bool:
        return self.verdict == "fail"


@dataclass(frozen=True)
class GateReport:
    """All verdicts of one gate run, and notes about the run as a whole."""

    baseline: str  # file
    baseline_rule: str
    candidate_rule: str
    config: GateConfig
    verdicts: tuple[CaseVerdict, ...]
    #: e.g. the baseline's machine differs, the candidate is another rule (not failures)
    notes: tuple[str, ...] = ()
    #: the candidate's runner results in the baseline's case order, with their traces (for pictures)
    candidates: tuple[Any, ...] = field(default=(), compare=False, repr=False)
    #: the candidate's records in the baseline's case order
    records: tuple[CaseRecord, ...] = field(default=(), compare=False, repr=False)

    @property
    def passed(self) -> bool:
        return not any(v.failed for v in self.verdicts)

    @property
    def failures(self) -> tuple[CaseVerdict, ...]:
        return tuple(v for v in self.verdicts if v.failed)

    @property
    def improvements(self) -> tuple[CaseVerdict, ...]:
        return tuple(v for v in self.verdicts if v.verdict == "improved")

    def summary(self) -> str:
        n, f, i = len(self.verdicts), len(self.failures), len(self.improvements)
        head = "PASS" if self.passed else "FAIL"
        text = f"{head}: {n - f} of {n} cases pass"
        if f:
            text += f", {f} fail"
        if i:
            text += f", {i} improved (check it with `benchsuite conform` before re-recording the baseline)"
        return text


# ------------------------------------------------------------------ judging
def _as_iters(v: int | None) -> float:
    return math.inf if v is None else float(v)


def _median(values: Sequence[float]) -> float:
    return float(statistics.median(values))


def _fmt_t(t: float) -> str:
    return f"{t:.0e}" if t != 0 else "0"


def _fmt_it(v: float) -> str:
    return "-" if math.isinf(v) else (f"{v:.0f}" if float(v).is_integer() else f"{v:.1f}")


def sign_test_p(later: int, earlier: int) -> float:
    """One-sided sign test: ``P(Bin(n, 1/2) >= later)`` with ``n = later + earlier`` (1.0 when n = 0)."""
    n = later + earlier
    if n == 0:
        return 1.0
    return sum(math.comb(n, j) for j in range(later, n + 1)) / 2.0**n


def envelope_at(rec: SeedRecord, k: int) -> float | None:
    """The recorded envelope up to the first checkpoint at or after iteration ``k`` (None: none recorded).

    The envelope of a checkpoint bounds the round-off divergence since the
    start, so the largest entry up to the checkpoint that follows ``k`` is a
    conservative value at ``k``.
    """
    if not rec.envelope:
        return None
    worst = 0.0
    for cp, e in zip(rec.checkpoints, rec.envelope):
        if math.isfinite(e):
            worst = max(worst, e)
        elif math.isinf(e):
            worst = math.inf
        if cp >= k:
            break
    return worst


def roundoff_from(rec: SeedRecord, level: float = ROUNDOFF_DOMINATED) -> int | None:
    """The first checkpoint whose envelope reaches ``level`` (None: never, or no envelope)."""
    for cp, e in zip(rec.checkpoints, rec.envelope):
        if not e < level:
            return cp
    return None


def _dominated(rec: SeedRecord, k: int) -> bool:
    e = envelope_at(rec, k)
    return e is not None and not e < ROUNDOFF_DOMINATED


def _chaotic(rec: SeedRecord, k: int, cfg: GateConfig) -> bool:
    """``K x envelope >= 1`` at iteration ``k``: round-off alone makes differences as large as the measure."""
    e = envelope_at(rec, k)
    return e is not None and not cfg.envelope_k * e < 1.0


def _robust(rec: SeedRecord, j: int, k: int, cfg: GateConfig) -> bool:
    """Whether target ``j``'s held crossing at ``k`` is out of round-off's reach: the measure's distance
    from the target on both sides (``margins``, relative to the target) exceeds ``K x`` the envelope there."""
    if j >= len(rec.margins) or rec.margins[j] is None or j >= len(rec.held) or rec.held[j] != k:
        return False
    env = envelope_at(rec, k)
    # the exact mode's floor too (1e-9, or K ulps of a lower precision): where the envelope shows 0 a
    # rewrite still rounds differently
    return env is not None and rec.margins[j] > max(cfg.envelope_k * env, cfg.exact_rtol)


def _pct(c: float, b: float) -> str:
    return f"{100.0 * (c - b) / max(b, 1.0):+.1f} %"


def _seeds(label: Sequence[int]) -> str:
    return ("seed " if len(label) == 1 else "seeds ") + ", ".join(str(s) for s in label)


def _check_target(
    j: int, base: CaseRecord, cand: CaseRecord, cfg: GateConfig, reasons: list[str], notes: list[str], held: bool
) -> TargetCheck:
    """Judge target ``j`` seed by seed (appends to ``reasons`` / ``notes``); first crossings unless ``held``."""
    tgt = _fmt_t(base.targets[j])
    b_held = [_as_iters((o.held if held else o.iters)[j]) for o in base.outcomes]
    c_held = [_as_iters((o.held if held else o.iters)[j]) for o in cand.outcomes]
    spread = 0.0
    reached = [v for v in b_held if not math.isinf(v)]
    if cfg.noise_factor and base.stochastic and len(reached) > 1:
        spread = cfg.noise_factor * (max(reached) - min(reached))
    later: list[int] = []
    earlier: list[int] = []
    slower: list[tuple[int, float, float, float]] = []
    lost: list[tuple[int, float, int | None]] = []
    faster: list[int] = []
    gained: list[int] = []
    transient: list[tuple[int, int]] = []
    chaotic: list[tuple[int, int]] = []
    dominated = False
    allow_max = 0.0
    b_judged, c_judged = [], []
    for bo, co, b, c in zip(base.outcomes, cand.outcomes, b_held, c_held):
        if held and not math.isinf(b) and bo.iters[j] is not None and _dominated(bo, int(b)):
            # the held crossing lies where round-off decides the trajectory: it is not reproducible
            # (another order of the same sums moves it arbitrarily); compare the first crossings,
            # and leave "stays below" to the horizon's level check
            b, c = float(bo.iters[j]), _as_iters(co.iters[j])
        b_judged.append(b)
        c_judged.append(c)
        if not math.isinf(b) and _chaotic(bo, int(b), cfg):
            # K x envelope >= 1 there: round-off alone can move this crossing anywhere, or past the budget
            chaotic.append((bo.seed, int(b)))
            dominated = True
            if c - b > cfg.slack:  # still counted by the sign test: a shift of every seed is no accident
                later.append(co.seed)
            elif b - c > cfg.slack:
                earlier.append(co.seed)
            continue
        if math.isinf(b):
            if bo.iters[j] is not None:
                transient.append((bo.seed, int(bo.iters[j])))
            elif not math.isinf(c):
                gained.append(bo.seed)
                earlier.append(bo.seed)
            continue
        dom = _dominated(bo, int(b))
        dominated |= dom
        robust = held and not dom and _robust(bo, j, int(b), cfg)
        allow = max(float(cfg.deterministic_allowance(b, dom, robust)), spread)
        allow_max = max(allow_max, allow)
        if math.isinf(c):
            lost.append((co.seed, b, co.iters[j]))
            later.append(co.seed)
            continue
        if c - b > allow:
            slower.append((co.seed, b, c, allow))
        elif b - c > allow:
            faster.append(co.seed)
        if c - b > cfg.slack:
            later.append(co.seed)
        elif b - c > cfg.slack:
            earlier.append(co.seed)
    b_med = _median(b_judged)
    c_med = _median(c_judged)
    stochastic = len(base.outcomes) > 1
    p = sign_test_p(len(later), len(earlier)) if stochastic else None
    budget = cand.budget
    for seed, b, first in lost:
        who = f"seed {seed}: " if stochastic else ""
        how = (f"met only transiently (first at iteration {first}, not held to the end of the pass)"
               if first is not None else f"no longer reached within budget {budget}")
        reasons.append(f"target {tgt}: {who}{how} (baseline: held from iteration {_fmt_it(b)})")
    for seed, b, c, allow in slower:
        who = f"seed {seed}: " if stochastic else ""
        reasons.append(
            f"target {tgt}: {who}{_fmt_it(c)} iterations vs baseline {_fmt_it(b)} ({_pct(c, b)}, allowed +{_fmt_it(allow)})"
        )
    shifted = p is not None and p <= cfg.sign_alpha and not lost and not slower
    if shifted:
        reasons.append(
            f"target {tgt}: later on {len(later)} of {len(later) + len(earlier)} seeds that moved "
            f"(sign test p = {p:.3g} <= {cfg.sign_alpha:g}): a systematic shift "
            f"(median {_fmt_it(b_med)} -> {_fmt_it(c_med)})"
        )
    for seed, k in chaotic:
        who = f"seed {seed}: " if stochastic else ""
        notes.append(f"target {tgt}: {who}round-off decides this crossing (the baseline's envelope at iteration {k} "
                     f"is at least 1/{cfg.envelope_k:g}): its count is not compared")
    for seed, first in transient:
        who = f"seed {seed}: " if stochastic else ""
        notes.append(f"target {tgt}: {who}the baseline met it only transiently (iteration {first}); not held against the candidate")
    if faster and not (lost or slower or shifted):
        notes.append(f"target {tgt}: {_fmt_it(c_med)} iterations vs baseline {_fmt_it(b_med)} (faster"
                     + (f" on {_seeds(faster)})" if stochastic else ")"))
    if gained:
        notes.append(f"target {tgt}: now reached in {_fmt_it(c_med)} iterations (baseline: not held"
                     + (f"; {_seeds(gained)})" if stochastic else ")"))
    if lost:
        outcome = "lost"
    elif slower:
        outcome = "slower"
    elif shifted:
        outcome = "shifted"
    elif faster:
        outcome = "faster"
    elif gained:
        outcome = "gained"
    elif transient and len(transient) == len(base.outcomes):
        outcome = "transient"
    elif math.isinf(b_med) and math.isinf(c_med):
        outcome = "unreached"
    else:
        outcome = "same"
    return TargetCheck(
        target=base.targets[j],
        baseline=b_med,
        candidate=c_med,
        allowance=allow_max,
        outcome=outcome,
        seeds_later=len(later),
        seeds_earlier=len(earlier),
        sign_p=p,
        dominated=dominated,
    )


def _close(x: float, y: float, env: float | None, cfg: GateConfig) -> tuple[bool, float, float]:
    """Whether ``y`` (candidate) agrees with ``x`` (baseline); the relative difference and the allowance."""
    if (math.isnan(x) and math.isnan(y)) or x == y:
        return True, 0.0, 0.0
    if not (math.isfinite(x) and math.isfinite(y)):
        return False, math.inf, 0.0
    scale = max(abs(x), abs(y))
    allowed = cfg.exact_rtol * scale + cfg.exact_atol
    if env is not None:  # relative to the larger value: where K x envelope >= 1 nothing can be told apart
        allowed = max(allowed, cfg.envelope_k * env * scale)
    diff = abs(x - y)
    rel = diff / scale if scale > 0 else math.inf
    return diff <= allowed, rel, allowed / scale if scale > 0 else math.inf


def _departure(a: SeedRecord, b: SeedRecord, cfg: GateConfig) -> tuple[int, float, float, float, float] | None:
    """The first common checkpoint where ``b``'s fingerprint leaves ``a``'s allowance: (k, x, y, rel, allowed)."""
    theirs = dict(zip(b.checkpoints, b.fingerprint))
    env = dict(zip(a.checkpoints, a.envelope)) if a.envelope else {}
    for k, x in zip(a.checkpoints, a.fingerprint):
        if k not in theirs:
            continue
        y = theirs[k]
        ok, rel, allowed = _close(x, y, env.get(k), cfg)
        if not ok:
            return k, x, y, rel, allowed
    return None


def departure_iteration(a: SeedRecord, b: SeedRecord, cfg: GateConfig = GateConfig()) -> int | None:
    """The first checkpoint at which the candidate ``b`` departs from the baseline ``a`` beyond the
    round-off allowance of ``--exact`` (None: nowhere on their common checkpoints); what the gate's
    pictures mark."""
    hit = _departure(a, b, cfg)
    return None if hit is None else hit[0]


def _fingerprint_diff(a: SeedRecord, b: SeedRecord, cfg: GateConfig) -> str | None:
    """The first departure of ``b``'s fingerprint from ``a``'s on their common checkpoints (exact mode)."""
    env = dict(zip(a.checkpoints, a.envelope)) if a.envelope else {}
    hit = _departure(a, b, cfg)
    if hit is not None:
        k, x, y, rel, allowed = hit
        e = env.get(k)
        why = (f"{cfg.envelope_k:g} x round-off envelope {e:.1e}" if e is not None and cfg.envelope_k * e
               > cfg.exact_rtol + cfg.exact_atol / max(abs(x), abs(y)) else f"floor rtol {cfg.exact_rtol:g}")
        return (
            f"fingerprint departs at iteration {k} (seed {a.seed}): {x:.6g} -> {y:.6g} "
            f"(relative {rel:.1e} > {allowed:.1e}: {why})"
        )
    if a.iterations_run == b.iterations_run and b.status not in _BAD_STATUS:
        last = envelope_at(a, a.iterations_run)
        for name, x, y in (("final measure", a.final_measure, b.final_measure), ("final distance", a.final_dist, b.final_dist)):
            ok, rel, allowed = _close(x, y, last, cfg)
            if not ok:
                return (f"{name} changed (seed {a.seed}, iteration {a.iterations_run}): {x:.6g} -> {y:.6g} "
                        f"(relative {rel:.1e} > {allowed:.1e})")
    return None


def _compatible(base: CaseRecord, cand: CaseRecord) -> None:
    same = (
        base.instance == cand.instance
        and base.seeds == cand.seeds
        and base.targets == cand.targets
        and base.oracle == cand.oracle
        and len(base.outcomes) == len(cand.outcomes)
    )
    if not same:
        raise ValueError(f"case {base.key!r}: the candidate run does not match the baseline case's settings")


def _horizon(bo: SeedRecord, co: SeedRecord, tight: float, stochastic: bool, level: float) -> tuple[str | None, str | None]:
    """(reason, note) about the stay-converged horizon of one seed pair (see the module docstring)."""
    who = f"seed {co.seed}: " if stochastic else ""
    if co.left_at is None and co.status != "unstable":
        return None, None
    where = f" at iteration {co.left_at}" if co.left_at is not None else ""
    hw = co.horizon_worst
    worst = f"; worst measure {hw:.3g}" if hw is not None and math.isfinite(hw) else ""
    text = (f"{who}left the tightest target {_fmt_t(tight)}{where} during the stay-converged horizon "
            f"({co.horizon} steps{worst})")
    b_left = bo.left_at is not None or bo.status == "unstable"
    if not b_left and not _dominated(bo, bo.iterations_run):
        return text + "; the baseline stayed below it", None
    ref = max(bo.horizon_worst or 0.0, tight) if b_left else tight
    why = "the baseline left it too" if b_left else "the baseline's horizon is round-off-dominated"
    if hw is not None and hw <= level * ref:
        return None, f"{text}; {why} (worst {bo.horizon_worst or math.nan:.3g}): within {level:g} x its level"
    return f"{text}: above {level:g} x the baseline's level {ref:.3g} ({why})", None


def judge_case(
    base: CaseRecord, cand: CaseRecord, cfg: GateConfig = GateConfig(), *, schema1: bool = False,
    dtype: str = "float64",
) -> CaseVerdict:
    """Compare one candidate case with its baseline record, seed by seed (pure).

    ``schema1``: the baseline ran no stay-converged horizon, so its "held"
    crossings are only its first crossings; then first crossings are compared
    and leaving the target during the horizon is noted, not judged.
    ``dtype``: the case's working precision; the exact mode's floor is at
    least ``K`` ulps of it (see the module docstring).
    """
    _compatible(base, cand)
    reasons: list[str] = []
    notes: list[str] = []
    stochastic = len(base.outcomes) > 1
    for o in cand.outcomes:
        if o.status in _BAD_STATUS:
            why = f": {o.error}" if o.error else ""
            reasons.append(f"seed {o.seed}: {o.status} after {o.iterations_run} iterations{why}")
    tightest = min(base.targets)
    for bo, co in zip(base.outcomes, cand.outcomes):
        if co.status in _BAD_STATUS:
            continue
        reason, note = _horizon(bo, co, tightest, stochastic, HORIZON_LEVEL)
        if schema1 and reason:
            reason, note = None, reason.replace("; the baseline stayed below it",
                                                " (not judged: the schema-1 baseline ran no horizon)")
        if reason:
            reasons.append(reason)
        if note:
            notes.append(note)
    ulp = float(np.finfo(np.dtype(dtype)).eps) if dtype else 0.0
    ecfg = replace(cfg, exact_rtol=max(cfg.exact_rtol, cfg.envelope_k * ulp))  # the floor in this precision
    checks = tuple(_check_target(j, base, cand, ecfg, reasons, notes, not schema1) for j in range(len(base.targets)))
    # final point vs the certified optimum, on every seed whose baseline ended within x_tol
    for bo, co in zip(base.outcomes, cand.outcomes):
        if bo.final_dist <= base.x_tol and not co.final_dist <= base.x_tol and co.status not in _BAD_STATUS:
            reasons.append(
                f"seed {co.seed}: final point off the certified optimum: ||x-x*||/||x0-x*|| = "
                f"{co.final_dist:.3g} > x_tol {base.x_tol:g} (baseline {bo.final_dist:.3g})"
            )
    if cfg.exact:
        for bo, co in zip(base.outcomes, cand.outcomes):
            diff = _fingerprint_diff(bo, co, ecfg)
            if diff:
                reasons.append(diff)
    has_env = all(bool(o.envelope) for o in base.outcomes)
    starts = [k for k in (roundoff_from(o) for o in base.outcomes) if k is not None]
    if reasons:
        verdict = "fail"
    elif any(t.outcome in ("faster", "gained") for t in checks):
        verdict = "improved"
    else:
        verdict = "pass"
    return CaseVerdict(
        key=base.key,
        instance=base.instance,
        verdict=verdict,
        reasons=tuple(reasons),
        notes=tuple(notes),
        targets=checks,
        baseline_status=base.status,
        candidate_status=cand.status,
        roundoff_from=min(starts) if starts else None,
        has_envelope=has_env,
    )


def judge(
    baseline: Baseline,
    candidates: Sequence[CaseRecord],
    cfg: GateConfig = GateConfig(),
    *,
    candidate_rule: str = "",
    notes: Sequence[str] = (),
    dtypes: Sequence[str] = (),
) -> GateReport:
    """Judge every case; ``candidates`` (and ``dtypes``, default float64) are in the baseline's case order."""
    if len(candidates) != len(baseline.cases):
        raise ValueError(f"{len(candidates)} candidate cases for {len(baseline.cases)} baseline cases")
    schema1 = baseline.schema.endswith("/1")
    dts = list(dtypes) or ["float64"] * len(candidates)
    verdicts = tuple(judge_case(b, c, cfg, schema1=schema1, dtype=d) for b, c, d in zip(baseline.cases, candidates, dts))
    extra = list(notes)
    if schema1:
        extra.append("the baseline is schema 1 (no stay-converged horizon, no held crossings, no round-off "
                     "envelope): first crossings are compared and the horizon is not judged; re-record it")
    if cfg.exact and not all(v.has_envelope for v in verdicts):
        n = sum(not v.has_envelope for v in verdicts)
        extra.append(f"{n} of {len(verdicts)} case(s) have no round-off envelope in the baseline (schema 1): "
                     f"exact mode uses the floor rtol {cfg.exact_rtol:g} there; re-record the baseline for "
                     "an envelope-calibrated check that holds on other machines")
    return GateReport(
        baseline=baseline.source,
        baseline_rule=baseline.rule_label,
        candidate_rule=candidate_rule,
        config=cfg,
        verdicts=verdicts,
        notes=tuple(extra),
    )


def machine_differences(recorded: Mapping[str, Any], current: Mapping[str, Any]) -> list[str]:
    """What differs between the baseline's machine and this one: CPU model, BLAS, numpy (pure)."""

    def blas(m: Mapping[str, Any]) -> str:
        pools = m.get("blas") or []
        parts = sorted(
            f"{p.get('internal_api', '?')} {p.get('version', '?')}"
            for p in pools if isinstance(p, Mapping) and p.get("user_api") == "blas"
        )
        return ", ".join(parts) or "none found"

    out = []
    for label, get in (("CPU", lambda m: m.get("cpu")), ("BLAS", blas), ("numpy", lambda m: m.get("numpy"))):
        a, b = get(recorded), get(current)
        if a is None or (label == "BLAS" and not recorded.get("blas")):
            continue
        if a != b:
            out.append(f"{label} {a} -> {b}")
    return out


def rule_difference(baseline: Baseline, rule: str) -> str | None:
    """A note when the candidate is not the rule the baseline was recorded with (pure)."""
    from benchsuite.rules import BUILTIN_RULES

    recorded = sorted({c.rule for c in baseline.cases})
    if rule in recorded:
        return None
    names = ", ".join(recorded)
    text = (f"the candidate {rule} is not the rule the baseline was recorded with ({names}): "
            f"the gate holds it to that rule's results, which says nothing about whether it implements the method")
    builtin = [r for r in recorded if r in BUILTIN_RULES]
    if len(recorded) == 1 and builtin:
        text += f"; to check that, run `benchsuite conform --rule {rule} --as {builtin[0]}`"
    return text


# ------------------------------------------------------------ running it
def check_definitions(baseline: Baseline, catalogue: Mapping[str, Any]) -> None:
    """UserError listing instances missing from the catalogue or changed since recording.

    A missing instance whose baseline records the catalogue file it came from
    gets the advice to pass that file with ``--catalogue``.
    """
    missing = sorted({c.instance for c in baseline.cases if c.instance not in catalogue})
    changed = sorted(
        {
            c.instance
            for c in baseline.cases
            if c.instance in catalogue and catalogue[c.instance].definition_hash() != c.definition_hash
        }
    )
    parts = []
    if changed:
        parts.append(f"instances changed since the baseline was recorded: {', '.join(changed)} (re-record the baseline)")
    if missing:
        where = {c.instance: c.catalogue for c in baseline.cases}
        files = sorted({where[m] for m in missing if where[m] and where[m] != "builtin"})
        text = f"instances not in the catalogue: {', '.join(missing)}"
        if files:
            text += " (recorded from " + ", ".join(files) + ": pass " + " ".join(f"--catalogue {f}" for f in files) + ")"
        else:
            text += " (pass the catalogue file they came from with --catalogue, or re-record the baseline)"
        parts.append(text)
    if parts:
        raise UserError(f"{baseline.source}: {'; '.join(parts)}")


def gate_cases(
    baseline: Baseline, rule: str, overrides: Mapping[str, Any], catalogue: Mapping[str, Any]
) -> list[Any]:
    """The baseline's cases with the candidate rule and the recorded hyperparameters.

    Every hyperparameter the baseline recorded (defaults, problem-aware values,
    sweep-selected values) is passed explicitly, then ``overrides`` replace
    any of them.
    """
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case

    cases = []
    for c in baseline.cases:
        params = {**c.hyperparams_dict(), **overrides}
        cases.append(
            Case(
                instance=catalogue[c.instance],
                rule=parse_rule(rule, params),
                oracle=c.oracle,
                batch=c.batch,
                replace=c.replace,
                seeds=c.seeds,
                targets=c.targets,
                budget=c.budget,
                measure=c.measure,
                horizon=c.horizon,
                dtype=c.dtype,
            )
        )
    return cases


def _check_buildable(cases: Sequence[Any], baseline: Baseline) -> None:
    """Build the candidate with each recorded hyperparameter set once: a mismatch is a usage error."""
    from benchsuite.rulespec import build_rule

    for spec in dict.fromkeys(c.rule for c in cases):
        try:
            build_rule(spec)
        except UserError as exc:
            raise UserError(
                f"{exc} (the baseline {baseline.source} records the hyperparameters of {baseline.rule_label}; "
                "the candidate must accept them)"
            ) from None


def run_gate(
    baseline: Baseline,
    rule: str,
    params: Mapping[str, Any] | Sequence[str] = (),
    *,
    config: GateConfig = GateConfig(),
    jobs: int | None = None,
    catalogue_paths: Sequence[str | Path] = (),
    timeout: float | None = None,
    cluster: str | None = None,
) -> GateReport:
    """Rerun the baseline's cases with ``rule`` and judge them (``cluster``: a Dask scheduler address)."""
    from benchsuite.baseline import record_from_result
    from benchsuite.catalogue import load_catalogue
    from benchsuite.rulespec import parse_param
    from benchsuite.runner import run_cases

    if isinstance(params, Mapping):
        overrides = dict(params)
    else:
        overrides = dict(parse_param(p) for p in params)
    catalogue = load_catalogue(list(catalogue_paths) or None)
    check_definitions(baseline, catalogue)
    cases = gate_cases(baseline, rule, overrides, catalogue)
    _check_buildable(cases, baseline)
    limits = {} if timeout is None else {"timeout": timeout}
    results = run_cases(cases, jobs=jobs, timing=False, progress=False, cluster=cluster, **limits)
    candidates = [record_from_result(r) for r in results]
    label = rule
    if overrides:
        label += f" ({', '.join(f'{k}={v!r}' for k, v in sorted(overrides.items()))})"
    dtypes = [c.dtype or str(catalogue[c.instance].params_dict().get("dtype", "float64")) for c in baseline.cases]
    report = judge(baseline, candidates, config, candidate_rule=label, notes=run_notes(baseline, rule), dtypes=dtypes)
    return replace(report, candidates=tuple(results), records=tuple(candidates))


def run_notes(baseline: Baseline, rule: str) -> list[str]:
    """Notes about a gate run as a whole: another rule, another machine (never failures)."""
    from benchsuite.sysinfo import machine_info

    notes = []
    other = rule_difference(baseline, rule)
    if other:
        notes.append(other)
    if baseline.machine:
        diff = machine_differences(baseline.machine, machine_info())
        if diff:
            notes.append(
                "the baseline was recorded on another machine (" + "; ".join(diff) + "): iteration counts may "
                "move where a trajectory is round-off-dominated; the allowance there is the relative one"
            )
    return notes
