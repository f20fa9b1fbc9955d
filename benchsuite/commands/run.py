"""``benchsuite run``: run update rules on catalogue problems and tabulate iterations and time to targets.

With no arguments: every built-in rule on the small tier, a readable table
per instance x rule (status, iterations to each target with the theory bound
beside it -- ``!`` marks a measured count above its bound --, time per step,
time to the tightest target), the run stored under ``results/runs/<id>/`` and
appended to ``results/history.sqlite``.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import sys
from collections.abc import Sequence
from typing import Any

HELP = "run update rules on catalogue problems: iterations, gradient calls and wall time to each target"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rule", action="append", default=[], metavar="R",
                   help="built-in rule name or package.module:attribute (repeatable; default: every "
                        "built-in rule except adamw, whose weight decay moves the minimiser)")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="hyperparameter, applied to every --rule given (repeatable)")
    p.add_argument("--problems", metavar="SELECTOR",
                   help="comma-separated names or globs, or a NIST StRD .dat file (default: the whole tier)")
    p.add_argument("--tier", default="small", choices=("small", "medium", "large"), help="catalogue tier (default small)")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH",
                   help="extra catalogue file or folder (repeatable)")
    p.add_argument("--batch", type=int, metavar="B",
                   help="minibatch oracle with B samples per step (finite-sum problems; others are skipped)")
    p.add_argument("--replace", action=argparse.BooleanOptionalAction, default=True,
                   help="minibatches drawn with replacement (default) or, with --no-replace, reshuffled each epoch")
    p.add_argument("--seeds", type=int, metavar="N", help="seeds per stochastic case (default 5)")
    p.add_argument("--budget", type=int, metavar="K", help="iteration budget for every case (default: the instance's)")
    p.add_argument("--sweep", metavar="NAME=LO:HI:N",
                   help="log grid of a numeric hyperparameter, e.g. lr=1e-4:1:9; the best value per problem is selected")
    p.add_argument("--params-from", metavar="RUN_ID", help="reuse the sweep selection of an earlier run")
    p.add_argument("--jobs", type=int, metavar="N", help="worker processes for the monitored passes (default: cores)")
    p.add_argument("--threads", type=int, default=1, metavar="N", help="BLAS threads per process (default 1)")
    p.add_argument("--repeats", type=int, default=5, metavar="N", help="timing replays per case (default 5, more for short runs)")
    p.add_argument("--timeout", type=float, default=120.0, metavar="S",
                   help="wall-clock limit per monitored pass in seconds (default 120)")
    p.add_argument("--no-timing", action="store_true", help="skip the timing replays")
    p.add_argument("--json", action="store_true", help="print the tidy table as JSON")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder (default ./results)")
    p.add_argument("--resume", metavar="RUN_ID", help="complete an interrupted run (its settings are reused)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="Dask scheduler address (tcp://host:8786): run the passes and timing replays on its workers")


def run(args: argparse.Namespace) -> int:
    from benchsuite.errors import UserError
    from benchsuite.runner import RunInterrupted, RunRequest, execute

    for flag, v in (("--jobs", args.jobs), ("--threads", args.threads), ("--repeats", args.repeats)):
        if v is not None and v < 1:
            raise UserError(f"{flag} must be >= 1, got {v}")
    if not args.timeout > 0:
        raise UserError(f"--timeout must be > 0 seconds, got {args.timeout}")
    req = None
    if not args.resume:
        req = RunRequest.make(
            rules=args.rule, params=args.param, problems=args.problems, tier=args.tier,
            catalogue=args.catalogue, batch=args.batch, replace=args.replace, seeds=args.seeds,
            budget=args.budget, sweep=args.sweep, params_from=args.params_from,
        )
    elif args.rule or args.param or args.sweep or args.problems:
        raise UserError("--resume takes the run's own settings; drop --rule/--param/--sweep/--problems")
    try:
        outcome = execute(req, jobs=args.jobs, threads=args.threads, repeats=args.repeats, timeout=args.timeout,
                          timing=not args.no_timing, out=args.out, resume=args.resume, progress=None,
                          cluster=args.cluster)
    except RunInterrupted as exc:
        out = "" if args.out == "results" else f" --out {args.out}"
        if sys.stderr.isatty():
            print(file=sys.stderr)  # end the progress bar's line
        print(f"benchsuite: interrupted; finished cases kept, run {exc.run_id} marked partial; "
              f"resume with: benchsuite run --resume {exc.run_id}{out}", file=sys.stderr)
        return 130
    if args.json:
        rows = json.loads(outcome.frame.to_json(orient="records"))
        print(json.dumps({"run_id": outcome.run_id, "path": outcome.path, "status": outcome.status,
                          "selected": list(outcome.selected), "skipped": list(outcome.skipped), "rows": rows},
                         indent=1))
        return 0
    print(format_results(outcome.results, outcome.selected))
    if outcome.skipped:
        print(f"\nskipped (not finite sums, --batch needs one): {', '.join(outcome.skipped)}")
    if outcome.run_id:
        print(f"\nrun {outcome.run_id}: {outcome.path} (history: {args.out}/history.sqlite)")
    return 0


# -- the readable table ---------------------------------------------------------------------
def fmt_seconds(s: float | None) -> str:
    if s is None or not math.isfinite(s):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if s >= scale:
            return f"{s / scale:.3g} {unit}"
    return f"{s / 1e-9:.3g} ns"


def _cell(result: Any, j: int) -> str:
    ks = [o.iters[j] for o in result.outcomes]
    got = [k for k in ks if k is not None]
    if not got:
        text = "-"
    else:
        text = str(int(statistics.median(got))) if len(ks) == 1 else f"{statistics.median(got):g}"
        if len(ks) > 1:
            text += f" [{len(got)}/{len(ks)}]"
    b = result.theory_bound[j] if j < len(result.theory_bound) else None
    if b is not None:
        text += f" (<={b}{'!' if result.bound_violated()[j] else ''})"
    return text


def _time_to_tightest(result: Any) -> str:
    j = len(result.case.run_targets) - 1
    ts = [o.time_to_target[j] for o in result.outcomes if o.time_to_target and o.time_to_target[j] is not None]
    return fmt_seconds(statistics.median(ts)) if ts else "-"


def _per_step(result: Any) -> str:
    ts = [o.time_per_step for o in result.outcomes if o.time_per_step is not None]
    return fmt_seconds(statistics.median(ts)) if ts else "-"


def _grid(rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  " + "  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]


def _summary(by_inst: dict[str, list[Any]]) -> list[str]:
    """One line per rule: on how many instances it ended with each status."""
    statuses = ("reached", "partial", "budget", "diverged", "error", "timeout")
    counts: dict[str, dict[str, int]] = {}
    for rs in by_inst.values():
        for r in rs:
            row = counts.setdefault(r.case.rule.label, dict.fromkeys(statuses, 0))
            row[r.status] = row.get(r.status, 0) + 1
    used = [s for s in statuses if any(c[s] for c in counts.values())]
    rows = [["rule", *used]] + [[label, *(str(c[s]) for s in used)] for label, c in counts.items()]
    return [f"summary over {len(by_inst)} instances (cases by status)", *_grid(rows), ""]


def format_results(results: Sequence[Any], selected: Sequence[dict[str, Any]] = ()) -> str:
    """Per instance: one line per rule with status, iterations (theory bound), time per step, time to the tightest target.

    With a sweep only the selected grid point of each rule is shown (the
    table and history keep all of them). ``[r/n]``: seeds that reached the
    target; ``(<=b)``: iterations the published rate guarantees; ``!``: the
    measured count exceeds it.
    """
    chosen = {s["case"] for s in selected}
    lines: list[str] = []
    by_inst: dict[str, list[Any]] = {}
    for r in results:
        if chosen and r.case.key() not in chosen:
            continue
        by_inst.setdefault(r.case.instance.name, []).append(r)
    problems: list[str] = []
    violated = False
    for name, rs in by_inst.items():
        c = rs[0].case
        targets = c.run_targets
        oracle = "full gradient" if c.oracle == "full" else f"minibatch B={c.batch}"
        lines.append(f"{name}  [{c.run_measure}, {oracle}, budget {c.run_budget}]")
        head = ["rule", "status"] + [f"{t:.0e}" for t in targets] + ["time/step", f"time to {targets[-1]:.0e}"]
        rows = [head]
        for r in rs:
            violated = violated or any(r.bound_violated())
            label = r.case.rule.label
            if chosen:
                label = r.case.rule.name + "(" + ", ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}"
                                                         for k, v in r.case.rule.params) + ")"
            rows.append([label, r.status] + [_cell(r, j) for j in range(len(targets))]
                        + [_per_step(r), _time_to_tightest(r)])
            for o in r.outcomes:
                if o.error:
                    problems.append(f"{name} {r.case.rule.label} seed {o.seed}: {o.status}: {o.error.splitlines()[0]}")
                    break
        lines.extend(_grid(rows))
        lines.append("")
    if len(by_inst) > 1:
        lines.extend(_summary(by_inst))
    if violated:
        lines.append("! a measured count above its published bound: a bug in the rule, the constants or the runner")
    if problems:
        lines.append("problems:")
        lines.extend("  " + p for p in problems)
    return "\n".join(lines).rstrip()
