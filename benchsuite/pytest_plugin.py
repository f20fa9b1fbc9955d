"""pytest integration: one-line convergence and baseline checks in a user's tests.

Registered through the ``pytest11`` entry point, so installing benchsuite is
enough. In a test file::

    from benchsuite.pytest_plugin import assert_converges, assert_meets_baseline

    def test_my_adam_converges():
        assert_converges("mypkg.optim:MyAdam", problems="quad-*", params={"lr": 0.05})

    def test_my_adam_meets_the_baseline():
        assert_meets_baseline("mypkg.optim:MyAdam", "results/baselines/my-adam.json")

or through the ``benchsuite`` fixture (``benchsuite.converges(...)``,
``benchsuite.meets_baseline(...)``). A failure raises ``AssertionError`` whose
message lists each failing case and why.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest

__all__ = ["assert_conforms", "assert_converges", "assert_meets_baseline", "benchsuite"]


def _fmt_iters(targets: Sequence[float], iters: Sequence[int | None]) -> str:
    return ", ".join(f"{t:.0e} at {'-' if k is None else k}" for t, k in zip(targets, iters))


def assert_converges(
    rule: str,
    problems: str | None = None,
    params: Mapping[str, Any] | None = None,
    *,
    tier: str | None = "small",
    batch: int | None = None,
    seeds: int = 1,
    jobs: int | None = 1,
    catalogue: Sequence[str | Path] = (),
) -> list[Any]:
    """Fail unless ``rule`` reaches every target of every selected problem within budget.

    ``problems`` is a catalogue selector (names or globs, comma-separated);
    returns the runner's results when all cases reached all targets.
    """
    __tracebackhide__ = True
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.errors import UserError
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases

    spec = parse_rule(rule, dict(params or {}))
    instances = select(load_catalogue(list(catalogue) or None), problems, tier, validate=True)
    if not instances:
        raise UserError(f"assert_converges: selector {problems!r} chose no problem")
    oracle = "full" if batch is None else "minibatch"
    cases = [Case(instance=i, rule=spec, oracle=oracle, batch=batch, seeds=tuple(range(seeds))) for i in instances]
    results = run_cases(cases, jobs=jobs, timing=False, progress=False)
    lines = []
    for r in results:
        if r.status == "reached":
            continue
        targets = r.case.targets or r.case.instance.targets
        for o in r.outcomes:
            if o.status == "reached":
                continue
            why = f"{o.status} after {o.iterations_run} iterations"
            if o.error:
                why += f" ({(o.error.strip().splitlines() or [''])[-1]})"
            lines.append(
                f"  {r.case.instance.name} seed {o.seed}: {why}; targets: {_fmt_iters(targets, o.iters)}; "
                f"final measure {o.final_measure:.3g}"
            )
    if lines:
        raise AssertionError(
            f"{spec.label} did not converge on {len(lines)} of {sum(len(r.outcomes) for r in results)} case(s):\n"
            + "\n".join(lines)
        )
    return results


def assert_meets_baseline(
    rule: str,
    baseline: str | Path,
    params: Mapping[str, Any] | None = None,
    *,
    slack_iters: int = 1,
    slack_rel: float = 0.01,
    noise_factor: float = 1.0,
    exact: bool = False,
    jobs: int | None = 1,
    catalogue: Sequence[str | Path] = (),
) -> Any:
    """Fail unless ``rule`` passes the merge gate against the ``baseline`` file.

    ``params`` override recorded hyperparameters; the slack options are those
    of ``benchsuite gate``. Returns the :class:`~benchsuite.gate.GateReport`.
    """
    __tracebackhide__ = True
    from benchsuite.baseline import load_baseline
    from benchsuite.gate import GateConfig, run_gate

    config = GateConfig(slack_iters=slack_iters, slack_rel=slack_rel, noise_factor=noise_factor, exact=exact)
    report = run_gate(load_baseline(baseline), rule, dict(params or {}), config=config, jobs=jobs,
                      catalogue_paths=catalogue)
    if not report.passed:
        lines = [f"  {v.key}: {'; '.join(v.reasons)}" for v in report.failures]
        raise AssertionError(f"{rule} against {baseline}: {report.summary()}\n" + "\n".join(lines))
    return report


@pytest.fixture
def benchsuite() -> SimpleNamespace:
    """``benchsuite.converges(...)`` and ``benchsuite.meets_baseline(...)`` (see the module docstring)."""
    return SimpleNamespace(converges=assert_converges, meets_baseline=assert_meets_baseline)



def assert_conforms(
    rule: str,
    method: str,
    params: Mapping[str, Any] | None = None,
    *,
    problems: str | None = None,
    steps: int | None = None,
    convention: str | None = None,
    catalogue: Sequence[str | Path] = (),
) -> Any:
    """Fail unless ``rule`` follows the built-in ``method`` step by step within its round-off envelope.

    ``params`` are the rule's hyperparameters in its own names (torch-style
    ``betas=(0.9, 0.999)`` is mapped); see :mod:`benchsuite.conformance`.
    Returns the :class:`~benchsuite.conformance.ConformanceReport`.
    """
    __tracebackhide__ = True
    from benchsuite.conformance import DEFAULT_STEPS, check_conformance

    report = check_conformance(rule, method, dict(params or {}), problems=problems,
                               steps=DEFAULT_STEPS if steps is None else steps, convention=convention,
                               catalogue=[str(c) for c in catalogue])
    if not report.conforms:
        lines = [f"  {c.instance}: {c.describe()}" for c in report.cases if not c.conforms]
        raise AssertionError(report.summary() + "\n" + "\n".join(lines))
    return report
