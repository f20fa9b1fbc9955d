"""Speed-up comparison of two rules (or one rule at two git revisions).

Both sides are measured in one run:

1. **Monitored pass** on each side (the runner's ``run_cases`` without
   timing) gives the iterations to each target.
2. **Timed replays, interleaved.** Per case, the target timed is the tightest
   target both sides reached (when neither reached any, both replay the same
   number of steps and the comparison is per step). Each side replays its own
   k steps (uninstrumented, like the runner's timing replay) in pairs, the
   order alternating A B, B A, A B, ... so that a linear drift of the
   machine's speed cancels within every two pairs, after ``WARMUP_PAIRS`` discarded pairs (the first samples of a
   case run measurably slow: caches, allocator, frequency). Replays shorter
   than ``MIN_SAMPLE_SECONDS`` are repeated inside one sample so the clock's
   resolution and call overhead stay negligible.
   Time is the replaying process's **CPU time** by default (``clock="cpu"``,
   ``time.process_time``): for single-threaded code (BLAS is pinned to one
   thread) it equals the wall time on an idle machine, and it is not
   inflated when other processes compete for the cores, which on a shared
   2-core machine cuts the spread of the paired log-ratios about threefold.
   ``clock="wall"`` uses the runner's wall-clock ``replay_seconds`` instead.
3. **Statistics.** Pair i gives the log-ratio ``d_i = log(t_B,i / t_A,i)``.
   The per-case estimate of the time ratio B/A is ``exp(T(d))`` where T is the
   10 % trimmed mean (robust to the odd replay that a busy machine slows down,
   while still using most pairs); its 95 % confidence interval is a **paired**
   BCa bootstrap of T over the pairs (``scipy.stats.bootstrap``). A ratio is
   *significant* when its interval excludes 1. The overall figure is the
   geometric mean of the per-case ratios, ``exp(mean_j T(d_j))``, with an
   interval from a bootstrap that resamples each case's pairs independently.

The iteration counts of both sides are stated next to the times: when they
differ, a change in time to target comes from changed behaviour (more or fewer
steps), not from faster or slower steps; the time per step ratio is reported
as well.

With ``rev_a`` / ``rev_b`` each side runs in its own Python process whose
``sys.path`` starts with a temporary ``git worktree`` of that revision, so each
imports its own version of the user's module; the parent sends the replay
requests to the two processes in turn over pipes and removes the worktrees
afterwards, also on error. Two processes are never quite identical (memory
layout, allocator state): measured on a busy 2-core machine, six A/A
comparisons of one revision against itself in one pair of processes gave
ratios from 0.92 to 1.02, two of them with intervals excluding 1. So the
pairs are spread over ``ROUNDS`` successive pairs of fresh processes, which
averages this per-process effect; the interval still treats the pairs as
independent, so read a cross-revision difference of a few percent as
unconfirmed and rerun the comparison to see whether it holds.
"""

from __future__ import annotations

import math
import os
import pickle
import shutil
import subprocess
import sys
import tempfile
import traceback
import warnings
from collections.abc import Mapping, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO, Iterator

import numpy as np

from benchsuite.errors import UserError

__all__ = [
    "Side",
    "CaseComparison",
    "Comparison",
    "MIN_SAMPLE_SECONDS",
    "TRIM",
    "ratio_interval",
    "overall_interval",
    "compare",
    "compare_runs",
]

#: a replay sample shorter than this is repeated within the sample
MIN_SAMPLE_SECONDS = 0.02
#: git-revision comparisons: successive pairs of fresh worker processes
ROUNDS = 3
#: replay pairs run and discarded before the timed pairs of each case
WARMUP_PAIRS = 2
#: proportion cut from each end for the trimmed mean of log-ratios
TRIM = 0.1
CONFIDENCE = 0.95
#: how a replay is timed
CLOCKS = {
    "cpu": "process CPU time (time.process_time)",
    "wall": "wall time (the runner's replay_seconds, time.perf_counter)",
}


@dataclass(frozen=True)
class Side:
    """One side of a comparison: a rule spec, optionally at a git revision."""

    rule: str
    params: Mapping[str, Any] | Sequence[str] = ()
    rev: str | None = None

    @property
    def label(self) -> str:
        if isinstance(self.params, Mapping):
            ps = [f"{k}={v!r}" for k, v in sorted(self.params.items())]
        else:
            ps = list(self.params)
        text = self.rule + (f"({', '.join(ps)})" if ps else "")
        return f"{text}@{self.rev}" if self.rev else text


