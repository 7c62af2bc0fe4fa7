"""Routing alerts to recipients on a small hand-built hierarchy.

The routing rule is our own (see digest/route.py); the property test compares the
vectorised implementation with a slow reference loop that follows the rule word for word,
and the worst-first order is checked against pandas' own multi-key sort.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from digest.config import SEVERITY_RANK
from digest.hierarchy import Hierarchy, build_hierarchy
from digest.recipients import Recipient
from digest.route import Routing, route

LEVELS = ("country", "province", "district", "facility")
PROGRAMMES = ("maternal", "immunization", "malaria")

# country C > provinces P1, P2 > two districts each > two or three facilities each
UNITS = [
    ("C", "Country", "", "country"),
    ("P1", "North", "C", "province"),
    ("P2", "South", "C", "province"),
    ("D11", "Hills", "P1", "district"),
    ("D12", "Lakes", "P1", "district"),
    ("D21", "Coast", "P2", "district"),
    ("D22", "Plains", "P2", "district"),
    ("F111", "Hills Clinic A", "D11", "facility"),
    ("F112", "Hills Clinic B", "D11", "facility"),
    ("F113", "Hills Hospital", "D11", "facility"),
    ("F121", "Lakes Clinic A", "D12", "facility"),
    ("F122", "Lakes Clinic B", "D12", "facility"),
    ("F211", "Coast Clinic A", "D21", "facility"),
    ("F212", "Coast Clinic B", "D21", "facility"),
    ("F221", "Plains Clinic A", "D22", "facility"),
    ("F222", "Plains Clinic B", "D22", "facility"),
    ("F223", "Plains Hospital", "D22", "facility"),
]


def make_hierarchy() -> Hierarchy:
    rows = [
        (line, {"id": uid, "name": name, "parent": parent, "level": level})
        for line, (uid, name, parent, level) in enumerate(UNITS, start=2)
    ]
    return build_hierarchy("units.csv", rows, LEVELS)


H = make_hierarchy()


def person(
    email: str,
    unit: str,
    reach: str,
    programmes: set[str] | None = None,
    min_severity: str = "notice",
    line: int = 2,
) -> Recipient:
    return Recipient(
        email=email,
        name=email.split("@")[0].title(),
        unit=unit,
        unit_index=H.index[unit],
        reach=reach,
        programmes=None if programmes is None else frozenset(programmes),
        min_severity=min_severity,
        line=line,
    )


def alerts_frame(rows: list[tuple[str, str, str, str, float]]) -> pd.DataFrame:
    """Alerts in the pipeline's contract from (check, unit id, severity, programme, score)."""
    records = []
    for check, uid, severity, programme, score in rows:
        unit = H.index[uid]
        records.append(
            {
                "check": check,
                "kind": "bounds",
                "unit": uid,
                "unit_index": unit,
                "unit_name": H.names[unit],
                "level": H.level_of(unit),
                "period": "2026-10",
                "value": 10.0,
                "expected": 5.0,
                "low": 0.0,
                "high": 8.0,
                "severity": severity,
                "programme": programme,
                "detail": "",
                "score": score,
                "metric": "anc1_visits",
                "advice": "",
            }
        )
    columns = list(records[0]) if records else ["check", "unit_index", "severity", "programme", "score"]
    return pd.DataFrame.from_records(records, columns=columns)


# one warning/maternal alert at every unit, named after the unit
EVERY_UNIT = alerts_frame([(f"chk_{uid}", uid, "warning", "maternal", 1.0) for uid, *_ in UNITS])


def units_of(frame: pd.DataFrame) -> set[str]:
    return set(frame["unit"])


def bundle_units(routing: Routing, email: str) -> set[str]:
    (bundle,) = [b for b in routing.bundles if b.recipient.email == email]
    return units_of(bundle.alerts)


# ---- the cases named in the issue ---------------------------------------------------


def test_district_officer_gets_own_district_and_its_facilities_only() -> None:
    routing = route(EVERY_UNIT, [person("dora@x.org", "D11", "facility")], H)
    assert bundle_units(routing, "dora@x.org") == {"D11", "F111", "F112", "F113"}


def test_district_officer_gets_nothing_from_the_neighbouring_district() -> None:
    routing = route(EVERY_UNIT, [person("dora@x.org", "D11", "facility")], H)
    got = bundle_units(routing, "dora@x.org")
    assert not got & {"D12", "F121", "F122", "P1", "C"}


def test_provincial_lead_with_reach_district_gets_no_facility_alerts() -> None:
    routing = route(EVERY_UNIT, [person("pia@x.org", "P1", "district")], H)
    assert bundle_units(routing, "pia@x.org") == {"P1", "D11", "D12"}


