"""Rendering digests: template contract, wording, escaping, width, overrides, charts."""

from __future__ import annotations

import dataclasses
import math
import re
import struct
from pathlib import Path
from types import SimpleNamespace

import jinja2
import numpy as np
import pandas as pd
import pytest

from digest.charts import chart_png
from digest.config import MailConfig
from digest.errors import ConfigError
from digest.message import ALERT_COLUMNS
from digest.render import (
    CAUTIONS,
    HTML,
    SUBJECT,
    TEXT,
    AlertView,
    Chart,
    DigestView,
    HistoryPoint,
    RenderedDigest,
    SeverityCount,
    UnitGroup,
    build_view,
    check_templates,
    clean_header,
    describe_context,
    describe_outside,
    fit_width,
    fmt,
    make_environment,
    packaged_templates_dir,
    plural,
    render_digest,
    sample_inputs,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
RESOURCE = re.compile(r"""\b(?:src|href|background|poster|action)\s*=\s*["']?([^"'\s>]+)""", re.I)
NAN = math.nan


@pytest.fixture(scope="module")
def env() -> jinja2.Environment:
    return make_environment(None)


@pytest.fixture(scope="module")
def sample(env: jinja2.Environment) -> RenderedDigest:
    return check_templates(env)


def mail(**values: object) -> MailConfig:
    base = {
        "from": "digest@health.example.org",
        "domain": "health.example.org",
        "admin": "data.manager@health.example.org",
        "admin_name": "Sam Osei, data manager",
    }
    return MailConfig.model_validate({**base, **values})


NO_CHARTS = mail(charts=0)  # charts cost ~0.15 s each; most tests do not need them


def render_sample(env: jinja2.Environment, unit_name: str | None = None) -> RenderedDigest:
    alerts, recipient, context = sample_inputs(NO_CHARTS, unit_name=unit_name)
    return render_digest(alerts, recipient, context, env)


# ---- the template contract -----------------------------------------------------------


def test_every_context_field_is_documented() -> None:
    for cls in (DigestView, SeverityCount, UnitGroup, AlertView, HistoryPoint, Chart):
        for f in dataclasses.fields(cls):
            assert f.metadata.get("doc"), f"{cls.__name__}.{f.name} has no description"
    reference = describe_context()
    assert "DigestView:" in reference and "  cautions:" in reference


def test_view_groups_by_unit_in_order_of_first_appearance() -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    view = build_view(alerts, recipient, context)
    assert [g.unit for g in view.groups] == ["f1", "d1", "f3"]
    assert [a.check for a in view.groups[0].alerts] == ["anc1_out_of_band", "anc4_le_anc1"]
    assert view.groups[0].path == "Alder Province › Birchwood District › Cedar Hill Health Centre"
    assert view.home_unit == "Birchwood District"
    assert [(c.severity, c.count) for c in view.counts] == [
        ("critical", 1),
        ("warning", 2),
        ("notice", 2),
    ]
    assert view.total == 5 and view.more == 0


def test_alert_view_shows_value_range_history_and_reporting() -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    view = build_view(alerts, recipient, context)
    anc = view.groups[0].alerts[0]
    assert (anc.value, anc.expected_range, anc.centre) == ("412", "44–90", "67")
    assert anc.outside == "6.1× the usual level, 322 above the upper limit"  # 412/67, 412-90
    assert len(anc.history) == 6 and anc.history[-1].flagged and anc.history[-1].value == "412"
    assert not any(p.flagged for p in anc.history[:-1])
    assert anc.reporting == ""  # facility level: NaN children
    malaria = view.groups[1].alerts[0]
    assert malaria.reporting == "9 of 14 facilities reported"
    silent = view.groups[2].alerts[0]
    assert silent.value == "no report" and silent.history[-1].value == "–"
    dropout = view.groups[1].alerts[1]
    assert (dropout.value, dropout.range_label, dropout.expected_range) == (
        "-6.5%",
        "Allowed range",
        "0–10%",
    )
    assert dropout.metric_label == "Dropout from Pentavalent dose 1"
    # dose-1 counts beside a dropout percentage would mislead: no history, no chart
    assert dropout.history == () and dropout.chart is None
    share = alerts.iloc[[2]].assign(kind="bounds", check="malaria_u5_share", value=61.8)
    (share_view,) = build_view(share, recipient, context).groups[0].alerts
    assert share_view.metric_label == "Malaria u5 share" and share_view.history == ()
    relation = view.groups[0].alerts[1]
    assert relation.metric_label == "Fourth antenatal visits" and relation.history == ()


def test_charts_go_to_the_first_alerts_with_a_series() -> None:
    alerts, recipient, context = sample_inputs(mail(charts=1))
    charts = [a.chart for g in build_view(alerts, recipient, context).groups for a in g.alerts]
    cache = context.chart_cache
    assert [c is not None for c in charts] == [True, False, False, False, False]
    alerts, recipient, context = sample_inputs(mail(charts=10))
    context = dataclasses.replace(context, chart_cache=dict(cache))
    view = build_view(alerts, recipient, context)
    with_chart = [a.check for g in view.groups for a in g.alerts if a.chart]
    assert with_chart == ["anc1_out_of_band", "malaria_u5_band", "anc1_silence"]  # not relation
    first = view.groups[0].alerts[0].chart
    assert first is not None
    assert first.description == "last 12 values, expected range 44–90, flagged 412 in 2026-10"
    assert first.cid.endswith("@health.example.org") and "<" not in first.cid


def test_charts_follow_the_worst_first_order_not_the_grouping() -> None:
    alerts, recipient, context = sample_inputs(mail(charts=2))
    later = alerts.iloc[[0]].assign(check="anc1_again", severity="notice")
    ordered = pd.concat([alerts.iloc[[0, 2]], later])  # f1, d1, f1: f1's alerts are split
    view = build_view(ordered, recipient, context)
    assert [g.unit for g in view.groups] == ["f1", "d1"]
    assert [a.check for a in view.groups[0].alerts] == ["anc1_out_of_band", "anc1_again"]
    with_chart = [a.check for g in view.groups for a in g.alerts if a.chart]
    assert with_chart == ["anc1_out_of_band", "malaria_u5_band"]  # the two worst with a series


def test_charts_are_drawn_once_per_run_with_cids_unique_per_recipient() -> None:
    alerts, recipient, context = sample_inputs(mail(charts=1))
    first = build_view(alerts, recipient, context).groups[0].alerts[0].chart
    other = SimpleNamespace(**{**vars(recipient), "email": "p.ade@health.example.org"})
    second = build_view(alerts, other, context).groups[0].alerts[0].chart
    assert first is not None and second is not None
    assert list(context.chart_cache) == [("anc1_visits", 3, "2026-10")]
    assert second.png is first.png  # drawn once, reused for the second recipient
    assert second.cid != first.cid  # RFC 2392 Content-IDs must be unique per message


def test_reporting_line_is_not_repeated_when_the_detail_has_it() -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    alerts.loc[2, "detail"] += "; 9 of 14 facilities reported"  # as evaluate words it
    malaria = build_view(alerts, recipient, context).groups[1].alerts[0]
    assert malaria.reporting == "" and malaria.detail.endswith("9 of 14 facilities reported")


def test_subscription_sentence() -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    narrow = SimpleNamespace(
        **{**vars(recipient), "programmes": frozenset({"maternal", "malaria"}), "reach": "district"}
    )
    narrow.min_severity = "warning"
    assert build_view(alerts, narrow, context).subscription == (
        "You receive critical and warning alerts for malaria, maternal, down to district level."
    )
    assert build_view(alerts, recipient, context).subscription == (
        "You receive alerts of every severity for all programmes, down to facility level."
    )


def test_empty_bundle_without_columns_renders(env: jinja2.Environment) -> None:
    _, recipient, context = sample_inputs(NO_CHARTS)
    rendered = render_digest(pd.DataFrame(), recipient, context, env)
    assert rendered.subject == "Data quality: no new alerts in Birchwood District — 2026-10"
    assert rendered.csv_bytes == b"\xef\xbb\xbf" + ",".join(ALERT_COLUMNS).encode() + b"\r\n"


def test_max_alerts_leaves_the_rest_to_the_csv(env: jinja2.Environment) -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    context = dataclasses.replace(context, max_alerts=2)
    rendered = render_digest(alerts, recipient, context, env)
    assert "3 more alerts (less severe) listed only in the attached CSV file." in rendered.text
    assert rendered.csv_bytes.count(b"\r\n") == 1 + len(alerts)


# ---- wording -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "text"),
    [(412, "412"), (412.0, "412"), (38.25, "38.2"), (0.04, "0.0"), (-6.5, "-6.5"), (NAN, "–")],
)
def test_numbers_integers_without_decimals_others_one(value: float, text: str) -> None:
    assert fmt(value) == text
    assert fmt(None) == "–"


