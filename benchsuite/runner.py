"""The runner: iterations, gradient calls and wall time to tolerance.

A :class:`Case` is a catalogue instance x a rule (with hyperparameters) x a
gradient oracle x targets x budget x seeds. Running it has two parts.

**The monitored pass** (one per seed; :func:`monitored_pass`) starts at
``x_0 = problem.initial_point()`` and per iteration ``k = 1, 2, ...`` takes
the rule's step with the gradient at ``x_{k-1}``, then evaluates the
convergence measure (:mod:`benchsuite.measures`) at ``x_k`` against the
certified optimum. For each target it records the **first** ``k`` meeting it,
the gradient calls (``k``: one per step) and the epochs (sample gradients /
``n``) spent to get there. It stops when every target is met or the budget is
spent. Cost: with the full oracle one ``value_and_grad`` per iteration -- the
value at ``x_k`` comes with the gradient the next step needs, the objective is
never evaluated twice. With a minibatch oracle the exact first crossing needs
the full objective (or full gradient, or distance) at every iterate, which
costs about one full pass over the data per iteration on top of the
minibatch gradient; that is the price of exact counts and is why wall time
comes from the replay below, never from this pass.

Status of a pass: ``reached`` (all targets), ``partial`` (some, then the
budget ran out), ``budget`` (none), ``diverged`` (a non-finite value or
measure, or a measure above :data:`DIVERGED_ABOVE` = 1e12, i.e. twelve orders
of magnitude worse than the start), ``error`` (the rule -- or the problem at
the rule's iterate -- raised; message and traceback kept) or ``timeout``
(the per-pass wall-clock limit). A case's status aggregates its seeds: the
first of ``error``, ``timeout``, ``diverged`` present in any seed, else
``reached`` when every seed reached every target, ``budget`` when no seed
reached any, else ``partial``. The rule contract is checked on the first step
only (:meth:`benchsuite.rulespec.BuiltRule.check_step`). The fingerprint is the
measure at iterations 1, 2, 4, 8, ...

**The timing replay** (:func:`replay_times`): once the pass has found ``k`` for
a target, the same steps are replayed with the same seed and no objective
evaluations -- gradient and step only, in a tight loop -- timed with
``time.perf_counter``; repeated ``repeats`` times (default 5) and more for
short runs (until about 20 ms in total, at most 1000 repeats). Reported: the
median time to each target, its spread (the interquartile range over
repeats) and the time per step (median time to the last replayed iteration
divided by its count). BLAS threads are pinned with threadpoolctl (default 1).
Replays run one at a time in the calling process, after every monitored pass
has finished, so no other case competes for the machine.

**Parallel and robust** (:func:`run_cases`): monitored passes run in worker
processes (``jobs``, default the number of cores); each worker builds the
problem, the certified optimum and the rule itself from the picklable
:class:`Case` (no big arrays are sent). A pass that overruns its deadline
stops itself at the next check (status ``timeout``); a step that never
returns gets its worker terminated and replaced, and its pass the status
``timeout`` too. Iteration counts do not depend on ``jobs``: every pass runs
the same code with the same seed and the same BLAS thread count.

Stochastic cases (minibatch oracle) run over several seeds (default 5);
deterministic full-gradient cases run one seed.
"""

from __future__ import annotations

import math
import multiprocessing as mp
import os
import signal
import statistics
import sys
import time
import traceback
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from dataclasses import replace as _with
from multiprocessing.connection import wait
from typing import TYPE_CHECKING, Any

import numpy as np

from benchsuite.errors import UserError
from benchsuite.measures import make_measure
from benchsuite.oracle import OracleSpec, gradient_function

if TYPE_CHECKING:
    import pandas as pd

    from benchsuite.catalogue import Instance
    from benchsuite.rulespec import RuleSpec

__all__ = [
    "DEFAULT_TIMEOUT",
    "DIVERGED_ABOVE",
    "Case",
    "CaseResult",
    "Plan",
    "RunInterrupted",
    "RunOutcome",
    "RunRequest",
    "SeedOutcome",
    "aggregate_status",
    "execute",
    "monitored_pass",
    "plan_cases",
    "replay_seconds",
    "replay_times",
    "result_from_dict",
    "result_to_dict",
    "run",
    "run_cases",
    "table_rows",
    "to_frame",
]

#: a measure above this (relative to the start) counts as divergence
DIVERGED_ABOVE = 1e12
#: default per-pass wall-clock limit of a monitored pass, seconds
DEFAULT_TIMEOUT = 120.0
#: seconds a step may overrun the deadline before its worker is terminated
_KILL_GRACE = 2.0
#: a replay is repeated until its total time reaches this (seconds) ...
_MIN_TOTAL_SECONDS = 0.02
#: ... but never more often than this
_MAX_REPEATS = 1000
#: replay length for the time per step of a case that reached no target
_UNREACHED_REPLAY = 200
STATUSES = ("reached", "partial", "budget", "diverged", "error", "timeout")
_BAD = ("error", "timeout", "diverged")


