"""The runner: plan cases, run their passes on an executor, time them, store the run.

Data flows one way: a :class:`RunRequest` (plain data, kept in ``meta.json``
so ``--resume`` can rebuild it) is planned into :class:`~benchsuite.cases.Case`
values (:func:`plan_cases`); :func:`run_cases` ships one
:class:`~benchsuite.monitor.PassTask` per case and seed to an executor
(:mod:`benchsuite.executors`: local worker processes, or a Dask cluster), puts
the reports back together into :class:`~benchsuite.cases.CaseResult` values,
then times them with uninstrumented replays (:mod:`benchsuite.timing`) one at
a time in this process, with BLAS threads pinned, never concurrently with
other cases; :func:`execute` stores the run folder and the history and returns
the tidy table (:mod:`benchsuite.tables`).

Iteration counts do not depend on ``jobs`` or on the executor: every pass runs
the same code with the same seed and the same BLAS thread count. Stochastic
cases (minibatch oracle) run over several seeds (default 5); deterministic
full-gradient cases run one seed.

The pieces live in their own modules -- :mod:`benchsuite.cases` (value
objects), :mod:`benchsuite.monitor` (the monitored pass),
:mod:`benchsuite.timing` (the replay), :mod:`benchsuite.tables` (the table) --
and are re-exported here for callers of the earlier single-module runner.
"""

from __future__ import annotations

import os
import platform
import statistics
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from dataclasses import replace as _with
from typing import TYPE_CHECKING, Any

from benchsuite.cases import (
    DIVERGED_ABOVE,
    STATUSES,
    Case,
    CaseResult,
    SeedOutcome,
    Trace,
    aggregate_status,
    enc as _enc,
    result_from_dict,
    result_to_dict,
)
from benchsuite.errors import UserError
from benchsuite.monitor import PassReport, PassTask, monitored_pass
from benchsuite.tables import table_rows, to_frame
from benchsuite.timing import needs_replay, replay_seconds, replay_times, timed_outcome

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "DEFAULT_TIMEOUT",
    "DIVERGED_ABOVE",
    "STATUSES",
    "Case",
    "CaseResult",
    "Plan",
    "RunInterrupted",
    "RunOutcome",
    "RunRequest",
    "SeedOutcome",
    "Trace",
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

#: default per-pass wall-clock limit of a monitored pass, seconds
DEFAULT_TIMEOUT = 120.0


