"""Backtest: replay stages 1–3 over past periods under several settings and compare them.

``digest backtest --config FILE --from P1 --to P2 --set band.k=2.5,3,3.5`` answers "how
many alerts would each officer have had, and would the known problems have been found?"
before a setting goes live.

The data are loaded once. Derived metrics and the totals up the hierarchy do not depend
on band or check settings, so they are computed once too; each setting then learns its
bands (every period at once, as in a run) and evaluates every period of the range. A
period is evaluated exactly as ``digest run --as-of PERIOD`` would: bands and checks only
look at data up to that period. The alert lifecycle (reminders, acknowledgements) is not
replayed: a recipient's count is every alert routed to them for the period.

Settings: each ``--set TARGET=V1,V2,...`` gives a list of values; the settings are the
cartesian product of the lists. ``band.<field>`` applies to every ``[[band]]`` (a band
whose method does not read the field keeps it unset); ``check.<name>.<field>`` to one
check. When a setting changes ``band.method`` without giving ``band.k``, k falls back to
the new method's default.

With a ground-truth file (columns ``check,unit,period``, as the demo's ``truth.csv``):
recall = truth rows found ÷ truth rows in the range (checks of the config only); false
alarms = alerts not in the truth, per 100 series-periods. For a band check the
series-periods are the units × periods, at the check's levels, that had a band and a
value; for other checks the units × periods at the check's levels where the unit (or a
child of it) was expected to report.

The recommended setting keeps every recipient at or under ``[tuning]
max_alerts_per_digest`` in every period and has the best recall; ties go to fewer alerts.
"""

from __future__ import annotations

import io
import itertools
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from pydantic import ValidationError

from digest.bands import BandArrays, derive, learn_bands
from digest.config import (
    BandCheck,
    BandConfig,
    Config,
    cross_check,
    format_validation_error,
)
from digest.errors import ConfigError, DataError
from digest.evaluate import ALERT_COLUMNS, EXTRA_COLUMNS, evaluate
from digest.loading import Dataset, load_values
from digest.periods import parse_period
from digest.recipients import Recipient, config_programmes, load_recipients
from digest.rollup import LevelData, rollup
from digest.route import REQUIRED_COLUMNS as ROUTED_COLUMNS
from digest.route import route
from digest.sources import load_units, source_label

Key = tuple[str, str | None, str]  # ("band", None, field) or ("check", name, field)
Setting = dict[Key, Any]


# ---- settings --------------------------------------------------------------------------------


@dataclass(frozen=True)
class Override:
    """One ``--set``: a field of every band, or of one check, and the values to try."""

    key: Key
    values: tuple[Any, ...]

    @property
    def target(self) -> str:
        kind, name, field_name = self.key
        return f"{kind}.{name}.{field_name}" if name else f"{kind}.{field_name}"


def parse_set(text: str) -> Override:
    """``band.k=2.5,3`` or ``check.penta_dropout.max=10,15`` -> :class:`Override`."""
    target, sep, listed = text.partition("=")
    parts = target.strip().split(".")
    if not sep or not listed.strip():
        raise ConfigError(f"--set {text!r}: expected TARGET=V1[,V2...], e.g. band.k=2.5,3,3.5")
    if parts[0] == "band" and len(parts) == 2:
        key: Key = ("band", None, parts[1])
    elif parts[0] == "check" and len(parts) == 3:
        key = ("check", parts[1], parts[2])
    else:
        raise ConfigError(
            f"--set {text!r}: the target is band.<field> or check.<name>.<field>, not {target!r}"
        )
    return Override(key, tuple(_literal(v.strip()) for v in listed.split(",")))


def _literal(text: str) -> Any:
    """A TOML value (2.5, 3, true, "x"); anything else is taken as a bare string."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def settings_grid(overrides: Sequence[Override]) -> list[Setting]:
    """The cartesian product of the overrides' values; one empty setting without any."""
    keys = [o.key for o in overrides]
    if len(set(keys)) != len(keys):
        raise ConfigError("--set: the same target is given twice; list all its values in one")
    return [
        dict(zip(keys, combo, strict=True))
        for combo in itertools.product(*(o.values for o in overrides))
    ]