# -- value objects --------------------------------------------------------------
@dataclass(frozen=True)
class Case:
    """Instance x rule x oracle x targets x budget x seeds (see the module docstring)."""

    instance: Instance
    rule: RuleSpec
    oracle: str = "full"
    batch: int | None = None
    replace: bool = True
    seeds: tuple[int, ...] = (0,)
    targets: tuple[float, ...] = ()
    budget: int | None = None
    measure: str | None = None

    @property
    def oracle_spec(self) -> OracleSpec:
        return OracleSpec(self.oracle, self.batch, self.replace)

    @property
    def run_targets(self) -> tuple[float, ...]:
        return tuple(self.targets) if self.targets else tuple(self.instance.targets)

    @property
    def run_budget(self) -> int:
        return int(self.budget if self.budget is not None else self.instance.budget)

    @property
    def run_measure(self) -> str:
        return self.measure or self.instance.measure

    def key(self) -> str:
        """Stable, human-readable id: instance, rule label, oracle, and any overrides."""
        parts = [self.instance.name, self.rule.label, self.oracle]
        if self.oracle == "minibatch":
            parts.append(f"B={self.batch}," + ("replace" if self.replace else "no-replace"))
        parts.append("seeds=" + ",".join(str(s) for s in self.seeds))
        if self.targets:
            parts.append("targets=" + ",".join(repr(t) for t in self.targets))
        if self.budget is not None:
            parts.append(f"budget={self.budget}")
        if self.measure:
            parts.append(f"measure={self.measure}")
        return " | ".join(parts)


@dataclass(frozen=True)
class SeedOutcome:
    """What one seed's monitored pass (and its replay) found."""

    seed: int
    status: str
    iters: tuple[int | None, ...]
    grad_calls: tuple[int | None, ...]
    epochs: tuple[float | None, ...]
    final_measure: float
    final_dist: float
    fingerprint: tuple[float, ...]
    iterations_run: int
    error: str | None = None
    time_to_target: tuple[float | None, ...] = ()
    time_spread: tuple[float | None, ...] = ()
    time_per_step: float | None = None


@dataclass(frozen=True)
class CaseResult:
    """A case with the hyperparameters actually used, its seeds' outcomes and the theory bound."""

    case: Case
    hyperparams: dict[str, Any]
    outcomes: tuple[SeedOutcome, ...]
    theory_bound: tuple[int | None, ...]
    status: str
    #: the published rate behind ``theory_bound`` (empty when none applies)
    bound_source: str = ""

    @property
    def timed(self) -> bool:
        """Whether every seed that can be replayed has its timing."""
        return all(not _needs_replay(o) for o in self.outcomes)

    def bound_violated(self) -> tuple[bool, ...]:
        """Per target: some seed needed more iterations than the theory bound allows."""
        return tuple(
            b is not None and any(o.iters[j] is not None and o.iters[j] > b for o in self.outcomes)
            for j, b in enumerate(self.theory_bound)
        )


def aggregate_status(statuses: Sequence[str]) -> str:
    """A case's status from its seeds' (see the module docstring)."""
    for bad in _BAD:
        if bad in statuses:
            return bad
    if statuses and all(s == "reached" for s in statuses):
        return "reached"
    if all(s == "budget" for s in statuses):
        return "budget"
    return "partial"


# -- the monitored pass ------------------------------------------------------------
def monitored_pass(
    problem: Any,
    rule: Any,
    *,
    x_star: np.ndarray,
    f_star: float,
    targets: Sequence[float],
    budget: int,
    measure: str = "subopt",
    oracle: OracleSpec = OracleSpec(),
    problem_key: str = "",
    seed: int = 0,
    deadline: float | None = None,
    check_step: Callable[[Any, tuple[int, ...]], tuple[np.ndarray, Any]] | None = None,
) -> SeedOutcome:
    """Run ``rule`` (an object with ``init``/``step``) on ``problem`` and record first crossings.

    ``deadline`` is a ``time.perf_counter()`` value after which the pass stops
    with status ``timeout`` (checked every 16 iterations); ``check_step``
    validates the first step's return value (raising stops the pass with
    status ``error``).
    """
    targets = tuple(float(t) for t in targets)
    nt = len(targets)
    iters: list[int | None] = [None] * nt
    calls: list[int | None] = [None] * nt
    epochs: list[float | None] = [None] * nt
    fingerprint: list[float] = []
    n = problem.n_samples
    full = oracle.kind == "full"
    x = problem.initial_point()
    shape = x.shape
    f, g = problem.value_and_grad(x)
    meas = make_measure(measure, f_star=f_star, x_star=x_star, x0=x, f0=f, g0=g)
    dist0 = meas.distance(x)
    need = meas.needs
    grad_fn, sampler = gradient_function(problem, oracle, problem_key, seed)
    status, error, m, k = "budget", None, 1.0, 0
    unmet = nt
    loosest = max(targets, default=-math.inf)  # the largest target not met yet
    next_fp = 1
    value = problem.value
    value_and_grad = problem.value_and_grad
    with np.errstate(all="ignore"):
        try:
            state = rule.init(x)
            while k < budget:
                if not full:
                    g = grad_fn(x)
                result = rule.step(x, g, state)
                k += 1
                if k == 1 and check_step is not None:
                    result = check_step(result, shape)
                x, state = result
                if full:
                    f, g = value_and_grad(x)
                    m = meas(f, x, g)
                elif need == "value":
                    m = meas(value(x), x, None)
                elif need == "grad":
                    f, gm = value_and_grad(x)
                    m = meas(f, x, gm)
                else:
                    m = meas(math.nan, x, None)
                if not (m <= DIVERGED_ABOVE) or (full and not math.isfinite(f)):
                    status = "diverged"
                    break
                if k == next_fp:
                    fingerprint.append(float(m))
                    next_fp *= 2
                if m <= loosest:  # some unmet target is met now (one comparison otherwise)
                    for j in range(nt):
                        if iters[j] is None and m <= targets[j]:
                            iters[j] = k
                            calls[j] = k
                            if n:
                                epochs[j] = (sampler.samples if sampler is not None else k * n) / n
                            unmet -= 1
                    if not unmet:
                        status = "reached"
                        break
                    loosest = max(t for j, t in enumerate(targets) if iters[j] is None)
                if deadline is not None and not (k & 15) and time.perf_counter() > deadline:
                    status = "timeout"
                    break
        except Exception as exc:  # the rule (or the problem at the rule's iterate) raised
            status = "error"
            error = f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"
    if status == "budget" and unmet < nt:
        status = "partial"
    try:
        final_dist = meas.distance(x) / dist0 if dist0 > 0 else math.nan
    except Exception:  # x is not an array after a broken step
        final_dist = math.nan
    return SeedOutcome(
        seed=seed,
        status=status,
        iters=tuple(iters),
        grad_calls=tuple(calls),
        epochs=tuple(epochs),
        final_measure=float(m),
        final_dist=float(final_dist),
        fingerprint=tuple(fingerprint),
        iterations_run=k,
        error=error,
    )


