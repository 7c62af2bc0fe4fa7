"""Build the RFC 5322 message of one digest, and its CSV attachment.

Structure (RFC 2046 §5.1.4: the preferred alternative comes last)::

    multipart/mixed
      multipart/alternative
        text/plain
        multipart/related; type="text/html"      (RFC 2387; only when there are charts)
          text/html
          image/png  inline, Content-ID <...>    (referenced as cid:... in the HTML, RFC 2392)
      text/csv  attachment alerts-<period>.csv   (RFC 4180, CRLF line ends, sent as bytes)

Headers are set only through :class:`email.message.EmailMessage` and
:class:`email.headerregistry.Address`, which refuse CR/LF in header values.
"""

from __future__ import annotations

import io
import re
from datetime import datetime
from email.headerregistry import Address
from email.message import EmailMessage
from email.utils import format_datetime, make_msgid
from typing import TYPE_CHECKING

import pandas as pd

from digest.evaluate import ALERT_COLUMNS

if TYPE_CHECKING:
    from digest.config import MailConfig
    from digest.render import RenderedDigest

CSV_ENCODING = "utf-8-sig"  # a BOM, so spreadsheet programs read unit names as UTF-8

_UNSAFE_ID = re.compile(r"[^A-Za-z0-9.-]+")


def alerts_csv(
    alerts: pd.DataFrame, *, encoding: str = CSV_ENCODING, float_format: str | None = None
) -> bytes:
    """The alerts in the documented column order as RFC 4180 CSV bytes (CRLF line ends,
    empty cells for missing values). The attachment keeps a BOM for spreadsheets;
    ``alerts.csv`` (outputs.py) is plain UTF-8."""
    frame = alerts.reindex(columns=list(ALERT_COLUMNS))
    buffer = io.BytesIO()
    frame.to_csv(
        buffer,
        index=False,
        na_rep="",
        lineterminator="\r\n",
        encoding=encoding,
        float_format=float_format,
    )
    return buffer.getvalue()


def build_message(
    rendered: RenderedDigest,
    *,
    to_name: str | None,
    to_addr: str,
    mail: MailConfig,
    run_id: str,
    now: datetime,
    message_id: str | None = None,
) -> EmailMessage:
    """Assemble the digest message.

    ``now`` must be time-zone aware (it becomes the Date header). Pass ``message_id`` to
    keep the same Message-ID across retries of one digest.
    """
    if now.tzinfo is None or now.utcoffset() is None:
        raise ValueError("now must be time-zone aware, e.g. datetime.now(timezone.utc)")
    msg = EmailMessage()
    msg["Subject"] = rendered.subject  # CR/LF here raises ValueError (header injection guard)
    msg["From"] = Address(mail.sender_name, addr_spec=mail.sender)
    msg["To"] = Address(to_name or "", addr_spec=to_addr)
    if mail.reply_to:
        msg["Reply-To"] = Address(addr_spec=mail.reply_to)
    msg["Date"] = format_datetime(now)
    msg["Message-ID"] = message_id or new_message_id(run_id, mail.domain)
    msg["Auto-Submitted"] = "auto-generated"  # RFC 3834 §5: no vacation replies
    msg["X-Auto-Response-Suppress"] = "All"
    msg["X-Digest-Run"] = _safe_id(run_id)
    # quoted-printable keeps the message 7-bit (no 8BITMIME needed) and the text readable
    msg.set_content(rendered.text, cte="quoted-printable")
    msg.add_alternative(rendered.html, subtype="html", cte="quoted-printable")
    _add_charts(msg, rendered)
    msg.add_attachment(
        rendered.csv_bytes,
        maintype="text",
        subtype="csv",
        filename=rendered.csv_filename,
    )
    return msg


def new_message_id(run_id: str, domain: str) -> str:
    """A fresh ``<...@domain>`` Message-ID naming the run."""
    return make_msgid(idstring=_safe_id(run_id), domain=domain)


def _add_charts(msg: EmailMessage, rendered: RenderedDigest) -> None:
    if not rendered.charts:
        return
    html_part = msg.get_payload()[1]
    for chart in rendered.charts:
        html_part.add_related(
            chart.png,
            maintype="image",
            subtype="png",
            cid=f"<{chart.cid}>",
            disposition="inline",  # with a filename the default would be "attachment"
            filename=chart.filename,
        )
    html_part.set_param("type", "text/html")  # RFC 2387 §3.1; must follow the first add_related


def csv_filename(period: str) -> str:
    """``alerts-<period>.csv``, with anything but letters, digits, '.' and '-' replaced."""
    return f"alerts-{_safe_id(period)}.csv"


def _safe_id(value: str) -> str:
    return _UNSAFE_ID.sub("-", value).strip("-") or "digest"
