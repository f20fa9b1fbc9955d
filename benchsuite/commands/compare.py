"""``benchsuite compare``: speed-up of B over A with confidence intervals."""

from __future__ import annotations

import argparse



def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("a", help="rule A: built-in name or import path (with --runs: a run id)")
    p.add_argument("b", nargs="?", default=None, help="rule B (default: the same as A, e.g. with --rev-a/--rev-b)")
    p.add_argument("--param-a", action="append", default=[], metavar="NAME=VALUE", help="hyperparameter of A")
    p.add_argument("--param-b", action="append", default=[], metavar="NAME=VALUE", help="hyperparameter of B")
    p.add_argument("--rev-a", default=None, help="git revision for A (a temporary worktree of this repository)")
    p.add_argument("--rev-b", default=None, help="git revision for B (default: the working tree)")
    p.add_argument("--runs", action="store_true", help="A and B are saved run ids: compare their tables")
    p.add_argument("--out", default="results", help="results folder holding runs/ (with --runs)")
    p.add_argument("--problems", default=None, metavar="SELECTOR", help="comma-separated names or globs")
    p.add_argument("--tier", default="small", help="tier for globs and the default selection (default: small)")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH", help="extra catalogue file or folder")
    p.add_argument("--batch", type=int, default=None, help="minibatch size (default: full gradient)")
    p.add_argument("--repeats", type=int, default=31, help="timed replay pairs per case (default 31)")
    p.add_argument("--rounds", type=int, default=None,
                   help="git revisions: spread the pairs over this many pairs of fresh processes (default 3)")
    p.add_argument("--clock", choices=("cpu", "wall"), default="cpu",
                   help="time replays by process CPU time (default; robust on a busy machine) or wall time")
    p.add_argument("--jobs", type=int, default=None, help="worker processes for the monitored passes")
    p.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="Dask scheduler address: run the monitored passes on its workers (replay pairs stay here)")
    p.add_argument("--markdown", metavar="FILE", help="write the comparison as Markdown")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")


def run(args: argparse.Namespace) -> int:
    from pathlib import Path

    from benchsuite.compare import Side, compare, compare_runs
    from benchsuite.errors import UserError
    from benchsuite.report import compare_json, compare_markdown, compare_table
    from benchsuite.results import atomic_write_text

    if args.runs:
        if args.b is None:
            raise UserError("--runs: give two run ids")
        result = compare_runs(args.a, args.b, out=args.out)
    else:
        b = args.b or args.a
        if args.b is None and not (args.rev_a or args.rev_b):
            raise UserError("compare: give rule B, or --rev-a/--rev-b to compare one rule at two revisions")
        result = compare(
            Side(args.a, tuple(args.param_a), args.rev_a),
            Side(b, tuple(args.param_b), args.rev_b),
            problems=args.problems, tier=args.tier, oracle="full" if args.batch is None else "minibatch",
            batch=args.batch, repeats=args.repeats, jobs=args.jobs, catalogue_paths=args.catalogue, clock=args.clock,
            rounds=args.rounds, cluster=args.cluster,
        )
    if args.markdown:
        atomic_write_text(Path(args.markdown), compare_markdown(result))
    print(compare_json(result) if args.json else compare_table(result), end="" if args.json else "\n")
    return 0
