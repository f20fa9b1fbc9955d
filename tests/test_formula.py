"""Tests of the safe StRD formula parser, its printer, evaluation and exact Jacobian."""

from __future__ import annotations

import ast
import re
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from benchsuite.formula import (
    BoundModel,
    BinOp,
    Call,
    Const,
    Neg,
    Num,
    Param,
    Var,
    evaluate,
    params_used,
    parse,
    to_text,
    value_and_jacobian,
    vars_used,
)

# -- fixed examples ------------------------------------------------------------------


def test_precedence_and_associativity() -> None:
    x, b1, b2 = Var("x"), Param(1), Param(2)
    # ** binds tighter than unary minus (Python / Fortran): -x**2 = -(x**2)
    assert parse("-x**2") == Neg(BinOp("**", x, Num(2.0)))
    # ** is right-associative and takes a signed exponent
    assert parse("x**b1**b2") == BinOp("**", x, BinOp("**", b1, b2))
    assert parse("x**-b1") == BinOp("**", x, Neg(b1))
    # * and / before + and -, all left-associative
    assert parse("b1-b2-x") == BinOp("-", BinOp("-", b1, b2), x)
    assert parse("b1/b2/x") == BinOp("/", BinOp("/", b1, b2), x)
    assert parse("b1+b2*x") == BinOp("+", b1, BinOp("*", b2, x))
    assert parse("+b1") == b1


def test_numbers_names_functions() -> None:
    assert parse(".5") == Num(0.5)
    assert parse("1.5E-02") == Num(0.015)
    assert parse("3.141592653589793238462643383279E0") == Num(math.pi)
    assert parse("pi") == Const("pi", math.pi)
    assert parse("pi", {"pi": 3.0}) == Const("pi", 3.0)  # a file's own definition wins
    assert parse("atan(x2)") == Call("arctan", Var("x2"))  # alias
    assert parse("log[y]", allow_response=True) == Call("log", Var("y"))
    t = parse("b1*exp[-b2*x1] + sqrt(x2)/b3")
    assert params_used(t) == {1, 2, 3}
    assert vars_used(t) == {"x1", "x2"}


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("b1*(1-exp[-b2*x]", "unbalanced '(' opened at position 3"),
        ("b1*x)", "unbalanced closing bracket, found ')' at position 4"),
        ("b1*(x]", "expected ')' to close '(' opened at position 3"),
        ("foo(x)", "unknown function 'foo' at position 0"),
        ("b1*z", "unknown name 'z' at position 3"),
        ("y + b1", "unknown name 'y' at position 0"),  # the response only on a left-hand side
        ("b1 x", "found 'x' at position 3"),
        ("b1 $ x", "unexpected character '$' at position 3"),
        ("exp x", "function 'exp' needs a bracketed argument"),
        ("b1 *", "found end of formula at position 4"),
    ],
)
def test_errors_name_the_position(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=re.escape(message)):
        parse(text)


def test_evaluation_needs_known_params_and_columns() -> None:
    t = parse("b3*x2")
    with pytest.raises(ValueError, match="b3"):
        evaluate(t, np.ones(2), {"x2": np.ones(3)})
    with pytest.raises(ValueError, match="x2"):
        evaluate(t, np.ones(3), {"x": np.ones(3)})


def test_jacobian_of_a_known_model() -> None:
    # d/db of b1*(1-exp(-b2 x)) by hand: (1-exp(-b2 x), b1 x exp(-b2 x))
    x = np.linspace(1.0, 5.0, 7)
    b = np.array([2.0, 0.3])
    v, J = value_and_jacobian(parse("b1*(1-exp[-b2*x])"), b, {"x": x})
    e = np.exp(-b[1] * x)
    np.testing.assert_allclose(v, b[0] * (1 - e), rtol=1e-15)  # float64 round-off only
    np.testing.assert_allclose(J[:, 0], 1 - e, rtol=1e-15)
    np.testing.assert_allclose(J[:, 1], b[0] * x * e, rtol=1e-15)
    # a parameter-free formula has a zero Jacobian of the right shape
    v, J = value_and_jacobian(parse("2*x"), b, {"x": x})
    assert J.shape == (7, 2) and not J.any()


