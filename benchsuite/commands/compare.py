"""``benchsuite compare``: time per step and time to target of B against A, with intervals.

Exit codes: 0 -- done (and, with ``--fail-above``, the limit passed);
1 -- the speed limit failed; 2 -- a usage error; 3 -- the speed limit is
undecided (its interval contains the limit); 130 -- interrupted (Ctrl-C or
SIGTERM).
"""

from __future__ import annotations

import argparse
import re
from pathlib import Path
from typing import Any

_LIMIT = re.compile(r"^\s*([+-]?(?:\d+(?:\.\d*)?|\.\d+))\s*%?\s*$")


def parse_limit(text: str) -> float:
    """``"5%"`` or ``"5"`` -> 0.05 (a percentage of A's time per step)."""
    from benchsuite.errors import UserError

    m = _LIMIT.match(text)
    if not m:
        raise UserError(f"--fail-above: {text!r} is not a percentage such as 5%")
    return float(m.group(1)) / 100.0


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.epilog = ("exit codes: 0 done (with --fail-above: passed), 1 the speed limit failed (or B loses a target A "
                "reaches), 3 undecided (the interval contains the limit), 2 usage error, 130 interrupted")
    p.add_argument("a", help="rule A: built-in name or import path (with --runs: a run id)")
    p.add_argument("b", nargs="?", default=None, help="rule B (default: the same as A, e.g. with --rev-a/--rev-b)")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="hyperparameter of both sides (--param-a/--param-b override it per side)")
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
    p.add_argument("--pairs", type=int, default=31, metavar="N",
                   help="interleaved replay pairs (A B / B A) per case (default 31, at least 2)")
    p.add_argument("--process-pairs", type=int, default=None, metavar="N",
                   help="with --rev-a/--rev-b: spread the replay pairs over N pairs of fresh processes (default 5)")
    p.add_argument("--fail-above", default=None, metavar="PCT",
                   help="speed limit: exit 1 when B's time per step is more than PCT (e.g. 5%%) above A's, "
                        "0 when it is below, 3 when the interval contains the limit")
    p.add_argument("--clock", choices=("cpu", "wall"), default="cpu",
                   help="time replays by process CPU time (default; robust on a busy machine) or wall time")
    p.add_argument("--jobs", type=int, default=None, help="worker processes for the monitored passes")
    p.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="Dask scheduler address: run the monitored passes on its workers (replay pairs stay here)")
    p.add_argument("--markdown", metavar="FILE",
                   help="write the comparison as Markdown, with its forest plot as a PNG beside the file")
    p.add_argument("--dtype", choices=("float32", "float64"),
                   help="both sides run every problem in this precision (default: as catalogued)")
    p.add_argument("--html", metavar="FILE",
                   help="write one self-contained HTML page: summary, forest plots, per-case table, method")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")


def _side_params(both: list[str], own: list[str]) -> dict[str, Any]:
    """``--param`` values, overridden by the side's own ``--param-a`` / ``--param-b``."""
    from benchsuite.rulespec import parse_param

    params: dict[str, Any] = {}
    for text in both:
        k, v = parse_param(text)
        params[k] = v
    seen: set[str] = set()
    for text in own:
        k, v = parse_param(text)
        if k in seen:
            from benchsuite.errors import UserError

            raise UserError(f"hyperparameter {k!r} given twice for one side")
        seen.add(k)
        params[k] = v
    return params


def _interrupt(signum: int, frame: Any) -> None:
    raise KeyboardInterrupt


def run(args: argparse.Namespace) -> int:
    import signal
    from pathlib import Path

    from benchsuite.compare import Side, compare, compare_runs
    from benchsuite.errors import UserError
    from benchsuite.report import compare_json, compare_markdown, compare_table
    from benchsuite.results import atomic_write_text

    limit = None if args.fail_above is None else parse_limit(args.fail_above)
    if args.runs:
        if args.b is None:
            raise UserError("--runs: give two run ids")
        if limit is not None:
            raise UserError("--fail-above: saved runs have no interval to judge; measure with compare A B instead")
        result = compare_runs(args.a, args.b, out=args.out)
    else:
        b = args.b or args.a
        if args.b is None and not (args.rev_a or args.rev_b):
            raise UserError("compare: give rule B, or --rev-a/--rev-b to compare one rule at two revisions")
        # SIGTERM (a CI cancel) stops the comparison like Ctrl-C: worker processes and worktrees are cleaned up
        previous = signal.signal(signal.SIGTERM, _interrupt)
        try:
            result = compare(
                Side(args.a, _side_params(args.param, args.param_a), args.rev_a),
                Side(b, _side_params(args.param, args.param_b), args.rev_b),
                problems=args.problems, tier=args.tier, oracle="full" if args.batch is None else "minibatch",
                batch=args.batch, pairs=args.pairs, jobs=args.jobs, catalogue_paths=args.catalogue, clock=args.clock,
                process_pairs=args.process_pairs, fail_above=limit, cluster=args.cluster, dtype=args.dtype,
            )
        finally:
            signal.signal(signal.SIGTERM, previous)
    if args.markdown:
        write_markdown_with_figure(Path(args.markdown), compare_markdown(result), result)
    if args.html:
        from benchsuite.htmlreport import compare_page

        atomic_write_text(Path(args.html), compare_page(result))
    print(compare_json(result) if args.json else compare_table(result), end="" if args.json else "\n")
    return 0 if result.verdict is None else result.verdict.exit_code


def write_markdown_with_figure(path: Path, text: str, result: Any) -> None:
    """The Markdown file and, beside it, ``<stem>-forest.png`` (linked at the end) for a pull-request comment."""
    from benchsuite import figures
    from benchsuite.results import atomic_write_bytes, atomic_write_text

    png = path.with_name(path.stem + "-forest.png")
    atomic_write_bytes(png, figures.png(figures.compare_figure(result)))
    atomic_write_text(path, text.rstrip("\n") + f"\n\n![time ratio B / A per case]({png.name})\n")
