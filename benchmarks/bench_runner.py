"""Runner overhead and end-to-end time, against bare loops measured in the same run.

1. Harness overhead (default): per step, the suite's timing replay
   (:func:`benchsuite.runner.replay_times`) and monitored pass
   (:func:`benchsuite.runner.monitored_pass`) against a bare hand-written numpy
   loop of the same rule (gradient written out by hand too) on the same
   problem: gradient descent and Adam, on a diagonal quadratic with
   d = 1e4 and 1e5 and on Rosenbrock 2-D. Bare and suite runs alternate
   (7 rounds); medians are compared. Aims: replay <= 1.03x at d >= 1e4,
   <= 1.5x at d = 2.
2. ``--e2e``: the default ``benchsuite run`` end to end in a fresh folder
   with the warm reference cache, the small tier's references recomputed
   cold (the extra time of a cold run); and the monitored passes alone
   (``--no-timing``) with ``--jobs 1`` and ``--jobs 2`` (aim >= 1.8x).

3. ``--phases``: the default run's parts alone -- monitored passes without and
   with the stay-converged horizon, then the timing replays -- in wall and CPU
   seconds (CPU seconds are steadier on a shared machine).

Run: ``.venv/bin/python benchmarks/bench_runner.py [--e2e | --phases]``. BLAS is pinned
to one thread. Timings on a shared machine are noisy; the load average is
printed with the figures.
"""

from __future__ import annotations

import argparse
import math
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from benchsuite.catalogue import Instance, load_catalogue, select
from benchsuite.optimum import certified_optimum
from benchsuite.rulespec import build_rule, parse_rule
from benchsuite.runner import Case, monitored_pass, replay_times

ROUNDS = 7
B1, B2, EPS, ADAM_LR = 0.9, 0.999, 1e-8, 1e-3


def _instance(name: str, family: str, **params) -> Instance:
    return Instance(name=name, family=family, params=tuple(sorted(params.items())), tier="small",
                    targets=(1e-300,), budget=10**9)


# -- bare loops: rule and gradient written out by hand --------------------------------------------
def _quad_grad(lam: np.ndarray, xs: np.ndarray):
    def grad(x):
        return lam * (x - xs)
    return grad


def _rosen_grad(x):
    a, b = x[0], x[1]
    return np.array([-2.0 * (1.0 - a) - 400.0 * a * (b - a * a), 200.0 * (b - a * a)])


def bare_gd(grad, x0, lr, k):
    x = x0.copy()
    t0 = time.perf_counter()
    for _ in range(k):
        g = grad(x)
        x -= lr * g
    return time.perf_counter() - t0


def bare_adam(grad, x0, lr, k):
    x = x0.copy()
    t0 = time.perf_counter()
    m = np.zeros_like(x)
    v = np.zeros_like(x)
    tmp = np.empty_like(x)
    b1t = b2t = 1.0
    for _ in range(k):
        g = grad(x)
        m *= B1
        m += (1.0 - B1) * g
        v *= B2
        np.multiply(g, g, out=tmp)
        tmp *= 1.0 - B2
        v += tmp
        b1t *= B1
        b2t *= B2
        np.sqrt(v, out=tmp)
        tmp *= 1.0 / math.sqrt(1.0 - b2t)
        tmp += EPS
        np.divide(m, tmp, out=tmp)
        x -= (lr / (1.0 - b1t)) * tmp
    return time.perf_counter() - t0


def same_objects_loop(problem, rule, k):
    """The suite's own rule object and problem.grad in a bare loop: isolates the harness."""
    x = problem.initial_point()
    grad, step = problem.grad, rule.step
    t0 = time.perf_counter()
    state = rule.init(x)
    for _ in range(k):
        x, state = step(x, grad(x), state)
    return time.perf_counter() - t0


