"""Speed-up comparison: the interval statistics on synthetic timings, then real runs.

The real-run checks are checks of the statistics, not timed tests: they assert
that an interval covers a ratio measured independently in the same test, or
that an A/A interval is not called significant, with enough replay pairs that a
loaded 2-core machine (whose noise hits both sides of an interleaved pair
alike) does not decide the outcome.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchsuite.compare import overall_interval, ratio_interval


def synthetic_pairs(rng: np.random.Generator, ratio: float, n: int, drift: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Replay times with machine drift shared within a pair, lognormal noise, and rare spikes."""
    base = 1e-3 * (1 + (0.5 * np.sin(np.arange(n) / 3.0) if drift else 0.0))
    a = base * np.exp(rng.normal(0, 0.05, n))
    b = ratio * base * np.exp(rng.normal(0, 0.05, n))
    spikes = rng.random(n) < 0.05  # a busy machine slows the odd replay (of either side) a lot
    a[spikes & (rng.random(n) < 0.5)] *= 3.0
    b[spikes & (rng.random(n) < 0.5)] *= 3.0
    return a, b


def test_identical_samples_give_a_point_interval() -> None:
    r, (lo, hi) = ratio_interval([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    assert r == lo == hi == 1.0


def test_interval_coverage_of_a_known_ratio() -> None:
    """Over 200 synthetic data sets the 95 % interval covers the true ratio ~95 % of the time."""
    rng = np.random.default_rng(7)
    true = 1.3
    covered = 0
    for i in range(200):
        a, b = synthetic_pairs(rng, true, 21)
        _, (lo, hi) = ratio_interval(a, b, seed=i, n_resamples=999)
        covered += lo <= true <= hi
    # binomial(200, 0.95) has sd 3.1 covered sets; bootstrap intervals from 21
    # pairs undercover slightly. 176 = 88 % allows both without letting a
    # broken interval (e.g. one centred on the wrong statistic) through.
    assert covered >= 176, covered


def test_aa_false_positive_rate() -> None:
    """A/A (ratio 1): the interval excludes 1 in about 5 % of data sets."""
    rng = np.random.default_rng(11)
    signif = 0
    for i in range(200):
        a, b = synthetic_pairs(rng, 1.0, 21)
        _, (lo, hi) = ratio_interval(a, b, seed=i, n_resamples=999)
        signif += not (lo <= 1.0 <= hi)
    assert signif <= 24, signif  # 12 % (see the coverage test for the margin)


def test_trimmed_mean_resists_a_spike() -> None:
    """One replay slowed 10x moves the 10 %-trimmed estimate by nothing."""
    a = np.full(21, 1e-3)
    b = np.full(21, 1.3e-3)
    b[4] *= 10
    r, _ = ratio_interval(a, b)
    assert r == pytest.approx(1.3, rel=1e-12)  # round-off of exp(log) only


def test_overall_is_the_geometric_mean() -> None:
    pairs = [([1.0, 1.0], [2.0, 2.0]), ([1.0, 1.0], [0.5, 0.5]), ([1.0, 1.0], [1.5, 1.5])]
    r, (lo, hi) = overall_interval(pairs)
    assert r == pytest.approx((2.0 * 0.5 * 1.5) ** (1 / 3), rel=1e-12)  # round-off only
    assert lo == pytest.approx(r) and hi == pytest.approx(r)
    rng = np.random.default_rng(3)
    noisy = [synthetic_pairs(rng, 1.3, 21) for _ in range(4)]
    r, (lo, hi) = overall_interval(noisy, n_resamples=999)
    assert lo < r < hi and lo <= 1.3 <= hi


def test_fewer_than_two_pairs_is_an_error() -> None:
    with pytest.raises(ValueError):
        ratio_interval([1.0], [1.0])
    assert math.isfinite(ratio_interval([1.0, 1.1], [1.2, 1.3])[0])