def test_national_team_with_reach_province_gets_country_and_provinces_only() -> None:
    routing = route(EVERY_UNIT, [person("nat@x.org", "C", "province")], H)
    assert bundle_units(routing, "nat@x.org") == {"C", "P1", "P2"}


def test_reach_equal_to_own_level_gives_the_home_unit_only() -> None:
    routing = route(EVERY_UNIT, [person("dan@x.org", "D22", "district")], H)
    assert bundle_units(routing, "dan@x.org") == {"D22"}


def test_facility_in_charge_gets_only_their_facility() -> None:
    routing = route(EVERY_UNIT, [person("fay@x.org", "F212", "facility")], H)
    assert bundle_units(routing, "fay@x.org") == {"F212"}


def test_each_officer_gets_exactly_their_subtree() -> None:
    everyone = [
        person(f"{uid.lower()}@x.org", uid, "facility", line=i)
        for i, (uid, *_) in enumerate(UNITS, start=2)
    ]
    routing = route(EVERY_UNIT, everyone, H)
    for bundle in routing.bundles:
        subtree = {H.ids[u] for u in H.subtree(bundle.recipient.unit_index)}
        assert units_of(bundle.alerts) == subtree


def test_programme_filter() -> None:
    alerts = alerts_frame(
        [
            ("anc", "F111", "warning", "maternal", 1.0),
            ("penta", "F111", "warning", "immunization", 1.0),
            ("u5", "F112", "warning", "malaria", 1.0),
        ]
    )
    people = [
        person("mat@x.org", "D11", "facility", {"maternal"}),
        person("two@x.org", "D11", "facility", {"maternal", "malaria"}),
        person("all@x.org", "D11", "facility", None),
    ]
    routing = route(alerts, people, H)
    checks = [set(b.alerts["check"]) for b in routing.bundles]
    assert checks == [{"anc"}, {"anc", "u5"}, {"anc", "penta", "u5"}]


def test_severity_filter() -> None:
    alerts = alerts_frame(
        [
            ("c", "F111", "critical", "maternal", 1.0),
            ("w", "F111", "warning", "maternal", 1.0),
            ("n", "F111", "notice", "maternal", 1.0),
        ]
    )
    people = [
        person("crit@x.org", "D11", "facility", min_severity="critical"),
        person("warn@x.org", "D11", "facility", min_severity="warning"),
        person("note@x.org", "D11", "facility", min_severity="notice"),
    ]
    routing = route(alerts, people, H)
    assert [set(b.alerts["check"]) for b in routing.bundles] == [{"c"}, {"c", "w"}, {"c", "w", "n"}]


def test_nothing_is_routed_twice_to_one_person() -> None:
    people = [person("nat@x.org", "C", "facility"), person("pia@x.org", "P1", "facility")]
    routing = route(EVERY_UNIT, people, H)
    for bundle in routing.bundles:
        assert not bundle.alerts.index.duplicated().any()
    # overlapping subtrees: both get the P1 alerts, each once
    assert len(routing.bundles[0].alerts) == len(UNITS)
    assert len(routing.bundles[1].alerts) == 1 + 2 + 5


def test_one_address_listed_twice_is_refused() -> None:
    people = [person("ann@x.org", "D11", "facility"), person("ANN@x.org", "D12", "facility", line=3)]
    with pytest.raises(ValueError, match="listed twice"):
        route(EVERY_UNIT, people, H)


def test_unrouted_alerts_are_listed() -> None:
    routing = route(EVERY_UNIT, [person("dora@x.org", "D11", "facility")], H)
    expected = {uid for uid, *_ in UNITS} - {"D11", "F111", "F112", "F113"}
    assert units_of(routing.unrouted) == expected
    assert len(routing.unrouted) + len(routing.bundles[0].alerts) == len(EVERY_UNIT)


def test_alert_filtered_out_by_severity_counts_as_unrouted() -> None:
    alerts = alerts_frame([("n", "F111", "notice", "maternal", 1.0)])
    routing = route(alerts, [person("dora@x.org", "D11", "facility", min_severity="warning")], H)
    assert routing.bundles[0].alerts.empty
    assert list(routing.unrouted["check"]) == ["n"]


def test_every_recipient_gets_a_bundle_in_order_even_when_empty() -> None:
    people = [
        person("z@x.org", "D22", "facility"),
        person("a@x.org", "D11", "facility", {"malaria"}),
        person("m@x.org", "P1", "district"),
    ]
    alerts = alerts_frame([("anc", "F221", "warning", "maternal", 1.0)])
    routing = route(alerts, people, H)
    assert [b.recipient for b in routing.bundles] == people
    assert [len(b.alerts) for b in routing.bundles] == [1, 0, 0]
    assert list(routing.bundles[1].alerts.columns) == list(alerts.columns)


def test_no_alerts_at_all() -> None:
    routing = route(alerts_frame([]), [person("dora@x.org", "D11", "facility")], H)
    assert routing.bundles[0].alerts.empty
    assert routing.unrouted.empty


