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

Each measurement is repeated ``--times`` times in alternating order and the
median kept. Besides wall time, the CPU seconds of every process involved
(this one, the local workers, or the Dask workers and scheduler) are summed:
CPU time is not inflated by other programs on a busy machine, so its ratios
show each way's overhead even when wall-time speed-ups cannot be measured. The iteration counts of all runs are checked to be equal (a
benchmark that disagrees with itself is void). The load average of the machine
is printed before and after: on a shared machine the figures are inflated and
the ratios noisy.

Run: ``.venv/bin/python benchmarks/bench_cluster.py [--times 3]`` (needs the
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


def _worker_cpu() -> tuple[int, float]:
    """Pid and CPU seconds (user + system) of the calling process (runs on the workers and the scheduler)."""
    import psutil

    t = psutil.Process().cpu_times()
    return os.getpid(), t.user + t.system


def _cpu_now(client=None) -> float:
    """CPU seconds so far of this process, its reaped children, and (with a client) the cluster's processes."""
    import resource

    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    total = own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime
    if client is not None:
        procs = dict(client.run(_worker_cpu).values())
        procs.update([client.run_on_scheduler(_worker_cpu)])
        procs.pop(os.getpid(), None)  # a LocalCluster's scheduler runs in this process: counted above
        total += sum(procs.values())
    return total


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--times", type=int, default=3, help="repeats of each measurement (median kept)")
    args = p.parse_args()
    from distributed import Client, LocalCluster

    cases = list(plan_cases(RunRequest.make(), out=None).cases)
    print(f"{len(cases)} cases (the default run: default rules x small tier), {os.cpu_count()} cores")
    print(f"load average before: {_load()}")
    times: dict[str, list[float]] = {"jobs1": [], "jobs2": [], "cluster-cold": [], "cluster-warm": []}
    cpu: dict[str, list[float]] = {k: [] for k in times}
    reference = None

    def timed(label: str, client=None, **kw) -> None:
        nonlocal reference
        c0 = _cpu_now(client)
        t0 = time.perf_counter()
        res = run_cases(cases, timing=False, progress=False, **kw)
        times[label].append(time.perf_counter() - t0)
        cpu[label].append(_cpu_now(client) - c0)
        counts = _counts(res)
        if reference is None:
            reference = counts
        elif counts != reference:
            raise SystemExit(f"{label}: iteration counts differ from the first run -- benchmark void")

    for r in range(args.times):
        order = ["jobs1", "jobs2", "cluster"] if r % 2 == 0 else ["cluster", "jobs2", "jobs1"]
        for what in order:
            if what == "cluster":
                with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as lc, Client(lc) as client:
                    timed("cluster-cold", client, cluster=lc.scheduler_address)
                    timed("cluster-warm", client, cluster=lc.scheduler_address)
            else:
                timed(what, jobs=int(what[-1]))
    med = {k: statistics.median(v) for k, v in times.items()}
    mcpu = {k: statistics.median(v) for k, v in cpu.items()}
    for k, v in times.items():
        print(f"{k:13s} median {med[k]:7.2f} s wall, {mcpu[k]:7.2f} s CPU  (wall runs: {', '.join(f'{t:.2f}' for t in v)})")
    print("CPU = all processes of the run (client, local workers or Dask workers and scheduler); it is not")
    print("inflated by other programs' load the way wall time is, so it shows each way's overhead:")
    print(f"CPU of --jobs 2 against --jobs 1:           {mcpu['jobs2'] / mcpu['jobs1']:.2f}x")
    print(f"CPU of the cluster (warm) against --jobs 1:  {mcpu['cluster-warm'] / mcpu['jobs1']:.2f}x")
    print(f"CPU of the cluster (fresh) against --jobs 1: {mcpu['cluster-cold'] / mcpu['jobs1']:.2f}x")
    print(f"--jobs 2 against --jobs 1:            {med['jobs1'] / med['jobs2']:.2f}x (aim >= 1.8x)")
    print(f"2-worker cluster (fresh) against --jobs 2: {med['jobs2'] / med['cluster-cold']:.2f}x")
    print(f"2-worker cluster (warm)  against --jobs 2: {med['jobs2'] / med['cluster-warm']:.2f}x")
    print(f"2-worker cluster (fresh) against --jobs 1: {med['jobs1'] / med['cluster-cold']:.2f}x")
    print(f"load average after: {_load()} (on a machine shared with other work the times are inflated)")


if __name__ == "__main__":
    main()