# -- random expressions ---------------------------------------------------------------
# Each strategy draws text tokens together with an independent numpy function
# of (b, data) computing the same expression; text is fully bracketed here so the
# reference needs no precedence rules (precedence is checked against Python's
# own grammar further down).

N_PARAMS = 3
NAMES = ("x", "x1", "x2")
_FUNCS = {"exp": np.exp, "sin": np.sin, "cos": np.cos, "arctan": np.arctan, "atan": np.arctan, "log": np.log, "sqrt": np.sqrt}
_OPS = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "**": np.power}


@st.composite
def _number(draw):
    value = draw(st.sampled_from([0.5, 1.0, 2.0, 3.0, 0.25, 1.5, 0.015, 2.75]))
    text = draw(st.sampled_from([repr(value), f"{value:.6E}", f"{value:.3e}", f"{value}D0"]))
    if value < 1 and draw(st.booleans()):
        text = repr(value)[1:]  # ".5" style
    return [text], (lambda b, d, v=float(text.replace("D", "e")): v)


def _leaf():
    param = st.integers(1, N_PARAMS).map(lambda i: ([f"b{i}"], lambda b, d, i=i: b[i - 1]))
    var = st.sampled_from(NAMES).map(lambda n: ([n], lambda b, d, n=n: d[n]))
    const = st.just((["pi"], lambda b, d: math.pi))
    return st.one_of(_number(), param, var, const)


def _open_close(draw):
    return ("(", ")") if draw(st.booleans()) else ("[", "]")


def _extend(children):
    @st.composite
    def unary(draw):
        toks, f = draw(children)
        o, c = _open_close(draw)
        return ["-", o, *toks, c], (lambda b, d: -f(b, d))

    @st.composite
    def binary(draw):
        (lt, lf), (rt, rf) = draw(children), draw(children)
        op = draw(st.sampled_from(sorted(_OPS)))
        o1, c1 = _open_close(draw)
        o2, c2 = _open_close(draw)
        fn = _OPS[op]
        return [o1, *lt, c1, op, o2, *rt, c2], (lambda b, d: fn(lf(b, d), rf(b, d)))

    @st.composite
    def call(draw):
        toks, f = draw(children)
        name = draw(st.sampled_from(sorted(_FUNCS)))
        o, c = _open_close(draw)
        fn = _FUNCS[name]
        return [name, o, *toks, c], (lambda b, d: fn(f(b, d)))

    return st.one_of(unary(), binary(), call())


EXPRESSIONS = st.recursive(_leaf(), _extend, max_leaves=12)


def _render(tokens: list[str], gaps: list[str] | None = None) -> str:
    if gaps is None:
        return " ".join(tokens)
    return "".join(t + g for t, g in zip(tokens, gaps))


def _data(m: int = 5) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(7)
    return {n: rng.uniform(0.5, 2.0, m) for n in NAMES}


B = np.array([0.7, 1.3, 0.4])


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(EXPRESSIONS)
def test_evaluation_agrees_with_numpy(expr) -> None:
    tokens, fn = expr
    data = _data()
    with np.errstate(all="ignore"):
        expected = np.broadcast_to(np.asarray(fn(B, data), dtype=np.float64), (5,))
    got = evaluate(parse(_render(tokens)), B, data)
    finite = np.isfinite(expected)
    assert np.array_equal(finite, np.isfinite(got))
    # the same operations in the same order: equal up to a few float64 round-offs
    # (the parser folds "2.0D0"-style literals to the same float, so no other source of difference)
    np.testing.assert_allclose(got[finite], expected[finite], rtol=1e-13, atol=0)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(EXPRESSIONS, st.data())
