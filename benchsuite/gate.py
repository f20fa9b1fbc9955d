"""The merge gate: rerun a baseline's cases with a candidate rule and judge each.

A case **fails** when, compared with its baseline record:

1. any seed of the candidate diverged, raised or timed out;
2. a target reached in the baseline is no longer reached within the budget;
3. the iterations to a target exceed the baseline by more than the allowance;
4. the candidate reached the tightest target but its final point is no longer
   within the instance's ``x_tol`` of the certified optimum
   (``||x_K - x*|| / ||x0 - x*|| <= x_tol``), where the baseline's was;
5. with ``exact``: any entry of the trajectory fingerprint differs by more
   than the floating-point tolerance ``|a - b| <= rtol * max(|a|, |b|) + atol``.

**Allowance.** Deterministic cases (full gradient, one seed) compare the
iteration counts directly; the allowance is ``max(slack_iters,
ceil(slack_rel * baseline))``, by default ``max(1 iteration, 1 %)``.
Stochastic cases (minibatch oracle, several seeds) compare the **medians** over
seeds (a seed that missed a target counts as +inf, so a target counts as
reached when at least half the seeds reach it) and widen the allowance by the
baseline's own seed-to-seed spread: ``max(deterministic allowance,
noise_factor * (max - min))`` over the baseline seeds that reached the target
(``noise_factor`` 1 by default). The gate reruns with the *same* seeds and the
runner's sampling depends only on the seed, so a clean rerun reproduces every
count exactly and never fails; a change of the rule that moves the median by
more than the seed-to-seed range is a real regression.

**Improvements** (fewer iterations beyond the allowance, or a target newly
reached) pass and are reported, with a suggestion to re-record the baseline.

**Exact mode tolerance.** ``rtol = 1e-9``: a refactor that only reorders
floating-point operations perturbs each iterate by a few ulps (~1e-16
relative) per step; on the contracting iterations of the catalogue these
perturbations add up at most linearly, to ~1e-12 over 1e4 steps, so 1e-9
leaves a thousandfold margin while any change of the update itself (a
constant, a sign, a missing factor) moves the measure by far more.
``atol = 1e-12`` on the normalised measure covers the cancellation in
``f(x) - f*`` once the relative suboptimality itself is ~1e-12 or below.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchsuite.baseline import Baseline, CaseRecord, SeedRecord
from benchsuite.errors import UserError

__all__ = [
    "GateConfig",
    "TargetCheck",
    "CaseVerdict",
    "GateReport",
    "judge_case",
    "judge",
    "check_definitions",
    "gate_cases",
    "run_gate",
]

_BAD_STATUS = ("diverged", "error", "timeout")


@dataclass(frozen=True)
class GateConfig:
    """How strict the gate is (see the module docstring for the rules)."""

    slack_iters: int = 1
    slack_rel: float = 0.01
    noise_factor: float = 1.0
    exact: bool = False
    exact_rtol: float = 1e-9
    exact_atol: float = 1e-12

    def __post_init__(self) -> None:
        if self.slack_iters < 0:
            raise UserError(f"--slack-iters: must be >= 0, got {self.slack_iters}")
        if not (self.slack_rel >= 0 and math.isfinite(self.slack_rel)):
            raise UserError(f"--slack-rel: must be a finite number >= 0, got {self.slack_rel}")
        if not (self.noise_factor >= 0 and math.isfinite(self.noise_factor)):
            raise UserError(f"--noise-factor: must be a finite number >= 0, got {self.noise_factor}")

    def deterministic_allowance(self, baseline_iters: float) -> int:
        """``max(slack_iters, ceil(slack_rel * baseline_iters))``."""
        return max(self.slack_iters, math.ceil(self.slack_rel * baseline_iters))

    def describe(self) -> str:
        text = f"allowance max({self.slack_iters} it, {self.slack_rel:.3g}x baseline)"
        text += f"; stochastic: also {self.noise_factor:g} x seed range of the baseline"
        if self.exact:
            text += f"; exact fingerprint (rtol {self.exact_rtol:g}, atol {self.exact_atol:g})"
        return text


@dataclass(frozen=True)
class TargetCheck:
    """One target of one case: baseline vs candidate iterations (medians over seeds)."""

    target: float
    baseline: float  # math.inf when not reached
    candidate: float
    allowance: float
    outcome: str  # "same" | "slower" | "faster" | "lost" | "gained" | "unreached"

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

    @property
    def failed(self) -> bool:
        return self.verdict == "fail"


@dataclass(frozen=True)
class GateReport:
    """All verdicts of one gate run."""

    baseline: str  # file
    baseline_rule: str
    candidate_rule: str
    config: GateConfig
    verdicts: tuple[CaseVerdict, ...]

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
            text += f", {i} improved (consider re-recording the baseline)"
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


def _check_target(i: int, base: CaseRecord, cand: CaseRecord, cfg: GateConfig) -> TargetCheck:
    b_seeds = [_as_iters(o.iters[i]) for o in base.outcomes]
    c_seeds = [_as_iters(o.iters[i]) for o in cand.outcomes]
    b, c = _median(b_seeds), _median(c_seeds)
    allow: float = 0.0
    if not math.isinf(b):
        allow = cfg.deterministic_allowance(b)
        reached = [v for v in b_seeds if not math.isinf(v)]
        if base.stochastic and len(reached) > 1:
            allow = max(allow, cfg.noise_factor * (max(reached) - min(reached)))
    if math.isinf(b):
        outcome = "unreached" if math.isinf(c) else "gained"
    elif math.isinf(c):
        outcome = "lost"
    elif c - b > allow:
        outcome = "slower"
    elif b - c > allow:
        outcome = "faster"
    else:
        outcome = "same"
    return TargetCheck(target=base.targets[i], baseline=b, candidate=c, allowance=allow, outcome=outcome)


def _fingerprint_diff(a: SeedRecord, b: SeedRecord, cfg: GateConfig) -> str | None:
    theirs = dict(zip(b.checkpoints, b.fingerprint))
    for k, x in zip(a.checkpoints, a.fingerprint):  # the checkpoints both passes have
        if k not in theirs:
            continue
        y = theirs[k]
        if math.isnan(x) and math.isnan(y):
            continue
        if x == y:
            continue
        if not (math.isfinite(x) and math.isfinite(y)) or abs(x - y) > cfg.exact_rtol * max(abs(x), abs(y)) + cfg.exact_atol:
            rel = abs(x - y) / max(abs(x), abs(y)) if math.isfinite(x) and math.isfinite(y) else math.inf
            return (
                f"fingerprint changed at iteration {k} (seed {a.seed}): {x:.6g} -> {y:.6g} "
                f"(relative {rel:.1e} > {cfg.exact_rtol:g})"
            )
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


def judge_case(base: CaseRecord, cand: CaseRecord, cfg: GateConfig = GateConfig()) -> CaseVerdict:
    """Compare one candidate case with its baseline record (pure)."""
    _compatible(base, cand)
    reasons: list[str] = []
    notes: list[str] = []
    for o in cand.outcomes:
        if o.status in _BAD_STATUS:
            why = f": {o.error}" if o.error else ""
            reasons.append(f"seed {o.seed}: {o.status} after {o.iterations_run} iterations{why}")
    checks = tuple(_check_target(i, base, cand, cfg) for i in range(len(base.targets)))
    for t in checks:
        tgt = _fmt_t(t.target)
        if t.outcome == "lost":
            reasons.append(
                f"target {tgt} no longer reached within budget {cand.budget} (baseline: {_fmt_it(t.baseline)} iterations)"
            )
        elif t.outcome == "slower":
            pct = 100.0 * (t.candidate - t.baseline) / max(t.baseline, 1.0)
            reasons.append(
                f"target {tgt}: {_fmt_it(t.candidate)} iterations vs baseline {_fmt_it(t.baseline)} "
                f"(+{pct:.1f} %, allowed +{_fmt_it(t.allowance)})"
            )
        elif t.outcome == "faster":
            notes.append(f"target {tgt}: {_fmt_it(t.candidate)} iterations vs baseline {_fmt_it(t.baseline)} (faster)")
        elif t.outcome == "gained":
            notes.append(f"target {tgt}: now reached in {_fmt_it(t.candidate)} iterations (baseline: not reached)")
    # final point vs the certified optimum, per seed, where the candidate reached
    # the tightest target and the baseline's final point was within x_tol
    for bo, co in zip(base.outcomes, cand.outcomes):
        if co.iters and co.iters[-1] is not None and bo.final_dist <= base.x_tol and not co.final_dist <= base.x_tol:
            reasons.append(
                f"seed {co.seed}: final point off the certified optimum: ||x-x*||/||x0-x*|| = "
                f"{co.final_dist:.3g} > x_tol {base.x_tol:g}"
            )
    if cfg.exact:
        for bo, co in zip(base.outcomes, cand.outcomes):
            diff = _fingerprint_diff(bo, co, cfg)
            if diff:
                reasons.append(diff)
    if reasons:
        verdict = "fail"
    elif notes:
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
    )


def judge(
    baseline: Baseline, candidates: Sequence[CaseRecord], cfg: GateConfig = GateConfig(), *, candidate_rule: str = ""
) -> GateReport:
    """Judge every case; ``candidates`` are in the baseline's case order."""
    if len(candidates) != len(baseline.cases):
        raise ValueError(f"{len(candidates)} candidate cases for {len(baseline.cases)} baseline cases")
    verdicts = tuple(judge_case(b, c, cfg) for b, c in zip(baseline.cases, candidates))
    return GateReport(
        baseline=baseline.source,
        baseline_rule=baseline.rule_label,
        candidate_rule=candidate_rule,
        config=cfg,
        verdicts=verdicts,
    )


# ------------------------------------------------------------ running it
def check_definitions(baseline: Baseline, catalogue: Mapping[str, Any]) -> None:
    """UserError listing instances missing from the catalogue or changed since recording."""
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
        parts.append(f"instances changed since the baseline was recorded: {', '.join(changed)}")
    if missing:
        parts.append(f"instances not in the catalogue: {', '.join(missing)}")
    if parts:
        raise UserError(f"{baseline.source}: {'; '.join(parts)} (re-record the baseline)")


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
) -> GateReport:
    """Rerun the baseline's cases with ``rule`` and judge them."""
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
    results = run_cases(cases, jobs=jobs, timing=False, progress=False, **limits)
    candidates = [record_from_result(r) for r in results]
    label = rule
    if overrides:
        label += f" ({', '.join(f'{k}={v!r}' for k, v in sorted(overrides.items()))})"
    return judge(baseline, candidates, config, candidate_rule=label)