def overhead() -> None:
    setups = [
        ("quadratic d=1e4", _instance("bq4", "quadratic", d=10_000, L=1.0, mu=1e-3, seed=0), 3000),
        ("quadratic d=1e5", _instance("bq5", "quadratic", d=100_000, L=1.0, mu=1e-3, seed=0), 400),
        ("rosenbrock d=2", _instance("br2", "rosenbrock", d=2), 20000),
    ]
    print(f"load average: {os.getloadavg()}")
    print("bare: rule and gradient hand-written; same-obj: the suite's rule object and problem.grad in a bare")
    print("loop (so replay/same-obj is the harness alone); ratios are against bare unless marked")
    print(f"{'problem':<17} {'rule':<5} {'bare/step':>10} {'replay/step':>12} {'ratio':>6} "
          f"{'monitored/step':>15} {'ratio':>6} {'same-obj/step':>14} {'replay/same-obj':>16}")
    for label, inst, k in setups:
        problem = inst.build()
        x0 = problem.initial_point()
        if inst.family == "quadratic":
            grad = _quad_grad(problem.eigenvalues, problem.x_star)
            x_star, f_star = problem.x_star, 0.0
        else:
            grad = _rosen_grad
            x_star, f_star = np.ones(2), 0.0
        for rule_name in ("gd", "adam"):
            lr = 1e-3 if inst.family == "rosenbrock" or rule_name == "adam" else 1.0
            spec = parse_rule(rule_name, {"lr": lr})
            hp = build_rule(spec, None).hyperparams
            case = Case(inst, spec, budget=k)
            bare = bare_gd if rule_name == "gd" else bare_adam
            tb, tr, tm, ts = [], [], [], []
            for _ in range(ROUNDS):
                tb.append(bare(grad, x0, lr, k))
                ts.append(same_objects_loop(problem, build_rule(spec, None).rule, k))
                tr.append(replay_times(case, hp, 0, [k], repeats=1)[0][-1])
                t0 = time.perf_counter()
                monitored_pass(problem, build_rule(spec, None).rule, x_star=x_star, f_star=f_star,
                               targets=[1e-300], budget=k)
                tm.append(time.perf_counter() - t0)
            b, r, m, so = (statistics.median(v) / k for v in (tb, tr, tm, ts))
            print(f"{label:<17} {rule_name:<5} {b * 1e6:>8.2f}us {r * 1e6:>10.2f}us {r / b:>6.3f} "
                  f"{m * 1e6:>13.2f}us {m / b:>6.3f} {so * 1e6:>12.2f}us {r / so:>16.3f}")


def _timed_cli(args: list[str], cwd: Path) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "benchsuite", "run", *args], cwd=cwd, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def end_to_end() -> None:
    work = Path(tempfile.mkdtemp(prefix="bench-runner-"))
    try:
        print(f"load average: {os.getloadavg()}")
        # the optimum module also finds the repository's committed references, so a cold
        # run is timed as: every small-tier reference recomputed into an empty folder,
        # plus the warm run
        t0 = time.perf_counter()
        for inst in select(load_catalogue(), None, tier="small"):
            certified_optimum(inst, cache_dir=work / "cold-reference", refresh=True)
        refs = time.perf_counter() - t0
        warm = _timed_cli(["--out", "out"], work)
        print(f"default `benchsuite run`, warm reference cache: {warm:7.1f} s")
        print(f"small-tier references computed cold (one process): {refs:.1f} s; cold run <= {warm + refs:.1f} s")
        one = _timed_cli(["--out", "out", "--no-timing", "--jobs", "1"], work)
        two = _timed_cli(["--out", "out", "--no-timing", "--jobs", "2"], work)
        print(f"monitored passes only: --jobs 1 {one:6.1f} s, --jobs 2 {two:6.1f} s, speed-up {one / two:.2f}x")
        print(f"load average: {os.getloadavg()}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


def _cpu() -> float:
    """CPU seconds of this process and its finished children (insensitive to other processes' load)."""
    import resource

    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def phases() -> None:
    """The default run's parts on the small tier: passes with and without the horizon, the replays.

    Each part is reported in wall seconds and CPU seconds; on a machine shared with other
    work the CPU seconds are the steadier figure, and ``passes CPU / 2 + replays CPU`` is what
    the default run takes on 2 idle cores.
    """
    from benchsuite.runner import RunRequest, plan_cases, run_cases
    from benchsuite.timing import timed_outcome

    print(f"load average: {os.getloadavg()}")
    figures = {}
    for label, horizon in (("passes, no horizon", (0, 0.0)), ("passes, default horizon", None)):
        cases = plan_cases(RunRequest.make(horizon=horizon), None).cases
        c0, t0 = _cpu(), time.perf_counter()
        res = run_cases(cases, jobs=2, timing=False, progress=False)
        figures[label] = (time.perf_counter() - t0, _cpu() - c0)
        print(f"{label:<28} {figures[label][0]:7.1f} s wall {figures[label][1]:7.1f} s CPU ({len(cases)} cases)")
    c0, t0 = _cpu(), time.perf_counter()
    with threadpool_limits(limits=1):
        for r in res:
            for o in r.outcomes:
                timed_outcome(r.case, r.hyperparams, o, 5)
    wall, cpu = time.perf_counter() - t0, _cpu() - c0
    print(f"{'timing replays':<28} {wall:7.1f} s wall {cpu:7.1f} s CPU")
    (_, c_no), (_, c_h) = figures["passes, no horizon"], figures["passes, default horizon"]
    print(f"the horizon adds {100 * (c_h / c_no - 1):.0f} % to the passes' CPU time ({c_h - c_no:.1f} s)")
    print(f"estimate for 2 idle cores: passes {c_h / 2:.1f} s + replays {cpu:.1f} s = {c_h / 2 + cpu:.1f} s")
    print(f"load average: {os.getloadavg()}")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--e2e", action="store_true", help="also time the default `benchsuite run` end to end")
    p.add_argument("--phases", action="store_true",
                   help="the default run's parts: passes with and without the horizon, the replays (CPU and wall)")
    args = p.parse_args()
    if args.phases:
        phases()
        return
    with threadpool_limits(limits=1):
        overhead()
    if args.e2e:
        end_to_end()


if __name__ == "__main__":
    main()