# -- running many cases -------------------------------------------------------------------
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
    envelope: bool = False,
    cluster: str | None = None,
) -> list[CaseResult]:
    """Run every case: monitored passes on an executor, then timing replays one at a time.

    ``previous`` maps case keys to results of an interrupted run: finished
    ones are kept, those without timing only get their replays. ``on_result``
    is called with each case's result when its monitored passes finish and
    again when it is timed (to store it as soon as it exists).
    ``envelope`` records the round-off envelope (two shadow passes per seed;
    see :mod:`benchsuite.monitor`). ``cluster`` is a Dask scheduler address
    (default: local worker processes, ``jobs`` of them, default the number of
    cores); on a cluster the timing replays run on the workers too, one per
    machine at a time (:mod:`benchsuite.executors.cluster`). ``progress``:
    ``None`` -- a bar on a terminal, plain lines otherwise; ``False`` -- silent. Results come back in the order of ``cases``.
    """
    from threadpoolctl import threadpool_limits

    from benchsuite.executors import make_executor
    from benchsuite.progress import progress_display

    jobs = max(1, int(jobs or os.cpu_count() or 1))
    if repeats < 1:
        raise UserError(f"--replays must be >= 1, got {repeats}")
    if timeout is not None and not timeout > 0:
        raise UserError(f"--timeout must be > 0 seconds, got {timeout}")
    previous = previous or {}
    results: dict[int, CaseResult] = {}
    tasks: list[PassTask] = []
    owner: list[int] = []
    for i, case in enumerate(cases):
        old = previous.get(case.key())
        if old is not None:
            results[i] = _with(old, case=case)
            continue
        for seed in case.seeds:
            tasks.append(PassTask(case, seed, timeout, envelope))
            owner.append(i)
    to_run = len(set(owner))
    to_time = [i for i in range(len(cases)) if timing and (i not in results or not results[i].timed)]
    show = progress_display(to_run + len(to_time), progress)
    reports: dict[int, dict[int, PassReport]] = {}
    seeds_left = {i: len(cases[i].seeds) for i in set(owner)}
    done = 0

    def collect(tid: int, report: PassReport) -> None:
        nonlocal done
        i = owner[tid]
        reports.setdefault(i, {})[tid] = report
        seeds_left[i] -= 1
        if seeds_left[i] == 0:
            reps = [reports[i][t] for t in sorted(reports[i])]
            good = next((r for r in reps if r.hyperparams), reps[0])
            outs = tuple(r.outcome for r in reps)
            res = CaseResult(cases[i], good.hyperparams, outs, good.theory_bound or tuple(None for _ in cases[i].run_targets),
                             aggregate_status([o.status for o in outs]), good.bound_source, good.theory_lower,
                             good.unreachable)
            results[i] = res
            if on_result is not None:
                on_result(res)
            done += 1
            show(done, _summary_line(res))

    executor = make_executor(jobs=jobs, threads=threads, cluster=cluster)
    try:
        executor.run(tasks, collect)
        time_cases = getattr(executor, "time_cases", None)  # a cluster times on its workers
        if to_time and time_cases is not None:
            def timed(i: int, res: CaseResult) -> None:
                nonlocal done
                results[i] = res
                if on_result is not None:
                    on_result(res)
                done += 1
                show(done, "timed " + _summary_line(res))

            for i in to_time:
                if results[i].timed:
                    done += 1
                    show(done, "timed " + _summary_line(results[i]))
            time_cases([(i, results[i]) for i in to_time if not results[i].timed], repeats, timed)
            to_time = []
    finally:
        executor.close()
    if to_time:
        with threadpool_limits(limits=threads):
            for i in to_time:
                res = results[i]
                if not res.timed:
                    outs = tuple(timed_outcome(res.case, res.hyperparams, o, repeats) if needs_replay(o) else o
                                 for o in res.outcomes)
                    results[i] = res = _with(res, outcomes=outs)
                    if on_result is not None:
                        on_result(res)
                done += 1
                show(done, "timed " + _summary_line(res))
    return [results[i] for i in range(len(cases))]


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
    horizon: tuple[int, float] = (100, 0.5)  # stay-converged horizon: max(steps, ceil(mult x k*))
    dtype: str | None = None               # float32 / float64 override of every instance
    start: int | None = None               # certified starting point (1 or 2) of StRD files given by path

    @classmethod
    def make(cls, *, rules: Sequence[str] | str | None = None, params: Sequence[str] | Mapping[str, Any] = (),
             problems: str | None = None, tier: str | None = "small", catalogue: Sequence[str] | None = None,
             batch: int | None = None, replace: bool = True, seeds: int | None = None, budget: int | None = None,
             sweep: str | None = None, params_from: str | None = None,
             horizon: tuple[int, float] | str | None = None, dtype: str | None = None,
             start: int | None = None) -> RunRequest:
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
        if dtype is not None and dtype not in ("float32", "float64"):
            raise UserError(f"--dtype {dtype!r}: expected float32 or float64")
        if start is not None and (isinstance(start, bool) or start not in (1, 2)):
            raise UserError(f"--start {start!r}: a NIST StRD file has certified starting points 1 and 2")
        return cls(tuple(rules or ()), tuple(sorted(items)), problems, tier, tuple(str(c) for c in catalogue or ()),
                   None if batch is None else int(batch), bool(replace), None if seeds is None else int(seeds),
                   None if budget is None else int(budget), sweep, params_from,
                   parse_horizon(horizon), dtype, None if start is None else int(start))

    def to_dict(self) -> dict[str, Any]:
        return _enc(asdict(self))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RunRequest:
        d = dict(d)
        d["rules"] = tuple(d.get("rules") or ())
        d["catalogue"] = tuple(d.get("catalogue") or ())
        d["params"] = tuple((k, tuple(v) if isinstance(v, list) else v) for k, v in d.get("params") or ())
        d["horizon"] = parse_horizon(d.get("horizon"))  # runs recorded before the horizon existed: the default
        return cls(**d)


