"""A small, safe expression language over metric codes.

The syntax is a subset of Python expressions, parsed with :mod:`ast` and checked
against a whitelist: numbers, metric codes, ``+ - * / // % **``, comparisons
(chains too), ``and``/``or``/``not``, ``abs``/``min``/``max`` and ``a if c else b``.
Everything else is refused when the configuration is loaded.

Values are numpy float arrays; ``NaN`` means "missing". Missing propagates through
arithmetic and comparisons; ``and``/``or`` follow three-valued logic (``x or True``
is true even when ``x`` is missing). Division by zero gives missing, never an error.
Truth values are returned as 1.0 / 0.0 so they can be summed up the hierarchy.
"""

from __future__ import annotations

import ast
import operator
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

Values = Mapping[str, np.ndarray]
Evaluator = Callable[[Values], np.ndarray]

_FUNCTIONS = {"abs", "min", "max"}
_BINOPS: dict[type[ast.operator], Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    ast.Add: operator.add,
    ast.Sub: operator.sub,
    ast.Mult: operator.mul,
    ast.Pow: operator.pow,
}
_COMPARE: dict[type[ast.cmpop], Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    ast.Lt: operator.lt,
    ast.LtE: operator.le,
    ast.Gt: operator.gt,
    ast.GtE: operator.ge,
    ast.Eq: operator.eq,
    ast.NotEq: operator.ne,
}


class ExpressionError(ValueError):
    """The text is not an allowed expression; the message says which part and why."""


@dataclass(frozen=True)
class Expression:
    """A parsed, checked expression. Call :meth:`evaluate` with arrays per metric code."""

    text: str
    names: frozenset[str]
    _evaluate: Evaluator

    def evaluate(self, values: Values) -> np.ndarray:
        with np.errstate(all="ignore"):
            result = self._evaluate(values)
        return np.asarray(result, dtype=float)

    @property
    def comparison(self) -> tuple[str, str] | None:
        """For ``left OP right`` with a single operator: the texts of both sides."""
        tree = ast.parse(self.text, mode="eval").body
        if isinstance(tree, ast.Compare) and len(tree.ops) == 1:
            return ast.unparse(tree.left), ast.unparse(tree.comparators[0])
        return None


def parse(text: str, known: set[str] | frozenset[str] | None = None) -> Expression:
    """Parse and check ``text``. With ``known``, every name must be one of them."""
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise ExpressionError(f"cannot parse {text!r}: {exc.msg}") from None
    names: set[str] = set()
    evaluator = _compile(tree.body, text, names)
    if known is not None:
        unknown = sorted(names - set(known))
        if unknown:
            raise ExpressionError(
                f"unknown metric code(s) {', '.join(unknown)} in {text!r}; "
                "declare them under [[metric]] or [[derived]]"
            )
    return Expression(text.strip(), frozenset(names), evaluator)


def _refuse(node: ast.AST, text: str, why: str) -> ExpressionError:
    part = ast.unparse(node) if isinstance(node, ast.expr) else type(node).__name__
    return ExpressionError(f"{why}: {part!r} in {text!r}")


