"""The large tier at work: one rule on the 1e6-unknown sparse logistic instance, its time and peak memory.

1. Builds ``logreg-sparse-1e6`` from the built-in catalogue (timed) and loads its
   certified optimum from the reference cache (``benchsuite optimum
   logreg-sparse-1e6`` computes it when missing; the certificate is printed:
   the duality gap and the time of each route).
2. Runs one rule (``--rule gd`` by default, the problem-aware step ``1/L``; or
   ``adam``) through the rule contract, the way the monitored pass does: one
   ``value_and_grad`` and one ``step`` per iteration, the relative
   suboptimality checked against the instance's targets, until the tightest is
   met or the budget runs out. BLAS is pinned to one thread.
3. Reports the iterations to each target, wall and CPU time per iteration, the
   gradient time alone against two bare CSR products (measured in the same
   run), and memory: the data (``A`` and its stored transpose), the peak of
   Python allocations during the pass (``tracemalloc``: the rule's state and the
   oracle's buffers) and the process's peak resident set (``getrusage``).
4. ``--ratios`` also prints the gradient ratio at d = 1e6 and d = 1e7 (see
   bench_gradients.py ``--large``); d = 1e7 builds a 3e7-non-zero matrix
   (~1.5 GB with its transpose and the generator's scratch).

Times on a shared machine are inflated by other load; CPU times (process
time) are less affected and printed beside wall times, with the load average.

Usage: ``python benchmarks/bench_large.py [--rule gd|adam] [--ratios]``.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import tracemalloc

import numpy as np
from threadpoolctl import threadpool_limits

NAME = "logreg-sparse-1e6"


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kilobytes


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rule", default="gd", help="a built-in rule (gd, adam, ...), default gd")
    ap.add_argument("--ratios", action="store_true", help="also the gradient ratios at d = 1e6 and 1e7")
    args = ap.parse_args()

    from benchsuite.catalogue import load_catalogue
    from benchsuite.optimum import certified_optimum
    from benchsuite.rulespec import build_rule, parse_rule

    print(f"load average {os.getloadavg()[0]:.1f} {os.getloadavg()[1]:.1f} on {os.cpu_count()} cores")
    with threadpool_limits(limits=1):
        inst = load_catalogue()[NAME]
        t = time.perf_counter()
        problem = inst.build()
        constants = problem.constants()  # includes the svds for L
        t_build = time.perf_counter() - t
        data_mb = (problem.A.data.nbytes + problem.A.indices.nbytes + problem.A.indptr.nbytes) * 2 / 2**20
        print(f"{NAME}: d = {problem.dim}, n = {problem.n_samples}, nnz = {problem.A.nnz}, "
              f"built in {t_build:.1f} s (with svds for L = {constants.L:.4g}, kappa <= {constants.kappa:.0f}); "
              f"A and A^T: {data_mb:.0f} MB")
        t = time.perf_counter()
        opt = certified_optimum(inst, problem=problem)
        print(f"optimum: {'certified' if opt.certified else 'NOT certified'} "
              f"({'cache' if opt.from_cache else f'computed in {time.perf_counter() - t:.0f} s'}); "
              f"duality gap {opt.facts.get('duality_gap')!r}; routes: "
              + "; ".join(f"{m} {s:.1f} s" for m, s in (opt.facts.get("route_seconds") or {}).items()))

        built = build_rule(parse_rule(args.rule), constants, dtype=problem.dtype)
        rule = built.rule
        x = problem.initial_point()
        g = np.empty_like(x)
        f0, f_star = opt.f0, opt.f_star
        targets = list(inst.targets)
        hit: dict[float, int] = {}
        tracemalloc.start()
        base_traced = tracemalloc.get_traced_memory()[0]
        c0, w0 = time.process_time(), time.perf_counter()
        state = rule.init(x)
        k = 0
        for k in range(1, inst.budget + 1):
            f, g = problem.value_and_grad(x, out=g)
            m = (f - f_star) / (f0 - f_star)
            for tgt in targets:
                if tgt not in hit and m <= tgt:
                    hit[tgt] = k - 1
            if len(hit) == len(targets):
                break
            x, state = rule.step(x, g, state)
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        traced_peak = tracemalloc.get_traced_memory()[1] - base_traced
        tracemalloc.stop()

        # gradient alone against two bare CSR products, same run
        A, At = problem.A, problem.At

        def pair() -> None:
            At @ (A @ x)

        reps = 5
        c = time.process_time()
        for _ in range(reps):
            pair()
        t_pair = (time.process_time() - c) / reps
        c = time.process_time()
        for _ in range(reps):
            problem.value_and_grad(x, out=g)
        t_vg = (time.process_time() - c) / reps

    print(f"rule {built.label} ({', '.join(f'{k}={v:.4g}' if isinstance(v, float) else f'{k}={v}' for k, v in built.hyperparams.items())})")
    print("  iterations to targets: " + ", ".join(f"{t:g}: {hit.get(t, 'not reached')}" for t in targets)
          + f"  (budget {inst.budget})")
    print(f"  {k} iterations in {wall:.1f} s wall, {cpu:.1f} s CPU: {1e3 * cpu / max(k, 1):.1f} ms CPU per iteration; "
          f"value_and_grad {1e3 * t_vg:.1f} ms = {t_vg / t_pair:.3f}x two bare CSR products ({1e3 * t_pair:.1f} ms)")
    print(f"  memory: data (A, A^T) {data_mb:.0f} MB; Python allocations during the pass (tracemalloc peak: "
          f"rule state and buffers) {traced_peak / 2**20:.0f} MB; peak resident set of the process "
          f"{peak_rss_mb():.0f} MB")
    print(f"load average {os.getloadavg()[0]:.1f} {os.getloadavg()[1]:.1f}")
    if args.ratios:
        sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
        from bench_gradients import LARGE, bench_large

        from benchsuite.families.sparse import SparseLogistic

        del problem, A, At, x, g, state
        with threadpool_limits(limits=1):
            for key in ("1e6", "1e7"):
                bench_large(f"d={key}", SparseLogistic(**LARGE[key]), 7)
        print(f"peak resident set {peak_rss_mb():.0f} MB; load average {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
