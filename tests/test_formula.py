"""The cash-flow formula whitelist: what it accepts, what it refuses, and that it never runs text.

Reference for evaluation: numpy arithmetic on the same tree (hypothesis builds random whitelisted
trees, prints them with the fewest parentheses Python's precedence rules allow, and compares).
"""
from __future__ import annotations

import os
import signal

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from realopt.errors import RealoptError
from realopt.formula import FormulaError, parse


@pytest.fixture(autouse=True)
def no_hang():
    """A hang becomes a failure after 20 s (a guard, not a speed target)."""
    def boom(signum, frame):  # pragma: no cover - only on a hang
        raise AssertionError("formula handling hung")

    old = signal.signal(signal.SIGALRM, boom)
    signal.alarm(20)
    yield
    signal.alarm(0)
    signal.signal(signal.SIGALRM, old)


# --- accepted formulas --------------------------------------------------------------------------

def test_design_example_evaluates_elementwise():
    # the cash_flow example of docs/file-format.md; reference: the same arithmetic in numpy.
    f = parse("(price - unit_cost) * volume / 1000 - 4.5")
    assert f.names == frozenset({"price", "unit_cost", "volume"})
    price = np.array([[50.0, 60.0], [40.0, 70.0]])
    cost = np.array([[30.0, 31.0], [29.0, 33.0]])
    volume = np.array([800.0, 1000.0])  # broadcasts over paths
    got = f.evaluate({"price": price, "unit_cost": cost, "volume": volume})
    np.testing.assert_array_equal(got, (price - cost) * volume / 1000 - 4.5)


def test_functions_and_unary_minus():
    f = parse("max(price - cost, 0) - abs(-hedge) + min(a, b, 3) ** 2")
    env = {"price": np.array([1.0, 5.0]), "cost": 2.0, "hedge": np.array([-1.0, 2.0]),
           "a": np.array([4.0, 1.0]), "b": 5.0}
    want = (np.maximum(env["price"] - 2.0, 0) - np.abs(-env["hedge"])
            + np.minimum(np.minimum(env["a"], 5.0), 3.0) ** 2)
    np.testing.assert_array_equal(f.evaluate(env), want)


def test_precedence_follows_python():
    # Python's rules (common practice): ** binds tighter than unary minus and is right-associative.
    assert float(parse("-2 ** 2").evaluate({})) == -4.0
    assert float(parse("2 ** 3 ** 2").evaluate({})) == 512.0
    assert float(parse("10 - 4 - 3").evaluate({})) == 3.0
    assert float(parse("12 / 3 / 2").evaluate({})) == 2.0


def test_multiline_text_from_a_yaml_block_is_accepted():
    f = parse("  (price - cost)\n  * volume\n")
    assert float(f.evaluate({"price": 3.0, "cost": 1.0, "volume": 2.0})) == 4.0


def test_integer_powers_never_become_big_integers():
    # 9**9**9 as Python integers would take minutes; as floats it overflows to inf at once.
    assert np.isinf(parse("9 ** 9 ** 9").evaluate({}))


def test_unknown_name_at_evaluation_is_located():
    f = parse("(price - unit_cost) * volume")
    with pytest.raises(FormulaError) as err:
        f.evaluate({"price": 1.0, "volume": 2.0})
    text = str(err.value)
    assert "'unit_cost'" in text and "defined: price, volume" in text
    lines = text.splitlines()
    assert lines[-1].index("^") == lines[-2].index("unit_cost")


def test_formula_error_is_a_realopt_error():
    assert issubclass(FormulaError, RealoptError)


# --- refused formulas ---------------------------------------------------------------------------

def _caret_under(err: FormulaError, fragment: str) -> None:
    lines = str(err).splitlines()
    shown, caret = lines[-2], lines[-1]
    start = caret.index("^")
    assert shown[start:start + len(fragment)] == fragment, str(err)


