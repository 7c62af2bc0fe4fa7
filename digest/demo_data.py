"""Deterministic demo scenario: an invented country's monthly facility reports.

:func:`generate` writes a complete, seeded demo data set into a folder:

``units.csv``       the hierarchy country > province > district > facility, with a few
                    facilities that opened or closed inside the reporting window;
``values.csv``      facility reports in long form (``unit,metric,period,value``), about 5 %
                    of them missing, plus about 0.5 % deliberately bad rows;
``bad_rows.csv``    each bad row's line number in ``values.csv`` (header = line 1) and why
                    it is bad: unknown_unit, unknown_metric, bad_period, bad_value,
                    negative_count, conflicting_duplicate (both rows of the pair) or
                    exact_duplicate (the later copies only);
``truth.csv``       the problems injected on purpose, one row per alert a correct run must
                    raise for them (check name, unit, period, kind, description);
``recipients.csv``  invented officers who receive the digests.

Everything here is invented: the Republic of Quellmara, its provinces, districts,
facilities and people do not exist. The same seed always gives the same bytes.

Rules kept so that the injected problems stand out against the normal data:

* normal data never break the relation, dropout, under-five share or stock-out checks
  (the generator clips them and then verifies with its own small evaluator);
* no facility is silent by chance: a run of three missing ``anc1_visits`` reports is
  broken up, except where silence is injected on purpose;
* band truth rows are listed only when the value lies outside mean ± 3 SD (sample SD,
  n - 1) of the previous 12 periods, with at least 6 reported values; districts are
  summed over the facilities that reported. Band alerts caused by ordinary noise are
  expected and are not listed.

Run ``python -m digest.demo_data OUT_DIR`` to write the files from the command line.
"""

from __future__ import annotations

import argparse
import csv
import io
import math
import sys
from collections.abc import Iterable, Sequence
from collections.abc import Set as AbstractSet
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

from digest.periods import format_period, parse_period, period_dates

DEFAULT_SEED = 20261202
COUNTRY_NAME = "Republic of Quellmara"
MAIL_DOMAIN = "health.example.org"

METRICS: tuple[str, ...] = (
    "anc1_visits",
    "anc4_visits",
    "deliveries_facility",
    "penta1_doses",
    "penta3_doses",
    "malaria_cases_u5",
    "malaria_cases_5plus",
    "malaria_tests_done",
    "rdt_stockout_days",
)
BAD_REASONS: tuple[str, ...] = (
    "unknown_unit",
    "unknown_metric",
    "bad_period",
    "bad_value",
    "negative_count",
    "conflicting_duplicate",
    "exact_duplicate",
)
CHECK_KINDS: dict[str, str] = {
    "anc1_out_of_band": "band",
    "deliveries_out_of_band": "band",
    "anc4_above_anc1": "relation",
    "penta_dropout": "dropout",
    "malaria_u5_share": "bounds",
    "anc1_silent": "silence",
    "rdt_stockouts": "bounds",
}
TRUTH_COLUMNS = ("check", "unit", "period", "kind", "description")

# Parts of a report that can be missing on their own (a blank section of the form).
_SECTIONS: tuple[tuple[str, ...], ...] = (
    ("anc1_visits", "anc4_visits", "deliveries_facility"),
    ("penta1_doses", "penta3_doses"),
    ("malaria_cases_u5", "malaria_cases_5plus", "malaria_tests_done"),
)
# Single values that can be missing alone without biasing a district check.
_SINGLES = ("anc4_visits", "deliveries_facility", "malaria_tests_done", "rdt_stockout_days")

_BAND_K, _BAND_WINDOW, _BAND_MIN_POINTS = 3.0, 12, 6
_SILENCE_PERIODS, _SILENCE_WINDOW, _SILENCE_MIN_HISTORY = 3, 12, 6
_CLEAR = 1.15  # injected facility values lie at least this many band half-widths out
_BORDER = (0.93, 1.07)  # district values this close to the band edge are borderline

_ONSETS = (
    "Vel", "Quor", "Thal", "Mirr", "Osk", "Brev", "Zand", "Kell", "Yst", "Fenn", "Corv",
    "Hald", "Drav", "Ilm", "Nors", "Pell", "Ruv", "Sarn", "Tov", "Ubr", "Wend", "Xal",
    "Gorm", "Lisk", "Amb", "Emb", "Orv", "Tass", "Vint", "Quel",
)  # fmt: skip
_MIDDLES = ("", "", "ar", "en", "il", "om", "er", "and")
_ENDINGS = (
    "ora", "ennis", "avel", "orin", "usk", "idra", "ethal", "amor", "ovane", "ith",
    "arro", "endi", "ulme", "asse", "irow", "anth", "elde", "ima", "oss", "uvar",
)  # fmt: skip
_GIVEN = (
    "Amsela", "Berin", "Calvo", "Darila", "Edrin", "Fasima", "Gorel", "Halvi", "Ismene",
    "Jorvan", "Kalisa", "Lemar", "Mireth", "Navo", "Odala", "Pellin", "Quenna", "Rasmo",
    "Selvi", "Torvin", "Ulima", "Varro", "Wenna", "Yorel", "Zafina", "Ebrin", "Tamsi",
)  # fmt: skip
_FAMILY = (
    "Orsabu", "Velkand", "Thirrow", "Maskeli", "Dovanne", "Quarlo", "Istenbe", "Rulvani",
    "Kossamir", "Pendrew", "Lothrani", "Sevuko", "Ambrelli", "Nusavo", "Gethwin", "Tolvaro",
    "Hasselde", "Brivonne", "Carrowin", "Ydrassi", "Feldoma", "Zunbarre",
)  # fmt: skip
# A bad row to insert: (after which clean row, reason, the row's four fields).
_Bad = tuple[int, str, tuple[str, str, str, str]]

_UNKNOWN_METRICS = ("anc2_visits", "penta2_doses", "opd_visits", "measles1_doses")
_BAD_VALUES = ("n/a", "?", "1O", "12a", "seven", "--")