def parse_horizon(value: tuple[int, float] | Sequence[Any] | str | None) -> tuple[int, float]:
    """``"100,0.5"`` or ``(100, 0.5)`` -> ``(100, 0.5)``: at least 100 steps, or 0.5 x the iterations so far."""
    if value is None:
        return (100, 0.5)
    parts = value.split(",") if isinstance(value, str) else list(value)
    try:
        if len(parts) != 2:
            raise ValueError
        steps, mult = int(str(parts[0]).strip()), float(str(parts[1]).strip())
    except ValueError:
        raise UserError(f"--horizon {value!r}: expected STEPS,MULTIPLE (e.g. 100,0.5)") from None
    if steps < 0 or not (0 <= mult < float("inf")):
        raise UserError(f"--horizon {value!r}: steps and multiple must be >= 0 and finite")
    return (steps, mult)


@dataclass(frozen=True)
class Plan:
    """The cases of a request, with sweep bookkeeping, what was skipped and notes for the user."""

    cases: tuple[Case, ...]
    #: case key -> (sweep group, swept value) for sweep grid points
    grid: dict[str, tuple[str, float]] = field(default_factory=dict)
    skipped: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()


def split_rule(text: str) -> tuple[str, dict[str, Any]]:
    """``"adam(lr=0.01, beta2=0.99)"`` -> ``("adam", {"lr": 0.01, "beta2": 0.99})``; a bare name has none.

    The same form as the rule labels the tool prints, so a label can be pasted
    back as ``--rule``. Commas inside brackets (``betas=(0.9, 0.999)``) belong
    to the value.
    """
    from benchsuite.rulespec import parse_param

    text = text.strip()
    if not text.endswith(")") or "(" not in text:
        return text, {}
    name, inner = text[: text.index("(")].strip(), text[text.index("(") + 1 : -1]
    parts, depth, cur = [], 0, ""
    for ch in inner:
        if ch in "([":
            depth += 1
        elif ch in ")]":
            depth -= 1
        if ch == "," and depth == 0:
            parts.append(cur)
            cur = ""
        else:
            cur += ch
    if cur.strip():
        parts.append(cur)
    merged: list[str] = []
    for part in parts:  # a label prints a list unbracketed (betas=0.9,0.999): rejoin its items
        if "=" not in part and merged:
            merged[-1] += "," + part
        else:
            merged.append(part)
    parts = merged
    params: dict[str, Any] = {}
    for part in parts:
        key, eq, raw = part.strip().partition("=")
        raw = raw.strip()
        if raw[:1] in "([" and raw[-1:] in ")]":  # a bracketed list, as in betas=(0.9, 0.999)
            raw = raw[1:-1]
        try:
            k, v = parse_param(f"{key}{eq}{raw}")
        except UserError as exc:
            raise UserError(f"--rule {text!r}: {str(exc).split(': ', 1)[-1]}") from None
        if k in params:
            raise UserError(f"--rule {text!r}: {k} is given twice")
        params[k] = v
    if not name:
        raise UserError(f"--rule {text!r}: no rule name before the parentheses")
    return name, params


