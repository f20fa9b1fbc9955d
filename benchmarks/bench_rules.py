"""Per-step time and memory of the built-in rules against torch.optim and a plain numpy loop.

For Adam, heavy ball and RMSProp, at d = 1e3 and d = 1e6, measured side by side in
one run (interleaved repeats, median of each), BLAS and torch pinned to one thread:

* ``ours``: ``benchsuite.rules`` step (in place, preallocated buffers);
* ``torch``: ``torch.optim`` with the torch-matching configuration
  (:func:`benchsuite.rules.torch_equivalent`), float64 CPU tensors, ``.grad`` set;
* ``naive``: the same update written as plain numpy expressions (what a user
  writes first; allocates temporaries) — the bare numpy baseline.

Also the fixed cost per call at d = 10 (Python overhead), and the peak extra
memory of one step at d = 1e6 seen by tracemalloc (numpy allocations).

Run: ``.venv/bin/python benchmarks/bench_rules.py [--quick]``
"""

from __future__ import annotations

import argparse
import statistics
import time
import tracemalloc
from collections.abc import Callable

import numpy as np
from threadpoolctl import threadpool_limits

from benchsuite.rules import BUILTIN_RULES, torch_equivalent

CONFIGS = {
    "adam": {"lr": 1e-3},
    "heavy_ball": {"lr": 1e-3, "momentum": 0.9},
    "rmsprop": {"lr": 1e-3, "decay": 0.9},
}


def naive_step(name: str, hp: dict) -> tuple[Callable, Callable]:
    """(init, step) of the rule as plain numpy expressions."""
    if name == "adam":
        lr, b1, b2, eps = hp["lr"], hp["beta1"], hp["beta2"], hp["eps"]

        def step(x, g, s):
            t = s["t"] + 1
            s["m"] = b1 * s["m"] + (1 - b1) * g
            s["v"] = b2 * s["v"] + (1 - b2) * g * g
            s["t"] = t
            return x - lr * (s["m"] / (1 - b1**t)) / (np.sqrt(s["v"] / (1 - b2**t)) + eps), s

        return (lambda x0: {"m": np.zeros_like(x0), "v": np.zeros_like(x0), "t": 0}), step
    if name == "heavy_ball":
        lr, beta = hp["lr"], hp["momentum"]

        def step(x, g, s):
            s["v"] = beta * s["v"] + g
            return x - lr * s["v"], s

        return (lambda x0: {"v": np.zeros_like(x0)}), step
    lr, rho, eps = hp["lr"], hp["decay"], hp["eps"]

    def step(x, g, s):
        s["v"] = rho * s["v"] + (1 - rho) * g * g
        return x - lr * g / (np.sqrt(s["v"]) + eps), s

    return (lambda x0: {"v": np.zeros_like(x0)}), step


def timer_numpy(init: Callable, step: Callable, x0: np.ndarray, g: np.ndarray, n: int) -> Callable[[], float]:
    x = x0.copy()
    state = init(x)

    def run() -> float:
        nonlocal x, state
        t0 = time.perf_counter()
        for _ in range(n):
            x, state = step(x, g, state)
        return (time.perf_counter() - t0) / n

    return run


def timer_torch(torch_class: str, kwargs: dict, x0: np.ndarray, g: np.ndarray, n: int) -> Callable[[], float]:
    import torch

    p = torch.from_numpy(x0.copy())
    p.grad = torch.from_numpy(g)
    opt = getattr(torch.optim, torch_class)([p], **kwargs)

    def run() -> float:
        t0 = time.perf_counter()
        for _ in range(n):
            opt.step()
        return (time.perf_counter() - t0) / n

    return run


def peak_bytes(init: Callable, step: Callable, x0: np.ndarray, g: np.ndarray) -> int:
    x = x0.copy()
    state = init(x)
    x, state = step(x, g, state)  # first step outside (lazy setup)
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        x, state = step(x, g, state)
        return tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats")
    args = ap.parse_args()
    import torch

    torch.set_num_threads(1)
    torch.set_default_dtype(torch.float64)  # scalar optimizer state in float64 like ours
    repeats = 3 if args.quick else 9
    rng = np.random.default_rng(0)
    print(f"numpy {np.__version__}, torch {torch.__version__}, threads pinned to 1, median of {repeats} interleaved repeats")
    print(f"{'rule':<11} {'d':>8} {'ours us':>10} {'torch us':>10} {'naive us':>10} {'ours/torch':>11} {'ours/naive':>11}")
    with threadpool_limits(1):
        for d, n in ((10, 20000), (1000, 5000), (1_000_000, 20)):
            x0 = rng.standard_normal(d)
            g = rng.standard_normal(d)
            for name, extra in CONFIGS.items():
                eq = torch_equivalent(name, **extra)
                rule = BUILTIN_RULES[name](**eq.ours)
                ninit, nstep = naive_step(name, eq.ours)
                runs = {
                    "ours": timer_numpy(rule.init, rule.step, x0, g, n),
                    "torch": timer_torch(eq.torch_class, eq.torch_kwargs, x0, g, n),
                    "naive": timer_numpy(ninit, nstep, x0, g, n),
                }
                for r in runs.values():
                    r()  # warm-up
                times: dict[str, list[float]] = {k: [] for k in runs}
                for _ in range(repeats):
                    for k, r in runs.items():
                        times[k].append(r())
                med = {k: statistics.median(v) for k, v in times.items()}
                print(
                    f"{name:<11} {d:>8} {med['ours'] * 1e6:>10.2f} {med['torch'] * 1e6:>10.2f} {med['naive'] * 1e6:>10.2f}"
                    f" {med['ours'] / med['torch']:>10.2f}x {med['ours'] / med['naive']:>10.2f}x"
                )
        d = 1_000_000
        x0, g = rng.standard_normal(d), rng.standard_normal(d)
        print(f"\npeak extra memory of one step at d = {d:.0e} (tracemalloc; one array = {8 * d / 1e6:.0f} MB)")
        for name, extra in CONFIGS.items():
            hp = torch_equivalent(name, **extra).ours
            rule = BUILTIN_RULES[name](**hp)
            ninit, nstep = naive_step(name, hp)
            ours, naive = peak_bytes(rule.init, rule.step, x0, g), peak_bytes(ninit, nstep, x0, g)
            print(f"{name:<11} ours {ours / 1e6:8.3f} MB ({ours} B)   naive {naive / 1e6:8.1f} MB")


if __name__ == "__main__":
    main()
