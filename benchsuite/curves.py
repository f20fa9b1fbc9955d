"""What the convergence figures draw, computed from stored traces (pure functions, no matplotlib).

* :func:`seed_band` -- median and min..max over the seeds of a case, on one
  common axis (iterations, gradient calls or seconds). Between two recorded
  points a trace is read as holding its last recorded value (the subsample
  keeps every first crossing, so no crossing is hidden by this); after its
  last point a seed keeps its final measure (it stopped there: all targets
  met, or the budget spent).
* :func:`bound_points` -- the theory bound as (iterations, target) points:
  the published rate says the measure is at or below each target by that
  iteration. Only those points come with the results; a figure joins them.
* :func:`first_divergence` -- the first iteration at which two traces of the
  same case (a baseline's and a candidate's) disagree by more than a
  relative tolerance.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["AXES", "Band", "bound_points", "first_divergence", "seed_band", "trace_from_checkpoints", "trace_xy"]

#: axis name -> Trace field
AXES = {"iteration": "iteration", "grad_calls": "grad_calls", "seconds": "seconds"}


@dataclass(frozen=True)
class Band:
    """A case's curve: ``median`` with ``lo``..``hi`` (min..max over ``seeds``) at ``x``."""

    x: np.ndarray
    median: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    seeds: int


def trace_xy(trace: Any, axis: str = "iteration") -> tuple[np.ndarray, np.ndarray]:
    """The (x, measure) points of one trace on ``axis``, points without an x (no replay time) dropped."""
    if axis not in AXES:
        raise ValueError(f"axis {axis!r}: expected one of {', '.join(AXES)}")
    x = np.asarray(getattr(trace, AXES[axis]), dtype=float)
    y = np.asarray(trace.measure, dtype=float)
    keep = np.isfinite(x)
    x, y = x[keep], y[keep]
    order = np.argsort(x, kind="stable")
    return x[order], y[order]


def _hold(x: np.ndarray, y: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """``y`` at the last recorded ``x <= grid`` (nan before the first point)."""
    idx = np.searchsorted(x, grid, side="right") - 1
    out = np.where(idx >= 0, y[np.clip(idx, 0, None)], np.nan)
    return out


def seed_band(traces: Sequence[Any], axis: str = "iteration") -> Band | None:
    """Median and min..max over seeds on the union of their x values; None when nothing has an x."""
    pts = [trace_xy(t, axis) for t in traces]
    pts = [(x, y) for x, y in pts if x.size]
    if not pts:
        return None
    grid = np.unique(np.concatenate([x for x, _ in pts]))
    ys = np.vstack([_hold(x, y, grid) for x, y in pts])
    with np.errstate(all="ignore"), _quiet():
        med = np.nanmedian(ys, axis=0)
        lo = np.nanmin(ys, axis=0)
        hi = np.nanmax(ys, axis=0)
    return Band(grid, med, lo, hi, len(pts))


class _quiet:
    """Silence numpy's all-nan-slice warnings (a column before every seed's first point is nan on purpose)."""

    def __enter__(self) -> None:
        import warnings

        self._w = warnings.catch_warnings()
        self._w.__enter__()
        warnings.simplefilter("ignore", RuntimeWarning)

    def __exit__(self, *exc: object) -> None:
        self._w.__exit__(*exc)


def bound_points(theory_bound: Sequence[Any], targets: Sequence[float]) -> list[tuple[int, float]]:
    """(iterations, target) for every target that has a bound, in target order."""
    out = []
    for b, t in zip(theory_bound, targets):
        if b is None or (isinstance(b, float) and not math.isfinite(b)):
            continue
        out.append((int(b), float(t)))
    return out


def first_divergence(a: Any, b: Any, rtol: float = 1e-9) -> int | None:
    """First iteration where two traces' measures differ by more than ``rtol`` (relative); None: never.

    Compared at the iterations both traces recorded. When they agree there but
    one pass went on longer, the first iteration past the shorter one's end is
    where they part. ``rtol`` default 1e-9: well above the round-off of one
    pass repeated on the same machine (bit-identical) and well below any change
    of a rule's arithmetic that matters; the gate passes its own.
    """
    ia, ma = np.asarray(a.iteration), np.asarray(a.measure, dtype=float)
    ib, mb = np.asarray(b.iteration), np.asarray(b.measure, dtype=float)
    common, ka, kb = np.intersect1d(ia, ib, assume_unique=False, return_indices=True)
    va, vb = ma[ka], mb[kb]
    scale = np.maximum(np.maximum(np.abs(va), np.abs(vb)), np.finfo(float).tiny)
    with np.errstate(invalid="ignore"):
        differ = ~(np.abs(va - vb) <= rtol * scale)  # nan on one side only counts as different
    differ &= ~(np.isnan(va) & np.isnan(vb))
    if differ.any():
        return int(common[np.argmax(differ)])
    end_a, end_b = (int(ia.max()) if ia.size else 0), (int(ib.max()) if ib.size else 0)
    if end_a != end_b:
        longer = ia if end_a > end_b else ib
        past = longer[longer > min(end_a, end_b)]
        return int(past.min())
    return None


def trace_from_checkpoints(checkpoints: Sequence[int], fingerprint: Sequence[float]) -> Any:
    """A :class:`~benchsuite.cases.Trace` of the measure at a baseline's checkpoints (what a baseline file
    keeps), so a baseline can be drawn and compared like a stored trace. Iteration 0 is not added."""
    from benchsuite.cases import Trace

    k = np.asarray(checkpoints, dtype=np.int64)
    m = np.asarray(fingerprint, dtype=np.float64)
    if k.shape != m.shape:
        raise ValueError(f"{k.size} checkpoints but {m.size} fingerprint values")
    nan = np.full(k.shape, np.nan)
    return Trace(k, m, nan, k.copy(), nan.copy())
