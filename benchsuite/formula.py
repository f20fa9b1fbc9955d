"""Safe parser and exact differentiation of NIST StRD model formulas.

A model such as ``b1*(1-exp[-b2*x])`` is read by a tokenizer and a
recursive-descent parser into a tree of frozen dataclass nodes; nothing is
ever handed to ``eval``/``exec``/``compile``. The grammar (Python/Fortran
precedence, ``**`` right-associative and binding tighter than a unary sign,
so ``-x**2 = -(x**2)`` and ``2**-x = 2**(-x)``)::

    expr   := term  (('+' | '-') term)*
    term   := factor (('*' | '/') factor)*
    factor := ('+' | '-') factor | power
    power  := atom ['**' factor]
    atom   := NUMBER | PARAM | VAR | CONST | FUNC '(' expr ')' | '(' expr ')' | '[' expr ']'

Names: parameters ``b<digits>`` (``b1`` ... ``bk``), predictors ``x`` and
``x<digits>``, the response ``y`` (only where ``allow_response`` is set, for a
transformed left-hand side such as ``log[y]``), the constant ``pi`` plus any
constants given by the caller, and the functions ``exp``, ``sin``, ``cos``,
``arctan`` (alias ``atan``), ``log`` (natural) and ``sqrt``. Square brackets
are parentheses. Anything else raises ``ValueError`` stating the character
position, which the file reader turns into a file and line.

Evaluation is vectorised over the data (numpy arrays, one per predictor) and
works for complex input too (so a complex-step check can be run on it).
:func:`value_and_jacobian` gives the model and its **exact** Jacobian with
respect to the parameters by forward-mode differentiation: every node carries
its value and its gradient array (``None`` where the node does not depend on
any parameter), combined by the chain rule below.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = [
    "Node",
    "Num",
    "Param",
    "Var",
    "Const",
    "Neg",
    "BinOp",
    "Call",
    "FUNCTIONS",
    "parse",
    "to_text",
    "params_used",
    "vars_used",
    "evaluate",
    "value_and_jacobian",
    "BoundModel",
]

#: function name -> canonical name (``atan`` is an alias of ``arctan``)
FUNCTIONS: dict[str, str] = {
    "exp": "exp",
    "sin": "sin",
    "cos": "cos",
    "arctan": "arctan",
    "atan": "arctan",
    "log": "log",
    "sqrt": "sqrt",
}


# -- tree ---------------------------------------------------------------------
@dataclass(frozen=True)
class Num:
    """A non-negative numeric literal (a sign is a :class:`Neg` node)."""

    value: float


@dataclass(frozen=True)
class Param:
    """Parameter ``b<index>``; ``index`` is as written (``b1`` -> 1)."""

    index: int


@dataclass(frozen=True)
class Var:
    """A data column by name: ``x``, ``x1``, ``x2``, ... (or ``y`` on a left-hand side)."""

    name: str


@dataclass(frozen=True)
class Const:
    """A named constant such as ``pi``, with its value."""

    name: str
    value: float


@dataclass(frozen=True)
class Neg:
    """Unary minus."""

    operand: Node


@dataclass(frozen=True)
class BinOp:
    """``left op right`` with ``op`` one of ``+ - * / **``."""

    op: str
    left: Node
    right: Node


@dataclass(frozen=True)
class Call:
    """``func(arg)`` with ``func`` a canonical name from :data:`FUNCTIONS`."""

    func: str
    arg: Node


Node = Num | Param | Var | Const | Neg | BinOp | Call


# -- tokenizer ------------------------------------------------------------------
_TOKEN = re.compile(
    r"""
    (?P<ws>\s+)
  | (?P<num>(?:\d+\.?\d*|\.\d+)(?:[eEdD][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z_0-9]*)
  | (?P<op>\*\*|[-+*/()\[\]])
    """,
    re.VERBOSE,
)


@dataclass(frozen=True)
class _Tok:
    kind: str  # "num" | "name" | "op" | "end"
    text: str
    pos: int


def _tokenize(text: str) -> list[_Tok]:
    tokens: list[_Tok] = []
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            raise ValueError(f"unexpected character {text[pos]!r} at position {pos}")
        kind = m.lastgroup
        if kind != "ws":
            tokens.append(_Tok(kind, m.group(), pos))
        pos = m.end()
    tokens.append(_Tok("end", "", len(text)))
    return tokens


_PARAM = re.compile(r"b(\d+)\Z")
_VAR = re.compile(r"x\d*\Z")


class _Parser:
    def __init__(self, text: str, constants: Mapping[str, float], allow_response: bool) -> None:
        self.text = text
        self.tokens = _tokenize(text)
        self.i = 0
        self.constants = constants
        self.allow_response = allow_response

    @property
    def tok(self) -> _Tok:
        return self.tokens[self.i]

    def fail(self, what: str, tok: _Tok | None = None) -> ValueError:
        tok = tok or self.tok
        found = "end of formula" if tok.kind == "end" else repr(tok.text)
        return ValueError(f"{what}, found {found} at position {tok.pos}")

    def take(self, text: str) -> bool:
        if self.tok.kind == "op" and self.tok.text == text:
            self.i += 1
            return True
        return False

    def parse(self) -> Node:
        node = self.expr()
        if self.tok.kind != "end":
            if self.tok.text in (")", "]"):
                raise self.fail("unbalanced closing bracket")
            raise self.fail("expected an operator or the end of the formula")
        return node

    def expr(self) -> Node:
        node = self.term()
        while self.tok.kind == "op" and self.tok.text in ("+", "-"):
            op = self.tok.text
            self.i += 1
            node = BinOp(op, node, self.term())
        return node

    def term(self) -> Node:
        node = self.factor()
        while self.tok.kind == "op" and self.tok.text in ("*", "/"):
            op = self.tok.text
            self.i += 1
            node = BinOp(op, node, self.factor())
        return node

    def factor(self) -> Node:
        if self.take("-"):
            return Neg(self.factor())
        if self.take("+"):
            return self.factor()
        return self.power()

    def power(self) -> Node:
        base = self.atom()
        if self.take("**"):
            return BinOp("**", base, self.factor())
        return base

    def bracketed(self, open_tok: _Tok) -> Node:
        close = ")" if open_tok.text == "(" else "]"
        node = self.expr()
        if not self.take(close):
            if self.tok.kind == "end":
                raise ValueError(f"unbalanced {open_tok.text!r} opened at position {open_tok.pos}: missing {close!r}")
            raise self.fail(f"expected {close!r} to close {open_tok.text!r} opened at position {open_tok.pos}")
        return node

    def atom(self) -> Node:
        tok = self.tok
        if tok.kind == "num":
            self.i += 1
            return Num(float(tok.text.replace("d", "e").replace("D", "e")))
        if tok.kind == "op" and tok.text in ("(", "["):
            self.i += 1
            return self.bracketed(tok)
        if tok.kind == "name":
            self.i += 1
            name = tok.text
            if name in FUNCTIONS:
                nxt = self.tok
                if not (nxt.kind == "op" and nxt.text in ("(", "[")):
                    raise self.fail(f"function {name!r} needs a bracketed argument")
                self.i += 1
                return Call(FUNCTIONS[name], self.bracketed(nxt))
            m = _PARAM.match(name)
            if m:
                return Param(int(m.group(1)))
            if _VAR.match(name) or (self.allow_response and name == "y"):
                return Var(name)
            if name in self.constants:
                return Const(name, float(self.constants[name]))
            if self.tok.kind == "op" and self.tok.text in ("(", "["):
                raise ValueError(f"unknown function {name!r} at position {tok.pos}")
            raise ValueError(f"unknown name {name!r} at position {tok.pos}")
        raise self.fail("expected a number, a name or a bracket")


def parse(text: str, constants: Mapping[str, float] | None = None, *, allow_response: bool = False) -> Node:
    """Parse a model formula into a tree; ``ValueError`` naming the position on junk.

    ``constants`` adds named constants to ``pi`` (a file may define its own
    ``pi``, which then takes precedence). ``allow_response`` admits the
    response name ``y`` (for a left-hand side such as ``log[y]``).
    """
    consts: dict[str, float] = {"pi": math.pi}
    if constants:
        consts.update(constants)
    return _Parser(text, consts, allow_response).parse()


# -- printing ---------------------------------------------------------------------
_ATOM = 5


def _prec(node: Node) -> int:
    if isinstance(node, BinOp):
        return {"+": 1, "-": 1, "*": 2, "/": 2, "**": 4}[node.op]
    if isinstance(node, Neg):
        return 3
    return _ATOM


def _wrap(node: Node, bracket: bool) -> str:
    s = to_text(node)
    return f"({s})" if bracket else s


def to_text(node: Node) -> str:
    """The formula as text with only the brackets the grammar needs.

    ``parse(to_text(t), ...) == t`` for every tree the parser can produce
    (numbers print with ``repr``, which round-trips a float exactly).
    """
    if isinstance(node, Num):
        v = node.value
        return str(int(v)) if v.is_integer() and v < 1e15 else repr(v)
    if isinstance(node, Param):
        return f"b{node.index}"
    if isinstance(node, Var):
        return node.name
    if isinstance(node, Const):
        return node.name
    if isinstance(node, Call):
        return f"{node.func}({to_text(node.arg)})"
    if isinstance(node, Neg):
        return "-" + _wrap(node.operand, _prec(node.operand) < 3)
    if isinstance(node, BinOp):
        p = _prec(node)
        if node.op == "**":
            # power := atom ['**' factor]: the base must be an atom, the exponent a factor
            return f"{_wrap(node.left, _prec(node.left) < _ATOM)} ** {_wrap(node.right, _prec(node.right) < 3)}"
        # left-associative: equal precedence on the right needs brackets
        return f"{_wrap(node.left, _prec(node.left) < p)} {node.op} {_wrap(node.right, _prec(node.right) <= p)}"
    raise TypeError(f"not a formula node: {node!r}")


# -- inspection --------------------------------------------------------------------
def _walk(node: Node):
    yield node
    if isinstance(node, Neg):
        yield from _walk(node.operand)
    elif isinstance(node, BinOp):
        yield from _walk(node.left)
        yield from _walk(node.right)
    elif isinstance(node, Call):
        yield from _walk(node.arg)


def params_used(node: Node) -> frozenset[int]:
    """Indices of the parameters the formula uses."""
    return frozenset(n.index for n in _walk(node) if isinstance(n, Param))


def vars_used(node: Node) -> frozenset[str]:
    """Names of the data columns the formula uses."""
    return frozenset(n.name for n in _walk(node) if isinstance(n, Var))


# -- evaluation and forward-mode derivatives ------------------------------------------
_FUNC_VALUE = {
    "exp": np.exp,
    "sin": np.sin,
    "cos": np.cos,
    "arctan": np.arctan,
    "log": np.log,
    "sqrt": np.sqrt,
}

#: values of parameter-free subtrees, by ``id`` of the node (see :class:`BoundModel`)
_Folded = Mapping[int, Any]


def _data(data: Mapping[str, np.ndarray], name: str) -> np.ndarray:
    try:
        return np.asarray(data[name])
    except KeyError:
        raise ValueError(f"the formula uses {name!r} but the data has only {sorted(data)}") from None


def _param(b: np.ndarray, index: int):
    if not 1 <= index <= len(b):
        raise ValueError(f"the formula uses b{index} but only b1..b{len(b)} are given")
    return b[index - 1]


def _apply(op: str, left, right):
    if op == "+":
        return left + right
    if op == "-":
        return left - right
    if op == "*":
        return left * right
    if op == "/":
        return left / right
    return np.power(left, right)


def _eval(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray], folded: _Folded):
    if id(node) in folded:
        return folded[id(node)]
    if isinstance(node, Num | Const):
        return np.float64(node.value)  # numpy scalar: x/0 gives inf, as on arrays, not ZeroDivisionError
    if isinstance(node, Param):
        return _param(b, node.index)
    if isinstance(node, Var):
        return _data(data, node.name)
    if isinstance(node, Neg):
        return -_eval(node.operand, b, data, folded)
    if isinstance(node, Call):
        return _FUNC_VALUE[node.func](_eval(node.arg, b, data, folded))
    return _apply(node.op, _eval(node.left, b, data, folded), _eval(node.right, b, data, folded))


def _length(data: Mapping[str, np.ndarray]) -> int:
    sizes = {np.shape(v)[0] if np.ndim(v) else 1 for v in data.values()}
    if len(sizes) > 1:
        raise ValueError(f"data columns differ in length: {sorted(sizes)}")
    return sizes.pop() if sizes else 1


def evaluate(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray]) -> np.ndarray:
    """The formula at parameters ``b`` (``b[0]`` is ``b1``) over the data columns.

    Returns an array of shape ``(m,)`` (``m`` = length of the columns); works
    for real and complex ``b``/data. Floating-point exceptions are silenced:
    overflow or a domain error gives ``inf``/``nan`` in the result.
    """
    return BoundModel(node, data, fold=False).evaluate(b)


# Forward mode with sparse gradients: a node's gradient is a dict
# {parameter position: d node / d b_j} holding only the parameters the subtree
# uses (each entry a scalar or an (m,) array); {} for a parameter-free node.
_Grad = dict[int, Any]


def _scale(g: _Grad, factor) -> _Grad:
    return {j: factor * v for j, v in g.items()}


def _add(g: _Grad, h: _Grad, sign: float = 1.0) -> _Grad:
    out = dict(g)
    for j, v in h.items():
        out[j] = out[j] + sign * v if j in out else sign * v
    return out


def _forward(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray], folded: _Folded):
    """(value, sparse gradient) of a node; see :func:`value_and_jacobian` for the rules."""
    if id(node) in folded:
        return folded[id(node)], {}
    if isinstance(node, Num | Const):
        return np.float64(node.value), {}
    if isinstance(node, Param):
        return _param(b, node.index), {node.index - 1: 1.0}
    if isinstance(node, Var):
        return _data(data, node.name), {}
    if isinstance(node, Neg):
        v, g = _forward(node.operand, b, data, folded)
        return -v, _scale(g, -1.0)
    if isinstance(node, Call):
        a, ga = _forward(node.arg, b, data, folded)
        v = _FUNC_VALUE[node.func](a)
        if not ga:
            return v, {}
        if node.func == "exp":
            d = v
        elif node.func == "sin":
            d = np.cos(a)
        elif node.func == "cos":
            d = -np.sin(a)
        elif node.func == "arctan":
            d = 1.0 / (1.0 + a * a)
        elif node.func == "log":
            d = 1.0 / a
        else:  # sqrt
            d = 0.5 / v
        return v, _scale(ga, d)
    a, ga = _forward(node.left, b, data, folded)
    c, gc = _forward(node.right, b, data, folded)
    op = node.op
    v = _apply(op, a, c)
    if not ga and not gc:
        return v, {}
    if op == "+":
        return v, _add(ga, gc)
    if op == "-":
        return v, _add(ga, gc, -1.0)
    if op == "*":
        return v, _add(_scale(ga, c), _scale(gc, a))
    if op == "/":
        # d(a/c) = (da - v dc) / c
        inv = 1.0 / c
        return v, _add(_scale(ga, inv), _scale(gc, -v * inv))
    # a ** c: d = c a**(c-1) da + a**c log(a) dc
    g = _scale(ga, c * np.power(a, c - 1.0)) if ga else {}
    if gc:
        g = _add(g, _scale(gc, v * np.log(a)))
    return v, g


def value_and_jacobian(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The model values ``(m,)`` and the exact Jacobian ``d model / d b`` ``(m, k)``.

    Forward mode: each node carries its value and its gradient with respect
    to the parameters its subtree uses; sums add gradients, products and
    quotients use the product and quotient rules, ``a**c`` gives
    ``c a**(c-1) da + a**c log(a) dc`` (the second term only where the
    exponent depends on ``b``), and the functions their derivatives
    (``exp' = exp``, ``sin' = cos``, ``cos' = -sin``, ``arctan' = 1/(1+a^2)``,
    ``log' = 1/a``, ``sqrt' = 1/(2 sqrt a)``). Columns of parameters the
    formula does not use are zero.
    """
    return BoundModel(node, data, fold=False).value_and_jacobian(b)


def _fold(node: Node, data: Mapping[str, np.ndarray], out: dict[int, Any]) -> bool:
    """Record the values of maximal parameter-free subtrees in ``out``; True if ``node`` is one."""
    if isinstance(node, Param):
        return False
    if isinstance(node, Num | Const | Var):
        free = True
    elif isinstance(node, Neg):
        free = _fold(node.operand, data, out)
    elif isinstance(node, Call):
        free = _fold(node.arg, data, out)
    else:
        left, right = _fold(node.left, data, out), _fold(node.right, data, out)
        free = left and right
    if free and isinstance(node, Neg | Call | BinOp):
        for child in (getattr(node, "operand", None), getattr(node, "arg", None), getattr(node, "left", None), getattr(node, "right", None)):
            out.pop(id(child), None)  # keep only the largest parameter-free subtree
        out[id(node)] = _eval(node, np.zeros(0), data, {})
    return free


class BoundModel:
    """A formula bound to its data columns, for repeated evaluation.

    With ``fold=True`` the parameter-free subtrees (such as ``cos(2*pi*x/12)``
    in ENSO) are evaluated once here, at binding time, instead of on every
    call. ``rows`` restricts an evaluation to some observations (a minibatch).
    """

    def __init__(self, node: Node, data: Mapping[str, np.ndarray], fold: bool = True) -> None:
        self.node = node
        self.data = {k: np.asarray(v) for k, v in data.items()}
        self.m = _length(self.data)
        self.folded: dict[int, Any] = {}
        if fold:
            with np.errstate(all="ignore"):
                _fold(node, self.data, self.folded)

    def _at(self, rows) -> tuple[Mapping[str, np.ndarray], _Folded, int]:
        if rows is None:
            return self.data, self.folded, self.m
        data = {k: v[rows] for k, v in self.data.items()}
        folded = {i: (v[rows] if np.ndim(v) else v) for i, v in self.folded.items()}
        return data, folded, _length(data)

    def evaluate(self, b: np.ndarray, rows: np.ndarray | slice | None = None) -> np.ndarray:
        """Model values ``(m,)`` at ``b`` (see :func:`evaluate`)."""
        b = np.asarray(b)
        data, folded, m = self._at(rows)
        with np.errstate(all="ignore"):
            v = _eval(self.node, b, data, folded)
            return np.broadcast_to(np.asarray(v), (m,)).copy()

    def value_and_jacobian(self, b: np.ndarray, rows: np.ndarray | slice | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Model values ``(m,)`` and exact Jacobian ``(m, k)`` (see :func:`value_and_jacobian`)."""
        b = np.asarray(b)
        data, folded, m = self._at(rows)
        with np.errstate(all="ignore"):
            v, g = _forward(self.node, b, data, folded)
            v = np.broadcast_to(np.asarray(v), (m,)).copy()
        J = np.zeros((m, len(b)), dtype=np.result_type(b, v, np.float64))
        for j, col in g.items():
            J[:, j] = col
        return v, J
