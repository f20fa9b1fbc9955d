"""The timing replay: wall time to each target, measured without the monitoring.

Once the monitored pass has found ``k`` for a target, the same steps are
replayed with the same seed and no objective evaluations -- gradient and step
only, in a tight loop -- timed with ``time.perf_counter``. Each replay runs
only as far as the tightest target the pass reached (``_UNREACHED_REPLAY``
steps when it reached none). Replays are repeated: at least ``MIN_REPEATS``
(``MIN_REPEATS_LONG`` when one replay takes ``_LONG_SECONDS`` or more: it then
averages over thousands of steps by itself), then until either the total time
passes ``_MIN_TOTAL_SECONDS`` *and* the interquartile range of the time to the
last checkpoint is within ``_SETTLED_IQR`` of its median, or ``repeats`` runs
are done (and never more than ``_MAX_REPEATS`` for very short replays). Reported: the median time to
each target, its spread (the interquartile range over repeats), the time per
step (median time to the last replayed iteration divided by its count) and
the wall-clock position of the trace points inside the replayed range (timed
on the fingerprint grid and at the crossings, linear in between).
BLAS threads are pinned by the caller; replays of a run happen one at a time,
never concurrently with other cases.
"""

from __future__ import annotations

import platform
import statistics
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from benchsuite.cases import Case, SeedOutcome
from benchsuite.monitor import build_rule_for, built, checkpoint_grid
from benchsuite.oracle import gradient_function

__all__ = ["CLOCKS", "needs_replay", "quartiles", "replay_seconds", "replay_times", "timed_outcome"]

#: replay clocks: wall time, or the process's CPU time (not inflated by other
#: processes competing for the cores; what ``compare`` uses by default)
CLOCKS: dict[str, Callable[[], float]] = {"wall": time.perf_counter, "cpu": time.process_time}
#: at least this many replays ...
MIN_REPEATS = 3
#: ... or this many when one replay takes at least _LONG_SECONDS ...
MIN_REPEATS_LONG, _LONG_SECONDS = 2, 0.05
#: ... and until their total time reaches this (seconds) ...
_MIN_TOTAL_SECONDS = 0.02
#: ... and their interquartile range is within this fraction of the median ...
_SETTLED_IQR = 0.05
#: ... but never more often than this
_MAX_REPEATS = 1000
#: replay length for the time per step of a case that reached no target
_UNREACHED_REPLAY = 200


def _replay_once(rule: Any, grad: Callable[[np.ndarray], np.ndarray], x: np.ndarray,
                 checkpoints: Sequence[int], clock: Callable[[], float] = time.perf_counter) -> list[float]:
    """Seconds from the start to each checkpoint iteration, one uninstrumented run."""
    step = rule.step
    out = []
    done = 0
    t0 = clock()
    state = rule.init(x)
    for kc in checkpoints:
        for _ in range(kc - done):
            x, state = step(x, grad(x), state)
        done = kc
        out.append(clock() - t0)
    return out


def _fresh(case: Case, params: Mapping[str, Any], seed: int) -> tuple[Any, Callable, np.ndarray]:
    b = built(case.instance, with_optimum=False, dtype=case.dtype)
    br = build_rule_for(case, b, params)
    grad, _ = gradient_function(b.problem, case.oracle_spec, b.key, seed)
    return br.rule, grad, b.problem.initial_point()


def quartiles(v: Sequence[float]) -> tuple[float, float]:
    """Median and interquartile range (0 for a single value)."""
    if len(v) < 2:
        return v[0], 0.0
    q = statistics.quantiles(v, n=4, method="inclusive")
    return statistics.median(v), q[2] - q[0]


def replay_times(case: Case, hyperparams: Mapping[str, Any], seed: int, checkpoints: Sequence[int],
                 *, repeats: int = 5) -> list[list[float]]:
    """Timed replays: per repeat, the seconds to each (sorted) checkpoint iteration.

    Repeats as the module docstring says (``repeats`` is the most a settled
    measurement needs; short replays are repeated more). Each run gets a fresh
    rule, generator and start point, built outside the timed region, and runs
    in the calling process with its BLAS thread setting.
    """
    cps = sorted(set(int(c) for c in checkpoints if c > 0))
    if not cps:
        return []
    runs: list[list[float]] = []
    total = 0.0
    low = min(MIN_REPEATS, repeats)
    while len(runs) < _MAX_REPEATS:
        rule, grad, x = _fresh(case, hyperparams, seed)
        t = _replay_once(rule, grad, x, cps)
        runs.append(t)
        total += t[-1]
        if len(runs) == 1 and t[-1] >= _LONG_SECONDS:
            low = min(MIN_REPEATS_LONG, repeats)
        if len(runs) < low or total < _MIN_TOTAL_SECONDS:
            continue
        if len(runs) >= repeats:
            break
        med, iqr = quartiles([r[-1] for r in runs])
        if iqr <= _SETTLED_IQR * med:
            break
    return runs


def replay_seconds(case: Case, hyperparams: Mapping[str, Any], seed: int, k: int, *, threads: int | None = 1,
                   clock: str = "wall") -> float:
    """One timed uninstrumented replay of ``k`` steps (for interleaved A/B comparisons).

    ``threads`` pins the BLAS threads for the replay (``None``: leave as is);
    ``clock`` is a key of :data:`CLOCKS`.
    """
    from threadpoolctl import threadpool_limits

    rule, grad, x = _fresh(case, hyperparams, seed)
    with threadpool_limits(limits=threads):
        return _replay_once(rule, grad, x, [int(k)], CLOCKS[clock])[-1]


def needs_replay(o: SeedOutcome) -> bool:
    """A seed that ran steps but has no timing yet."""
    return not o.time_to_target and o.status in ("reached", "partial", "budget", "unstable") and o.iterations_run > 0


def timed_outcome(case: Case, hyperparams: Mapping[str, Any], o: SeedOutcome, repeats: int) -> SeedOutcome:
    """``o`` with its times: to each reached target, per step, and at the trace points replayed."""
    reached = [k for k in o.iters if k is not None]
    last = max(reached) if reached else min(o.iterations_run, _UNREACHED_REPLAY)
    cps = sorted(set(reached) | set(checkpoint_grid(last)))
    runs = replay_times(case, hyperparams, o.seed, cps, repeats=repeats)
    per_cp = {cp: quartiles([r[i] for r in runs]) for i, cp in enumerate(cps)}
    ttt = tuple(None if k is None else per_cp[k][0] for k in o.iters)
    spread = tuple(None if k is None else per_cp[k][1] for k in o.iters)
    trace = o.trace
    if trace is not None:
        # between timed checkpoints (the fingerprint grid and the crossings) time is linear in k
        its = trace.iteration
        secs = np.interp(its, [0, *cps], [0.0, *(per_cp[c][0] for c in cps)])
        trace = trace.with_seconds(np.where(its <= last, secs, np.nan))
    return replace(o, time_to_target=ttt, time_spread=spread, time_per_step=per_cp[last][0] / last, trace=trace,
                   timed_on=platform.node())
