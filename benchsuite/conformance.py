"""Conformance: does a user's rule compute the method it claims to be?

The gate compares a rule with a *recorded* baseline, so a rule that is faster
because it is wrong (an Adam without bias corrections is faster at lr = 0.01
on every small problem) passes it as "improved", and re-recording bakes the
bug in. The conformance check compares the rule, step by step, with the
built-in **reference implementation** of the method (benchsuite.rules), on the
same problems from the same start with the full gradient.

**Hyperparameters.** The candidate is built with the user's hyperparameters
(its own names, e.g. torch-style ``betas=(0.9,0.999)``); every hyperparameter
the candidate then uses (its defaults included) is mapped onto the
reference's names: ``betas`` -> ``beta1, beta2``, ``alpha`` -> ``decay``
(RMSProp), ``initial_accumulator_value`` -> ``initial_accumulator``
(AdaGrad); equal names map to themselves (``lr``, ``eps``, ``weight_decay``,
``momentum``, ...). The reference starts from the published defaults, or --
with ``convention="torch"`` (chosen automatically when torch-style names are
used or the candidate is a ``torch.optim`` optimizer) -- from
``torch_preset``, torch's conventions and defaults. A candidate
hyperparameter with no counterpart is ignored when it is off (``None``,
``False``, ``0``) and a :class:`UserError` otherwise.

**Agreement.** Per case, the reference runs with the exact gradient and twice
more with the gradient perturbed by one ulp per coordinate per step (random
signs, fixed seeds): the spread of those *shadow* passes is the **round-off
envelope** ``e_k = max_s ||x_s,k - x_k||`` of the reference, the size of the
difference another operation order, BLAS or CPU makes. The candidate agrees
at step ``k`` when ``||y_k - x_k|| <= max(rtol ||x_k - x*|| + atol max(||x*||, 1),
K e_k)`` with the gate's floor (``rtol = 1e-9``, ``atol = 1e-12``) and factor
``K = 100`` (benchsuite.gate: the module docstring justifies both). The
report gives the first step of disagreement, the relative difference there
against the allowance, and the step from which the reference's trajectory is
round-off-dominated (``e_k >= 1e-3 ||x_k - x*||``), after which agreement
only means "within round-off of the reference".
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchsuite.errors import UserError

__all__ = [
    "DEFAULT_PROBLEMS",
    "DEFAULT_STEPS",
    "CaseAgreement",
    "ConformanceReport",
    "check_conformance",
    "compare_trajectories",
    "conformance_json",
    "conformance_table",
    "map_hyperparams",
    "parse_params",
]

#: the default cases: a well and a badly conditioned quadratic, a badly scaled logistic
#: regression, least squares and a non-quadratic valley (small, fast; different curvature)
DEFAULT_PROBLEMS = (
    "quad-diag-kappa10-d10,quad-diag-kappa100-d50,lsq-kappa1e2-500x50,logreg-dense-scaled100-500x50,rosenbrock-2d"
)
#: steps per case: long enough for counters and schedules that go wrong after 1000 steps
DEFAULT_STEPS = 1500
#: a trajectory is round-off-dominated from the step where the envelope reaches this share of ||x - x*||
_DOMINATED = 1e-3
#: torch hyperparameter name -> ours (per rule where it differs)
_TORCH_NAMES: dict[str, tuple[str, ...]] = {
    "betas": ("beta1", "beta2"),
    "alpha": ("decay",),
    "initial_accumulator_value": ("initial_accumulator",),
}
#: torch switches that the reference's choice of method implies
_IMPLIED = {"nesterov": True, "amsgrad": True}


def parse_params(texts: Sequence[str]) -> dict[str, Any]:
    """``--param`` texts to a dict; ``betas=(0.9,0.999)`` and ``betas=[0.9,0.999]`` as tuples."""
    from benchsuite.rulespec import parse_param

    out: dict[str, Any] = {}
    for text in texts:
        name, sep, raw = str(text).partition("=")
        raw = raw.strip()
        if raw[:1] in "([" and raw[-1:] in ")]" and len(raw) >= 2:
            raw = raw[1:-1]
        k, v = parse_param(f"{name}{sep}{raw}")
        if k in out:
            raise UserError(f"--param {text!r}: {k} given twice")
        out[k] = v
    return out


def map_hyperparams(
    reference: str, candidate_hp: Mapping[str, Any], convention: str = "paper"
) -> tuple[dict[str, Any], tuple[str, ...]]:
    """The reference's hyperparameters for a candidate using ``candidate_hp``; and what was ignored.

    Raises UserError for a candidate hyperparameter that is on and has no counterpart.
    """
    from benchsuite.rules import BUILTIN_RULES

    cls = BUILTIN_RULES[reference]
    accepted = cls.defaults()
    hp = dict(accepted)
    if convention == "torch":
        hp.update(cls.torch_preset)
    ignored = []
    for name, value in sorted(candidate_hp.items()):
        if name in _TORCH_NAMES and all(n in accepted for n in _TORCH_NAMES[name]):
            names = _TORCH_NAMES[name]
            values = tuple(value) if isinstance(value, (tuple, list)) else (value,)
            if len(values) != len(names):
                raise UserError(f"hyperparameter {name}={value!r}: expected {len(names)} value(s) for {', '.join(names)}")
            hp.update(zip(names, values))
        elif name in accepted:
            if value is not None:
                hp[name] = value
        elif name in _IMPLIED and value == _IMPLIED[name] and cls.torch_class is not None:
            ignored.append(f"{name}={value!r} (implied by {reference})")
        elif value is None or value is False or (isinstance(value, (int, float)) and value == 0):
            ignored.append(f"{name}={value!r}")
        else:
            raise UserError(
                f"hyperparameter {name}={value!r} of the candidate has no counterpart in {reference} "
                f"(accepted: {', '.join(accepted)}; torch-style: {', '.join(_TORCH_NAMES)})"
            )
    return hp, tuple(ignored)


@dataclass(frozen=True)
class CaseAgreement:
    """One problem: how closely the candidate followed the reference."""

    instance: str
    steps: int  # steps compared
    conforms: bool
    first_divergence: int | None  # first step outside the allowance (None: none)
    difference: float  # ||y - x|| / ||x - x*|| at the first divergence (else the largest ratio's)
    allowance: float  # the allowance there, in the same units
    roundoff_from: int | None  # first step where the reference is round-off-dominated
    worst_ratio: float  # max over steps of difference / allowance
    error: str | None = None  # the candidate raised or went non-finite

    def describe(self) -> str:
        if self.error:
            return self.error
        if self.first_divergence is None:
            return f"agrees over {self.steps} steps (at most {self.worst_ratio:.2g} x the allowance)"
        return (f"departs at step {self.first_divergence}: relative difference {self.difference:.2e} > "
                f"allowance {self.allowance:.2e}")


@dataclass(frozen=True)
class ConformanceReport:
    """The conformance of a rule to a built-in method over several problems."""

    rule: str
    reference: str
    convention: str
    hyperparams: tuple[tuple[str, Any], ...]  # the reference's
    ignored: tuple[str, ...]
    cases: tuple[CaseAgreement, ...]

    @property
    def conforms(self) -> bool:
        return all(c.conforms for c in self.cases)

    def summary(self) -> str:
        n = len(self.cases)
        bad = [c for c in self.cases if not c.conforms]
        if not bad:
            return f"CONFORMS: {self.rule} agrees with the built-in {self.reference} on {n} of {n} problems"
        return (f"DOES NOT CONFORM: {self.rule} departs from the built-in {self.reference} on {len(bad)} of {n} "
                "problems")


def _run(problem: Any, rule: Any, steps: int, perturb: int | None) -> tuple[np.ndarray, str | None, int | None]:
    """Iterates x_1..x_steps as rows (nan after a failure), the failure and its step.

    With ``perturb`` (a seed) each gradient is multiplied by ``1 +- ulp`` per coordinate.
    """
    x = problem.initial_point().copy()
    out = np.full((steps, x.size), np.nan)
    rng = np.random.default_rng(perturb) if perturb is not None else None
    ulp = np.finfo(np.float64).eps
    k = 0
    with np.errstate(all="ignore"):
        try:
            state = rule.init(x.copy())
            for k in range(1, steps + 1):
                g = np.array(problem.grad(x), dtype=np.float64, copy=True)
                if rng is not None:
                    g *= 1.0 + ulp * rng.choice((-1.0, 1.0), size=g.shape)
                result = rule.step(x.copy(), g, state)
                if not (isinstance(result, tuple) and len(result) == 2):
                    raise TypeError("step must return a tuple (x, state)")
                x = np.array(result[0], dtype=np.float64, copy=True).reshape(x.shape)
                state = result[1]
                out[k - 1] = x.ravel()
                if not np.all(np.isfinite(x)):
                    return out, f"non-finite iterate at step {k}", k
        except Exception as exc:  # the candidate's own failure is a finding, not a crash
            return out, f"raised at step {k}: {type(exc).__name__}: {exc}", k
    return out, None, None


def compare_trajectories(
    reference: np.ndarray,
    shadows: Sequence[np.ndarray],
    candidate: np.ndarray,
    x_star: np.ndarray,
    *,
    k_factor: float | None = None,
    rtol: float = 1e-9,
    atol: float = 1e-12,
) -> tuple[int | None, float, float, int | None, float]:
    """(first divergence step, relative difference, relative allowance, round-off-dominated from, worst ratio).

    Rows are iterates 1..n. Pure: the agreement rule of the module docstring.
    """
    from benchsuite.gate import ENVELOPE_K

    k_factor = ENVELOPE_K if k_factor is None else k_factor
    dist = np.linalg.norm(reference - x_star.ravel(), axis=1)
    env = np.max([np.linalg.norm(s - reference, axis=1) for s in shadows], axis=0) if shadows else np.zeros(len(dist))
    env = np.where(np.isfinite(env), env, np.inf)
    diff = np.linalg.norm(candidate - reference, axis=1)
    diff = np.where(np.isfinite(diff), diff, np.inf)
    scale = max(float(np.linalg.norm(x_star)), 1.0)
    allowed = np.maximum(rtol * dist + atol * scale, k_factor * env)
    ratio = diff / allowed
    dominated = np.nonzero(env >= _DOMINATED * dist)[0]
    rfrom = int(dominated[0]) + 1 if dominated.size else None
    bad = np.nonzero(~(diff <= allowed))[0]
    safe = np.maximum(dist, np.finfo(np.float64).tiny)
    if bad.size:
        k = int(bad[0])
        return k + 1, float(diff[k] / safe[k]), float(allowed[k] / safe[k]), rfrom, float(np.max(ratio[np.isfinite(ratio)], initial=0.0))
    worst = float(np.max(ratio)) if ratio.size else 0.0
    return None, 0.0, 0.0, rfrom, worst


def _torch_style(candidate_params: Mapping[str, Any], obj: Any) -> bool:
    from benchsuite.rulespec import _is_torch_optimizer

    return any(k in _TORCH_NAMES for k in candidate_params) or _is_torch_optimizer(obj)


def check_conformance(
    rule: str,
    reference: str,
    params: Mapping[str, Any] | None = None,
    *,
    problems: str | None = None,
    steps: int = DEFAULT_STEPS,
    convention: str | None = None,
    catalogue: Sequence[str] = (),
) -> ConformanceReport:
    """Run ``rule`` and the built-in ``reference`` side by side on each problem (see the module docstring)."""
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.optimum import certified_optimum
    from benchsuite.rules import BUILTIN_RULES
    from benchsuite.rulespec import RuleSpec, build_rule, is_import_path, load_object, parse_rule

    if reference not in BUILTIN_RULES:
        raise UserError(f"--as {reference!r}: not a built-in rule (built-in: {', '.join(BUILTIN_RULES)})")
    if steps < 1:
        raise UserError(f"--steps: must be >= 1, got {steps}")
    if convention not in (None, "paper", "torch"):
        raise UserError(f"--convention: {convention!r} is not one of paper, torch")
    params = dict(params or {})
    spec = parse_rule(rule, params)
    obj = load_object(rule, what="rule") if is_import_path(rule) else None
    conv = convention or ("torch" if _torch_style(params, obj) else "paper")
    instances = select(load_catalogue(list(catalogue) or None), problems or DEFAULT_PROBLEMS, None, validate=True)
    if not instances:
        raise UserError(f"--problems: {problems!r} selects no problem")
    cases = []
    ref_hp: dict[str, Any] = {}
    ignored: tuple[str, ...] = ()
    for inst in instances:
        problem = inst.build()
        constants = problem.constants()
        cand = build_rule(spec, constants, dtype=problem.dtype)
        ref_hp, ignored = map_hyperparams(reference, cand.hyperparams, conv)
        ref = build_rule(RuleSpec(reference, tuple(sorted((k, v) for k, v in ref_hp.items()))), constants, dtype=problem.dtype)
        x_star = np.asarray(certified_optimum(inst, problem=problem).x_star, dtype=np.float64)
        xs, _, ref_stop = _run(problem, ref.rule, steps, None)
        n = steps if ref_stop is None else ref_stop - 1  # the reference itself failed: compare up to there
        shadows = [_run(problem, ref.rule, n, seed)[0] for seed in (1, 2)]
        ys, cand_err, cand_stop = _run(problem, cand.rule, n, None)
        first, diff, allow, rfrom, worst = compare_trajectories(xs[:n], shadows, ys[:n], x_star)
        err = None
        if cand_err is not None:
            err = f"the candidate {cand_err}"
            first = cand_stop if first is None else min(first, cand_stop)
        cases.append(CaseAgreement(
            instance=inst.name, steps=n, conforms=first is None and err is None, first_divergence=first,
            difference=diff, allowance=allow, roundoff_from=rfrom, worst_ratio=worst, error=err,
        ))
    return ConformanceReport(
        rule=spec.label, reference=reference, convention=conv,
        hyperparams=tuple(sorted(ref_hp.items())), ignored=ignored, cases=tuple(cases),
    )


def conformance_table(report: ConformanceReport) -> str:
    """Terminal text: the reference's hyperparameters, one row per problem, the verdict."""
    from benchsuite.report import table

    hp = ", ".join(f"{k}={v!r}" for k, v in report.hyperparams)
    head = [f"conformance: {report.rule} against the built-in {report.reference}({hp}), {report.convention} convention"]
    if report.ignored:
        head.append(f"ignored (off, no counterpart): {', '.join(report.ignored)}")
    rows = [
        ("agrees" if c.conforms else "DEPARTS", c.instance, c.steps,
         "-" if c.first_divergence is None else c.first_divergence,
         "-" if c.roundoff_from is None else c.roundoff_from, c.describe())
        for c in report.cases
    ]
    body = table(("verdict", "instance", "steps", "first departure", "round-off from", "detail"), rows)
    return "\n".join([*head, body, report.summary()])


def conformance_json(report: ConformanceReport) -> str:
    import json

    def num(v: float) -> float | None:
        return v if math.isfinite(v) else None

    doc = {
        "conforms": report.conforms,
        "summary": report.summary(),
        "rule": report.rule,
        "reference": report.reference,
        "convention": report.convention,
        "hyperparams": {k: list(v) if isinstance(v, tuple) else v for k, v in report.hyperparams},
        "ignored": list(report.ignored),
        "cases": [
            {
                "instance": c.instance, "steps": c.steps, "conforms": c.conforms,
                "first_divergence": c.first_divergence, "difference": num(c.difference),
                "allowance": num(c.allowance), "roundoff_from": c.roundoff_from,
                "worst_ratio": num(c.worst_ratio), "error": c.error,
            }
            for c in report.cases
        ],
    }
    return json.dumps(doc, indent=2, sort_keys=True) + "\n"
