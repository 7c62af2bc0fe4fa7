"""Messages to the administrator: alarms (a stage failed, mail is stuck) and run summaries.

They are plain-text emails built with the standard ``email`` package and go through the
same outbox as digests. Their outbox ids are deterministic, so the same alarm is queued
once however often it is raised.
"""

from __future__ import annotations

from datetime import datetime
from email.headerregistry import Address
from email.message import EmailMessage
from email.utils import format_datetime

from digest.config import MailConfig
from digest.message import new_message_id
from digest.outbox import NewMessage
from digest.render import clean_header

ALARM_FOOTER = (
    "\n-- \nSent by digest on this server. `digest status` shows runs and the outbox;\n"
    "logs carry the run id shown above.\n"
)


def admin_message(
    mail: MailConfig,
    *,
    outbox_id: str,
    run_id: str,
    kind: str,
    subject: str,
    body: str,
    now: datetime,
) -> NewMessage | None:
    """An outbox entry for the administrator, or None when no ``mail.admin`` is set."""
    if not mail.admin:
        return None
    msg = EmailMessage()
    msg["Subject"] = clean_header(subject)
    msg["From"] = Address(mail.sender_name, addr_spec=mail.sender)
    msg["To"] = Address(addr_spec=mail.admin)
    msg["Date"] = format_datetime(now)
    message_id = new_message_id(run_id, mail.domain)
    msg["Message-ID"] = message_id
    msg["Auto-Submitted"] = "auto-generated"  # RFC 3834 §5
    msg.set_content(body.rstrip() + "\n" + ALARM_FOOTER)
    return NewMessage(
        id=outbox_id,
        run_id=run_id,
        kind="alarm" if kind == "alarm" else "summary",
        recipient=mail.admin,
        message_id=message_id,
        subject=str(msg["Subject"]),
        message=msg.as_bytes(policy=msg.policy.clone(linesep="\r\n")),
    )