# -- building a case's pieces (in a worker or for a replay) -------------------------
class _Built:
    """A case's problem, certified optimum and constants, built from its Instance."""

    __slots__ = ("problem", "f_star", "x_star", "constants", "key")

    def __init__(self, instance: Instance, with_optimum: bool = True) -> None:
        self.problem = instance.build()
        self.constants = self.problem.constants()
        self.key = instance.problem_hash()
        self.f_star = math.nan
        self.x_star = np.empty(0)
        if with_optimum:
            from benchsuite.optimum import certified_optimum

            f64 = self.problem.dtype == np.float64  # the optimum is certified in float64
            opt = certified_optimum(instance, problem=self.problem if f64 else None)
            self.f_star = float(opt.f_star)
            self.x_star = np.asarray(opt.x_star, dtype=np.float64)


_BUILT_CACHE: dict[tuple[str, bool], _Built] = {}


def _built(instance: Instance, with_optimum: bool = True) -> _Built:
    """Cached per process (the last few instances): building a big problem twice is waste."""
    key = (instance.definition_hash() + instance.name, with_optimum)
    hit = _BUILT_CACHE.get(key)
    if hit is None:
        if len(_BUILT_CACHE) >= 4:
            _BUILT_CACHE.pop(next(iter(_BUILT_CACHE)))
        hit = _BUILT_CACHE[key] = _Built(instance, with_optimum)
    return hit


def _build_rule(case: Case, built: _Built, params: Mapping[str, Any] | None = None) -> Any:
    from benchsuite.rulespec import build_rule, parse_rule

    spec = case.rule if params is None else parse_rule(case.rule.name, dict(params))
    return build_rule(spec, built.constants, dtype=built.problem.dtype)


def _theory(case: Case, built: _Built, hyperparams: Mapping[str, Any]) -> tuple[tuple[int | None, ...], str]:
    from benchsuite.theory import applicable_bound, theory_iterations

    bound = applicable_bound(
        case.rule.name,
        hyperparams,
        built.constants,
        family=built.problem.family,
        oracle=case.oracle,
        measure=case.run_measure,
    )
    its = theory_iterations(bound, case.run_targets)
    return its, (f"{bound.formula} ({bound.source})" if bound else "")


@dataclass(frozen=True)
class _PassReport:
    """What a worker sends back for one (case, seed)."""

    outcome: SeedOutcome
    hyperparams: dict[str, Any]
    theory_bound: tuple[int | None, ...]
    bound_source: str


def _failed_outcome(case: Case, seed: int, status: str, message: str) -> SeedOutcome:
    nt = len(case.run_targets)
    none = tuple(None for _ in range(nt))
    return SeedOutcome(seed, status, none, none, none, math.nan, math.nan, (), 0, message)


def _run_pass(case: Case, seed: int, timeout: float | None, ready: Callable[[], None] | None = None) -> _PassReport:
    """Build everything for one (case, seed) and run its monitored pass."""
    try:
        built = _built(case.instance)
        br = _build_rule(case, built)
        bound, source = _theory(case, built, br.hyperparams)
    except Exception as exc:  # UserError from a rule or family, a failed certification, ...
        msg = str(exc) if isinstance(exc, UserError) else f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}"
        if ready is not None:
            ready()
        return _PassReport(_failed_outcome(case, seed, "error", msg), {}, tuple(None for _ in case.run_targets), "")
    if ready is not None:
        ready()
    deadline = None if timeout is None else time.perf_counter() + timeout
    try:
        outcome = monitored_pass(
            built.problem,
            br.rule,
            x_star=built.x_star,
            f_star=built.f_star,
            targets=case.run_targets,
            budget=case.run_budget,
            measure=case.run_measure,
            oracle=case.oracle_spec,
            problem_key=built.key,
            seed=seed,
            deadline=deadline,
            check_step=br.check_step,
        )
    except Exception as exc:  # e.g. rule.init raised outside the loop, or a zero measure scale
        outcome = _failed_outcome(case, seed, "error", f"{type(exc).__name__}: {exc}\n{traceback.format_exc()}")
    return _PassReport(outcome, dict(br.hyperparams), bound, source)