def test_whitespace_and_bracket_kind_do_not_matter(expr, data) -> None:
    tokens, _ = expr
    gaps = data.draw(st.lists(st.sampled_from(["", " ", "  ", "\t", " \n "]), min_size=len(tokens), max_size=len(tokens)))
    # tokens that would merge without a gap (name/number followed by name/number) keep a space
    for i in range(len(tokens) - 1):
        if tokens[i][-1].isalnum() and (tokens[i + 1][0].isalnum() or tokens[i + 1][0] == "."):
            gaps[i] = gaps[i] or " "
    reference = parse(_render(tokens))
    assert parse(_render(tokens, gaps)) == reference
    squared = [{"(": "[", ")": "]"}.get(t, t) for t in tokens]
    rounded = [{"[": "(", "]": ")"}.get(t, t) for t in tokens]
    assert parse(_render(squared)) == reference == parse(_render(rounded))


# -- random trees: printing round-trip and derivatives ---------------------------------
def _trees():
    leaves = st.one_of(
        st.floats(0.0, 1e6, allow_nan=False, allow_infinity=False).map(Num),
        st.floats(1e-30, 1e30).map(Num),
        st.integers(1, N_PARAMS).map(Param),
        st.sampled_from(NAMES).map(Var),
        st.just(Const("pi", math.pi)),
    )

    def extend(children):
        return st.one_of(
            children.map(Neg),
            st.builds(BinOp, st.sampled_from(["+", "-", "*", "/", "**"]), children, children),
            st.builds(Call, st.sampled_from(["exp", "sin", "cos", "arctan", "log", "sqrt"]), children),
        )

    return st.recursive(leaves, extend, max_leaves=15)


@settings(max_examples=300, deadline=None)
@given(_trees())
def test_print_then_parse_round_trips(tree) -> None:
    text = to_text(tree)
    assert parse(text) == tree
    assert to_text(parse(text)) == text


def _python_ast_to_tree(node: ast.AST):
    """Python's own parser as the precedence oracle (Python and Fortran agree on it)."""
    if isinstance(node, ast.Expression):
        return _python_ast_to_tree(node.body)
    if isinstance(node, ast.Constant):
        return Num(float(node.value))
    if isinstance(node, ast.Name):
        if node.id == "pi":
            return Const("pi", math.pi)
        if node.id.startswith("b"):
            return Param(int(node.id[1:]))
        return Var(node.id)
    if isinstance(node, ast.UnaryOp):
        inner = _python_ast_to_tree(node.operand)
        return Neg(inner) if isinstance(node.op, ast.USub) else inner
    if isinstance(node, ast.BinOp):
        op = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}[type(node.op)]
        return BinOp(op, _python_ast_to_tree(node.left), _python_ast_to_tree(node.right))
    if isinstance(node, ast.Call):
        return Call(node.func.id, _python_ast_to_tree(node.args[0]))
    raise AssertionError(f"unexpected Python node {node!r}")


@st.composite
def _flat_text(draw, depth: int = 0) -> str:
    """Random operator chains with few brackets, so precedence decides the tree."""
    leaf = st.sampled_from(["b1", "b2", "x", "x1", "2", "0.5", "pi"])
    n = draw(st.integers(1, 4 if depth < 2 else 1))
    parts = []
    for _ in range(n):
        kind = draw(st.integers(0, 5 if depth < 2 else 0))
        if kind == 4:
            atom = f"({draw(_flat_text(depth + 1))})"
        elif kind == 5:
            atom = f"{draw(st.sampled_from(['exp', 'sin', 'log']))}({draw(_flat_text(depth + 1))})"
        else:
            atom = draw(leaf)
        parts.append(draw(st.sampled_from(["", "", "-", "+", "--"])) + atom)
    ops = draw(st.lists(st.sampled_from(["+", "-", "*", "/", "**"]), min_size=n - 1, max_size=n - 1))
    text = parts[0]
    for op, part in zip(ops, parts[1:]):
        text += f" {op} {part}"
    return text