def setting_label(setting: Setting) -> str:
    if not setting:
        return "as configured"
    return " ".join(
        f"{kind}.{name + '.' if name else ''}{field_name}={_shown(value)}"
        for (kind, name, field_name), value in setting.items()
    )


def _shown(value: Any) -> str:
    """A value as it would be written on the command line (true, not True)."""
    return str(value).lower() if isinstance(value, bool) else str(value)


def apply_setting(config: Config, setting: Setting) -> Config:
    """``config`` with the setting applied, validated and cross-checked like a file."""
    label = setting_label(setting)
    band_fields = {f: v for (kind, _, f), v in setting.items() if kind == "band"}
    try:
        bands = [_band_with(b, band_fields) for b in config.band]
        checks = []
        for check in config.check:
            fields = {
                f: v for (kind, n, f), v in setting.items() if kind == "check" and n == check.name
            }
            checks.append(_model_with(check, fields) if fields else check)
    except ValidationError as exc:
        raise ConfigError(
            [f"--set {label}: {line}" for line in format_validation_error(exc)]
        ) from None
    unknown = sorted(
        {n for (kind, n, _) in setting if kind == "check"} - {c.name for c in config.check}
    )
    if unknown:
        raise ConfigError(f"--set {label}: no check named {', '.join(unknown)}")
    updated = config.model_copy(update={"band": bands, "check": checks})
    problems = cross_check(updated)
    if problems:
        raise ConfigError([f"--set {label}: {p}" for p in problems])
    return updated


def _band_with(band: BandConfig, fields: dict[str, Any]) -> BandConfig:
    if not fields:
        return band
    unknown = sorted(set(fields) - set(BandConfig.model_fields))
    if unknown:
        raise ConfigError(f"--set band.{unknown[0]}: [[band]] has no field {unknown[0]!r}")
    data = band.model_dump(exclude_unset=True)
    if "method" in fields and fields["method"] != band.method and "k" not in fields:
        data.pop("k", None)  # the new method's own default width
    data.update(fields)
    updated = BandConfig.model_validate(data)
    unused = set(getattr(updated, "unused_keys", list)())
    if unused:  # e.g. band.k on a poisson band: the method does not read it
        updated = BandConfig.model_validate({k: v for k, v in data.items() if k not in unused})
    return updated


def _model_with(model: Any, fields: dict[str, Any]) -> Any:
    cls = type(model)
    names = {}
    for name, info in cls.model_fields.items():
        names[name] = info.alias or name
        if info.alias:
            names[info.alias] = info.alias
    data = model.model_dump(by_alias=True, exclude_unset=True)
    for given, value in fields.items():
        if given not in names:
            raise ConfigError(f"--set check.{model.name}.{given}: the check has no such field")
        data[names[given]] = value
    return cls.model_validate(data)


# ---- the replay ---------------------------------------------------------------------------------


@dataclass
class Prepared:
    """What every setting shares: the data, loaded once, and its totals."""

    config: Config
    dataset: Dataset
    series: dict[str, np.ndarray]
    levels: dict[str, LevelData]
    recipients: list[Recipient] | None


def prepare(config: Config) -> Prepared:
    """Load units, values and recipients once; derive metrics and sum them up every level."""
    hierarchy = load_units(config)
    dataset = load_values(config, hierarchy).dataset
    if not len(dataset.periods):
        raise DataError(f"{source_label(config.data.values, 'values')}: no valid rows to replay")
    series = derive(config, dataset.values)
    levels = rollup(dataset, series, config.data.levels)
    recipients = None
    if config.mail.recipients is not None:
        recipients = load_recipients(config.mail.recipients, hierarchy, config_programmes(config))
    return Prepared(config, dataset, series, levels, recipients)