@pytest.mark.parametrize(
    ("kind", "value", "expected", "low", "high", "text"),
    [
        ("band", 412, 67, 44, 90, "6.1× the usual level, 322 above the upper limit"),
        ("band", 1500, 67, 44, 90, "22× the usual level, 1410 above the upper limit"),
        ("band", 100, 80, 60, 95, "5 above the upper limit"),
        ("band", 61, 170, 128, 212, "36% of the usual level, 67 below the lower limit"),
        ("band", 0, 31, 22, 40, "none reported against a usual 31, 22 below the lower limit"),
        ("band", 120, 170, 128, 212, "8 below the lower limit"),
        ("band", 1, 0.1, 0, 0.9, "0.1 above the upper limit"),  # no ratio of a tiny usual level
        ("bounds", 41.3, NAN, NAN, 35, "6.3 above the maximum of 35"),
        ("bounds", 2, NAN, 5, NAN, "3 below the minimum of 5"),
        ("dropout", 42, NAN, 0, 10, "32 points above the highest allowed dropout (10%)"),
        ("dropout", -6.5, NAN, 0, 10, "negative dropout: more last doses than first doses"),
        ("relation", NAN, NAN, NAN, NAN, "the reported values contradict each other"),
        ("silence", NAN, 31, 22, 40, "no recent report from a unit that used to report"),
        ("band", NAN, 31, 22, 40, ""),
    ],
)
def test_how_far_outside(
    kind: str, value: float, expected: float, low: float, high: float, text: str
) -> None:
    assert describe_outside(kind, value, expected, low, high) == text


