"""Baselines: what a rule achieved on a set of cases, recorded for the merge gate.

A baseline is a JSON file that a team commits next to its optimizer code. It
holds, per case, everything needed to rerun the case exactly (instance name and
a hash of its definition, the rule with every hyperparameter actually used,
oracle, batch, sampling, seeds, budget, targets, measure) and what the rule
achieved (per seed: status, first iteration meeting each target, final measure,
final relative distance to x*, the *trajectory fingerprint* -- the measure at
every iteration to 16, then on a geometric grid, and at the final iterate --
with its round-off envelope, the held crossings and the stay-converged
horizon), and where the instance came from. Plus the schema version, the tool
version and machine information. Version 1 files still load (their
fingerprint is at iterations 1, 2, 4, 8, ...; no envelope; crossings taken as
held).

The file is written for review: keys sorted, indent 2, cases sorted by key,
floats written with ``repr`` (so they read back bit for bit); non-finite floats
are written as the strings ``"inf"``, ``"-inf"`` and ``"nan"`` so the file is
strict JSON. Writes are atomic (temporary file + ``os.replace``) and never
replace an existing file unless asked. Loading validates every field and
raises :class:`~benchsuite.errors.UserError` naming the file and the field.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from benchsuite import __version__
from benchsuite.errors import UserError

__all__ = [
    "SCHEMA",
    "SeedRecord",
    "CaseRecord",
    "Baseline",
    "record_from_result",
    "make_baseline",
    "dumps",
    "write_baseline",
    "load_baseline",
    "parse_baseline",
]

#: identifies the file format; bump the number on an incompatible change
SCHEMA = "benchsuite-baseline/2"
#: older formats this version still reads (one release of compatibility): version 1 had the
#: fingerprint at iterations 1, 2, 4, 8, ... and no envelope, held crossings or horizon
READS = ("benchsuite-baseline/1", SCHEMA)

_STATUSES = ("reached", "partial", "budget", "unstable", "diverged", "error", "timeout")
_ORACLES = ("full", "minibatch")
_MEASURES = ("subopt", "dist", "gradnorm")


@dataclass(frozen=True)
class SeedRecord:
    """What one seed of a case achieved."""

    seed: int
    status: str
    iters: tuple[int | None, ...]  # first iteration meeting each target (None: not reached)
    grad_calls: tuple[int | None, ...]
    final_measure: float
    final_dist: float  # ||x_K - x*|| / ||x0 - x*||
    iterations_run: int
    fingerprint: tuple[float, ...]  # measure at each of ``checkpoints``
    error: str | None = None
    checkpoints: tuple[int, ...] = ()  # dense then geometric (version 1: 1, 2, 4, 8, ...)
    envelope: tuple[float, ...] = ()  # relative round-off sensitivity per checkpoint (empty: not recorded)
    held: tuple[int | None, ...] = ()  # per target: held from this iteration to the end of the pass
    margins: tuple[float | None, ...] = ()  # per target: relative distance of the measure from it at the held crossing
    horizon: int = 0  # steps run after the tightest target was first reached
    left_at: int | None = None  # first horizon iteration above the tightest target
    horizon_worst: float | None = None  # largest measure over the horizon (None: no horizon ran)

    def __post_init__(self) -> None:
        if not self.checkpoints and self.fingerprint:  # version 1: powers of two
            object.__setattr__(self, "checkpoints", tuple(2**i for i in range(len(self.fingerprint))))
        if not self.held and self.iters:  # version 1: crossings were taken as held
            object.__setattr__(self, "held", tuple(self.iters))


@dataclass(frozen=True)
class CaseRecord:
    """One case of a baseline: its exact settings and its outcome per seed."""

    key: str
    instance: str
    definition_hash: str
    x_tol: float
    rule: str  # rule name or import path as recorded
    rule_params: tuple[tuple[str, Any], ...]  # what the user gave
    hyperparams: tuple[tuple[str, Any], ...]  # every hyperparameter actually used
    oracle: str
    batch: int | None
    replace: bool
    seeds: tuple[int, ...]
    budget: int
    targets: tuple[float, ...]
    measure: str
    status: str
    outcomes: tuple[SeedRecord, ...]
    theory_bound: tuple[int | None, ...] = ()
    catalogue: str = "builtin"  # where the instance came from: "builtin" or the catalogue file as given
    dtype: str | None = None  # the dtype override of the run (None: as catalogued)
    horizon: tuple[int, float] = (100, 0.5)  # the stay-converged horizon setting of the run

    @property
    def stochastic(self) -> bool:
        """Minibatch cases are stochastic; full-gradient cases are deterministic."""
        return self.oracle != "full"

    def hyperparams_dict(self) -> dict[str, Any]:
        return dict(self.hyperparams)


@dataclass(frozen=True)
class Baseline:
    """A whole baseline file."""

    cases: tuple[CaseRecord, ...]
    rule_label: str
    tool_version: str = __version__
    recorded_at: str = ""
    machine: Mapping[str, Any] = field(default_factory=dict)
    schema: str = SCHEMA
    source: str = ""  # the file it was loaded from (for messages)


# ----------------------------------------------------------------- from runs
def _plain(value: Any) -> Any:
    """numpy scalars -> Python, tuples -> tuples of plain values."""
    if isinstance(value, (list, tuple)):
        return tuple(_plain(v) for v in value)
    if hasattr(value, "item") and callable(value.item) and getattr(value, "shape", None) == ():
        return value.item()
    return value


def _opt_int(v: Any) -> int | None:
    return None if v is None else int(v)


def record_from_result(result: Any) -> CaseRecord:
    """Turn a runner ``CaseResult`` into a :class:`CaseRecord`."""
    case = result.case
    inst = case.instance
    targets = tuple(float(t) for t in (case.targets or inst.targets))
    outcomes = tuple(
        SeedRecord(
            seed=int(o.seed),
            status=str(o.status),
            iters=tuple(_opt_int(i) for i in o.iters),
            grad_calls=tuple(_opt_int(i) for i in o.grad_calls),
            final_measure=float(o.final_measure),
            final_dist=float(o.final_dist),
            iterations_run=int(o.iterations_run),
            fingerprint=tuple(float(v) for v in o.fingerprint),
            error=None if o.error is None else (str(o.error).strip().splitlines() or [""])[-1],
            checkpoints=tuple(int(k) for k in o.checkpoints),
            envelope=tuple(float(v) for v in o.envelope),
            held=tuple(_opt_int(i) for i in o.held),
            margins=tuple(None if v is None else float(v) for v in o.margins),
            horizon=int(o.horizon),
            left_at=_opt_int(o.left_at),
            horizon_worst=None if o.horizon_worst is None else float(o.horizon_worst),
        )
        for o in result.outcomes
    )
    return CaseRecord(
        key=case.key(),
        instance=inst.name,
        definition_hash=inst.definition_hash(),
        x_tol=float(inst.x_tol),
        rule=case.rule.name,
        rule_params=tuple((k, _plain(v)) for k, v in case.rule.params),
        hyperparams=tuple(sorted((str(k), _plain(v)) for k, v in result.hyperparams.items())),
        oracle=case.oracle,
        batch=_opt_int(case.batch),
        replace=bool(case.replace),
        seeds=tuple(int(s) for s in case.seeds),
        budget=int(case.budget if case.budget is not None else inst.budget),
        targets=targets,
        measure=str(case.measure or inst.measure),
        status=str(result.status),
        outcomes=outcomes,
        theory_bound=tuple(_opt_int(b) for b in (result.theory_bound or ())),
        catalogue=catalogue_of(inst),
        dtype=case.dtype,
        horizon=(int(case.horizon[0]), float(case.horizon[1])),
    )


def catalogue_of(instance: Any) -> str:
    """``"builtin"`` for an instance of the built-in catalogue, else the file it was read from."""
    return getattr(instance, "catalogue", "") or "builtin"


def _portable(machine: Mapping[str, Any]) -> dict[str, Any]:
    """Machine information without local file paths (a committed file should not carry a checkout's folders)."""
    out = dict(machine)
    if isinstance(out.get("blas"), list):
        out["blas"] = [{k: v for k, v in p.items() if k != "filepath"} if isinstance(p, Mapping) else p
                       for p in out["blas"]]
    return out


def make_baseline(results: Iterable[Any], *, rule_label: str, machine: Mapping[str, Any] | None = None) -> Baseline:
    """A :class:`Baseline` from runner results (cases sorted by key)."""
    cases = tuple(sorted((record_from_result(r) for r in results), key=lambda c: c.key))
    keys = [c.key for c in cases]
    if len(set(keys)) != len(keys):
        dup = sorted({k for k in keys if keys.count(k) > 1})
        raise UserError(f"baseline: duplicate case keys {', '.join(dup)}")
    return Baseline(
        cases=cases,
        rule_label=rule_label,
        recorded_at=datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
        machine=_portable(machine or {}),
    )


# ------------------------------------------------------------------ to JSON
def _enc_float(x: float) -> float | str:
    if math.isfinite(x):
        return x
    return "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf")


