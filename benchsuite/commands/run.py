"""``benchsuite run``: run update rules on catalogue problems and tabulate iterations and time to targets.

With no arguments: every built-in rule on the small tier, a readable table
per instance x rule (status, iterations to each target with the theory bound
beside it -- "exceeded" marks a measured count above its bound, "below the lower bound" one
that no gradient-span method can achieve --, time per step,
time to the tightest target), the run stored under ``./results/runs/<id>/``
(created when missing; ``--out`` elsewhere) and appended to
``./results/history.sqlite``.

Exit codes (:data:`EPILOG`, also in ``run --help`` and the README): 0 when
every case ran cleanly -- ``reached``, ``partial`` and ``budget`` are
measurements, not failures, and so is ``unstable`` unless ``--strict``; 1
when some case ended ``error``, ``timeout`` or ``diverged`` (or, with
``--strict``, ``unstable``; with ``--sweep``, a diverged or unstable grid
point that was not selected is part of the search and does not count); 2 for
a usage error, including a rule that breaks the step contract (wrong shape or
dtype, no ``(x, state)`` tuple), reported once per rule; 130 on Ctrl-C and
143 on SIGTERM (finished cases kept, the run marked partial, ``--resume``
completes it).

Why ``unstable`` needs ``--strict`` to fail: it means the rule reached every
target and then ended the stay-converged horizon above the tightest one.
That is a property some correct rules have -- Nesterov's accelerated method
without restart is not monotone, Adam-type rules with a constant step hover
around the optimum -- and the default run shows it for the built-in
``nesterov`` and ``nadam``; each such case gets an explanation line.
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

EPILOG = """\
Writes ./results/runs/<run-id>/ and appends to ./results/history.sqlite (--out DIR elsewhere).

