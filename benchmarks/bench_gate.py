"""The merge gate's time on the default set, and the extra cost of recording the round-off envelope.

Measured in one run, in a scratch folder holding a copy of the committed
reference cache (so no certified optimum is computed):

1. **Recording**: the monitored passes of ``benchsuite baseline --rule RULE``
   on the default selection (``--tier small``, full gradient) without the
   envelope (the bare passes, what ``run --no-timing`` does) and with it (what
   ``baseline`` does: two shadow passes per seed). Printed: wall and CPU
   seconds and the ratio with / without (the envelope's extra cost).
2. **Gating**: :func:`benchsuite.gate.run_gate` of the same rule against that
   baseline, default and ``--exact`` (the judging itself is pure and cheap: the
   cost is the candidate's passes, stay-converged horizon included), as a
   ratio to the bare passes; and ``benchsuite gate`` end to end in a fresh
   process (imports included). Aim: under 60 s on 2 cores.

Each measurement is repeated ``--repeats`` times (default 3) and the median
is shown with the min-max range; the load average is printed before and after,
because on a shared machine wall-clock figures are inflated by other work.

Run: ``.venv/bin/python benchmarks/bench_gate.py [--rule adam] [--jobs 2] [--repeats 3]``.
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _cpu() -> float:
    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _timed(fn, repeats: int) -> tuple[list[float], list[float], object]:
    walls, cpus, out = [], [], None
    for _ in range(repeats):
        w, c = time.perf_counter(), _cpu()
        out = fn()
        walls.append(time.perf_counter() - w)
        cpus.append(_cpu() - c)
    return walls, cpus, out


def _fmt(v: list[float]) -> str:
    return f"{statistics.median(v):7.2f} s (range {min(v):.2f}-{max(v):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rule", default="adam")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()

    work = Path(tempfile.mkdtemp(prefix="bench-gate-"))
    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", work / "results" / "reference")
    os.chdir(work)
    from benchsuite.baseline import make_baseline, write_baseline
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.gate import GateConfig, run_gate
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases
    from benchsuite.sysinfo import machine_info

    print(f"load average before: {' '.join(f'{v:.2f}' for v in os.getloadavg())}; cores {os.cpu_count()}; "
          f"jobs {args.jobs}; rule {args.rule}; repeats {args.repeats}")
    spec = parse_rule(args.rule)
    instances = select(load_catalogue(), None, "small", validate=True)
    cases = [Case(instance=i, rule=spec) for i in instances]
    print(f"default set: {len(cases)} small-tier instances, full gradient, one seed each")

    def passes(envelope: bool):
        return lambda: run_cases(cases, jobs=args.jobs, timing=False, progress=False, envelope=envelope)

    bare_w, bare_c, _ = _timed(passes(False), args.repeats)
    env_w, env_c, results = _timed(passes(True), args.repeats)
    path = write_baseline(make_baseline(results, rule_label=spec.label, machine=machine_info()),
                          work / "baseline.json", force=True)
    from benchsuite.baseline import load_baseline

    base = load_baseline(path)
    gate_w, gate_c, report = _timed(lambda: run_gate(base, args.rule, jobs=args.jobs), args.repeats)
    exact_w, exact_c, exact = _timed(lambda: run_gate(base, args.rule, config=GateConfig(exact=True), jobs=args.jobs),
                                     args.repeats)
    cli = [sys.executable, "-m", "benchsuite", "gate", "--rule", args.rule, "--baseline", str(path),
           "--jobs", str(args.jobs)]
    cli_w, cli_c, proc = _timed(lambda: subprocess.run(cli, capture_output=True, text=True, check=False), args.repeats)

    med = statistics.median
    print()
    print("recording (monitored passes of the default set)")
    print(f"  bare passes, no envelope     wall {_fmt(bare_w)}   cpu {_fmt(bare_c)}")
    print(f"  with the round-off envelope  wall {_fmt(env_w)}   cpu {_fmt(env_c)}")
    print(f"  envelope cost: x{med(env_w) / med(bare_w):.2f} wall, x{med(env_c) / med(bare_c):.2f} cpu "
          "(two shadow passes per seed: about x3 expected)")
    print("gating")
    print(f"  run_gate default             wall {_fmt(gate_w)}   cpu {_fmt(gate_c)}   "
          f"x{med(gate_w) / med(bare_w):.2f} the bare passes; {report.summary()}")
    print(f"  run_gate --exact             wall {_fmt(exact_w)}   cpu {_fmt(exact_c)}   "
          f"x{med(exact_w) / med(bare_w):.2f} the bare passes; {exact.summary()}")
    print(f"  `benchsuite gate` (process)  wall {_fmt(cli_w)}   cpu {_fmt(cli_c)}   exit {proc.returncode}   "
          f"aim < 60 s: {'met' if med(cli_w) < 60 else 'NOT met'}")
    print(f"load average after: {' '.join(f'{v:.2f}' for v in os.getloadavg())} "
          "(wall-clock figures are inflated when it exceeds the core count)")
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