def _enc(value: Any) -> Any:
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return _enc_float(value)
    if isinstance(value, (list, tuple)):
        return [_enc(v) for v in value]
    if isinstance(value, Mapping):
        return {str(k): _enc(v) for k, v in value.items()}
    return str(value)


def _seed_json(s: SeedRecord) -> dict[str, Any]:
    return {
        "seed": s.seed,
        "status": s.status,
        "iters": list(s.iters),
        "grad_calls": list(s.grad_calls),
        "final_measure": _enc_float(s.final_measure),
        "final_dist": _enc_float(s.final_dist),
        "iterations_run": s.iterations_run,
        "fingerprint": [_enc_float(v) for v in s.fingerprint],
        "error": s.error,
        "checkpoints": list(s.checkpoints),
        "envelope": [_enc_float(v) for v in s.envelope],
        "held": list(s.held),
        "margins": [None if v is None else _enc_float(v) for v in s.margins],
        "horizon": s.horizon,
        "left_at": s.left_at,
        "horizon_worst": None if s.horizon_worst is None else _enc_float(s.horizon_worst),
    }


def _case_json(c: CaseRecord) -> dict[str, Any]:
    return {
        "key": c.key,
        "instance": c.instance,
        "definition_hash": c.definition_hash,
        "x_tol": c.x_tol,
        "rule": c.rule,
        "rule_params": _enc(dict(c.rule_params)),
        "hyperparams": _enc(dict(c.hyperparams)),
        "oracle": c.oracle,
        "batch": c.batch,
        "replace": c.replace,
        "seeds": list(c.seeds),
        "budget": c.budget,
        "targets": [_enc_float(t) for t in c.targets],
        "measure": c.measure,
        "status": c.status,
        "theory_bound": list(c.theory_bound),
        "outcomes": [_seed_json(s) for s in c.outcomes],
        "catalogue": c.catalogue,
        "dtype": c.dtype,
        "horizon": [c.horizon[0], c.horizon[1]],
    }


