"""The catalogue: named problem instances read from TOML files.

Each catalogue file holds ``[[instance]]`` tables (see DEVELOPERS.md)::

    [[instance]]
    name = "quad-diag-kappa100-d50"   # required, unique over all files
    family = "quadratic"              # required: built-in short name or module:Class
    targets = [1e-2, 1e-4, 1e-6]      # required: strictly decreasing, all in (0, 1)
    budget = 2000                     # required: iteration budget, integer > 0
    tier = "small"                    # small | medium | large (default small)
    dtype = "float64"                 # float64 | float32: the precision the rules run in
    measure = "subopt"                # subopt | dist | gradnorm (default subopt)
    x_tol = 1e-3                      # gate: relative final distance (default 1e-3)
    [instance.params]                 # keyword arguments of the family constructor
    d = 50

The built-in catalogue is the ``problems/`` folder at the top of the
repository; more files or folders come from the ``paths`` argument and from
the environment variable ``BENCHSUITE_CATALOGUE`` (``os.pathsep``-separated).
Everything is validated here, once: a mistake becomes a one-line
:class:`~benchsuite.errors.UserError` naming the file, the instance and the
field. Problems are built lazily (:meth:`Instance.build`); loading a catalogue
only resolves the family class and checks the parameter names against its
constructor's signature.
"""

from __future__ import annotations

import difflib
import fnmatch
import hashlib
import inspect
import json
import math
import os
import tomllib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from benchsuite.errors import UserError

if TYPE_CHECKING:
    from benchsuite.problem import Problem

__all__ = [
    "DTYPES",
    "ENV_VAR",
    "MEASURES",
    "TIERS",
    "Instance",
    "builtin_dir",
    "instance_from_strd",
    "load_catalogue",
    "select",
]

TIERS = ("small", "medium", "large")
MEASURES = ("subopt", "dist", "gradnorm")
ENV_VAR = "BENCHSUITE_CATALOGUE"
#: :attr:`Instance.catalogue` of the shipped catalogue's instances
BUILTIN = "builtin"

_REQUIRED = ("name", "family", "targets", "budget")
_OPTIONAL = ("tier", "measure", "x_tol", "params", "dtype")
#: working precisions an instance may run in (its optimum is always certified in float64)
DTYPES = ("float64", "float32")
#: targets/budget of a StRD file given by path, as for the shipped files in
#: problems/nist.toml: relative suboptimality 1e-2 .. 1e-6, 5000 iterations
_STRD_TARGETS = (1e-2, 1e-4, 1e-6)
_STRD_BUDGET = 5000


def _freeze(value: Any) -> Any:
    """TOML value -> hashable value: lists become tuples (recursively)."""
    if isinstance(value, list):
        return tuple(_freeze(v) for v in value)
    return value


def _thaw(value: Any) -> Any:
    """Inverse of :func:`_freeze` for passing parameters to a constructor."""
    if isinstance(value, tuple):
        return [_thaw(v) for v in value]
    return value


