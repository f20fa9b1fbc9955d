"""Naming a rule, parsing its hyperparameters, and wrapping it into the rule contract.

A rule is named by a built-in short name (``adam``, see
:data:`benchsuite.rules.BUILTIN_RULES`) or by an import path
``package.module:attribute`` (the current directory importable). Its
hyperparameters come as ``name=value`` strings (``--param lr=1e-3``) parsed
without ``eval`` by :func:`parse_param`, or as a mapping.

:func:`build_rule` turns a :class:`RuleSpec` into a :class:`BuiltRule` whose
``rule`` obeys the numpy contract ``init(x0) -> state``,
``step(x, g, state) -> (x, state)``. What the import path may point at:

* a **numpy rule**: a class or factory function called with the
  hyperparameters, returning an object with ``init`` and ``step``; or such an
  object itself. A factory may offer ``problem_defaults(constants) -> dict``
  like the built-ins; it is then used when L / mu are known;
* a **torch.optim.Optimizer subclass** (``torch.optim:Adam`` or the user's
  own): the iterate lives in a tensor that shares memory with the numpy
  array, the gradient is handed over as ``.grad`` (sharing memory), and
  ``optimizer.step()`` is called;
* an **optax-style pure transformation**: an ``(init, update)`` pair, either
  an object with ``init(params) -> state`` and
  ``update(updates, state, params) -> (updates, state)`` attributes or a plain
  tuple of those two functions (or a factory returning either, e.g.
  ``optax:adam`` with ``learning_rate=...``);
  the returned updates are **added** to x (optax's convention: updates
  already carry the minus sign). For float64 with jax, enable ``jax_enable_x64``;
* a **plain function** ``step(x, g, state, t) -> (x, state)`` with exactly
  four required positional parameters: ``state`` starts as ``None``, ``t``
  counts steps from 1; extra keyword parameters are its hyperparameters.

Example of a numpy rule (a user's module ``myrules.py``)::

    class SignDescent:
        def __init__(self, lr=1e-2):
            self.lr = lr
        def init(self, x0):
            return None
        def step(self, x, g, state):
            x -= self.lr * np.sign(g)
            return x, state

    benchsuite run --rule myrules:SignDescent --param lr=0.05

Mistakes (unknown name, unknown hyperparameter, a factory that produces no
``init``/``step``, a step returning the wrong shape or dtype) raise one
:class:`~benchsuite.errors.UserError` naming the rule. The contract of the
returned step is checked by :meth:`BuiltRule.check_step`, which the runner
calls on the first step only (the hot path stays unchecked).
"""

from __future__ import annotations

import difflib
import inspect
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from benchsuite.errors import UserError
from benchsuite.imports import is_import_path, load_object
from benchsuite.problem import Constants
from benchsuite.rules import BUILTIN_RULES

__all__ = [
    "RuleSpec",
    "BuiltRule",
    "BUILTIN_RULES",
    "parse_param",
    "parse_value",
    "format_value",
    "parse_rule",
    "build_rule",
    "check_step",
]

_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
_INT = re.compile(r"[+-]?\d+\Z")
_FLOAT = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?\Z|[+-]?inf\Z", re.IGNORECASE)
_WORD = re.compile(r"[A-Za-z_][A-Za-z0-9_.\-]*\Z")


# -- values ----------------------------------------------------------------------
def _number(text: str) -> int | float | None:
    if _INT.match(text):
        return int(text)
    if _FLOAT.match(text):
        return float(text)
    return None


def parse_value(text: str) -> Any:
    """A hyperparameter value from text, without ``eval``.

    ``true``/``false`` -> bool; ``3`` -> int; ``1e-3``, ``.5``, ``inf`` ->
    float; ``0.9,0.999`` -> tuple of numbers; a bare word (``constant``,
    ``t_k``) -> str. Anything else (empty, NaN, quotes, spaces, brackets) ->
    ValueError.
    """
    t = text.strip()
    low = t.lower()
    if low in ("true", "false"):
        return low == "true"
    num = _number(t)
    if num is not None:
        return num
    if "," in t:
        parts = [_number(p.strip()) for p in t.split(",")]
        if all(p is not None for p in parts):
            return tuple(parts)
        raise ValueError(f"{text!r} is not a comma-separated list of numbers")
    if _WORD.match(t) and low not in ("nan", "+nan", "-nan"):
        return t
    raise ValueError(f"{text!r} is not a number, true/false, a list of numbers or a plain word")


