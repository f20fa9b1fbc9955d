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

_BINARY_OPS = ("+", "-", "*", "/", "**")


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


def _data(data: Mapping[str, np.ndarray], name: str) -> np.ndarray:
    try:
        return np.asarray(data[name])
    except KeyError:
        raise ValueError(f"the formula uses {name!r} but the data has only {sorted(data)}") from None


def _param(b: np.ndarray, index: int):
    if not 1 <= index <= len(b):
        raise ValueError(f"the formula uses b{index} but only b1..b{len(b)} are given")
    return b[index - 1]


def _eval(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray]):
    if isinstance(node, Num | Const):
        return node.value
    if isinstance(node, Param):
        return _param(b, node.index)
    if isinstance(node, Var):
        return _data(data, node.name)
    if isinstance(node, Neg):
        return -_eval(node.operand, b, data)
    if isinstance(node, Call):
        return _FUNC_VALUE[node.func](_eval(node.arg, b, data))
    left = _eval(node.left, b, data)
    right = _eval(node.right, b, data)
    if node.op == "+":
        return left + right
    if node.op == "-":
        return left - right
    if node.op == "*":
        return left * right
    if node.op == "/":
        return left / right
    return np.power(left, right)


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
    b = np.asarray(b)
    m = _length(data)
    with np.errstate(all="ignore"):
        v = _eval(node, b, data)
        return np.broadcast_to(np.asarray(v), (m,)).copy()


def _forward(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray], m: int):
    """(value, gradient) of a node; gradient shape (m, k) or ``None`` if constant in b."""
    k = len(b)
    if isinstance(node, Num | Const):
        return node.value, None
    if isinstance(node, Param):
        v = _param(b, node.index)
        g = np.zeros((m, k), dtype=np.result_type(b, np.float64))
        g[:, node.index - 1] = 1.0
        return v, g
    if isinstance(node, Var):
        return _data(data, node.name), None
    if isinstance(node, Neg):
        v, g = _forward(node.operand, b, data, m)
        return -v, None if g is None else -g
    if isinstance(node, Call):
        a, ga = _forward(node.arg, b, data, m)
        v = _FUNC_VALUE[node.func](a)
        if ga is None:
            return v, None
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
        return v, _col(d, m) * ga
    a, ga = _forward(node.left, b, data, m)
    c, gc = _forward(node.right, b, data, m)
    op = node.op
    if op in ("+", "-"):
        v = a + c if op == "+" else a - c
        if gc is None:
            return v, ga
        gc = gc if op == "+" else -gc
        return v, gc if ga is None else ga + gc
    if op == "*":
        v = a * c
        g = None if ga is None else _col(c, m) * ga
        if gc is not None:
            g = _col(a, m) * gc if g is None else g + _col(a, m) * gc
        return v, g
    if op == "/":
        v = a / c
        if ga is None and gc is None:
            return v, None
        # d(a/c) = (da - v dc) / c
        num = ga if gc is None else (-_col(v, m) * gc if ga is None else ga - _col(v, m) * gc)
        return v, num / _col(c, m)
    # a ** c: d = c a**(c-1) da + a**c log(a) dc
    v = np.power(a, c)
    g = None
    if ga is not None:
        g = _col(c * np.power(a, c - 1.0), m) * ga
    if gc is not None:
        t = _col(v * np.log(a), m) * gc
        g = t if g is None else g + t
    return v, g


def _col(v, m: int) -> np.ndarray:
    """A scalar or length-m array as an (m, 1) column for broadcasting against (m, k)."""
    return np.broadcast_to(np.asarray(v), (m,))[:, None]


def value_and_jacobian(node: Node, b: np.ndarray, data: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The model values ``(m,)`` and the exact Jacobian ``d model / d b`` ``(m, k)``.

    Forward mode: each node carries its value and its gradient with respect
    to ``b``; sums add gradients, products and quotients use the product and
    quotient rules, ``a**c`` gives ``c a**(c-1) da + a**c log(a) dc`` (the
    second term only where the exponent depends on ``b``), and the functions
    their derivatives (``exp' = exp``, ``sin' = cos``, ``cos' = -sin``,
    ``arctan' = 1/(1+a^2)``, ``log' = 1/a``, ``sqrt' = 1/(2 sqrt a)``).
    Columns of parameters the formula does not use are zero.
    """
    b = np.asarray(b)
    m = _length(data)
    with np.errstate(all="ignore"):
        v, g = _forward(node, b, data, m)
        v = np.broadcast_to(np.asarray(v), (m,)).copy()
    if g is None:
        g = np.zeros((m, len(b)), dtype=np.result_type(b, np.float64))
    return v, np.ascontiguousarray(g)