exit codes:
  0    every case ran cleanly (reached, partial, budget and unstable are measurements,
       not failures; each unstable case is explained below the table)
  1    some case ended error, timeout or diverged, or unstable with --strict
       (with --sweep: only the selected grid points count for diverged/unstable)
  2    usage error, including a rule that breaks the step contract (reported once)
  130  interrupted (Ctrl-C); 143 terminated (SIGTERM): finished cases are kept,
       the run is marked partial, --resume RUN_ID completes it"""

#: case statuses that make ``run`` exit 1 ...
FAILED = ("error", "timeout", "diverged")
#: ... and with ``--strict``
STRICT_FAILED = (*FAILED, "unstable")
#: failures a sweep is expected to produce at its unselected grid points
_SWEEP_EXPECTED = ("diverged", "unstable")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rule", action="append", default=[], metavar="R",
                   help="built-in rule name or package.module:attribute, optionally with its own "
                        "hyperparameters as printed in the tables: 'adam(lr=0.01, beta2=0.99)' (repeatable; "
                        "default: every built-in rule except adamw, whose weight decay moves the minimiser)")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="hyperparameter, applied to every --rule given (repeatable)")
    p.add_argument("--problems", metavar="SELECTOR",
                   help="comma-separated names or globs, or a NIST StRD .dat file (default: the whole tier)")
    p.add_argument("--tier", default="small", choices=("small", "medium", "large", "all"),
                   help="catalogue tier (default small; all: every tier)")
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
    p.add_argument("--start", type=int, choices=(1, 2),
                   help="certified starting point of a NIST StRD file given by path in --problems (default 1)")
    p.add_argument("--dtype", choices=("float32", "float64"),
                   help="run every problem in this precision (default: as catalogued, float64 unless stated)")
    p.add_argument("--horizon", metavar="STEPS,MULT", default=None,
                   help="after the tightest target, run on max(STEPS, MULT x iterations so far) steps and require "
                        "the measure to stay below it (default 100,0.5)")
    p.add_argument("--jobs", type=int, metavar="N", help="worker processes for the monitored passes (default: cores)")
    p.add_argument("--threads", type=int, default=1, metavar="N", help="BLAS threads per process (default 1)")
    p.add_argument("--replays", type=int, default=5, metavar="N",
                   help="timing replays per case (default 5, more for short runs)")
    p.add_argument("--timeout", type=float, default=120.0, metavar="S",
                   help="wall-clock limit per monitored pass in seconds (default 120)")
    p.add_argument("--no-timing", action="store_true", help="skip the timing replays")
    p.add_argument("--strict", action="store_true",
                   help="exit 1 also when a case is unstable (reached every target, then ended above the tightest)")
    p.add_argument("--json", action="store_true", help="print the tidy table as JSON (floats at full precision; \"failed\" lists the cases behind exit 1)")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder, created when missing (default ./results)")
    p.add_argument("--resume", metavar="RUN_ID", help="complete an interrupted run (its settings are reused)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="Dask scheduler address (tcp://host:8786): run the passes and timing replays on its workers")


def run(args: argparse.Namespace) -> int:
    from benchsuite.cli import stop_reason
    from benchsuite.errors import UserError
    from benchsuite.results import json_records
    from benchsuite.runner import RunInterrupted, RunRequest, execute

    for flag, v in (("--jobs", args.jobs), ("--threads", args.threads), ("--replays", args.replays)):
        if v is not None and v < 1:
            raise UserError(f"{flag} must be >= 1, got {v}")
    if not args.timeout > 0:
        raise UserError(f"--timeout must be > 0 seconds, got {args.timeout}")
    req = None
    if not args.resume:
        req = RunRequest.make(
            rules=args.rule, params=args.param, problems=args.problems,
            tier=None if args.tier == "all" else args.tier,
            catalogue=args.catalogue, batch=args.batch, replace=args.replace, seeds=args.seeds,
            budget=args.budget, sweep=args.sweep, params_from=args.params_from,
            horizon=args.horizon, dtype=args.dtype, start=args.start,
        )
    elif args.rule or args.param or args.sweep or args.problems:
        raise UserError("--resume takes the run's own settings; drop --rule/--param/--sweep/--problems")
    try:
        outcome = execute(req, jobs=args.jobs, threads=args.threads, repeats=args.replays, timeout=args.timeout,
                          timing=not args.no_timing, out=args.out, resume=args.resume, progress=None,
                          cluster=args.cluster)
    except RunInterrupted as exc:
        out = "" if args.out == "results" else f" --out {args.out}"
        if sys.stderr.isatty():
            print(file=sys.stderr)  # end the progress bar's line
        if exc.run_id:
            print(f"benchsuite: {stop_reason()}; finished cases kept, run {exc.run_id} marked partial; "
                  f"resume with: benchsuite run --resume {exc.run_id}{out}", file=sys.stderr)
        else:
            print(f"benchsuite: {stop_reason()}", file=sys.stderr)
        return 130
    contract = contract_violations(outcome.results)
    if args.json:
        print(json.dumps({"run_id": outcome.run_id, "path": outcome.path, "status": outcome.status,
                          "selected": list(outcome.selected), "skipped": list(outcome.skipped),
                          "notes": list(outcome.notes),
                          "failed": failed_cases(outcome.results, outcome.selected, strict=args.strict),
                          "rows": json_records(outcome.frame)},
                         indent=1, allow_nan=False))
    else:
        print(format_results(outcome.results, outcome.selected))
        if outcome.skipped:
            print(f"\nskipped (not finite sums, --batch needs one): {', '.join(outcome.skipped)}")
        for note in outcome.notes:
            print(f"note: {note}")
        if outcome.run_id:
            print(f"\nrun {outcome.run_id}: {outcome.path} (history: {args.out}/history.sqlite)")
    if contract:
        for line in contract:
            print(f"benchsuite: error: {line}", file=sys.stderr)
        return 2
    return 1 if failed_cases(outcome.results, outcome.selected, strict=args.strict) else 0


def _first_line(error: str | None) -> str:
    return (error or "").strip().splitlines()[0] if (error or "").strip() else ""


def _contract_message(result: Any, error: str | None) -> str | None:
    """The message of a rule's misuse of the contract (a UserError naming the rule), else None."""
    line = _first_line(error)
    if line.startswith("UserError: "):
        line = line[len("UserError: "):]
    return line if line.startswith(f"rule {result.case.rule.label}:") else None


