"""Hypothesis strategies for periods, series and expressions, shared by the test modules."""

from __future__ import annotations

from datetime import date

import numpy as np
from hypothesis import strategies as st

# ---- periods ------------------------------------------------------------------------

FIRST_DAY = date(1900, 1, 1)
LAST_DAY = date(2199, 12, 31)


def week_labels() -> st.SearchStrategy[str]:
    """Valid ISO week labels like 2026-W42, made by datetime from a calendar date."""

    def label(day: date) -> str:
        year, week, _ = day.isocalendar()
        return f"{year:04d}-W{week:02d}"

    return st.dates(FIRST_DAY, LAST_DAY).map(label)


def month_labels() -> st.SearchStrategy[str]:
    """Valid ISO month labels like 2026-10."""
    return st.dates(FIRST_DAY, LAST_DAY).map(lambda d: f"{d.year:04d}-{d.month:02d}")


def period_labels(kind: str) -> st.SearchStrategy[str]:
    return week_labels() if kind == "week" else month_labels()


# ---- series -------------------------------------------------------------------------


@st.composite
def series(
    draw: st.DrawFn,
    *,
    max_units: int = 4,
    min_periods: int = 1,
    max_periods: int = 30,
    max_value: int = 5_000,
    gaps: bool = True,
) -> np.ndarray:
    """A float array [units x periods] of non-negative counts; NaN = not reported."""
    units = draw(st.integers(1, max_units))
    periods = draw(st.integers(min_periods, max_periods))
    cell = st.integers(0, max_value).map(float)
    if gaps:
        cell = st.one_of(cell, cell, cell, st.just(float("nan")))
    flat = draw(st.lists(cell, min_size=units * periods, max_size=units * periods))
    return np.array(flat, dtype=float).reshape(units, periods)


# ---- expressions --------------------------------------------------------------------

NAMES = ("a", "b", "c")


def numbers() -> st.SearchStrategy[str]:
    """Constants as they would be written: small integers and one-decimal numbers."""
    return st.one_of(
        st.integers(0, 100).map(str),
        st.integers(0, 1000).map(lambda n: f"{n / 10:.1f}"),
    )


def arithmetic_expressions(names: tuple[str, ...] = NAMES) -> st.SearchStrategy[str]:
    """Fully parenthesised arithmetic text over ``names`` using every allowed operator."""
    leaves = st.one_of(st.sampled_from(names), numbers())

    def extend(inner: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
        binary = st.builds(
            lambda a, op, b: f"({a} {op} {b})",
            inner,
            st.sampled_from(["+", "-", "*", "/", "//", "%"]),
            inner,
        )
        unary = inner.map(lambda a: f"(-{a})")
        square = inner.map(lambda a: f"({a} ** 2)")
        call = st.one_of(
            inner.map(lambda a: f"abs({a})"),
            st.builds(
                lambda f, a, b: f"{f}({a}, {b})", st.sampled_from(["min", "max"]), inner, inner
            ),
        )
        choose = st.builds(lambda c, a, b: f"({a} if {c} else {b})", inner, inner, inner)
        return st.one_of(binary, binary, unary, square, call, choose)

    return st.recursive(leaves, extend, max_leaves=8)


def boolean_expressions(names: tuple[str, ...] = NAMES) -> st.SearchStrategy[str]:
    """Comparisons (chains too) combined with and / or / not."""
    arithmetic = arithmetic_expressions(names)
    comparison = st.builds(
        lambda a, op, b: f"({a} {op} {b})",
        arithmetic,
        st.sampled_from(["<", "<=", ">", ">=", "==", "!="]),
        arithmetic,
    )
    chain = st.builds(lambda a, b, c: f"({a} < {b} <= {c})", arithmetic, arithmetic, arithmetic)

    def extend(inner: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
        return st.one_of(
            st.builds(lambda a, b: f"({a} and {b})", inner, inner),
            st.builds(lambda a, b: f"({a} or {b})", inner, inner),
            inner.map(lambda a: f"(not {a})"),
        )

    return st.recursive(st.one_of(comparison, chain), extend, max_leaves=4)


def metric_values() -> st.SearchStrategy[float]:
    """Plain floats a metric could take: counts and one-decimal values, some negative."""
    return st.one_of(
        st.integers(-50, 10_000).map(float),
        st.integers(-1000, 1000).map(lambda n: n / 10),
    )
