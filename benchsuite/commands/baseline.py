"""``benchsuite baseline``: record what a rule achieves, for the merge gate."""

from __future__ import annotations

import argparse
from typing import Any



def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rule", required=True, help="built-in rule name or import path package.module:attr")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE", help="hyperparameter (repeatable)")
    p.add_argument("--sweep", default=None, metavar="NAME=LO:HI:N",
                   help="select a hyperparameter per problem from a log grid (or a,b,c list); the choice is recorded")
    p.add_argument("--problems", default=None, metavar="SELECTOR", help="comma-separated names or globs")
    p.add_argument("--tier", default="small", help="tier for globs and the default selection (default: small)")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH", help="extra catalogue file or folder")
    p.add_argument("--batch", type=int, default=None, help="minibatch size (stochastic cases); default: full gradient")
    p.add_argument("--no-replace", action="store_true", help="minibatches drawn without replacement")
    p.add_argument("--seeds", type=int, default=None, help="number of seeds (default: 1 full gradient, 5 minibatch)")
    p.add_argument("--dtype", choices=("float32", "float64"),
                   help="record every problem in this precision (default: as catalogued); the gate reruns it so")
    p.add_argument("--horizon", metavar="STEPS,MULT", default=None,
                   help="stay-converged horizon after the tightest target: max(STEPS, MULT x iterations so far) "
                        "more steps (default 100,0.5); the gate reruns with the recorded horizon")
    p.add_argument("--out", default="results/baseline.json", help="baseline file (default: results/baseline.json)")
    p.add_argument("--force", action="store_true", help="overwrite an existing baseline")
    p.add_argument("--jobs", type=int, default=None, help="worker processes (default: cores)")
    p.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="Dask scheduler address (tcp://host:8786): run the passes on its workers")


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    from benchsuite.baseline import make_baseline, write_baseline
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.errors import UserError
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, parse_horizon, run_cases
    from benchsuite.sysinfo import machine_info

    out = Path(args.out)
    if out.exists() and not args.force:  # fail before spending minutes on runs
        raise UserError(f"{out}: baseline exists; pass --force to overwrite it")
    if args.batch is not None and args.batch < 1:
        raise UserError(f"--batch: must be >= 1, got {args.batch}")
    n_seeds = args.seeds if args.seeds is not None else (1 if args.batch is None else 5)
    if n_seeds < 1:
        raise UserError(f"--seeds: must be >= 1, got {n_seeds}")
    spec = parse_rule(args.rule, args.param)
    instances = select(load_catalogue(args.catalogue or None), args.problems, args.tier, validate=True)
    if not instances:
        raise UserError("--problems: no instance selected")
    oracle = "full" if args.batch is None else "minibatch"
    if args.batch is not None:  # as `run --batch`: problems that are not finite sums are skipped, and said so
        instances, skipped, small = finite_sums(instances, args.batch)
        if skipped:
            print(f"skipped (not finite sums, --batch needs one): {', '.join(skipped)}")
        if small:
            print(f"skipped (fewer samples than --batch {args.batch}): {', '.join(small)}")
        if not instances:
            raise UserError(f"--batch {args.batch}: none of the selected problems is a finite sum")

    horizon = parse_horizon(args.horizon)

    def case(inst: Any, rule: Any) -> Any:
        return Case(instance=inst, rule=rule, oracle=oracle, batch=args.batch, replace=not args.no_replace,
                    seeds=tuple(range(n_seeds)), horizon=horizon, dtype=args.dtype)

    if args.sweep is None:
        results = run_cases([case(i, spec) for i in instances], jobs=args.jobs, timing=False, cluster=args.cluster,
                            **_with_envelope())
    else:
        results = _swept(args.sweep, spec, instances, case, args.jobs, cluster=args.cluster)
    broken = [f"{r.case.instance.name} ({r.status}{_why(r)})" for r in results
              if r.status in ("diverged", "error", "timeout")]
    if broken:
        raise UserError(f"{out}: not written: {len(broken)} case(s) failed with {spec.label}: {'; '.join(broken)}")
    baseline = make_baseline(results, rule_label=spec.label, machine=machine_info())
    write_baseline(baseline, out, force=args.force)
    print(f"wrote {out}: {len(results)} case(s) of {spec.label}")
    unreached = [r.case.instance.name for r in results if r.status == "budget"]
    if unreached:
        print(f"note: no target reached on {', '.join(unreached)}; "
              "the gate only holds a candidate to what the baseline reached")
    for line in transient_warnings(baseline):
        print(f"warning: {line}")
    return 0


def finite_sums(instances: list[Any], batch: int) -> tuple[list[Any], list[str], list[str]]:
    """The instances a minibatch oracle can run: finite sums with at least ``batch`` samples.

    Also the names skipped as not finite sums, and those (with their sample
    count) skipped as smaller than the batch.
    """
    keep, skipped, small = [], [], []
    for inst in instances:
        n = inst.build().n_samples
        if n is None:
            skipped.append(inst.name)
        elif batch > n:
            small.append(f"{inst.name} ({n})")
        else:
            keep.append(inst)
    return keep, skipped, small


def transient_warnings(baseline: Any) -> list[str]:
    """One line per case whose baseline met a target only transiently, or left its tightest target."""
    out = []
    for c in baseline.cases:
        for o in c.outcomes:
            seed = f" seed {o.seed}" if len(c.outcomes) > 1 else ""
            gone = [f"{t:.0e} (at iteration {first})" for t, first, h in zip(c.targets, o.iters, o.held)
                    if first is not None and h is None]
            if gone:
                out.append(f"{c.instance}{seed}: met {', '.join(gone)} only transiently; the gate will not "
                           "hold a candidate to it (a longer budget or a looser target makes it count)")
            elif o.left_at is not None:
                out.append(f"{c.instance}{seed}: left the tightest target at iteration {o.left_at} during the "
                           "stay-converged horizon")
    return out


def _with_envelope() -> dict[str, Any]:
    """``envelope=True`` for the runner, once it records round-off envelopes (older runners: nothing)."""
    import inspect

    from benchsuite.runner import run_cases

    return {"envelope": True} if "envelope" in inspect.signature(run_cases).parameters else {}


def _why(result: Any) -> str:
    errors = [(o.error.strip().splitlines() or [""])[-1] for o in result.outcomes if o.error]
    return f": {errors[0]}" if errors else ""


def _swept(text: str, spec: Any, instances: list[Any], case: Any, jobs: int | None,
           cluster: str | None = None) -> list[Any]:
    """Run the grid on each instance and keep each instance's selected grid point."""
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import run_cases
    from benchsuite.sweep import parse_sweep, select_best

    sweep = parse_sweep(text)
    grid = [(inst, v) for inst in instances for v in sweep.values]
    cases = [case(inst, parse_rule(spec.name, {**dict(spec.params), sweep.name: v})) for inst, v in grid]
    results = run_cases(cases, jobs=jobs, timing=False, cluster=cluster)
    chosen = []
    for inst in instances:
        best, value = select_best((r, v) for (i, v), r in zip(grid, results) if i.name == inst.name)
        print(f"{inst.name}: selected {sweep.name}={value!r}")
        chosen.append(best)
    envelope = _with_envelope()
    if envelope:  # the grid ran without shadow passes; the selected points get their round-off envelope
        chosen = run_cases([r.case for r in chosen], jobs=jobs, timing=False, cluster=cluster, **envelope)
    return chosen
