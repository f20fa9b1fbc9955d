"""``benchsuite gate``: rerun a baseline's cases with a candidate rule; exit 0 pass, 1 fail."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--rule", required=True, help="candidate rule: built-in name or import path package.module:attr")
    p.add_argument("--param", action="append", default=[], metavar="NAME=VALUE",
                   help="override a recorded hyperparameter (repeatable)")
    p.add_argument("--baseline", required=True, help="baseline file recorded by `benchsuite baseline`")
    p.add_argument("--catalogue", action="append", default=[], metavar="PATH", help="extra catalogue file or folder")
    p.add_argument("--slack-iters", type=int, default=None, metavar="N",
                   help="allowed extra iterations per crossing (default: 0 where the crossing is out of round-off's "
                        "reach, 1 elsewhere; N replaces both)")
    p.add_argument("--slack-rel", type=float, default=0.01, help="allowed relative extra iterations (default 0.01)")
    p.add_argument("--noise-factor", type=float, default=0.0,
                   help="stochastic cases: loosen each seed's allowance by c x (max - min) of the baseline seeds "
                        "(default 0: seeds are judged in pairs, a clean rerun is bit-identical)")
    p.add_argument("--exact", action="store_true",
                   help="also fail when the trajectory fingerprint departs from the baseline's by more than "
                        "100 x its recorded round-off envelope")
    p.add_argument("--envelope-k", type=float, default=100.0, metavar="K",
                   help="--exact allows K x the baseline's round-off envelope at each checkpoint (default 100)")
    p.add_argument("--sign-alpha", type=float, default=0.05, metavar="P",
                   help="stochastic cases: fail a shift of the seeds in one direction at sign-test p <= P (default 0.05)")
    p.add_argument("--dtype", choices=("float32", "float64"),
                   help="check that the baseline was recorded in this precision (the cases rerun in the recorded one)")
    p.add_argument("--markdown", metavar="FILE",
                   help="write a pull-request comment in Markdown, with a PNG per failing or changed case beside it")
    p.add_argument("--html", metavar="FILE",
                   help="write one self-contained HTML page with the verdicts and a picture per failing or changed case")
    p.add_argument("--junit", metavar="FILE", help="write JUnit XML (one test case per gate case)")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")
    p.add_argument("--jobs", type=int, default=None, help="worker processes (default: cores)")
    p.add_argument("--timeout", type=float, default=None, help="per-case wall-clock limit in seconds")
    p.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="Dask scheduler address (tcp://host:8786): run the passes on its workers")


def run(args: argparse.Namespace) -> int:
    from benchsuite.baseline import load_baseline
    from benchsuite.errors import UserError
    from benchsuite.gate import GateConfig, run_gate
    from benchsuite.report import gate_json, gate_junit, gate_markdown, gate_table
    from benchsuite.results import atomic_write_text

    config = GateConfig(slack_iters=args.slack_iters, slack_rel=args.slack_rel, noise_factor=args.noise_factor,
                        exact=args.exact, envelope_k=args.envelope_k, sign_alpha=args.sign_alpha)
    baseline = load_baseline(args.baseline)
    if args.dtype:
        other = sorted({c.instance for c in baseline.cases if (c.dtype or "float64") != args.dtype})
        if other:
            raise UserError(f"{args.baseline}: --dtype {args.dtype}: the baseline recorded {', '.join(other)} in another "
                            f"precision; record it with `benchsuite baseline --dtype {args.dtype}`")
    report = run_gate(baseline, args.rule, args.param, config=config, jobs=args.jobs,
                      catalogue_paths=args.catalogue, timeout=args.timeout, cluster=args.cluster)
    if args.markdown:
        write_markdown(Path(args.markdown), gate_markdown(report), report, baseline)
    if args.html:
        from benchsuite.htmlreport import gate_page

        atomic_write_text(Path(args.html), gate_page(report, baseline))
    if args.junit:
        atomic_write_text(Path(args.junit), gate_junit(report))
    print(gate_json(report) if args.json else gate_table(report), end="" if args.json else "\n")
    return 0 if report.passed else 1


def write_markdown(path: Path, text: str, report: Any, baseline: Any) -> None:
    """The Markdown comment and, beside it, ``<stem>-<case>.png`` for each failing or changed case, linked."""
    from benchsuite.htmlreport import gate_figures
    from benchsuite.results import atomic_write_bytes, atomic_write_text

    links = []
    for fig in gate_figures(report, baseline):
        png = path.with_name(f"{path.stem}-{fig.name}.png")
        atomic_write_bytes(png, fig.png)
        links.append(f"![{fig.caption}]({png.name})")
    atomic_write_text(path, text.rstrip("\n") + ("\n\n" + "\n\n".join(links) if links else "") + "\n")
