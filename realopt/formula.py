"""The cash-flow formula language: a small arithmetic whitelist, parsed with :mod:`ast`, never run.

Allowed: numbers, names, ``+ - * / **``, parentheses, unary minus (and plus), and calls of
``min``, ``max`` (two or more arguments, elementwise) and ``abs``. Anything else (attributes,
other calls, indexing, lambdas, comprehensions, comparisons, text, names starting with an
underscore...) raises :class:`FormulaError`, whose message shows the offending part with carets.

The text is checked for size and nesting *before* it reaches :func:`ast.parse`, so a huge or deeply
nested formula gets a clear error at once. The validated tree is copied into plain tuples and
evaluated by walking it with numpy operations on whole arrays (one array per driver, any shape that
broadcasts); nothing is ever passed to ``eval``, ``exec`` or ``compile``. Numbers are floats.
"""
from __future__ import annotations

import ast
import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from .errors import RealoptError

MAX_LENGTH = 4000        # characters
MAX_PARENTHESES = 50     # nesting depth of ( ) / [ ] / { }
MAX_OPERATORS = 300      # operator characters (+ - * / ^ % ...) in the whole text
FUNCTIONS = ("abs", "max", "min")

_BINARY = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}
_REFUSED_OPERATORS = {
    ast.FloorDiv: ("//", "use / for division"),
    ast.Mod: ("%", "the remainder is not part of the language"),
    ast.BitXor: ("^", "use ** for a power, e.g. price ** 2"),
    ast.BitAnd: ("&", ""),
    ast.BitOr: ("|", ""),
    ast.LShift: ("<<", ""),
    ast.RShift: (">>", ""),
    ast.MatMult: ("@", "use * for multiplication"),
}
_REFUSED_NODES = {
    ast.Attribute: "attribute access (a dot after a value)",
    ast.Subscript: "indexing with [ ]",
    ast.Lambda: "a lambda",
    ast.ListComp: "a comprehension",
    ast.SetComp: "a comprehension",
    ast.DictComp: "a comprehension",
    ast.GeneratorExp: "a generator expression",
    ast.Compare: "a comparison (use max/min instead, e.g. max(price - cost, 0))",
    ast.BoolOp: "and/or (use max/min instead)",
    ast.IfExp: "an if-else expression (use max/min instead, e.g. max(price - cost, 0))",
    ast.Tuple: "a tuple or a comma outside a function call",
    ast.List: "a list",
    ast.Set: "a set",
    ast.Dict: "a dictionary",
    ast.JoinedStr: "text",
    ast.NamedExpr: "an assignment (:=)",
    ast.Starred: "unpacking with *",
    ast.Await: "await",
    ast.Yield: "yield",
    ast.YieldFrom: "yield",
}


class FormulaError(RealoptError, ValueError):
    """A cash-flow formula that is not allowed or cannot be evaluated.

    ``str(err)`` is the message, followed (when a position is known) by the formula with carets
    under the offending part.
    """

    def __init__(self, message: str, text: str | None = None, start: int | None = None,
                 end: int | None = None):
        self.message = message
        self.text = text
        self.start = start
        self.end = end
        super().__init__(_render(message, text, start, end))


def _render(message: str, text: str | None, start: int | None, end: int | None) -> str:
    if text is None or start is None:
        return message
    start = max(0, min(start, len(text)))
    end = max(start + 1, min(end if end is not None else start + 1, len(text) + 1))
    # Show at most ~80 characters around the offending part so a long formula stays readable.
    end = min(end, start + 60)
    lo = max(0, start - 40)
    hi = min(len(text), end + 40)
    prefix = "..." if lo > 0 else ""
    suffix = "..." if hi < len(text) else ""
    shown = prefix + text[lo:hi] + suffix
    caret = " " * (len(prefix) + start - lo) + "^" * max(1, min(end, hi + 1) - start)
    return f"{message}\n    {shown}\n    {caret}"


# Internal tree: ("num", value) | ("name", name, start, end) | ("neg", node) | ("pos", node)
# | ("bin", op, left, right) | ("call", fname, (args...))


