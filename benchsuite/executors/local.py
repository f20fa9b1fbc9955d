"""Worker processes on this machine, with per-pass deadlines.

``jobs`` worker processes (``fork`` where available, else ``spawn``) each run
one pass at a time; each builds the problem, the certified optimum and the rule
itself from the picklable task (no big arrays are sent). A pass that overruns
its deadline stops itself at its next check (status ``timeout``); a step that
never returns gets its worker terminated ``_KILL_GRACE`` seconds later and
replaced, and the pass the status ``timeout`` with the iterations it had done
(each worker shares a counter the pass updates every iteration). A worker
that dies reports ``error`` for its pass. Tasks start largest budget first, so
the last worker to finish is not left alone with a long pass; results do not
depend on the order or on ``jobs``.
"""

from __future__ import annotations

import multiprocessing as mp
import signal
import time
from collections.abc import Callable, Sequence
from multiprocessing.connection import wait
from typing import Any

from benchsuite.monitor import SHADOWS, PassReport, PassTask, failed_report, run_pass

__all__ = ["LocalExecutor"]

#: seconds a step may overrun the deadline before its worker is terminated
_KILL_GRACE = 2.0


def _worker_main(conn: Any, threads: int, progress: Any) -> None:
    """Loop of a worker process: receive (task id, task), send reports."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops us
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)
    while True:
        try:
            msg = conn.recv()
        except (EOFError, OSError):
            return
        if msg is None:
            return
        tid, task = msg
        progress.value = 0
        try:
            report = run_pass(task, ready=lambda: conn.send(("ready", tid)), progress=progress)
            conn.send(("done", tid, report))
        except Exception as exc:  # a report that does not pickle, a broken pipe ...
            try:
                conn.send(("done", tid, failed_report(task.case, task.seed, "error", repr(exc))))
            except Exception:
                return


def _context() -> Any:
    """``fork`` where available (fast start; workers inherit imports), else ``spawn``."""
    methods = mp.get_all_start_methods()
    return mp.get_context("fork" if "fork" in methods else "spawn")


class _Worker:
    def __init__(self, ctx: Any, threads: int) -> None:
        self.conn, child = ctx.Pipe()
        self.progress = ctx.RawValue("q", 0)
        self.proc = ctx.Process(target=_worker_main, args=(child, threads, self.progress), daemon=True)
        self.proc.start()
        child.close()
        self.task: int | None = None
        self.deadline: float | None = None

    def stop(self, kill: bool = False) -> None:
        if self.proc.is_alive():
            if kill:
                self.proc.kill()
            else:
                try:
                    self.conn.send(None)
                except (BrokenPipeError, OSError):
                    self.proc.kill()
        self.proc.join(timeout=5)
        if self.proc.is_alive():  # pragma: no cover - a worker ignoring its stop message
            self.proc.kill()
            self.proc.join()
        self.conn.close()


class LocalExecutor:
    """Worker processes with deadlines (see the module docstring)."""

    def __init__(self, *, jobs: int, threads: int = 1) -> None:
        self.jobs = max(1, int(jobs))
        self.threads = int(threads)

    def close(self) -> None:
        pass

    def run(self, tasks: Sequence[PassTask], on_report: Callable[[int, PassReport], None]) -> None:
        if not tasks:
            return
        ctx = _context()
        threads = self.threads
        # largest iteration budget first (a stable sort); popped from the end
        todo = sorted(range(len(tasks)), key=lambda t: -tasks[t].case.run_budget)
        todo.reverse()
        workers = [_Worker(ctx, threads) for _ in range(min(self.jobs, len(tasks)))]
        pending = len(tasks)
        try:
            while pending:
                for w in workers:
                    if w.task is None and todo:
                        tid = todo.pop()
                        w.task, w.deadline = tid, None
                        w.conn.send((tid, tasks[tid]))
                now = time.monotonic()
                deadlines = [w.deadline for w in workers if w.deadline is not None]
                wait_for = None if not deadlines else max(0.0, min(deadlines) - now)
                ready = wait([w.conn for w in workers if w.task is not None], timeout=wait_for)
                for i, w in enumerate(workers):
                    if w.task is None:
                        continue
                    task = tasks[w.task]
                    if w.conn in ready:
                        try:
                            msg = w.conn.recv()
                        except (EOFError, OSError):
                            code = w.proc.exitcode
                            on_report(w.task, failed_report(task.case, task.seed, "error",
                                                            f"worker process died (exit code {code})",
                                                            int(w.progress.value)))
                            pending -= 1
                            w.stop(kill=True)
                            workers[i] = _Worker(ctx, threads)
                            continue
                        if msg[0] == "ready":
                            if task.timeout is not None:
                                passes = 1 + (SHADOWS if task.envelope else 0)  # each pass has its own limit
                                w.deadline = time.monotonic() + passes * task.timeout + _KILL_GRACE
                            continue
                        on_report(msg[1], msg[2])
                        pending -= 1
                        w.task, w.deadline = None, None
                    elif w.deadline is not None and time.monotonic() > w.deadline:
                        done = int(w.progress.value)
                        on_report(w.task, failed_report(
                            task.case, task.seed, "timeout",
                            f"no return from the rule within {task.timeout:g} s (after {done} iterations); "
                            "worker terminated", done))
                        pending -= 1
                        w.stop(kill=True)
                        workers[i] = _Worker(ctx, threads)
        finally:
            for w in workers:
                w.stop(kill=w.task is not None)