def plan_cases(req: RunRequest, out: str | os.PathLike[str] | None = "results") -> Plan:
    """Turn a request into cases (validating everything the user gave: ``UserError``)."""
    from benchsuite.catalogue import load_catalogue, select
    from benchsuite.rules import DEFAULT_RULES
    from benchsuite.rulespec import build_rule, parse_rule
    from benchsuite.sweep import parse_sweep, selection_table

    cat = load_catalogue(list(req.catalogue) or None)
    instances = select(cat, req.problems, tier=req.tier, validate=True)
    if req.start is not None:
        instances = [_at_start(inst, req.start) for inst in instances]
    if not instances:
        raise UserError(f"no problems selected (--problems {req.problems!r}, --tier {req.tier})")
    rules = [split_rule(r) for r in (list(req.rules) or list(DEFAULT_RULES))]
    for name, own in rules:
        parse_rule(name, own)  # an unknown rule fails here, before any work
        clash = sorted(set(own) & {k for k, _ in req.params})
        if clash:
            raise UserError(f"--rule {name}: {', '.join(clash)} given both in the rule and in --param")
    notes: list[str] = []
    chosen: dict[tuple[str, str], dict[str, Any]] = {}
    if req.params_from:
        from benchsuite.results import RunDir

        if out is None:
            raise UserError("--params-from needs a results folder (--out)")
        meta = RunDir.open(out, req.params_from).read_meta()
        if not meta.get("selected"):
            raise UserError(f"--params-from {req.params_from}: that run has no sweep selection")
        chosen = selection_table(meta["selected"])
        swept_rules = {r for _, r in chosen}
        for name, _ in rules:
            if name not in swept_rules:
                notes.append(f"--params-from {req.params_from}: that run did not sweep {name}; "
                             "it runs with its own hyperparameters")
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
            if req.batch > n:  # like a problem that is not a finite sum: said, not run
                notes.append(f"--batch {req.batch}: {inst.name} has only {n} samples; skipped")
                continue
            keep.append(inst)
        if not keep:
            raise UserError(f"--batch {req.batch}: none of the selected problems is a finite sum with that many samples")
        instances = keep
    cases: list[Case] = []
    grid: dict[str, tuple[str, float]] = {}
    checked: set[Any] = set()
    for inst in instances:
        for name, own in rules:
            base = {**chosen.get((inst.name, name), {}), **own, **dict(req.params)}
            points = [(None, base)] if sweep is None else [(v, {**base, sweep.name: v}) for v in sweep.values]
            for value, p in points:
                spec = parse_rule(name, p)
                if spec not in checked:
                    build_rule(spec, None)  # hyperparameter names and values, once per spec
                    checked.add(spec)
                case = Case(inst, spec, oracle, req.batch, req.replace, seeds, budget=req.budget,
                            horizon=req.horizon, dtype=req.dtype)
                cases.append(case)
                if value is not None:
                    group = f"{inst.name} | {parse_rule(name, base).label}"
                    grid[case.key()] = (group, value)
    return Plan(tuple(cases), grid, tuple(skipped), tuple(notes))