@dataclass(frozen=True)
class Formula:
    """A validated cash-flow formula. ``names`` are the names it uses (driver names)."""

    text: str
    names: frozenset
    _tree: tuple = field(repr=False, compare=False)

    def __str__(self) -> str:
        return self.text

    def evaluate(self, env: Mapping[str, "np.ndarray | float"]) -> np.ndarray:
        """Value of the formula with each name bound to an array or a number in ``env``.

        Arrays broadcast with numpy rules; the result has the broadcast shape of the names used
        (0-d for a formula without names). Division by zero or overflow give inf/nan in the result
        without a warning: callers check ``np.isfinite``. Unknown names raise FormulaError.
        """
        self._check_defined(env)
        values = {n: np.asarray(env[n], dtype=float) for n in self.names}
        with np.errstate(all="ignore"):
            return np.asarray(_eval(self._tree, values), dtype=float)

    def _check_defined(self, env, also=()) -> None:
        missing = [n for n in self._positions() if n[0] not in env and n[0] not in also]
        if missing:
            name, start, end = missing[0]
            known = ", ".join(sorted(set(env) | set(also))) or "none"
            raise FormulaError(
                f"cash-flow formula uses '{name}', which is not defined (defined: {known}); "
                "add a driver of that name or correct the spelling", self.text, start, end)

    def is_affine(self, names) -> bool:
        """True when the formula is affine (degree <= 1) in ``names``: a sum of terms each linear
        in at most one of them, with coefficients that may depend on the other names. Then the
        expectation of the formula is the formula of the expectations of ``names``."""
        return _degree(self._tree, frozenset(names)) is not None

    def expand(self, variables, env: Mapping[str, "np.ndarray | float"]):
        """The formula as a polynomial in ``variables``, or None when it is not one.

        Returns ``{exponents: coefficient}``: ``exponents`` a tuple of integers >= 0, one per name
        in ``variables`` (in that order), and ``coefficient`` a float or an array (the parts of the
        formula free of ``variables`` are evaluated on ``env``, so they may be any allowed
        expression of the other names, e.g. schedules, and broadcast like :meth:`evaluate`).
        The formula equals sum(coef * prod(v_i ** e_i)). It is a polynomial when ``variables``
        enter only through + - *, division by an expression free of them, and powers with a
        constant whole exponent from 0 to MAX_POWER; min/max/abs of a variable, or division by
        one, give None. None also when the expansion would exceed MAX_TERMS terms.
        """
        index = {n: i for i, n in enumerate(variables)}
        self._check_defined(env, index)
        values = {n: np.asarray(env[n], dtype=float) for n in self.names if n not in index}
        try:
            with np.errstate(all="ignore"):
                return _expand(self._tree, index, values)
        except _NotPolynomial:
            return None

    def _positions(self):
        out = []
        stack = [self._tree]
        while stack:
            node = stack.pop()
            kind = node[0]
            if kind == "name":
                out.append((node[1], node[2], node[3]))
            elif kind in ("neg", "pos"):
                stack.append(node[1])
            elif kind == "bin":
                stack.extend((node[2], node[3]))
            elif kind == "call":
                stack.extend(node[2])
        return sorted(out, key=lambda p: p[1])


def parse(text: str) -> Formula:
    """Validate ``text`` against the whitelist and return a :class:`Formula`.

    Raises FormulaError with the offending part marked. Never runs the text.
    """
    if not isinstance(text, str):
        raise FormulaError(f"cash-flow formula must be text, found {type(text).__name__}")
    if len(text) > MAX_LENGTH:
        raise FormulaError(
            f"cash-flow formula is {len(text):,} characters long; the limit is {MAX_LENGTH:,}. "
            "Fix: move parts of it into schedule drivers or simplify it")
    # Newlines and tabs (from a YAML block) are spaces here; same length, so positions hold.
    flat = text.replace("\r", " ").replace("\n", " ").replace("\t", " ")
    if not flat.strip():
        raise FormulaError("cash-flow formula is empty; write it over the driver names, "
                           "e.g. (price - unit_cost) * volume - 4.5")
    _prescan(flat)
    lead = len(flat) - len(flat.lstrip())
    body = flat.lstrip()
    try:
        tree = ast.parse(body, mode="eval")
    except SyntaxError as err:
        offset = (err.offset or len(body) + 1) - 1
        if offset <= 0 and err.msg == "invalid syntax":
            offset = len(body.rstrip())
        end = (err.end_offset or offset + 2) - 1
        raise FormulaError(f"cash-flow formula is not valid arithmetic ({err.msg})",
                           text, lead + offset, lead + max(end, offset + 1)) from None
    except (ValueError, RecursionError, MemoryError) as err:  # pragma: no cover - prescan guards
        raise FormulaError(f"cash-flow formula cannot be read: {err}") from None
    conv = _Converter(text, body, lead)
    node = conv.convert(tree.body)
    return Formula(text=text, names=frozenset(conv.names), _tree=node)


