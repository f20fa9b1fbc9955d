"""``benchsuite history``: query the runs recorded in ``<out>/history.sqlite``.

``--instance`` and ``--rule`` take names or shell-style globs, the syntax
``--problems`` uses (``'adam*'``, ``'quad-?iag-*'``; ``%`` and ``_`` are
ordinary characters); ``--since`` an ISO date or date/time (UTC unless an
offset is given). ``--json`` writes every column with full float64 precision.
"""

from __future__ import annotations

import argparse
import json

HELP = "query the history of recorded runs (iterations and time to target over commits)"

_SHOWN = ["run_id", "started", "git_commit", "instance", "rule", "target", "iterations", "time_to_target",
          "status"]


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--instance", metavar="GLOB", help="instance name or shell-style glob (* and ?), as --problems")
    p.add_argument("--rule", metavar="GLOB", help="rule label or shell-style glob, e.g. 'adam*'")
    p.add_argument("--run", metavar="RUN_ID", help="one run only")
    p.add_argument("--since", metavar="DATE",
                   help="runs started at or after this ISO date or date/time, e.g. 2026-03-12 or 2026-03-12T14:30 "
                        "(UTC unless an offset is given)")
    p.add_argument("--commit", metavar="SHA", help="runs of git commits starting with SHA")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder (default ./results)")
    p.add_argument("--json", action="store_true", help="every column, as JSON records (floats at full precision)")


def run(args: argparse.Namespace) -> int:
    from benchsuite.results import json_records, parse_since, query_history

    if args.since is not None:
        parse_since(args.since)  # one line and exit 2 for a malformed date, even with no history yet
    df = query_history(args.out, instance=args.instance, rule=args.rule, run_id=args.run,
                       since=args.since, commit=args.commit)
    if args.json:
        print(json.dumps(json_records(df), indent=1, allow_nan=False))
        return 0
    if df.empty:
        print("no matching rows")
        return 0
    view = df[_SHOWN].copy()
    view["git_commit"] = view["git_commit"].fillna("-").str.slice(0, 10)
    view["target"] = [f"{t:.0e}" for t in view["target"]]
    view["time_to_target"] = [_seconds(t) for t in view["time_to_target"]]
    view = view.astype(object).where(view.notna(), "-")  # missing: "-", not <NA> / None
    print(view.to_string(index=False))
    return 0


def _seconds(v: object) -> str:
    from benchsuite.commands.run import fmt_seconds

    try:
        return fmt_seconds(None if v is None else float(v))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "-"
