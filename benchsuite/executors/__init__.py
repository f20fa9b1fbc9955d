"""Where monitored passes run: the executor interface and how to pick one.

An executor takes :class:`~benchsuite.monitor.PassTask` values (a case and a
seed: small and picklable) and reports a :class:`~benchsuite.monitor.PassReport`
for each as it finishes, in any order; the caller puts them back in order.
It never knows what a pass measures, and a pass never knows where it runs:
every executor calls :func:`benchsuite.monitor.run_pass`.

* :class:`~benchsuite.executors.local.LocalExecutor` -- worker processes on
  this machine with per-pass deadlines (the default);
* :class:`~benchsuite.executors.cluster.ClusterExecutor` -- a Dask distributed
  scheduler (``--cluster tcp://host:8786``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Protocol

from benchsuite.monitor import PassReport, PassTask

__all__ = ["Executor", "make_executor"]


class Executor(Protocol):
    """Runs passes; ``on_report(index, report)`` is called once per task, as each finishes."""

    def run(self, tasks: Sequence[PassTask], on_report: Callable[[int, PassReport], None]) -> None: ...

    def close(self) -> None: ...


def make_executor(*, jobs: int, threads: int, cluster: str | None = None) -> Executor:
    """A local executor, or a cluster one when ``cluster`` is a scheduler address."""
    if cluster:
        from benchsuite.executors.cluster import ClusterExecutor

        return ClusterExecutor(cluster, threads=threads)
    from benchsuite.executors.local import LocalExecutor

    return LocalExecutor(jobs=jobs, threads=threads)
