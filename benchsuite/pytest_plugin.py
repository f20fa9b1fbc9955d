"""pytest integration: one-line convergence and baseline checks in a user's tests.

Registered through the ``pytest11`` entry point, so installing benchsuite is
enough. In a test file::

    from benchsuite.pytest_plugin import assert_converges, assert_meets_baseline

    def test_my_adam_converges():
        assert_converges("mypkg.optim:MyAdam", problems="quad-*", params={"lr": 0.05})

    def test_my_adam_meets_the_baseline():
        assert_meets_baseline("mypkg.optim:MyAdam", "results/baselines/my-adam.json")

or through the ``convergence_checks`` fixture (``convergence_checks.converges(...)``,
``convergence_checks.meets_baseline(...)``).

Relative paths (the baseline file, ``catalogue=`` files) are taken relative to
the folder of the file that calls the helper -- your test file -- so
``pytest sub/test_x.py`` works from any folder; absolute paths are used as
given.

A rule that fails raises ``AssertionError`` whose message lists each failing
case and why. A configuration mistake (an unknown rule, problem or tier, a
hyperparameter the rule does not take or of the wrong kind, a missing or
malformed baseline or catalogue file) raises :class:`ConfigurationError`
before anything runs: it is a mistake in the test, not a finding about the rule.
"""

from __future__ import annotations

import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import pytest

from benchsuite.errors import UserError

__all__ = ["ConfigurationError", "assert_conforms", "assert_converges", "assert_meets_baseline", "convergence_checks"]


class ConfigurationError(UserError, pytest.UsageError):
    """A mistake in how a test calls a helper (rule, hyperparameter, problem, file): not a rule failure."""


def _caller_folder() -> Path:
    """The folder of the file that called the public helper (two frames up), else the current one."""
    try:
        name = sys._getframe(2).f_code.co_filename
    except ValueError:  # pragma: no cover - called from the top of the stack
        return Path.cwd()
    path = Path(name)
    return path.resolve().parent if path.is_file() else Path.cwd()


def _resolve(path: str | Path, base: Path) -> Path:
    p = Path(path).expanduser()
    return p if p.is_absolute() else base / p


def _fmt_iters(targets: Sequence[float], iters: Sequence[int | None]) -> str:
    return ", ".join(f"{t:.0e} at {'-' if k is None else k}" for t, k in zip(targets, iters))


def _why(o: Any, targets: Sequence[float]) -> str:
    """One failing seed: errors and timeouts say what happened, the others how far they got."""
    if o.status == "error":
        last = ((o.error or "").strip().splitlines() or ["(no message)"])[-1]
        for prefix in ("benchsuite.errors.UserError: ", "UserError: "):  # its message says it all
            last = last.removeprefix(prefix)
        return "error: " + last
    why = f"{o.status} after {o.iterations_run} iterations"
    if o.error:
        why += f" ({(o.error.strip().splitlines() or [''])[-1]})"
    if o.status == "timeout":
        return why
    return f"{why}; targets: {_fmt_iters(targets, o.iters)}; final measure {o.final_measure:.3g}"


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
    ``catalogue`` adds catalogue files (relative to the calling test file's
    folder). Returns the runner's results when all cases reached all targets.
    Raises :class:`ConfigurationError` for a mistake in the arguments.
    """
    __tracebackhide__ = True
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.rulespec import build_rule, parse_rule
    from benchsuite.runner import Case, run_cases

    base = _caller_folder()
    try:
        spec = parse_rule(rule, dict(params or {}))
        cat = load_catalogue([_resolve(c, base) for c in catalogue] or None)
        # errors name the arguments the test gave ("problems: unknown instance ..."), not --problems
        instances = select(cat, problems, tier, validate=True, option="problems", tier_option="tier")
        if not instances:
            raise UserError(f"problems={problems!r}, tier={tier!r}: chose no problem")
        first = instances[0].build()
        build_rule(spec, first.constants(), dtype=first.dtype)  # hyperparameter names, kinds, the factory
        oracle = "full" if batch is None else "minibatch"
        cases = [Case(instance=i, rule=spec, oracle=oracle, batch=batch, seeds=tuple(range(seeds))) for i in instances]
        results = run_cases(cases, jobs=jobs, timing=False, progress=False)
    except UserError as exc:
        raise ConfigurationError(f"assert_converges: {exc}") from None
    lines = []
    for r in results:
        if r.status == "reached":
            continue
        targets = r.case.targets or r.case.instance.targets
        for o in r.outcomes:
            if o.status == "reached":
                continue
            lines.append(f"  {r.case.instance.name} seed {o.seed}: {_why(o, targets)}")
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
    slack_iters: int | None = None,
    slack_rel: float = 0.01,
    noise_factor: float = 0.0,
    exact: bool = False,
    jobs: int | None = 1,
    catalogue: Sequence[str | Path] = (),
) -> Any:
    """Fail unless ``rule`` passes the merge gate against the ``baseline`` file.

    ``baseline`` and ``catalogue`` files are relative to the calling test
    file's folder. ``params`` override recorded hyperparameters; the slack
    options are those of ``benchsuite gate``. Returns the
    :class:`~benchsuite.gate.GateReport`. Raises :class:`ConfigurationError`
    for a mistake in the arguments or the files.
    """
    __tracebackhide__ = True
    from benchsuite.baseline import load_baseline
    from benchsuite.gate import GateConfig, run_gate

    base = _caller_folder()
    try:
        config = GateConfig(slack_iters=slack_iters, slack_rel=slack_rel, noise_factor=noise_factor, exact=exact)
        report = run_gate(load_baseline(_resolve(baseline, base)), rule, dict(params or {}), config=config,
                          jobs=jobs, catalogue_paths=[_resolve(c, base) for c in catalogue])
    except UserError as exc:
        raise ConfigurationError(f"assert_meets_baseline: {exc}") from None
    if not report.passed:
        lines = [f"  {v.key}: {'; '.join(v.reasons)}" for v in report.failures]
        raise AssertionError(f"{rule} against {baseline}: {report.summary()}\n" + "\n".join(lines))
    return report


@pytest.fixture
def convergence_checks() -> SimpleNamespace:
    """``convergence_checks.converges(...)`` and ``.meets_baseline(...)``: the two helpers (module docstring)."""
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
    ``catalogue`` files are relative to the calling test file's folder.
    Returns the :class:`~benchsuite.conformance.ConformanceReport`. Raises
    :class:`ConfigurationError` for a mistake in the arguments.
    """
    __tracebackhide__ = True
    from benchsuite.conformance import DEFAULT_STEPS, check_conformance

    base = _caller_folder()
    try:
        report = check_conformance(rule, method, dict(params or {}), problems=problems,
                                   steps=DEFAULT_STEPS if steps is None else steps, convention=convention,
                                   catalogue=[str(_resolve(c, base)) for c in catalogue])
    except UserError as exc:
        raise ConfigurationError(f"assert_conforms: {exc}") from None
    if not report.conforms:
        lines = [f"  {c.instance}: {c.describe()}" for c in report.cases if not c.conforms]
        raise AssertionError(report.summary() + "\n" + "\n".join(lines))
    return report