def columns_between(dataset: Dataset, start: str, end: str, kind: str) -> list[int]:
    """Column positions of the periods from ``start`` to ``end`` inclusive."""
    cols = []
    for flag, text in (("--from", start), ("--to", end)):
        try:
            cols.append(dataset.column(parse_period(text, kind)))  # type: ignore[arg-type]
        except ValueError as exc:
            raise DataError(f"{flag}: {exc}") from None
    if cols[0] > cols[1]:
        raise DataError(f"--from {start} is after --to {end}")
    return list(range(cols[0], cols[1] + 1))


def replay(
    prepared: Prepared,
    config: Config,
    columns: Sequence[int],
    bands: dict[tuple[str, str], BandArrays] | None = None,
) -> tuple[pd.DataFrame, dict[tuple[str, str], BandArrays]]:
    """Stages 1 and 3 for every column under ``config``; the alerts of all those periods.

    Bands cover every period at once, so they are learned once (or passed in when another
    setting had the same ``[[band]]`` tables).
    """
    dataset = prepared.dataset
    if bands is None:
        bands = learn_bands(config, dataset, prepared.series)
    cache: dict[Any, Any] = {}
    labels = dataset.period_labels
    frames = [
        evaluate(
            config,
            dataset.hierarchy,
            prepared.levels,
            bands,
            c,
            labels[c],
            periods=dataset.periods,
            cache=cache,
        )
        for c in columns
    ]
    found = [f for f in frames if len(f)]
    if not found:
        return pd.DataFrame(columns=[*ALERT_COLUMNS, *EXTRA_COLUMNS]), bands
    return pd.concat(found, ignore_index=True), bands


# ---- scoring --------------------------------------------------------------------------------


@dataclass
class Outcome:
    """One setting's numbers over the range."""

    label: str
    setting: Setting
    alerts: pd.DataFrame = field(repr=False)
    per_period: pd.Series  # alerts per period label
    per_check: pd.Series  # alerts per check over the range
    recipient_counts: np.ndarray | None  # [periods x recipients]
    busiest: str = ""
    truth_rows: int = 0
    found: int = 0
    band_truth_rows: int = 0
    band_found: int = 0
    false_alarms: int = 0
    band_false_alarms: int = 0
    series_periods: int = 0
    band_series_periods: int = 0

    @property
    def total(self) -> int:
        return len(self.alerts)

    @property
    def recipient_median(self) -> float:
        if self.recipient_counts is None or not self.recipient_counts.size:
            return float("nan")
        return float(np.median(self.recipient_counts))

    @property
    def recipient_max(self) -> float:
        if self.recipient_counts is None or not self.recipient_counts.size:
            return float("nan")
        return float(self.recipient_counts.max())

    @property
    def recall(self) -> float:
        return self.found / self.truth_rows if self.truth_rows else float("nan")

    @property
    def band_recall(self) -> float:
        return self.band_found / self.band_truth_rows if self.band_truth_rows else float("nan")

    @property
    def false_per_100(self) -> float:
        return (
            100 * self.false_alarms / self.series_periods if self.series_periods else float("nan")
        )

    @property
    def band_false_per_100(self) -> float:
        n = self.band_series_periods
        return 100 * self.band_false_alarms / n if n else float("nan")


