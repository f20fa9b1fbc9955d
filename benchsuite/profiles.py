"""Performance profiles (Dolan & Moré 2002) and data profiles (Moré & Wild 2009).

Both are pure functions of a cost matrix ``T`` with one row per problem and
one column per solver (here: per update rule). ``T[p, s]`` is what solver
``s`` spent on problem ``p`` to meet the convergence test (iterations,
seconds or gradient evaluations); a failure is ``inf`` (``nan`` is read as a
failure too).

**Performance profile.** The ratio ``r[p, s] = T[p, s] / min_s T[p, s]``
compares a solver with the best one on each problem; a failed solver gets
``r = inf`` (the paper's ``r_M``: larger than every ratio, never counted).
The profile of solver ``s`` is ``rho_s(tau) = #{p : r[p, s] <= tau} / n_p``:
``rho_s(1)`` is the fraction of problems on which ``s`` is (one of) the best,
``rho_s(tau)`` for large ``tau`` the fraction it solves at all. A problem that
no solver solves stays in ``n_p`` and counts against everyone.

**Data profile.** With a budget measured in simplex gradients, ``(n_p + 1)``
evaluations for a problem of dimension ``n_p``, ``d_s(alpha) = #{p :
T[p, s] / (n_p + 1) <= alpha} / n_p`` is the fraction of problems solver ``s``
solves within ``alpha`` simplex gradients. Moré & Wild count function
evaluations of derivative-free solvers; a first-order rule spends one gradient
per step, so ``T`` is the number of gradient evaluations, normalised by
``(d + 1)`` exactly as in the paper. Their convergence test compares with the
best value any solver found; ours is the run's target on the measure taken
against the *certified* optimum, which needs no other solver.

:func:`cost_matrices` builds the matrices from the tidy results table of a
run (``table.csv``; one row per case x seed x target).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "METRICS",
    "CostMatrix",
    "cost_matrices",
    "data_profile",
    "performance_profile",
    "performance_ratios",
    "profile_breaks",
]

#: cost metric -> (table column, unit shown on a figure)
METRICS: dict[str, tuple[str, str]] = {
    "iterations": ("iterations", "iterations"),
    "time": ("time_to_target", "seconds"),
    "grad_calls": ("grad_calls", "gradient evaluations"),
}

#: columns that, besides the rule, tell two cases apart: together they name a "problem"
PROBLEM_COLUMNS: tuple[str, ...] = ("instance", "oracle", "batch", "replace", "measure", "budget")


def _costs(t: np.ndarray) -> np.ndarray:
    t = np.array(t, dtype=float)
    if t.ndim != 2:
        raise ValueError(f"a cost matrix is 2-D (problems x solvers), got shape {t.shape}")
    if np.any(t[np.isfinite(t)] <= 0):
        raise ValueError("costs must be > 0 (a ratio to the best needs a positive best)")
    t[~np.isfinite(t)] = np.inf  # nan and inf: failure
    return t


def performance_ratios(t: np.ndarray) -> np.ndarray:
    """``r[p, s] = T[p, s] / min_s T[p, s]``; ``inf`` for a failure and on problems nobody solved."""
    t = _costs(t)
    best = t.min(axis=1, keepdims=True)
    with np.errstate(invalid="ignore"):
        r = t / best
    r[~np.isfinite(t)] = np.inf
    return r


def performance_profile(t: np.ndarray, taus: Sequence[float] | np.ndarray) -> np.ndarray:
    """``rho[s, i]``: fraction of problems with ratio <= ``taus[i]`` for solver ``s``."""
    r = performance_ratios(t)
    taus = np.asarray(taus, dtype=float)
    n_p = r.shape[0]
    if n_p == 0:
        return np.zeros((r.shape[1], taus.size))
    return (r[:, :, None] <= taus[None, None, :]).sum(axis=0) / n_p


def data_profile(t: np.ndarray, dims: Sequence[int] | np.ndarray, alphas: Sequence[float] | np.ndarray) -> np.ndarray:
    """``d[s, i]``: fraction of problems solved within ``alphas[i]`` simplex gradients (``d + 1`` evaluations)."""
    t = _costs(t)
    dims = np.asarray(dims, dtype=float)
    if dims.shape != (t.shape[0],) or np.any(dims < 1):
        raise ValueError("dims: one dimension >= 1 per problem")
    alphas = np.asarray(alphas, dtype=float)
    if t.shape[0] == 0:
        return np.zeros((t.shape[1], alphas.size))
    scaled = t / (dims[:, None] + 1.0)
    return (scaled[:, :, None] <= alphas[None, None, :]).sum(axis=0) / t.shape[0]


def profile_breaks(values: np.ndarray) -> np.ndarray:
    """The finite values at which a profile over ``values`` (ratios or budgets) steps, sorted, unique."""
    v = np.asarray(values, dtype=float).ravel()
    return np.unique(v[np.isfinite(v)])


@dataclass(frozen=True)
class CostMatrix:
    """Costs of every rule on every problem for one target and one metric."""

    metric: str  # a key of METRICS
    target: float
    problems: tuple[str, ...]
    rules: tuple[str, ...]
    costs: np.ndarray  # (problems x rules), inf for a failure
    dims: tuple[int, ...]  # dimension of each problem (data profiles); 0 when unknown

    @property
    def unit(self) -> str:
        return METRICS[self.metric][1]


def _problem_name(row: pd.Series) -> str:
    name = str(row["instance"])
    if row.get("oracle") == "minibatch":
        name += f" (B={row['batch']})"
    return name


def cost_matrices(
    frame: pd.DataFrame, metric: str, dims: dict[str, int] | None = None
) -> list[CostMatrix]:
    """One :class:`CostMatrix` per target value present in ``frame`` (loosest first).

    A problem is an instance with its oracle, batch, measure and budget; the
    cost of a rule on it is the median over seeds, a seed that did not meet
    the target counting as ``inf`` (so a rule that fails on more than half the
    seeds fails the problem). Rules whose cases were not timed give ``nan``
    times, read as failures -- :func:`timed` tells whether a time profile means
    anything. A rule appears once per problem: rows of a sweep that the
    selection did not keep (``selected`` false) are left out. Problems that do
    not have a target are left out of that target's matrix.
    """
    if metric not in METRICS:
        raise ValueError(f"metric {metric!r}: expected one of {', '.join(METRICS)}")
    column = METRICS[metric][0]
    df = frame
    if "selected" in df:
        df = df[df["selected"].isna() | (df["selected"].astype("boolean") == True)]  # noqa: E712
    dims = dims or {}
    out = []
    for target in sorted({float(t) for t in df["target"]}, reverse=True):
        sub = df[np.isclose(df["target"].astype(float), target, rtol=1e-12, atol=0)]
        keyed: dict[tuple[str, str], list[float]] = {}
        names: dict[str, str] = {}
        for _, row in sub.iterrows():
            pkey = "|".join(str(row.get(c)) for c in PROBLEM_COLUMNS)
            names[pkey] = _problem_name(row)
            v = row[column]
            reached = row["iterations"] is not None and not _missing(row["iterations"])
            cost = float(v) if reached and not _missing(v) else math.inf
            keyed.setdefault((pkey, str(row["rule"])), []).append(cost)
        pkeys = sorted(names, key=lambda k: names[k])
        rules = sorted({r for _, r in keyed})
        t = np.full((len(pkeys), len(rules)), np.inf)
        for i, pk in enumerate(pkeys):
            for j, rule in enumerate(rules):
                vals = keyed.get((pk, rule))
                if vals:
                    t[i, j] = float(np.median(np.array(vals)))
        problem_dims = tuple(int(dims.get(names[pk].split(" ")[0], 0)) for pk in pkeys)
        out.append(CostMatrix(metric, target, tuple(names[pk] for pk in pkeys), tuple(rules), t, problem_dims))
    return out


def _missing(v: object) -> bool:
    try:
        return v is None or bool(np.isnan(float(v)))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return True


def timed(m: CostMatrix) -> bool:
    """Whether a time matrix has any finite entry (a run with ``--no-timing`` has none)."""
    return bool(np.isfinite(m.costs).any())