def _canonical(obj: Any) -> str:
    """Canonical JSON: sorted keys, no spaces, floats by repr (exact round trip)."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), allow_nan=False)


@dataclass(frozen=True)
class Instance:
    """One named catalogue entry: a family, its parameters and the run settings."""

    name: str
    family: str
    params: tuple[tuple[str, Any], ...]
    tier: str
    targets: tuple[float, ...]
    budget: int
    measure: str = "subopt"
    x_tol: float = 1e-3
    source: str = ""
    #: working precision of the runs ("float64" or "float32"); the objective -- and its
    #: certified optimum -- is the float64 one either way, so it is not in problem_hash
    dtype: str = "float64"
    #: where the instance came from: ``"builtin"`` (the shipped catalogue), the
    #: catalogue file or StRD ``.dat`` path as given, or ``""`` (made in code)
    catalogue: str = ""

    @property
    def builtin(self) -> bool:
        """Whether the instance is one of the shipped catalogue's."""
        return self.catalogue == BUILTIN

    def params_dict(self) -> dict[str, Any]:
        """The parameters as keyword arguments (tuples back to lists)."""
        return {k: _thaw(v) for k, v in self.params}

    def family_class(self) -> type:
        """The :class:`~benchsuite.problem.Problem` subclass of this instance."""
        from benchsuite.families import resolve_family

        try:
            return resolve_family(self.family)
        except UserError as exc:
            raise UserError(f"{self._where('family')}: {exc}") from None

    def build(self, dtype: str | None = None) -> Problem:
        """Construct the problem: ``family(**params)`` (plus ``dtype`` when given).

        A constructor's ``TypeError`` for an unknown keyword names the parameter
        and lists the accepted ones; a ``ValueError`` (or other ``TypeError``)
        is reported with the file and instance in front.
        """
        cls = self.family_class()
        kwargs = self.params_dict()
        if dtype is not None:
            kwargs["dtype"] = dtype
        unknown = _unknown_params(cls, kwargs)
        if unknown:
            raise UserError(_unknown_message(self._where("params"), self.family, cls, unknown))
        try:
            return cls(**kwargs)
        except (ValueError, TypeError) as exc:
            raise UserError(f"{self._where('params')}: {exc}") from None

    def build_for_run(self, dtype: str | None = None) -> Problem:
        """The problem in the precision a run uses: ``dtype`` (e.g. from ``--dtype``) or the instance's.

        float64 builds exactly as :meth:`build` (no ``dtype`` keyword passed, so
        families without one keep working); float32 passes ``dtype="float32"``.
        An override also replaces a ``dtype`` given in ``params`` (the older way to
        ask for float32, which makes the optimum be certified on the float32 build:
        prefer the instance's ``dtype`` field).
        """
        if dtype is None:  # as catalogued (a dtype in params, the older way, is kept as well)
            return self.build(None if self.dtype == "float64" else self.dtype)
        if dtype not in DTYPES:
            raise UserError(f"--dtype: unknown dtype {dtype!r} (one of {', '.join(DTYPES)})")
        if dtype == "float64" and "dtype" not in self.params_dict():
            return self.build()
        return self.build(dtype)

    def _identity(self) -> dict[str, Any]:
        """Family, params and -- for families that read files -- a digest of the data."""
        payload: dict[str, Any] = {"family": self.family, "params": dict(self.params)}
        digest = self.family_class().data_digest(self.params_dict())
        if digest is not None:
            payload["data"] = digest
        return payload

    def problem_hash(self) -> str:
        """sha256 of the canonical JSON of ``(family, params[, data digest])``: the objective's identity."""
        return hashlib.sha256(_canonical(self._identity()).encode()).hexdigest()

    def definition_hash(self) -> str:
        """sha256 of everything that defines a benchmark case except name, source and tier."""
        payload = {
            **self._identity(),
            "targets": list(self.targets),
            "budget": self.budget,
            "measure": self.measure,
            "x_tol": self.x_tol,
        }
        if self.dtype != "float64":  # float64 instances keep the hashes they had before dtype existed
            payload["dtype"] = self.dtype
        return hashlib.sha256(_canonical(payload).encode()).hexdigest()

    def _where(self, field: str) -> str:
        return f"{self.source or '<instance>'}: [{self.name}].{field}"


# -- parameter names against the constructor -------------------------------
def _accepted(cls: type) -> tuple[list[str], bool]:
    """Keyword names the constructor accepts, and whether it takes ``**kwargs``."""
    try:
        sig = inspect.signature(cls)
    except (TypeError, ValueError):  # pragma: no cover - builtins without signature
        return [], True
    names, var_kw = [], False
    for p in sig.parameters.values():
        if p.kind is p.VAR_KEYWORD:
            var_kw = True
        elif p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY):
            names.append(p.name)
    return names, var_kw