@dataclass
class BacktestResult:
    config: Config
    periods: list[str]
    outcomes: list[Outcome]
    cap: int
    truth: pd.DataFrame | None
    recommended: Outcome | None
    note: str

    def frame(self) -> pd.DataFrame:
        """One row per setting: the content of backtest.csv."""
        rows = []
        checks = [c.name for c in self.config.check]
        for o in self.outcomes:
            row: dict[str, Any] = {"setting": o.label}
            for (kind, name, field_name), value in o.setting.items():
                row[f"{kind}.{name + '.' if name else ''}{field_name}"] = value
            row |= {
                "periods": len(self.periods),
                "alerts": o.total,
                "alerts_per_period_median": float(o.per_period.median()),
                "alerts_per_period_max": int(o.per_period.max()) if len(o.per_period) else 0,
                "per_recipient_median": o.recipient_median,
                "per_recipient_max": o.recipient_max,
                "busiest_recipient": o.busiest,
                "under_cap": _under_cap(o, self.cap),
                "recall": o.recall,
                "band_recall": o.band_recall,
                "truth_rows": o.truth_rows,
                "false_alarms_per_100": o.false_per_100,
                "band_false_alarms_per_100": o.band_false_per_100,
                "recommended": o is self.recommended,
            }
            row |= {f"alerts.{c}": int(o.per_check.get(c, 0)) for c in checks}
            rows.append(row)
        return pd.DataFrame(rows)

    def periods_frame(self) -> pd.DataFrame:
        """Alerts per period per setting (long form), the data of the chart."""
        parts = []
        for o in self.outcomes:
            most = (
                o.recipient_counts.max(axis=1)
                if o.recipient_counts is not None and o.recipient_counts.size
                else np.full(len(self.periods), np.nan)
            )
            parts.append(
                pd.DataFrame(
                    {
                        "setting": o.label,
                        "period": self.periods,
                        "alerts": o.per_period.reindex(self.periods, fill_value=0).to_numpy(),
                        "per_recipient_max": most,
                    }
                )
            )
        return pd.concat(parts, ignore_index=True)


def run_backtest(
    config: Config,
    start: str,
    end: str,
    overrides: Sequence[Override] = (),
    truth: Path | None = None,
    prepared: Prepared | None = None,
) -> BacktestResult:
    """Replay ``start``..``end`` under every setting; score and recommend one."""
    configs = [(s, apply_setting(config, s)) for s in settings_grid(overrides)]  # fail early
    prepared = prepared or prepare(config)
    dataset = prepared.dataset
    columns = columns_between(dataset, start, end, config.data.period)
    labels = [dataset.period_labels[c] for c in columns]
    truth_frame = read_truth(truth, config, labels) if truth is not None else None
    outcomes = []
    learned: dict[tuple[str, ...], dict[tuple[str, str], BandArrays]] = {}
    for setting, variant in configs:
        same = tuple(b.model_dump_json() for b in variant.band)  # e.g. only a check changed
        alerts, learned[same] = replay(prepared, variant, columns, learned.get(same))
        bands = learned[same]
        outcomes.append(
            _score(prepared, variant, setting, alerts, bands, columns, labels, truth_frame)
        )
    cap = config.tuning.max_alerts_per_digest
    recommended, note = recommend(
        outcomes, cap, prepared.recipients is not None, truth_frame is not None
    )
    return BacktestResult(config, labels, outcomes, cap, truth_frame, recommended, note)


def read_truth(path: Path, config: Config, periods: Sequence[str]) -> pd.DataFrame:
    """Truth rows of the config's checks inside the range (columns check, unit, period)."""
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        raise DataError(
            f"{path}: file not found; pass --truth with a CSV of check,unit,period"
        ) from None
    missing = [c for c in ("check", "unit", "period") if c not in frame.columns]
    if missing:
        raise DataError(f"{path}: missing column(s) {', '.join(missing)}; need check,unit,period")
    names = {c.name for c in config.check}
    keep = frame["check"].isin(names) & frame["period"].isin(list(periods))
    return frame.loc[keep, ["check", "unit", "period"]].drop_duplicates().reset_index(drop=True)


def _score(
    prepared: Prepared,
    config: Config,
    setting: Setting,
    alerts: pd.DataFrame,
    bands: dict[tuple[str, str], BandArrays],
    columns: Sequence[int],
    labels: Sequence[str],
    truth: pd.DataFrame | None,
) -> Outcome:
    per_period = alerts.groupby("period").size().reindex(list(labels), fill_value=0)
    per_check = alerts.groupby("check").size()
    outcome = Outcome(setting_label(setting), setting, alerts, per_period, per_check, None)
    if prepared.recipients is not None:
        _recipient_counts(outcome, prepared, labels)
    if truth is not None:
        _truth_counts(outcome, prepared, config, bands, columns, truth)
    return outcome


