"""Time per step and time to target of rule B against rule A (or one rule at two git revisions).

Both sides are measured in one run:

1. **Monitored pass** on each side (the runner's ``run_cases`` without
   timing) gives the iterations to each target. A side that misses a target
   the other side reaches has *lost* it; where the runner records held
   crossings, "reaches" means "holds to the end of the pass", so a target met
   only in a transient dip counts as missed. A case with a lost target gets
   no time figure at all, only the list of lost targets (a faster step that
   no longer converges is not a speed-up), and a speed limit (below) fails.
2. **Timed replays, interleaved.** Per case, the target timed is the tightest
   target both sides reached (when neither reached any, both replay the same
   number of steps and only the time per step applies). Each side replays its
   own k steps (uninstrumented, like the runner's timing replay) in pairs, the
   order alternating A B, B A, A B, ... so that a linear drift of the
   machine's speed cancels within every two pairs, after ``WARMUP_PAIRS``
   discarded pairs (the first samples of a case run measurably slow: caches,
   allocator, frequency). Replays shorter than ``MIN_SAMPLE_SECONDS`` are
   repeated inside one sample so the clock's resolution and call overhead stay
   negligible. Time is the replaying process's **CPU time** by default
   (``clock="cpu"``, ``time.process_time``): for single-threaded code (BLAS is
   pinned to one thread) it equals the wall time on an idle machine, and it is
   not inflated when other processes compete for the cores, which on a shared
   2-core machine cuts the spread of the paired log-ratios about threefold.
   ``clock="wall"`` uses wall time instead.
3. **Two figures, never mixed.** Pair i gives ``d_i = log(t_B,i / t_A,i)``
   for the time to target (k_A and k_B steps). The *time per step* log-ratio
   is ``d_i - log(k_B / k_A)``. Both are reported per case and pooled
   separately: time per step over every timed case, time to target over the
   cases where both sides reached a target. A figure is the **signed change**
   of B against A, ``ratio - 1`` (``+5 %``: B takes 5 % longer), with its 95 %
   interval, and whether that interval **excludes no change** (``higher`` /
   ``lower``) or contains it (``unclear``).
4. **The interval.** Per case: the 10 % trimmed mean T of the d_i (robust
   to the odd replay that a busy machine slows down) with the
   Tukey–McLaughlin standard error ``s_w / ((1 - 2g/n) sqrt(n))`` (``s_w``:
   standard deviation of the winsorised sample, g values cut from each end)
   and a Student t quantile with ``n - 2g - 1`` degrees of freedom.
   Pooled over cases: the mean of the cases' T (the log of the **geometric
   mean** of their ratios) with standard error ``sqrt(sum se_j^2) / J`` and
   Welch–Satterthwaite degrees of freedom; with one case it is that case's
   interval exactly.

   *Coverage, measured by simulation* (``tests/test_compare.py``, synthetic
   log-ratios, 2000 data sets per point, 95 % nominal): at every pair count
   from 2 to 31 this interval covered the true trimmed mean in 94–98 % of data
   sets for normal, Student-t(3), spiky (5 % of replays slowed 3x, or 20 %
   slowed 1.5x, on either side) and autocorrelated-load noise, and in 91–95 %
   when one side alone has strongly right-skewed (exponential) delays. The
   paired BCa bootstrap used before covered 48 % at 2 pairs, 74 % at 3 and 86 %
   at 5, reaching 93–94 % only at about 31 (also reproduced in the tests). So
   this interval's coverage holds from ``MIN_PAIRS = 2``, the fewest pairs
   that have a spread; fewer are refused. Few pairs give an honest but wide
   interval: the t quantile is 12.7 at 2 pairs, 2.8 at 5, 2.0 at 31.

5. **A speed limit** (``fail_above``; ``compare --fail-above 5%``): the
   pooled time-per-step interval against ``1 + limit``. Entirely above:
   ``fail`` (exit 1). Entirely below: ``pass`` (exit 0). Containing it:
   ``undecided`` (exit 3). A side B that lost targets A reaches fails. With
   a true change exactly at the limit, a two-sided 95 % interval lies wholly
   on one side in at most 2.5 % of runs each; the farther the true change is
   from the limit (in standard errors), the likelier a decided verdict.

With ``rev_a`` / ``rev_b`` each side runs in its own Python process whose
``sys.path`` starts with a temporary ``git worktree`` of that revision, so each
imports its own version of the user's module; the parent sends the replay
requests to the two processes in turn over pipes and removes the worktrees
afterwards, also on error and on Ctrl-C / SIGTERM (the worker processes run
in their own session, ignore SIGINT and are stopped by the parent, so they
print no traceback).
Two processes are never quite identical (memory layout, allocator state):
measured on a busy 2-core machine, six A/A comparisons of one revision against
itself in one pair of processes gave ratios from 0.92 to 1.02, two of them with
intervals excluding 1. So the pairs are spread over ``PROCESS_PAIRS`` (5)
successive pairs of fresh processes and, with two or more, the process pair is
the unit of the interval: per case, the mean over process pairs of their
trimmed means, with a t interval on ``P - 1`` degrees of freedom. Treating
the pairs as independent instead covers well under 95 % when such a
per-process effect exists (measured in the tests).
"""

