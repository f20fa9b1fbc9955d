"""Run folders for the report tests: a real small run of the tool, plus traces in the PLAN.md layout.

``real_run`` runs the tool itself (two quadratics, gradient descent, Nesterov
and a rule that raises at step 3), so tables, meta.json, cases/*.json and
traces/*.npz are exactly what the runner writes. ``synthetic_trace`` makes a
trace with known numbers (a geometric decay on the agreed subsample grid).
"""

from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

import numpy as np

TESTS = Path(__file__).resolve().parent
if str(TESTS) not in sys.path:
    sys.path.insert(0, str(TESTS))  # faulty_rules importable here and in forked workers

PROBLEMS = "quad-diag-kappa10-d10,quad-diag-kappa100-d50"
RULES = ("gd", "nesterov", "faulty_rules:Raiser")


def contract_grid(last: int) -> np.ndarray:
    """Every iteration 0..200, then k -> max(k + 1, floor(1.02 k)), then the final iteration."""
    ks = list(range(0, min(last, 200) + 1))
    k = ks[-1]
    while k < last:
        k = max(k + 1, int(1.02 * k))
        ks.append(min(k, last))
    return np.unique(np.array(ks, dtype=np.int64))


def real_run(out: Path) -> str:
    """Run the tool on two small quadratics; return the run id."""
    from benchsuite.runner import RunRequest, execute

    req = RunRequest.make(rules=list(RULES), problems=PROBLEMS)
    outcome = execute(req, jobs=1, repeats=1, out=out)
    assert outcome.status == "complete"
    return str(outcome.run_id)


def synthetic_trace(final: float, last: int, seconds_per_step: float | None, wobble: float = 0.0):
    """measure_k = final ** (k / last) (1 at k = 0, ``final`` at ``last``), times k * seconds_per_step."""
    from benchsuite.runs import Trace

    k = contract_grid(last)
    m = np.power(final, k / max(last, 1)) * (1.0 + wobble * np.sin(k))
    sec = np.full(k.shape, np.nan) if seconds_per_step is None else k * seconds_per_step
    return Trace(iteration=k, measure=m, dist=np.sqrt(m), grad_calls=k.copy(), seconds=sec)


def interrupted_copy(out: Path, run_id: str, new_id: str, *, drop: int = 1, status: str = "running") -> Path:
    """A copy of a run as a killed run leaves it: meta says ``status``, no table, ``drop`` cases missing."""
    src = out / "runs" / run_id
    dst = out / "runs" / new_id
    shutil.copytree(src, dst)
    (dst / "table.csv").unlink()
    for f in sorted((dst / "cases").glob("*.json"))[:drop]:
        f.unlink()
    meta = json.loads((dst / "meta.json").read_text())
    meta["status"] = status
    meta.pop("ended", None)
    (dst / "meta.json").write_text(json.dumps(meta))
    return dst
