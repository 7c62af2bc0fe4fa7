"""Render one recipient's digest: subject, plain text, HTML, inline charts and a CSV.

Templates are Jinja2 files. The packaged defaults live in the ``digest.templates`` package
(the repository's ``templates/`` folder); an administrator's folder (``mail.templates``)
comes first, file by file, and an override may extend a stock template through the
``default/`` prefix (``{% extends "default/digest.html.j2" %}``).

Templates see exactly the fields of :class:`DigestView` (documented below; run
``python -m digest.render`` for the reference). :func:`render_digest` builds that view from
the recipient's alerts, which arrive sorted worst first: that order is kept, and alerts are
grouped by unit in order of first appearance.

Every digest must carry the health cautions in both parts; a rendered digest that lacks
them (e.g. an override that dropped them) is refused with a ConfigError.
"""

from __future__ import annotations

import hashlib
import html
import importlib.resources
import logging
import math
import re
import textwrap
import unicodedata
from dataclasses import dataclass, field, fields
from datetime import datetime
from pathlib import Path
from types import SimpleNamespace
from typing import Any, Protocol

import jinja2
import numpy as np
import pandas as pd

from digest.charts import DISPLAY_HEIGHT, DISPLAY_WIDTH, chart_png
from digest.config import MailConfig
from digest.errors import ConfigError
from digest.hierarchy import Hierarchy, build_hierarchy
from digest.message import alerts_csv, csv_filename

log = logging.getLogger("digest.render")

SUBJECT, TEXT, HTML = "subject.txt.j2", "digest.txt.j2", "digest.html.j2"
TEMPLATE_NAMES = (SUBJECT, TEXT, HTML)
SEVERITIES = ("critical", "warning", "notice")
TEXT_WIDTH = 80
SIGNATURE_SEPARATOR = "-- "  # the usual plain-text signature line keeps its trailing space
SUBJECT_LIMIT = 200
MISSING = "–"
RATIO_FLOOR = 5.0  # no "12× the usual level" when the usual level is below this (noise)
PATH_SEPARATOR = " › "
CAUTIONS = (
    "A flagged value is a prompt to verify the figure at its source (register, tally sheet "
    "or report form), not proof of an error.",
    "It may be a real outbreak or a real change in services or population: look before you "
    "correct.",
    "This digest carries aggregate counts only, never patient-level data. Do not add "
    "patient-level details when you reply or forward it.",
    "Follow national guidelines for verifying and correcting data and for outbreak response.",
)


def doc(text: str) -> dict[str, str]:
    """Field metadata whose description feeds the template reference."""
    return {"doc": text}


# ---- what the caller passes in -------------------------------------------------------


class HistorySource(Protocol):
    """Recent values of one series, for the history list and the chart.

    Returns a frame with the columns ``period, value, centre, low, high`` (NaN allowed),
    oldest first, ending at ``period`` (inclusive), at most ``count`` rows; empty when the
    series is unknown. ``band`` is the alert's band name ('' when it has none): the band
    columns come from it. From a pipeline run, for example::

        lambda metric, unit, band, period, count: result.history(unit, metric, band, count)
    """

    def __call__(
        self, metric: str, unit_index: int, band: str, period: str, count: int
    ) -> pd.DataFrame: ...


@dataclass(frozen=True)
class DigestContext:
    """Run-wide inputs shared by every digest of one run."""

    run_id: str = field(metadata=doc("Id of the run, shown in the footer."))
    period: str = field(metadata=doc("The evaluated period, e.g. 2026-10 or 2026-W42."))
    generated_at: datetime = field(
        metadata=doc("When the run started (passed in; the clock is never read here).")
    )
    hierarchy: Hierarchy = field(metadata=doc("The reporting hierarchy, for unit names and paths."))
    mail: MailConfig = field(
        metadata=doc("The [mail] section: charts, history length, admin, sender.")
    )
    history: HistorySource | None = field(
        default=None, metadata=doc("Recent values per series; None gives no history or charts.")
    )
    chart_points: int = field(default=12, metadata=doc("Periods drawn in each chart."))
    chart_cache: dict[tuple[str, int, str], bytes] = field(
        default_factory=dict,
        metadata=doc(
            "Charts drawn so far in this run, by (metric, unit index, period): an alert that "
            "reaches several recipients is drawn once. Share one context across the run."
        ),
    )
    max_alerts: int = field(
        default=40,
        metadata=doc(
            "Alerts shown in full; the rest are counted and left to the CSV attachment "
            "(keeps the HTML well under the ~100 KB at which some webmail clips a message)."
        ),
    )


