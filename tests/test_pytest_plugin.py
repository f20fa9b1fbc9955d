"""The pytest plugin in a user's own test suite (run through pytester)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

# Imported here, before any in-process pytester run: pytester removes modules
# first imported during an inner run, and numpy cannot be imported twice.
from benchsuite.baseline import make_baseline, write_baseline
from benchsuite.catalogue import load_catalogue, select
from benchsuite.rulespec import parse_rule
from benchsuite.runner import Case, run_cases

pytest_plugins = ["pytester"]

REPO = Path(__file__).resolve().parents[1]


def warm_reference(dest: Path) -> None:
    """Copy the committed reference cache (certified optima) into a scratch project, if there is one."""
    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", dest)
TESTS = REPO / "tests"


@pytest.fixture
def user(pytester: pytest.Pytester) -> pytest.Pytester:
    """A user's project folder: the committed reference cache, and our broken rules importable."""
    warm_reference(pytester.path / "results" / "reference")
    shutil.copy(TESTS / "broken_rules.py", pytester.path / "teamrules.py")
    pytester.syspathinsert()
    return pytester


def test_assert_converges_passes_and_fails_with_reasons(user: pytest.Pytester) -> None:
    user.makepyfile(
        test_user="""
        from benchsuite.pytest_plugin import assert_converges

        def test_good():
            assert_converges("teamrules:TextbookAdam", problems="quad-diag-kappa10-d10", params={"lr": 0.1})

        def test_too_small_a_step():
            assert_converges("adam", problems="quad-diag-kappa10-d10,quad-diag-kappa100-d50", params={"lr": 1e-4})
        """
    )
    res = user.runpytest("-q")
    res.assert_outcomes(passed=1, failed=1)
    res.stdout.fnmatch_lines([
        "*adam(lr=0.0001) did not converge on 2 of 2 case(s):*",
        "*quad-diag-kappa10-d10 seed 0: budget after 1000 iterations; targets: 1e-02 at -*",
        "*quad-diag-kappa100-d50 seed 0: budget after 5000 iterations*",
    ])


def test_assert_meets_baseline_and_the_fixture(user: pytest.Pytester) -> None:
    spec = parse_rule("adam", {"lr": 0.1})
    cases = [Case(instance=i, rule=spec) for i in select(load_catalogue(), "quad-diag-kappa10-d10,quad-diag-kappa100-d50")]
    write_baseline(make_baseline(run_cases(cases, jobs=1, timing=False, progress=False), rule_label=spec.label),
                   user.path / "baseline.json")
    user.makepyfile(
        test_user="""
        from benchsuite.pytest_plugin import assert_meets_baseline

        def test_textbook_copy_meets_it():
            assert_meets_baseline("teamrules:TextbookAdam", "baseline.json")

        def test_broken_copy_does_not():
            assert_meets_baseline("teamrules:AdamLrSquared", "baseline.json")

        def test_fixture(benchsuite):
            benchsuite.meets_baseline("adam", "baseline.json", exact=True)
            benchsuite.converges("adam", problems="quad-diag-kappa10-d10", params={"lr": 0.1})
        """
    )
    res = user.runpytest("-q")
    res.assert_outcomes(passed=2, failed=1)
    res.stdout.fnmatch_lines([
        "*teamrules:AdamLrSquared against baseline.json: FAIL: 0 of 2 cases pass, 2 fail*",
        "*quad-diag-kappa10-d10 | adam(lr=0.1) | full | seeds=0: target 1e-02: 161 iterations vs baseline 32*",
    ])


def test_bad_baseline_path_is_one_clear_line(user: pytest.Pytester) -> None:
    user.makepyfile(
        test_user="""
        from benchsuite.pytest_plugin import assert_meets_baseline

        def test_missing():
            assert_meets_baseline("adam", "nope.json")
        """
    )
    res = user.runpytest("-q")
    res.assert_outcomes(failed=1)
    res.stdout.fnmatch_lines(["*UserError: nope.json: baseline file not found*"])


def test_the_readme_example_test_file_passes() -> None:
    """examples/kestrel/test_kestrel_optim.py, run from the example's folder as its team would."""
    import subprocess
    import sys

    kestrel = REPO / "examples" / "kestrel"
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "test_kestrel_optim.py"],
        cwd=kestrel, capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    assert "2 passed" in proc.stdout