def _prescan(text: str) -> None:
    """Refuse deep nesting and long operator chains before ast.parse can recurse on them."""
    depth = 0
    operators = 0
    for i, ch in enumerate(text):
        if ch in "([{":
            depth += 1
            if depth > MAX_PARENTHESES:
                raise FormulaError(
                    f"cash-flow formula nests brackets more than {MAX_PARENTHESES} deep; "
                    "simplify it", text, i, i + 1)
        elif ch in ")]}":
            depth -= 1
        elif ch in "+-*/^%@&|<>~":
            operators += 1
            if operators > MAX_OPERATORS:
                raise FormulaError(
                    f"cash-flow formula has more than {MAX_OPERATORS} operators; "
                    "move parts of it into schedule drivers or simplify it", text, i, i + 1)


class _Converter:
    def __init__(self, text: str, body: str, lead: int):
        self.text = text
        self.body = body
        self.lead = lead
        self.names: set[str] = set()

    def span(self, node) -> tuple[int, int]:
        raw = self.body.encode("utf-8")

        def chars(col):
            return len(raw[:col].decode("utf-8", errors="ignore"))

        start = chars(node.col_offset)
        end = chars(node.end_col_offset) if node.end_col_offset is not None else start + 1
        return self.lead + start, self.lead + end

    def refuse(self, message: str, node) -> FormulaError:
        start, end = self.span(node)
        return FormulaError(f"cash-flow formula: {message}", self.text, start, end)

    def convert(self, node):
        if isinstance(node, ast.Constant):
            value = node.value
            if isinstance(value, bool) or value is None or value is Ellipsis:
                raise self.refuse(f"'{value}' is not a number", node)
            if isinstance(value, (str, bytes)):
                raise self.refuse("text is not allowed; only numbers and driver names", node)
            if isinstance(value, complex):
                raise self.refuse("complex numbers are not allowed", node)
            try:
                number = float(value)
            except OverflowError:
                raise self.refuse("number is too large", node) from None
            if not math.isfinite(number):
                raise self.refuse("number is too large", node)
            return ("num", number)
        if isinstance(node, ast.Name):
            if node.id.startswith("_"):
                raise self.refuse("names starting with an underscore are not allowed", node)
            if node.id in FUNCTIONS:
                raise self.refuse(f"'{node.id}' is a function; call it, e.g. {node.id}(a, b)",
                                  node)
            start, end = self.span(node)
            self.names.add(node.id)
            return ("name", node.id, start, end)
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.USub):
                return ("neg", self.convert(node.operand))
            if isinstance(node.op, ast.UAdd):
                return ("pos", self.convert(node.operand))
            what = "'not'" if isinstance(node.op, ast.Not) else "'~'"
            raise self.refuse(f"operator {what} is not allowed (allowed: + - * / **)", node)
        if isinstance(node, ast.BinOp):
            op = type(node.op)
            if op not in _BINARY:
                sym, hint = _REFUSED_OPERATORS.get(op, (op.__name__, ""))
                msg = f"operator '{sym}' is not allowed (allowed: + - * / **)"
                raise self.refuse(msg + (f"; {hint}" if hint else ""), node)
            return ("bin", _BINARY[op], self.convert(node.left), self.convert(node.right))
        if isinstance(node, ast.Call):
            func = node.func
            if not isinstance(func, ast.Name) or func.id not in FUNCTIONS:
                start, _ = self.span(func)
                _, end = self.span(func)
                shown = self.text[start:end]
                raise FormulaError(
                    f"cash-flow formula: calling '{shown}' is not allowed; only "
                    "min(...), max(...) and abs(...) may be called", self.text, start, end)
            if node.keywords:
                raise self.refuse(f"{func.id}() takes no named arguments", node)
            for arg in node.args:
                if isinstance(arg, ast.Starred):
                    raise self.refuse("unpacking with * is not allowed", arg)
            n = len(node.args)
            if func.id == "abs" and n != 1:
                raise self.refuse(f"abs() takes exactly one argument, found {n}", node)
            if func.id in ("min", "max") and n < 2:
                raise self.refuse(f"{func.id}() takes two or more arguments, found {n}", node)
            return ("call", func.id, tuple(self.convert(a) for a in node.args))
        for kind, what in _REFUSED_NODES.items():
            if isinstance(node, kind):
                raise self.refuse(f"{what} is not allowed", node)
        raise self.refuse(f"{type(node).__name__} is not allowed "
                          "(allowed: numbers, names, + - * / **, min, max, abs)", node)