@dataclass(frozen=True)
class Chart:
    """One inline chart: the HTML shows it as ``<img src="cid:{cid}">`` (RFC 2392)."""

    cid: str = field(metadata=doc("Content-ID without angle brackets, unique per message."))
    png: bytes = field(metadata=doc("The PNG image."))
    filename: str = field(metadata=doc("File name given with the inline part, e.g. chart-1.png."))
    description: str = field(
        metadata=doc("What the chart shows, e.g. 'last 12 values, expected range 40–95, ...'.")
    )
    width: int = field(default=DISPLAY_WIDTH, metadata=doc("Display width, CSS pixels."))
    height: int = field(default=DISPLAY_HEIGHT, metadata=doc("Display height, CSS pixels."))


@dataclass
class RenderedDigest:
    """A digest ready to be put into a message."""

    subject: str
    text: str
    html: str
    charts: list[Chart]
    csv_bytes: bytes
    csv_filename: str = "alerts.csv"


# ---- what the templates see ----------------------------------------------------------


@dataclass(frozen=True)
class HistoryPoint:
    """One past value of the series."""

    period: str = field(metadata=doc("Period label."))
    value: str = field(metadata=doc("Formatted value; – when not reported."))
    flagged: bool = field(metadata=doc("True for the period the alert is about."))


@dataclass(frozen=True)
class AlertView:
    """One alert, formatted for reading."""

    check: str = field(metadata=doc("Check name (code)."))
    kind: str = field(metadata=doc("Check kind: band, bounds, dropout, relation or silence."))
    severity: str = field(metadata=doc("critical, warning or notice."))
    programme: str = field(metadata=doc("Programme tag of the check."))
    metric_label: str = field(
        metadata=doc(
            "Title: the metric's label ('Dropout from <label>' for dropout); the check "
            "name for an expression (bounds) or when there is no label."
        )
    )
    period: str = field(metadata=doc("Period of the alert."))
    value: str = field(
        metadata=doc(
            "Reported value, formatted: % for dropout, 'no report' for silence, else – when missing."
        )
    )
    range_label: str = field(
        metadata=doc("'Expected range' (learned), 'Allowed range' (fixed) or ''.")
    )
    expected_range: str = field(
        metadata=doc("Low–high, 'at most H', 'at least L', or '' when there is none.")
    )
    centre: str = field(
        metadata=doc("Usual level (band centre), formatted, or '' when there is none.")
    )
    outside: str = field(
        metadata=doc("How far outside, e.g. '4.2× the usual level, 317 above the upper limit'.")
    )
    detail: str = field(metadata=doc("The check's own sentence about this alert."))
    advice: str = field(metadata=doc("What to do next ('' when the check gives none)."))
    history: tuple[HistoryPoint, ...] = field(
        metadata=doc(
            "Last few values, oldest first, ending at the period; empty when the alert's "
            "value is not the series' own (dropout, most expressions, relation)."
        )
    )
    reporting: str = field(
        metadata=doc(
            "For totals: '12 of 15 facilities reported'; '' at the capture level or when "
            "the detail sentence already says so."
        )
    )
    chart: Chart | None = field(metadata=doc("Inline chart, or None."))
    alert_id: str = field(
        default="", metadata=doc("Ledger id to quote in `digest ack ALERT_ID` ('' in previews).")
    )
    status: str = field(
        default="",
        metadata=doc(
            "Why it is in this digest: 'new', 'reminder' (still open) or 'again' (failed "
            "again after being resolved); '' when unknown."
        ),
    )


@dataclass(frozen=True)
class ResolvedView:
    """An alert from an earlier digest that no longer fails."""

    alert_id: str = field(metadata=doc("Ledger id of the alert."))
    path: str = field(metadata=doc("Unit path, joined by ' › '."))
    check: str = field(metadata=doc("Check name."))
    period: str = field(metadata=doc("Period of the alert."))
    detail: str = field(metadata=doc("The sentence it carried when it was raised."))


@dataclass(frozen=True)
class UnitGroup:
    """The alerts of one unit, worst first."""

    unit: str = field(metadata=doc("Unit id."))
    name: str = field(metadata=doc("Unit name."))
    path: str = field(metadata=doc("Names from below the root down to the unit, joined by ' › '."))
    level: str = field(metadata=doc("Level name of the unit."))
    alerts: tuple[AlertView, ...] = field(metadata=doc("The unit's alerts, worst first."))


@dataclass(frozen=True)
class SeverityCount:
    """How many alerts of one severity the digest holds."""

    severity: str = field(metadata=doc("critical, warning or notice."))
    count: int = field(metadata=doc("Number of alerts."))


