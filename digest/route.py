"""Routing: alerts x recipients x hierarchy -> one bundle per recipient.

The rule (our own): a recipient receives an alert when

- the alert's unit lies in the subtree of the recipient's home unit,
- the alert's level is between the home unit's level and the recipient's reach, inclusive,
- the recipient follows the alert's programme (``programmes is None`` follows all), and
- the alert's severity is at least the recipient's ``min_severity``
  (rank in ``SEVERITY_RANK`` at most the recipient's rank).

Every recipient gets a bundle, empty or not, in the order given; whether an empty bundle
becomes an all-clear email is the caller's decision. Alerts that reach nobody are returned
as ``unrouted`` for the administrator. Bundles and ``unrouted`` are sorted worst first:
severity, then ``score`` descending (missing scores last), then the unit's path of names
from the top, then the check name. Rows keep the index they had in ``alerts``.

The work is vectorised: each alert's ancestor at a level is found once per level, the
alerts are sorted by that ancestor, and a recipient's candidates are one contiguous slice
found by binary search.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from digest.config import SEVERITY_RANK
from digest.hierarchy import Hierarchy
from digest.recipients import Recipient

REQUIRED_COLUMNS = ("check", "unit_index", "severity", "programme", "score")


@dataclass(frozen=True, eq=False)
class Bundle:
    """The alerts one recipient gets from a run, worst first (possibly none)."""

    recipient: Recipient
    alerts: pd.DataFrame


@dataclass(frozen=True, eq=False)
class Routing:
    """One bundle per recipient, in the recipients' order, and the alerts nobody gets."""

    bundles: list[Bundle]
    unrouted: pd.DataFrame


@dataclass(frozen=True)
class _AncestorIndex:
    """Alert positions sorted by their ancestor at one level, for slicing by ancestor."""

    order: np.ndarray  # alert positions
    keys: np.ndarray  # ancestor of each alert in ``order``, ascending; -1 = none

    def below(self, unit: int) -> np.ndarray:
        start, stop = np.searchsorted(self.keys, [unit, unit + 1], side="left")
        return self.order[start:stop]


def route(alerts: pd.DataFrame, recipients: Sequence[Recipient], hierarchy: Hierarchy) -> Routing:
    """Give each recipient the alerts the routing rule sends them; list those nobody gets."""
    _check_alerts(alerts, hierarchy)
    _check_recipients(recipients, hierarchy)
    units = alerts["unit_index"].to_numpy(dtype=np.int64)
    alert_level = hierarchy.level[units]
    severity = _severity_ranks(alerts)
    programme = alerts["programme"].to_numpy(dtype=object)
    position = _worst_first_position(alerts, severity, hierarchy)
    by_level: dict[int, _AncestorIndex] = {}
    routed = np.zeros(len(alerts), dtype=bool)
    bundles = []
    for person in recipients:
        own = int(hierarchy.level[person.unit_index])
        if own not in by_level:
            by_level[own] = _ancestor_index(hierarchy, units, hierarchy.levels[own])
        candidates = by_level[own].below(person.unit_index)
        keep = alert_level[candidates] <= hierarchy.levels.index(person.reach)
        keep &= severity[candidates] <= SEVERITY_RANK[person.min_severity]
        if person.programmes is not None:
            keep &= np.isin(programme[candidates], list(person.programmes))
        chosen = candidates[keep]
        routed[chosen] = True
        bundles.append(Bundle(person, _take_in_order(alerts, chosen, position)))
    unrouted = _take_in_order(alerts, np.flatnonzero(~routed), position)
    return Routing(bundles=bundles, unrouted=unrouted)


def _ancestor_index(hierarchy: Hierarchy, units: np.ndarray, level: str) -> _AncestorIndex:
    ancestors = hierarchy.ancestor_at(units, level)
    order = np.argsort(ancestors, kind="stable")
    return _AncestorIndex(order=order, keys=ancestors[order])


def _take_in_order(alerts: pd.DataFrame, chosen: np.ndarray, position: np.ndarray) -> pd.DataFrame:
    """The rows ``chosen`` (positions) of ``alerts``, worst first."""
    return alerts.iloc[chosen[np.argsort(position[chosen], kind="stable")]]


def _worst_first_position(
    alerts: pd.DataFrame, severity: np.ndarray, hierarchy: Hierarchy
) -> np.ndarray:
    """For each alert, its place in the worst-first order of all alerts."""
    score = alerts["score"].to_numpy(dtype=np.float64, na_value=np.nan)
    descending = np.where(np.isnan(score), np.inf, -score)  # missing scores last
    units = alerts["unit_index"].to_numpy(dtype=np.int64)
    distinct = np.unique(units)
    by_path = sorted(distinct, key=lambda u: (hierarchy.path_names(int(u), skip_root=False), u))
    path_rank = np.empty(hierarchy.size, dtype=np.int64)
    path_rank[np.array(by_path, dtype=np.int64)] = np.arange(len(by_path))
    _, check_rank = np.unique(alerts["check"].astype(str).to_numpy(dtype=object), return_inverse=True)
    order = np.lexsort((check_rank.reshape(-1), path_rank[units], descending, severity))
    position = np.empty(len(alerts), dtype=np.int64)
    position[order] = np.arange(len(alerts))
    return position


def _severity_ranks(alerts: pd.DataFrame) -> np.ndarray:
    return alerts["severity"].map(SEVERITY_RANK).to_numpy(dtype=np.int64)


def _check_alerts(alerts: pd.DataFrame, hierarchy: Hierarchy) -> None:
    """Programming errors in the pipeline, not user errors: raise ValueError."""
    missing = [c for c in REQUIRED_COLUMNS if c not in alerts.columns]
    if missing:
        raise ValueError(f"alerts frame lacks column(s) {', '.join(missing)}")
    unknown = alerts["severity"][~alerts["severity"].isin(list(SEVERITY_RANK))]
    if len(unknown):
        raise ValueError(f"alerts with unknown severity: {sorted(set(map(str, unknown)))}")
    units = alerts["unit_index"]
    if len(units) and not (
        pd.api.types.is_integer_dtype(units)
        and units.notna().all()
        and units.min() >= 0
        and units.max() < hierarchy.size
    ):
        raise ValueError("alerts frame has unit_index values that are not units of the hierarchy")


def _check_recipients(recipients: Sequence[Recipient], hierarchy: Hierarchy) -> None:
    """Recipients come from load_recipients; these guard against hand-built ones."""
    seen: dict[str, Recipient] = {}
    for person in recipients:
        key = person.email.lower()
        if key in seen:
            raise ValueError(
                f"{person.email} is listed twice (lines {seen[key].line} and {person.line}); "
                "one person gets one digest"
            )
        seen[key] = person
        if not 0 <= person.unit_index < hierarchy.size or person.reach not in hierarchy.levels:
            raise ValueError(f"recipient {person.email} does not fit this hierarchy")
        if hierarchy.levels.index(person.reach) < hierarchy.level[person.unit_index]:
            raise ValueError(f"recipient {person.email}: reach is above the home unit's level")
        if person.min_severity not in SEVERITY_RANK:
            raise ValueError(f"recipient {person.email}: unknown min_severity {person.min_severity}")