@pytest.mark.parametrize(
    ("level", "plural_form"),
    [("facility", "facilities"), ("district", "districts"), ("health_post", "health_posts")],
)
def test_plural_of_level_names(level: str, plural_form: str) -> None:
    assert plural(level) == plural_form


def test_subject_counts_and_singular(env: jinja2.Environment) -> None:
    alerts, recipient, context = sample_inputs(NO_CHARTS)
    one = render_digest(alerts.head(1), recipient, context, env)
    assert one.subject == "Data quality: 1 new alert in Birchwood District — 2026-10"
    many = render_digest(alerts, recipient, context, env)
    assert many.subject == "Data quality: 5 new alerts in Birchwood District — 2026-10"
    none = render_digest(alerts.head(0), recipient, context, env)
    assert none.subject == "Data quality: no new alerts in Birchwood District — 2026-10"
    assert "Nothing was flagged" in none.text and not none.charts


def test_clean_header_strips_control_characters() -> None:
    dirty = "Data\r\nBcc: eve@example.org\x00\x85\u2028x\u202e  y\t\n"
    assert clean_header(dirty) == "Data Bcc: eve@example.org x y"
    assert len(clean_header("a" * 500)) == 200


# ---- the cautions, escaping and layout ------------------------------------------------


def test_both_parts_carry_every_health_caution(sample: RenderedDigest) -> None:
    flat_text = " ".join(sample.text.split())
    flat_html = " ".join(sample.html.split())
    for caution in CAUTIONS:
        assert caution in flat_text
        assert caution in flat_html
    assert "aggregate counts only, never patient-level data" in flat_text
    assert "not proof of an error" in flat_text and "real outbreak" in flat_text
    assert "national guidelines" in flat_text


