"""Gradient cost of the finite-sum families against two bare BLAS products.

For each size, builds the family, then times in the same run and on the same
arrays (BLAS pinned to one thread with threadpoolctl):

* baseline: ``r = A @ x`` and ``A.T @ r`` — the two matrix-vector products any
  gradient of ``F(Ax)`` needs;
* ``problem.grad(x, out=g)`` and ``problem.value_and_grad(x, out=g)``;

for least squares, ridge, logistic and Huber on dense arrays, and for logistic
regression on a 1 %-dense CSR matrix (baseline: the CSR ``A @ x`` and its
transpose ``A.T @ r``).

Times are CPU time of this process (one BLAS thread), so waiting for a core on
a shared machine does not count; the three are interleaved within each repeat,
so remaining drift (caches, clock) hits all alike. It prints the best (minimum)
times, their ratio to the baseline, and the median of the per-repeat ratios.
The aim is <= 1.15x.

Usage: ``python benchmarks/bench_gradients.py [--sizes 5000x500,20000x1000] [--repeats 21]``.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from threadpoolctl import threadpool_limits

from benchsuite.families.huber import Huber
from benchsuite.families.least_squares import LeastSquares, Ridge
from benchsuite.families.logistic import Logistic


def mean_seconds(fn: Callable[[], object], inner: int) -> float:
    """Mean CPU time of ``inner`` back-to-back calls (process time: robust to other load)."""
    t0 = time.process_time()
    for _ in range(inner):
        fn()
    return (time.process_time() - t0) / inner


def bench(name: str, problem, repeats: int) -> None:
    """Interleave baseline and family timings per repeat (shared machines drift); report medians."""
    A = problem.A
    x = np.random.default_rng(0).standard_normal(problem.dim).astype(problem.dtype)
    g = np.empty(problem.dim, dtype=problem.dtype)

    def baseline() -> None:
        r = A @ x
        A.T @ r

    fns = [baseline, lambda: problem.grad(x, out=g), lambda: problem.value_and_grad(x, out=g)]
    for fn in fns:
        fn()  # warm-up
    inner = max(1, int(0.05 / mean_seconds(baseline, 3)))  # about 0.05 s per timing
    times = np.array([[mean_seconds(fn, inner) for fn in fns] for _ in range(repeats)])
    base, t_grad, t_vg = times.min(axis=0)
    med = np.median(times[:, 1:] / times[:, :1], axis=0)
    n, d = A.shape
    print(f"{name:<10} {n:>6}x{d:<5} {base * 1e3:9.3f} {t_grad * 1e3:9.3f} {t_grad / base:6.3f}x {med[0]:6.3f}x"
          f" {t_vg * 1e3:9.3f} {t_vg / base:6.3f}x {med[1]:6.3f}x")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="5000x500,20000x1000", help="comma-separated NxD sizes")
    ap.add_argument("--repeats", type=int, default=21)
    args = ap.parse_args()
    print("BLAS threads pinned to 1; best CPU times in ms; ratio = family / (A @ x, A.T @ r): of best times, median")
    print(f"{'family':<10} {'size':>12} {'bare ms':>9} {'grad ms':>9} {'best':>7} {'median':>7}"
          f" {'v&g ms':>9} {'best':>7} {'median':>7}")
    with threadpool_limits(limits=1):
        for size in args.sizes.split(","):
            n, d = (int(v) for v in size.lower().split("x"))
            bench("lsq", LeastSquares(n=n, d=d, kappa=1e3, seed=1), args.repeats)
            bench("ridge", Ridge(n=n, d=d, lam=1e-2, seed=1), args.repeats)
            bench("logistic", Logistic(n=n, d=d, lam=1e-3, seed=1), args.repeats)
            bench("huber", Huber(n=n, d=d, lam=1e-3, seed=1), args.repeats)
        # sparse CSR features at 1 % density; the family keeps A^T as CSR for the second product
        bench("logit-csr", Logistic(n=20000, d=5000, lam=1e-3, sparse=True, density=0.01, seed=1), args.repeats)


if __name__ == "__main__":
    main()
