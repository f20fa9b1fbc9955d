"""Monitored passes (and timing replays) on a Dask distributed cluster.

``ClusterExecutor(address)`` connects a ``distributed.Client`` to the
scheduler at ``address`` (``tcp://host:8786``) and submits one task per
:class:`~benchsuite.monitor.PassTask` (``pure=False``, a readable key unique
to the run); each task calls :func:`benchsuite.monitor.run_pass` with BLAS
pinned to ``threads`` (threadpoolctl), exactly as a local worker process does,
so counts and fingerprints are those of a local run. Reports are handed to
``on_report`` as tasks finish (``as_completed``); the caller puts them in order.

What travels: a task is a :class:`~benchsuite.cases.Case` (the instance's
*definition*, never its data) and a seed. Each worker builds the problem from
the definition and its seed and looks up or certifies the optimum itself (the
first worker process on a machine certifies it while the others wait for a
lock and then read the cached result); :func:`benchsuite.monitor.built`
caches the last few built instances per worker process, and tasks are started
instance by instance, so the cases of one instance on one worker build it once.

**Data files.** An instance whose parameters name files (a NIST StRD file, a
user's data file) reads them *on the worker, at the same path* (a relative
path from the worker's current folder): a shared file system, or a copy at the
same place. The client sends each file's
sha256 with the task; before the first pass that needs the file, a worker
checks that the path exists and that its bytes have that digest (once per
worker process and file). A missing or different file stops the run with one
line naming the worker, the instance and the path (exit 2); finished cases
are kept and ``--resume`` completes the run once the files are in place. We
do not ship the bytes: an instance's identity (its problem hash, which keys
the certified optimum and seeds the minibatch sampler) contains the path, so a
copy under another path on the worker would be another problem.

**Failures.**

* A worker that dies mid-pass: the scheduler reruns the task elsewhere
  (``distributed.scheduler.allowed-failures``, default 3). The rerun starts
  from scratch with the same seed, so its report equals what the lost run
  would have given; each task is reported exactly once, and its hung-step
  clock restarts with the rerun (before cancelling, the client asks the
  scheduler whether the task still runs where it started). A task whose workers
  die more often than that is reported with status ``error``.
* A pass that overruns its timeout stops itself at its next check (status
  ``timeout``). A step that never returns: ``timeout x (1 + SHADOWS with the
  envelope) + KILL_GRACE`` seconds after the pass *started* (each task logs
  an event once its problem is built), its future is cancelled, the pass is reported ``timeout`` and
  the worker is restarted through its nanny (a Python thread cannot be
  stopped; a worker started with ``--no-nanny`` cannot be restarted and keeps
  one thread busy until the step returns). Other tasks that were on that
  worker are rerun elsewhere.
* A bad address, a scheduler without workers, workers that cannot import
  benchsuite or the run's rule modules: one line (``UserError``, exit 2)
  before any pass runs. A task the scheduler drops (it restarted, the
  connection was lost, another client cancelled it) stops the run with one
  line: it is no result of the rule, so it is not stored as one, and
  ``--resume`` runs it again.

**Timing replays** (:meth:`ClusterExecutor.time_cases`) run after all passes,
as tasks on the workers with BLAS pinned to ``threads``, serialised per
machine by a ``distributed.Lock`` named after the worker's host name, so no
replay overlaps another replay of this scheduler on that machine. Each timed
seed records the machine in ``SeedOutcome.timed_on``. Work other clients send
to the same workers at the same time is not excluded.
"""

from __future__ import annotations

import hashlib
import os
import time
import uuid
from collections.abc import Callable, Sequence
from typing import Any

from benchsuite.errors import UserError
from benchsuite.monitor import SHADOWS, PassReport, PassTask, failed_report

__all__ = ["CONNECT_TIMEOUT", "KILL_GRACE", "ClusterExecutor", "DataFileError", "connect", "preflight"]

