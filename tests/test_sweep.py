"""Tests of benchsuite.sweep: grid parsing and the selection rule."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest

from benchsuite.errors import UserError
from benchsuite.sweep import parse_sweep, rank_key, select_best, selection_table


def test_log_grid() -> None:
    s = parse_sweep("lr=1e-4:1:9")
    assert s.name == "lr" and len(s.values) == 9
    # endpoints exact, ratio constant (10^0.5) up to float64 round-off
    assert s.values[0] == pytest.approx(1e-4, rel=1e-15) and s.values[-1] == pytest.approx(1.0, rel=1e-15)
    np.testing.assert_allclose(np.diff(np.log10(s.values)), 0.5, rtol=1e-12)
    assert parse_sweep("momentum=0.5,0.9").values == (0.5, 0.9)


@pytest.mark.parametrize("bad", ["lr", "lr=", "lr=1e-4:1", "lr=0:1:3", "lr=a:1:3", "lr=1e-4:1:x", "1lr=1:2:3",
                                 "lr=1e-4:1:0", "lr=1e-4:1:1000", "lr=1,1", "lr=inf,1", "lr=1:2:1"])
def test_malformed_sweeps_are_user_errors(bad: str) -> None:
    with pytest.raises(UserError, match="--sweep"):
        parse_sweep(bad)


@dataclass
class _O:
    iters: tuple


@dataclass
class _R:
    status: str
    outcomes: tuple


def test_selection_rule() -> None:
    fast = _R("reached", (_O((3, 10)),))
    slow = _R("reached", (_O((2, 20)),))
    part = _R("partial", (_O((1, None)),))
    div = _R("diverged", (_O((1, 5)),))
    assert select_best([(slow, 0.1), (fast, 0.2), (part, 0.3), (div, 0.4)])[1] == 0.2
    # tie on everything but the value -> the smaller value
    assert select_best([(_R("reached", (_O((3, 10)),)), 0.5), (fast, 0.2)])[1] == 0.2
    # more targets reached beats fewer iterations to a looser target
    assert select_best([(part, 0.1), (slow, 0.9)])[1] == 0.9
    # stochastic: a target counts only when every seed reached it; iterations are the median
    st = _R("partial", (_O((1, 10)), _O((1, None)), _O((1, 12))))
    assert rank_key(st, 1.0) == (0, -1, 1.0, 1.0)
    assert selection_table([{"instance": "a", "rule": "gd", "param": "lr", "value": 0.5}]) == {("a", "gd"): {"lr": 0.5}}