from __future__ import annotations

import math
import os
import pickle
import shutil
import signal
import subprocess
import sys
import tempfile
import traceback
from collections.abc import Mapping, Sequence
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Iterator

import numpy as np

from benchsuite.errors import UserError

__all__ = [
    "Side",
    "Change",
    "CaseComparison",
    "Comparison",
    "SpeedVerdict",
    "MIN_PAIRS",
    "MIN_SAMPLE_SECONDS",
    "PROCESS_PAIRS",
    "TRIM",
    "EXIT_CODES",
    "trimmed_t",
    "case_change",
    "pooled_change",
    "speed_verdict",
    "compare",
    "compare_runs",
]

#: a replay sample shorter than this is repeated within the sample
MIN_SAMPLE_SECONDS = 0.02
#: git-revision comparisons: successive pairs of fresh worker processes (default)
PROCESS_PAIRS = 5
#: replay pairs run and discarded before the timed pairs of each case
WARMUP_PAIRS = 2
#: proportion cut from each end for the trimmed mean of log-ratios
TRIM = 0.1
CONFIDENCE = 0.95
#: fewest replay pairs per case: the t interval's coverage holds from here (module docstring, point 4)
MIN_PAIRS = 2
#: exit codes of the speed limit's verdicts (``compare --fail-above``)
EXIT_CODES = {"pass": 0, "fail": 1, "undecided": 3}
#: how a replay is timed
CLOCKS = {
    "cpu": "process CPU time (time.process_time)",
    "wall": "wall time (time.perf_counter)",
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


# ---------------------------------------------------------------- statistics
def _t_quantile(df: float) -> float:
    from scipy.stats import t

    return float(t.ppf(0.5 + CONFIDENCE / 2, df))


def _pct(ratio: float) -> str:
    return f"{100.0 * (ratio - 1.0):+.1f} %"


@dataclass(frozen=True)
class Change:
    """B against A as a log time ratio with its standard error: a signed change with a 95 % interval.

    ``se`` None: no interval (saved runs). ``se`` 0: every pair gave the same
    ratio, the interval is that point. ``df``: degrees of freedom of the t
    quantile. ``cases``: how many cases were pooled.
    """

    log_ratio: float
    se: float | None = None
    df: float | None = None
    cases: int = 1

    @property
    def ratio(self) -> float:
        """Time B / time A."""
        return math.exp(self.log_ratio)

    @property
    def change(self) -> float:
        """Signed relative change of B's time against A's: ``ratio - 1``."""
        return self.ratio - 1.0

    @property
    def interval(self) -> tuple[float, float] | None:
        """95 % interval of the ratio B / A (None: no interval)."""
        if self.se is None:
            return None
        if self.se == 0.0:
            return (self.ratio, self.ratio)
        half = _t_quantile(self.df if self.df is not None else math.inf) * self.se
        return (math.exp(self.log_ratio - half), math.exp(self.log_ratio + half))

    @property
    def excludes_no_change(self) -> bool | None:
        """Whether the interval leaves out ratio 1 (None: no interval, unknown)."""
        iv = self.interval
        return None if iv is None else not (iv[0] <= 1.0 <= iv[1])

    @property
    def direction(self) -> str:
        """``higher`` / ``lower`` (the interval lies above / below no change), ``unclear``, or ``unknown``."""
        iv = self.interval
        if iv is None:
            return "unknown"
        return "higher" if iv[0] > 1.0 else "lower" if iv[1] < 1.0 else "unclear"

    def shifted(self, log_offset: float) -> Change:
        """The same interval with ``log_offset`` subtracted (time to target -> time per step)."""
        return Change(self.log_ratio - log_offset, self.se, self.df, self.cases)

    def text(self) -> str:
        """e.g. ``+4.8 % (95 % interval +1.2 % to +8.5 %)``."""
        iv = self.interval
        if iv is None:
            return f"{_pct(self.ratio)} (no interval)"
        return f"{_pct(self.ratio)} (95 % interval {_pct(iv[0])} to {_pct(iv[1])})"

    def cell(self) -> str:
        """Compact table cell, e.g. ``+4.8 % [+1.2, +8.5] higher``."""
        iv = self.interval
        if iv is None:
            return f"{_pct(self.ratio)} (no interval)"
        return (f"{_pct(self.ratio)} [{100 * (iv[0] - 1):+.1f}, {100 * (iv[1] - 1):+.1f}] "
                f"{self.direction}")


def trimmed_t(d: Any, trim: float = TRIM) -> tuple[np.ndarray, np.ndarray, int]:
    """Trimmed mean, its Tukey–McLaughlin standard error, and the t degrees of freedom.

    Along the last axis of ``d`` (so simulations can pass many samples at
    once): g = floor(trim n) values are cut from each end; the standard error
    is ``s_w / ((1 - 2g/n) sqrt(n))`` with ``s_w`` the standard deviation
    (ddof 1) of the winsorised sample; degrees of freedom ``n - 2g - 1``.
    """
    x = np.sort(np.asarray(d, dtype=float), axis=-1)
    n = x.shape[-1]
    if n < 2:
        raise ValueError("need at least two replay pairs")
    g = int(math.floor(trim * n))
    h = n - 2 * g
    est = x[..., g:n - g].mean(axis=-1)
    w = np.clip(x, x[..., g:g + 1], x[..., n - g - 1:n - g])
    se = w.std(axis=-1, ddof=1) * math.sqrt(n) / h  # = s_w / ((1 - 2g/n) sqrt(n))
    return est, se, h - 1


def case_change(times_a: Sequence[float], times_b: Sequence[float], groups: Sequence[int] | None = None) -> Change:
    """Time ratio B / A of one case from paired replay times (seconds), with its interval.

    ``groups`` (one id per pair): the process pair each pair came from. With
    two or more groups the group is the unit: the estimate is the mean of the
    groups' trimmed means and the interval a t interval over them (P - 1
    degrees of freedom), which carries a per-process effect into the interval.
    """
    d = np.log(np.asarray(times_b, float)) - np.log(np.asarray(times_a, float))
    if d.size < MIN_PAIRS:
        raise ValueError(f"need at least {MIN_PAIRS} replay pairs")
    if not np.all(np.isfinite(d)):
        raise ValueError("replay times must be positive and finite")
    ids = sorted(set(groups)) if groups is not None else [0]
    if len(ids) < 2:
        est, se, df = trimmed_t(d)
        return Change(float(est), float(se), float(df))
    g = np.asarray(groups)
    means = np.array([float(trimmed_t(d[g == i])[0]) if np.sum(g == i) >= 2 else float(d[g == i][0]) for i in ids])
    return Change(float(means.mean()), float(means.std(ddof=1) / math.sqrt(means.size)), float(means.size - 1))


def pooled_change(changes: Sequence[Change]) -> Change | None:
    """Geometric mean over cases: mean log ratio, se ``sqrt(sum se_j^2) / J``, Welch–Satterthwaite df.

    None for no case; no interval when any case has none.
    """
    if not changes:
        return None
    j = len(changes)
    est = float(np.mean([c.log_ratio for c in changes]))
    if any(c.se is None for c in changes):
        return Change(est, None, None, j)
    var = [c.se ** 2 for c in changes]  # type: ignore[operator]
    se = math.sqrt(sum(var)) / j
    denom = sum(v * v / c.df for v, c in zip(var, changes) if v > 0 and c.df)  # type: ignore[operator]
    df = sum(var) ** 2 / denom if denom > 0 else math.inf
    return Change(est, se, df, j)


# ---------------------------------------------------------------- results
@dataclass(frozen=True)
class CaseComparison:
    """One case: iterations on both sides, lost targets, and the two time figures.

    ``per_step``: time per step, B / A. ``to_target``: time to ``target``,
    B / A (None when no target was reached by both). Both None when the case
    was not timed (see ``note``). ``lost_a`` / ``lost_b``: targets that side
    missed although the other side reached them.
    """

    instance: str
    status_a: str
    status_b: str
    target: float | None  # the target timed; None: same number of steps, per-step comparison only
    iters_a: int | None
    iters_b: int | None
    times_a: tuple[float, ...]  # seconds per replay, in pair order
    times_b: tuple[float, ...]
    per_step: Change | None
    to_target: Change | None
    note: str
    lost_a: tuple[float, ...] = ()
    lost_b: tuple[float, ...] = ()
    groups: tuple[int, ...] = ()  # process pair of each replay pair (git revisions)

    @property
    def iter_ratio(self) -> float | None:
        if not self.iters_a or self.iters_b is None:
            return None
        return self.iters_b / self.iters_a


def _targets_text(ts: Sequence[float]) -> str:
    return ", ".join(f"{t:.0e}" for t in ts)


@dataclass(frozen=True)
class SpeedVerdict:
    """The speed limit's verdict: ``pass`` / ``fail`` / ``undecided`` with the reason."""

    limit: float  # fail when B's time per step is more than this fraction above A's
    outcome: str
    reason: str

    @property
    def exit_code(self) -> int:
        return EXIT_CODES[self.outcome]

    def text(self) -> str:
        return f"speed limit (fail above {100 * self.limit:+.1f} % time per step): {self.outcome.upper()}: {self.reason}"


@dataclass(frozen=True)
class Comparison:
    """A whole comparison: per-case figures and the two pooled changes, kept apart."""

    label_a: str
    label_b: str
    cases: tuple[CaseComparison, ...]
    per_step: Change | None  # geometric mean over every timed case
    to_target: Change | None  # geometric mean over the cases timed to a target
    pairs: int
    method: str = (
        "paired replays A B / B A alternating; per case 10 % trimmed mean of log(tB/tA) with a "
        "Tukey-McLaughlin t interval (95 %); pooled: geometric mean over cases, Welch-Satterthwaite t interval; "
        "time per step and time to target pooled separately"
    )
    process_pairs: int = 1
    limit: float | None = None  # speed limit (fail_above), None: none set

    @property
    def lost(self) -> dict[str, list[tuple[str, tuple[float, ...]]]]:
        """Per side ("A", "B"): the cases where it lost targets the other side reached."""
        return {
            "A": [(c.instance, c.lost_a) for c in self.cases if c.lost_a],
            "B": [(c.instance, c.lost_b) for c in self.cases if c.lost_b],
        }

    @property
    def verdict(self) -> SpeedVerdict | None:
        return None if self.limit is None else speed_verdict(self, self.limit)

    def summary_lines(self) -> list[str]:
        lines = []
        for side, other in (("B", "A"), ("A", "B")):
            lost = self.lost[side]
            if lost:
                where = "; ".join(f"{name} ({_targets_text(ts)})" for name, ts in lost)
                lines.append(f"{side} loses targets {other} reaches on {len(lost)} case(s): {where}; "
                             "no time figure is given for those cases")
        others = " other" if any(self.lost.values()) else ""
        if self.per_step is None:
            lines.append("no case could be timed on both sides")
        else:
            lines.append(self._line("time per step", self.per_step, f"over {self.per_step.cases}{others} case(s)"))
        if self.to_target is not None:
            lines.append(self._line("time to target", self.to_target,
                                    f"over {self.to_target.cases}{others} case(s) timed to a target"))
        if self.verdict is not None:
            lines.append(self.verdict.text())
        return lines

    @staticmethod
    def _line(what: str, c: Change, over: str) -> str:
        ex = c.excludes_no_change
        judged = ("whether it excludes no change is unknown (no interval)" if ex is None
                  else "the interval excludes no change" if ex else "the interval includes no change")
        return f"{what}, B against A: {c.text()}; {judged}; geometric mean {over}"

    def summary(self) -> str:
        return "\n".join(self.summary_lines())

    @property
    def headline(self) -> str:
        """The first summary line (lost targets first, else the time-per-step change)."""
        return self.summary_lines()[0]


def speed_verdict(result: Comparison, limit: float) -> SpeedVerdict:
    """Judge the pooled time-per-step change against ``1 + limit`` (module docstring, point 5)."""
    bound = 1.0 + limit
    lost = result.lost["B"]
    if lost:
        return SpeedVerdict(limit, "fail", f"B loses targets A reaches on {len(lost)} case(s)")
    c = result.per_step
    if c is None:
        return SpeedVerdict(limit, "undecided", "no case could be timed on both sides")
    iv = c.interval
    if iv is None:
        return SpeedVerdict(limit, "undecided", "no interval")
    span = f"interval {_pct(iv[0])} to {_pct(iv[1])}"
    if iv[0] > bound:
        return SpeedVerdict(limit, "fail", f"the {span} lies above the limit")
    if iv[1] < bound:
        return SpeedVerdict(limit, "pass", f"the {span} lies below the limit")
    return SpeedVerdict(limit, "undecided", f"the {span} contains the limit; more pairs narrow it")


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
    dtype: str | None = None  # float32 / float64 for every problem (None: as catalogued)


@dataclass(frozen=True)
class _Monitored:
    """A side's monitored pass of one case, reduced to what the comparison uses."""

    status: str
    iters: tuple[int | None, ...]  # first seed: first crossing of each target
    iterations_run: int
    label: str
    held: tuple[int | None, ...] = ()  # from which iteration each target stayed met (empty: not recorded)

    def reached(self) -> tuple[bool, ...]:
        """Per target: met and held to the end of the pass (first crossing where holding is not recorded)."""
        if self.held:
            return tuple(h is not None for h in self.held)
        return tuple(k is not None for k in self.iters)


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
        self.cases = [Case(instance=i, rule=spec, oracle=s.oracle, batch=s.batch, seeds=s.seeds,
                           **({"dtype": s.dtype} if getattr(s, "dtype", None) else {})) for i in s.instances]
        results = run_cases(self.cases, jobs=s.jobs, timing=False, progress=False,
                            **({"cluster": s.cluster} if getattr(s, "cluster", None) else {}))
        self.hyper = [r.hyperparams for r in results]
        out = []
        for r in results:
            o = r.outcomes[0]
            out.append(_Monitored(status=r.status, iters=tuple(o.iters), iterations_run=o.iterations_run,
                                  label=spec.label, held=tuple(getattr(o, "held", ()) or ())))
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

    def close(self, abort: bool = False) -> None:
        pass


_STOP_CODES = (-signal.SIGINT, -signal.SIGTERM, 128 + signal.SIGTERM)


class _WorkerSide:
    """A side served by its own Python process with ``front`` first on sys.path.

    The process runs in its own session and ignores SIGINT: a Ctrl-C reaches
    only the parent, which stops the worker (SIGTERM, on which the worker
    unwinds quietly), so no traceback comes from it.
    """

    def __init__(self, front: Path, cwd: Path) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "benchsuite.compare", "--worker", str(front)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            cwd=cwd,
            # its own session: a Ctrl-C or a CI's SIGTERM to our process group does not reach it
            # (the parent alone handles them and stops it; no traceback from here). setsid runs in C,
            # unlike a preexec_fn, so it is safe with BLAS threads running.
            start_new_session=True,
        )

    def _call(self, *request: Any) -> Any:
        assert self.proc.stdin is not None and self.proc.stdout is not None
        try:
            pickle.dump(request, self.proc.stdin)
            self.proc.stdin.flush()
            kind, value = pickle.load(self.proc.stdout)
        except (EOFError, BrokenPipeError):
            code = self.proc.wait()
            if code in _STOP_CODES:  # stopped by the same Ctrl-C / SIGTERM that is reaching us
                raise KeyboardInterrupt from None
            raise RuntimeError(f"compare worker exited with code {code}") from None
        if kind == "user":
            raise UserError(value)
        if kind == "error":
            raise RuntimeError(f"compare worker failed:\n{value}")
        return value

    def setup(self, s: _Setup) -> list[_Monitored]:
        return self._call("setup", s)

    def replay(self, index: int, k: int, inner: int, clock: str = "cpu") -> float:
        return self._call("replay", index, k, inner, clock)

    def close(self, abort: bool = False) -> None:
        """Stop the worker: a polite ``quit`` normally; SIGTERM at once when ``abort`` (error, interrupt)."""
        if self.proc.poll() is None:
            if abort:
                self.proc.terminate()
            else:
                try:
                    self._call("quit")
                except (RuntimeError, OSError, KeyboardInterrupt):
                    self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        for f in (self.proc.stdin, self.proc.stdout):
            if f is not None:
                try:
                    f.close()
                except OSError:
                    pass


