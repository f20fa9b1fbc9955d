"""``benchsuite report``: one run as a self-contained HTML page, or markdown with PNGs beside it.

``benchsuite report`` reports the latest run under ``results/`` into
``results/runs/<id>/report.html``; ``RUN_ID`` picks another run, ``--html
FILE`` and ``--markdown FILE`` choose where (the markdown's figures go to
``<FILE stem>-figures/`` next to it, for a pull-request comment).
"""

from __future__ import annotations

import argparse

HELP = "draw a run's report: summary, performance and data profiles, convergence curves, provenance (HTML or markdown)"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("run_id", nargs="?", metavar="RUN_ID", help="the run to report (default: the latest)")
    p.add_argument("--html", metavar="FILE", help="write the self-contained HTML page here")
    p.add_argument("--markdown", metavar="FILE", help="write markdown here, its PNGs in <FILE stem>-figures/ beside it")
    p.add_argument("--out", default="results", metavar="DIR", help="results folder (default ./results)")
    p.add_argument("--quiet", action="store_true", help="no progress lines on stderr")


def run(args: argparse.Namespace) -> int:
    import sys
    import time
    from pathlib import Path

    from benchsuite.errors import UserError
    from benchsuite.htmlreport import build_report, render_html, render_markdown
    from benchsuite.results import atomic_write_bytes, atomic_write_text
    from benchsuite.runs import open_run

    for flag, value in (("--html", args.html), ("--markdown", args.markdown)):
        if value is not None and (Path(value).is_dir() or not Path(value).name):
            raise UserError(f"{flag} {value}: is a folder; give a file name")
    run_ = open_run(args.out, args.run_id)
    start = time.perf_counter()

    def progress(name: str) -> None:
        if not args.quiet:
            print(f"benchsuite: drawing {name}", file=sys.stderr, flush=True)

    report = build_report(run_, progress=progress)
    html_path = args.html
    if html_path is None and args.markdown is None:
        html_path = str(run_.path / "report.html")
    try:
        if html_path is not None:
            page = render_html(report)
            atomic_write_text(html_path, page)
            print(f"{html_path}: {len(page.encode()) / 1e6:.2f} MB, {len(report.profiles)} profile figures, "
                  f"{sum(p.figure is not None for p in report.problems)} problem figures")
        if args.markdown is not None:
            md = Path(args.markdown)
            folder = md.with_name(md.stem + "-figures")
            text, files = render_markdown(report, folder.name)
            for name, data in files.items():
                atomic_write_bytes(folder / name, data)
            atomic_write_text(md, text)
            print(f"{md}: markdown, {len(files)} PNGs in {folder}")
    except OSError as exc:
        raise UserError(f"cannot write the report: {exc}") from None
    if not args.quiet:
        print(f"benchsuite: report of run {run_.run_id} drawn in {time.perf_counter() - start:.1f} s", file=sys.stderr)
    return 0