def _unknown_params(cls: type, kwargs: Mapping[str, Any]) -> list[str]:
    names, var_kw = _accepted(cls)
    if var_kw:
        return []
    return [k for k in kwargs if k not in names]


def _unknown_message(where: str, family: str, cls: type, unknown: list[str]) -> str:
    names, _ = _accepted(cls)
    close = difflib.get_close_matches(unknown[0], names, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return (
        f"{where}: family {family!r} has no parameter {unknown[0]!r}{hint}; "
        f"accepted: {', '.join(names) or '(none)'}"
    )


# -- reading files -----------------------------------------------------------
def builtin_dir() -> Path:
    """The built-in catalogue folder: ``problems/`` of the source tree, or the copy a wheel installs."""
    import benchsuite

    package = Path(benchsuite.__file__).resolve().parent
    source_tree = package.parent / "problems"
    return source_tree if source_tree.is_dir() else package / "_catalogue"


def _files(path: Path) -> list[Path]:
    if path.is_dir():
        return sorted(path.glob("*.toml"))
    if path.is_file():
        return [path]
    raise UserError(f"{path}: catalogue file or folder not found")


def _display(path: Path) -> str:
    """A path as shown in messages: relative to the current folder when inside it."""
    try:
        return str(path.resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(path)


def _type_name(value: Any) -> str:
    return {bool: "boolean", int: "integer", float: "float", str: "string", list: "array", dict: "table"}.get(
        type(value), type(value).__name__
    )


def _check_param_value(where: str, value: Any) -> None:
    if isinstance(value, dict):
        raise UserError(f"{where}: nested tables are not allowed in params (use a flat key)")
    if isinstance(value, list):
        for v in value:
            _check_param_value(where, v)
    elif not isinstance(value, (bool, int, float, str)):
        raise UserError(f"{where}: unsupported value type {_type_name(value)} (use numbers, strings, booleans, arrays)")
    elif isinstance(value, float) and not math.isfinite(value):
        raise UserError(f"{where}: value must be finite, got {value!r}")


def _parse_entry(src: str, index: int, entry: Any, origin: str = "") -> Instance:
    label = f"{src}: instance #{index + 1}"
    if not isinstance(entry, dict):
        raise UserError(f"{label}: expected a table ([[instance]]), got {_type_name(entry)}")
    name = entry.get("name")
    if isinstance(name, str) and name:
        label = f"{src}: [{name}]"
    for key in _REQUIRED:
        if key not in entry:
            raise UserError(f"{label}: missing required field {key!r}")
    for key in entry:
        if key not in _REQUIRED + _OPTIONAL:
            raise UserError(f"{label}.{key}: unknown field (allowed: {', '.join(_REQUIRED + _OPTIONAL)})")

    def want(key: str, types: tuple[type, ...], what: str) -> Any:
        value = entry[key]
        if not isinstance(value, types) or (isinstance(value, bool) and bool not in types):
            raise UserError(f"{label}.{key}: expected {what}, got {_type_name(value)} {value!r}")
        return value

    name = want("name", (str,), "a string")
    if not name.strip() or any(c.isspace() for c in name) or "," in name:
        raise UserError(f"{label}.name: {name!r} must be non-empty without spaces or commas")
    family = want("family", (str,), "a string")
    targets = want("targets", (list,), "an array of numbers")
    if not targets:
        raise UserError(f"{label}.targets: must not be empty")
    for t in targets:
        if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t) or not 0 < t < 1:
            raise UserError(
                f"{label}.targets: every target must be a number > 0 and < 1 (the measures are relative, "
                f"1 at the start), got {t!r}"
            )
    if any(b >= a for a, b in zip(targets, targets[1:])):
        raise UserError(f"{label}.targets: must be strictly decreasing, got {targets!r}")
    budget = want("budget", (int,), "an integer")
    if budget <= 0:
        raise UserError(f"{label}.budget: must be > 0, got {budget!r}")
    tier = want("tier", (str,), "a string") if "tier" in entry else "small"
    if tier not in TIERS:
        raise UserError(f"{label}.tier: unknown tier {tier!r} (one of {', '.join(TIERS)})")
    measure = want("measure", (str,), "a string") if "measure" in entry else "subopt"
    if measure not in MEASURES:
        raise UserError(f"{label}.measure: unknown measure {measure!r} (one of {', '.join(MEASURES)})")
    x_tol = float(want("x_tol", (int, float), "a number")) if "x_tol" in entry else 1e-3
    if not (math.isfinite(x_tol) and x_tol > 0):
        raise UserError(f"{label}.x_tol: must be a finite number > 0, got {x_tol!r}")
    params = want("params", (dict,), "a table ([instance.params])") if "params" in entry else {}
    for k, v in params.items():
        _check_param_value(f"{label}.params.{k}", v)
    dtype = want("dtype", (str,), "a string") if "dtype" in entry else "float64"
    if dtype not in DTYPES:
        raise UserError(f"{label}.dtype: unknown dtype {dtype!r} (one of {', '.join(DTYPES)})")

    inst = Instance(
        name=name,
        family=family,
        params=tuple(sorted((k, _freeze(v)) for k, v in params.items())),
        tier=tier,
        targets=tuple(float(t) for t in targets),
        budget=int(budget),
        measure=measure,
        x_tol=x_tol,
        source=src,
        dtype=dtype,
        catalogue=origin,
    )
    cls = inst.family_class()
    unknown = _unknown_params(cls, params)
    if unknown:
        raise UserError(_unknown_message(f"{label}.params", family, cls, unknown))
    return inst


def _read_file(path: Path, origin: str = "") -> list[Instance]:
    src = _display(path)
    try:
        with path.open("rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:  # the message carries "(at line L, column C)"
        raise UserError(f"{src}: malformed TOML: {exc}") from None
    except OSError as exc:
        raise UserError(f"{src}: cannot read: {exc.strerror}") from None
    for key in doc:
        if key != "instance":
            raise UserError(f"{src}: unknown top-level key {key!r} (entries are [[instance]] tables)")
    entries = doc.get("instance", [])
    if not isinstance(entries, list):
        raise UserError(f"{src}: 'instance' must be an array of tables ([[instance]])")
    if not entries:
        raise UserError(f"{src}: no [[instance]] table: the catalogue file defines no instance")
    return [_parse_entry(src, i, e, origin) for i, e in enumerate(entries)]


def load_catalogue(paths: Sequence[str | Path] | None = None) -> dict[str, Instance]:
    """All instances by name, in file order.

    Reads the built-in ``problems/*.toml``, then the files or folders in
    ``BENCHSUITE_CATALOGUE``, then ``paths``. A name defined twice is an error
    naming both files.
    """
    roots: list[tuple[Path, bool]] = []
    builtin = builtin_dir()
    if builtin.is_dir():
        roots.append((builtin, True))
    env = os.environ.get(ENV_VAR, "")
    roots += [(Path(p), False) for p in env.split(os.pathsep) if p.strip()]
    roots += [(Path(p), False) for p in (paths or ())]
    seen_files: set[Path] = set()
    out: dict[str, Instance] = {}
    for root, shipped in roots:
        files = _files(root)
        if not files and not shipped:
            raise UserError(f"{root}: no catalogue files (*.toml) in this folder")
        for f in files:
            key = f.resolve()
            if key in seen_files:
                continue
            seen_files.add(key)
            for inst in _read_file(f, BUILTIN if shipped else str(f)):
                if inst.name in out:
                    raise UserError(
                        f"{inst.source}: [{inst.name}].name: duplicate instance name, "
                        f"already defined in {out[inst.name].source}"
                    )
                out[inst.name] = inst
    return out


# -- selection ---------------------------------------------------------------
def _is_glob(text: str) -> bool:
    return any(c in text for c in "*?[")


def _looks_like_path(text: str) -> bool:
    return text.lower().endswith(".dat") or os.sep in text or (os.altsep is not None and os.altsep in text)


def select(
    catalogue: Mapping[str, Instance], selector: str | None = None, tier: str | None = "small",
    *, validate: bool = False, option: str = "--problems", tier_option: str = "--tier",
) -> list[Instance]:
    """Instances chosen by a selector.

    ``selector`` is a comma-separated list of instance names, ``fnmatch``
    globs (``"lsq-*,rosenbrock-2d"``) or paths to NIST StRD ``.dat`` files.
    Without a selector every instance of ``tier`` is chosen (``tier=None``:
    all tiers). Globs are restricted to ``tier`` as well; an exact name or a
    path is taken whatever its tier. Order follows the selector, without
    repeats. An unknown name raises :class:`UserError` listing close matches.
    ``validate=True`` also builds each chosen instance, so that impossible
    parameters are reported (one line, with the location) before any work.
    ``option`` and ``tier_option`` are how the caller's user gave the selector
    and the tier (``--problems`` and ``--tier`` on the command line; an
    argument name elsewhere): error messages start with them.
    """
    chosen = _select(catalogue, selector, tier, option, tier_option)
    if validate:
        for inst in chosen:
            inst.build()
    return chosen


def _select(
    catalogue: Mapping[str, Instance], selector: str | None, tier: str | None, option: str, tier_option: str
) -> list[Instance]:
    if tier is not None and tier not in TIERS:
        raise UserError(f"{tier_option}: unknown tier {tier!r} (one of {', '.join(TIERS)})")

    def in_tier(inst: Instance) -> bool:
        return tier is None or inst.tier == tier

    if selector is None or not selector.strip():
        return [i for i in catalogue.values() if in_tier(i)]
    chosen: dict[str, Instance] = {}
    for part in (p.strip() for p in selector.split(",")):
        if not part:
            continue
        if part in catalogue:
            chosen.setdefault(part, catalogue[part])
        elif _is_glob(part):
            hits = [i for n, i in catalogue.items() if fnmatch.fnmatchcase(n, part)]
            if not hits:
                raise UserError(f"{option}: {part!r} matches no instance")
            hits_tier = [i for i in hits if in_tier(i)]
            if not hits_tier:
                raise UserError(
                    f"{option}: {part!r} matches no instance of tier {tier!r} ({len(hits)} in other tiers)"
                )
            for i in hits_tier:
                chosen.setdefault(i.name, i)
        elif Path(part).is_file() or _looks_like_path(part):
            inst = instance_from_strd(part)
            chosen.setdefault(inst.name, inst)
        else:
            close = difflib.get_close_matches(part, list(catalogue), n=5, cutoff=0.5)
            hint = f"; close matches: {', '.join(close)}" if close else ""
            raise UserError(f"{option}: unknown instance {part!r}{hint}")
    return list(chosen.values())


def instance_from_strd(path: str | Path, start: int = 1) -> Instance:
    """An instance for any NIST StRD nonlinear regression file given by path.

    Family ``"nist_strd"`` with ``file = <absolute path>`` and ``start`` (1 or
    2: the file's certified starting points). The file is read here, so a
    missing file, a missing certified block or an unparseable model is
    reported at once.
    """
    p = Path(path)
    if not p.is_file():
        raise UserError(f"{path}: StRD file not found")
    if start not in (1, 2):
        raise UserError(f"{path}: start must be 1 or 2, got {start!r}")
    inst = Instance(
        name=f"{p.stem}-start{start}",
        family="nist_strd",
        params=(("file", str(p.resolve())), ("start", int(start))),
        tier="small",
        targets=_STRD_TARGETS,
        budget=_STRD_BUDGET,
        measure="subopt",
        source=str(path),
        catalogue=str(path),
    )
    inst.build()  # reads and parses the file: bad files fail here, with their location
    return inst