def _at_start(inst: Any, start: int) -> Any:
    """A StRD file given by path, at its certified starting point ``start``."""
    from benchsuite.catalogue import instance_from_strd

    if inst.family != "nist_strd" or inst.source.endswith(".toml"):
        raise UserError(f"--start: {inst.name} is a catalogue instance; --start applies to NIST StRD files given by path")
    return inst if dict(inst.params).get("start") == start else instance_from_strd(inst.source, start)


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
    notes: tuple[str, ...] = ()


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
    cluster: str | None = None,
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
    if cluster:  # a bad address or worker set-up fails here, before a run folder exists
        from benchsuite.executors.cluster import preflight

        preflight(cluster, plan.cases)
    if rd is None and out is not None:
        rd = RunDir.create(out)
    if not resume:
        meta = {"request": req.to_dict(), "started": _now()}
    meta.update({
        "version": _version(),
        "rules": sorted({c.rule.label for c in plan.cases}),
        "git": git_info(),
        "machine": machine_info(),
        "settings": {"jobs": jobs or os.cpu_count(), "threads": threads, "replays": repeats, "timeout": timeout,
                     "timing": timing, "diverged_above": DIVERGED_ABOVE, "cluster": cluster},
        "sweep": parse_sweep(req.sweep).describe() if req.sweep else None,
        "skipped": list(plan.skipped),
        "n_cases": len(plan.cases),
        "status": "running",
        "process": {"pid": os.getpid(), "host": platform.node()},  # tells a live run from a killed one
    })
    meta.setdefault("resumed", [])
    if resume:
        meta["resumed"].append(_now())
    if rd is not None:
        rd.write_meta(meta)
    finished: dict[str, CaseResult] = {}

    def keep(r: CaseResult) -> None:
        finished[r.case.key()] = r
        if rd is not None:
            rd.save_case(r.case.key(), result_to_dict(r))
            rd.save_traces(r.case.key(), r.outcomes)

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

    # from the moment meta.json says "running", an interrupt (Ctrl-C, or SIGTERM turned into one
    # by the command line) leaves it "partial" with every finished case kept
    try:
        previous = {c.key(): result_from_dict(c, stored[c.key()], rd.load_traces(c.key()) if rd else None)
                    for c in plan.cases if c.key() in stored}
        finished.update(previous)
        results = run_cases(plan.cases, jobs=jobs, timing=timing, repeats=repeats, threads=threads,
                            timeout=timeout, progress=progress, previous=previous, on_result=keep, cluster=cluster)
        selected = sweep_selection(plan, results, parse_sweep(req.sweep).name) if req.sweep else []
        frame = close("complete", results, selected)
    except KeyboardInterrupt:
        done = [finished[c.key()] for c in plan.cases if c.key() in finished]
        close("partial", done, [])
        raise RunInterrupted(rd.run_id if rd else None) from None
    except UserError as exc:  # stopped mid-run (e.g. a cluster lost a task): keep what finished, say how to go on
        done = [finished[c.key()] for c in plan.cases if c.key() in finished]
        close("partial", done, [])
        if rd is None:
            raise
        raise UserError(f"{exc} (finished cases kept; run {rd.run_id} marked partial: "
                        f"benchsuite run --resume {rd.run_id})") from None
    return RunOutcome(frame, tuple(results), rd.run_id if rd else None, str(rd.path) if rd else None,
                      "complete", tuple(selected), plan.skipped, plan.notes)


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
    horizon: tuple[int, float] | str | None = None,
    dtype: str | None = None,
    start: int | None = None,
    jobs: int | None = None,
    threads: int = 1,
    repeats: int = 5,
    timeout: float | None = DEFAULT_TIMEOUT,
    timing: bool = True,
    out: str | os.PathLike[str] | None = "results",
    resume: str | None = None,
    progress: bool | None = False,
    cluster: str | None = None,
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
    ``params_from``: a run id whose sweep selection to reuse; ``horizon``: the
    stay-converged horizon ``(steps, multiple)``; ``dtype``: ``"float32"`` or
    ``"float64"`` for every instance; ``start``: the certified starting point
    of StRD files given by path; ``out``: the
    results folder (run directory + history; ``None`` writes nothing);
    ``resume``: complete an interrupted run (the other arguments are then
    taken from it). Execution settings (``jobs``, ``threads``, ``repeats``,
    ``timeout``, ``timing``, ``cluster``) are described in :func:`run_cases`.
    """
    req = None if resume else RunRequest.make(
        rules=rules, params=params, problems=problems, tier=tier, catalogue=catalogue, batch=batch,
        replace=replace, seeds=seeds, budget=budget, sweep=sweep, params_from=params_from,
        horizon=horizon, dtype=dtype, start=start,
    )
    return execute(req, jobs=jobs, threads=threads, repeats=repeats, timeout=timeout, timing=timing,
                   out=out, resume=resume, progress=progress, cluster=cluster).frame