def _recipient_counts(outcome: Outcome, prepared: Prepared, labels: Sequence[str]) -> None:
    recipients = prepared.recipients or []
    counts = np.zeros((len(labels), len(recipients)), dtype=np.int64)
    alerts = outcome.alerts
    for i, label in enumerate(labels):
        in_period = alerts[alerts["period"] == label]
        if not len(in_period) or not recipients:
            continue
        slim = in_period[list(ROUTED_COLUMNS)].astype({"unit_index": np.int64})
        routing = route(slim, recipients, prepared.dataset.hierarchy)
        counts[i] = [len(b.alerts) for b in routing.bundles]
    outcome.recipient_counts = counts
    if counts.size and counts.max() > 0:
        period, person = np.unravel_index(int(np.argmax(counts)), counts.shape)
        outcome.busiest = f"{recipients[person].email} ({labels[period]})"


def _truth_counts(
    outcome: Outcome,
    prepared: Prepared,
    config: Config,
    bands: dict[tuple[str, str], BandArrays],
    columns: Sequence[int],
    truth: pd.DataFrame,
) -> None:
    band_checks = {c.name for c in config.check if isinstance(c, BandCheck)}
    raised = set(
        zip(outcome.alerts["check"], outcome.alerts["unit"], outcome.alerts["period"], strict=True)
    )
    known = set(zip(truth["check"], truth["unit"], truth["period"], strict=True))
    outcome.truth_rows = len(known)
    outcome.found = len(known & raised)
    outcome.band_truth_rows = sum(1 for k in known if k[0] in band_checks)
    outcome.band_found = sum(1 for k in known & raised if k[0] in band_checks)
    false = raised - known
    outcome.false_alarms = len(false)
    outcome.band_false_alarms = sum(1 for k in false if k[0] in band_checks)
    cols = list(columns)
    for check in config.check:
        for level in check.levels:
            data = prepared.levels[level]
            if isinstance(check, BandCheck):
                arrays = bands[(check.band, level)]
                metric = config.band_named(check.band).metric
                seen = ~np.isnan(arrays.centre[:, cols]) & ~np.isnan(
                    data.metrics[metric].values[:, cols]
                )
                n = int(seen.sum())
                outcome.band_series_periods += n
            else:
                n = int((data.expected[:, cols] > 0).sum())
            outcome.series_periods += n


def recommend(
    outcomes: Sequence[Outcome], cap: int, have_recipients: bool, have_truth: bool
) -> tuple[Outcome | None, str]:
    """Best recall among the settings that keep every digest at or under ``cap``."""
    fits = [o for o in outcomes if _under_cap(o, cap) is not False]
    if not fits:
        quietest = min(outcomes, key=lambda o: (o.recipient_max, o.total))
        return None, (
            f"no setting keeps every recipient at or under {cap} alerts a period; the lowest "
            f"maximum is {quietest.recipient_max:.0f} with {quietest.label}"
        )

    def rank(o: Outcome) -> tuple[float, int]:
        recall = o.recall if have_truth and not np.isnan(o.recall) else 0.0
        return (-recall, o.total)

    best = min(fits, key=rank)  # min keeps the first of equals: the order given
    why = [f"recommended: {best.label}"]
    why.append(
        f"every recipient at or under {cap} alerts a period (max {best.recipient_max:.0f})"
        if have_recipients
        else "no [mail] recipients: the per-digest cap could not be checked"
    )
    why.append(
        f"recall {best.recall:.0%}"
        if have_truth
        else "no --truth file: recall unknown, so the quietest setting"
    )
    return best, "; ".join(why)


def _under_cap(outcome: Outcome, cap: int) -> bool | None:
    if outcome.recipient_counts is None:
        return None
    return bool(outcome.recipient_max <= cap) if outcome.recipient_counts.size else True


# ---- output -----------------------------------------------------------------------------------