@dataclass(frozen=True)
class CaseComparison:
    """One case: iterations and time to target on both sides."""

    instance: str
    status_a: str
    status_b: str
    target: float | None  # the target timed; None: same number of steps, per-step comparison
    iters_a: int | None
    iters_b: int | None
    times_a: tuple[float, ...]  # seconds per replay, in pair order
    times_b: tuple[float, ...]
    ratio: float | None  # time to target, B / A
    ci: tuple[float, float] | None
    note: str

    @property
    def significant(self) -> bool:
        return self.ci is not None and not (self.ci[0] <= 1.0 <= self.ci[1])

    @property
    def iter_ratio(self) -> float | None:
        if not self.iters_a or self.iters_b is None:
            return None
        return self.iters_b / self.iters_a

    @property
    def step_ratio(self) -> float | None:
        """Time per step, B / A."""
        if self.ratio is None or not self.iters_a or not self.iters_b:
            return None
        return self.ratio * self.iters_a / self.iters_b


@dataclass(frozen=True)
class Comparison:
    label_a: str
    label_b: str
    cases: tuple[CaseComparison, ...]
    ratio: float | None  # geometric mean over cases of time B / A
    ci: tuple[float, float] | None
    repeats: int
    method: str = field(
        default="paired replays A B / B A alternating; per case exp(10 % trimmed mean of log(tB/tA)), "
        "95 % BCa bootstrap over pairs; overall: geometric mean over cases, bootstrap resampling each case"
    )

    @property
    def significant(self) -> bool:
        return self.ci is not None and not (self.ci[0] <= 1.0 <= self.ci[1])

    def summary(self) -> str:
        if self.ratio is None:
            return "no case could be timed on both sides"
        speed = 1.0 / self.ratio
        word = "faster" if speed > 1 else "slower"
        factor = speed if speed > 1 else self.ratio
        if self.ci is None:
            interval, sig = "no interval", "significance unknown"
        else:
            interval = f"95 % CI {self.ci[0]:.3f}-{self.ci[1]:.3f}"
            sig = "significant" if self.significant else "not significant"
        return (
            f"B takes {self.ratio:.3f}x the time of A ({interval}): "
            f"B is {factor:.2f}x {word}, {sig} (geometric mean over {len(self.cases)} case(s))"
        )


# ---------------------------------------------------------------- statistics
def _trimmed(x: np.ndarray, axis: int = -1) -> np.ndarray:
    from scipy.stats import trim_mean

    return trim_mean(x, TRIM, axis=axis)


def ratio_interval(
    times_a: Sequence[float], times_b: Sequence[float], *, seed: int = 0, n_resamples: int = 4999
) -> tuple[float, tuple[float, float]]:
    """Ratio B/A and its 95 % paired bootstrap interval (see the module docstring)."""
    from scipy.stats import DegenerateDataWarning, bootstrap

    d = np.log(np.asarray(times_b, float)) - np.log(np.asarray(times_a, float))
    if d.size < 2:
        raise ValueError("need at least two replay pairs")
    est = float(_trimmed(d))
    if np.ptp(d) == 0.0:
        return math.exp(est), (math.exp(est), math.exp(est))
    with warnings.catch_warnings():  # a degenerate BCa interval is handled below
        warnings.simplefilter("ignore", DegenerateDataWarning)
        warnings.simplefilter("ignore", RuntimeWarning)  # 0/0 in the acceleration of a degenerate sample
        res = bootstrap(
            (d,), _trimmed, confidence_level=CONFIDENCE, n_resamples=n_resamples, method="BCa",
            rng=np.random.default_rng(seed),
        )
    lo, hi = res.confidence_interval
    if not (math.isfinite(lo) and math.isfinite(hi)):  # BCa degenerate: fall back to percentile
        res = bootstrap(
            (d,), _trimmed, confidence_level=CONFIDENCE, n_resamples=n_resamples, method="percentile",
            rng=np.random.default_rng(seed),
        )
        lo, hi = res.confidence_interval
    return math.exp(est), (math.exp(lo), math.exp(hi))