@dataclass(frozen=True)
class DemoTruth:
    """What :func:`generate` wrote and what a correct run must find in it.

    ``truth`` and ``bad_rows`` hold what ``truth.csv`` and ``bad_rows.csv`` hold;
    ``value_rows`` counts the data lines of ``values.csv`` (bad ones included);
    ``missing_share`` is the share of facility-metric-months, while the facility was
    open, without a valid row. ``borderline`` lists ``(check, unit, period)`` district
    band cells within 7 % of the band edge: an engine with another SD convention may
    decide those either way, so an exact comparison should leave them out (the
    default seed has none).
    """

    out_dir: Path
    periods: tuple[str, ...]
    truth: pd.DataFrame = field(repr=False)
    bad_rows: pd.DataFrame = field(repr=False)
    value_rows: int
    missing_share: float
    files: tuple[Path, ...]
    borderline: frozenset[tuple[str, str, str]] = frozenset()

    @property
    def end(self) -> str:
        return self.periods[-1]

    def truth_for(self, check: str, period: str | None = None) -> set[tuple[str, str]]:
        """``{(unit, period)}`` the named check must alert on (optionally one period)."""
        rows = self.truth[self.truth["check"] == check]
        if period is not None:
            rows = rows[rows["period"] == period]
        return set(zip(rows["unit"], rows["period"], strict=True))


@dataclass
class _Hierarchy:
    country: tuple[str, str]
    provinces: list[tuple[str, str]]
    districts: list[tuple[str, str]]
    district_province: np.ndarray
    fac_ids: list[str]
    fac_names: list[str]
    fac_kind: list[str]
    fac_district: np.ndarray
    opened: list[str]
    closed: list[str]
    open_mask: np.ndarray  # [facility, period] bool

    @property
    def n_districts(self) -> int:
        return len(self.districts)


@dataclass
class _Scenario:
    hier: _Hierarchy
    periods: list[str]
    values: dict[str, np.ndarray]  # metric -> [facility, period] float, NaN = not reported
    full: dict[str, np.ndarray]  # the same before reports went missing and problems were added
    truth: list[tuple[str, str, str, str, str]] = field(default_factory=list)
    touched: set[tuple[str, int, int]] = field(default_factory=set)  # (metric, facility, t)
    injected: set[int] = field(default_factory=set)  # facilities that carry a problem
    borderline: set[tuple[str, str, str]] = field(default_factory=set)  # (check, unit, period)

    def report(self, f: int, t: int) -> None:
        """Make the whole report of facility ``f`` at ``t`` present (from the full data)."""
        for code in METRICS:
            if np.isnan(self.values[code][f, t]):
                self.values[code][f, t] = self.full[code][f, t]

    def touched_districts(self, code: str | None = None) -> set[tuple[int, int]]:
        """``{(district, t)}`` where an injected change to ``code`` (or any metric) sits."""
        return {
            (int(self.hier.fac_district[f]), t)
            for (m, f, t) in self.touched
            if code is None or m == code
        }


# ---- names -----------------------------------------------------------------------------


class _NameMaker:
    """Invented place names composed from syllables; never the same name twice."""

    def __init__(self, rng: np.random.Generator) -> None:
        self.rng = rng
        self.used: set[str] = set()

    def place(self) -> str:
        while True:
            name = (
                _ONSETS[self.rng.integers(len(_ONSETS))]
                + _MIDDLES[self.rng.integers(len(_MIDDLES))]
                + _ENDINGS[self.rng.integers(len(_ENDINGS))]
            ).capitalize()
            if name not in self.used:
                self.used.add(name)
                return name


# ---- hierarchy -------------------------------------------------------------------------