def format_value(value: Any) -> str:
    """Inverse of :func:`parse_value` (``parse_value(format_value(v)) == v``)."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (tuple, list)):
        return ",".join(format_value(v) for v in value)
    if isinstance(value, float):
        return repr(value)
    return str(value)


def parse_param(text: str) -> tuple[str, Any]:
    """``"lr=1e-3"`` -> ``("lr", 0.001)``; UserError on anything malformed."""
    name, sep, raw = str(text).partition("=")
    name = name.strip()
    if not sep or not _NAME.match(name):
        raise UserError(f"--param {text!r}: expected name=value with an identifier name (e.g. lr=1e-3)")
    try:
        return name, parse_value(raw)
    except ValueError as exc:
        raise UserError(f"--param {text!r}: {exc}") from None


# -- spec ------------------------------------------------------------------------
@dataclass(frozen=True)
class RuleSpec:
    """A rule name (built-in or ``package.module:attr``) and the user's hyperparameters."""

    name: str
    params: tuple[tuple[str, Any], ...] = ()

    @property
    def label(self) -> str:
        """``adam`` or ``adam(lr=0.01)``: name and user-given hyperparameters."""
        if not self.params:
            return self.name
        return f"{self.name}({', '.join(f'{k}={format_value(v)}' for k, v in self.params)})"

    def params_dict(self) -> dict[str, Any]:
        return dict(self.params)


def _freeze(value: Any) -> Any:
    return tuple(value) if isinstance(value, list) else value


def _close(name: str) -> str:
    near = difflib.get_close_matches(name, BUILTIN_RULES, n=3)
    hint = f"; did you mean {', '.join(near)}?" if near else ""
    return f"built-in: {', '.join(BUILTIN_RULES)}; or give package.module:attribute{hint}"


def parse_rule(name: str, params: Sequence[str] | Mapping[str, Any] = ()) -> RuleSpec:
    """A validated :class:`RuleSpec`: the name resolves, params parse, no duplicates."""
    name = str(name).strip()
    if name not in BUILTIN_RULES:
        if not is_import_path(name):
            raise UserError(f"unknown rule {name!r} ({_close(name)})")
        load_object(name, what="rule")
    items: list[tuple[str, Any]] = []
    if isinstance(params, Mapping):
        for k, v in params.items():
            if not isinstance(k, str) or not _NAME.match(k):
                raise UserError(f"rule {name}: hyperparameter name {k!r} is not an identifier")
            items.append((k, _freeze(v)))
    else:
        if isinstance(params, str):
            params = [params]
        items = [parse_param(p) for p in params]
    seen: set[str] = set()
    for k, _ in items:
        if k in seen:
            raise UserError(f"rule {name}: hyperparameter {k!r} given twice")
        seen.add(k)
    return RuleSpec(name, tuple(sorted(items)))


# -- the built rule ----------------------------------------------------------------
def check_step(label: str, result: Any, shape: tuple[int, ...], dtype: np.dtype) -> tuple[np.ndarray, Any]:
    """Check what a step returned: ``(x, state)`` with ``x`` of ``shape`` / ``dtype``.

    Raises UserError naming the rule. Cheap, but meant for the first step only.
    """
    if not isinstance(result, tuple) or len(result) != 2:
        got = f"a tuple of length {len(result)}" if isinstance(result, tuple) else type(result).__name__
        raise UserError(f"rule {label}: step must return a tuple (x, state), got {got}")
    x = result[0]
    if not isinstance(x, np.ndarray):
        raise UserError(f"rule {label}: step must return x as a numpy array, got {type(x).__name__}")
    if x.shape != tuple(shape):
        raise UserError(f"rule {label}: step returned x of shape {x.shape}, expected {tuple(shape)}")
    if x.dtype != np.dtype(dtype):
        raise UserError(f"rule {label}: step returned x of dtype {x.dtype}, expected {np.dtype(dtype)}")
    return x, result[1]