def overall_interval(
    pairs: Sequence[tuple[Sequence[float], Sequence[float]]], *, seed: int = 0, n_resamples: int = 4999
) -> tuple[float, tuple[float, float]]:
    """Geometric mean over cases of the ratio B/A, with a 95 % bootstrap interval."""
    from scipy.stats import bootstrap

    ds = [np.log(np.asarray(b, float)) - np.log(np.asarray(a, float)) for a, b in pairs]
    est = float(np.mean([_trimmed(d) for d in ds]))
    if all(np.ptp(d) == 0.0 for d in ds):
        return math.exp(est), (math.exp(est), math.exp(est))

    def stat(*samples: np.ndarray, axis: int = -1) -> np.ndarray:
        return np.mean([_trimmed(s, axis=axis) for s in samples], axis=0)

    res = bootstrap(
        tuple(ds), stat, confidence_level=CONFIDENCE, n_resamples=n_resamples, method="percentile",
        paired=False, rng=np.random.default_rng(seed),
    )
    lo, hi = res.confidence_interval
    return math.exp(est), (math.exp(lo), math.exp(hi))


# ------------------------------------------------------------ the two sides
@dataclass(frozen=True)
class _Setup:
    """What a side needs to build its cases (sent to worker processes)."""

    instances: tuple[Any, ...]
    rule: str
    params: tuple[tuple[str, Any], ...] | tuple[str, ...]
    oracle: str
    batch: int | None
    seeds: tuple[int, ...]
    jobs: int | None
    cluster: str | None = None  # a Dask scheduler address for the monitored passes


@dataclass(frozen=True)
class _Monitored:
    """A side's monitored pass of one case, reduced to what the comparison uses."""

    status: str
    iters: tuple[int | None, ...]  # first seed
    iterations_run: int
    label: str


class _Engine:
    """Runs cases and replays inside the current process."""

    def __init__(self) -> None:
        self.cases: list[Any] = []
        self.hyper: list[dict[str, Any]] = []

    def setup(self, s: _Setup) -> list[_Monitored]:
        from benchsuite.rulespec import parse_param, parse_rule
        from benchsuite.runner import Case, run_cases

        params = s.params
        if params and isinstance(params[0], str):
            params = tuple(parse_param(p) for p in params)  # type: ignore[arg-type]
        spec = parse_rule(s.rule, dict(params))
        self.cases = [Case(instance=i, rule=spec, oracle=s.oracle, batch=s.batch, seeds=s.seeds) for i in s.instances]
        results = run_cases(self.cases, jobs=s.jobs, timing=False, progress=False,
                            **({"cluster": s.cluster} if getattr(s, "cluster", None) else {}))
        self.hyper = [r.hyperparams for r in results]
        out = []
        for r in results:
            o = r.outcomes[0]
            out.append(_Monitored(status=r.status, iters=tuple(o.iters), iterations_run=o.iterations_run, label=spec.label))
        return out

    def replay(self, index: int, k: int, inner: int, clock: str = "cpu") -> float:
        """Seconds of ``inner`` uninstrumented replays of ``k`` steps (see ``CLOCKS``)."""
        from benchsuite.runner import replay_seconds

        case, hyper, seed = self.cases[index], self.hyper[index], self.cases[index].seeds[0]
        return sum(replay_seconds(case, hyper, seed, k, clock=clock) for _ in range(inner))


class _LocalSide:
    def __init__(self) -> None:
        self.engine = _Engine()

    def setup(self, s: _Setup) -> list[_Monitored]:
        return self.engine.setup(s)

    def replay(self, index: int, k: int, inner: int, clock: str = "cpu") -> float:
        return self.engine.replay(index, k, inner, clock)

    def close(self) -> None:
        pass


class _WorkerSide:
    """A side served by its own Python process with ``front`` first on sys.path."""

    def __init__(self, front: Path, cwd: Path) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "benchsuite.compare", "--worker", str(front)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            cwd=cwd,
        )

    def _call(self, *request: Any) -> Any:
        assert self.proc.stdin is not None and self.proc.stdout is not None
        try:
            pickle.dump(request, self.proc.stdin)
            self.proc.stdin.flush()
            kind, value = pickle.load(self.proc.stdout)
        except (EOFError, BrokenPipeError):
            raise RuntimeError(f"compare worker exited with code {self.proc.wait()}") from None
        if kind == "user":
            raise UserError(value)
        if kind == "error":
            raise RuntimeError(f"compare worker failed:\n{value}")
        return value

    def setup(self, s: _Setup) -> list[_Monitored]:
        return self._call("setup", s)

    def replay(self, index: int, k: int, inner: int, clock: str = "cpu") -> float:
        return self._call("replay", index, k, inner, clock)

    def close(self) -> None:
        if self.proc.poll() is None:
            try:
                self._call("quit")
            except (RuntimeError, OSError):
                pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


