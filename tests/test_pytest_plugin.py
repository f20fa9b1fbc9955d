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

        def test_fixture(convergence_checks):
            convergence_checks.meets_baseline("adam", "baseline.json", exact=True)
            convergence_checks.converges("adam", problems="quad-diag-kappa10-d10", params={"lr": 0.1})
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
    res.stdout.fnmatch_lines(["*ConfigurationError: assert_meets_baseline: */nope.json: baseline file not found*"])


def test_the_readme_example_test_file_passes() -> None:
    """examples/quorvane/test_quorvane_optim.py, run from the example's folder as its team would."""
    import subprocess
    import sys

    quorvane = REPO / "examples" / "quorvane"
    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "test_quorvane_optim.py"],
        cwd=quorvane, capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    assert "2 passed" in proc.stdout


def test_the_example_runs_from_the_repository_root_too() -> None:
    """`pytest examples/quorvane/test_quorvane_optim.py` from elsewhere: paths follow the test file."""
    import subprocess
    import sys

    proc = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "examples/quorvane/test_quorvane_optim.py"],
        cwd=REPO, capture_output=True, text=True, timeout=300,
    )
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    assert "2 passed" in proc.stdout


def test_relative_paths_follow_the_calling_test_file(user: pytest.Pytester) -> None:
    spec = parse_rule("adam", {"lr": 0.1})
    cases = [Case(instance=i, rule=spec) for i in select(load_catalogue(), "quad-diag-kappa10-d10")]
    sub = user.mkpydir("sub")
    (sub / "__init__.py").unlink()  # a plain folder of tests, as most projects have
    write_baseline(make_baseline(run_cases(cases, jobs=1, timing=False, progress=False), rule_label=spec.label),
                   sub / "baseline.json")
    (sub / "extra.toml").write_text(
        '[[instance]]\nname = "quad-extra"\nfamily = "quadratic"\ntargets = [1e-2]\nbudget = 500\n'
        "[instance.params]\nd = 4\nL = 1.0\nmu = 0.5\n"
    )
    absolute = sub / "baseline.json"
    (sub / "test_x.py").write_text(
        "from benchsuite.pytest_plugin import assert_converges, assert_meets_baseline\n\n"
        "def test_relative():\n"
        '    assert_meets_baseline("adam", "baseline.json")\n'
        '    assert_converges("adam", problems="quad-extra", params={"lr": 0.1}, catalogue=["extra.toml"])\n\n'
        "def test_absolute():\n"
        f"    assert_meets_baseline('adam', {str(absolute)!r})\n"
    )
    res = user.runpytest("-q", "sub/test_x.py")  # from the project root, not from sub/
    res.assert_outcomes(passed=2)


CONFIG_MISTAKES = [
    # (the call, what the one-line message must say)
    ('assert_converges("no_such_rule", problems="quad-diag-kappa10-d10")', "unknown rule 'no_such_rule'"),
    ('assert_converges("teamrules:TextbookAdam", problems="quad-diag-kappa10-d10", params={"lrr": 0.1})',
     "unknown hyperparameter(s) lrr"),
    ('assert_converges("userrules:NumpyAdam", problems="quad-diag-kappa10-d10", params={"lr": "fast"})',
     "hyperparameter lr must be a number like its default 0.001, got 'fast'"),
    ('assert_converges("adam", problems="quad-diag-kappa10-d1")',
     "assert_converges: problems: unknown instance 'quad-diag-kappa10-d1'; close matches: quad-diag-kappa10-d10"),
    ('assert_converges("adam", problems="quad-*", tier="tiny")', "assert_converges: tier: unknown tier 'tiny'"),
    ('assert_converges("adam", problems="mgh-beal*", tier="large")',
     "assert_converges: problems: 'mgh-beal*' matches no instance of tier 'large'"),
    ('assert_converges("adam", problems="quad-diag-kappa10-d10", catalogue=["missing.toml"])',
     "missing.toml: catalogue file or folder not found"),
    ('assert_meets_baseline("adam", "nope.json")', "nope.json: baseline file not found"),
    ('assert_meets_baseline("adam", "junk.json")', "junk.json"),
]


@pytest.mark.parametrize(("call", "says"), CONFIG_MISTAKES)
def test_configuration_mistakes_are_usage_errors_not_convergence_failures(
    user: pytest.Pytester, call: str, says: str
) -> None:
    shutil.copy(TESTS / "user_rules.py", user.path / "userrules.py")
    (user.path / "junk.json").write_text("{not json")
    user.makepyfile(test_user=f"""
        import pytest
        from benchsuite.errors import UserError
        from benchsuite.pytest_plugin import ConfigurationError, assert_converges, assert_meets_baseline

        def test_mistake():
            with pytest.raises(ConfigurationError) as info:
                {call}
            assert isinstance(info.value, pytest.UsageError) and isinstance(info.value, UserError)
            print("MESSAGE:", info.value)
    """)
    res = user.runpytest("-q", "-s")
    res.assert_outcomes(passed=1)
    [line] = [ln for ln in res.stdout.lines if ln.startswith("MESSAGE:")]
    assert says in line
    assert "--problems" not in line and "did not converge" not in line and "final measure" not in line


def test_a_rule_that_raises_is_reported_as_an_error_not_as_a_measure(user: pytest.Pytester) -> None:
    shutil.copy(TESTS / "user_rules.py", user.path / "userrules.py")
    user.makepyfile(test_user="""
        from benchsuite.pytest_plugin import assert_converges

        def test_wrong_shape():
            assert_converges("userrules:WrongShape", problems="quad-diag-kappa10-d10")
    """)
    res = user.runpytest("-q")
    res.assert_outcomes(failed=1)
    res.stdout.fnmatch_lines([
        "*userrules:WrongShape did not converge on 1 of 1 case(s):*",
        "*quad-diag-kappa10-d10 seed 0: error: rule userrules:WrongShape: step returned x of shape (9,), expected (10,)",
    ])
    assert "final measure nan" not in res.stdout.str()