@dataclass(frozen=True)
class DigestView:
    """Everything a digest template may use, and nothing else."""

    run_id: str = field(metadata=doc("Id of the run."))
    period: str = field(metadata=doc("The evaluated period."))
    generated_at: str = field(metadata=doc("When the run started, e.g. '2026-11-03 02:15 UTC'."))
    recipient_name: str = field(
        metadata=doc("Name of the recipient (their address when no name is known).")
    )
    recipient_email: str = field(metadata=doc("Address of the recipient."))
    home_unit: str = field(metadata=doc("Name of the recipient's home unit."))
    home_path: str = field(metadata=doc("Path of the home unit, joined by ' › '."))
    total: int = field(metadata=doc("Number of alerts in this digest."))
    counts: tuple[SeverityCount, ...] = field(
        metadata=doc("Alerts per severity, critical first, all three.")
    )
    groups: tuple[UnitGroup, ...] = field(
        metadata=doc("Units with alerts, in order of their worst alert.")
    )
    more: int = field(metadata=doc("Alerts beyond max_alerts, listed only in the CSV file."))
    subscription: str = field(metadata=doc("What the recipient is subscribed to, in one sentence."))
    cautions: tuple[str, ...] = field(
        metadata=doc("The health cautions; every digest must show all of them.")
    )
    admin_name: str = field(metadata=doc("Who to ask to change a subscription."))
    admin_email: str = field(metadata=doc("Their address ('' when not configured)."))
    sender_name: str = field(metadata=doc("The From name of digests."))
    resolved: tuple[ResolvedView, ...] = field(
        default=(),
        metadata=doc("Alerts resolved since the recipient's last digest (corrected data)."),
    )


def describe_context() -> str:
    """The template reference: every class templates see, with its fields."""
    lines: list[str] = []
    for cls in (DigestView, SeverityCount, UnitGroup, AlertView, HistoryPoint, Chart):
        lines += [f"{cls.__name__}: {cls.__doc__}"]
        lines += [f"  {f.name}: {f.metadata.get('doc', '')}" for f in fields(cls)]
        lines.append("")
    return "\n".join(lines)


# ---- environment ---------------------------------------------------------------------


def packaged_templates_dir() -> Path:
    """The folder of the packaged default templates (editable checkout or installed)."""
    root = Path(str(importlib.resources.files("digest.templates")))
    if not (root / HTML).is_file():
        raise ConfigError(f"packaged templates not found in {root}; reinstall digest")
    return root


