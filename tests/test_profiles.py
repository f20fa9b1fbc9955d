"""Performance and data profiles against answers worked out by hand from their definitions.

Definitions: Dolan & Moré, "Benchmarking optimization software with performance
profiles", Math. Program. 91 (2002) -- ratio to the best solver per problem,
failures as infinity; Moré & Wild, "Benchmarking derivative-free optimization
algorithms", SIAM J. Optim. 20 (2009) -- budget in units of (n_p + 1) evaluations.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from benchsuite.profiles import (
    cost_matrices,
    data_profile,
    performance_profile,
    performance_ratios,
    profile_breaks,
    timed,
)

INF = math.inf
# 4 problems x 3 solvers; problem 3 is solved by nobody, solver 2 fails on three problems
T = np.array([
    [1.0, 2.0, INF],
    [4.0, 2.0, 8.0],
    [3.0, INF, np.nan],  # nan is a failure too
    [INF, INF, INF],
])


def test_ratios_by_hand() -> None:
    r = performance_ratios(T)
    expected = np.array([[1, 2, INF], [2, 1, 4], [1, INF, INF], [INF, INF, INF]], dtype=float)
    assert np.array_equal(r, expected)  # exact: small integers divided by small integers


def test_performance_profile_by_hand() -> None:
    rho = performance_profile(T, [1.0, 2.0, 4.0, 1e9])
    # tau = 1: solver 0 best on p0, p2; solver 1 on p1; solver 2 nowhere. n_p = 4 (p3 counts against all)
    expected = np.array([
        [2 / 4, 3 / 4, 3 / 4, 3 / 4],
        [1 / 4, 2 / 4, 2 / 4, 2 / 4],
        [0, 0, 1 / 4, 1 / 4],
    ])
    assert np.array_equal(rho, expected)
    assert np.array_equal(profile_breaks(performance_ratios(T)), [1.0, 2.0, 4.0])


def test_data_profile_by_hand() -> None:
    dims = [1, 3, 1, 2]  # (d + 1) = 2, 4, 2, 3
    # scaled costs: p0 [0.5, 1, inf]; p1 [1, 0.5, 2]; p2 [1.5, inf, inf]; p3 [inf]*3
    d = data_profile(T, dims, [0.25, 0.5, 1.0, 2.0])
    expected = np.array([
        [0, 1 / 4, 2 / 4, 3 / 4],
        [0, 1 / 4, 2 / 4, 2 / 4],
        [0, 0, 0, 1 / 4],
    ])
    assert np.array_equal(d, expected)


def test_bad_input_refused() -> None:
    with pytest.raises(ValueError, match="2-D"):
        performance_ratios(np.ones(3))
    with pytest.raises(ValueError, match="> 0"):
        performance_ratios(np.array([[0.0, 1.0]]))
    with pytest.raises(ValueError, match="dims"):
        data_profile(np.ones((2, 2)), [1], [1.0])


@settings(max_examples=60, deadline=None)
@given(arrays(float, st.tuples(st.integers(1, 6), st.integers(1, 4)),
              elements=st.one_of(st.floats(1.0, 1e6), st.just(INF))))
def test_profile_laws(t: np.ndarray) -> None:
    """Laws from the definition: monotone in tau, in [0, 1], at tau = 1 the best solvers of each
    solved problem are counted (so the column sums at tau = 1 are >= the solved fraction), and the
    limit is the fraction each solver solves."""
    taus = np.array([1.0, 1.5, 3.0, 1e12])
    rho = performance_profile(t, taus)
    assert np.all(np.diff(rho, axis=1) >= 0) and np.all((rho >= 0) & (rho <= 1))
    solved_by_someone = np.isfinite(t).any(axis=1).mean()
    assert rho[:, 0].sum() >= solved_by_someone - 1e-12  # ties count every best solver
    assert np.allclose(rho[:, -1], np.isfinite(t).mean(axis=0))  # 1e12 exceeds every finite ratio here (<= 1e6)


def _rows(instance: str, rule: str, seeds: list[int | None], target: float = 1e-4,
          times: list[float | None] | None = None, **extra: object) -> list[dict]:
    out = []
    for i, k in enumerate(seeds):
        out.append({"case": f"{instance}|{rule}", "instance": instance, "rule": rule, "oracle": "full",
                    "batch": None, "replace": None, "measure": "subopt", "budget": 100, "seed": i,
                    "target": target, "iterations": k, "grad_calls": k,
                    "time_to_target": None if times is None else times[i], "selected": None, **extra})
    return out


def test_cost_matrices_medians_failures_and_sweeps() -> None:
    rows = (
        _rows("a", "gd", [10], times=[0.5])
        + _rows("a", "heavy", [4], times=[0.4])
        + _rows("b", "gd", [7, None, 9])      # median of 7, inf, 9 = 9
        + _rows("b", "heavy", [3, None, None])  # median of 3, inf, inf = inf: fails the problem
        + _rows("b", "gd", [1], selected=False)  # a sweep point the selection dropped
        + _rows("a", "gd", [20], target=1e-6)
    )
    frame = pd.DataFrame(rows)
    loose, tight = cost_matrices(frame, "iterations", dims={"a": 2, "b": 5})
    assert loose.target == 1e-4 and tight.target == 1e-6  # loosest first
    assert loose.problems == ("a", "b") and loose.rules == ("gd", "heavy")
    assert np.array_equal(loose.costs, np.array([[10, 4], [9, INF]]))
    assert loose.dims == (2, 5)
    assert tight.problems == ("a",) and np.array_equal(tight.costs, [[20.0]])
    times = cost_matrices(frame, "time")[0]
    assert np.array_equal(times.costs[0], [0.5, 0.4]) and timed(times)
    assert not np.isfinite(times.costs[1]).any()  # b was not timed: read as failures
    with pytest.raises(ValueError, match="metric"):
        cost_matrices(frame, "flops")