def test_no_recipients_leaves_everything_unrouted() -> None:
    routing = route(EVERY_UNIT, [], H)
    assert routing.bundles == []
    assert len(routing.unrouted) == len(EVERY_UNIT)


def test_bundle_keeps_the_rows_and_index_of_the_input() -> None:
    alerts = EVERY_UNIT.set_index(pd.Index([f"a{i}" for i in range(len(EVERY_UNIT))]))
    routing = route(alerts, [person("fay@x.org", "F212", "facility")], H)
    got = routing.bundles[0].alerts
    pd.testing.assert_frame_equal(got, alerts.loc[[alerts.index[H.index["F212"]]]])


# ---- worst first --------------------------------------------------------------------


def test_worst_first_order() -> None:
    alerts = alerts_frame(
        [
            ("b_check", "F112", "warning", "maternal", 2.0),
            ("a_check", "F112", "warning", "maternal", 2.0),  # same score & unit: by check name
            ("x", "F111", "warning", "maternal", 2.0),  # same score: Hills Clinic A first
            ("big", "F113", "warning", "maternal", 9.0),  # higher score first
            ("nan", "F111", "warning", "maternal", float("nan")),  # missing score last
            ("n", "F111", "notice", "maternal", 50.0),  # notices after warnings
            ("c", "F113", "critical", "maternal", 0.1),  # critical first whatever the score
            ("d", "D11", "warning", "maternal", 2.0),  # district sorts before its facilities
        ]
    )
    routing = route(alerts, [person("dora@x.org", "D11", "facility")], H)
    assert list(routing.bundles[0].alerts["check"]) == [
        "c", "big", "d", "x", "a_check", "b_check", "nan", "n",
    ]


def worst_first_key(alert: dict[str, object]) -> tuple[object, ...]:
    """The documented order as a plain Python sort key."""
    score = float(alert["score"])  # type: ignore[arg-type]
    return (
        SEVERITY_RANK[str(alert["severity"])],
        np.isnan(score),
        0.0 if np.isnan(score) else -score,
        H.path_names(int(alert["unit_index"]), skip_root=False),  # type: ignore[call-overload]
        alert["check"],
    )


def sorted_by_key(frame: pd.DataFrame) -> list[object]:
    records = dict(zip(frame.index, frame.to_dict("records"), strict=True))
    return sorted(records, key=lambda label: worst_first_key(records[label]))


def expected_order(frame: pd.DataFrame) -> list[object]:
    """Worst first by pandas' own multi-key sort (the reference for our lexsort)."""
    keyed = frame.assign(
        _sev=frame["severity"].map(SEVERITY_RANK),
        _path=[" / ".join(H.path_names(int(u), skip_root=False)) for u in frame["unit_index"]],
    )
    ordered = keyed.sort_values(
        ["_sev", "score", "_path", "check"],
        ascending=[True, False, True, True],
        na_position="last",
        kind="stable",
    )
    return list(ordered.index)


def test_unrouted_are_worst_first_too() -> None:
    alerts = alerts_frame(
        [
            ("n", "F221", "notice", "malaria", 3.0),
            ("c", "F222", "critical", "malaria", 1.0),
            ("w", "D21", "warning", "malaria", 1.0),
        ]
    )
    routing = route(alerts, [], H)
    assert list(routing.unrouted.index) == expected_order(alerts)


# ---- pipeline mistakes are refused loudly -------------------------------------------


def test_missing_column_is_refused() -> None:
    with pytest.raises(ValueError, match="lacks column"):
        route(EVERY_UNIT.drop(columns=["programme"]), [], H)


def test_unknown_alert_severity_is_refused() -> None:
    bad = EVERY_UNIT.assign(severity=["error"] + ["warning"] * (len(EVERY_UNIT) - 1))
    with pytest.raises(ValueError, match="unknown severity"):
        route(bad, [], H)


@pytest.mark.parametrize("unit", [-1, len(UNITS)])
def test_unit_index_outside_the_hierarchy_is_refused(unit: int) -> None:
    bad = EVERY_UNIT.assign(unit_index=[unit] * len(EVERY_UNIT))
    with pytest.raises(ValueError, match="unit_index"):
        route(bad, [], H)


def test_recipient_whose_reach_is_above_their_level_is_refused() -> None:
    with pytest.raises(ValueError, match="reach is above"):
        route(EVERY_UNIT, [person("dora@x.org", "D11", "province")], H)


# ---- property: the vectorised routing equals the rule, read literally ----------------


