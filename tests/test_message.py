"""Digest messages, parsed back as a mail client would, checked against the standards."""

from __future__ import annotations

import csv
import dataclasses
import io
import re
from datetime import UTC, datetime, timedelta, timezone
from email import policy
from email.message import EmailMessage
from email.parser import BytesParser
from email.utils import parsedate_to_datetime

import jinja2
import pytest

from digest.config import MailConfig
from digest.message import ALERT_COLUMNS, alerts_csv, build_message
from digest.render import RenderedDigest, make_environment, render_digest, sample_inputs

NOW = datetime(2026, 11, 3, 2, 15, 42, tzinfo=timezone(timedelta(hours=3)))
MSGID = re.compile(r"^<[^<>@\s]+@health\.example\.org>$")  # RFC 5322 §3.6.4 msg-id
CID_URL = re.compile(r"""src="cid:([^"]+)\"""")


def mail(**values: object) -> MailConfig:
    base = {
        "from": "digest@health.example.org",
        "from_name": "Data quality digest",
        "admin": "data.manager@health.example.org",
        "admin_name": "Sam Osei, data manager",
        "domain": "health.example.org",
        "charts": 2,
    }
    return MailConfig.model_validate({**base, **values})


@pytest.fixture(scope="module")
def env() -> jinja2.Environment:
    return make_environment(None)


@pytest.fixture(scope="module")
def rendered(env: jinja2.Environment) -> RenderedDigest:
    alerts, recipient, context = sample_inputs(mail())
    return render_digest(alerts, recipient, context, env)


def build(rendered: RenderedDigest, **overrides: object) -> EmailMessage:
    values: dict = {
        "to_name": "Dr Lina Marsh",
        "to_addr": "l.marsh@health.example.org",
        "mail": mail(reply_to="data.desk@health.example.org"),
        "run_id": "20261103T0215-7f3a",
        "now": NOW,
    }
    return build_message(rendered, **{**values, **overrides})


def parse(msg: EmailMessage) -> EmailMessage:
    """Serialise with CRLF as smtplib does, then parse back like a client."""
    data = msg.as_bytes(policy=msg.policy.clone(linesep="\r\n"))
    return BytesParser(policy=policy.default).parsebytes(data)  # type: ignore[return-value]


@pytest.fixture(scope="module")
def parsed(rendered: RenderedDigest) -> EmailMessage:
    return parse(build(rendered))


# ---- structure -----------------------------------------------------------------------


def test_mime_tree_follows_rfc_2046_and_2387(parsed: EmailMessage) -> None:
    assert parsed.get_content_type() == "multipart/mixed"  # RFC 2046 §5.1.3
    alternative, attachment = parsed.get_payload()
    assert alternative.get_content_type() == "multipart/alternative"
    plain, related = alternative.get_payload()
    # RFC 2046 §5.1.4: alternatives in increasing faithfulness, plain text first, HTML last
    assert plain.get_content_type() == "text/plain"
    assert related.get_content_type() == "multipart/related"
    assert related.get_param("type") == "text/html"  # RFC 2387 §3.1: type of the root part
    root, *images = related.get_payload()
    assert root.get_content_type() == "text/html"
    assert len(images) == 2 and all(i.get_content_type() == "image/png" for i in images)
    assert attachment.get_content_type() == "text/csv"
    assert parsed.get_body(("html", "plain")) is not None


def test_inline_images_are_referenced_by_cid_urls(parsed: EmailMessage) -> None:
    related = parsed.get_payload()[0].get_payload()[1]
    html_part, *images = related.get_payload()
    html = html_part.get_content()
    referenced = set(CID_URL.findall(html))
    content_ids = set()
    for image in images:
        assert image.get_content_disposition() == "inline"  # not "attachment": shown once
        assert image.get_filename().startswith("chart-")
        assert image.get_payload(decode=True).startswith(b"\x89PNG\r\n\x1a\n")
        content_id = image["Content-ID"]
        assert content_id.startswith("<") and content_id.endswith(">")  # RFC 2392 §2
        content_ids.add(content_id[1:-1])
    # RFC 2392 §2: the cid: URL is the Content-ID without its angle brackets
    assert referenced == content_ids
    assert not any("<" in ref or ">" in ref or "%3C" in ref for ref in referenced)


def test_csv_attachment_round_trips_byte_for_byte(
    parsed: EmailMessage, rendered: RenderedDigest
) -> None:
    (attachment,) = list(parsed.iter_attachments())
    assert attachment.get_filename() == "alerts-2026-10.csv"
    assert attachment.get_content_disposition() == "attachment"
    data = attachment.get_payload(decode=True)
    assert data == rendered.csv_bytes
    # RFC 4180 §2: CRLF line ends, a header line, quoted fields with commas
    lines = data.split(b"\r\n")
    assert lines[-1] == b"" and all(b"\n" not in line for line in lines)
    rows = list(csv.reader(io.StringIO(data.decode("utf-8-sig"), newline="")))
    assert tuple(rows[0]) == ALERT_COLUMNS
    first = dict(zip(rows[0], rows[1], strict=True))
    assert first["unit_name"] == "Cedar Hill Health Centre" and first["value"] == "412.0"
    assert first["detail"] == "First antenatal visits were 412, far above the expected 44–90."
    relation = dict(zip(rows[0], rows[2], strict=True))
    assert relation["value"] == "" and relation["low"] == ""  # NaN -> empty cell


def test_alerts_csv_fills_absent_columns_with_empty_cells() -> None:
    alerts, _, _ = sample_inputs()
    data = alerts_csv(alerts.drop(columns=["programme"]))
    rows = list(csv.reader(io.StringIO(data.decode("utf-8-sig"), newline="")))
    assert tuple(rows[0]) == ALERT_COLUMNS
    assert {row[ALERT_COLUMNS.index("programme")] for row in rows[1:]} == {""}


