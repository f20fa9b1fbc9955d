"""Tests of benchsuite.timing: how many replays a measurement takes (a fake clock, no real timing)."""

from __future__ import annotations

import itertools

import pytest

import benchsuite.timing as timing
from benchsuite.catalogue import load_catalogue
from benchsuite.cases import Case
from benchsuite.rulespec import parse_rule


@pytest.fixture(scope="module")
def case() -> Case:
    return Case(load_catalogue()["quad-diag-kappa10-d10"], parse_rule("gd"))


def _fake(monkeypatch: pytest.MonkeyPatch, seconds) -> list[int]:
    """Replace the timed run by one returning the next of ``seconds`` (scaled per checkpoint)."""
    calls = []
    it = iter(seconds)

    def once(rule, grad, x, checkpoints, clock=None):
        t = next(it)
        calls.append(1)
        return [t * k / checkpoints[-1] for k in checkpoints]

    monkeypatch.setattr(timing, "_replay_once", once)
    return calls


def test_a_long_settled_replay_is_measured_twice(monkeypatch, case) -> None:
    calls = _fake(monkeypatch, itertools.repeat(0.1))
    runs = timing.replay_times(case, {}, 0, [5, 10], repeats=5)
    assert len(runs) == len(calls) == 2 and runs[0] == [0.05, 0.1]


def test_a_short_replay_repeats_until_the_total_passes_20_ms(monkeypatch, case) -> None:
    calls = _fake(monkeypatch, itertools.repeat(0.001))
    timing.replay_times(case, {}, 0, [10], repeats=5)
    assert len(calls) == 20  # 20 x 1 ms: the settled spread lets it stop as soon as the total is reached


def test_a_noisy_replay_takes_the_full_count(monkeypatch, case) -> None:
    calls = _fake(monkeypatch, itertools.cycle([0.1, 0.2, 0.13]))  # interquartile range far above 5 %
    timing.replay_times(case, {}, 0, [10], repeats=5)
    assert len(calls) == 5


def test_a_medium_settled_replay_stops_at_three(monkeypatch, case) -> None:
    calls = _fake(monkeypatch, itertools.repeat(0.01))
    timing.replay_times(case, {}, 0, [10], repeats=5)
    assert len(calls) == 3


def test_quartiles() -> None:
    assert timing.quartiles([2.0]) == (2.0, 0.0)
    med, iqr = timing.quartiles([1.0, 2.0, 3.0, 4.0, 5.0])
    assert med == 3.0 and iqr == 2.0  # inclusive quartiles 2 and 4