#: seconds to reach the scheduler (and, once connected, to see its first worker)
CONNECT_TIMEOUT = float(os.environ.get("BENCHSUITE_CLUSTER_TIMEOUT", "10"))
#: seconds past a hung pass's limit before its future is cancelled (network and start-up included)
KILL_GRACE = 5.0
#: the topic of the "task started" events workers log
_STARTED = "benchsuite-started"
#: the topic of the events a worker logs for each case it timed: host, case key, start and end (epoch s)
TIMED = "benchsuite-timed"
#: how often the client looks at deadlines while waiting for results, seconds
_POLL = 0.05


class DataFileError(Exception):
    """A data file an instance reads is missing on a worker or differs from the client's."""


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0][:200]


def connect(address: str) -> Any:
    """A ``distributed.Client`` on ``address``; ``UserError`` naming it when that fails."""
    try:
        import distributed
    except ImportError:
        raise UserError("--cluster needs Dask distributed, which is not installed "
                        "(pip install 'benchsuite[cluster]')") from None
    import logging

    # a failed connect logs its own traceback-like lines; the UserError below says it in one
    log = logging.getLogger("distributed")
    level = log.level
    log.setLevel(logging.CRITICAL)
    from distributed.comm import get_address_host_port

    try:
        get_address_host_port(address)
    except Exception as exc:  # missing port, unknown scheme ...
        log.setLevel(level)
        raise UserError(f"--cluster {address}: not a scheduler address ({_first_line(exc)}; "
                        "expected e.g. tcp://host:8786)") from None
    try:
        client = distributed.Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except Exception as exc:  # OSError, TimeoutError, ValueError for a malformed address ...
        raise UserError(f"--cluster {address}: no Dask scheduler answered within {CONNECT_TIMEOUT:g} s "
                        f"({_first_line(exc)})") from None
    finally:
        log.setLevel(level)
    try:
        client.wait_for_workers(1, timeout=CONNECT_TIMEOUT)
    except Exception:
        client.close()
        raise UserError(f"--cluster {address}: the scheduler has no workers "
                        f"(none joined within {CONNECT_TIMEOUT:g} s; start some with "
                        f"`dask worker {address} --nthreads 1`)") from None
    return client


def preflight(address: str, cases: Sequence[Any]) -> None:
    """Connect, check the workers can run ``cases`` (benchsuite, rule modules), disconnect: else one line.

    For callers that want a bad address or a badly set-up worker to fail
    before they write anything (the runner calls it before creating a run folder).
    """
    client = connect(address)
    try:
        _check_workers(client, address, _rule_modules(cases))
    finally:
        client.close()


def _check_workers(client: Any, address: str, modules: Sequence[str]) -> None:
    """Every worker imports benchsuite (same version) and ``modules``: else one line."""
    from benchsuite import __version__

    try:
        answers = client.run(_probe, list(modules), on_error="return")
    except Exception as exc:
        raise UserError(f"--cluster {address}: could not ask the workers ({_first_line(exc)})") from None
    for worker, ans in sorted(answers.items()):
        if isinstance(ans, BaseException):
            raise UserError(f"--cluster {address}: worker {worker} cannot run benchsuite "
                            f"({_first_line(ans)}); install the same benchsuite there")
        version, host, bad = ans
        if version != __version__:
            raise UserError(f"--cluster {address}: worker {worker} ({host}) has benchsuite {version}, "
                            f"this client {__version__}; install the same version on every worker")
        if bad:
            raise UserError(f"--cluster {address}: worker {worker} ({host}) cannot import the rule "
                            f"module {bad[0]}; put it on the workers' PYTHONPATH")


# -- on the workers ---------------------------------------------------------------------
def _probe(modules: Sequence[str]) -> tuple[str, str, list[str]]:
    """benchsuite's version, this host, and the modules that do not import here."""
    import importlib
    import platform

    import benchsuite

    bad = []
    for m in modules:
        try:
            importlib.import_module(m)
        except Exception as exc:
            bad.append(f"{m} ({_first_line(exc)})")
    return benchsuite.__version__, platform.node(), bad


_CHECKED: set[tuple[str, str]] = set()