@pytest.mark.parametrize("text, fragment, words", [
    ("().__class__", "().__class__", "attribute"),
    ("open('x')", "open", "calling 'open'"),
    ("price.real", "price.real", "attribute"),
    ("prices[0]", "prices[0]", "indexing"),
    ("(lambda: 1)", "lambda", "lambda"),
    ("[p for p in prices]", "[p for p in prices]", "comprehension"),
    ("_secret + 1", "_secret", "underscore"),
    ("price > cost", "price > cost", "comparison"),
    ("price if up else cost", "price if up else cost", "if-else"),
    ("'text' * 3", "'text'", "text"),
    ("price ^ 2", "price ^ 2", "use **"),
    ("price % 7", "price % 7", "'%'"),
    ("price // 2", "price // 2", "'//'"),
    ("a and b", "a and b", "and/or"),
    ("sum(a, b)", "sum", "calling 'sum'"),
    ("min(a)", "min(a)", "two or more"),
    ("abs(a, b)", "abs(a, b)", "exactly one"),
    ("max(a, key=b)", "max(a, key=b)", "named arguments"),
    ("min + 1", "min", "is a function"),
    ("True * 2", "True", "not a number"),
    ("(x := 3)", "x := 3", "assignment"),
    ("price x volume", "x", "not valid arithmetic"),
    ("a, b", "a, b", "tuple"),
])
def test_refused_with_the_offending_part_marked(text, fragment, words):
    with pytest.raises(FormulaError) as err:
        parse(text)
    assert words in str(err.value)
    _caret_under(err.value, fragment)


def test_import_system_call_is_refused_and_never_runs(tmp_path, monkeypatch):
    sentinel = tmp_path / "ran"
    calls = []
    monkeypatch.setattr(os, "system", lambda cmd: calls.append(cmd) or 0)
    with pytest.raises(FormulaError) as err:
        parse(f"__import__('os').system('touch {sentinel}')")
    assert "calling '__import__('os').system' is not allowed" in str(err.value)
    assert calls == [] and not sentinel.exists()


def test_open_is_refused_and_creates_nothing(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(FormulaError):
        parse("open('x', 'w')")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("text, words", [
    ("(" * 10_000 + "price" + ")" * 10_000, "limit is 4,000"),  # too long before anything else
    ("(" * 60 + "price" + ")" * 60, "brackets more than 50 deep"),
    ("min(" * 60 + "a" + ", 1)" * 60, "brackets more than 50 deep"),
    ("-" * 1000 + "price", "more than 300 operators"),
    ("2 ** " * 500 + "2", "more than 300 operators"),
    ("+".join(["price"] * 600), "more than 300 operators"),
    ("price + " * 150_000 + "1", "limit is 4,000"),   # about 1 MB
    ("x" * 1_048_576, "1,048,576 characters"),
    ("", "empty"),
    ("   \n ", "empty"),
])
def test_huge_or_deep_formulas_get_a_clear_error(text, words):
    # Without the guards, ast.parse raises RecursionError or MemoryError on several of these
    # (checked on CPython 3.11: 5,000 unary minus -> RecursionError; 3,000 '2 **' -> MemoryError).
    with pytest.raises(FormulaError) as err:
        parse(text)
    assert words in str(err.value)
    assert len(str(err.value)) < 600  # the message never echoes a megabyte


def test_non_text_is_refused():
    with pytest.raises(FormulaError, match="must be text"):
        parse(12.5)


# --- properties ---------------------------------------------------------------------------------

NAMES = ("a", "b", "c")
_PREC = {"+": 1, "-": 1, "*": 2, "/": 2, "neg": 3, "**": 4}
_NP = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide, "**": np.power}


def _prec(node):
    kind = node[0]
    if kind == "bin":
        return _PREC[node[1]]
    if kind == "neg":
        return 3
    return 5


def _show(node) -> str:
    """Print with the fewest parentheses Python's grammar needs (so precedence is exercised)."""
    kind = node[0]
    if kind == "num":
        return repr(node[1])
    if kind == "name":
        return node[1]
    if kind == "neg":
        inner = _show(node[1])
        return "-" + (f"({inner})" if _prec(node[1]) < 3 else inner)
    if kind == "call":
        return f"{node[1]}(" + ", ".join(_show(a) for a in node[2]) + ")"
    op, left, right = node[1], node[2], node[3]
    p = _PREC[op]
    ls, rs = _show(left), _show(right)
    if _prec(left) < p or (op == "**" and _prec(left) <= p):
        ls = f"({ls})"
    if _prec(right) < p or (op != "**" and _prec(right) == p):
        rs = f"({rs})"
    return f"{ls} {op} {rs}"


