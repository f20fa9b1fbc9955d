"""``benchsuite history``: query the runs recorded in ``<out>/history.sqlite``."""

from __future__ import annotations

import argparse

HELP = "query the history of recorded runs (iterations and time to target over commits)"

_SHOWN = ["run_id", "started", "git_commit", "instance", "rule", "target", "iterations", "time_to_target",
          "status"]


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--instance", metavar="PATTERN", help="instance name, SQL LIKE pattern (%% wildcard)")
    p.add_argument("--rule", metavar="PATTERN", help="rule label, SQL LIKE pattern")
    p.add_argument("--run", metavar="RUN_ID", help="one run only")
    p.add_argument("--since", metavar="DATE", help="runs started at or after this ISO date/time")
    p.add_argument("--commit", metavar="SHA", help="runs of git commits starting with SHA")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder (default ./results)")
    p.add_argument("--json", action="store_true", help="every column, as JSON records")


def run(args: argparse.Namespace) -> int:
    from benchsuite.results import history_path, query_history

    df = query_history(history_path(args.out), instance=args.instance, rule=args.rule, run_id=args.run,
                       since=args.since, commit=args.commit)
    if args.json:
        print(df.to_json(orient="records", indent=1))
        return 0
    if df.empty:
        print("no matching rows")
        return 0
    view = df[_SHOWN].copy()
    view["git_commit"] = view["git_commit"].fillna("-").str.slice(0, 10)
    print(view.to_string(index=False))
    return 0
