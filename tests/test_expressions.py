"""The safe expression language: whitelist, missing values, and Python's own semantics."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from strategies import NAMES, arithmetic_expressions, boolean_expressions, metric_values

from digest.expressions import ExpressionError, parse

NAN = float("nan")


def run(text: str, **values: float | list[float]) -> np.ndarray:
    return parse(text).evaluate({k: np.asarray(v, dtype=float) for k, v in values.items()})


def reference(text: str, values: dict[str, float]) -> object:
    """Python's own evaluation on plain floats, with no builtins but the three allowed calls."""
    scope = {"abs": abs, "min": min, "max": max, **values}
    return eval(text, {"__builtins__": {}}, scope)


# ---- whitelist ---------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "offending"),
    [
        ("a.real", "a.real"),  # attribute access
        ("().__class__", "().__class__"),
        ("a[0]", "a[0]"),  # subscript
        ("open('x')", "open('x')"),  # calls other than abs/min/max
        ("__import__('os')", "__import__('os')"),
        ("getattr(a, 'b')", "getattr(a, 'b')"),
        ("a(1)", "a(1)"),
        ("max(a, b=1)", "max(a, b=1)"),
        ("abs(a, b)", "abs(a, b)"),
        ("min(a)", "min(a)"),
        ("lambda: 1", "lambda: 1"),  # lambdas
        ("'text'", "'text'"),  # strings
        ("b'x'", "b'x'"),
        ("f'{a}'", "f'{a}'"),
        ("[x for x in a]", "[x for x in a]"),  # comprehensions
        ("{x for x in a}", "{x for x in a}"),
        ("sum(x for x in a)", "sum((x for x in a))"),
        ("[a, b]", "[a, b]"),
        ("(a, b)", "(a, b)"),
        ("{'k': a}", "{'k': a}"),
        ("__import__", "__import__"),  # names that can never be metric codes
        ("_private + 1", "_private"),
        ("__builtins__", "__builtins__"),
        ("(x := 1)", "(x := 1)"),
        ("a << 1", "a << 1"),
        ("a & b", "a & b"),
        ("~a", "~a"),
        ("a @ b", "a @ b"),
        ("a is b", "a is b"),
        ("a in b", "a in b"),
        ("None", "None"),
        ("1j", "1j"),
        ("...", "..."),
    ],
)
def test_refused(text: str, offending: str) -> None:
    with pytest.raises(ExpressionError) as info:
        parse(text)
    message = str(info.value)
    assert repr(text) in message  # the whole expression is quoted
    assert offending in message  # and the part that was refused


@pytest.mark.parametrize("text", ["a +", "a b", "(a", "import os", "a = 1", "yield a"])
def test_syntax_errors_name_the_text(text: str) -> None:
    with pytest.raises(ExpressionError, match="cannot parse"):
        parse(text)


def test_unknown_names_refused_when_known_given() -> None:
    with pytest.raises(ExpressionError, match=r"unknown metric code\(s\) anc9"):
        parse("anc1 + anc9", {"anc1"})
    assert parse("anc1 + 1", {"anc1"}).names == frozenset({"anc1"})


def test_allowed_forms_parse() -> None:
    for text in [
        "a + b - c * 2 / 3 // 1 % 5 ** 2",
        "-a + +b",
        "abs(a) + min(a, b, c) + max(a, 1)",
        "a if b > 0 else c",
        "a < b <= c and not (b == c) or a != 0",
        "True and False",
    ]:
        assert parse(text).names <= set(NAMES)


# ---- missing values and three-valued logic ----------------------------------------

# Kleene's strong three-valued logic, the same truth tables SQL uses for NULL
# (ISO/IEC 9075; from memory): False dominates AND, True dominates OR,
# otherwise unknown stays unknown. None = unknown.
KLEENE_AND = {
    (1, 1): 1, (1, 0): 0, (0, 1): 0, (0, 0): 0,
    (1, None): None, (None, 1): None, (0, None): 0, (None, 0): 0, (None, None): None,
}  # fmt: skip
KLEENE_OR = {
    (1, 1): 1, (1, 0): 1, (0, 1): 1, (0, 0): 0,
    (1, None): 1, (None, 1): 1, (0, None): None, (None, 0): None, (None, None): None,
}  # fmt: skip


def _as_value(x: int | None) -> float:
    return NAN if x is None else float(x)


def _same(got: float, want: int | None) -> bool:
    return math.isnan(got) if want is None else got == want


@pytest.mark.parametrize(("a", "b"), list(KLEENE_AND))
def test_three_valued_and_or(a: int | None, b: int | None) -> None:
    values = {"a": _as_value(a), "b": _as_value(b)}
    assert _same(float(run("a and b", **values)), KLEENE_AND[(a, b)])
    assert _same(float(run("a or b", **values)), KLEENE_OR[(a, b)])


def test_three_valued_not() -> None:
    assert float(run("not a", a=0.0)) == 1.0
    assert float(run("not a", a=7.0)) == 0.0
    assert math.isnan(float(run("not a", a=NAN)))


def test_missing_or_true_is_true() -> None:
    assert float(run("a > 1 or b > 1", a=NAN, b=5.0)) == 1.0
    assert float(run("a > 1 and b > 1", a=NAN, b=0.0)) == 0.0