@dataclass(frozen=True)
class BuiltRule:
    """A rule ready to run: the contract object, every hyperparameter used, a label."""

    rule: Any
    hyperparams: dict[str, Any]
    label: str
    dtype: np.dtype = field(default=np.dtype(np.float64))

    def check_step(self, result: Any, shape: tuple[int, ...]) -> tuple[np.ndarray, Any]:
        """:func:`check_step` with this rule's label and dtype (call on the first step)."""
        return check_step(self.label, result, shape, self.dtype)


def _accepted(fn: Callable[..., Any], skip: int = 0) -> tuple[dict[str, Any], bool]:
    """Keyword parameters of ``fn`` (after ``skip`` leading ones) with defaults; and whether **kwargs."""
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return {}, True
    params = list(sig.parameters.values())[skip:]
    var_kw = any(p.kind is p.VAR_KEYWORD for p in params)
    out = {
        p.name: (None if p.default is p.empty else p.default)
        for p in params
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
    }
    return out, var_kw


def _check_names(label: str, given: Mapping[str, Any], accepted: Mapping[str, Any], var_kw: bool) -> None:
    unknown = sorted(set(given) - set(accepted))
    if unknown and not var_kw:
        ok = ", ".join(accepted) or "none"
        raise UserError(f"rule {label}: unknown hyperparameter(s) {', '.join(unknown)} (accepted: {ok})")


def _kind(value: Any) -> str | None:
    """The kind of a hyperparameter value a user can give: what :func:`parse_value` produces."""
    if isinstance(value, (bool, np.bool_)):
        return "true/false"
    if isinstance(value, (int, float, np.integer, np.floating)):
        return "a number"
    if isinstance(value, str):
        return "a word"
    if isinstance(value, (tuple, list)):
        return "a list of numbers" if all(_kind(v) == "a number" for v in value) else None
    return None  # anything else (None, callables, objects): the factory's own business


def _check_types(name: str, given: Mapping[str, Any], defaults: Mapping[str, Any]) -> None:
    """Each given value is of the kind of the factory's default for that keyword.

    ``--param lr=fast`` for ``lr=1e-3`` is a UserError naming the rule, the
    hyperparameter and the value. Checked: a number, true/false, a list of
    numbers. Not checked: keywords without a default, a default of ``None``
    or of an unusual type, and a word default (``lr="auto"`` often means
    "derive it", and a number is a legitimate override).
    """
    for key, value in given.items():
        want = _kind(defaults.get(key))
        if want in (None, "a word") or _kind(value) == want:
            continue
        default = format_value(_plain(defaults[key]))
        got = format_value(_plain(value)) if _kind(value) not in (None, "a word") else repr(value)
        raise UserError(f"rule {name}: hyperparameter {key} must be {want} like its default {default}, got {got}")