def _sha256(path: str) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _check_files(files: Sequence[tuple[str, str]], instance: str) -> None:
    """Every (path, sha256) is on this worker with those bytes (checked once per process)."""
    import platform

    for path, digest in files:
        if (path, digest) in _CHECKED:
            continue
        where = f"worker on {platform.node()}: instance {instance} reads {path}"
        try:
            got = _sha256(path)
        except OSError as exc:
            raise DataFileError(f"{where}, which is not readable there ({exc.strerror or exc}); every worker "
                                "needs the data files at the same path (shared file system or a copy)") from None
        if got != digest:
            raise DataFileError(f"{where}, whose bytes differ from the client's copy (sha256 {got[:12]} "
                                f"there, {digest[:12]} here)")
        _CHECKED.add((path, digest))


_WARM: set[tuple[str, str | None]] = set()  # (instance, dtype) built in this process


def _warm(case: Any) -> None:
    """Build the case's problem and certified optimum once per worker process, one process per machine at a time.

    The first process on a machine to need an instance certifies its optimum
    (and caches it on disk) while the others wait for the lock and then read
    the cache, instead of every worker process certifying the same optimum at
    once (minutes, and memory, for a large instance).
    """
    import platform

    import distributed

    from benchsuite.monitor import built

    inst = case.instance
    k = (repr(inst), case.dtype)  # the definition as given (no file hashing per task)
    if k in _WARM:
        return
    ident = hashlib.sha256(k[0].encode()).hexdigest()[:16]
    with distributed.Lock(f"benchsuite-build:{platform.node()}:{inst.name}:{ident}:{case.dtype}"):
        try:
            built(inst, dtype=case.dtype)
        except Exception:  # run_pass builds again and reports the failure with the case
            return
    _WARM.add(k)


def _pass_on_worker(task: PassTask, threads: int, files: tuple[tuple[str, str], ...], key: str) -> PassReport:
    """One monitored pass on a worker: check data files, build, log the start, run with BLAS pinned."""
    import distributed
    from threadpoolctl import threadpool_limits

    from benchsuite.monitor import run_pass

    _check_files(files, task.case.instance.name)
    worker = distributed.get_worker()
    with threadpool_limits(limits=threads):
        _warm(task.case)
        # the hung-step clock starts once the problem is built, as for a local worker
        return run_pass(task, ready=lambda: worker.log_event(_STARTED, {"key": key, "worker": worker.address}))


def _time_on_worker(result: Any, repeats: int, threads: int, files: tuple[tuple[str, str], ...]) -> Any:
    """A case's timing replays on a worker, one machine-wide at a time (a lock per host name)."""
    import platform
    from dataclasses import replace

    import distributed
    from threadpoolctl import threadpool_limits

    from benchsuite.timing import needs_replay, timed_outcome

    _check_files(files, result.case.instance.name)
    host = platform.node()
    with distributed.Lock(f"benchsuite-replay:{host}"), threadpool_limits(limits=threads):
        start = time.time()
        outs = tuple(timed_outcome(result.case, result.hyperparams, o, repeats) if needs_replay(o) else o
                     for o in result.outcomes)
        # when each machine timed what (the scheduler keeps it: client.get_events(TIMED))
        distributed.get_worker().log_event(TIMED, {"host": host, "case": result.case.key(),
                                                   "start": start, "end": time.time()})
    return replace(result, outcomes=outs)


# -- on the client ----------------------------------------------------------------------
def _instance_files(instance: Any) -> tuple[tuple[str, str], ...]:
    """(path as given, sha256) of each string parameter naming a file here (as ``Problem.data_digest``).

    The path is kept as the instance gives it, since that is what the family
    opens on the worker (a relative path from the worker's current folder).
    """
    out = []
    for _, value in instance.params:
        if isinstance(value, str) and len(value) < 4096 and os.path.isfile(value):
            out.append((value, _sha256(value)))
    return tuple(out)


def _rule_modules(cases: Sequence[Any]) -> list[str]:
    """The modules of the cases' rules given as ``package.module:attr``."""
    return sorted({c.rule.name.split(":")[0] for c in cases if ":" in c.rule.name})