def contract_violations(results: Sequence[Any]) -> list[str]:
    """One line per rule whose step broke the contract (shape, dtype, no tuple, bad hyperparameter value).

    These are raised as :class:`UserError` inside the monitored pass, so each
    affected case ends ``error`` with the message kept; the command line says
    it once per rule, naming the first case and how many more there were.
    """
    first: dict[str, tuple[str, str]] = {}
    count: dict[str, int] = {}
    for r in results:
        for o in r.outcomes:
            msg = _contract_message(r, o.error) if o.status == "error" else None
            if msg is None:
                continue
            name = r.case.rule.name  # a sweep's grid points are one rule
            first.setdefault(name, (msg, r.case.instance.name))
            count[name] = count.get(name, 0) + 1
            break  # once per case
    lines = []
    for name, (msg, inst) in first.items():
        more = count[name] - 1
        lines.append(f"{msg} (on {inst}" + (f", and {more} more case{'s' if more > 1 else ''})" if more else ")"))
    return lines


def failed_cases(results: Sequence[Any], selected: Sequence[dict[str, Any]] = (), *,
                 strict: bool = False) -> list[dict[str, str]]:
    """Cases that make ``run`` exit 1: status error, timeout or diverged (``strict``: or unstable).

    In a sweep, a diverged or unstable grid point that was not selected is an
    expected part of the search (a step size too large) and is left out.
    """
    chosen = {s["case"] for s in selected}
    out = []
    for r in results:
        if r.status not in (STRICT_FAILED if strict else FAILED):
            continue
        if chosen and r.status in _SWEEP_EXPECTED and r.case.key() not in chosen:
            continue
        out.append({"instance": r.case.instance.name, "rule": r.case.rule.label, "status": r.status})
    return out


# -- the readable table ---------------------------------------------------------------------
def fmt_seconds(s: float | None) -> str:
    if s is None or not math.isfinite(s):
        return "-"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("us", 1e-6)):
        if s >= scale:
            return f"{s / scale:.3g} {unit}"
    return f"{s / 1e-9:.3g} ns"