def make_environment(templates_dir: Path | None) -> jinja2.Environment:
    """Jinja2 environment: admin folder first (file by file), then the packaged defaults.

    Every template is loaded once here, so a syntax error or a missing folder shows up
    before the nightly run, and the source of each template is logged.
    """
    packaged = jinja2.FileSystemLoader(packaged_templates_dir())
    loaders: list[jinja2.BaseLoader] = []
    if templates_dir is not None:
        if not Path(templates_dir).is_dir():
            raise ConfigError(
                f"mail.templates: folder {templates_dir} does not exist; create it or remove "
                "the key to use the packaged templates"
            )
        loaders.append(jinja2.FileSystemLoader(templates_dir))
    loaders += [packaged, jinja2.PrefixLoader({"default": packaged})]
    env = jinja2.Environment(
        loader=jinja2.ChoiceLoader(loaders),
        autoescape=jinja2.select_autoescape(
            enabled_extensions=("html.j2", "html", "htm"),
            disabled_extensions=("txt.j2", "txt"),
            default_for_string=False,
            default=False,
        ),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters["wrap"] = wrap
    env.filters["oneline"] = one_line
    for name in TEMPLATE_NAMES:
        log.info("template %s from %s", name, _load(env, name).filename)
    return env


def _load(env: jinja2.Environment, name: str) -> jinja2.Template:
    try:
        return env.get_template(name)
    except jinja2.TemplateSyntaxError as exc:
        raise ConfigError(
            f"template {exc.filename or exc.name} line {exc.lineno}: {exc.message}"
        ) from exc
    except jinja2.TemplateNotFound as exc:
        raise ConfigError(f"template {name} not found in the configured folders") from exc


# ---- rendering -----------------------------------------------------------------------


def render_digest(
    bundle_alerts: pd.DataFrame,
    recipient: Any,
    context: DigestContext,
    env: jinja2.Environment,
    resolved: pd.DataFrame | None = None,
) -> RenderedDigest:
    """Render one recipient's digest from their alerts (sorted worst first) and, optionally,
    the alerts resolved since their last digest."""
    view = build_view(bundle_alerts, recipient, context, resolved)
    variables = {f.name: getattr(view, f.name) for f in fields(view)}
    subject = clean_header(_render(env, SUBJECT, variables))
    text = fit_width(_render(env, TEXT, variables))
    body = _render(env, HTML, variables)
    _require_cautions(text, TEXT, env)
    _require_cautions(html.unescape(body), HTML, env)
    charts = [a.chart for g in view.groups for a in g.alerts if a.chart is not None]
    return RenderedDigest(
        subject, text, body, charts, alerts_csv(bundle_alerts), csv_filename(context.period)
    )


def _render(env: jinja2.Environment, name: str, variables: dict[str, Any]) -> str:
    template = _load(env, name)
    try:
        return template.render(variables)
    except jinja2.TemplateError as exc:
        raise ConfigError(f"template {template.filename}: {type(exc).__name__}: {exc}") from exc


def _require_cautions(rendered: str, name: str, env: jinja2.Environment) -> None:
    flat = " ".join(rendered.split())
    missing = [c for c in CAUTIONS if c not in flat]
    if missing:
        source = _load(env, name).filename
        raise ConfigError(
            f"template {source} leaves out the health caution {missing[0]!r}; every digest "
            "must show all of {{ cautions }}"
        )


def build_view(
    bundle: pd.DataFrame,
    recipient: Any,
    context: DigestContext,
    resolved: pd.DataFrame | None = None,
) -> DigestView:
    """Turn a recipient's alerts into the documented template context."""
    hierarchy, mail = context.hierarchy, context.mail
    home = int(recipient.unit_index)
    budget = _ChartBudget(mail.charts, salt=f"{context.run_id}\0{recipient.email}")
    shown = bundle.head(context.max_alerts)
    by_unit: dict[int, list[AlertView]] = {}  # first appearance order, rows in given order
    for row in shown.itertuples(index=False):
        by_unit.setdefault(int(row.unit_index), []).append(_alert_view(row, context, budget))
    groups = tuple(_unit_group(u, alerts, hierarchy) for u, alerts in by_unit.items())
    counts = bundle["severity"].value_counts() if len(bundle) else pd.Series(dtype=int)
    return DigestView(
        run_id=context.run_id,
        period=context.period,
        generated_at=_when(context.generated_at),
        recipient_name=(getattr(recipient, "name", "") or "").strip() or recipient.email,
        recipient_email=recipient.email,
        home_unit=hierarchy.names[home],
        home_path=PATH_SEPARATOR.join(hierarchy.path_names(home)),
        total=len(bundle),
        counts=tuple(SeverityCount(s, int(counts.get(s, 0))) for s in SEVERITIES),
        groups=groups,
        more=len(bundle) - len(shown),
        subscription=_subscription(recipient),
        cautions=CAUTIONS,
        admin_name=mail.admin_name,
        admin_email=mail.admin or "",
        sender_name=mail.sender_name,
        resolved=_resolved_views(resolved, hierarchy),
    )


def _resolved_views(
    resolved: pd.DataFrame | None, hierarchy: Hierarchy
) -> tuple[ResolvedView, ...]:
    if resolved is None or resolved.empty:
        return ()
    views = []
    for row in resolved.itertuples(index=False):
        unit = hierarchy.index.get(str(row.unit))
        path = (
            PATH_SEPARATOR.join(hierarchy.path_names(unit)) if unit is not None else str(row.unit)
        )
        views.append(
            ResolvedView(
                alert_id=str(row.alert_id),
                path=path,
                check=_text(row.check),
                period=_text(row.period),
                detail=_text(getattr(row, "detail", "")),
            )
        )
    return tuple(views)


STATUS_WORDS = {"new": "new", "reminder": "reminder", "reopened": "again"}


def _status(row: Any) -> str:
    return STATUS_WORDS.get(_text(getattr(row, "reason", "")), "")


def _alert_id(row: Any) -> str:
    value = getattr(row, "alert_id", None)
    return (
        "" if value is None or (isinstance(value, float) and math.isnan(value)) else str(int(value))
    )


@dataclass
class _ChartBudget:
    """Charts go to the first ``limit`` alerts (worst first) that have a series."""

    limit: int
    salt: str = ""  # run and recipient, so that Content-IDs are unique across messages
    used: int = 0

    def take(self) -> int | None:
        """The number of the next chart, or None when the budget is spent."""
        if self.used >= self.limit:
            return None
        self.used += 1
        return self.used


def _unit_group(unit_index: int, alerts: list[AlertView], hierarchy: Hierarchy) -> UnitGroup:
    return UnitGroup(
        unit=hierarchy.ids[unit_index],
        name=hierarchy.names[unit_index],
        path=PATH_SEPARATOR.join(hierarchy.path_names(unit_index)),
        level=hierarchy.level_of(unit_index),
        alerts=tuple(alerts),
    )


def _alert_view(row: Any, context: DigestContext, budget: _ChartBudget) -> AlertView:
    kind = str(row.kind)
    value, expected, low, high = (
        _num(getattr(row, c)) for c in ("value", "expected", "low", "high")
    )
    history, own_series = _history(row, context)
    shown = history.tail(context.mail.history)
    number = budget.take() if not history.empty else None
    chart = _chart(row, history, context, number, budget.salt) if number else None
    range_label, expected_range = _range(kind, low, high)
    return AlertView(
        check=_text(row.check),
        kind=kind,
        severity=_text(row.severity),
        programme=_text(row.programme),
        metric_label=_title(row, own_series),
        period=_text(row.period),
        value=_value_text(kind, value),
        range_label=range_label,
        expected_range=expected_range,
        centre=fmt(expected) if kind in ("band", "silence") and not math.isnan(expected) else "",
        outside=describe_outside(kind, value, expected, low, high),
        detail=_text(row.detail),
        advice=_text(getattr(row, "advice", "")),
        history=tuple(
            HistoryPoint(str(p.period), fmt(_num(p.value)), str(p.period) == str(row.period))
            for p in shown.itertuples(index=False)
        ),
        reporting=_reporting(row, context.hierarchy),
        chart=chart,
        alert_id=_alert_id(row),
        status=_status(row),
    )


def _title(row: Any, own_series: bool) -> str:
    label = _text(getattr(row, "metric_label", ""))
    if (row.kind == "bounds" and not own_series) or not label:
        return _text(row.check).replace("_", " ").capitalize()  # an expression: name the check
    return f"Dropout from {label}" if row.kind == "dropout" else label


def _history(row: Any, context: DigestContext) -> tuple[pd.DataFrame, bool]:
    """The series' recent values and True, or an empty frame and False when the values
    would not explain the alert (the alert's value is not the series' own)."""
    metric = _text(getattr(row, "metric", ""))
    if not metric or context.history is None:
        return _NO_HISTORY, False
    count = max(context.mail.history, context.chart_points)
    band = _text(getattr(row, "band", ""))
    frame = context.history(metric, int(row.unit_index), band, str(row.period), count)
    frame = frame.tail(count).reset_index(drop=True)
    return (frame, True) if _same_series(frame, row) else (_NO_HISTORY, False)


def _same_series(frame: pd.DataFrame, row: Any) -> bool:
    """The flagged value is the series' own value at the alert's period.

    False for a dropout percentage or an expression (e.g. a share) whose primary metric is
    a different quantity: its values beside the alert's value would mislead.
    """
    at = frame.loc[frame["period"].astype(str) == str(row.period), "value"]
    if at.empty:
        return False
    mine, theirs = _num(row.value), _num(at.iloc[-1])
    if math.isnan(mine) or math.isnan(theirs):
        return row.kind == "silence" and math.isnan(theirs)
    return math.isclose(mine, theirs, rel_tol=1e-9, abs_tol=1e-9)


_NO_HISTORY = pd.DataFrame(columns=["period", "value", "centre", "low", "high"])


def _chart(
    row: Any, history: pd.DataFrame, context: DigestContext, number: int, salt: str
) -> Chart:
    drawn = history.tail(context.chart_points)
    label = _text(getattr(row, "metric_label", "")) or _text(row.check)
    key = (_text(row.metric), int(row.unit_index), str(row.period))
    png = context.chart_cache.get(key)
    if png is None:
        unit_name = context.hierarchy.names[int(row.unit_index)]
        png = context.chart_cache[key] = chart_png(drawn, f"{label} — {unit_name}", key[2])
    token = hashlib.sha256(f"{salt}\0{number}".encode()).hexdigest()[:16]
    return Chart(
        cid=f"chart{number}.{token}@{context.mail.domain}",
        png=png,
        filename=f"chart-{number}.png",
        description=_chart_description(row, drawn),
    )


def _chart_description(row: Any, drawn: pd.DataFrame) -> str:
    low, high, value = _num(row.low), _num(row.high), _num(row.value)
    parts = [f"last {len(drawn)} values"]
    if not (math.isnan(low) and math.isnan(high)):
        parts.append(f"expected range {_range_text(low, high)}")
    parts.append(
        f"no report in {row.period}"
        if math.isnan(value)
        else f"flagged {fmt(value)} in {row.period}"
    )
    return ", ".join(parts)


# ---- wording -------------------------------------------------------------------------


def fmt(value: float | None) -> str:
    """Integers without decimals, other numbers with one; – when missing."""
    number = _num(value)
    if math.isnan(number):
        return MISSING
    if math.isinf(number):
        return "∞" if number > 0 else "-∞"
    return f"{number:.0f}" if number.is_integer() else f"{number:.1f}"


def describe_outside(kind: str, value: float, expected: float, low: float, high: float) -> str:
    """How far a value lies outside its range, in words; '' when that cannot be said."""
    if kind == "relation":
        return "the reported values contradict each other"
    if kind == "silence":
        return "no recent report from a unit that used to report"
    if math.isnan(value):
        return ""
    if kind == "dropout":
        return _dropout_outside(value, low, high)
    if kind == "bounds":
        if not math.isnan(high) and value > high:
            return f"{fmt(value - high)} above the maximum of {fmt(high)}"
        if not math.isnan(low) and value < low:
            return f"{fmt(low - value)} below the minimum of {fmt(low)}"
        return ""
    return _band_outside(value, expected, low, high)


def _band_outside(value: float, expected: float, low: float, high: float) -> str:
    usual = not math.isnan(expected) and expected >= RATIO_FLOOR
    if not math.isnan(high) and value > high:
        gap = f"{fmt(value - high)} above the upper limit"
        ratio = value / expected if usual else 0.0
        if ratio >= 1.5:
            times = f"{ratio:.0f}" if ratio >= 10 else f"{ratio:.1f}"
            return f"{times}× the usual level, {gap}"
        return gap
    if not math.isnan(low) and value < low:
        gap = f"{fmt(low - value)} below the lower limit"
        if usual and value == 0:
            return f"none reported against a usual {fmt(expected)}, {gap}"
        if usual and value / expected <= 0.67:
            return f"{value / expected:.0%} of the usual level, {gap}"
        return gap
    return ""


def _dropout_outside(value: float, low: float, high: float) -> str:
    if not math.isnan(high) and value > high:
        return f"{fmt(value - high)} points above the highest allowed dropout ({fmt(high)}%)"
    if value < 0:
        return "negative dropout: more last doses than first doses"
    if not math.isnan(low) and value < low:
        return f"{fmt(low - value)} points below the lowest allowed dropout ({fmt(low)}%)"
    return ""


def _value_text(kind: str, value: float) -> str:
    if math.isnan(value):
        return "no report" if kind == "silence" else MISSING
    return fmt(value) + ("%" if kind == "dropout" else "")


def _range(kind: str, low: float, high: float) -> tuple[str, str]:
    if math.isnan(low) and math.isnan(high):
        return "", ""
    label = "Allowed range" if kind in ("bounds", "dropout") else "Expected range"
    text = _range_text(low, high)
    return label, text + ("%" if kind == "dropout" and not math.isnan(high) else "")


def _range_text(low: float, high: float) -> str:
    if math.isnan(low):
        return f"at most {fmt(high)}"
    if math.isnan(high):
        return f"at least {fmt(low)}"
    return f"{fmt(low)}–{fmt(high)}"


def _reporting(row: Any, hierarchy: Hierarchy) -> str:
    reported = _num(getattr(row, "children_reported", np.nan))
    expected = _num(getattr(row, "children_expected", np.nan))
    if math.isnan(reported) or math.isnan(expected):
        return ""
    if f"{fmt(reported)} of {fmt(expected)} " in _text(row.detail):
        return ""  # the check's sentence already says it (evaluate appends it)
    noun = plural(hierarchy.capture_level) if expected != 1 else hierarchy.capture_level
    return f"{fmt(reported)} of {fmt(expected)} {noun.replace('_', ' ')} reported"


def plural(noun: str) -> str:
    """English plural of a level name: facility -> facilities, district -> districts."""
    if noun.endswith("y") and noun[-2:-1] not in tuple("aeiou"):
        return noun[:-1] + "ies"
    if noun.endswith(("s", "x", "z", "ch", "sh")):
        return noun + "es"
    return noun + "s"


def _subscription(recipient: Any) -> str:
    programmes = getattr(recipient, "programmes", None)
    which = "all programmes" if not programmes else ", ".join(sorted(programmes))
    severity = getattr(recipient, "min_severity", None) or "notice"
    reach = getattr(recipient, "reach", None)
    deep = f", down to {reach} level" if reach else ""
    levels = {"critical": "critical alerts", "warning": "critical and warning alerts"}
    return f"You receive {levels.get(severity, 'alerts of every severity')} for {which}{deep}."


def _when(moment: datetime) -> str:
    zone = moment.strftime("%Z")
    return moment.strftime("%Y-%m-%d %H:%M") + (f" {zone}" if zone else "")


def _num(value: Any) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return math.nan
    return number


def _text(value: Any) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return ""
    return str(value)


# ---- text hygiene --------------------------------------------------------------------

_BIDI = re.compile("[\u202a-\u202e\u2066-\u2069]")


def one_line(value: Any) -> str:
    """Control characters and line breaks become spaces; runs of spaces collapse."""
    text = _BIDI.sub("", str(value))
    text = "".join(" " if unicodedata.category(ch) in ("Cc", "Zl", "Zp") else ch for ch in text)
    return " ".join(text.split())


def clean_header(value: str, limit: int = SUBJECT_LIMIT) -> str:
    """A safe one-line header value: no CR/LF or control characters, at most ``limit``."""
    text = one_line(value)
    return text if len(text) <= limit else text[: limit - 1].rstrip() + "…"


def wrap(value: Any, indent: str = "", hanging: str | None = None, width: int = TEXT_WIDTH) -> str:
    """Jinja filter: fill one paragraph to ``width`` columns with a hanging indent."""
    return textwrap.fill(
        one_line(value),
        width=width,
        initial_indent=indent,
        subsequent_indent=indent if hanging is None else hanging,
        break_on_hyphens=False,
    )


def fit_width(text: str, width: int = TEXT_WIDTH) -> str:
    """Safety net for the text part: wrap any line wider than ``width``, keeping its indent."""
    out: list[str] = []
    for line in text.splitlines():
        if line == SIGNATURE_SEPARATOR:
            out.append(line)
            continue
        if len(line) <= width:
            line = line.rstrip()
            if line or (out and out[-1]):  # at most one blank line in a row
                out.append(line)
            continue
        indent = line[: len(line) - len(line.lstrip())][: width // 2]
        out += textwrap.wrap(
            line.strip(), width=width, initial_indent=indent, subsequent_indent=indent + "  "
        )
    return "\n".join(out).strip("\n") + "\n"


# ---- a sample digest: template checks, previews and tests ----------------------------


def history_from_frame(frame: pd.DataFrame) -> HistorySource:
    """A HistorySource over a long frame: unit_index, metric, period, value, centre, low, high.

    The band name is ignored: the frame holds one band per series.
    """
    series = {
        (str(metric), int(unit)): part.sort_values("period")
        for (metric, unit), part in frame.groupby(["metric", "unit_index"], sort=False)
    }
    columns = ["period", "value", "centre", "low", "high"]

    def lookup(metric: str, unit_index: int, band: str, period: str, count: int) -> pd.DataFrame:
        part = series.get((metric, unit_index))
        if part is None:
            return pd.DataFrame(columns=columns)
        return part.loc[part["period"] <= period, columns].tail(count).reset_index(drop=True)

    return lookup


_SAMPLE_UNITS = (  # id, name, parent, level: an invented country
    ("ex", "Examplia", "", "country"),
    ("p1", "Alder Province", "ex", "province"),
    ("d1", "Birchwood District", "p1", "district"),
    ("f1", "Cedar Hill Health Centre", "d1", "facility"),
    ("f2", "Dunmore Clinic", "d1", "facility"),
    ("f3", "Elmside Dispensary", "d1", "facility"),
)
_SAMPLE_PERIODS = tuple(f"2025-{m:02d}" for m in (11, 12)) + tuple(
    f"2026-{m:02d}" for m in range(1, 11)
)
_SAMPLE_SERIES = {  # (metric, unit index): (values, centre, low, high)
    ("anc1_visits", 3): ([62, 71, 66, 58, 69, 74, 63, 70, 65, 72, 67, 412], 67.0, 44.0, 90.0),
    ("malaria_cases_u5", 2): (
        [148, 162, 175, 190, 171, 166, 158, 181, 169, 177, 172, 61],
        170.0,
        128.0,
        212.0,
    ),
    ("anc1_visits", 5): ([31, 28, 33, 30, 29, 35, 32, 30, 34, None, None, None], 31.0, 22.0, 40.0),
    ("penta1_doses", 2): ([90, 94, 88, 97, 91, 95, 89, 93, 96, 92, 94, 92], None, None, None),
}
_SAMPLE_ALERTS = (  # worst first, as routing hands them over
    {"check": "anc1_out_of_band", "kind": "band", "unit_index": 3, "severity": "critical",
     "value": 412.0, "expected": 67.0, "low": 44.0, "high": 90.0, "programme": "maternal",
     "metric": "anc1_visits", "metric_label": "First antenatal visits", "band": "anc1_usual",
     "detail": "First antenatal visits were 412, far above the expected 44–90.",
     "advice": "Compare the report with the antenatal register; check for a typing error "
               "(an extra digit) before correcting.", "score": 9.1},
    {"check": "anc4_le_anc1", "kind": "relation", "unit_index": 3, "severity": "warning",
     "programme": "maternal", "metric": "anc4_visits", "metric_label": "Fourth antenatal visits",
     "detail": "Fourth antenatal visits (96) exceed first antenatal visits (88).",
     "advice": "Check that the two figures were not swapped on the form.", "score": 5.0},
    {"check": "malaria_u5_band", "kind": "band", "unit_index": 2, "severity": "warning",
     "value": 61.0, "expected": 170.0, "low": 128.0, "high": 212.0, "programme": "malaria",
     "metric": "malaria_cases_u5", "metric_label": "Confirmed malaria, under 5",
     "band": "malaria_u5_usual", "children_reported": 9.0, "children_expected": 14.0,
     "detail": "Confirmed malaria under 5 fell to 61 against an expected 128–212.",
     "advice": "Ask which facilities have not reported and whether rapid tests ran out.",
     "score": 4.2},
    {"check": "anc1_silence", "kind": "silence", "unit_index": 5, "severity": "notice",
     "expected": 31.0, "low": 22.0, "high": 40.0, "programme": "maternal",
     "metric": "anc1_visits", "metric_label": "First antenatal visits",
     "detail": "No first antenatal visits reported for 3 months (2026-08 to 2026-10).",
     "advice": "Call the facility in charge.", "score": 3.0},
    {"check": "penta_dropout", "kind": "dropout", "unit_index": 2, "severity": "notice",
     "value": -6.5, "low": 0.0, "high": 10.0, "programme": "immunization",
     "metric": "penta1_doses", "metric_label": "Pentavalent dose 1", "children_reported": 12.0,
     "children_expected": 14.0,
     "detail": "Pentavalent dropout was -6.5 %: more third doses than first doses.",
     "advice": "Check that doses given to children from other districts were recorded.",
     "score": 2.0},
)  # fmt: skip
_SAMPLE_COLUMNS = (
    "check", "kind", "unit", "unit_index", "unit_name", "level", "period", "value", "expected",
    "low", "high", "severity", "programme", "detail", "score", "metric", "metric_label", "band",
    "advice", "children_reported", "children_expected",
)  # fmt: skip


def sample_inputs(
    mail: MailConfig | None = None, *, unit_name: str | None = None
) -> tuple[pd.DataFrame, Any, DigestContext]:
    """An invented scenario (alerts, recipient, context) for previews, checks and tests.

    ``unit_name`` renames the first facility (e.g. to test escaping).
    """
    rows = [dict(zip(("id", "name", "parent", "level"), u, strict=True)) for u in _SAMPLE_UNITS]
    rows[3]["name"] = unit_name or rows[3]["name"]
    hierarchy = build_hierarchy(
        "sample", [(i + 2, r) for i, r in enumerate(rows)], [r["level"] for r in rows[:4]]
    )
    history = pd.DataFrame(
        [
            (unit, metric, period, *(np.nan if x is None else float(x) for x in (v, c, lo, hi)))
            for (metric, unit), (values, c, lo, hi) in _SAMPLE_SERIES.items()
            for period, v in zip(_SAMPLE_PERIODS, values, strict=True)
        ],
        columns=["unit_index", "metric", "period", "value", "centre", "low", "high"],
    )
    alerts = pd.DataFrame(list(_SAMPLE_ALERTS)).reindex(columns=list(_SAMPLE_COLUMNS))
    alerts["unit"] = [hierarchy.ids[i] for i in alerts["unit_index"]]
    alerts["unit_name"] = [hierarchy.names[i] for i in alerts["unit_index"]]
    alerts["level"] = [hierarchy.level_of(i) for i in alerts["unit_index"]]
    alerts["period"] = _SAMPLE_PERIODS[-1]
    recipient = SimpleNamespace(
        email="l.marsh@health.example.org", name="Dr Lina Marsh", unit="d1", unit_index=2,
        reach="facility", programmes=None, min_severity="notice",
    )  # fmt: skip
    mail = mail or MailConfig.model_validate(
        {"from": "digest@health.example.org", "admin": "data.manager@health.example.org",
         "admin_name": "Sam Osei, data manager", "domain": "health.example.org"}
    )  # fmt: skip
    context = DigestContext(
        run_id="20261103T0215-7f3a", period=_SAMPLE_PERIODS[-1],
        generated_at=datetime.fromisoformat("2026-11-03T02:15:00+00:00"),
        hierarchy=hierarchy, mail=mail, history=history_from_frame(history),
    )  # fmt: skip
    return alerts, recipient, context


def check_templates(env: jinja2.Environment) -> RenderedDigest:
    """Render the sample digest, so that a template typo fails before the nightly run."""
    alerts, recipient, context = sample_inputs()
    return render_digest(alerts, recipient, context, env)


if __name__ == "__main__":  # pragma: no cover - prints the template reference
    print(describe_context())
