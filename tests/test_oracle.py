"""Tests of benchsuite.oracle: seeded minibatch sampling and its counting."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchsuite.oracle import OracleSpec, Sampler, gradient_function, sampling_rng


@given(n=st.integers(1, 60), data=st.data())
@settings(max_examples=60, deadline=None)
def test_without_replacement_visits_every_row_once_per_epoch(n: int, data: st.DataObject) -> None:
    batch = data.draw(st.integers(1, n))
    s = Sampler(n, batch, replace=False, rng=sampling_rng("p", 0))
    for _ in range(3):  # three epochs
        seen = []
        while len(seen) < n:
            idx = s.next()
            assert 1 <= idx.size <= batch
            seen.extend(idx.tolist())
        assert sorted(seen) == list(range(n))
    assert s.samples == 3 * n


def test_with_replacement_draws_batch_uniform_indices() -> None:
    s = Sampler(10, 4, replace=True, rng=sampling_rng("p", 1))
    draws = np.concatenate([s.next() for _ in range(5000)])
    assert s.samples == 20000 and draws.min() >= 0 and draws.max() <= 9
    counts = np.bincount(draws, minlength=10)
    # 2000 expected per row; binomial sd ~ 42, so 6 sd = 255 (a false alarm ~1e-8)
    assert np.all(np.abs(counts - 2000) < 255)


def test_same_key_and_seed_same_indices_other_seed_other_indices() -> None:
    a = [Sampler(50, 7, False, sampling_rng("prob", 3)).next() for _ in range(2)]
    assert np.array_equal(a[0], a[1])
    b = Sampler(50, 7, False, sampling_rng("prob", 4)).next()
    c = Sampler(50, 7, False, sampling_rng("other", 3)).next()
    assert not np.array_equal(a[0], b) and not np.array_equal(a[0], c)


def test_spec_validation() -> None:
    with pytest.raises(ValueError):
        OracleSpec("minibatch", batch=0)
    with pytest.raises(ValueError):
        OracleSpec("stochastic")
    with pytest.raises(ValueError, match="exceeds"):
        OracleSpec("minibatch", batch=11).check(10)
    with pytest.raises(ValueError, match="finite-sum"):
        OracleSpec("minibatch", batch=1).check(None)


class _Mean:
    """A tiny finite sum f(x) = (1/n) sum_i 1/2 ||x - a_i||^2 (for the oracle only)."""

    n_samples = 8

    def __init__(self) -> None:
        self.a = np.arange(16.0).reshape(8, 2)

    def grad(self, x):
        return x - self.a.mean(axis=0)

    def minibatch_grad(self, x, idx, out=None):
        return x - self.a[idx].mean(axis=0)


def test_gradient_function_full_is_the_bound_method_and_minibatch_counts() -> None:
    p = _Mean()
    g, s = gradient_function(p, OracleSpec(), "k", 0)
    assert s is None and g == p.grad
    g, s = gradient_function(p, OracleSpec("minibatch", batch=8, replace=False), "k", 0)
    x = np.zeros(2)
    # a full epoch without replacement is the full gradient (same rows, other order): round-off only
    np.testing.assert_allclose(g(x), p.grad(x), rtol=1e-15)
    assert s is not None and s.samples == 8