def _value(node, env):
    kind = node[0]
    if kind == "num":
        return np.float64(node[1])
    if kind == "name":
        return env[node[1]]
    if kind == "neg":
        return -_value(node[1], env)
    if kind == "call":
        args = [_value(a, env) for a in node[2]]
        if node[1] == "abs":
            return np.abs(args[0])
        out = args[0]
        for a in args[1:]:
            out = (np.minimum if node[1] == "min" else np.maximum)(out, a)
        return out
    return _NP[node[1]](_value(node[2], env), _value(node[3], env))


leaves = st.one_of(
    st.floats(min_value=0.0, max_value=100.0, allow_nan=False).map(lambda x: ("num", x)),
    st.sampled_from(NAMES).map(lambda n: ("name", n)),
)


def _extend(children):
    return st.one_of(
        st.tuples(st.sampled_from(["+", "-", "*", "/", "**"]), children, children)
        .map(lambda t: ("bin",) + t),
        children.map(lambda c: ("neg", c)),
        st.tuples(st.sampled_from(["min", "max"]), st.lists(children, min_size=2, max_size=3))
        .map(lambda t: ("call", t[0], tuple(t[1]))),
        children.map(lambda c: ("call", "abs", (c,))),
    )


trees = st.recursive(leaves, _extend, max_leaves=12)
ENV = {"a": np.array([0.5, -1.25, 3.0, 0.0]), "b": np.array([2.0, 0.1, -4.0, 7.5]), "c": 1.5}


def _names(node):
    if node[0] == "name":
        return {node[1]}
    if node[0] == "num":
        return set()
    kids = node[2] if node[0] == "call" else node[1:] if node[0] == "neg" else node[2:]
    return set().union(*(_names(k) for k in kids))


@settings(max_examples=300, deadline=None)
@given(trees)
def test_evaluation_equals_numpy_on_the_same_tree(tree):
    text = _show(tree)
    f = parse(text)
    assert f.names == frozenset(_names(tree))
    with np.errstate(all="ignore"):
        want = np.broadcast_to(_value(tree, ENV), ()) if not _names(tree) else _value(tree, ENV)
    got = f.evaluate(ENV)
    np.testing.assert_array_equal(got, want)  # nan == nan here; same operations, same order


# Mostly + - * / over numbers and c, so that many trees stay affine in a and b.
arith = st.recursive(
    st.one_of(st.floats(0.5, 10.0).map(lambda x: ("num", x)),
              st.sampled_from(["a", "b", "c", "c"]).map(lambda n: ("name", n))),
    lambda kids: st.one_of(
        st.tuples(st.sampled_from(["+", "-", "*", "/"]), kids, kids).map(lambda t: ("bin",) + t),
        kids.map(lambda c: ("neg", c))),
    max_leaves=8)


@settings(max_examples=300, deadline=None)
@given(arith, st.floats(0.1, 0.9))
def test_affine_formulas_are_affine_in_the_stochastic_names(tree, lam):
    # Invariant (common practice): if the analysis says affine in a and b, then
    # f(lam*u + (1-lam)*v) == lam*f(u) + (1-lam)*f(v) for any two values u, v of (a, b).
    f = parse(_show(tree))
    if not f.is_affine({"a", "b"}):
        return
    u = {"a": np.array([1.0, 2.0]), "b": np.array([3.0, -1.0]), "c": 1.5}
    v = {"a": np.array([-2.0, 0.5]), "b": np.array([1.0, 4.0]), "c": 1.5}
    mid = {k: lam * u[k] + (1 - lam) * v[k] for k in u}
    fu, fv, fm = f.evaluate(u), f.evaluate(v), f.evaluate(mid)
    ok = np.isfinite(fu) & np.isfinite(fv) & np.isfinite(fm)
    if not ok.all():
        return
    scale = 1.0 + np.abs(fu) + np.abs(fv)
    np.testing.assert_allclose(fm, lam * fu + (1 - lam) * fv, rtol=0, atol=1e-9 * scale.max())


def test_affinity_examples():
    stochastic = {"price", "unit_cost"}
    assert parse("(price - unit_cost) * volume / 1000 - 4.5").is_affine(stochastic)
    assert parse("price * volume ** 2 / (1 + volume)").is_affine(stochastic)
    assert not parse("max(price - unit_cost, 0)").is_affine(stochastic)
    assert not parse("price * unit_cost").is_affine(stochastic)
    assert not parse("volume / price").is_affine(stochastic)
    assert not parse("price ** 2").is_affine(stochastic)