def _plain(value: Any) -> Any:
    """Hyperparameter values as plain Python (numbers, bools, strings, tuples) for records."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (list, tuple)):
        return tuple(_plain(v) for v in value)
    return value


def build_rule(spec: RuleSpec, constants: Constants | None = None, dtype: Any = np.float64) -> BuiltRule:
    """Resolve ``spec`` into a :class:`BuiltRule` obeying the numpy contract.

    Hyperparameters: the factory's defaults, then problem-aware defaults from
    ``constants`` (built-ins, or a factory with ``problem_defaults``), then the
    user's ``spec.params``. ``dtype`` is the problem's working precision
    (the torch adapter's tensor dtype; checked by :meth:`BuiltRule.check_step`).
    """
    dt = np.dtype(dtype)
    label = spec.label
    user = spec.params_dict()
    if spec.name in BUILTIN_RULES:
        cls = BUILTIN_RULES[spec.name]
        accepted = cls.defaults()
        _check_names(label, user, accepted, False)
        hp = {**accepted, **cls.problem_defaults(constants), **user}
        try:
            rule = cls(**hp)
        except ValueError as exc:
            raise UserError(f"rule {label}: {exc}") from None
        return BuiltRule(rule, {k: _plain(v) for k, v in rule.hyperparams.items()}, label, dt)
    if not is_import_path(spec.name):
        raise UserError(f"unknown rule {spec.name!r} ({_close(spec.name)})")
    obj = load_object(spec.name, what="rule")
    rule, hp = _wrap(obj, label, user, constants, dt, spec.name)
    return BuiltRule(rule, {k: _plain(v) for k, v in hp.items()}, label, dt)


def _is_torch_optimizer(obj: Any) -> bool:
    """True for a torch.optim.Optimizer subclass; imports torch only if the MRO says so."""
    if not isinstance(obj, type):
        return False
    if not any(c.__name__ == "Optimizer" and c.__module__.startswith("torch.") for c in obj.__mro__):
        return False
    import torch

    return issubclass(obj, torch.optim.Optimizer)


def _is_plain_step(obj: Any) -> bool:
    """A function with exactly four required positional parameters (x, g, state, t)."""
    if isinstance(obj, type) or not callable(obj):
        return False
    try:
        sig = inspect.signature(obj)
    except (TypeError, ValueError):
        return False
    required = [
        p
        for p in sig.parameters.values()
        if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD) and p.default is p.empty
    ]
    return len(required) == 4


def _pair_functions(obj: Any) -> tuple[Callable[..., Any], Callable[..., Any]] | None:
    """``(init, update)`` of an optax-style pair: attributes, or a plain 2-tuple of functions."""
    if callable(getattr(obj, "init", None)) and callable(getattr(obj, "update", None)):
        return obj.init, obj.update
    if isinstance(obj, tuple) and len(obj) == 2 and all(callable(f) for f in obj):
        return obj[0], obj[1]
    return None


def _contract(obj: Any) -> str | None:
    if callable(getattr(obj, "init", None)) and callable(getattr(obj, "step", None)):
        return "numpy"
    if _pair_functions(obj) is not None:
        return "pair"
    return None


def _wrap(
    obj: Any, label: str, user: dict[str, Any], constants: Constants | None, dt: np.dtype, name: str = ""
) -> tuple[Any, dict[str, Any]]:
    """(contract object, hyperparameters used) for whatever an import path gave."""
    name = name or label
    if _is_torch_optimizer(obj):
        accepted, var_kw = _accepted(obj.__init__, skip=2)
        _check_names(label, user, accepted, var_kw)
        _check_types(name, user, accepted)
        rule = TorchOptimizerRule(obj, user, dt, label)
        return rule, {**accepted, **user}
    kind = None if (isinstance(obj, type) or inspect.isroutine(obj)) else _contract(obj)
    if kind is not None:  # a ready object: nothing to configure
        if user:
            raise UserError(f"rule {label}: {type(obj).__name__} object takes no hyperparameters (give its factory)")
        return (obj if kind == "numpy" else PairRule(obj, label)), {}
    if not callable(obj):
        raise UserError(
            f"rule {label}: {type(obj).__name__} is neither a factory nor an object with init/step "
            "nor an (init, update) pair"
        )
    if _is_plain_step(obj):
        accepted, var_kw = _accepted(obj, skip=4)
        _check_names(label, user, accepted, var_kw)
        _check_types(name, user, accepted)
        return FunctionRule(obj, user, label), {**accepted, **user}
    accepted, var_kw = _accepted(obj.__init__ if isinstance(obj, type) else obj, skip=1 if isinstance(obj, type) else 0)
    _check_names(label, user, accepted, var_kw)
    _check_types(name, user, accepted)
    aware = getattr(obj, "problem_defaults", None)
    derived = dict(aware(constants)) if callable(aware) and constants is not None else {}
    kwargs = {**{k: v for k, v in derived.items() if k in accepted or var_kw}, **user}
    try:
        made = obj(**kwargs)
    except (TypeError, ValueError) as exc:
        raise UserError(f"rule {label}: the factory raised {type(exc).__name__}: {exc}") from None
    kind = _contract(made)
    if kind is None:
        raise UserError(
            f"rule {label}: the factory returned {type(made).__name__}, which has no init/step "
            "(numpy rule) and is no (init, update) pair (an object with .init/.update or a tuple of two functions)"
        )
    hp = {**{k: v for k, v in accepted.items() if v is not None}, **kwargs}
    if kind == "pair":
        return PairRule(made, label), hp
    return made, hp


# -- adapters ---------------------------------------------------------------------
class TorchOptimizerRule:
    """A torch.optim.Optimizer subclass behind the numpy contract.

    ``init`` puts x0 into a tensor of the problem's dtype (float64/float32)
    and creates the optimizer on it; ``step`` writes the gradient to ``.grad``
    (a tensor sharing memory with ``g``), calls ``optimizer.step()`` and
    returns the numpy view of the tensor. When the runner hands that same
    array back, nothing is copied. The first step runs with torch's default
    dtype set to the problem's, because torch keeps scalar state (step
    counters, NAdam's momentum product) in the default dtype.
    """

    def __init__(self, cls: type, params: dict[str, Any], dtype: np.dtype, label: str) -> None:
        import torch

        self.cls, self.params, self.dtype, self.label = cls, dict(params), dtype, label
        self._torch = torch
        try:  # validate the hyperparameters now, on a one-element tensor
            cls([torch.zeros(1, dtype=self._tdtype)], **self.params)
        except (TypeError, ValueError) as exc:
            raise UserError(f"rule {label}: torch.optim {cls.__name__} rejected the hyperparameters: {exc}") from None

    @property
    def _tdtype(self) -> Any:
        return self._torch.float32 if self.dtype == np.float32 else self._torch.float64

    def init(self, x0: np.ndarray) -> dict[str, Any]:
        arr = np.array(x0, dtype=self.dtype, order="C", copy=True)
        p = self._torch.from_numpy(arr)
        return {"p": p, "x": arr, "opt": self.cls([p], **self.params), "fresh": True}

    def step(self, x: np.ndarray, g: np.ndarray, state: dict[str, Any]) -> tuple[np.ndarray, dict[str, Any]]:
        arr, p = state["x"], state["p"]
        if x is not arr:
            np.copyto(arr, x)
        if g.dtype != self.dtype or not g.flags.c_contiguous:
            g = np.ascontiguousarray(g, dtype=self.dtype)
        p.grad = self._torch.from_numpy(g)
        if state["fresh"]:  # optimizers create their state on the first step: scalar state in our dtype
            old = self._torch.get_default_dtype()
            self._torch.set_default_dtype(self._tdtype)
            try:
                state["opt"].step()
            finally:
                self._torch.set_default_dtype(old)
            state["fresh"] = False
        else:
            state["opt"].step()
        p.grad = None
        return arr, state


class PairRule:
    """An optax-style ``(init, update)`` pure transformation behind the numpy contract.

    ``transform`` is an object with ``.init`` and ``.update`` (optax's
    ``GradientTransformation``) or a plain tuple ``(init, update)``.
    ``x <- x + updates`` where ``updates, state = update(g, state, x)``.
    """

    def __init__(self, transform: Any, label: str) -> None:
        fns = _pair_functions(transform)
        if fns is None:
            raise UserError(f"rule {label}: expected an (init, update) pair, got {type(transform).__name__}")
        self.transform, self.label = transform, label
        self._init, self._update = fns

    def init(self, x0: np.ndarray) -> Any:
        return self._init(x0)

    def step(self, x: np.ndarray, g: np.ndarray, state: Any) -> tuple[np.ndarray, Any]:
        out = self._update(g, state, x)
        if not isinstance(out, tuple) or len(out) != 2:
            raise UserError(f"rule {self.label}: update must return (updates, state), got {type(out).__name__}")
        u = np.asarray(out[0])
        if u.shape != x.shape:
            raise UserError(f"rule {self.label}: update returned updates of shape {u.shape}, expected {x.shape}")
        np.add(x, u, out=x, casting="same_kind")
        return x, out[1]


class FunctionRule:
    """A plain function ``step(x, g, state, t) -> (x, state)`` behind the numpy contract.

    The wrapped state is ``(user_state, t)``; ``user_state`` starts as None
    and ``t`` counts steps from 1. Extra hyperparameters are passed as keywords.
    """

    def __init__(self, fn: Callable[..., Any], params: dict[str, Any], label: str) -> None:
        self.fn, self.params, self.label = fn, dict(params), label

    def init(self, x0: np.ndarray) -> tuple[Any, int]:
        return (None, 0)

    def step(self, x: np.ndarray, g: np.ndarray, state: tuple[Any, int]) -> tuple[np.ndarray, tuple[Any, int]]:
        t = state[1] + 1
        out = self.fn(x, g, state[0], t, **self.params)
        if not isinstance(out, tuple) or len(out) != 2:
            raise UserError(f"rule {self.label}: step function must return (x, state), got {type(out).__name__}")
        return out[0], (out[1], t)