def test_footer_names_run_and_administrator(sample: RenderedDigest) -> None:
    for part in (sample.text, sample.html):
        assert "20261103T0215-7f3a" in part
        assert "To change your subscription, ask Sam Osei, data manager" in " ".join(part.split())
    assert 'href="mailto:data.manager@health.example.org"' in sample.html


def test_unit_name_is_escaped_in_html_and_literal_in_text(env: jinja2.Environment) -> None:
    rendered = render_sample(env, unit_name="<script>alert(1)</script>")
    assert "<script" not in rendered.html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in rendered.html
    assert "<script>alert(1)</script>" in rendered.text


def test_text_part_fits_80_columns(env: jinja2.Environment) -> None:
    long_name = "Saint " + "Very-Long-Named " * 9 + "Community Health Centre"
    rendered = render_sample(env, unit_name=long_name + "Supercalifragilistic" * 6)
    too_wide = [line for line in rendered.text.splitlines() if len(line) > 80]
    assert too_wide == []


def test_fit_width_keeps_indent_and_signature_separator() -> None:
    text = "  " + "word " * 30 + "\n-- \n\n\n\nend\n"
    lines = fit_width(text).splitlines()
    assert all(len(line) <= 80 for line in lines)
    assert lines[1].startswith("    word") and "-- " in lines
    assert lines[-2:] == ["", "end"]  # runs of blank lines collapse to one


def test_html_has_no_external_resources_or_scripts(sample: RenderedDigest) -> None:
    targets = RESOURCE.findall(sample.html)
    assert targets, "the sample should contain images and a mailto link"
    for target in targets:
        assert target.startswith(("cid:", "mailto:")), target
    lowered = sample.html.lower()
    for banned in (
        "<script",
        "<link",
        "<iframe",
        "<style",
        "@import",
        "url(",
        "http://",
        "https://",
    ):
        assert banned not in lowered, banned
    cids = {c.cid for c in sample.charts}
    assert {t[4:] for t in targets if t.startswith("cid:")} == cids


def test_csv_attachment_bytes_follow_rfc_4180(sample: RenderedDigest) -> None:
    assert sample.csv_bytes.startswith(b"\xef\xbb\xbfcheck,kind,unit,unit_name,level,period,")
    assert sample.csv_bytes.count(b"\r\n") == 6 and b"\n" not in sample.csv_bytes.replace(
        b"\r\n", b""
    )
    assert sample.csv_filename == "alerts-2026-10.csv"


# ---- environment: autoescape, strictness, overrides -----------------------------------


def test_autoescape_only_for_html_templates(env: jinja2.Environment) -> None:
    assert env.from_string("{{ x }}").render(x="<b>") == "<b>"  # default_for_string=False
    assert env.autoescape("digest.html.j2") is True  # type: ignore[operator]
    assert env.autoescape("digest.txt.j2") is False  # type: ignore[operator]
    assert env.autoescape("subject.txt.j2") is False  # type: ignore[operator]


def test_packaged_templates_are_found() -> None:
    folder = packaged_templates_dir()
    assert {SUBJECT, TEXT, HTML} <= {p.name for p in folder.iterdir()}