_NUMPY_BINARY = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide,
                 "**": np.power}


def _eval(node, values):
    kind = node[0]
    if kind == "num":
        return node[1]
    if kind == "name":
        return values[node[1]]
    if kind == "neg":
        return np.negative(_eval(node[1], values))
    if kind == "pos":
        return _eval(node[1], values)
    if kind == "bin":
        left = np.asarray(_eval(node[2], values), dtype=float)
        return _NUMPY_BINARY[node[1]](left, _eval(node[3], values))
    # call
    args = [_eval(a, values) for a in node[2]]
    if node[1] == "abs":
        return np.abs(args[0])
    fn = np.minimum if node[1] == "min" else np.maximum
    out = args[0]
    for a in args[1:]:
        out = fn(out, a)
    return out


def _degree(node, stochastic):
    """Polynomial degree in ``stochastic`` names: 0, 1, or None (more, or not a polynomial)."""
    kind = node[0]
    if kind == "num":
        return 0
    if kind == "name":
        return 1 if node[1] in stochastic else 0
    if kind in ("neg", "pos"):
        return _degree(node[1], stochastic)
    if kind == "bin":
        a, b = _degree(node[2], stochastic), _degree(node[3], stochastic)
        if a is None or b is None:
            return None
        op = node[1]
        if op in ("+", "-"):
            return max(a, b)
        if op == "*":
            return a + b if a + b <= 1 else None
        if op == "/":
            return a if b == 0 else None
        return 0 if a == 0 and b == 0 else None  # **
    degs = [_degree(a, stochastic) for a in node[2]]
    return 0 if all(d == 0 for d in degs) else None


MAX_POWER = 12      # largest whole exponent of a variable expanded by Formula.expand
MAX_TERMS = 2000    # largest number of terms Formula.expand builds


class _NotPolynomial(Exception):
    pass


def _uses(node, index) -> bool:
    kind = node[0]
    if kind == "num":
        return False
    if kind == "name":
        return node[1] in index
    if kind in ("neg", "pos"):
        return _uses(node[1], index)
    if kind == "bin":
        return _uses(node[2], index) or _uses(node[3], index)
    return any(_uses(a, index) for a in node[2])


def _times(p, q):
    out = {}
    for ea, ca in p.items():
        for eb, cb in q.items():
            e = tuple(x + y for x, y in zip(ea, eb))
            out[e] = out[e] + ca * cb if e in out else ca * cb
    if len(out) > MAX_TERMS:
        raise _NotPolynomial
    return out


def _expand(node, index, values):
    """Polynomial {exponents: coefficient} of ``node`` in the names of ``index`` (see expand)."""
    zero = (0,) * len(index)
    if not _uses(node, index):
        return {zero: _eval(node, values)}
    kind = node[0]
    if kind == "name":
        e = [0] * len(index)
        e[index[node[1]]] = 1
        return {tuple(e): 1.0}
    if kind == "pos":
        return _expand(node[1], index, values)
    if kind == "neg":
        return {e: np.negative(c) for e, c in _expand(node[1], index, values).items()}
    if kind != "bin":
        raise _NotPolynomial            # min, max, abs of a variable
    op, left, right = node[1], node[2], node[3]
    if op in ("+", "-"):
        out = dict(_expand(left, index, values))
        sign = 1.0 if op == "+" else -1.0
        for e, c in _expand(right, index, values).items():
            out[e] = out[e] + sign * c if e in out else sign * c
        return out
    if op == "*":
        return _times(_expand(left, index, values), _expand(right, index, values))
    if op == "/":
        if _uses(right, index):
            raise _NotPolynomial        # division by a variable
        den = np.asarray(_eval(right, values), dtype=float)
        return {e: np.divide(c, den) for e, c in _expand(left, index, values).items()}
    # ** with a variable in the base or the exponent
    if _uses(right, index):
        raise _NotPolynomial
    power = np.unique(np.asarray(_eval(right, values), dtype=float))
    if power.size != 1 or not (0 <= power[0] <= MAX_POWER) or power[0] != int(power[0]):
        raise _NotPolynomial
    base = _expand(left, index, values)
    out = {zero: 1.0}
    for _ in range(int(power[0])):
        out = _times(out, base)
    return out
