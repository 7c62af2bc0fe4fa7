"""Small PNG charts of one series for the HTML digest.

Each chart shows the recent values of a series as a line with points, the band (low..high)
as a shaded area, its centre as a dashed line where known, and the flagged period
highlighted. Charts are drawn with :class:`matplotlib.figure.Figure` on the Agg canvas
directly, so nothing touches pyplot's global state and no display is needed.

The history frame has the columns ``period`` (label), ``value``, ``centre``, ``low``,
``high``, oldest first; NaN marks a missing value or a period without a band.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

HISTORY_COLUMNS = ("period", "value", "centre", "low", "high")

WIDTH_IN = 4.8
HEIGHT_IN = 1.8
DPI = 150  # drawn at 1.5x: 720×270 px, shown at 480×180 CSS px so it stays sharp on phones
DISPLAY_WIDTH = 480  # CSS pixels in the HTML digest
DISPLAY_HEIGHT = 180
MAX_TICKS = 6

LINE = "#1f5f8b"
BAND = "#cfe3d4"
CENTRE = "#4f8a5b"
FLAG = "#c0392b"
GRID = "#e6e8eb"
TEXT = "#3b4450"


def chart_png(history: pd.DataFrame, title: str, flagged_period: str) -> bytes:
    """Draw ``history`` and return PNG bytes (720×270 px; shown at 480×180, about 20 KB)."""
    missing = [c for c in HISTORY_COLUMNS if c not in history.columns]
    if missing:
        raise ValueError(f"history frame lacks column(s) {', '.join(missing)}")
    periods = [str(p) for p in history["period"]]
    x = np.arange(len(periods), dtype=float)
    value = _floats(history["value"])
    low, high, centre = (_floats(history[c]) for c in ("low", "high", "centre"))

    fig = Figure(figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.1, 0.17, 0.87, 0.68))
    _draw_band(ax, x, low, high, centre)
    ax.plot(x, value, color=LINE, linewidth=1.6, marker="o", markersize=3.2, zorder=3)
    if flagged_period in periods:
        _draw_flag(ax, periods.index(flagged_period), value)
    _style_axes(ax, x, periods, title)
    if _non_negative(value, low, high, centre):
        ax.set_ylim(bottom=0)
    return _to_png(fig)


def _floats(column: pd.Series) -> np.ndarray:
    return pd.to_numeric(column, errors="coerce").to_numpy(dtype=float, na_value=np.nan)


def _draw_band(ax, x: np.ndarray, low: np.ndarray, high: np.ndarray, centre: np.ndarray) -> None:
    known = ~np.isnan(low) & ~np.isnan(high)
    if known.any():
        ax.fill_between(x, low, high, where=known, color=BAND, linewidth=0, step=None, zorder=1)
    if (~np.isnan(centre)).any():
        ax.plot(x, centre, color=CENTRE, linewidth=1.0, linestyle=(0, (4, 3)), zorder=2)


def _draw_flag(ax, position: int, value: np.ndarray) -> None:
    flagged = value[position]
    if math.isnan(flagged):  # silence: no report at the flagged period
        ax.axvspan(position - 0.4, position + 0.4, color=FLAG, alpha=0.15, linewidth=0)
        ax.annotate(
            "no report",
            (position, 0.5),
            xycoords=("data", "axes fraction"),
            ha="center",
            va="center",
            color=FLAG,
            fontsize=7,
            rotation=90,
        )
        return
    ax.plot(
        [position],
        [flagged],
        marker="o",
        markersize=7,
        color=FLAG,
        zorder=4,
        markeredgecolor="white",
        markeredgewidth=1.0,
    )
    ax.annotate(
        _short(flagged),
        (position, flagged),
        xytext=(-6, 0),
        textcoords="offset points",
        ha="right",
        va="center",
        color=FLAG,
        fontsize=7.5,
        fontweight="bold",
    )


def _style_axes(ax, x: np.ndarray, periods: list[str], title: str) -> None:
    ax.set_title(_plain(title), fontsize=8, color=TEXT, loc="left", pad=4)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color("#b8bec6")
    ax.tick_params(labelsize=6.5, colors=TEXT, length=2)
    ax.grid(axis="y", color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)
    ax.set_xlim(-0.5, max(len(x) - 0.5, 0.5))
    step = max(1, math.ceil(len(periods) / MAX_TICKS))
    ticks = list(range(len(periods) - 1, -1, -step))[::-1]  # always label the latest period
    ax.set_xticks(ticks, [periods[i] for i in ticks])


def _non_negative(*arrays: np.ndarray) -> bool:
    """True when every known number is >= 0: counts then sit on a zero baseline."""
    values = np.concatenate(arrays)
    values = values[~np.isnan(values)]
    return bool(values.size == 0 or values.min() >= 0)


def _plain(text: str) -> str:
    """Keep a unit name like ``Clinic $5 $6`` from being parsed as mathtext."""
    return " ".join(text.split()).replace("$", r"\$")


def _short(value: float) -> str:
    return f"{value:,.0f}" if float(value).is_integer() or abs(value) >= 100 else f"{value:.1f}"


def _to_png(fig: Figure) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, metadata={"Software": None})
    return buffer.getvalue()