def test_override_folder_replaces_one_file_only(tmp_path: Path, caplog) -> None:
    (tmp_path / SUBJECT).write_text("Checks for {{ home_unit }} ({{ total }})\n")
    with caplog.at_level("INFO", logger="digest.render"):
        env = make_environment(tmp_path)
    assert f"from {tmp_path / SUBJECT}" in caplog.text
    assert f"from {packaged_templates_dir() / HTML}" in caplog.text
    rendered = render_sample(env)
    assert rendered.subject == "Checks for Birchwood District (5)"
    assert rendered.text.startswith("DATA QUALITY DIGEST")  # packaged default still serves


def test_override_can_extend_the_packaged_template(tmp_path: Path) -> None:
    (tmp_path / HTML).write_text(
        '{% extends "default/digest.html.j2" %}\n'
        "{% block footer %}<tr><td>Ministry data desk</td></tr>{{ super() }}{% endblock %}\n"
    )
    rendered = render_sample(make_environment(tmp_path))
    assert "Ministry data desk" in rendered.html and "Please note" in rendered.html


def test_missing_override_folder_is_a_config_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"mail\.templates: folder .*missing does not exist"):
        make_environment(tmp_path / "missing")


def test_template_typo_raises_under_strict_undefined(tmp_path: Path) -> None:
    (tmp_path / TEXT).write_text("Hello {{ recipent_name }}\n")  # typo of recipient_name
    env = make_environment(tmp_path)
    with pytest.raises(ConfigError, match="recipent_name") as caught:
        render_sample(env)
    assert isinstance(caught.value.__cause__, jinja2.UndefinedError)


def test_template_syntax_error_names_file_and_line(tmp_path: Path) -> None:
    (tmp_path / HTML).write_text("<p>\n{% if total %}\n<b>unclosed</b>\n")
    with pytest.raises(ConfigError, match=r"digest\.html\.j2 line \d"):
        make_environment(tmp_path)


def test_override_without_cautions_is_refused(tmp_path: Path) -> None:
    (tmp_path / TEXT).write_text("{{ total }} alerts for {{ home_unit }}\n")
    env = make_environment(tmp_path)
    with pytest.raises(ConfigError, match="health caution"):
        render_sample(env)


# ---- charts --------------------------------------------------------------------------


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, section 11.2.2)."""
    return struct.unpack(">II", data[16:24])


def history(n: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    periods = pd.period_range("2024-01", periods=n, freq="M").strftime("%Y-%m")
    values = rng.normal(70, 15, n).round(1)
    return pd.DataFrame(
        {
            "period": periods,
            "value": values,
            "centre": np.full(n, 70.0),
            "low": np.full(n, 40.0),
            "high": np.full(n, 100.0),
        }
    )


def test_chart_is_a_small_png(sample: RenderedDigest) -> None:
    assert sample.charts
    for chart in sample.charts:
        assert chart.png.startswith(PNG_SIGNATURE)
        assert len(chart.png) < 30_000
        assert png_size(chart.png) == (720, 270)


def test_chart_of_a_busy_series_with_gaps_stays_small() -> None:
    frame = history(36)
    frame.loc[[5, 6, 20], "value"] = np.nan
    frame.loc[:8, ["low", "high", "centre"]] = np.nan  # no band yet at the start
    frame.loc[35, "value"] = 950.5
    data = chart_png(frame, "Clinic $5 $6 — mathtext must not trip", str(frame["period"].iloc[-1]))
    assert data.startswith(PNG_SIGNATURE) and len(data) < 30_000


def test_chart_of_a_silent_series_and_no_band() -> None:
    frame = history(8)
    frame.loc[7, "value"] = np.nan
    frame[["centre", "low", "high"]] = np.nan
    assert chart_png(frame, "Silent", str(frame["period"].iloc[-1])).startswith(PNG_SIGNATURE)


def test_chart_rejects_a_frame_without_the_columns() -> None:
    with pytest.raises(ValueError, match="centre"):
        chart_png(pd.DataFrame({"period": ["2026-01"], "value": [1.0]}), "x", "2026-01")