def _worker_main(front: str) -> int:
    """Serve setup/replay requests on stdin/stdout (pickled tuples)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops us
    # stopped (SIGTERM from the parent or a CI cancel): unwind, so the runner stops its own workers
    signal.signal(signal.SIGTERM, lambda signum, frame: sys.exit(128 + signal.SIGTERM))
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
        try:
            pickle.dump(reply, channel)
            channel.flush()
        except BrokenPipeError:  # the parent is gone
            return 0
        if op == "quit":
            return 0


# ------------------------------------------------------------ git worktrees
def _git(cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    try:
        return subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, check=False)
    except FileNotFoundError:
        raise UserError("--rev-a/--rev-b: git is not installed") from None


@contextmanager
def worktree(rev: str, cwd: Path, option: str = "--rev") -> Iterator[Path]:
    """A temporary detached checkout of ``rev``; yields the folder matching ``cwd`` in it.

    A revision that is not a commit of the repository holding ``cwd`` (or a
    ``cwd`` outside any repository) is a UserError naming ``option`` and the
    revision. The worktree is removed (and git's record of it pruned) on
    exit, also when the body raised or was interrupted.
    """
    top_run = _git(cwd, "rev-parse", "--show-toplevel")
    if top_run.returncode != 0:
        raise UserError(f"{option}: {cwd} is not inside a git repository")
    top = Path(top_run.stdout.strip())
    found = _git(top, "rev-parse", "--verify", "--quiet", f"{rev}^{{commit}}")
    if found.returncode != 0 or not found.stdout.strip():
        raise UserError(f"{option}: {rev!r} is not a commit of the git repository {top}")
    commit = found.stdout.strip()
    tmp = Path(tempfile.mkdtemp(prefix="benchsuite-rev-"))
    path = tmp / "tree"
    try:
        added = _git(top, "worktree", "add", "--detach", "--quiet", str(path), commit)
        if added.returncode != 0:
            last = added.stderr.strip().splitlines()[-1] if added.stderr.strip() else "failed"
            raise UserError(f"{option}: cannot check out {rev!r} into a temporary worktree: {last}")
        yield path / Path(cwd).resolve().relative_to(top.resolve())
    finally:
        subprocess.run(["git", "worktree", "remove", "--force", str(path)], cwd=top, capture_output=True, check=False)
        subprocess.run(["git", "worktree", "prune"], cwd=top, capture_output=True, check=False)
        shutil.rmtree(tmp, ignore_errors=True)


# ------------------------------------------------------------ the comparison
def _lost(a: _Monitored, b: _Monitored, targets: Sequence[float]) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """(targets A lost, targets B lost): reached (and held) by one side and not by the other.

    A target met only transiently (crossed, then left before the end of the
    pass) counts as not reached when the other side holds it.
    """
    ra, rb = a.reached(), b.reached()
    lost_a = tuple(t for t, x, y in zip(targets, ra, rb) if not x and y)
    lost_b = tuple(t for t, x, y in zip(targets, ra, rb) if x and not y)
    return lost_a, lost_b


def _timed_steps(a: _Monitored, b: _Monitored, targets: Sequence[float]) -> tuple[float | None, int, int]:
    """(target, k_A, k_B): the tightest target both reached, else equal step counts."""
    ra, rb = a.reached(), b.reached()
    for i in range(len(targets) - 1, -1, -1):
        ka, kb = a.iters[i], b.iters[i]
        if ra[i] and rb[i] and ka is not None and kb is not None and ka > 0 and kb > 0:
            return targets[i], ka, kb
    k = max(1, min(a.iterations_run, b.iterations_run))
    return None, k, k


def _note(target: float | None, ka: int, kb: int) -> str:
    if target is None:
        return f"no target reached by both: timed {ka} steps each (time per step only)"
    if kb != ka:
        return (f"B takes {'fewer' if kb < ka else 'more'} iterations ({kb} vs {ka}): the time to target changes "
                "with the rule's behaviour; the time per step is the step's own cost")
    return f"same iterations ({ka}): time to target and time per step change alike"


def _calibrate(side: Any, index: int, k: int, clock: str) -> int:
    """Replays per sample so one sample lasts at least MIN_SAMPLE_SECONDS."""
    t = max(side.replay(index, k, 1, clock), 1e-7)
    return max(1, math.ceil(MIN_SAMPLE_SECONDS / t))


def _pairs(
    a_side: Any, b_side: Any, i: int, ka: int, kb: int, pairs: int, clock: str
) -> tuple[list[float], list[float]]:
    """``pairs`` interleaved replay pairs of case ``i`` after the warm-up pairs (seconds per replay)."""
    inner_a, inner_b = _calibrate(a_side, i, ka, clock), _calibrate(b_side, i, kb, clock)
    for _ in range(WARMUP_PAIRS):  # untimed: the first samples after a switch run slow
        a_side.replay(i, ka, inner_a, clock)
        b_side.replay(i, kb, inner_b, clock)
    ta: list[float] = []
    tb: list[float] = []
    for r in range(pairs):
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


@dataclass(frozen=True)
class _Plan:
    """How one case is timed: ``target`` as in CaseComparison; ``timed`` False: not timed (see note)."""

    timed: bool
    target: float | None
    ka: int
    kb: int
    note: str
    lost_a: tuple[float, ...] = ()
    lost_b: tuple[float, ...] = ()


_UNTIMED = ("diverged", "error", "timeout")


def _plan(inst: Any, ma: _Monitored, mb: _Monitored) -> _Plan:
    if ma.status in _UNTIMED or mb.status in _UNTIMED:
        return _Plan(False, None, 0, 0, "not timed: a side diverged, raised or timed out")
    lost_a, lost_b = _lost(ma, mb, inst.targets)
    if lost_a or lost_b:
        parts = [f"{s} lost {_targets_text(ts)} (the other side reaches them)"
                 for s, ts in (("A", lost_a), ("B", lost_b)) if ts]
        return _Plan(False, None, 0, 0, "not timed: " + "; ".join(parts), lost_a, lost_b)
    target, ka, kb = _timed_steps(ma, mb, inst.targets)
    return _Plan(True, target, ka, kb, _note(target, ka, kb))


def compare(
    a: Side,
    b: Side,
    *,
    problems: str | None = None,
    tier: str | None = "small",
    oracle: str = "full",
    batch: int | None = None,
    seed: int = 0,
    pairs: int = 31,
    jobs: int | None = None,
    catalogue_paths: Sequence[str | Path] = (),
    cwd: str | Path | None = None,
    clock: str = "cpu",
    process_pairs: int | None = None,
    fail_above: float | None = None,
    cluster: str | None = None,
    dtype: str | None = None,
) -> Comparison:
    """Measure B against A on the selected problems (see the module docstring).

    ``pairs``: interleaved replay pairs per case (at least ``MIN_PAIRS``).
    ``process_pairs`` (git revisions only; default ``PROCESS_PAIRS``, at
    most ``pairs``): the
    pairs of each case are spread over this many successive pairs of fresh
    worker processes. ``fail_above``: the speed limit (a fraction, 0.05 for
    5 %), judged by ``Comparison.verdict``.
    """
    from benchsuite.catalogue import load_catalogue, select

    if clock not in CLOCKS:
        raise UserError(f"--clock: {clock!r} is not one of {', '.join(CLOCKS)}")
    if pairs < MIN_PAIRS:
        raise UserError(f"--pairs: need at least {MIN_PAIRS} replay pairs for an interval, got {pairs}")
    if fail_above is not None and not (math.isfinite(fail_above) and fail_above > -1.0):
        raise UserError(f"--fail-above: the limit must be above -100 %, got {100 * fail_above:g} %")
    workers = a.rev is not None or b.rev is not None
    if process_pairs is not None and not workers:
        raise UserError("--process-pairs: only with --rev-a/--rev-b (both sides otherwise share one process)")
    n_proc = (min(PROCESS_PAIRS, pairs) if workers else 1) if process_pairs is None else process_pairs
    if n_proc < 1 or n_proc > pairs:
        raise UserError(f"--process-pairs: need 1 <= process pairs <= pairs ({pairs}), got {n_proc}")
    instances = tuple(select(load_catalogue(list(catalogue_paths) or None), problems, tier, validate=True))
    if not instances:
        raise UserError("--problems: no instance selected")
    here = Path(cwd or os.getcwd())

    def setup(side: Side) -> _Setup:
        params = tuple(sorted(side.params.items())) if isinstance(side.params, Mapping) else tuple(side.params)
        return _Setup(instances, side.rule, params, oracle, batch, (seed,), jobs, cluster, dtype)

    times: list[tuple[list[float], list[float], list[int]]] = [([], [], []) for _ in instances]
    plan: list[_Plan] = []
    mon_a: list[_Monitored] = []
    mon_b: list[_Monitored] = []
    with ExitStack() as trees:
        fronts = ([trees.enter_context(worktree(s.rev, here, opt)) if s.rev else here
                   for s, opt in ((a, "--rev-a"), (b, "--rev-b"))] if workers else [])
        for proc_no, share in enumerate(_shares(pairs, n_proc)):
            with ExitStack() as procs:
                sides: list[Any] = []
                for front in fronts or [None, None]:
                    side = _LocalSide() if front is None else _WorkerSide(front, here)
                    procs.push(_closer(side))
                    sides.append(side)
                mon_a, mon_b = sides[0].setup(setup(a)), sides[1].setup(setup(b))
                new_plan = [_plan(inst, ma, mb) for inst, ma, mb in zip(instances, mon_a, mon_b)]
                if proc_no and [(p.target, p.ka, p.kb) for p in new_plan] != [(p.target, p.ka, p.kb) for p in plan]:
                    raise UserError("the monitored passes differ between pairs of fresh processes: "
                                    "the rules are not deterministic, so their timings cannot be paired")
                plan = new_plan
                for i, p in enumerate(plan):
                    if p.timed:
                        ta, tb = _pairs(sides[0], sides[1], i, p.ka, p.kb, share, clock)
                        times[i][0].extend(ta)
                        times[i][1].extend(tb)
                        times[i][2].extend([proc_no] * len(ta))
    cases = []
    for i, (inst, p) in enumerate(zip(instances, plan)):
        ma, mb = mon_a[i], mon_b[i]
        if not p.timed:
            cases.append(CaseComparison(inst.name, ma.status, mb.status, None, None, None, (), (), None, None, p.note,
                                        p.lost_a, p.lost_b))
            continue
        ta, tb, groups = times[i]
        ttt = case_change(ta, tb, groups if n_proc > 1 else None)
        step = ttt.shifted(math.log(p.kb / p.ka))
        cases.append(CaseComparison(inst.name, ma.status, mb.status, p.target, p.ka, p.kb, tuple(ta), tuple(tb),
                                    step, ttt if p.target is not None else None, p.note, groups=tuple(groups)))
    method = Comparison.method + f"; clock: {CLOCKS[clock]}"
    if workers:
        method += (f"; {n_proc} pairs of fresh worker processes, the process pair is the unit of the interval"
                   if n_proc > 1 else "; one pair of worker processes: the interval leaves out the per-process effect")
    return _assemble(a.label, b.label, cases, pairs, method, n_proc, fail_above)


def _closer(side: Any) -> Any:
    """ExitStack exit callback: close the side, aborting when the body raised (error or Ctrl-C)."""
    def close(exc_type: Any, exc: Any, tb: Any) -> bool:
        side.close(abort=exc_type is not None)
        return False
    return close


def _assemble(label_a: str, label_b: str, cases: Sequence[CaseComparison], pairs: int, method: str,
              process_pairs: int, limit: float | None) -> Comparison:
    per_step = pooled_change([c.per_step for c in cases if c.per_step is not None])
    to_target = pooled_change([c.to_target for c in cases if c.to_target is not None])
    return Comparison(label_a, label_b, tuple(cases), per_step, to_target, pairs, method=method,
                      process_pairs=process_pairs, limit=limit)


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


def _reached(frame: Any, j: int) -> bool:
    v = frame.at[j, "iterations"]
    return bool(v == v)  # NaN: not reached


def _host(rows: Any, j: int) -> str:
    """The machine a saved run's target ``j`` was timed on ('' for runs saved before it was recorded)."""
    if "timed_on" not in rows:
        return ""
    v = rows.at[j, "timed_on"]
    return "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)


def compare_runs(run_a: str, run_b: str, *, out: str | Path = "results") -> Comparison:
    """Compare two saved runs' tables (no new measurement).

    Per instance both runs have: targets one run reached and the other did
    not are lost (no time figure for that case, as in :func:`compare`);
    otherwise the tightest target both reached is compared (first seed):
    iterations and the median replay time recorded in each run, as time to
    target and, divided by the iterations, time per step. Saved runs keep
    only the median time, and were measured at different times, so there is
    no interval (whether a change excludes no change is unknown) and no drift
    cancellation: the ratios are descriptive. A case timed on different
    machines in the two runs (``timed_on``) gets no time figure: one ratio never
    mixes machines.
    """
    fa, label_a = _run_table(out, run_a)
    fb, label_b = _run_table(out, run_b)
    cases = []
    for inst in [i for i in dict.fromkeys(fa["instance"]) if i in set(fb["instance"])]:
        ra = fa[fa["instance"] == inst].set_index("target_index")
        rb = fb[fb["instance"] == inst].set_index("target_index")
        status_a = str(ra["status"].iloc[0]) if "status" in ra else ""
        status_b = str(rb["status"].iloc[0]) if "status" in rb else ""
        common = sorted(set(ra.index) & set(rb.index))
        lost_a = tuple(float(ra.at[j, "target"]) for j in common if not _reached(ra, j) and _reached(rb, j))
        lost_b = tuple(float(ra.at[j, "target"]) for j in common if _reached(ra, j) and not _reached(rb, j))
        if lost_a or lost_b:
            parts = [f"{s} lost {_targets_text(ts)} (the other run reaches them)"
                     for s, ts in (("A", lost_a), ("B", lost_b)) if ts]
            cases.append(CaseComparison(inst, status_a, status_b, None, None, None, (), (), None, None,
                                        "no time figure: " + "; ".join(parts), lost_a, lost_b))
            continue
        both = [j for j in reversed(common) if _reached(ra, j) and _reached(rb, j)
                and ra.at[j, "time_to_target"] > 0 and rb.at[j, "time_to_target"] > 0]
        if not both:
            cases.append(CaseComparison(inst, status_a, status_b, None, None, None, (), (), None, None,
                                        "no target reached and timed in both runs"))
            continue
        j = both[0]
        host_a, host_b = _host(ra, j), _host(rb, j)
        if host_a and host_b and host_a != host_b:
            cases.append(CaseComparison(inst, status_a, status_b, None, None, None, (), (), None, None,
                                        f"no time figure: timed on different machines (A on {host_a}, "
                                        f"B on {host_b}); a ratio of the two would mix machines"))
            continue
        ka, kb = int(ra.at[j, "iterations"]), int(rb.at[j, "iterations"])
        ta, tb = float(ra.at[j, "time_to_target"]), float(rb.at[j, "time_to_target"])
        ttt = Change(math.log(tb / ta))
        note = _note(float(ra.at[j, "target"]), ka, kb) + "; saved runs: median times, no interval"
        cases.append(CaseComparison(inst, status_a, status_b, float(ra.at[j, "target"]), ka, kb, (ta,), (tb,),
                                    ttt.shifted(math.log(kb / ka)), ttt, note))
    if not cases:
        raise UserError(f"--runs: runs {run_a!r} and {run_b!r} share no instance")
    return _assemble(f"{label_a} (run {run_a})", f"{label_b} (run {run_b})", cases, 1,
                     "saved runs: ratios of the recorded median times to target (and per step); no interval", 1, None)


if __name__ == "__main__":  # worker process for git-revision comparisons
    if len(sys.argv) == 3 and sys.argv[1] == "--worker":
        # run the importable module's copy, so that what it pickles names
        # benchsuite.compare classes, not __main__ ones
        from benchsuite.compare import _worker_main as _serve

        sys.exit(_serve(sys.argv[2]))
    print("usage: python -m benchsuite.compare --worker PATH", file=sys.stderr)
    sys.exit(2)
