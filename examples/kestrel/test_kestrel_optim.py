"""Kestrel's own tests of its optimizer, through the benchsuite pytest plugin.

Run from examples/kestrel: ``pytest test_kestrel_optim.py``.
"""

from benchsuite.pytest_plugin import assert_converges, assert_meets_baseline


def test_kestrel_adam_converges_on_quadratics():
    assert_converges("kestrel_optim:KestrelAdam", problems="quad-diag-*", params={"lr": 0.1})


def test_kestrel_adam_meets_the_committed_baseline():
    assert_meets_baseline("kestrel_optim:KestrelAdam", "baseline.json", catalogue=["problems.toml"])