def format_table(result: BacktestResult) -> str:
    """The terminal report: one line per setting, then alerts per check."""
    head = ("setting", "alerts", "per period", "per recipient", "max", "recall", "band recall",
            "false/100", "band false/100")  # fmt: skip
    rows = []
    for o in result.outcomes:
        mark = " *" if o is result.recommended else ""
        rows.append(
            (
                o.label + mark,
                str(o.total),
                f"{o.per_period.median():g}",
                _num(o.recipient_median),
                _num(o.recipient_max) + ("" if _under_cap(o, result.cap) is not False else " !"),
                _pct(o.recall),
                _pct(o.band_recall),
                _num(o.false_per_100, 2),
                _num(o.band_false_per_100, 2),
            )
        )
    lines = [
        f"backtest {result.periods[0]} to {result.periods[-1]} ({len(result.periods)} periods); "
        f"per recipient: median and max alerts in one period's digest (cap {result.cap})",
        *_columns(head, rows),
        "",
        "alerts per check over the range:",
    ]
    checks = [c.name for c in result.config.check]
    check_rows = [
        (name, *(str(int(o.per_check.get(name, 0))) for o in result.outcomes)) for name in checks
    ]
    lines += _columns(("check", *(f"[{i + 1}]" for i in range(len(result.outcomes)))), check_rows)
    lines += [f"  [{i + 1}] {o.label}" for i, o in enumerate(result.outcomes)]
    if result.truth is not None:
        lines.append(
            f"truth: {len(result.truth)} rows of the config's checks in the range; recall = "
            "found ÷ truth rows; false/100 = alerts not in the truth per 100 series-periods"
        )
    lines += ["", ("* " if result.recommended else "") + result.note]
    return "\n".join(lines)


def _columns(head: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]

    def line(r: Sequence[str]) -> str:
        return "  ".join(
            str(v).ljust(w) if i == 0 else str(v).rjust(w)
            for i, (v, w) in enumerate(zip(r, widths, strict=True))
        ).rstrip()

    return [line(head), "  ".join("-" * w for w in widths), *(line(r) for r in rows)]


def _num(x: float, digits: int = 0) -> str:
    if x is None or np.isnan(x):
        return "–"
    return f"{x:.{digits}f}" if digits else f"{x:g}"


def _pct(x: float) -> str:
    return "–" if np.isnan(x) else f"{x:.0%}"


def write_files(result: BacktestResult, out_dir: Path) -> dict[str, Path]:
    """backtest.csv (one row per setting), backtest_periods.csv and backtest.png."""
    from digest.outputs import write_atomic

    paths = {
        "csv": out_dir / "backtest.csv",
        "periods": out_dir / "backtest_periods.csv",
        "chart": out_dir / "backtest.png",
    }
    summary = result.frame()
    periods = result.periods_frame()
    write_atomic(paths["csv"], lambda fh: summary.to_csv(fh, index=False, lineterminator="\r\n"))
    write_atomic(
        paths["periods"], lambda fh: periods.to_csv(fh, index=False, lineterminator="\r\n")
    )
    png = chart_png(result)
    write_atomic(paths["chart"], lambda fh: fh.write(png))
    return paths


def chart_png(result: BacktestResult) -> bytes:
    """Alerts per period per setting, and the busiest digest per period against the cap."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    data = result.periods_frame()
    fig = Figure(figsize=(9, 6.5), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    top, bottom = fig.subplots(2, 1, sharex=True)
    x = np.arange(len(result.periods))
    for label, part in data.groupby("setting", sort=False):
        top.plot(x, part["alerts"].to_numpy(), marker="o", markersize=3, label=str(label))
        bottom.plot(x, part["per_recipient_max"].to_numpy(), marker="o", markersize=3)
    top.set_ylabel("alerts, all units")
    top.set_title(f"backtest {result.periods[0]} to {result.periods[-1]}")
    bottom.axhline(
        result.cap,
        color="#c0392b",
        linestyle="--",
        linewidth=1,
        label=f"cap: {result.cap} per digest",
    )
    bottom.set_ylabel("busiest digest")
    step = max(1, len(x) // 12)
    bottom.set_xticks(x[::step], [result.periods[i] for i in x[::step]], rotation=45, ha="right")
    for ax in (top, bottom):
        ax.grid(True, color="#e6e8eb")
        ax.set_ylim(bottom=0)
        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    fig.legend(loc="outside lower center", ncols=min(3, len(result.outcomes) + 1), fontsize=8)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    return buffer.getvalue()
