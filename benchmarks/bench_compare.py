"""The speed limit of ``compare`` (``--fail-above``) on planted slowdowns and on A/A runs.

A planted slowdown is :class:`PaddedAdam`: Adam plus ``spin`` turns of an
empty Python loop after every step -- measured extra work whose size is
calibrated in this run: the bare cost of one step (gradient + Adam, process
CPU time, BLAS on one thread, through the runner's replay that compare times)
and the share one spin turn adds to it (from a planted ~1.5x) are measured
first, then ``spin = (factor - 1) / share`` for the planted factors 1.05 and
1.10. What the padding really costs is then measured directly by interleaved
replays (none of compare's planning, warm-up or pairing code; the same
trimmed-mean t interval), so each verdict can be read against the slowdown
actually planted.

For each planted factor ``--trials`` comparisons (A = ``PaddedAdam(spin=0)``,
B = ``PaddedAdam(spin=N)``), and ``--aa`` A/A comparisons (both sides
``spin=0``), each with ``--pairs`` replay pairs and ``fail_above = --limit``,
print the time-per-step change with its 95 % interval and the verdict
(pass / fail / undecided), then the tally. What to expect with a limit of
5 %: A/A passes (fails in well under 2.5 % of runs); 1.10x fails; 1.05x --
exactly at the limit -- is mostly undecided, and either decided verdict
should each come up in at most about 2.5 % of runs.

The machine load (1-minute load average, cores) is printed before and after;
replays are timed by process CPU time (compare's default clock), so
competing processes inflate the spread, not the figure.

Run: ``.venv/bin/python benchmarks/bench_compare.py [--problem NAME] [--pairs 31] [--trials 3] [--aa 20]``.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

B1, B2, EPS = 0.9, 0.999, 1e-8


class PaddedAdam:
    """Adam (Kingma & Ba 2015, Algorithm 1) followed by ``spin`` turns of an empty loop each step."""

    def __init__(self, lr: float = 1e-3, spin: int = 0) -> None:
        self.lr, self.spin = lr, int(spin)

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        return {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0}

    def step(self, x: np.ndarray, g: np.ndarray, s: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        s["t"] += 1
        t = s["t"]
        s["m"] = B1 * s["m"] + (1 - B1) * g
        s["v"] = B2 * s["v"] + (1 - B2) * g * g
        x = x - self.lr * (s["m"] / (1 - B1**t)) / (np.sqrt(s["v"] / (1 - B2**t)) + EPS)
        for _ in range(self.spin):
            pass
        return x, s


def _load() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.2f} (1 min), {five:.2f} (5 min) on {os.cpu_count()} cores"


def _replay(case: Any, spin: int, lr: float, k: int, inner: int) -> float:
    """CPU seconds per replay of k steps, mean of ``inner``: the runner's uninstrumented replay, as compare times it."""
    from benchsuite.timing import replay_seconds

    return sum(replay_seconds(case, {"lr": lr, "spin": spin}, 0, k, clock="cpu") for _ in range(inner)) / inner


def _spin_turn() -> float:
    """CPU seconds of one empty loop turn (median of 9 runs of 2e5 turns): a first guess only."""
    n = 200_000
    out = []
    for _ in range(9):
        t0 = time.process_time()
        for _ in range(n):
            pass
        out.append((time.process_time() - t0) / n)
    return float(np.median(out))