@settings(max_examples=300, deadline=None)
@given(_flat_text())
def test_precedence_matches_python_grammar(text: str) -> None:
    assert parse(text) == _python_ast_to_tree(ast.parse(text, mode="eval"))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(EXPRESSIONS)
def test_jacobian_agrees_with_complex_step(expr) -> None:
    tokens, _ = expr
    tree = parse(_render(tokens))
    data = _data()
    value, J = value_and_jacobian(tree, B, data)
    assume(np.all(np.isfinite(value)) and np.all(np.isfinite(J)))
    assume(np.max(np.abs(value)) < 1e8 and np.max(np.abs(J)) < 1e8)
    h = 1e-30  # complex step: f'(b) = Im f(b + ih) / h, no subtractive cancellation
    cs = np.empty_like(J)
    for j in range(len(B)):
        bc = B.astype(complex)
        bc[j] += 1j * h
        cs[:, j] = evaluate(tree, bc, data).imag / h
    # both are exact derivatives evaluated in float64 by different formulas; their
    # round-off differs by a few ulps of the largest term, hence relative 1e-9 of the
    # row scale (terms up to 1e8 cancel in a few trees)
    scale = 1.0 + np.max(np.abs(J), axis=1, keepdims=True)
    assert np.all(np.abs(J - cs) <= 1e-9 * scale + 1e-9 * np.abs(value)[:, None])


def test_jacobian_agrees_with_central_differences_on_power_of_parameters() -> None:
    # exponent depending on parameters (Bennett5, Rat43 style): a**c with dc != 0
    tree = parse("b1 * (b2+x)**(-1/b3)")
    x = np.linspace(1.0, 3.0, 6)
    b = np.array([-2.0, 5.0, 0.9])
    _, J = value_and_jacobian(tree, b, {"x": x})
    for j in range(3):
        e = np.zeros(3)
        e[j] = 1e-6 * abs(b[j])
        fd = (evaluate(tree, b + e, {"x": x}) - evaluate(tree, b - e, {"x": x})) / (2 * e[j])
        # central differences: truncation O(h^2) ~ 1e-12 relative plus round-off eps/h ~ 1e-10
        np.testing.assert_allclose(J[:, j], fd, rtol=1e-8)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(EXPRESSIONS, st.lists(st.integers(0, 4), min_size=1, max_size=5))
def test_bound_model_folding_and_rows_change_nothing(expr, rows) -> None:
    """Folding parameter-free subtrees once and evaluating on some rows give the same numbers."""
    tree = parse(_render(expr[0]))
    data = _data()
    bound = BoundModel(tree, data)
    v, J = value_and_jacobian(tree, B, data)
    v2, J2 = bound.value_and_jacobian(B)
    # identical operations on identical inputs, only computed earlier: bitwise equal
    np.testing.assert_array_equal(v2, v)
    np.testing.assert_array_equal(J2, J)
    np.testing.assert_array_equal(bound.evaluate(B), evaluate(tree, B, data))
    idx = np.array(rows)
    v3, J3 = bound.value_and_jacobian(B, idx)
    np.testing.assert_array_equal(v3, v[idx])
    np.testing.assert_array_equal(J3, J[idx])


def test_folding_precomputes_data_only_subtrees() -> None:
    bound = BoundModel(parse("b1*cos(2*pi*x/12) + b2*x**2"), {"x": np.arange(4.0)})
    assert sorted(np.ndim(v) for v in bound.folded.values()) == [1, 1]  # cos(2 pi x / 12) and x**2


def test_division_by_a_constant_zero_gives_inf_not_an_exception() -> None:
    # found by hypothesis: constant subtrees were Python floats, so 1/(0.5-0.5)
    # raised ZeroDivisionError where numpy arrays give inf (IEEE 754 division)
    tree = parse("b1 / ([0.5] - [0.5])")
    value, J = value_and_jacobian(tree, np.array([1.0]), {"x": np.ones(3)})
    assert np.all(np.isinf(value)) and np.all(np.isinf(J[:, 0]))
