"""``benchsuite runs``: earlier runs read from their folders, and a failed case's stored traceback.

``benchsuite runs`` lists every run under ``<out>/runs/`` -- id, start date,
status (complete / partial / interrupted), cases stored, problems, rules,
git commit -- including runs that were interrupted or killed and so never
reached the history. ``benchsuite runs RUN_ID`` lists that run's cases with
their status; ``--errors`` prints the stored message and traceback of every
case that failed (error, timeout, diverged), ``--case GLOB`` narrows to cases
whose key or instance name matches.
"""

from __future__ import annotations

import argparse

HELP = "list earlier runs (also interrupted ones) or one run's cases and the tracebacks of its failures"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("run_id", nargs="?", metavar="RUN_ID", help="show this run's cases (\"latest\": the newest run)")
    p.add_argument("--errors", action="store_true",
                   help="print the stored error message and traceback of each failed case")
    p.add_argument("--case", metavar="GLOB", help="only cases whose key or instance matches (e.g. 'mgh-*')")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder (default ./results)")
    p.add_argument("--json", action="store_true", help="machine-readable output")


def run(args: argparse.Namespace) -> int:
    from benchsuite.errors import UserError

    if args.run_id is None:
        if args.errors or args.case:
            raise UserError("--errors/--case need a RUN_ID (or 'latest')")
        return _list(args)
    return _show(args)


def _list(args: argparse.Namespace) -> int:
    import json

    from benchsuite.report import table
    from benchsuite.runs import list_runs

    runs = list_runs(args.out)
    if args.json:
        print(json.dumps([{
            "run_id": r.run_id, "started": r.started, "ended": r.ended, "status": r.status,
            "cases": r.cases_done, "planned": r.cases_planned, "failed": r.failed, "rules": list(r.rules),
            "problems": list(r.problems), "selector": r.selector, "commit": r.commit, "dirty": r.dirty,
            "path": str(r.path),
        } for r in runs], indent=1))
        return 0
    if not runs:
        print(f"no runs under {args.out}/runs (run `benchsuite run` first)")
        return 0
    rows = []
    for r in runs:
        planned = "?" if r.cases_planned is None else str(r.cases_planned)
        rules = ",".join(r.rules) if len(r.rules) <= 3 else f"{len(r.rules)} rules"
        problems = ",".join(r.problems) if len(r.problems) <= 2 else f"{len(r.problems)} ({r.selector})"
        rows.append((r.run_id, r.started.replace("T", " ").rstrip("Z"), r.status,
                     f"{r.cases_done}/{planned}" + (f" ({r.failed} failed)" if r.failed else ""),
                     problems, rules, r.commit_text))
    print(table(("run", "started (UTC)", "status", "cases", "problems", "rules", "commit"), rows))
    if any(r.status != "complete" for r in runs):
        print("\npartial: stopped by Ctrl-C with its finished cases kept; interrupted: never closed "
              "(killed, or still running). Either completes with `benchsuite run --resume RUN_ID`.")
    return 0


def _show(args: argparse.Namespace) -> int:
    import json

    from benchsuite.errors import UserError
    from benchsuite.report import table
    from benchsuite.runs import open_run

    run = open_run(args.out, None if args.run_id == "latest" else args.run_id)
    if args.errors:
        failed = run.failed_cases(args.case)
        if args.json:
            print(json.dumps([{"case": d["key"], "status": d.get("status"),
                               "errors": [{"seed": o.get("seed"), "status": o.get("status"), "error": o.get("error")}
                                          for o in d.get("outcomes", ())]} for d in failed], indent=1))
            return 0
        if not failed:
            what = f" matching {args.case!r}" if args.case else ""
            print(f"run {run.run_id}: no failed case{what}")
            return 0
        for d in failed:
            print(f"== {d['key']}  [{d.get('status')}]")
            for o in d.get("outcomes", ()):
                text = o.get("error") or _no_message(o.get("status"))
                print(f"-- seed {o.get('seed')}: {o.get('status')}")
                print(text.rstrip())
            print()
        return 0
    docs = [d for k, d in sorted(run.cases.items())
            if not args.case or _match(k, args.case)]
    if args.case and not docs:
        raise UserError(f"--case {args.case!r}: no case of run {run.run_id} matches")
    if args.json:
        print(json.dumps({"run_id": run.run_id, "status": run.info.status, "meta": run.meta,
                          "cases": [{"case": d["key"], "status": d.get("status")} for d in docs]}, indent=1))
        return 0
    i = run.info
    print(f"run {i.run_id}: {i.status}, {i.cases_done}/{i.cases_planned or '?'} cases, started {i.started}, "
          f"commit {i.commit_text}")
    rows = [(d.get("status", "?"), d["key"]) for d in docs]
    print(table(("status", "case"), rows))
    if any(d.get("status") in ("error", "timeout", "diverged") for d in docs):
        print(f"\ntracebacks: benchsuite runs {run.run_id} --errors [--case GLOB]")
    return 0


def _match(key: str, pattern: str) -> bool:
    import fnmatch

    return fnmatch.fnmatchcase(key, pattern) or fnmatch.fnmatchcase(key.split(" | ")[0], pattern)


def _no_message(status: str | None) -> str:
    return {
        "diverged": "(no traceback: the measure became non-finite or exceeded the divergence limit)",
        "timeout": "(no traceback: the pass ran past its time limit)",
    }.get(str(status), "(no message stored)")
