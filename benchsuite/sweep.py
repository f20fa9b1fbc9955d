"""Hyperparameter sweeps: a log-spaced grid, and the per-problem selection.

``--sweep lr=1e-4:1:9`` means 9 values of ``lr`` spaced evenly in log scale
from 1e-4 to 1 inclusive (``numpy.geomspace``); any numeric hyperparameter
can be swept. ``--sweep momentum=0.5,0.9,0.99`` gives an explicit list.

Every grid point is a case of its own and stays in the results table. Per
problem (and per rule) the **selected** value is the one that reaches the
tightest target in the fewest iterations; in full, grid points are ranked by

1. a healthy status first (``reached`` / ``partial`` / ``budget``) before
   ``diverged`` / ``error`` / ``timeout``;
2. more targets reached;
3. fewer iterations to the tightest target reached;
4. the smaller value.

For a stochastic case a target counts as reached when every seed reached it,
and its iteration count is the median over seeds. The selection is recorded
in the run's ``meta.json`` (``"selected"``) and reused by ``--params-from
RUN_ID`` and by the gate's baseline.
"""

from __future__ import annotations

import math
import re
import statistics
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchsuite.errors import UserError

__all__ = ["Sweep", "parse_sweep", "rank_key", "select_best"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_HEALTHY = ("reached", "partial", "budget")
#: largest grid accepted (a typo such as 1e-4:1:900 would run for hours)
MAX_POINTS = 200


@dataclass(frozen=True)
class Sweep:
    """A hyperparameter name and its grid of values."""

    name: str
    values: tuple[float, ...]
    text: str

    def describe(self) -> dict[str, Any]:
        return {"name": self.name, "values": list(self.values), "spec": self.text}


def _number(text: str, spec: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise UserError(f"--sweep {spec!r}: {text!r} is not a number") from None
    if not math.isfinite(value):
        raise UserError(f"--sweep {spec!r}: {text!r} is not finite")
    return value


def parse_sweep(spec: str) -> Sweep:
    """``name=lo:hi:n`` (log grid, ``lo, hi > 0``, ``1 <= n <= 200``) or ``name=v1,v2,...``."""
    name, sep, rest = spec.partition("=")
    name = name.strip()
    if not sep or not _NAME.match(name) or not rest.strip():
        raise UserError(f"--sweep {spec!r}: expected name=lo:hi:n (e.g. lr=1e-4:1:9) or name=v1,v2,...")
    if ":" in rest:
        parts = rest.split(":")
        if len(parts) != 3:
            raise UserError(f"--sweep {spec!r}: a log grid is lo:hi:n (three fields), got {len(parts)}")
        lo, hi = _number(parts[0], spec), _number(parts[1], spec)
        try:
            n = int(parts[2])
        except ValueError:
            raise UserError(f"--sweep {spec!r}: the number of points {parts[2]!r} is not an integer") from None
        if lo <= 0 or hi <= 0:
            raise UserError(f"--sweep {spec!r}: a log grid needs lo > 0 and hi > 0")
        if not 1 <= n <= MAX_POINTS:
            raise UserError(f"--sweep {spec!r}: the number of points must be in 1..{MAX_POINTS}, got {n}")
        if n == 1 and lo != hi:
            raise UserError(f"--sweep {spec!r}: one point needs lo == hi")
        values = tuple(float(v) for v in np.geomspace(lo, hi, n))
    else:
        values = tuple(_number(p.strip(), spec) for p in rest.split(","))
        if len(values) > MAX_POINTS:
            raise UserError(f"--sweep {spec!r}: at most {MAX_POINTS} values")
    if len(set(values)) != len(values):
        raise UserError(f"--sweep {spec!r}: repeated values")
    return Sweep(name=name, values=values, text=spec)


def _summary(result: Any) -> tuple[list[bool], list[float]]:
    """Per target: reached by every seed, and the median iteration count over seeds."""
    n_targets = len(result.outcomes[0].iters) if result.outcomes else 0
    reached, iters = [], []
    for j in range(n_targets):
        ks = [o.iters[j] for o in result.outcomes]
        ok = all(k is not None for k in ks)
        reached.append(ok)
        iters.append(float(statistics.median(ks)) if ok else math.inf)
    return reached, iters


def rank_key(result: Any, value: float) -> tuple[int, int, float, float]:
    """The ordering of the module docstring (smaller is better)."""
    reached, iters = _summary(result)
    n = sum(reached)
    tightest = max((j for j, ok in enumerate(reached) if ok), default=None)
    return (
        0 if result.status in _HEALTHY else 1,
        -n,
        iters[tightest] if tightest is not None else math.inf,
        value,
    )


def select_best(results: Iterable[tuple[Any, float]]) -> tuple[Any, float]:
    """The best ``(result, value)`` pair of one problem's grid (see :func:`rank_key`)."""
    pairs = list(results)
    if not pairs:
        raise ValueError("empty sweep grid")
    return min(pairs, key=lambda p: rank_key(p[0], p[1]))


def selection_table(selected: Sequence[Mapping[str, Any]]) -> dict[tuple[str, str], dict[str, Any]]:
    """``(instance, rule name) -> {param: value}`` from a run's recorded ``selected`` list."""
    out: dict[tuple[str, str], dict[str, Any]] = {}
    for row in selected:
        out[(row["instance"], row["rule"])] = {row["param"]: row["value"]}
    return out