@pytest.mark.parametrize("text", ["a / b", "a // b", "a % b", "a / (b - b)"])
def test_division_by_zero_is_missing(text: str) -> None:
    with pytest.raises(ZeroDivisionError):  # Python itself raises; we give missing instead
        reference(text, {"a": 5.0, "b": 0.0})
    got = run(text, a=[5.0, 6.0], b=[0.0, 0.0])
    assert np.isnan(got).all()


def test_division_by_zero_only_where_zero() -> None:
    got = run("a / b", a=[6.0, 6.0, NAN], b=[3.0, 0.0, 2.0])
    assert got[0] == 6.0 / 3.0
    assert np.isnan(got[1:]).all()


@pytest.mark.parametrize("op", ["<", "<=", ">", ">=", "==", "!="])
def test_comparison_with_missing_is_missing(op: str) -> None:
    assert math.isnan(float(run(f"a {op} b", a=NAN, b=1.0)))
    assert math.isnan(float(run(f"a {op} b", a=1.0, b=NAN)))
    assert math.isnan(float(run(f"a {op} 1", a=NAN)))
    # and without missing values it matches Python's own comparison
    for x, y in [(1.0, 2.0), (2.0, 2.0), (3.0, 2.0)]:
        assert float(run(f"a {op} b", a=x, b=y)) == float(reference(f"a {op} b", {"a": x, "b": y}))


def test_missing_propagates_through_arithmetic_and_calls() -> None:
    for text in ["a + 1", "a * 0", "abs(a)", "min(a, 1)", "max(1, a)", "-a", "a ** 0 + a"]:
        assert math.isnan(float(run(text, a=NAN))), text


def test_if_with_missing_condition_is_missing() -> None:
    assert math.isnan(float(run("b if a > 0 else c", a=NAN, b=1.0, c=2.0)))
    assert float(run("b if a > 0 else c", a=1.0, b=1.0, c=2.0)) == 1.0
    assert float(run("b if a > 0 else c", a=-1.0, b=1.0, c=2.0)) == 2.0


def test_chained_comparison_like_python() -> None:
    for a, b, c in [(1, 2, 3), (1, 3, 2), (2, 2, 2), (3, 2, 1)]:
        values = {"a": float(a), "b": float(b), "c": float(c)}
        assert float(run("a < b <= c", **values)) == float(reference("a < b <= c", values))
    assert math.isnan(float(run("a < b < c", a=1.0, b=NAN, c=3.0)))
    assert float(run("a < b < c", a=5.0, b=1.0, c=NAN)) == 0.0  # false whatever c is


@pytest.mark.parametrize(
    ("a", "b"), [(1.0, 0.1), (-7.0, 2.0), (7.5, -2.0), (-0.5, 0.3), (0.7, 0.1), (1e17, 3.0)]
)
def test_floor_division_and_modulo_like_python(a: float, b: float) -> None:
    # Python's float // is not floor(a / b): 1 // 0.1 == 9.0 although 1 / 0.1 == 10.0
    for op in ("//", "%"):
        want = reference(f"a {op} b", {"a": a, "b": b})
        assert float(run(f"a {op} b", a=a, b=b)) == want, op


def test_arrays_broadcast_with_constants() -> None:
    got = run("a * 2 + 1", a=[0.0, 1.5, NAN])
    np.testing.assert_array_equal(got, [1.0, 4.0, NAN])


# ---- property tests against Python's own eval --------------------------------------


def _python_value(text: str, values: dict[str, float]) -> float | None:
    """Python's result as a float, or None where Python cannot give a finite real number."""
    try:
        result = reference(text, values)
    except (ZeroDivisionError, OverflowError):
        return None
    if isinstance(result, complex) or not math.isfinite(float(result)):
        return None
    return float(result)


@settings(max_examples=150, deadline=None)
@given(
    arithmetic_expressions(),
    st.fixed_dictionaries({name: metric_values() for name in NAMES}),
)
def test_arithmetic_matches_python_eval(text: str, values: dict[str, float]) -> None:
    want = _python_value(text, values)
    assume(want is not None)
    got = float(run(text, **values))
    assert got == want or math.isclose(got, want, rel_tol=1e-12, abs_tol=1e-12), (got, want)


@settings(max_examples=60, deadline=None)
@given(
    boolean_expressions(),
    st.fixed_dictionaries({name: metric_values() for name in NAMES}),
)
def test_logic_matches_python_truthiness(text: str, values: dict[str, float]) -> None:
    try:
        want = reference(text, values)
    except (ZeroDivisionError, OverflowError):
        assume(False)
    got = float(run(text, **values))
    # Python's `and`/`or` return an operand; we return its truth value as 1.0 / 0.0
    assert got == float(bool(want))


@settings(max_examples=50, deadline=None)
@given(
    arithmetic_expressions(), st.lists(st.tuples(*[metric_values()] * 3), min_size=1, max_size=6)
)
def test_arrays_evaluate_elementwise(text: str, rows: list[tuple[float, float, float]]) -> None:
    columns = {name: np.array([row[i] for row in rows]) for i, name in enumerate(NAMES)}
    got = np.broadcast_to(parse(text).evaluate(columns), (len(rows),))
    for i, row in enumerate(rows):
        want = _python_value(text, dict(zip(NAMES, row, strict=True)))
        if want is not None:
            assert got[i] == want or math.isclose(got[i], want, rel_tol=1e-12, abs_tol=1e-12)
