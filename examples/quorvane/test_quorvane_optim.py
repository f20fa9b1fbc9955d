"""Quorvane's own tests of its optimizer, through the benchsuite pytest plugin.

``pytest test_quorvane_optim.py`` here, or ``pytest examples/quorvane/test_quorvane_optim.py``
from the top: the helpers take ``baseline.json`` and ``problems.toml`` relative to this file.
"""

from benchsuite.pytest_plugin import assert_converges, assert_meets_baseline


def test_quorvane_adam_converges_on_quadratics():
    assert_converges("quorvane_optim:QuorvaneAdam", problems="quad-diag-*", params={"lr": 0.1})


def test_quorvane_adam_meets_the_committed_baseline():
    assert_meets_baseline("quorvane_optim:QuorvaneAdam", "baseline.json", catalogue=["problems.toml"])