def to_json(baseline: Baseline) -> dict[str, Any]:
    """The baseline as a JSON-ready dict (strict JSON: no NaN literals)."""
    return {
        "schema": baseline.schema,
        "tool_version": baseline.tool_version,
        "recorded_at": baseline.recorded_at,
        "rule": baseline.rule_label,
        "machine": _enc(dict(baseline.machine)),
        "cases": [_case_json(c) for c in sorted(baseline.cases, key=lambda c: c.key)],
    }


def dumps(baseline: Baseline) -> str:
    """The file text: sorted keys, indent 2, trailing newline."""
    return json.dumps(to_json(baseline), indent=2, sort_keys=True, allow_nan=False) + "\n"


def write_baseline(baseline: Baseline, path: str | Path, *, force: bool = False) -> Path:
    """Write atomically; refuse to replace an existing file unless ``force``."""
    path = Path(path)
    if path.exists() and not force:
        raise UserError(f"{path}: baseline exists; pass --force to overwrite it")
    from benchsuite.results import atomic_write_text

    atomic_write_text(path, dumps(baseline))
    return path


# ---------------------------------------------------------------- from JSON
class _Reader:
    """Typed field access that names the file and the field on failure."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, where: str, what: str) -> UserError:
        return UserError(f"{self.source}: {where}: {what}")

    def get(self, obj: Mapping[str, Any], key: str, where: str) -> Any:
        if not isinstance(obj, Mapping):
            raise self.fail(where, "expected an object")
        if key not in obj:
            raise self.fail(f"{where}.{key}" if where else key, "missing")
        return obj[key]

    def str_(self, obj: Mapping[str, Any], key: str, where: str, choices: Sequence[str] = ()) -> str:
        v = self.get(obj, key, where)
        if not isinstance(v, str):
            raise self.fail(f"{where}.{key}", f"expected a string, got {v!r}")
        if choices and v not in choices:
            raise self.fail(f"{where}.{key}", f"{v!r} is not one of {', '.join(choices)}")
        return v

    def int_(self, v: Any, where: str, *, minimum: int | None = None) -> int:
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(where, f"expected an integer, got {v!r}")
        if minimum is not None and v < minimum:
            raise self.fail(where, f"must be >= {minimum}, got {v}")
        return v

    def opt_int(self, v: Any, where: str) -> int | None:
        return None if v is None else self.int_(v, where, minimum=0)

    def float_(self, v: Any, where: str) -> float:
        if isinstance(v, str) and v in ("inf", "-inf", "nan"):
            return float(v)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.fail(where, f"expected a number, got {v!r}")
        return float(v)

    def list_(self, v: Any, where: str) -> list[Any]:
        if not isinstance(v, list):
            raise self.fail(where, f"expected a list, got {type(v).__name__}")
        return v

    def params(self, v: Any, where: str) -> tuple[tuple[str, Any], ...]:
        if not isinstance(v, Mapping):
            raise self.fail(where, "expected an object of name: value")
        out = []
        for k, val in sorted(v.items()):
            if isinstance(val, list):
                val = tuple(val)
            elif isinstance(val, str) and val in ("inf", "-inf", "nan"):
                val = float(val)
            out.append((k, val))
        return tuple(out)


def _parse_seed(r: _Reader, obj: Any, where: str, n_targets: int) -> SeedRecord:
    iters = tuple(r.opt_int(v, f"{where}.iters[{i}]") for i, v in enumerate(r.list_(r.get(obj, "iters", where), f"{where}.iters")))
    if len(iters) != n_targets:
        raise r.fail(f"{where}.iters", f"has {len(iters)} entries for {n_targets} targets")
    calls = tuple(
        r.opt_int(v, f"{where}.grad_calls[{i}]")
        for i, v in enumerate(r.list_(r.get(obj, "grad_calls", where), f"{where}.grad_calls"))
    )
    fp = tuple(
        r.float_(v, f"{where}.fingerprint[{i}]")
        for i, v in enumerate(r.list_(r.get(obj, "fingerprint", where), f"{where}.fingerprint"))
    )
    if len(iters) and obj.get("checkpoints") and len(obj["checkpoints"]) != len(fp):
        raise r.fail(f"{where}.checkpoints", f"has {len(obj['checkpoints'])} entries for {len(fp)} fingerprint values")
    if obj.get("envelope") and len(obj["envelope"]) != len(fp):
        raise r.fail(f"{where}.envelope", f"has {len(obj['envelope'])} entries for {len(fp)} fingerprint values")
    if obj.get("held") and len(obj["held"]) != n_targets:
        raise r.fail(f"{where}.held", f"has {len(obj['held'])} entries for {n_targets} targets")
    err = obj.get("error") if isinstance(obj, Mapping) else None
    if err is not None and not isinstance(err, str):
        raise r.fail(f"{where}.error", f"expected a string or null, got {err!r}")
    return SeedRecord(
        seed=r.int_(r.get(obj, "seed", where), f"{where}.seed"),
        status=r.str_(obj, "status", where, _STATUSES),
        iters=iters,
        grad_calls=calls,
        final_measure=r.float_(r.get(obj, "final_measure", where), f"{where}.final_measure"),
        final_dist=r.float_(r.get(obj, "final_dist", where), f"{where}.final_dist"),
        iterations_run=r.int_(r.get(obj, "iterations_run", where), f"{where}.iterations_run", minimum=0),
        fingerprint=fp,
        error=err,
        checkpoints=tuple(
            r.int_(v, f"{where}.checkpoints[{i}]", minimum=1)
            for i, v in enumerate(r.list_(obj.get("checkpoints", []), f"{where}.checkpoints"))
        ),
        envelope=tuple(
            r.float_(v, f"{where}.envelope[{i}]") for i, v in enumerate(r.list_(obj.get("envelope", []), f"{where}.envelope"))
        ),
        held=tuple(r.opt_int(v, f"{where}.held[{i}]") for i, v in enumerate(r.list_(obj.get("held", []), f"{where}.held"))),
        margins=tuple(None if v is None else r.float_(v, f"{where}.margins[{i}]")
                      for i, v in enumerate(r.list_(obj.get("margins", []), f"{where}.margins"))),
        horizon=r.int_(obj.get("horizon", 0), f"{where}.horizon", minimum=0),
        left_at=r.opt_int(obj.get("left_at"), f"{where}.left_at"),
        horizon_worst=None if obj.get("horizon_worst") is None else r.float_(obj["horizon_worst"], f"{where}.horizon_worst"),
    )


def _parse_case(r: _Reader, obj: Any, where: str) -> CaseRecord:
    targets = tuple(
        r.float_(v, f"{where}.targets[{i}]") for i, v in enumerate(r.list_(r.get(obj, "targets", where), f"{where}.targets"))
    )
    if not targets:
        raise r.fail(f"{where}.targets", "empty")
    seeds = tuple(r.int_(v, f"{where}.seeds[{i}]") for i, v in enumerate(r.list_(r.get(obj, "seeds", where), f"{where}.seeds")))
    if not seeds:
        raise r.fail(f"{where}.seeds", "empty")
    outcomes = tuple(
        _parse_seed(r, o, f"{where}.outcomes[{i}]", len(targets))
        for i, o in enumerate(r.list_(r.get(obj, "outcomes", where), f"{where}.outcomes"))
    )
    if [o.seed for o in outcomes] != list(seeds):
        raise r.fail(f"{where}.outcomes", f"seeds {[o.seed for o in outcomes]} do not match seeds {list(seeds)}")
    batch = r.get(obj, "batch", where)
    replace = r.get(obj, "replace", where)
    if not isinstance(replace, bool):
        raise r.fail(f"{where}.replace", f"expected true or false, got {replace!r}")
    x_tol = r.float_(r.get(obj, "x_tol", where), f"{where}.x_tol")
    return CaseRecord(
        key=r.str_(obj, "key", where),
        instance=r.str_(obj, "instance", where),
        definition_hash=r.str_(obj, "definition_hash", where),
        x_tol=x_tol,
        rule=r.str_(obj, "rule", where),
        rule_params=r.params(r.get(obj, "rule_params", where), f"{where}.rule_params"),
        hyperparams=r.params(r.get(obj, "hyperparams", where), f"{where}.hyperparams"),
        oracle=r.str_(obj, "oracle", where, _ORACLES),
        batch=None if batch is None else r.int_(batch, f"{where}.batch", minimum=1),
        replace=replace,
        seeds=seeds,
        budget=r.int_(r.get(obj, "budget", where), f"{where}.budget", minimum=1),
        targets=targets,
        measure=r.str_(obj, "measure", where, _MEASURES),
        status=r.str_(obj, "status", where),
        outcomes=outcomes,
        theory_bound=tuple(
            r.opt_int(v, f"{where}.theory_bound[{i}]")
            for i, v in enumerate(r.list_(obj.get("theory_bound", []), f"{where}.theory_bound"))
        ),
        catalogue=str(obj.get("catalogue") or "builtin"),
        dtype=obj.get("dtype"),
        horizon=_horizon(r, obj.get("horizon", [100, 0.5]), f"{where}.horizon"),
    )


def _horizon(r: _Reader, v: Any, where: str) -> tuple[int, float]:
    items = r.list_(v, where)
    if len(items) != 2:
        raise r.fail(where, f"expected [steps, multiple], got {v!r}")
    return (r.int_(items[0], f"{where}[0]", minimum=0), r.float_(items[1], f"{where}[1]"))


def parse_baseline(data: Any, source: str = "<baseline>") -> Baseline:
    """Validate a decoded JSON document and build the :class:`Baseline`."""
    r = _Reader(source)
    if not isinstance(data, Mapping):
        raise UserError(f"{source}: expected a JSON object at the top level")
    schema = r.str_(data, "schema", "")
    if schema not in READS:
        raise r.fail("schema", f"{schema!r} is not supported (this tool reads {', '.join(map(repr, READS))})")
    machine = data.get("machine", {})
    if not isinstance(machine, Mapping):
        raise r.fail("machine", "expected an object")
    cases = tuple(_parse_case(r, c, f"cases[{i}]") for i, c in enumerate(r.list_(r.get(data, "cases", ""), "cases")))
    if not cases:
        raise r.fail("cases", "empty: the baseline has no cases")
    keys = [c.key for c in cases]
    if len(set(keys)) != len(keys):
        raise r.fail("cases", f"duplicate key {next(k for k in keys if keys.count(k) > 1)!r}")
    return Baseline(
        cases=cases,
        rule_label=r.str_(data, "rule", ""),
        tool_version=r.str_(data, "tool_version", ""),
        recorded_at=str(data.get("recorded_at", "")),
        machine=dict(machine),
        schema=schema,
        source=source,
    )


def load_baseline(path: str | Path) -> Baseline:
    """Read and validate a baseline file (UserError naming the file and field)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{path}: baseline file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read baseline ({exc})") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UserError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})") from None
    return parse_baseline(data, str(path))