def reference_routing(
    alerts: pd.DataFrame, recipients: list[Recipient]
) -> tuple[list[set[object]], set[object]]:
    """The rule as written, one recipient and one alert at a time."""
    bundles: list[set[object]] = []
    for r in recipients:
        got = set()
        for label, alert in zip(alerts.index, alerts.to_dict("records"), strict=True):
            ancestors = set()
            u = int(alert["unit_index"])
            while u >= 0:
                ancestors.add(u)
                u = int(H.parent[u])
            in_subtree = r.unit_index in ancestors
            own = LEVELS.index(H.level_of(r.unit_index))
            depth_ok = own <= LEVELS.index(alert["level"]) <= LEVELS.index(r.reach)
            programme_ok = r.programmes is None or alert["programme"] in r.programmes
            severity_ok = SEVERITY_RANK[alert["severity"]] <= SEVERITY_RANK[r.min_severity]
            if in_subtree and depth_ok and programme_ok and severity_ok:
                got.add(label)
        bundles.append(got)
    reached = set().union(*bundles) if bundles else set()
    return bundles, set(alerts.index) - reached


UNIT_IDS = [uid for uid, *_ in UNITS]
SEVERITIES = list(SEVERITY_RANK)


@st.composite
def recipients_strategy(draw: st.DrawFn) -> list[Recipient]:
    count = draw(st.integers(0, 6))
    people = []
    for i in range(count):
        uid = draw(st.sampled_from(UNIT_IDS))
        own = LEVELS.index(H.level_of(H.index[uid]))
        reach = draw(st.sampled_from(LEVELS[own:]))
        programmes = draw(
            st.none() | st.frozensets(st.sampled_from(PROGRAMMES), min_size=1).map(set)
        )
        severity = draw(st.sampled_from(SEVERITIES))
        people.append(person(f"p{i}@x.org", uid, reach, programmes, severity, line=i + 2))
    return people


alert_rows = st.lists(
    st.tuples(
        st.sampled_from(["anc", "penta", "u5", "silent"]),
        st.sampled_from(UNIT_IDS),
        st.sampled_from(SEVERITIES),
        st.sampled_from(PROGRAMMES),
        st.one_of(st.floats(0, 100, allow_nan=False), st.just(float("nan"))),
    ),
    max_size=40,
)


@settings(max_examples=60, deadline=None)
@given(rows=alert_rows, people=recipients_strategy())
def test_routing_matches_the_rule(
    rows: list[tuple[str, str, str, str, float]], people: list[Recipient]
) -> None:
    alerts = alerts_frame(rows)
    routing = route(alerts, people, H)
    expected_bundles, expected_unrouted = reference_routing(alerts, people)
    assert [b.recipient for b in routing.bundles] == people
    for bundle, expected in zip(routing.bundles, expected_bundles, strict=True):
        labels = list(bundle.alerts.index)
        assert len(labels) == len(set(labels))  # never twice
        assert set(labels) == expected
        assert labels == sorted_by_key(bundle.alerts)
    assert set(routing.unrouted.index) == expected_unrouted
    assert list(routing.unrouted.index) == sorted_by_key(routing.unrouted)


@settings(max_examples=25, deadline=None)
@given(rows=alert_rows)
def test_worst_first_order_agrees_with_pandas_sort(
    rows: list[tuple[str, str, str, str, float]],
) -> None:
    """With nobody to route to, every alert is unrouted: its order is pandas' multi-key sort."""
    alerts = alerts_frame(rows)
    assert list(route(alerts, [], H).unrouted.index) == expected_order(alerts)


def test_thousands_of_alerts_and_hundreds_of_recipients() -> None:
    """Scale of a national run: every bundle stays inside its recipient's subtree and depth."""
    rng = np.random.default_rng(7)
    n = 2000
    rows = [
        (f"chk{c}", UNIT_IDS[u], SEVERITIES[s], PROGRAMMES[p], float(sc))
        for c, u, s, p, sc in zip(
            rng.integers(0, 6, n),
            rng.integers(0, len(UNIT_IDS), n),
            rng.integers(0, 3, n),
            rng.integers(0, 3, n),
            rng.random(n),
            strict=True,
        )
    ]
    alerts = alerts_frame(rows)
    combos = itertools.cycle(
        [
            (uid, reach)
            for uid in UNIT_IDS
            for reach in LEVELS[LEVELS.index(H.level_of(H.index[uid])) :]
        ]
    )
    people = [person(f"p{i}@x.org", *next(combos), line=i + 2) for i in range(150)]
    routing = route(alerts, people, H)
    for bundle in routing.bundles:
        r = bundle.recipient
        assert set(bundle.alerts["unit_index"]) <= set(H.subtree(r.unit_index).tolist())
        assert set(bundle.alerts["level"]) <= set(LEVELS[: LEVELS.index(r.reach) + 1])
    reached = set().union(*(set(b.alerts.index) for b in routing.bundles))
    assert reached.isdisjoint(routing.unrouted.index)
    assert len(reached) + len(routing.unrouted) == n