def _count(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else f"{v:g}"


def _cell(result: Any, j: int) -> str:
    """Iterations to target ``j``: the count, or over several seeds ``median [min..max] reached/seeds``."""
    if j < len(result.unreachable) and result.unreachable[j]:
        return "n/a (precision)"
    ks = [o.iters[j] for o in result.outcomes]
    got = sorted(k for k in ks if k is not None)
    if not got:
        text = "-" if len(ks) == 1 else f"- 0/{len(ks)}"
    elif len(ks) == 1:
        text = str(got[0])
    else:
        text = _count(statistics.median(got))
        if len(got) > 1:
            text += f" [{got[0]}..{got[-1]}]"
        text += f" {len(got)}/{len(ks)}"
    b = result.theory_bound[j] if j < len(result.theory_bound) else None
    if b is not None:
        text += f" (<={b}{' exceeded' if result.bound_violated()[j] else ''})"
    lo = result.theory_lower[j] if j < len(result.theory_lower) else None
    if lo is not None and result.below_lower()[j]:
        text += f" (below the lower bound {lo})"
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


_STATUSES = ("reached", "partial", "budget", "unstable", "diverged", "error", "timeout")


def _summary(by_inst: dict[str, list[Any]], label_of: Any) -> list[str]:
    """One line per rule: on how many instances it ended with each status."""
    counts: dict[str, dict[str, int]] = {}
    for rs in by_inst.values():
        for r in rs:
            row = counts.setdefault(label_of(r), dict.fromkeys(_STATUSES, 0))
            row[r.status] = row.get(r.status, 0) + 1
    statuses = [*_STATUSES, *sorted({s for c in counts.values() for s in c} - set(_STATUSES))]
    used = [s for s in statuses if any(c.get(s) for c in counts.values())]
    rows = [["rule", *used]] + [[label, *(str(c.get(s, 0)) for s in used)] for label, c in counts.items()]
    return [f"summary over {len(by_inst)} instances (cases by status)", *_grid(rows), ""]


def explain(outcome: Any, targets: Sequence[float]) -> str | None:
    """Why a seed's pass did not end cleanly, in one line (None when it did)."""
    from benchsuite.cases import DIVERGED_ABOVE

    if outcome.error:
        return f"{outcome.status}: {_first_line(outcome.error)}"
    k = outcome.iterations_run
    if outcome.status == "diverged":
        m = outcome.final_measure
        if not math.isfinite(m):
            what = "the measure became non-finite"
        elif m > DIVERGED_ABOVE:
            what = f"the measure reached {m:.3g}, above {DIVERGED_ABOVE:.0e} x its start"
        else:
            what = "the objective became non-finite"
        return f"diverged at iteration {k}: {what}; a smaller step size may help"
    if outcome.status == "unstable":
        reached = outcome.iters[-1] if outcome.iters else None
        left = getattr(outcome, "left_at", None)
        worst = getattr(outcome, "horizon_worst", None)
        horizon = getattr(outcome, "horizon", 0)
        tight = f"{targets[-1]:.0e}" if targets else "the tightest target"
        text = f"unstable: reached {tight} at iteration {reached} but rose above it"
        if left is not None:
            text += f" at iteration {left}"
        text += f" and was above it at the end of the {horizon} steps run after" if horizon else " and ended above it"
        if worst is not None and math.isfinite(worst):
            text += f" (worst measure {worst:.3g})"
        return text
    if outcome.status == "timeout":
        return f"timeout: stopped at iteration {k} by the per-pass limit (--timeout)"
    return None


def format_results(results: Sequence[Any], selected: Sequence[dict[str, Any]] = ()) -> str:
    """Per instance: one line per rule with status, iterations (theory bound), time per step, time to the tightest target.

    With a sweep only the selected grid point of each rule is shown (the
    table and history keep all of them) and the summary counts one row per
    rule. Over several seeds a cell reads ``median [min..max] r/n``: the
    median, least and most iterations over the seeds that reached the target,
    and how many of the ``n`` seeds did; ``(<=b)``: iterations the published
    rate guarantees; ``!``: the measured count exceeds it. Below the tables,
    one line per case that did not end cleanly says why (first failing seed).
    """
    chosen = {s["case"] for s in selected}
    base_label = {s["case"]: s["group"].split(" | ", 1)[-1] for s in selected if "group" in s}
    lines: list[str] = []
    by_inst: dict[str, list[Any]] = {}
    for r in results:
        if chosen and r.case.key() not in chosen:
            continue
        by_inst.setdefault(r.case.instance.name, []).append(r)
    problems: list[str] = []
    violated = impossible = unresolvable = False
    for name, rs in by_inst.items():
        c = rs[0].case
        targets = c.run_targets
        oracle = "full gradient" if c.oracle == "full" else f"minibatch B={c.batch}"
        seeds = f", {len(c.seeds)} seeds" if len(c.seeds) > 1 else ""
        lines.append(f"{name}  [{c.run_measure}, {oracle}{seeds}, budget {c.run_budget}]")
        head = ["rule", "status"] + [f"{t:.0e}" for t in targets] + ["time/step", f"time to {targets[-1]:.0e}"]
        rows = [head]
        for r in rs:
            violated = violated or any(r.bound_violated())
            impossible = impossible or any(r.below_lower())
            unresolvable = unresolvable or any(r.unreachable)
            label = r.case.rule.label
            if chosen:
                label = r.case.rule.name + "(" + ", ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}"
                                                         for k, v in r.case.rule.params) + ")"
            rows.append([label, r.status] + [_cell(r, j) for j in range(len(targets))]
                        + [_per_step(r), _time_to_tightest(r)])
            for o in r.outcomes:
                why = explain(o, targets)
                if why is not None and _contract_message(r, o.error) is None:  # contract breaches: said once, on stderr
                    seed = f" seed {o.seed}" if len(r.outcomes) > 1 else ""
                    problems.append(f"{name} {r.case.rule.label}{seed}: {why}")
                    break
        lines.extend(_grid(rows))
        lines.append("")
    if len(by_inst) > 1:
        lines.extend(_summary(by_inst, lambda r: base_label.get(r.case.key(), r.case.rule.label)))
    if violated:
        lines.append("exceeded: a measured count above its published bound: a bug in the rule, the constants or the runner")
    if unresolvable:
        lines.append("n/a (precision): the target lies below what the problem's precision (float32) can resolve "
                     "there; it counts as neither reached nor failed")
    if impossible:
        lines.append("below the lower bound: fewer iterations than conjugate gradients needs, which no gradient-span "
                     "method can do: the measurement, the oracle or the optimum is wrong")
    if problems:
        lines.append("problems:")
        lines.extend("  " + p for p in problems)
    return "\n".join(lines).rstrip()