# -- worker processes -----------------------------------------------------------------
def _worker_main(conn: Any, threads: int) -> None:
    """Loop of a worker process: receive (task id, case, seed, timeout), send reports."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops us
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)
    while True:
        try:
            msg = conn.recv()
        except EOFError:
            return
        if msg is None:
            return
        tid, case, seed, timeout = msg
        try:
            report = _run_pass(case, seed, timeout, ready=lambda: conn.send(("ready", tid)))
            conn.send(("done", tid, report))
        except Exception as exc:  # a report that does not pickle, a broken pipe ...
            try:
                conn.send(("done", tid, _PassReport(_failed_outcome(case, seed, "error", repr(exc)), {}, (), "")))
            except Exception:
                return


def _context() -> Any:
    """``fork`` where available (fast start; workers inherit imports), else ``spawn``."""
    methods = mp.get_all_start_methods()
    return mp.get_context("fork" if "fork" in methods else "spawn")


class _Worker:
    def __init__(self, ctx: Any, threads: int) -> None:
        self.conn, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker_main, args=(child, threads), daemon=True)
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


def _run_passes(
    tasks: Sequence[tuple[Case, int]],
    *,
    jobs: int,
    threads: int,
    timeout: float | None,
    on_report: Callable[[int, _PassReport], None],
) -> None:
    """Run every (case, seed) task in ``jobs`` worker processes; report each as it ends."""
    if not tasks:
        return
    ctx = _context()
    # largest iteration budget first (a stable sort): long passes start early, so the
    # last worker to finish is not left alone with one (results do not depend on order)
    todo = sorted(range(len(tasks)), key=lambda t: -tasks[t][0].run_budget)
    todo.reverse()
    workers = [_Worker(ctx, threads) for _ in range(min(jobs, len(tasks)))]
    pending = len(tasks)
    try:
        while pending:
            for w in workers:
                if w.task is None and todo:
                    tid = todo.pop()
                    case, seed = tasks[tid]
                    w.task, w.deadline = tid, None
                    w.conn.send((tid, case, seed, timeout))
            now = time.monotonic()
            deadlines = [w.deadline for w in workers if w.deadline is not None]
            wait_for = None if not deadlines else max(0.0, min(deadlines) - now)
            ready = wait([w.conn for w in workers if w.task is not None], timeout=wait_for)
            for i, w in enumerate(workers):
                if w.task is None:
                    continue
                if w.conn in ready:
                    try:
                        msg = w.conn.recv()
                    except (EOFError, OSError):
                        case, seed = tasks[w.task]
                        code = w.proc.exitcode
                        on_report(w.task, _PassReport(
                            _failed_outcome(case, seed, "error", f"worker process died (exit code {code})"),
                            {}, tuple(None for _ in case.run_targets), ""))
                        pending -= 1
                        w.stop(kill=True)
                        workers[i] = _Worker(ctx, threads)
                        continue
                    if msg[0] == "ready":
                        if timeout is not None:
                            w.deadline = time.monotonic() + timeout + _KILL_GRACE
                        continue
                    on_report(msg[1], msg[2])
                    pending -= 1
                    w.task, w.deadline = None, None
                elif w.deadline is not None and time.monotonic() > w.deadline:
                    case, seed = tasks[w.task]
                    on_report(w.task, _PassReport(
                        _failed_outcome(case, seed, "timeout",
                                        f"no return from the rule within {timeout:g} s; worker terminated"),
                        {}, tuple(None for _ in case.run_targets), ""))
                    pending -= 1
                    w.stop(kill=True)
                    workers[i] = _Worker(ctx, threads)
    finally:
        for w in workers:
            w.stop(kill=w.task is not None)


# -- the timing replay -------------------------------------------------------------------
#: replay clocks: wall time, or the process's CPU time (not inflated by other
#: processes competing for the cores; what ``compare`` uses by default)
CLOCKS: dict[str, Callable[[], float]] = {"wall": time.perf_counter, "cpu": time.process_time}


def _replay_once(problem: Any, rule: Any, grad: Callable[[np.ndarray], np.ndarray], x: np.ndarray,
                 checkpoints: Sequence[int], clock: Callable[[], float] = time.perf_counter) -> list[float]:
    """Seconds from the start to each checkpoint iteration, one uninstrumented run."""
    step = rule.step
    out = []
    done = 0
    t0 = clock()
    state = rule.init(x)
    for kc in checkpoints:
        for _ in range(kc - done):
            x, state = step(x, grad(x), state)
        done = kc
        out.append(clock() - t0)
    return out


def _fresh(case: Case, built: _Built, params: Mapping[str, Any], seed: int) -> tuple[Any, Callable, np.ndarray]:
    br = _build_rule(case, built, params)
    grad, _ = gradient_function(built.problem, case.oracle_spec, built.key, seed)
    return br.rule, grad, built.problem.initial_point()


def replay_times(case: Case, hyperparams: Mapping[str, Any], seed: int, checkpoints: Sequence[int],
                 *, repeats: int = 5) -> list[list[float]]:
    """Timed replays: per repeat, the seconds to each (sorted) checkpoint iteration.

    At least ``repeats`` runs, more until the total passes 20 ms (at most 1000).
    Each run gets a fresh rule, generator and start point, built outside the
    timed region. Runs in the calling process with its BLAS thread setting and
    numpy's error state (the monitored pass already ran these steps finite).
    """
    built = _built(case.instance, with_optimum=False)
    cps = sorted(set(int(c) for c in checkpoints if c > 0))
    if not cps:
        return []
    runs: list[list[float]] = []
    total = 0.0
    while len(runs) < repeats or (total < _MIN_TOTAL_SECONDS and len(runs) < _MAX_REPEATS):
        rule, grad, x = _fresh(case, built, hyperparams, seed)
        t = _replay_once(built.problem, rule, grad, x, cps)
        runs.append(t)
        total += t[-1]
    return runs


def replay_seconds(case: Case, hyperparams: Mapping[str, Any], seed: int, k: int, *, threads: int | None = 1,
                   clock: str = "wall") -> float:
    """One timed uninstrumented replay of ``k`` steps (for interleaved A/B comparisons).

    ``threads`` pins the BLAS threads for the replay (``None``: leave as is);
    ``clock`` is a key of :data:`CLOCKS`.
    """
    from threadpoolctl import threadpool_limits

    built = _built(case.instance, with_optimum=False)
    rule, grad, x = _fresh(case, built, hyperparams, seed)
    with threadpool_limits(limits=threads):
        return _replay_once(built.problem, rule, grad, x, [int(k)], CLOCKS[clock])[-1]


def _needs_replay(o: SeedOutcome) -> bool:
    return not o.time_to_target and o.status in ("reached", "partial", "budget") and o.iterations_run > 0


def _quartiles(v: Sequence[float]) -> tuple[float, float]:
    if len(v) < 2:
        return v[0], 0.0
    q = statistics.quantiles(v, n=4, method="inclusive")
    return statistics.median(v), q[2] - q[0]


def _timed(case: Case, hyperparams: Mapping[str, Any], o: SeedOutcome, repeats: int) -> SeedOutcome:
    reached = [k for k in o.iters if k is not None]
    cps = sorted(set(reached)) or [min(o.iterations_run, _UNREACHED_REPLAY)]
    runs = replay_times(case, hyperparams, o.seed, cps, repeats=repeats)
    per_cp = {cp: _quartiles([r[i] for r in runs]) for i, cp in enumerate(cps)}
    ttt = tuple(None if k is None else per_cp[k][0] for k in o.iters)
    spread = tuple(None if k is None else per_cp[k][1] for k in o.iters)
    last = cps[-1]
    return _with(o, time_to_target=ttt, time_spread=spread, time_per_step=per_cp[last][0] / last)


# -- running many cases -------------------------------------------------------------------
def _progress_printer(total: int, mode: bool | None) -> Callable[[int, str], None]:
    tty = sys.stderr.isatty()
    if mode is False:
        return lambda done, text: None
    if tty:
        def bar(done: int, text: str) -> None:
            width = 24
            fill = int(width * done / max(total, 1))
            sys.stderr.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {done}/{total} {text[:60]:<60}")
            if done == total:
                sys.stderr.write("\n")
            sys.stderr.flush()
        return bar
    return lambda done, text: print(f"benchsuite: [{done}/{total}] {text}", file=sys.stderr, flush=True)


def _summary_line(r: CaseResult) -> str:
    its = [o.iters[-1] for o in r.outcomes if o.iters and o.iters[-1] is not None]
    tail = f" ({int(statistics.median(its))} it)" if its else ""
    return f"{r.case.instance.name} {r.case.rule.label}: {r.status}{tail}"


def run_cases(
    cases: Sequence[Case],
    *,
    jobs: int | None = None,
    timing: bool = True,
    repeats: int = 5,
    threads: int = 1,
    timeout: float | None = DEFAULT_TIMEOUT,
    progress: bool | None = None,
    previous: Mapping[str, CaseResult] | None = None,
    on_result: Callable[[CaseResult], None] | None = None,
) -> list[CaseResult]:
    """Run every case: monitored passes in parallel, then timing replays one at a time.

    ``previous`` maps case keys to results of an interrupted run: finished
    ones are kept, those without timing only get their replays. ``on_result``
    is called with each case's result when its monitored passes finish and
    again when it is timed (to store it as soon as it exists).
    ``progress``: ``None`` -- a bar on a terminal, plain lines otherwise;
    ``False`` -- silent. Results come back in the order of ``cases``.
    """
    from threadpoolctl import threadpool_limits

    jobs = max(1, int(jobs or os.cpu_count() or 1))
    if repeats < 1:
        raise UserError(f"--repeats must be >= 1, got {repeats}")
    if timeout is not None and not timeout > 0:
        raise UserError(f"--timeout must be > 0 seconds, got {timeout}")
    previous = previous or {}
    results: dict[int, CaseResult] = {}
    tasks: list[tuple[Case, int]] = []
    owner: list[int] = []
    for i, case in enumerate(cases):
        old = previous.get(case.key())
        if old is not None:
            results[i] = _with(old, case=case)
            continue
        for seed in case.seeds:
            tasks.append((case, seed))
            owner.append(i)
    to_time = sum(1 for i, c in enumerate(cases) if timing and (i not in results or not results[i].timed))
    show = _progress_printer(len(tasks) + to_time, progress)
    reports: dict[int, dict[int, _PassReport]] = {}
    seeds_left = {i: len(cases[i].seeds) for i in set(owner)}
    done = 0

    def collect(tid: int, report: _PassReport) -> None:
        nonlocal done
        i = owner[tid]
        reports.setdefault(i, {})[tid] = report
        seeds_left[i] -= 1
        done += 1
        if seeds_left[i] == 0:
            reps = [reports[i][t] for t in sorted(reports[i])]
            good = next((r for r in reps if r.hyperparams), reps[0])
            outs = tuple(r.outcome for r in reps)
            res = CaseResult(cases[i], good.hyperparams, outs, good.theory_bound or tuple(None for _ in cases[i].run_targets),
                             aggregate_status([o.status for o in outs]), good.bound_source)
            results[i] = res
            if on_result is not None:
                on_result(res)
            show(done, _summary_line(res))

    _run_passes(tasks, jobs=jobs, threads=threads, timeout=timeout, on_report=collect)
    if timing:
        with threadpool_limits(limits=threads):
            for i in range(len(cases)):
                res = results[i]
                if res.timed:
                    continue
                outs = tuple(_timed(res.case, res.hyperparams, o, repeats) if _needs_replay(o) else o
                             for o in res.outcomes)
                results[i] = res = _with(res, outcomes=outs)
                if on_result is not None:
                    on_result(res)
                done += 1
                show(done, "timed " + _summary_line(res))
    return [results[i] for i in range(len(cases))]


# -- serialisation (run directories, resume) ------------------------------------------------
def _enc(v: Any) -> Any:
    """JSON-safe: non-finite floats as strings, tuples as lists (recursively)."""
    if isinstance(v, float) and not math.isfinite(v):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return [_enc(u) for u in v]
    if isinstance(v, dict):
        return {k: _enc(u) for k, u in v.items()}
    if isinstance(v, np.generic):
        return _enc(v.item())
    return v


def _dec_float(v: Any) -> Any:
    if isinstance(v, str) and v in ("nan", "inf", "-inf"):
        return float(v)
    return v


def result_to_dict(r: CaseResult) -> dict[str, Any]:
    """A JSON-ready record of a result (the case itself is stored by its key)."""
    return _enc({
        "key": r.case.key(),
        "hyperparams": r.hyperparams,
        "theory_bound": list(r.theory_bound),
        "bound_source": r.bound_source,
        "status": r.status,
        "outcomes": [asdict(o) for o in r.outcomes],
    })


def result_from_dict(case: Case, d: Mapping[str, Any]) -> CaseResult:
    """Inverse of :func:`result_to_dict` for the given case."""
    outs = []
    for o in d["outcomes"]:
        outs.append(SeedOutcome(
            seed=int(o["seed"]),
            status=o["status"],
            iters=tuple(o["iters"]),
            grad_calls=tuple(o["grad_calls"]),
            epochs=tuple(o["epochs"]),
            final_measure=float(_dec_float(o["final_measure"])),
            final_dist=float(_dec_float(o["final_dist"])),
            fingerprint=tuple(float(_dec_float(v)) for v in o["fingerprint"]),
            iterations_run=int(o["iterations_run"]),
            error=o.get("error"),
            time_to_target=tuple(o.get("time_to_target") or ()),
            time_spread=tuple(o.get("time_spread") or ()),
            time_per_step=o.get("time_per_step"),
        ))
    hp = {k: tuple(v) if isinstance(v, list) else v for k, v in d["hyperparams"].items()}
    return CaseResult(case, hp, tuple(outs), tuple(d["theory_bound"]), d["status"], d.get("bound_source", ""))


# -- the tidy table ---------------------------------------------------------------------------
def _hp_text(hp: Mapping[str, Any]) -> str:
    import json

    return json.dumps(_enc(dict(hp)), sort_keys=True, separators=(",", ":"))


def table_rows(results: Sequence[CaseResult], selected: Mapping[str, bool] | None = None) -> list[dict[str, Any]]:
    """One row per case x seed x target (columns: :data:`benchsuite.results.TABLE_COLUMNS`)."""
    rows = []
    for r in results:
        c = r.case
        key = c.key()
        for o in r.outcomes:
            for j, t in enumerate(c.run_targets):
                k = o.iters[j]
                b = r.theory_bound[j] if j < len(r.theory_bound) else None
                rows.append({
                    "case": key,
                    "instance": c.instance.name,
                    "rule": c.rule.label,
                    "hyperparams": _hp_text(r.hyperparams),
                    "oracle": c.oracle,
                    "batch": c.batch,
                    "replace": c.replace if c.oracle == "minibatch" else None,
                    "measure": c.run_measure,
                    "seed": o.seed,
                    "target_index": j,
                    "target": t,
                    "iterations": k,
                    "grad_calls": o.grad_calls[j],
                    "epochs": o.epochs[j],
                    "time_to_target": o.time_to_target[j] if o.time_to_target else None,
                    "time_spread": o.time_spread[j] if o.time_spread else None,
                    "time_per_step": o.time_per_step,
                    "status": o.status,
                    "case_status": r.status,
                    "final_measure": o.final_measure,
                    "final_dist": o.final_dist,
                    "iterations_run": o.iterations_run,
                    "theory_bound": b,
                    "bound_violated": None if b is None else bool(k is not None and k > b),
                    "budget": c.run_budget,
                    "selected": None if selected is None else selected.get(key),
                })
    return rows


def to_frame(results: Sequence[CaseResult], selected: Mapping[str, bool] | None = None) -> pd.DataFrame:
    """The tidy table as a DataFrame (integer columns nullable)."""
    import pandas as pd

    from benchsuite.results import TABLE_COLUMNS

    df = pd.DataFrame(table_rows(results, selected), columns=list(TABLE_COLUMNS))
    for col in ("batch", "iterations", "grad_calls", "theory_bound"):
        df[col] = df[col].astype("Int64")
    for col in ("replace", "bound_violated", "selected"):
        df[col] = df[col].astype("boolean")
    return df


# -- a run: request, cases, run directory, history -------------------------------------------------
@dataclass(frozen=True)
class RunRequest:
    """What to run, as plain data (stored in ``meta.json`` so ``--resume`` can rebuild the cases)."""

    rules: tuple[str, ...] = ()            # empty: rules.DEFAULT_RULES
    params: tuple[tuple[str, Any], ...] = ()  # applied to every rule
    problems: str | None = None
    tier: str | None = "small"
    catalogue: tuple[str, ...] = ()
    batch: int | None = None
    replace: bool = True
    seeds: int | None = None               # seeds per stochastic case (default 5)
    budget: int | None = None
    sweep: str | None = None
    params_from: str | None = None

    @classmethod
    def make(cls, *, rules: Sequence[str] | str | None = None, params: Sequence[str] | Mapping[str, Any] = (),
             problems: str | None = None, tier: str | None = "small", catalogue: Sequence[str] | None = None,
             batch: int | None = None, replace: bool = True, seeds: int | None = None, budget: int | None = None,
             sweep: str | None = None, params_from: str | None = None) -> RunRequest:
        """A validated request: ``UserError`` for a malformed value."""
        from benchsuite.catalogue import TIERS
        from benchsuite.rulespec import parse_param
        from benchsuite.sweep import parse_sweep

        if isinstance(rules, str):
            rules = [rules]
        if isinstance(params, Mapping):
            items = list(params.items())
        else:
            items = [parse_param(p) for p in ([params] if isinstance(params, str) else params)]
        names = [k for k, _ in items]
        if len(set(names)) != len(names):
            raise UserError(f"--param: a hyperparameter is given twice ({', '.join(names)})")
        if tier is not None and tier not in TIERS:
            raise UserError(f"--tier {tier!r}: expected one of {', '.join(TIERS)}")
        for flag, v in (("--batch", batch), ("--seeds", seeds), ("--budget", budget)):
            if v is not None and (isinstance(v, bool) or int(v) != v or v < 1):
                raise UserError(f"{flag} must be a positive integer, got {v!r}")
        if sweep is not None:
            parse_sweep(sweep)
        return cls(tuple(rules or ()), tuple(sorted(items)), problems, tier, tuple(str(c) for c in catalogue or ()),
                   None if batch is None else int(batch), bool(replace), None if seeds is None else int(seeds),
                   None if budget is None else int(budget), sweep, params_from)

    def to_dict(self) -> dict[str, Any]:
        return _enc(asdict(self))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RunRequest:
        d = dict(d)
        d["rules"] = tuple(d.get("rules") or ())
        d["catalogue"] = tuple(d.get("catalogue") or ())
        d["params"] = tuple((k, tuple(v) if isinstance(v, list) else v) for k, v in d.get("params") or ())
        return cls(**d)


@dataclass(frozen=True)
class Plan:
    """The cases of a request, with sweep bookkeeping and what was skipped."""

    cases: tuple[Case, ...]
    #: case key -> (sweep group, swept value) for sweep grid points
    grid: dict[str, tuple[str, float]] = field(default_factory=dict)
    skipped: tuple[str, ...] = ()


def plan_cases(req: RunRequest, out: str | os.PathLike[str] | None = "results") -> Plan:
    """Turn a request into cases (validating everything the user gave: ``UserError``)."""
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.rules import DEFAULT_RULES
    from benchsuite.rulespec import build_rule, parse_rule
    from benchsuite.sweep import parse_sweep, selection_table

    cat = load_catalogue(list(req.catalogue) or None)
    instances = select(cat, req.problems, tier=req.tier, validate=True)
    if not instances:
        raise UserError(f"no problems selected (--problems {req.problems!r}, --tier {req.tier})")
    names = list(req.rules) or list(DEFAULT_RULES)
    for name in names:
        parse_rule(name)  # an unknown rule fails here, before any work
    chosen: dict[tuple[str, str], dict[str, Any]] = {}
    if req.params_from:
        from benchsuite.results import RunDir

        if out is None:
            raise UserError("--params-from needs a results folder (--out)")
        meta = RunDir.open(out, req.params_from).read_meta()
        if not meta.get("selected"):
            raise UserError(f"--params-from {req.params_from}: that run has no sweep selection")
        chosen = selection_table(meta["selected"])
    sweep = parse_sweep(req.sweep) if req.sweep else None
    oracle = "full" if req.batch is None else "minibatch"
    seeds = (0,) if oracle == "full" else tuple(range(req.seeds or 5))
    skipped: list[str] = []
    if oracle == "minibatch":
        keep = []
        for inst in instances:
            n = inst.build().n_samples
            if n is None:
                skipped.append(inst.name)
                continue
            if req.batch > n:
                raise UserError(f"--batch {req.batch}: exceeds the {n} samples of {inst.name}")
            keep.append(inst)
        if not keep:
            raise UserError("--batch: none of the selected problems is a finite sum")
        instances = keep
    cases: list[Case] = []
    grid: dict[str, tuple[str, float]] = {}
    checked: set[Any] = set()
    for inst in instances:
        for name in names:
            base = {**chosen.get((inst.name, name), {}), **dict(req.params)}
            points = [(None, base)] if sweep is None else [(v, {**base, sweep.name: v}) for v in sweep.values]
            for value, p in points:
                spec = parse_rule(name, p)
                if spec not in checked:
                    build_rule(spec, None)  # hyperparameter names and values, once per spec
                    checked.add(spec)
                case = Case(inst, spec, oracle, req.batch, req.replace, seeds, budget=req.budget)
                cases.append(case)
                if value is not None:
                    group = f"{inst.name} | {parse_rule(name, base).label}"
                    grid[case.key()] = (group, value)
    return Plan(tuple(cases), grid, tuple(skipped))


def sweep_selection(plan: Plan, results: Sequence[CaseResult], sweep_name: str) -> list[dict[str, Any]]:
    """Per (problem, rule) group of a sweep: the selected grid point (rule in :mod:`benchsuite.sweep`)."""
    from benchsuite.sweep import select_best

    groups: dict[str, list[tuple[CaseResult, float]]] = {}
    for r in results:
        hit = plan.grid.get(r.case.key())
        if hit is not None:
            groups.setdefault(hit[0], []).append((r, hit[1]))
    out = []
    for group, pairs in groups.items():
        best, value = select_best(pairs)
        out.append({
            "group": group,
            "instance": best.case.instance.name,
            "rule": best.case.rule.name,
            "param": sweep_name,
            "value": value,
            "case": best.case.key(),
            "hyperparams": _enc(dict(best.hyperparams)),
            "status": best.status,
        })
    return out


class RunInterrupted(KeyboardInterrupt):
    """Ctrl-C during a run: finished cases are stored, the run is marked partial."""

    def __init__(self, run_id: str | None) -> None:
        super().__init__(run_id)
        self.run_id = run_id


@dataclass(frozen=True)
class RunOutcome:
    """Everything a finished run produced."""

    frame: pd.DataFrame
    results: tuple[CaseResult, ...]
    run_id: str | None
    path: str | None
    status: str
    selected: tuple[dict[str, Any], ...]
    skipped: tuple[str, ...]


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


def execute(
    req: RunRequest | None,
    *,
    jobs: int | None = None,
    threads: int = 1,
    repeats: int = 5,
    timeout: float | None = DEFAULT_TIMEOUT,
    timing: bool = True,
    out: str | os.PathLike[str] | None = "results",
    resume: str | None = None,
    progress: bool | None = False,
) -> RunOutcome:
    """Plan, run, store (run directory + history) and tabulate a request.

    With ``resume`` the request comes from that run's ``meta.json`` and only
    the cases it lacks are run. Ctrl-C: the finished cases are stored, the
    run is marked partial and :class:`RunInterrupted` is raised.
    """
    from benchsuite.results import RunDir, history_path, record_history
    from benchsuite.sweep import parse_sweep
    from benchsuite.sysinfo import git_info, machine_info

    rd: RunDir | None = None
    stored: dict[str, dict[str, Any]] = {}
    if resume:
        if out is None:
            raise UserError("--resume needs a results folder (--out)")
        rd = RunDir.open(out, resume)
        meta = rd.read_meta()
        req = RunRequest.from_dict(meta["request"])
        stored = rd.load_cases()
    assert req is not None
    plan = plan_cases(req, out)
    if rd is None and out is not None:
        rd = RunDir.create(out)
    if not resume:
        meta = {"request": req.to_dict(), "started": _now()}
    meta.update({
        "version": _version(),
        "rules": sorted({c.rule.label for c in plan.cases}),
        "git": git_info(),
        "machine": machine_info(),
        "settings": {"jobs": jobs or os.cpu_count(), "threads": threads, "repeats": repeats, "timeout": timeout,
                     "timing": timing, "diverged_above": DIVERGED_ABOVE},
        "sweep": parse_sweep(req.sweep).describe() if req.sweep else None,
        "skipped": list(plan.skipped),
        "n_cases": len(plan.cases),
        "status": "running",
    })
    meta.setdefault("resumed", [])
    if resume:
        meta["resumed"].append(_now())
    if rd is not None:
        rd.write_meta(meta)
    previous = {c.key(): result_from_dict(c, stored[c.key()]) for c in plan.cases if c.key() in stored}
    finished: dict[str, CaseResult] = dict(previous)

    def keep(r: CaseResult) -> None:
        finished[r.case.key()] = r
        if rd is not None:
            rd.save_case(r.case.key(), result_to_dict(r))

    def close(status: str, results: Sequence[CaseResult], selected: list[dict[str, Any]]) -> pd.DataFrame:
        flags = None
        if plan.grid:
            chosen = {s["case"] for s in selected}
            flags = {k: (k in chosen) for k in plan.grid}
        frame = to_frame(results, flags)
        meta.update({"status": status, "ended": _now(), "selected": selected})
        if rd is not None and out is not None:
            rd.write_table(frame)
            rd.write_meta(meta)
            record_history(history_path(out), rd.run_id, meta, table_rows(results, flags))
        return frame

    try:
        results = run_cases(plan.cases, jobs=jobs, timing=timing, repeats=repeats, threads=threads,
                            timeout=timeout, progress=progress, previous=previous, on_result=keep)
    except KeyboardInterrupt:
        done = [finished[c.key()] for c in plan.cases if c.key() in finished]
        close("partial", done, [])
        raise RunInterrupted(rd.run_id if rd else None) from None
    selected = sweep_selection(plan, results, parse_sweep(req.sweep).name) if req.sweep else []
    frame = close("complete", results, selected)
    return RunOutcome(frame, tuple(results), rd.run_id if rd else None, str(rd.path) if rd else None,
                      "complete", tuple(selected), plan.skipped)


def _version() -> str:
    from benchsuite import __version__

    return __version__


def run(
    rules: Sequence[str] | str | None = None,
    params: Sequence[str] | Mapping[str, Any] = (),
    *,
    problems: str | None = None,
    tier: str | None = "small",
    catalogue: Sequence[str] | None = None,
    batch: int | None = None,
    replace: bool = True,
    seeds: int | None = None,
    budget: int | None = None,
    sweep: str | None = None,
    params_from: str | None = None,
    jobs: int | None = None,
    threads: int = 1,
    repeats: int = 5,
    timeout: float | None = DEFAULT_TIMEOUT,
    timing: bool = True,
    out: str | os.PathLike[str] | None = "results",
    resume: str | None = None,
    progress: bool | None = False,
) -> pd.DataFrame:
    """Run rules on catalogue problems and return the tidy table (one row per case x seed x target).

    ``rules``: built-in names or ``package.module:attr`` (default:
    :data:`benchsuite.rules.DEFAULT_RULES`); ``params``: ``name=value`` strings or a mapping, applied
    to every rule; ``problems``: a selector (names, globs, a StRD file path);
    ``tier``: small / medium / large (``None``: every tier); ``catalogue``:
    extra catalogue files or folders; ``batch``: minibatch size (finite-sum
    problems only; others are skipped) sampled with or without ``replace``;
    ``seeds``: seeds per stochastic case (default 5); ``budget``: overrides
    the instances' iteration budgets; ``sweep``: ``name=lo:hi:n``;
    ``params_from``: a run id whose sweep selection to reuse; ``out``: the
    results folder (run directory + history; ``None`` writes nothing);
    ``resume``: complete an interrupted run (the other arguments are then
    taken from it). Execution settings (``jobs``, ``threads``, ``repeats``,
    ``timeout``, ``timing``) are described in :func:`run_cases`.
    """
    req = None if resume else RunRequest.make(
        rules=rules, params=params, problems=problems, tier=tier, catalogue=catalogue, batch=batch,
        replace=replace, seeds=seeds, budget=budget, sweep=sweep, params_from=params_from,
    )
    return execute(req, jobs=jobs, threads=threads, repeats=repeats, timeout=timeout, timing=timing,
                   out=out, resume=resume, progress=progress).frame
