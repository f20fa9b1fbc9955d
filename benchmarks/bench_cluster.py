"""The monitored passes of the default run: a 2-worker Dask cluster and --jobs 2 against --jobs 1.

Three ways to run the passes (no timing replays) of the default ``benchsuite
run`` (every default rule on the small tier), in this process through
:func:`benchsuite.runner.run_cases`, so interpreter start-up and table
printing are not counted:

* ``--jobs 1`` -- the bare baseline: one local worker process;
* ``--jobs 2`` -- two local worker processes (issue 11 part 5: aim >= 1.8x
  over ``--jobs 1``);
* ``--cluster`` -- a ``distributed.LocalCluster`` with two single-threaded
  worker processes on 127.0.0.1, started before the clock starts; first run
  on fresh workers (each builds its problems), then again on the same workers
  (problems cached per worker process).

Each measurement is repeated ``--rounds`` times in alternating order and the
median kept. The iteration counts of all runs are checked to be equal (a
benchmark that disagrees with itself is void). The load average of the machine
is printed before and after: on a shared machine the figures are inflated and
the ratios noisy.

Run: ``.venv/bin/python benchmarks/bench_cluster.py [--rounds 3]`` (needs the
``cluster`` extra).
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

from benchsuite.runner import RunRequest, plan_cases, run_cases


def _load() -> str:
    return " ".join(f"{v:.2f}" for v in os.getloadavg())


def _counts(results) -> list:
    return [(r.case.key(), r.status, tuple(o.iters for o in r.outcomes)) for r in results]


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=3, help="repeats of each measurement (median kept)")
    args = p.parse_args()
    from distributed import LocalCluster

    cases = list(plan_cases(RunRequest.make(), out=None).cases)
    print(f"{len(cases)} cases (the default run: default rules x small tier), {os.cpu_count()} cores")
    print(f"load average before: {_load()}")
    times: dict[str, list[float]] = {"jobs1": [], "jobs2": [], "cluster-cold": [], "cluster-warm": []}
    reference = None

    def timed(label: str, **kw) -> None:
        nonlocal reference
        t0 = time.perf_counter()
        res = run_cases(cases, timing=False, progress=False, **kw)
        times[label].append(time.perf_counter() - t0)
        counts = _counts(res)
        if reference is None:
            reference = counts
        elif counts != reference:
            raise SystemExit(f"{label}: iteration counts differ from the first run -- benchmark void")

    for r in range(args.rounds):
        order = ["jobs1", "jobs2", "cluster"] if r % 2 == 0 else ["cluster", "jobs2", "jobs1"]
        for what in order:
            if what == "cluster":
                with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as lc:
                    timed("cluster-cold", cluster=lc.scheduler_address)
                    timed("cluster-warm", cluster=lc.scheduler_address)
            else:
                timed(what, jobs=int(what[-1]))
    med = {k: statistics.median(v) for k, v in times.items()}
    for k, v in times.items():
        print(f"{k:13s} median {med[k]:7.2f} s  (runs: {', '.join(f'{t:.2f}' for t in v)})")
    print(f"--jobs 2 against --jobs 1:            {med['jobs1'] / med['jobs2']:.2f}x (aim >= 1.8x)")
    print(f"2-worker cluster (fresh) against --jobs 2: {med['jobs2'] / med['cluster-cold']:.2f}x")
    print(f"2-worker cluster (warm)  against --jobs 2: {med['jobs2'] / med['cluster-warm']:.2f}x")
    print(f"2-worker cluster (fresh) against --jobs 1: {med['jobs1'] / med['cluster-cold']:.2f}x")
    print(f"load average after: {_load()} (on a machine shared with other work the times are inflated)")


if __name__ == "__main__":
    main()