def _worker_main(front: str) -> int:
    """Serve setup/replay requests on stdin/stdout (pickled tuples)."""
    channel: BinaryIO = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # anything the user's code prints goes to stderr, not the channel
    sys.stdout = sys.stderr
    cwd = os.getcwd()
    sys.path[:] = [front, cwd] + [p for p in sys.path if p not in ("", cwd, front)]
    engine = _Engine()
    inp = sys.stdin.buffer
    while True:
        try:
            request = pickle.load(inp)
        except EOFError:
            return 0
        op, *args = request
        try:
            if op == "quit":
                reply: tuple[str, Any] = ("ok", None)
            elif op == "setup":
                reply = ("ok", engine.setup(*args))
            elif op == "replay":
                reply = ("ok", engine.replay(*args))
            else:
                reply = ("error", f"unknown request {op!r}")
        except UserError as exc:
            reply = ("user", str(exc))
        except Exception:  # reported to the parent with its traceback
            reply = ("error", traceback.format_exc())
        pickle.dump(reply, channel)
        channel.flush()
        if op == "quit":
            return 0


# ------------------------------------------------------------ git worktrees
def _git(cwd: Path, *args: str) -> str:
    try:
        p = subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, check=False)
    except FileNotFoundError:
        raise UserError("--rev-a/--rev-b: git is not installed") from None
    if p.returncode != 0:
        raise UserError(f"git {' '.join(args)}: {p.stderr.strip().splitlines()[-1] if p.stderr.strip() else 'failed'}")
    return p.stdout.strip()


@contextmanager
def worktree(rev: str, cwd: Path) -> Iterator[Path]:
    """A temporary detached checkout of ``rev``; yields the folder matching ``cwd`` in it.

    The worktree is removed (and git's record of it pruned) on exit, also
    when the body raised.
    """
    top = Path(_git(cwd, "rev-parse", "--show-toplevel"))
    commit = _git(top, "rev-parse", "--verify", "--quiet", f"{rev}^{{commit}}")
    tmp = Path(tempfile.mkdtemp(prefix="benchsuite-rev-"))
    path = tmp / "tree"
    _git(top, "worktree", "add", "--detach", "--quiet", str(path), commit)
    try:
        yield path / Path(cwd).resolve().relative_to(top.resolve())
    finally:
        subprocess.run(["git", "worktree", "remove", "--force", str(path)], cwd=top, capture_output=True, check=False)
        subprocess.run(["git", "worktree", "prune"], cwd=top, capture_output=True, check=False)
        shutil.rmtree(tmp, ignore_errors=True)


# ------------------------------------------------------------ the comparison
def _timed_steps(a: _Monitored, b: _Monitored, targets: Sequence[float]) -> tuple[float | None, int, int]:
    """(target, k_A, k_B): the tightest target both reached, else equal step counts."""
    for i in range(len(targets) - 1, -1, -1):
        ka, kb = a.iters[i], b.iters[i]
        if ka is not None and kb is not None and ka > 0 and kb > 0:
            return targets[i], ka, kb
    k = max(1, min(a.iterations_run, b.iterations_run))
    return None, k, k


def _note(target: float | None, ka: int, kb: int) -> str:
    if target is None:
        return f"no target reached by both: timed {ka} steps each (per-step comparison)"
    if kb < ka:
        return (
            f"B takes fewer iterations ({kb} vs {ka}): the speed-up comes from changed behaviour, not faster steps"
        )
    if kb > ka:
        return f"B takes more iterations ({kb} vs {ka}): the difference comes from changed behaviour, not slower steps"
    return f"same iterations ({ka}): the difference is the time per step"


def _calibrate(side: Any, index: int, k: int, clock: str) -> int:
    """Replays per sample so one sample lasts at least MIN_SAMPLE_SECONDS."""
    t = max(side.replay(index, k, 1, clock), 1e-7)
    return max(1, math.ceil(MIN_SAMPLE_SECONDS / t))


def _pairs(
    a_side: Any, b_side: Any, i: int, ka: int, kb: int, repeats: int, clock: str
) -> tuple[list[float], list[float]]:
    """``repeats`` interleaved replay pairs of case ``i`` after the warm-up pairs (seconds per replay)."""
    inner_a, inner_b = _calibrate(a_side, i, ka, clock), _calibrate(b_side, i, kb, clock)
    for _ in range(WARMUP_PAIRS):  # untimed: the first samples after a switch run slow
        a_side.replay(i, ka, inner_a, clock)
        b_side.replay(i, kb, inner_b, clock)
    ta: list[float] = []
    tb: list[float] = []
    for r in range(repeats):
        if r % 2 == 0:
            ta.append(a_side.replay(i, ka, inner_a, clock) / inner_a)
            tb.append(b_side.replay(i, kb, inner_b, clock) / inner_b)
        else:
            tb.append(b_side.replay(i, kb, inner_b, clock) / inner_b)
            ta.append(a_side.replay(i, ka, inner_a, clock) / inner_a)
    return ta, tb