def test_without_charts_html_sits_directly_in_the_alternative(env: jinja2.Environment) -> None:
    alerts, recipient, context = sample_inputs(mail(charts=0))
    msg = parse(build(render_digest(alerts, recipient, context, env)))
    plain, html = msg.get_payload()[0].get_payload()
    assert (plain.get_content_type(), html.get_content_type()) == ("text/plain", "text/html")
    assert "cid:" not in html.get_content()


def test_message_is_7bit(rendered: RenderedDigest) -> None:
    data = build(rendered).as_bytes()
    assert max(data) < 128  # RFC 6152 8BITMIME not needed at the relay
    assert all(len(line) <= 998 for line in data.split(b"\n"))  # RFC 5322 §2.1.1
    msg = BytesParser(policy=policy.default).parsebytes(data)
    for part in msg.walk():
        if part.get_content_maintype() == "text" and part.get_content_subtype() != "csv":
            assert part["Content-Transfer-Encoding"] == "quoted-printable"  # RFC 2045 §6.7


def test_bodies_round_trip(parsed: EmailMessage, rendered: RenderedDigest) -> None:
    plain = parsed.get_body(("plain",))
    html = parsed.get_body(("html",))
    assert plain is not None and html is not None
    assert plain.get_content().replace("\r\n", "\n") == rendered.text
    assert html.get_content().replace("\r\n", "\n") == rendered.html
    assert plain.get_content_charset() == "utf-8"


# ---- headers -------------------------------------------------------------------------


def test_headers_rfc_5322_and_3834(parsed: EmailMessage) -> None:
    # RFC 5322 §3.6: Date and From are required; Message-ID should be present
    assert parsedate_to_datetime(parsed["Date"]) == NOW
    # a long msg-id may be folded onto its own line (RFC 5322 §3.2.2); parsers keep the space
    assert MSGID.match(parsed["Message-ID"].strip())
    assert "20261103T0215-7f3a" in parsed["Message-ID"]
    assert parsed["From"].addresses[0].addr_spec == "digest@health.example.org"
    assert parsed["From"].addresses[0].display_name == "Data quality digest"
    assert parsed["To"].addresses[0].addr_spec == "l.marsh@health.example.org"
    assert parsed["To"].addresses[0].display_name == "Dr Lina Marsh"
    assert parsed["Reply-To"].addresses[0].addr_spec == "data.desk@health.example.org"
    assert parsed["Subject"] == "Data quality: 5 new alerts in Birchwood District — 2026-10"
    assert parsed["MIME-Version"] == "1.0"
    assert parsed["Auto-Submitted"] == "auto-generated"  # RFC 3834 §5
    assert parsed["X-Auto-Response-Suppress"] == "All"
    assert parsed["X-Digest-Run"] == "20261103T0215-7f3a"


def test_fixed_message_id_is_kept_for_retries(rendered: RenderedDigest) -> None:
    msg = build(rendered, message_id="<fixed.1@health.example.org>")
    assert parse(msg)["Message-ID"].strip() == "<fixed.1@health.example.org>"


def test_message_ids_survive_folding(rendered: RenderedDigest) -> None:
    long_id = "<" + "a" * 60 + ".20261103T0215-7f3a@ministry-of-health.example.org>"
    assert parse(build(rendered, message_id=long_id))["Message-ID"].strip() == long_id


def test_fresh_message_ids_differ(rendered: RenderedDigest) -> None:
    assert build(rendered)["Message-ID"] != build(rendered)["Message-ID"]


def test_reply_to_only_when_configured(rendered: RenderedDigest) -> None:
    assert build(rendered, mail=mail())["Reply-To"] is None


def test_naive_time_is_refused(rendered: RenderedDigest) -> None:
    with pytest.raises(ValueError, match="time-zone aware"):
        build(rendered, now=datetime(2026, 11, 3, 2, 15))


def test_utc_date_header(rendered: RenderedDigest) -> None:
    msg = build(rendered, now=datetime(2026, 11, 3, 2, 15, tzinfo=UTC))
    assert msg["Date"] == "Tue, 03 Nov 2026 02:15:00 +0000"  # RFC 5322 §3.3 date-time


# ---- header injection ----------------------------------------------------------------


def test_unit_name_with_newline_cannot_inject_a_header(env: jinja2.Environment) -> None:
    evil = "Birchwood\r\nBcc: eve@attacker.example\nX-Evil: 1"
    alerts, recipient, context = sample_inputs(mail(charts=0))
    ids = list(context.hierarchy.ids)
    names = list(context.hierarchy.names)
    names[ids.index("d1")] = evil
    context = dataclasses.replace(
        context, hierarchy=dataclasses.replace(context.hierarchy, names=tuple(names))
    )
    rendered = render_digest(alerts, recipient, context, env)
    # the sanitiser: one line, no control characters
    assert rendered.subject == (
        "Data quality: 5 new alerts in Birchwood Bcc: eve@attacker.example X-Evil: 1 — 2026-10"
    )
    msg = parse(build(rendered))
    assert msg["Bcc"] is None and msg["X-Evil"] is None
    assert "eve@attacker.example" in msg["Subject"]


def test_email_library_refuses_raw_newlines_in_headers(rendered: RenderedDigest) -> None:
    # the second guard: EmailMessage itself (libraries.md §4.3)
    raw = dataclasses.replace(rendered, subject="Alerts\r\nBcc: eve@attacker.example")
    with pytest.raises(ValueError, match="linefeed or carriage return"):
        build(raw)
    with pytest.raises(ValueError):
        build(rendered, to_name="Lina\nBcc: eve@attacker.example")