def _compile(node: ast.expr, text: str, names: set[str]) -> Evaluator:
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, int | float):
            if isinstance(node.value, bool):
                value = float(node.value)
                return lambda v: np.float64(value)
            raise _refuse(node, text, "only numbers are allowed as constants")
        number = float(node.value)
        return lambda v: np.float64(number)
    if isinstance(node, ast.Name):
        name = node.id
        if name in {"True", "False"}:
            flag = float(name == "True")
            return lambda v: np.float64(flag)
        if name.startswith("_"):  # never a metric code (config refuses them too)
            raise _refuse(node, text, "names starting with _ are not allowed")
        names.add(name)
        return lambda v: np.asarray(v[name], dtype=float)
    if isinstance(node, ast.UnaryOp):
        inner = _compile(node.operand, text, names)
        if isinstance(node.op, ast.USub):
            return lambda v: -inner(v)
        if isinstance(node.op, ast.UAdd):
            return inner
        if isinstance(node.op, ast.Not):
            return lambda v: _not(inner(v))
        raise _refuse(node, text, "operator not allowed")
    if isinstance(node, ast.BinOp):
        left = _compile(node.left, text, names)
        right = _compile(node.right, text, names)
        if isinstance(node.op, ast.Div):
            return lambda v: _divide(left(v), right(v))
        if isinstance(node.op, ast.FloorDiv):
            return lambda v: _floor_divide(left(v), right(v))
        if isinstance(node.op, ast.Mod):
            return lambda v: _modulo(left(v), right(v))
        op = _BINOPS.get(type(node.op))
        if op is None:
            raise _refuse(node, text, "operator not allowed")
        return lambda v: op(left(v), right(v))
    if isinstance(node, ast.BoolOp):
        parts = [_compile(value, text, names) for value in node.values]
        combine = _and if isinstance(node.op, ast.And) else _or

        def boolop(v: Values) -> np.ndarray:
            result = _truth(parts[0](v))
            for part in parts[1:]:
                result = combine(result, _truth(part(v)))
            return result

        return boolop
    if isinstance(node, ast.Compare):
        operands = [_compile(node.left, text, names)]
        operands += [_compile(c, text, names) for c in node.comparators]
        ops = []
        for op_node in node.ops:
            op = _COMPARE.get(type(op_node))
            if op is None:
                raise _refuse(node, text, "comparison not allowed")
            ops.append(op)

        def compare(v: Values) -> np.ndarray:
            values = [f(v) for f in operands]
            result: np.ndarray = np.float64(1.0)
            for op, a, b in zip(ops, values, values[1:], strict=False):
                result = _and(result, _missing_to_nan(op(a, b).astype(float), a, b))
            return result

        return compare
    if isinstance(node, ast.IfExp):
        test = _compile(node.test, text, names)
        body = _compile(node.body, text, names)
        orelse = _compile(node.orelse, text, names)

        def ifexp(v: Values) -> np.ndarray:
            condition = _truth(test(v))
            chosen = np.where(condition == 1.0, body(v), orelse(v))
            return np.where(np.isnan(condition), np.nan, chosen)

        return ifexp
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name) or node.func.id not in _FUNCTIONS:
            raise _refuse(node, text, "only abs(), min() and max() may be called")
        if node.keywords:
            raise _refuse(node, text, "keyword arguments are not allowed")
        args = [_compile(a, text, names) for a in node.args]
        if node.func.id == "abs":
            if len(args) != 1:
                raise _refuse(node, text, "abs() takes exactly one argument")
            return lambda v: np.abs(args[0](v))
        if len(args) < 2:
            raise _refuse(node, text, f"{node.func.id}() needs two or more arguments")
        reduce = np.fmin if node.func.id == "min" else np.fmax

        def minmax(v: Values) -> np.ndarray:
            values = [f(v) for f in args]
            result = values[0]
            missing = np.isnan(values[0])
            for value in values[1:]:
                result = reduce(result, value)
                missing = missing | np.isnan(value)
            return np.where(missing, np.nan, result)

        return minmax
    raise _refuse(node, text, "not allowed in an expression")


def _divide(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = np.broadcast_arrays(np.asarray(a, float), np.asarray(b, float))
    out = np.full(a.shape, np.nan)
    np.divide(a, b, out=out, where=b != 0)
    return out


def _floor_divide(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    # Python's float //, not floor(a / b): 1 // 0.1 is 9.0 while floor(1 / 0.1) is 10.0
    a, b = np.broadcast_arrays(np.asarray(a, float), np.asarray(b, float))
    out = np.full(a.shape, np.nan)
    np.floor_divide(a, b, out=out, where=b != 0)
    return out


def _modulo(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = np.broadcast_arrays(np.asarray(a, float), np.asarray(b, float))
    out = np.full(a.shape, np.nan)
    np.mod(a, b, out=out, where=b != 0)
    return out


def _missing_to_nan(result: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.where(np.isnan(a) | np.isnan(b), np.nan, result)


def _truth(x: np.ndarray) -> np.ndarray:
    x = np.asarray(x, dtype=float)
    return np.where(np.isnan(x), np.nan, (x != 0).astype(float))


def _not(x: np.ndarray) -> np.ndarray:
    return 1.0 - _truth(x)


def _and(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = _truth(a), _truth(b)
    both = np.where(np.isnan(a) | np.isnan(b), np.nan, a * b)
    return np.where((a == 0) | (b == 0), 0.0, both)


def _or(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = _truth(a), _truth(b)
    either = np.where(np.isnan(a) | np.isnan(b), np.nan, np.maximum(a, b))
    return np.where((a == 1) | (b == 1), 1.0, either)