def _order(tasks: Sequence[PassTask]) -> list[int]:
    """Task indices in the order to start them (results do not depend on it).

    The tasks of one instance together, so that a worker meets an instance in
    one stretch and its per-process cache (the last few instances built)
    holds; instances with the largest iteration budget first, and inside an
    instance the largest budget first, so that no long pass is left to run
    alone at the end.
    """
    group = [(tasks[t].case.instance.name, repr(tasks[t].case.instance), str(tasks[t].case.dtype))
             for t in range(len(tasks))]
    most: dict[tuple[str, str, str], int] = {}
    for t, g in enumerate(group):
        most[g] = max(most.get(g, 0), tasks[t].case.run_budget)
    return sorted(range(len(tasks)), key=lambda t: (-most[group[t]], group[t], -tasks[t].case.run_budget, t))


class ClusterExecutor:
    """Passes as Dask tasks (see the module docstring)."""

    def __init__(self, address: str, *, threads: int = 1) -> None:
        self.address = address
        self.threads = int(threads)
        self.client = connect(address)
        self._token = uuid.uuid4().hex[:8]
        self._files: dict[str, tuple[tuple[str, str], ...]] = {}
        self._started: dict[str, tuple[float, str]] = {}
        self._futures: dict[str, Any] = {}
        self._restarts: list[Any] = []
        self.client.subscribe_topic(_STARTED, self._on_started)

    def close(self) -> None:
        for t in self._restarts:  # let a restart reach the scheduler before we disconnect
            t.join(timeout=10)
        try:
            self.client.unsubscribe_topic(_STARTED)
        except Exception:  # pragma: no cover - a client already closing
            pass
        self.client.close()

    def _on_started(self, event: tuple[float, dict[str, str]]) -> None:
        msg = event[1]
        self._started[msg["key"]] = (time.monotonic(), msg["worker"])

    def _files_of(self, instance: Any) -> tuple[tuple[str, str], ...]:
        k = repr(instance)
        if k not in self._files:
            self._files[k] = _instance_files(instance)
        return self._files[k]

    def _collect(self, futures: dict[str, int], on_done: Callable[[int, Any], None],
                 failed: Callable[[int, str, str], Any], limit: Callable[[int], float | None]) -> None:
        """Hand each future's result to ``on_done`` exactly once; cancel hung ones past ``limit``."""
        from distributed import as_completed

        ac = as_completed(list(self._futures.values()), with_results=False, loop=self.client.loop)
        done: set[int] = set()
        try:
            while len(done) < len(futures):
                batch = ac.next_batch(block=False) if ac.has_ready() else []
                for fut in batch:
                    tid = futures[fut.key]
                    if tid in done:  # a future we cancelled after reporting its timeout
                        continue
                    done.add(tid)
                    on_done(tid, self._outcome(fut, tid, failed))
                now = time.monotonic()
                for key, seen in self._started.copy().items():  # filled by the client's event thread
                    tid = futures.get(key)
                    if tid is None or tid in done:
                        self._started.pop(key, None)
                        continue
                    lim = limit(tid)
                    if lim is None or now < seen[0] + lim:
                        continue
                    if self._processing_on(key) != seen[1]:  # its worker died; a rerun logs a new start
                        self._started.pop(key, None)
                        continue
                    done.add(tid)
                    self._futures[key].cancel()
                    note = self._restart(seen[1])
                    on_done(tid, failed(tid, "timeout", f"no return within {lim - KILL_GRACE:g} s; "
                                                        f"task cancelled, {note}"))
                if not batch:
                    time.sleep(_POLL)
        finally:
            left = [f for k, f in self._futures.items() if futures[k] not in done]
            if left:  # Ctrl-C or an error: take our work off the cluster
                self.client.cancel(left)
            self._futures = {}

    def _outcome(self, fut: Any, tid: int, failed: Callable[[int, str, str], Any]) -> Any:
        if fut.status == "finished":
            try:
                return fut.result()
            except Exception as exc:  # the result did not arrive (unpicklable, lost with the worker ...)
                return failed(tid, "error", f"result lost: {_first_line(exc)}")
        try:
            exc = fut.exception() if fut.status == "error" else None
        except Exception:  # the exception itself did not arrive
            exc = None
        if exc is None:  # cancelled or lost on the scheduler's side: not the rule's doing, so no result
            raise UserError(f"--cluster {self.address}: the scheduler dropped a task ({fut.status}; restarted, "
                            "connection lost or cancelled by another client); finished cases are kept, "
                            "complete the run with --resume")
        if isinstance(exc, DataFileError):
            raise UserError(str(exc))
        from distributed import KilledWorker

        if isinstance(exc, KilledWorker):
            return failed(tid, "error", "the workers running this task died too often "
                                        f"(distributed.scheduler.allowed-failures): {_first_line(exc)}")
        return failed(tid, "error", f"{type(exc).__name__}: {_first_line(exc)}")

    def _processing_on(self, key: str) -> str | None:
        """The worker the scheduler has the task running on now (None: waiting, done or unknown)."""
        def where(dask_scheduler: Any) -> str | None:  # runs on the scheduler (pickled by value)
            ts = dask_scheduler.tasks.get(key)
            return ts.processing_on.address if ts is not None and ts.processing_on is not None else None

        try:
            return self.client.run_on_scheduler(where)
        except Exception:  # cannot tell: trust the start event
            return self._started.get(key, (0.0, None))[1]

    def _restart(self, worker: str) -> str:
        """Ask the worker's nanny for a fresh process, in the background (it may take a while)."""
        import threading

        def restart() -> None:
            try:
                self.client.restart_workers([worker], timeout=120, raise_for_error=False)
            except Exception:  # no nanny, or the client closed meanwhile: the thread stays busy
                pass

        t = threading.Thread(target=restart, name=f"benchsuite-restart {worker}", daemon=True)
        t.start()
        self._restarts.append(t)
        return (f"worker {worker} restarted by its nanny (without one it keeps a thread busy until the "
                "step returns)")

    # -- the executor interface ----------------------------------------------------------
    def run(self, tasks: Sequence[PassTask], on_report: Callable[[int, PassReport], None]) -> None:
        if not tasks:
            return
        _check_workers(self.client, self.address, _rule_modules([t.case for t in tasks]))
        futures: dict[str, int] = {}
        self._futures = {}
        for rank, tid in enumerate(_order(tasks)):
            task = tasks[tid]
            key = f"benchsuite-pass-{self._token}-{tid:06d}"
            futures[key] = tid
            self._futures[key] = self.client.submit(
                _pass_on_worker, task, self.threads, self._files_of(task.case.instance), key,
                key=key, pure=False, priority=len(tasks) - rank)

        def failed(tid: int, status: str, message: str) -> PassReport:
            return failed_report(tasks[tid].case, tasks[tid].seed, status, message)

        def limit(tid: int) -> float | None:
            t = tasks[tid]
            if t.timeout is None:
                return None
            return t.timeout * (1 + (SHADOWS if t.envelope else 0)) + KILL_GRACE

        self._collect(futures, on_report, failed, limit)
        self._token = uuid.uuid4().hex[:8]  # the next batch gets new keys

    def time_cases(self, items: Sequence[tuple[int, Any]], repeats: int,
                   on_timed: Callable[[int, Any], None]) -> None:
        """Timing replays of ``(index, CaseResult)`` items on the workers, one per machine at a time.

        ``on_timed(index, timed result)`` as each finishes. A case whose replay
        fails keeps its untimed result (its timing columns stay empty).
        """
        if not items:
            return
        futures: dict[str, int] = {}
        self._futures = {}
        for j, (_, res) in enumerate(items):
            key = f"benchsuite-time-{self._token}-{j:06d}"
            futures[key] = j
            self._futures[key] = self.client.submit(
                _time_on_worker, res, repeats, self.threads, self._files_of(res.case.instance),
                key=key, pure=False)

        def failed(j: int, status: str, message: str) -> Any:
            import sys

            res = items[j][1]
            print(f"benchsuite: timing {res.case.instance.name} {res.case.rule.label} failed on the cluster "
                  f"({message}); its time columns stay empty", file=sys.stderr)
            return res

        self._collect(futures, lambda j, res: on_timed(items[j][0], res), failed, lambda j: None)
        self._token = uuid.uuid4().hex[:8]
