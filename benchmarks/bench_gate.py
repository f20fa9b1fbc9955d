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

3. ``--planted``: verdicts rather than time. Per rule (adam at lr 0.01 and
   0.1, rmsprop at 0.01, gd, heavy_ball) a baseline of the small tier with the
   envelope, then the gate, default and ``--exact``, on clean reruns, clean
   rewrites (tests/broken_rules.py: independent implementations, another
   operation order, ``A^T c`` summed in another order) and the planted bugs
   there (the precision bugs of the theory section too: float32 moments, a
   clamped v, eps under the root in Adam and AdaGrad). Printed: false alarms
   and bugs caught, per mode.

Each measurement is repeated ``--times`` times (default 3) and the median
is shown with the min-max range; the load average is printed before and after,
because on a shared machine wall-clock figures are inflated by other work.

Run: ``.venv/bin/python benchmarks/bench_gate.py [--rule adam] [--jobs 2] [--times 3] [--planted]``.
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


_ADAM_BUGS = ("AdamNoBiasCorrection", "AdamStepOffByOne", "AdamStateReset", "AdamLateBlowUp", "AdamEpsInsideSqrt",
              "AdamBeta2AsBeta1", "AdamLrSquared", "AdamFloat32Moments", "AdamClampedV", "AdamEpsUnderRoot")
_ADAM_CLEAN = ("adam", "broken_rules:TextbookAdam", "broken_rules:PrecisionAdam", "REORDER")
#: rule, hyperparameters, clean candidates ("REORDER": the rule itself on a reordered gradient), planted bugs
PLANTED = (
    ("adam", {"lr": 0.01}, _ADAM_CLEAN, _ADAM_BUGS),
    ("adam", {"lr": 0.1}, _ADAM_CLEAN, _ADAM_BUGS),
    ("adagrad", {}, ("adagrad", "broken_rules:PrecisionAdaGrad", "REORDER"), ("AdaGradEpsUnderRoot",)),
    ("rmsprop", {"lr": 0.01}, ("rmsprop", "broken_rules:TextbookRMSProp", "broken_rules:RMSPropReordered", "REORDER"),
     ("RMSPropEpsInsideSqrt", "RMSPropWrongDecay")),
    ("gd", {}, ("gd", "REORDER"), ("GDStepCut8", "GDSlowAfter128", "GDSkipEveryHundred", "GDStepTwice")),
    ("heavy_ball", {}, ("heavy_ball", "broken_rules:TextbookHeavyBall", "REORDER"),
     ("HeavyBallSignError", "HeavyBallStaleBuffer")),
)


def planted(jobs: int) -> None:
    """Part 3: false alarms on clean candidates and planted bugs caught, default and --exact."""
    sys.path.insert(0, str(REPO / "tests"))
    import broken_rules

    from benchsuite.baseline import load_baseline, make_baseline, write_baseline
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.gate import GateConfig, run_gate
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases

    insts = select(load_catalogue(), None, "small", validate=True)
    alarms = {False: [0, 0], True: [0, 0]}  # mode -> [false alarms, clean gates]
    caught = {False: [0, 0], True: [0, 0]}  # mode -> [caught, bugs]
    for rule, params, clean, bugs in PLANTED:
        spec = parse_rule(rule, params)
        results = run_cases([Case(instance=i, rule=spec) for i in insts], jobs=jobs, timing=False, progress=False,
                            envelope=True)
        base = load_baseline(write_baseline(make_baseline(results, rule_label=spec.label), f"{rule}.json", force=True))
        for exact in (False, True):
            cfg = GateConfig(exact=exact)
            for c in clean:
                if c == "REORDER":
                    with broken_rules.reordered_gradient():
                        rep = run_gate(base, rule, config=cfg, jobs=jobs)
                else:
                    rep = run_gate(base, c, config=cfg, jobs=jobs)
                alarms[exact][0] += not rep.passed
                alarms[exact][1] += 1
                if not rep.passed:
                    print(f"  FALSE ALARM {spec.label} {c} {'exact' if exact else 'default'}: {rep.summary()}")
            for b in bugs:
                rep = run_gate(base, f"broken_rules:{b}", config=cfg, jobs=jobs)
                caught[exact][0] += not rep.passed
                caught[exact][1] += 1
                mark = "caught" if not rep.passed else "missed"
                print(f"  {spec.label:16s} {b:22s} {'exact' if exact else 'default':7s} {mark}: {rep.summary()}")
    for exact in (False, True):
        mode = "--exact" if exact else "default"
        print(f"{mode:8s} false alarms {alarms[exact][0]} of {alarms[exact][1]} clean gates; "
              f"planted bugs caught {caught[exact][0]} of {caught[exact][1]}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rule", default="adam")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--times", type=int, default=3)
    ap.add_argument("--planted", action="store_true", help="verdicts on clean rewrites and planted bugs (part 3)")
    args = ap.parse_args()

    work = Path(tempfile.mkdtemp(prefix="bench-gate-"))
    if (REPO / "results" / "reference").is_dir():
        shutil.copytree(REPO / "results" / "reference", work / "results" / "reference")
    os.chdir(work)
    if args.planted:
        planted(args.jobs)
        shutil.rmtree(work, ignore_errors=True)
        return
    from benchsuite.baseline import make_baseline, write_baseline
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.gate import GateConfig, run_gate
    from benchsuite.rulespec import parse_rule
    from benchsuite.runner import Case, run_cases
    from benchsuite.sysinfo import machine_info

    print(f"load average before: {' '.join(f'{v:.2f}' for v in os.getloadavg())}; cores {os.cpu_count()}; "
          f"jobs {args.jobs}; rule {args.rule}; repeats {args.times}")
    spec = parse_rule(args.rule)
    instances = select(load_catalogue(), None, "small", validate=True)
    cases = [Case(instance=i, rule=spec) for i in instances]
    print(f"default set: {len(cases)} small-tier instances, full gradient, one seed each")

    def passes(envelope: bool):
        return lambda: run_cases(cases, jobs=args.jobs, timing=False, progress=False, envelope=envelope)

    bare_w, bare_c, _ = _timed(passes(False), args.times)
    env_w, env_c, results = _timed(passes(True), args.times)
    path = write_baseline(make_baseline(results, rule_label=spec.label, machine=machine_info()),
                          work / "baseline.json", force=True)
    from benchsuite.baseline import load_baseline

    base = load_baseline(path)
    gate_w, gate_c, report = _timed(lambda: run_gate(base, args.rule, jobs=args.jobs), args.times)
    exact_w, exact_c, exact = _timed(lambda: run_gate(base, args.rule, config=GateConfig(exact=True), jobs=args.jobs),
                                     args.times)
    cli = [sys.executable, "-m", "benchsuite", "gate", "--rule", args.rule, "--baseline", str(path),
           "--jobs", str(args.jobs)]
    cli_w, cli_c, proc = _timed(lambda: subprocess.run(cli, capture_output=True, text=True, check=False), args.times)

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
