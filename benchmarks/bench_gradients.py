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

Large sparse logistic regression (``--large 1e6,1e7``: the ``logistic_sparse``
family at the sizes of problems/large.toml and problems/ondemand/): the
gradient against two bare CSR products measured in the same run, ``A @ x`` and
``A^T @ r`` with the transposed CSR matrix the family stores (the products the
gradient performs; "CSR pair", each allocating its result as ``At @ (A @ x)``
does), against the same two products into preallocated buffers (the kernel
alone: at d = 1e7 a fresh 80 MB result costs page faults), and -- for
information -- ``A.T @ r`` through scipy's CSC view of ``A`` (no second copy,
but a scattered write). Each timing is the mean of at least 3 calls.

Usage: ``python benchmarks/bench_gradients.py [--sizes 5000x500,20000x1000] [--times 21] [--large 1e6,1e7]``.
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
from benchsuite.families.sparse import SparseLogistic, csr_matvec_into

#: d -> parameters of the large sparse logistic instances (problems/large.toml, problems/ondemand/)
LARGE = {
    "1e6": {"n": 100_000, "d": 1_000_000, "row_nnz": 50, "lam": 1e-4, "seed": 1},
    "1e7": {"n": 1_000_000, "d": 10_000_000, "row_nnz": 30, "lam": 1e-4, "seed": 7},
}


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


def bench_large(label: str, problem, repeats: int) -> tuple[float, float]:
    """Sparse gradient against the CSR pair (A, stored A^T) and the CSC view; returns best and median ratio."""
    A, At = problem.A, problem.At
    x = 0.01 * np.random.default_rng(0).standard_normal(problem.dim).astype(problem.dtype)
    g = np.empty(problem.dim, dtype=problem.dtype)

    def csr_pair() -> None:
        r = A @ x
        At @ r

    def csc_view() -> None:
        r = A @ x
        A.T @ r

    r_buf = np.empty(A.shape[0], dtype=problem.dtype)
    out_buf = np.empty(problem.dim, dtype=problem.dtype)

    def kernel_pair() -> None:  # the same two products into preallocated buffers: no allocation, no page faults
        csr_matvec_into(At, csr_matvec_into(A, x, r_buf), out_buf)

    fns = [csr_pair, kernel_pair, csc_view, lambda: problem.grad(x, out=g), lambda: problem.value_and_grad(x, out=g)]
    for fn in fns:
        fn()
    inner = max(3, int(0.2 / max(mean_seconds(csr_pair, 1), 1e-6)))
    times = np.array([[mean_seconds(fn, inner) for fn in fns] for _ in range(repeats)])
    best = times.min(axis=0)
    med = np.median(times[:, 3:] / times[:, :1], axis=0)
    med_k = np.median(times[:, 3:] / times[:, 1:2], axis=0)
    print(f"{label:<7} n={A.shape[0]:>8} d={A.shape[1]:>9} nnz={A.nnz:>9}  pair {best[0] * 1e3:7.2f} ms "
          f"(into buffers {best[1] / best[0]:5.3f}x, CSC view {best[2] / best[0]:5.3f}x)\n"
          f"        grad {best[3] * 1e3:7.2f} ms: {best[3] / best[0]:5.3f}x the pair (median {med[0]:5.3f}x), "
          f"{best[3] / best[1]:5.3f}x the pair into buffers (median {med_k[0]:5.3f}x);  "
          f"value_and_grad {best[4] / best[0]:5.3f}x (median {med[1]:5.3f}x), {best[4] / best[1]:5.3f}x "
          f"(median {med_k[1]:5.3f}x)")
    return best[3] / best[0], float(med[0])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="5000x500,20000x1000", help="comma-separated NxD sizes")
    ap.add_argument("--times", type=int, default=21)
    ap.add_argument("--large", default="", help="comma-separated large sparse logistic sizes: 1e6, 1e7")
    args = ap.parse_args()
    if args.large:
        print("BLAS threads pinned to 1; best CPU times; ratio = family / (A @ x, A^T @ r with the stored CSR A^T)")
        with threadpool_limits(limits=1):
            for key in args.large.split(","):
                bench_large(f"d={key}", SparseLogistic(**LARGE[key.strip()]), max(5, args.times // 3))
        return
    print("BLAS threads pinned to 1; best CPU times in ms; ratio = family / (A @ x, A.T @ r): of best times, median")
    print(f"{'family':<10} {'size':>12} {'bare ms':>9} {'grad ms':>9} {'best':>7} {'median':>7}"
          f" {'v&g ms':>9} {'best':>7} {'median':>7}")
    with threadpool_limits(limits=1):
        for size in args.sizes.split(","):
            n, d = (int(v) for v in size.lower().split("x"))
            bench("lsq", LeastSquares(n=n, d=d, kappa=1e3, seed=1), args.times)
            bench("ridge", Ridge(n=n, d=d, lam=1e-2, seed=1), args.times)
            bench("logistic", Logistic(n=n, d=d, lam=1e-3, seed=1), args.times)
            bench("huber", Huber(n=n, d=d, lam=1e-3, seed=1), args.times)
        # sparse CSR features at 1 % density; the family keeps A^T as CSR for the second product
        bench("logit-csr", Logistic(n=20000, d=5000, lam=1e-3, sparse=True, density=0.01, seed=1), args.times)


if __name__ == "__main__":
    main()