def _facility_counts(rng: np.random.Generator, n_districts: int, facilities: int) -> np.ndarray:
    minimum = max(3, facilities // (n_districts * 2))
    share = rng.dirichlet(np.full(n_districts, 6.0))
    spare = facilities - minimum * n_districts
    counts = minimum + np.floor(share * spare).astype(int)
    counts[np.argsort(-share)[: facilities - counts.sum()]] += 1
    return counts


def _build_hierarchy(
    rng: np.random.Generator,
    provinces: int,
    districts_per_province: int,
    facilities: int,
    periods: Sequence[str],
) -> _Hierarchy:
    names = _NameMaker(rng)
    n_districts = provinces * districts_per_province
    prov = [(f"P{i + 1:02d}", f"{names.place()} Province") for i in range(provinces)]
    dist = [(f"D{i + 1:02d}", f"{names.place()} District") for i in range(n_districts)]
    district_province = np.repeat(np.arange(provinces), districts_per_province)
    counts = _facility_counts(rng, n_districts, facilities)
    fac_district = np.repeat(np.arange(n_districts), counts)
    first_of_district = np.concatenate([[0], np.cumsum(counts)[:-1]])
    kinds = ["post"] * facilities
    for start in first_of_district:
        kinds[start] = "hospital"
    fac_ids = [f"F{i + 1:04d}" for i in range(facilities)]
    fac_names = []
    for f in range(facilities):
        if kinds[f] == "hospital":
            fac_names.append(
                dist[fac_district[f]][1].replace(" District", "") + " District Hospital"
            )
        else:
            fac_names.append(names.place())  # suffix added once sizes are known
    opened = [""] * facilities
    old = rng.random(facilities) < 0.12
    for f in np.flatnonzero(old):
        opened[f] = date(int(rng.integers(1975, 2020)), int(rng.integers(1, 13)), 1).isoformat()
    closed = [""] * facilities
    t_count = len(periods)
    open_mask = np.ones((facilities, t_count), dtype=bool)
    candidates = [f for f in rng.permutation(facilities) if kinds[f] != "hospital"]
    last = t_count - 1
    for f, t_open in zip(candidates[:3], (last - 25, last - 15, last - 5), strict=True):
        first_day, _ = period_dates(parse_period(periods[t_open], "month"), "month")
        opened[f] = first_day.isoformat()
        open_mask[f, :t_open] = False
    for f, t_close in zip(candidates[3:5], (last - 15, last - 3), strict=True):
        _, last_day = period_dates(parse_period(periods[t_close], "month"), "month")
        closed[f] = last_day.isoformat()
        open_mask[f, t_close + 1 :] = False
    return _Hierarchy(
        country=("C01", COUNTRY_NAME),
        provinces=prov,
        districts=dist,
        district_province=district_province,
        fac_ids=fac_ids,
        fac_names=fac_names,
        fac_kind=kinds,
        fac_district=fac_district,
        opened=opened,
        closed=closed,
        open_mask=open_mask,
    )


# ---- normal data -----------------------------------------------------------------------


def _noisy_counts(rng: np.random.Generator, mean: np.ndarray, shape: float = 25.0) -> np.ndarray:
    """Negative-binomial counts as a gamma-Poisson mixture (variance mean + mean²/shape)."""
    rate = np.clip(mean, 0, None) * rng.gamma(shape, 1.0 / shape, size=mean.shape)
    return rng.poisson(rate).astype(float)


def _simulate(
    rng: np.random.Generator, hier: _Hierarchy, periods: Sequence[str]
) -> dict[str, np.ndarray]:
    n_fac, n_t = hier.open_mask.shape
    ords = np.array([parse_period(p, "month") for p in periods])
    month = ords % 12 + 1
    days = np.array([(period_dates(o, "month")[1]).day for o in ords], dtype=float)
    hospital = np.array([k == "hospital" for k in hier.fac_kind])
    size = np.where(
        hospital,
        rng.uniform(120, 320, n_fac),
        np.clip(rng.lognormal(np.log(8.0), 0.95, n_fac), 0.6, 90.0),
    )
    for f in range(n_fac):
        if not hospital[f]:
            suffix = "Health Centre" if size[f] >= 15 else "Health Post"
            hier.fac_names[f] = f"{hier.fac_names[f]} {suffix}"
            hier.fac_kind[f] = "centre" if size[f] >= 15 else "post"
    slope = rng.uniform(-0.006, 0.01, n_fac)
    mu = size[:, None] * np.clip(1 + slope[:, None] * (np.arange(n_t) - n_t / 2), 0.3, None)

    out: dict[str, np.ndarray] = {}
    out["anc1_visits"] = _noisy_counts(rng, mu)
    out["anc4_visits"] = rng.binomial(
        out["anc1_visits"].astype(int), rng.uniform(0.5, 0.7, n_fac)[:, None]
    ).astype(float)
    delivery_ratio = np.where(
        hospital,
        rng.uniform(0.8, 1.4, n_fac),
        np.where(size >= 15, rng.uniform(0.4, 0.8, n_fac), rng.uniform(0.05, 0.3, n_fac)),
    )
    out["deliveries_facility"] = _noisy_counts(rng, mu * delivery_ratio[:, None])
    _simulate_penta(rng, mu, out)
    _simulate_malaria(rng, hier, mu, month, days, out)
    _steady_districts(rng, hier, out, hier.open_mask)
    return out


def _simulate_penta(rng: np.random.Generator, mu: np.ndarray, out: dict[str, np.ndarray]) -> None:
    n_fac = mu.shape[0]
    p1 = _noisy_counts(rng, mu * rng.uniform(0.8, 1.05, n_fac)[:, None])
    keep = 1 - rng.uniform(0.02, 0.08, n_fac)[:, None]
    p3 = rng.binomial(p1.astype(int), np.broadcast_to(keep, p1.shape)).astype(float)
    # Normal dropout stays within 0-9.5 % where the check applies (penta1 >= 20) and
    # within 0-25 % elsewhere, so district totals stay clear of the check too.
    floor_guarded = np.ceil(p1 * 0.905)
    floor_small = np.floor(p1 * 0.75)
    p3 = np.maximum(p3, np.where(p1 >= 20, floor_guarded, floor_small))
    out["penta1_doses"], out["penta3_doses"] = p1, np.minimum(p3, p1)


def _simulate_malaria(
    rng: np.random.Generator,
    hier: _Hierarchy,
    mu: np.ndarray,
    month: np.ndarray,
    days: np.ndarray,
    out: dict[str, np.ndarray],
) -> None:
    n_fac = mu.shape[0]
    n_prov = len(hier.provinces)
    amplitude = rng.permutation(np.linspace(0.25, 0.85, n_prov))
    peak = rng.integers(6, 9, n_prov)  # rainy-season peak in June, July or August
    endemic = rng.uniform(1.2, 3.5, n_prov)
    prov = hier.district_province[hier.fac_district]
    season = np.cos(2 * np.pi * (month[None, :] - peak[prov][:, None]) / 12)
    local = rng.lognormal(0.0, 0.3, n_fac)
    cases_mean = mu * (endemic[prov] * local)[:, None] * (1 + amplitude[prov][:, None] * season)
    positivity = np.clip(0.3 + 0.18 * season, 0.08, 0.6)

    stockout = _stockouts(rng, hier, days)
    tests = _noisy_counts(rng, cases_mean / positivity)
    tests = np.round(tests * (1 - stockout / days[None, :]))
    total = rng.binomial(tests.astype(int), positivity).astype(float)
    u5 = rng.binomial(total.astype(int), rng.uniform(0.25, 0.32, n_fac)[:, None]).astype(float)
    u5 = np.where(total >= 20, np.minimum(u5, np.floor(total * 0.34)), u5)
    out["malaria_cases_u5"] = u5
    out["malaria_cases_5plus"] = total - u5
    out["malaria_tests_done"] = tests
    out["rdt_stockout_days"] = stockout


def _steady_districts(
    rng: np.random.Generator,
    hier: _Hierarchy,
    out: dict[str, np.ndarray],
    movable: np.ndarray,
    skip: AbstractSet[tuple[int, int]] = frozenset(),
) -> None:
    """Keep district totals clear of the dropout and under-five share checks.

    Small facilities are not clipped individually (their checks do not apply below
    20), so a district total can stray; move single doses or cases at ``movable``
    [facility, period] cells until it is back within 9 % dropout and 32 % under-five
    share, a margin below the checks' limits. District-months in ``skip`` are left alone.
    """
    u5, o5 = out["malaria_cases_u5"], out["malaria_cases_5plus"]
    p1, p3 = out["penta1_doses"], out["penta3_doses"]

    def totals(x: np.ndarray) -> np.ndarray:
        return _district_totals(hier, np.where(hier.open_mask, x, np.nan))

    with np.errstate(invalid="ignore"):
        astray = (totals(u5) > np.floor(0.32 * totals(u5 + o5))) | (
            totals(p3) < np.ceil(0.91 * totals(p1))
        )
    for d, t in zip(*np.nonzero(astray), strict=True):
        if (d, t) in skip:
            continue
        members = np.flatnonzero(hier.fac_district == d)
        here = members[hier.open_mask[members, t]]
        can = members[movable[members, t]]
        cases = u5[here, t] + o5[here, t]
        excess = np.nansum(u5[here, t]) - math.floor(0.32 * np.nansum(cases))
        while excess > 0 and (u5[can, t] > 0).any():
            f = rng.choice(can[u5[can, t] > 0])
            u5[f, t] -= 1
            o5[f, t] += 1
            excess -= 1
        short = math.ceil(0.91 * np.nansum(p1[here, t])) - np.nansum(p3[here, t])
        while short > 0 and (p3[can, t] < p1[can, t]).any():
            f = rng.choice(can[p3[can, t] < p1[can, t]])
            p3[f, t] += 1
            short -= 1


def _stockouts(rng: np.random.Generator, hier: _Hierarchy, days: np.ndarray) -> np.ndarray:
    n_fac, n_t = hier.open_mask.shape
    has = rng.random((n_fac, n_t)) < 0.015
    for d in range(hier.n_districts):
        members = np.flatnonzero(hier.fac_district == d)
        for t in range(n_t):
            hit = members[has[members, t]]
            if len(hit) > 2:  # at most two sites a district a month in normal data
                has[rng.permutation(hit)[2:], t] = False
    length = rng.integers(1, 11, (n_fac, n_t)).astype(float)
    return np.where(has, np.minimum(length, days[None, :]), 0.0)


# ---- missing reports -------------------------------------------------------------------


def _apply_missing(
    rng: np.random.Generator, hier: _Hierarchy, full: dict[str, np.ndarray]
) -> dict[str, np.ndarray]:
    n_fac, n_t = hier.open_mask.shape
    rate = rng.beta(2.0, 45.0, n_fac)[:, None]
    whole = rng.random((n_fac, n_t)) < rate
    gone = {code: whole | ~hier.open_mask for code in METRICS}
    for section in _SECTIONS:
        blank = rng.random((n_fac, n_t)) < 0.003
        for code in section:
            gone[code] = gone[code] | blank
    for code in _SINGLES:
        gone[code] = gone[code] | (rng.random((n_fac, n_t)) < 0.003)
    _break_silent_runs(hier, gone)
    return {code: np.where(gone[code], np.nan, full[code]) for code in METRICS}


def _break_silent_runs(hier: _Hierarchy, gone: dict[str, np.ndarray]) -> None:
    """Report the middle month of any run of 3+ open months without anc1_visits."""
    missing = gone["anc1_visits"] & hier.open_mask
    for f in range(missing.shape[0]):
        run = 0
        for t in range(missing.shape[1]):
            run = run + 1 if missing[f, t] else 0
            if run == _SILENCE_PERIODS:
                for code in METRICS:
                    gone[code][f, t - 1] = False
                missing[f, t - 1] = False
                run = 1 if missing[f, t] else 0


# ---- small reference evaluator ---------------------------------------------------------


def _district_totals(hier: _Hierarchy, series: np.ndarray) -> np.ndarray:
    """Sum over reporting facilities; NaN where no facility of the district reported."""
    member = np.zeros((hier.n_districts, len(hier.fac_ids)))
    member[hier.fac_district, np.arange(len(hier.fac_ids))] = 1.0
    total = member @ np.nan_to_num(series)
    count = member @ (~np.isnan(series)).astype(float)
    return np.where(count > 0, total, np.nan)


def _band(series: np.ndarray, t: int) -> tuple[float, float, float] | None:
    """(centre, low, high) from the previous 12 values, sample SD; None when too few."""
    past = series[max(0, t - _BAND_WINDOW) : t]
    past = past[~np.isnan(past)]
    if len(past) < _BAND_MIN_POINTS:
        return None
    centre, spread = float(past.mean()), float(past.std(ddof=1))
    return centre, centre - _BAND_K * spread, centre + _BAND_K * spread


def _reach(series: np.ndarray, t: int) -> float:
    """How far the value at ``t`` lies from the centre, in band half-widths (NaN: no band).

    Above 1 means outside the band. Values between 0.93 and 1.07 are *borderline*:
    an engine using the population SD (n) instead of the sample SD (n - 1), whose band
    is about 4 % narrower with 12 values, could decide them the other way.
    """
    band = _band(series, t)
    value = series[t]
    if band is None or np.isnan(value):
        return math.nan
    half = band[2] - band[0]
    if half == 0:
        return 0.0 if value == band[0] else math.inf
    return abs(value - band[0]) / half


def _outside(series: np.ndarray, t: int, margin: float = 1.0) -> tuple[float, float, float] | None:
    """The band when the value at ``t`` lies more than ``margin`` half-widths out, else None."""
    band = _band(series, t)
    if band is None or not _reach(series, t) > margin:
        return None
    return band


def _check_flags(values: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Boolean [unit, period] arrays: where each non-band, non-silence check fails."""
    with np.errstate(all="ignore"):
        anc1, anc4 = values["anc1_visits"], values["anc4_visits"]
        p1, p3 = values["penta1_doses"], values["penta3_doses"]
        u5, o5 = values["malaria_cases_u5"], values["malaria_cases_5plus"]
        dropout = (p1 - p3) / p1 * 100
        share = u5 / (u5 + o5) * 100
        return {
            "anc4_above_anc1": anc4 > anc1,
            "penta_dropout": (p1 >= 20) & ((dropout < 0) | (dropout > 10)),
            "malaria_u5_share": (u5 + o5 >= 20) & (share > 35),
            "rdt_stockouts": values["rdt_stockout_sites"] > 2,
        }


def _silent(hier: _Hierarchy, anc1: np.ndarray) -> np.ndarray:
    """Facilities that reported anc1 often in the window and not at all in the last 3."""
    reported = ~np.isnan(anc1)
    n_fac, n_t = anc1.shape
    out = np.zeros((n_fac, n_t), dtype=bool)
    for t in range(_SILENCE_PERIODS - 1, n_t):
        recent = slice(t - _SILENCE_PERIODS + 1, t + 1)
        window = slice(max(0, t - _SILENCE_PERIODS - _SILENCE_WINDOW + 1), t - _SILENCE_PERIODS + 1)
        out[:, t] = (
            ~reported[:, recent].any(axis=1)
            & hier.open_mask[:, recent].all(axis=1)
            & (reported[:, window].sum(axis=1) >= _SILENCE_MIN_HISTORY)
        )
    return out


# ---- injected problems -----------------------------------------------------------------


def _eligible(sc: _Scenario, t: int, need: Iterable[tuple[str, float]] = ()) -> list[int]:
    """Facilities open all along, not yet used, whose full data meet ``need`` at ``t``."""
    ok = sc.hier.open_mask.all(axis=1)
    for code, minimum in need:
        ok &= sc.full[code][:, t] >= minimum
    return [f for f in np.flatnonzero(ok) if f not in sc.injected]


def _record(sc: _Scenario, check: str, unit: str, t: int, text: str) -> None:
    sc.truth.append((check, unit, sc.periods[t], CHECK_KINDS[check], text))


def _use(sc: _Scenario, f: int, t: int, metrics: Iterable[str]) -> None:
    sc.injected.add(f)
    sc.report(f, t)
    for code in metrics:
        sc.touched.add((code, int(f), t))


def _inject_extra_zero(
    rng: np.random.Generator, sc: _Scenario, t: int, count: int, big: bool = False
) -> None:
    """anc1_visits keyed with an extra zero (x10); each in a different district."""
    used_districts = {d for (d, tt) in sc.touched_districts("anc1_visits") if tt == t}
    pool = _eligible(sc, t, [("anc1_visits", 10)])
    if big:
        pool = [f for f in pool if sc.hier.fac_kind[f] == "hospital"]
    else:
        pool = [f for f in pool if sc.hier.fac_kind[f] != "hospital"]
    done = 0
    for f in rng.permutation(pool):
        if done == count:
            break
        d = int(sc.hier.fac_district[f])
        if d in used_districts:
            continue
        series = sc.values["anc1_visits"][f].copy()
        typed = sc.full["anc1_visits"][f, t] * 10
        series[t] = typed
        band = _outside(series, t, _CLEAR)
        if band is None:
            continue
        _use(sc, f, t, ["anc1_visits"])
        sc.values["anc1_visits"][f, t] = typed
        used_districts.add(d)
        done += 1
        what = "a district hospital" if big else "a facility"
        _record(
            sc,
            "anc1_out_of_band",
            sc.hier.fac_ids[f],
            t,
            f"{what} keyed anc1_visits with an extra zero: {typed:.0f} instead of "
            f"{typed / 10:.0f} (usual {band[0]:.0f}, band {band[1]:.0f} to {band[2]:.0f})",
        )


def _inject_digit_dropped(rng: np.random.Generator, sc: _Scenario, t: int, count: int) -> None:
    """deliveries_facility keyed without its last digit (about a tenth of the usual)."""
    pool = _eligible(sc, t, [("deliveries_facility", 40)])
    done = 0
    for f in rng.permutation(pool):
        if done == count:
            break
        series = sc.values["deliveries_facility"][f].copy()
        true = sc.full["deliveries_facility"][f, t]
        series[t] = float(true // 10)
        band = _outside(series, t, _CLEAR)
        if band is None:
            continue
        _use(sc, f, t, ["deliveries_facility"])
        sc.values["deliveries_facility"][f, t] = series[t]
        done += 1
        _record(
            sc,
            "deliveries_out_of_band",
            sc.hier.fac_ids[f],
            t,
            f"deliveries_facility keyed without its last digit: {series[t]:.0f} instead of "
            f"{true:.0f} (usual {band[0]:.0f}, band {band[1]:.0f} to {band[2]:.0f})",
        )


def _inject_anc4_above(rng: np.random.Generator, sc: _Scenario, t: int, count: int) -> None:
    for f in rng.permutation(_eligible(sc, t, [("anc1_visits", 5)]))[:count]:
        anc1 = sc.full["anc1_visits"][f, t]
        anc4 = anc1 + max(2.0, round(anc1 * rng.uniform(0.2, 0.5)))
        _use(sc, f, t, ["anc4_visits"])
        sc.values["anc4_visits"][f, t] = anc4
        _record(
            sc,
            "anc4_above_anc1",
            sc.hier.fac_ids[f],
            t,
            f"anc4_visits {anc4:.0f} above anc1_visits {anc1:.0f} "
            "(all antenatal visits entered as fourth visits?)",
        )


def _inject_dropout(
    rng: np.random.Generator, sc: _Scenario, t: int, count: int, negative: bool
) -> None:
    for f in rng.permutation(_eligible(sc, t, [("penta1_doses", 20)]))[:count]:
        p1 = sc.full["penta1_doses"][f, t]
        if negative:
            p3 = p1 + max(3.0, round(p1 * rng.uniform(0.1, 0.25)))
            why = "more third doses than first doses (catch-up doses counted as routine?)"
        else:
            p3 = float(round(p1 * rng.uniform(0.6, 0.75)))
            why = "third doses far below first doses (tally sheet page missing?)"
        _use(sc, f, t, ["penta3_doses"])
        sc.values["penta3_doses"][f, t] = p3
        dropout = (p1 - p3) / p1 * 100
        _record(
            sc,
            "penta_dropout",
            sc.hier.fac_ids[f],
            t,
            f"penta1 {p1:.0f}, penta3 {p3:.0f}: dropout {dropout:.1f} % - {why}",
        )


def _inject_u5_share(rng: np.random.Generator, sc: _Scenario, t: int, count: int) -> None:
    pool = [
        f
        for f in _eligible(sc, t)
        if sc.full["malaria_cases_u5"][f, t] + sc.full["malaria_cases_5plus"][f, t] >= 40
    ]
    for i, f in enumerate(rng.permutation(pool)[:count]):
        u5, o5 = sc.full["malaria_cases_u5"][f, t], sc.full["malaria_cases_5plus"][f, t]
        total = u5 + o5
        if i % 2 == 0:
            u5, o5 = o5, u5
            why = "under-five and five-and-over cases entered in each other's boxes"
        else:
            u5 = float(round(total * rng.uniform(0.57, 0.63)))
            o5 = total - u5
            why = "under-five share far above the local pattern (age misclassified?)"
        _use(sc, f, t, ["malaria_cases_u5", "malaria_cases_5plus"])
        sc.values["malaria_cases_u5"][f, t], sc.values["malaria_cases_5plus"][f, t] = u5, o5
        _record(
            sc,
            "malaria_u5_share",
            sc.hier.fac_ids[f],
            t,
            f"{u5:.0f} of {total:.0f} confirmed cases under five ({u5 / total * 100:.0f} %): {why}",
        )


def _inject_silence(rng: np.random.Generator, sc: _Scenario, t: int, count: int) -> None:
    """All reports missing for 3 months ending at ``t``; steady before and after."""
    first = t - _SILENCE_PERIODS + 1
    history = range(max(0, first - _SILENCE_WINDOW), first)
    n_t = len(sc.periods)
    usual = sc.full["anc1_visits"][:, history.start : history.stop].mean(axis=1)
    pool = [f for f in _eligible(sc, t) if usual[f] >= 5]
    for f in rng.permutation(pool)[:count]:
        sc.injected.add(int(f))
        for tt in history:
            sc.report(f, tt)
        if t + 1 < n_t:
            sc.report(f, t + 1)
        for tt in range(first, t + 1):
            for code in METRICS:
                sc.values[code][f, tt] = np.nan
                sc.touched.add((code, int(f), tt))
        _record(
            sc,
            "anc1_silent",
            sc.hier.fac_ids[f],
            t,
            f"reported every month before, then nothing from {sc.periods[first]} to {sc.periods[t]}",
        )


def _inject_stockouts(rng: np.random.Generator, sc: _Scenario, t: int, sites: int) -> None:
    """One district where exactly ``sites`` facilities ran out of rapid tests."""
    hier = sc.hier
    busy = {d for (d, tt) in sc.touched_districts() if tt == t}
    free = [d for d in range(hier.n_districts) if d not in busy] or list(range(hier.n_districts))
    for d in rng.permutation(free):
        pool = [f for f in _eligible(sc, t) if hier.fac_district[f] == d]
        if len(pool) >= sites:
            break
    chosen = sorted(int(f) for f in rng.permutation(pool)[:sites])
    days_in_month = period_dates(parse_period(sc.periods[t], "month"), "month")[1].day
    members = np.flatnonzero(hier.fac_district == d)
    sc.values["rdt_stockout_days"][members, t] = np.where(
        np.isnan(sc.values["rdt_stockout_days"][members, t]), np.nan, 0.0
    )
    for f in chosen:
        _use(sc, f, t, ["rdt_stockout_days"])
        days = float(rng.integers(5, 21))
        sc.values["rdt_stockout_days"][f, t] = days
        cases = sc.values["malaria_cases_u5"][f, t] + sc.values["malaria_cases_5plus"][f, t]
        tests = round(sc.values["malaria_tests_done"][f, t] * (1 - days / days_in_month))
        sc.values["malaria_tests_done"][f, t] = max(cases, tests)
    names = ", ".join(hier.fac_ids[f] for f in chosen)
    _record(
        sc,
        "rdt_stockouts",
        hier.districts[d][0],
        t,
        f"{sites} facilities out of malaria rapid tests in the same month: {names}",
    )


def _inject_all(rng: np.random.Generator, sc: _Scenario) -> None:
    last = len(sc.periods) - 1
    # The evaluated month.
    _inject_silence(rng, sc, last, 4)
    _inject_extra_zero(rng, sc, last, 1, big=True)
    _inject_extra_zero(rng, sc, last, 5)
    _inject_digit_dropped(rng, sc, last, 2)
    _inject_anc4_above(rng, sc, last, 4)
    _inject_dropout(rng, sc, last, 3, negative=True)
    _inject_dropout(rng, sc, last, 3, negative=False)
    _inject_u5_share(rng, sc, last, 4)
    _inject_stockouts(rng, sc, last, 4)
    # A few in earlier months, for backtests and the alert lifecycle.
    _inject_silence(rng, sc, last - 10, 1)
    _inject_extra_zero(rng, sc, last - 14, 1)
    _inject_extra_zero(rng, sc, last - 7, 1)
    _inject_digit_dropped(rng, sc, last - 9, 1)
    _inject_anc4_above(rng, sc, last - 4, 1)
    _inject_dropout(rng, sc, last - 9, 1, negative=True)
    _inject_dropout(rng, sc, last - 6, 1, negative=False)
    _inject_u5_share(rng, sc, last - 3, 1)
    _inject_stockouts(rng, sc, last - 5, 3)


# ---- consequences at district level, and verification -------------------------------


def _with_derived(values: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    days = values["rdt_stockout_days"]
    sites = np.where(np.isnan(days), np.nan, (days > 0).astype(float))
    return {**values, "rdt_stockout_sites": sites}


def _district_truth(sc: _Scenario) -> None:
    """Add district alerts that the injected problems cause; refuse any other alert."""
    hier = sc.hier
    facility = _with_derived(sc.values)
    district = {code: _district_totals(hier, v) for code, v in facility.items()}
    expected = {(c, u, p) for (c, u, p, _, _) in sc.truth}
    metrics_of = {
        "anc4_above_anc1": ("anc1_visits", "anc4_visits"),
        "penta_dropout": ("penta1_doses", "penta3_doses"),
        "malaria_u5_share": ("malaria_cases_u5", "malaria_cases_5plus"),
        "rdt_stockouts": ("rdt_stockout_days",),
    }
    unexplained = []
    for check, flags in _check_flags(facility).items():
        if check == "rdt_stockouts":
            continue  # checked at district level only
        for f, t in zip(*np.nonzero(flags), strict=True):
            if (check, hier.fac_ids[f], sc.periods[t]) not in expected:
                unexplained.append(f"{check} at {hier.fac_ids[f]} {sc.periods[t]}")
    for check, flags in _check_flags(district).items():
        for d, t in zip(*np.nonzero(flags), strict=True):
            key = (check, hier.districts[d][0], sc.periods[t])
            if key in expected:
                continue
            causes = sorted(
                {
                    sc.hier.fac_ids[f]
                    for (m, f, tt) in sc.touched
                    if m in metrics_of[check] and tt == t and hier.fac_district[f] == d
                }
            )
            if causes:
                text = f"the district total includes the problem injected at {', '.join(causes)}"
                _record(sc, check, key[1], t, text)
            else:
                unexplained.append(f"{check} at {key[1]} {key[2]}")
    silent = _silent(hier, sc.values["anc1_visits"])
    for f, t in zip(*np.nonzero(silent), strict=True):
        if ("anc1_silent", hier.fac_ids[f], sc.periods[t]) not in expected:
            unexplained.append(f"anc1_silent at {hier.fac_ids[f]} {sc.periods[t]}")
    if unexplained:
        raise _Unexplained("demo data raise alerts nobody injected: " + "; ".join(unexplained))
    _district_band_truth(sc, district)


def _district_band_truth(sc: _Scenario, district: dict[str, np.ndarray]) -> None:
    bands = (("anc1_out_of_band", "anc1_visits"), ("deliveries_out_of_band", "deliveries_facility"))
    for check, code in bands:
        for d, t in sorted(sc.touched_districts(code)):
            if _BORDER[0] <= _reach(district[code][d], t) <= _BORDER[1]:
                sc.borderline.add((check, sc.hier.districts[d][0], sc.periods[t]))
            band = _outside(district[code][d], t)
            if band is None:
                continue
            causes = sorted(
                {
                    sc.hier.fac_ids[f]
                    for (m, f, tt) in sc.touched
                    if m == code and tt == t and sc.hier.fac_district[f] == d
                }
            )
            _record(
                sc,
                check,
                sc.hier.districts[d][0],
                t,
                f"district total {district[code][d, t]:.0f} outside {band[1]:.0f} to "
                f"{band[2]:.0f} (usual {band[0]:.0f}) because of {', '.join(causes)}",
            )


# ---- files -----------------------------------------------------------------------------


def _csv_text(header: Sequence[str], rows: Iterable[Sequence[object]]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return buffer.getvalue()


def _units_rows(hier: _Hierarchy) -> list[tuple[str, ...]]:
    country_id, country_name = hier.country
    rows = [(country_id, country_name, "", "country", "", "")]
    rows += [(pid, name, country_id, "province", "", "") for pid, name in hier.provinces]
    rows += [
        (did, name, hier.provinces[hier.district_province[i]][0], "district", "", "")
        for i, (did, name) in enumerate(hier.districts)
    ]
    rows += [
        (
            fid,
            hier.fac_names[f],
            hier.districts[hier.fac_district[f]][0],
            "facility",
            hier.opened[f],
            hier.closed[f],
        )
        for f, fid in enumerate(hier.fac_ids)
    ]
    return rows


def _clean_rows(sc: _Scenario) -> list[tuple[str, str, str, int]]:
    """Reported values ordered by period, facility, then metric as in METRICS."""
    stacked = np.stack([sc.values[code] for code in METRICS], axis=-1).transpose(1, 0, 2)
    t_idx, f_idx, m_idx = np.nonzero(~np.isnan(stacked))  # row-major: period, facility, metric
    values = stacked[t_idx, f_idx, m_idx].astype(np.int64).tolist()
    ids, periods = sc.hier.fac_ids, sc.periods
    return [
        (ids[f], METRICS[m], periods[t], v)
        for t, f, m, v in zip(t_idx.tolist(), f_idx.tolist(), m_idx.tolist(), values, strict=True)
    ]


def _bad_rows(
    rng: np.random.Generator, sc: _Scenario, clean: list[tuple[str, str, str, int]]
) -> tuple[list[_Bad], set[int]]:
    """About 0.5 % bad rows, and the clean rows whose key a conflicting copy disputes."""
    n = len(clean)
    each = max(3, round(n * 0.0007))
    hier = sc.hier
    always_open = hier.open_mask.all(axis=1)
    normal = [f for f in range(len(hier.fac_ids)) if always_open[f] and f not in sc.injected]
    last = len(sc.periods) - 1
    bad: list[_Bad] = []

    def anywhere() -> int:
        return int(rng.integers(0, n))

    for _ in range(each):
        fid = f"F{int(rng.integers(len(hier.fac_ids) + 1, 10000)):04d}"
        row = (fid, METRICS[rng.integers(len(METRICS))], sc.periods[rng.integers(last)], "7")
        bad.append((anywhere(), "unknown_unit", row))
    for _ in range(each):
        fid = hier.fac_ids[rng.choice(normal)]
        code = _UNKNOWN_METRICS[rng.integers(len(_UNKNOWN_METRICS))]
        bad.append((anywhere(), "unknown_metric", (fid, code, sc.periods[rng.integers(last)], "3")))
    for _ in range(each):
        year = int(sc.periods[rng.integers(last)][:4])
        period = (f"{year}-13", f"{year}-00", f"{year}/04", f"{year}-5")[rng.integers(4)]
        row = (hier.fac_ids[rng.choice(normal)], METRICS[rng.integers(len(METRICS))], period, "4")
        bad.append((anywhere(), "bad_period", row))
    holes = _missing_cells(sc, normal)
    picks = rng.choice(len(holes), size=2 * each, replace=False)
    for i, k in enumerate(picks):
        f, m, t = holes[k]
        if i < each:
            text, reason = _BAD_VALUES[i % len(_BAD_VALUES)], "bad_value"
        else:
            text, reason = str(-int(rng.integers(1, 40))), "negative_count"
        bad.append((anywhere(), reason, (hier.fac_ids[f], METRICS[m], sc.periods[t], text)))
    duplicates, disputed = _duplicates(rng, sc, clean, each)
    return bad + duplicates, disputed


def _missing_cells(sc: _Scenario, facilities: Sequence[int]) -> list[tuple[int, int, int]]:
    cells = []
    last = len(sc.periods) - 1
    for f in facilities:
        for m, code in enumerate(METRICS):
            for t in np.flatnonzero(np.isnan(sc.values[code][f]) & sc.hier.open_mask[f]):
                if t < last:
                    cells.append((int(f), m, int(t)))
    return cells


def _duplicates(
    rng: np.random.Generator, sc: _Scenario, clean: list[tuple[str, str, str, int]], each: int
) -> tuple[list[_Bad], set[int]]:
    """Exact copies anywhere; conflicting copies (+1..5) of malaria_tests_done, months ago.

    Both rows of a conflicting pair are bad (nobody can tell which one is right); the
    returned set holds the clean row of each pair. No check reads malaria_tests_done,
    so whichever copy a loader keeps, or if it rejects both, no alert changes.
    """
    n = len(clean)
    injected = {sc.hier.fac_ids[f] for f in sc.injected}
    recent = set(sc.periods[-4:])
    usable = [i for i, r in enumerate(clean) if r[0] not in injected]
    conflict = [
        i for i in usable if clean[i][1] == "malaria_tests_done" and clean[i][2] not in recent
    ]
    out: list[_Bad] = []
    exact = rng.choice(usable, size=each * 3 // 2, replace=False)
    for i in sorted(int(i) for i in exact):
        fid, code, period, value = clean[i]
        out.append((int(rng.integers(i, n)), "exact_duplicate", (fid, code, period, str(value))))
    chosen = set(int(i) for i in exact)
    conflicting = [int(i) for i in rng.choice(conflict, size=2 * each, replace=False)]
    disputed = sorted(c for c in conflicting if c not in chosen)[:each]
    for i in disputed:
        fid, code, period, value = clean[i]
        changed = str(value + int(rng.integers(1, 6)))
        out.append((int(rng.integers(i, n)), "conflicting_duplicate", (fid, code, period, changed)))
    return out, set(disputed)


def _values_text(
    clean: list[tuple[str, str, str, int]], bad: list[_Bad], disputed: set[int]
) -> tuple[str, list[tuple[int, str]]]:
    """values.csv text, and (line, reason) of each bad line, header = line 1."""
    after: dict[int, list[tuple[str, tuple[str, str, str, str]]]] = {}
    for slot, reason, row in bad:
        after.setdefault(slot, []).append((reason, row))
    lines = ["unit,metric,period,value"]
    listed: list[tuple[int, str]] = []
    for i, (fid, code, period, value) in enumerate(clean):
        lines.append(f"{fid},{code},{period},{value}")
        if i in disputed:
            listed.append((len(lines), "conflicting_duplicate"))
        for reason, row in after.get(i, []):
            lines.append(",".join(row))
            listed.append((len(lines), reason))
    return "\n".join(lines) + "\n", listed


def _recipients_rows(
    rng: np.random.Generator, hier: _Hierarchy, stockout_district: str
) -> list[tuple[str, ...]]:
    """National team, one lead per province, one officer per district (all invented).

    Two district officers follow only maternal and immunization checks and one wants
    warnings and worse; none of them is the officer of the district whose stock-outs
    are injected in the last month, so that alert reaches its district officer.
    """
    used: set[str] = set()
    others = [i for i, (did, _) in enumerate(hier.districts) if did != stockout_district]
    narrow = set(others[1::3][:2])
    rest = [i for i in others if i not in narrow]
    strict = rest[min(4, len(rest) - 1)]

    def person() -> tuple[str, str]:
        while True:
            given = _GIVEN[rng.integers(len(_GIVEN))]
            family = _FAMILY[rng.integers(len(_FAMILY))]
            email = f"{given}.{family}@{MAIL_DOMAIN}".lower()
            if email not in used:
                used.add(email)
                return email, f"{given} {family}"

    rows = [
        (
            f"national-data-team@{MAIL_DOMAIN}",
            "National data quality team",
            hier.country[0],
            "district",
            "*",
            "notice",
        ),
    ]
    for pid, _ in hier.provinces:
        email, name = person()
        rows.append((email, name, pid, "district", "*", "notice"))
    for i, (did, _) in enumerate(hier.districts):
        email, name = person()
        programmes = "maternal;immunization" if i in narrow else "*"
        severity = "warning" if i == strict else "notice"
        rows.append((email, name, did, "facility", programmes, severity))
    return rows


def _write(path: Path, text: str) -> Path:
    path.write_bytes(text.encode("utf-8"))
    return path


class _Unexplained(RuntimeError):
    """The finished data raise an alert that no injected problem explains."""


def _injected_scenario(
    rng: np.random.Generator,
    hier: _Hierarchy,
    periods: list[str],
    full: dict[str, np.ndarray],
    reported: dict[str, np.ndarray],
    attempts: int = 20,
) -> _Scenario:
    """Inject the problems; try other sites while the outcome would be ambiguous.

    An attempt is redrawn when a district band value lands near its band edge or when
    an alert shows up that no injected problem explains. After ``attempts`` the last
    borderline attempt is kept (and reported in ``DemoTruth.borderline``).
    """
    best: _Scenario | None = None
    for _ in range(attempts):
        sc = _Scenario(
            hier=hier,
            periods=periods,
            values={code: v.copy() for code, v in reported.items()},
            full=full,
        )
        _inject_all(rng, sc)
        untouched = np.ones(hier.open_mask.shape, dtype=bool)
        untouched[sorted(sc.injected)] = False
        _steady_districts(rng, hier, sc.values, hier.open_mask & untouched, sc.touched_districts())
        try:
            _district_truth(sc)
        except _Unexplained:
            continue
        if not sc.borderline:
            return sc
        best = sc
    if best is None:
        raise _Unexplained(f"no clean scenario in {attempts} attempts; try another seed")
    return best


# ---- entry points ----------------------------------------------------------------------


def generate(
    out_dir: Path,
    *,
    seed: int = DEFAULT_SEED,
    provinces: int = 4,
    districts_per_province: int = 3,
    facilities: int = 300,
    months: int = 36,
    end: str = "2026-10",
) -> DemoTruth:
    """Write the demo data set into ``out_dir`` and return what a run must find in it."""
    if months < 28:
        raise ValueError(f"months must be at least 28 to hold every injected problem, not {months}")
    if facilities < 12 * provinces * districts_per_province:
        raise ValueError("give at least 12 facilities a district")
    rng = np.random.default_rng(seed)
    end_ord = parse_period(end, "month")
    periods = [format_period(o, "month") for o in range(end_ord - months + 1, end_ord + 1)]
    hier = _build_hierarchy(rng, provinces, districts_per_province, facilities, periods)
    full = _simulate(rng, hier, periods)
    sc = _injected_scenario(rng, hier, periods, full, _apply_missing(rng, hier, full))

    clean = _clean_rows(sc)
    bad_rows, disputed = _bad_rows(rng, sc, clean)
    text, listed = _values_text(clean, bad_rows, disputed)
    truth = pd.DataFrame(sorted(sc.truth, key=_truth_order), columns=list(TRUTH_COLUMNS))
    bad = pd.DataFrame(listed, columns=["line", "reason"])
    expected = int(hier.open_mask.sum()) * len(METRICS)
    stockout = truth[(truth["check"] == "rdt_stockouts") & (truth["period"] == periods[-1])]
    recipients = _recipients_rows(rng, hier, str(stockout["unit"].iloc[0]))

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    unit_header = ("id", "name", "parent", "level", "opened", "closed")
    recipient_header = ("email", "name", "unit", "reach", "programmes", "min_severity")
    files = (
        _write(out_dir / "units.csv", _csv_text(unit_header, _units_rows(hier))),
        _write(out_dir / "values.csv", text),
        _write(out_dir / "truth.csv", _csv_text(TRUTH_COLUMNS, truth.itertuples(index=False))),
        _write(out_dir / "bad_rows.csv", _csv_text(("line", "reason"), listed)),
        _write(out_dir / "recipients.csv", _csv_text(recipient_header, recipients)),
    )
    return DemoTruth(
        out_dir=out_dir,
        periods=tuple(periods),
        truth=truth,
        bad_rows=bad,
        value_rows=len(clean) + len(bad_rows),
        missing_share=1 - (len(clean) - len(disputed)) / expected,
        files=files,
        borderline=frozenset(sc.borderline),
    )


def _truth_order(row: tuple[str, str, str, str, str]) -> tuple[str, int, str]:
    order = list(CHECK_KINDS)
    return row[2], order.index(row[0]), row[1]


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m digest.demo_data OUT_DIR [--seed N]``: write the files, print a summary."""
    parser = argparse.ArgumentParser(
        prog="python -m digest.demo_data",
        description="Write the invented demo data set (units, values, truth, bad rows, recipients).",
    )
    parser.add_argument("out_dir", type=Path, help="folder to write the CSV files into")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    parser.add_argument("--provinces", type=int, default=4, help="number of provinces")
    parser.add_argument("--districts-per-province", type=int, default=3, help="districts each")
    parser.add_argument("--facilities", type=int, default=300, help="number of facilities")
    parser.add_argument("--months", type=int, default=36, help="months of history")
    parser.add_argument("--end", default="2026-10", help="last month, YYYY-MM")
    args = parser.parse_args(argv)
    result = generate(
        args.out_dir,
        seed=args.seed,
        provinces=args.provinces,
        districts_per_province=args.districts_per_province,
        facilities=args.facilities,
        months=args.months,
        end=args.end,
    )
    reasons = result.bad_rows["reason"].value_counts().sort_index()
    checks = result.truth["check"].value_counts().sort_index()
    print(f"wrote {', '.join(p.name for p in result.files)} to {result.out_dir}")
    print(
        f"{result.value_rows} value rows, {len(result.bad_rows)} bad, "
        f"{result.missing_share:.1%} of facility-metric-months missing"
    )
    print("bad rows: " + ", ".join(f"{k} {v}" for k, v in reasons.items()))
    print("truth: " + ", ".join(f"{k} {v}" for k, v in checks.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
