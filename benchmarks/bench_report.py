"""Time to draw a run's report, against bare matplotlib drawing the same lines in the same run.

A run of the default rule set on the small tier is made once in a fresh folder
(or ``--run-dir OUT`` reuses a results folder and its latest run). Then, in
alternation (3 rounds, medians compared):

* suite: :func:`benchsuite.htmlreport.build_report` + :func:`render_html`
  (reading the table and traces, profiles, every figure as a 256-colour PNG);
* bare: one matplotlib figure per problem with the same traces plotted as
  plain lines on log axes and one figure per profile with the same number of
  step lines, saved as RGBA PNG -- what any report of this run must at least
  draw.

Printed: wall and CPU seconds of both, the ratio, the page size, the traces'
size per case. CPU seconds are steadier on a shared machine; the load average
is printed with the figures.

Run: ``.venv/bin/python benchmarks/bench_report.py [--run-dir OUT]``.
"""

from __future__ import annotations

import argparse
import io
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _bare(run) -> None:  # noqa: ANN001
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    by_instance: dict[str, list[str]] = {}
    for key in run.cases:
        by_instance.setdefault(key.split(" | ")[0], []).append(key)
    for keys in by_instance.values():
        fig = Figure(figsize=(11.5, 3.9), dpi=90)
        FigureCanvasAgg(fig)
        ax1, ax2 = fig.subplots(1, 2)
        for key in keys:
            for tr in run.traces(key).values():
                ax1.plot(tr.iteration[1:], tr.measure[1:])
                ax2.plot(tr.seconds[1:], tr.measure[1:])
        for ax in (ax1, ax2):
            ax.set_xscale("log")
            ax.set_yscale("log")
        fig.savefig(io.BytesIO(), format="png")
    rules = sorted({k.split(" | ")[1] for k in run.cases})
    for _ in range(3):  # iterations, time, data profiles: 4 panels each
        fig = Figure(figsize=(11, 6.7), dpi=90)
        FigureCanvasAgg(fig)
        for ax in fig.subplots(2, 2).ravel():
            for i, _r in enumerate(rules):
                ax.step([1, 2, 4, 8], [0.1 * i, 0.2, 0.5, 0.9], where="post")
            ax.set_xscale("log", base=2)
        fig.savefig(io.BytesIO(), format="png")


def _suite(run) -> int:  # noqa: ANN001
    from benchsuite.htmlreport import build_report, render_html

    return len(render_html(build_report(run)).encode())


def _clock(fn, *args):  # noqa: ANN001, ANN202
    w, c = time.perf_counter(), time.process_time()
    out = fn(*args)
    return time.perf_counter() - w, time.process_time() - c, out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run-dir", help="a results folder whose latest run to report (default: make one)")
    args = ap.parse_args()
    from benchsuite.runs import open_run

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(args.run_dir) if args.run_dir else Path(tmp) / "results"
        if not args.run_dir:
            print("making a default run (small tier, default rules) ...", flush=True)
            subprocess.run([sys.executable, "-m", "benchsuite", "run", "--out", str(out)], check=True,
                           stdout=subprocess.DEVNULL)
        run = open_run(out)
        traces = list((run.path / "traces").glob("*.npz"))
        size = sum(f.stat().st_size for f in traces)
        _suite(run)  # warm: matplotlib import, font cache
        suite, bare = [], []
        for _ in range(3):
            w, c, page = _clock(_suite, run)
            suite.append((w, c))
            w, c, _ = _clock(_bare, run)
            bare.append((w, c))
    sw, sc = (statistics.median(v) for v in zip(*suite))
    bw, bc = (statistics.median(v) for v in zip(*bare))
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; run {run.run_id}, {len(run.cases)} cases")
    print(f"report (suite): {sw:.2f} s wall, {sc:.2f} s CPU; page {page / 1e6:.2f} MB")
    print(f"bare matplotlib, same lines: {bw:.2f} s wall, {bc:.2f} s CPU")
    print(f"ratio suite / bare: {sc / bc:.2f}x CPU, {sw / bw:.2f}x wall")
    if traces:
        print(f"traces: {len(traces)} files, {size / 1e6:.2f} MB, {size / len(traces) / 1e3:.1f} kB per case")
    else:
        print("traces: none (run recorded before traces existed)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
