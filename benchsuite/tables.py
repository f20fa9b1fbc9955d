"""The tidy results table: one row per case x seed x target."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

from benchsuite.cases import CaseResult, enc

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["hp_text", "table_rows", "to_frame"]


def hp_text(hp: Mapping[str, Any]) -> str:
    """Hyperparameters as compact, sorted JSON."""
    return json.dumps(enc(dict(hp)), sort_keys=True, separators=(",", ":"))


def table_rows(results: Sequence[CaseResult], selected: Mapping[str, bool] | None = None) -> list[dict[str, Any]]:
    """One row per case x seed x target (columns: :data:`benchsuite.results.TABLE_COLUMNS`)."""
    rows = []
    for r in results:
        c = r.case
        key = c.key()
        for o in r.outcomes:
            for j, t in enumerate(c.run_targets):
                k = o.iters[j]
                b = r.theory_bound[j] if j < len(r.theory_bound) else None
                lo = r.theory_lower[j] if j < len(r.theory_lower) else None
                rows.append({
                    "case": key,
                    "instance": c.instance.name,
                    "rule": c.rule.label,
                    "hyperparams": hp_text(r.hyperparams),
                    "oracle": c.oracle,
                    "batch": c.batch,
                    "replace": c.replace if c.oracle == "minibatch" else None,
                    "measure": c.run_measure,
                    "seed": o.seed,
                    "target_index": j,
                    "target": t,
                    "iterations": k,
                    "held_from": o.held[j] if j < len(o.held) else None,
                    "grad_calls": o.grad_calls[j],
                    "epochs": o.epochs[j],
                    "time_to_target": o.time_to_target[j] if o.time_to_target else None,
                    "time_spread": o.time_spread[j] if o.time_spread else None,
                    "time_per_step": o.time_per_step,
                    "timed_on": o.timed_on or None,
                    "status": o.status,
                    "case_status": r.status,
                    "final_measure": o.final_measure,
                    "final_dist": o.final_dist,
                    "iterations_run": o.iterations_run,
                    "left_at": o.left_at,
                    "theory_bound": b,
                    "bound_violated": None if b is None else bool(k is not None and k > b),
                    "theory_lower": lo,
                    "unreachable": bool(r.unreachable[j]) if j < len(r.unreachable) else False,
                    "below_lower": None if lo is None else bool(k is not None and k < lo),
                    "budget": c.run_budget,
                    "selected": None if selected is None else selected.get(key),
                })
    return rows


def to_frame(results: Sequence[CaseResult], selected: Mapping[str, bool] | None = None) -> pd.DataFrame:
    """The tidy table as a DataFrame (integer columns nullable)."""
    import pandas as pd

    from benchsuite.results import TABLE_COLUMNS

    df = pd.DataFrame(table_rows(results, selected), columns=list(TABLE_COLUMNS))
    for col in ("batch", "iterations", "held_from", "grad_calls", "theory_bound", "theory_lower", "left_at"):
        df[col] = df[col].astype("Int64")
    for col in ("replace", "bound_violated", "below_lower", "unreachable", "selected"):
        df[col] = df[col].astype("boolean")
    return df