def _shares(total: int, parts: int) -> list[int]:
    """``total`` split into ``parts`` near-equal positive shares."""
    return [total // parts + (1 if j < total % parts else 0) for j in range(parts)]


def compare(
    a: Side,
    b: Side,
    *,
    problems: str | None = None,
    tier: str | None = "small",
    oracle: str = "full",
    batch: int | None = None,
    seed: int = 0,
    repeats: int = 31,
    jobs: int | None = None,
    catalogue_paths: Sequence[str | Path] = (),
    cwd: str | Path | None = None,
    clock: str = "cpu",
    rounds: int | None = None,
    cluster: str | None = None,
) -> Comparison:
    """Measure B against A on the selected problems (see the module docstring).

    ``rounds`` (git revisions only; default ``ROUNDS``): the replay pairs of
    each case are spread over this many successive pairs of fresh worker
    processes, so that a per-process effect is averaged instead of taken
    from one pair of processes.
    """
    from benchsuite.catalogue import load_catalogue, select

    if clock not in CLOCKS:
        raise UserError(f"--clock: {clock!r} is not one of {', '.join(CLOCKS)}")
    if repeats < 2:
        raise UserError(f"--repeats: need at least 2 replay pairs, got {repeats}")
    workers = a.rev is not None or b.rev is not None
    rounds = (ROUNDS if workers else 1) if rounds is None else rounds
    if rounds < 1 or (workers and repeats < 2 * rounds):
        raise UserError(f"--rounds: need 1 <= rounds <= repeats/2, got {rounds} for {repeats} pairs")
    instances = tuple(select(load_catalogue(list(catalogue_paths) or None), problems, tier, validate=True))
    if not instances:
        raise UserError("--problems: no instance selected")
    here = Path(cwd or os.getcwd())

    def setup(side: Side) -> _Setup:
        params = tuple(sorted(side.params.items())) if isinstance(side.params, Mapping) else tuple(side.params)
        return _Setup(instances, side.rule, params, oracle, batch, (seed,), jobs, cluster)

    times: list[tuple[list[float], list[float]]] = [([], []) for _ in instances]
    plan: list[tuple[Any, ...]] = []
    with ExitStack() as trees:
        fronts = [trees.enter_context(worktree(s.rev, here)) if s.rev else here for s in (a, b)] if workers else []
        for round_no, share in enumerate(_shares(repeats, rounds)):
            with ExitStack() as procs:
                sides: list[Any] = []
                for front in fronts or [None, None]:
                    side = _LocalSide() if front is None else _WorkerSide(front, here)
                    procs.callback(side.close)
                    sides.append(side)
                mon_a, mon_b = sides[0].setup(setup(a)), sides[1].setup(setup(b))
                new_plan = [_plan(inst, ma, mb) for inst, ma, mb in zip(instances, mon_a, mon_b)]
                if round_no and [p[1:3] for p in new_plan] != [p[1:3] for p in plan]:
                    raise UserError("the monitored passes differ between rounds of fresh processes: "
                                    "the rules are not deterministic, so their timings cannot be paired")
                plan = new_plan
                for i, (target, ka, kb, _) in enumerate(plan):
                    if target is not _SKIP:
                        ta, tb = _pairs(sides[0], sides[1], i, ka, kb, share, clock)
                        times[i][0].extend(ta)
                        times[i][1].extend(tb)
    cases = []
    for i, (inst, (target, ka, kb, note)) in enumerate(zip(instances, plan)):
        ma, mb = mon_a[i], mon_b[i]
        if target is _SKIP:
            cases.append(CaseComparison(inst.name, ma.status, mb.status, None, None, None, (), (), None, None, note))
            continue
        ta, tb = times[i]
        ratio, ci = ratio_interval(ta, tb, seed=i)
        cases.append(CaseComparison(inst.name, ma.status, mb.status, target, ka, kb, tuple(ta), tuple(tb), ratio, ci,
                                    note))
    timed = [(c.times_a, c.times_b) for c in cases if c.ratio is not None]
    ratio, ci = overall_interval(timed) if timed else (None, None)
    method = Comparison.__dataclass_fields__["method"].default + f"; clock: {CLOCKS[clock]}"
    if workers:
        method += f"; {rounds} rounds of fresh worker processes"
    return Comparison(a.label, b.label, tuple(cases), ratio, ci, repeats, method=method)


_SKIP = object()


def _plan(inst: Any, ma: _Monitored, mb: _Monitored) -> tuple[Any, int, int, str]:
    """(target, k_A, k_B, note) of one case; target ``_SKIP`` when it cannot be timed."""
    if ma.status in _UNTIMED or mb.status in _UNTIMED:
        return _SKIP, 0, 0, "not timed: a side diverged, raised or timed out"
    target, ka, kb = _timed_steps(ma, mb, inst.targets)
    return target, ka, kb, _note(target, ka, kb)


_UNTIMED = ("diverged", "error", "timeout")


def _run_table(out: str | Path, run_id: str) -> Any:
    import pandas as pd

    path = Path(out) / "runs" / run_id / "table.csv"
    if not path.is_file():
        raise UserError(f"--runs: no saved run {run_id!r} ({path} not found)")
    frame = pd.read_csv(path)
    missing = {"instance", "rule", "seed", "target_index", "target", "iterations", "time_to_target"} - set(frame.columns)
    if missing:
        raise UserError(f"{path}: columns missing: {', '.join(sorted(missing))}")
    rules = sorted(frame["rule"].astype(str).unique())
    if len(rules) != 1:
        raise UserError(f"{path}: run {run_id!r} holds {len(rules)} rules ({', '.join(rules)}); compare runs of one rule")
    return frame[frame["seed"] == frame["seed"].min()], rules[0]


def compare_runs(run_a: str, run_b: str, *, out: str | Path = "results") -> Comparison:
    """Compare two saved runs' tables (no new measurement).

    Per instance both runs have, the tightest target both reached is compared
    (first seed): iterations and the median replay time recorded in each run.
    Saved runs keep only the median time, and were measured at different
    times, so there is no confidence interval and no drift cancellation: the
    ratios are descriptive.
    """
    fa, label_a = _run_table(out, run_a)
    fb, label_b = _run_table(out, run_b)
    cases = []
    for inst in [i for i in dict.fromkeys(fa["instance"]) if i in set(fb["instance"])]:
        ra = fa[fa["instance"] == inst].set_index("target_index")
        rb = fb[fb["instance"] == inst].set_index("target_index")
        both = [j for j in sorted(set(ra.index) & set(rb.index), reverse=True)
                if ra.at[j, "iterations"] == ra.at[j, "iterations"] and rb.at[j, "iterations"] == rb.at[j, "iterations"]
                and ra.at[j, "time_to_target"] > 0 and rb.at[j, "time_to_target"] > 0]
        status_a = str(ra["status"].iloc[0]) if "status" in ra else ""
        status_b = str(rb["status"].iloc[0]) if "status" in rb else ""
        if not both:
            cases.append(CaseComparison(inst, status_a, status_b, None, None, None, (), (), None, None,
                                        "no target reached and timed in both runs"))
            continue
        j = both[0]
        ka, kb = int(ra.at[j, "iterations"]), int(rb.at[j, "iterations"])
        ta, tb = float(ra.at[j, "time_to_target"]), float(rb.at[j, "time_to_target"])
        note = _note(float(ra.at[j, "target"]), ka, kb) + "; saved runs: median times, no interval"
        cases.append(CaseComparison(inst, status_a, status_b, float(ra.at[j, "target"]), ka, kb, (ta,), (tb,),
                                    tb / ta, None, note))
    if not cases:
        raise UserError(f"--runs: runs {run_a!r} and {run_b!r} share no instance")
    ratios = [c.ratio for c in cases if c.ratio is not None]
    ratio = math.exp(float(np.mean(np.log(ratios)))) if ratios else None
    return Comparison(f"{label_a} (run {run_a})", f"{label_b} (run {run_b})", tuple(cases), ratio, None, 1,
                      method="saved runs: ratio of the recorded median times to target; no interval")


if __name__ == "__main__":  # worker process for git-revision comparisons
    if len(sys.argv) == 3 and sys.argv[1] == "--worker":
        # run the importable module's copy, so that what it pickles names
        # benchsuite.compare classes, not __main__ ones
        from benchsuite.compare import _worker_main as _serve

        sys.exit(_serve(sys.argv[2]))
    print("usage: python -m benchsuite.compare --worker PATH", file=sys.stderr)
    sys.exit(2)