def _direct(case: Any, k: int, spin: int, lr: float, pairs: int) -> Any:
    """The realised ratio of PaddedAdam(spin) to PaddedAdam(0): interleaved replays, >= 20 ms samples.

    The same replay and the same trimmed-mean t interval as compare, but none
    of its planning, warm-up, calibration or pairing code.
    """
    from benchsuite.compare import case_change

    inner = max(1, math.ceil(0.02 / max(_replay(case, 0, lr, k, 1), 1e-7)))
    ta, tb = [], []
    for i in range(pairs):
        for sp, out in ((0, ta), (spin, tb))[:: 1 if i % 2 == 0 else -1]:
            out.append(_replay(case, sp, lr, k, inner))
    return case_change(ta, tb)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--problem", default="quad-diag-kappa10-d10")
    ap.add_argument("--lr", type=float, default=0.1)
    ap.add_argument("--pairs", type=int, default=31)
    ap.add_argument("--trials", type=int, default=3, help="comparisons per planted factor")
    ap.add_argument("--aa", type=int, default=20, help="A/A comparisons")
    ap.add_argument("--limit", type=float, default=0.05, help="fail_above as a fraction (0.05 = 5 %%)")
    args = ap.parse_args()

    from benchsuite.catalogue import load_catalogue
    from benchsuite.compare import Side, compare

    sys.modules.setdefault("bench_compare", sys.modules[__name__])  # compare imports bench_compare:PaddedAdam
    print(f"before: {_load()}")
    started = time.perf_counter()
    with threadpool_limits(limits=1):
        from benchsuite.rulespec import parse_rule
        from benchsuite.runner import Case

        inst = load_catalogue()[args.problem]
        case = Case(instance=inst, rule=parse_rule("bench_compare:PaddedAdam", {"lr": args.lr}))
        probe = compare(Side("bench_compare:PaddedAdam", {"lr": args.lr}),
                        Side("bench_compare:PaddedAdam", {"lr": args.lr}), problems=args.problem, pairs=2, jobs=1)
        k = probe.cases[0].iters_a
        # calibration: the cost of a spin turn inside the replayed step, from a planted ~1.5x
        step = float(np.median([_replay(case, 0, args.lr, k, 1) / k for _ in range(15)]))
        big = round(0.5 * step / _spin_turn())
        slope = (_direct(case, k, big, args.lr, 11).ratio - 1.0) / big
        print(f"problem {args.problem}, {k} steps to the tightest target; replayed step {step * 1e6:.2f} us, "
              f"a spin turn adds {100 * slope:.3f} % of it (process CPU time)")
        plan = [(f, max(1, round((f - 1.0) / slope))) for f in (1.05, 1.10)]
        tally: dict[str, dict[str, int]] = {}
        for factor, spin in plan:
            n_direct = 2 * args.pairs + 1
            print(f"\nplanted {factor:.2f}x: spin {spin}; measured directly before the comparisons: "
                  f"{_direct(case, k, spin, args.lr, n_direct).text()} ({n_direct} interleaved replay pairs)")
            tally[f"{factor:.2f}x"] = _run(args, Side("bench_compare:PaddedAdam", {"lr": args.lr, "spin": 0}),
                                           Side("bench_compare:PaddedAdam", {"lr": args.lr, "spin": spin}), args.trials)
            # the planted cost is itself not constant on a loaded machine (interpreter-bound spin turns and
            # numpy calls respond differently to contention): measure it again after the comparisons
            print(f"  measured directly after: {_direct(case, k, spin, args.lr, n_direct).text()}")
        print(f"\nA/A: spin 0 on both sides")
        tally["A/A"] = _run(args, Side("bench_compare:PaddedAdam", {"lr": args.lr, "spin": 0}),
                            Side("bench_compare:PaddedAdam", {"lr": args.lr, "spin": 0}), args.aa)
    print(f"\nverdicts with fail_above {100 * args.limit:+.1f} %, {args.pairs} pairs per comparison:")
    for name, t in tally.items():
        print(f"  {name:6s} pass {t['pass']:3d}  fail {t['fail']:3d}  undecided {t['undecided']:3d}")
    print(f"\nafter: {_load()}; {time.perf_counter() - started:.0f} s wall")
    return 0


def _run(args: argparse.Namespace, a: Any, b: Any, n: int) -> dict[str, int]:
    from benchsuite.compare import compare

    out = {"pass": 0, "fail": 0, "undecided": 0}
    for i in range(n):
        res = compare(a, b, problems=args.problem, pairs=args.pairs, jobs=1, fail_above=args.limit)
        v = res.verdict
        out[v.outcome] += 1
        print(f"  {i + 1:2d}: time per step {res.per_step.text()} -> {v.outcome}")
    return out


if __name__ == "__main__":
    sys.exit(main())
