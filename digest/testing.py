"""Helpers for tests of mail delivery, shipped with the package (like ``aiosmtpd.testing``).

Start a real sink on a free loopback port, make handlers that fail on purpose, build test
messages, and read back what was delivered. Nothing here imports pytest or trustme, so the
module is importable from any test suite; tests bring their own certificates (a trustme
CA, or ``digest.tlsutil``) as an ``ssl.SSLContext``.
"""

from __future__ import annotations

import datetime as dt
import errno
import mailbox
import socket
import ssl
import uuid
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from email import policy
from email.message import EmailMessage
from email.parser import BytesParser
from email.utils import format_datetime, make_msgid
from pathlib import Path
from typing import Any, cast

from aiosmtpd.smtp import SMTP, Envelope, Session

from digest.config import RelayConfig
from digest.deliver import Outgoing
from digest.sink import MaildirHandler, OnMessage, Sink

SENDER = "digest@health.example.org"
RECIPIENT = "officer@district.example.org"


def free_port(host: str = "127.0.0.1") -> int:
    """A port that was free a moment ago (aiosmtpd cannot bind port 0 itself)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.bind((host, 0))
        return int(probe.getsockname()[1])


@contextmanager
def running_sink(
    maildir: Path | None = None,
    *,
    handler: Any = None,
    tls_context: ssl.SSLContext | None = None,
    implicit_tls: bool = False,
    auth: tuple[str, str] | None = None,
    host: str = "127.0.0.1",
    on_message: OnMessage | None = None,
    tries: int = 5,
) -> Iterator[Sink]:
    """A started ``Sink`` on a free port of ``host``, stopped when the block ends.

    With ``tls_context`` STARTTLS is required (or implicit TLS with ``implicit_tls``);
    ``auth`` adds required AUTH. Retries a few ports if another process wins the race.
    """
    for attempt in range(1, tries + 1):
        sink = Sink(
            maildir,
            handler=handler,
            host=host,
            port=free_port(host),
            tls_context=tls_context,
            implicit_tls=implicit_tls,
            auth=auth,
            on_message=on_message,
        )
        try:
            sink.start()
        except OSError as exc:
            if exc.errno == errno.EADDRINUSE and attempt < tries:
                continue
            raise
        break
    try:
        yield sink
    finally:
        sink.stop()


def relay_for(
    sink: Sink,
    *,
    ca_file: Path | None = None,
    security: str | None = None,
    username: str | None = None,
    attempts: int = 1,
    backoff: float = 0.0,
    timeout: float = 5.0,
) -> RelayConfig:
    """A ``RelayConfig`` for ``sink`` with short timeouts; security follows the sink."""
    return RelayConfig(
        host=sink.host,
        port=sink.port,
        security=cast(Any, security or sink.security),
        username=username,
        ca_file=ca_file,
        timeout=timeout,
        local_hostname="client.digest.test",  # avoid socket.getfqdn() in EHLO
        attempts=attempts,
        backoff=backoff,
    )


def make_message(
    recipient: str = RECIPIENT,
    *,
    sender: str = SENDER,
    subject: str = "Data quality digest",
    body: str = "Three values need a look.\n",
    domain: str = "health.example.org",
) -> EmailMessage:
    """A small digest-like message: fixed Date, its own Message-ID, plain text body."""
    message = EmailMessage()
    message["From"] = sender
    message["To"] = recipient
    message["Subject"] = subject
    message["Date"] = format_datetime(dt.datetime(2026, 11, 2, 6, 0, tzinfo=dt.UTC))
    message["Message-ID"] = make_msgid(idstring="digest-test", domain=domain)
    message["Auto-Submitted"] = "auto-generated"
    message.set_content(body)
    return message


def outgoing(
    recipient: str = RECIPIENT,
    *,
    id: str | None = None,
    sender: str = SENDER,
    subject: str = "Data quality digest",
    body: str = "Three values need a look.\n",
) -> Outgoing:
    """An ``Outgoing`` around ``make_message``."""
    message = make_message(recipient, sender=sender, subject=subject, body=body)
    return Outgoing(id or uuid.uuid4().hex[:12], sender, recipient, message)


def read_maildir(path: Path) -> list[EmailMessage]:
    """Every message in the Maildir at ``path``, oldest first, parsed with the modern policy."""
    box = mailbox.Maildir(path, factory=None, create=False)
    keyed = sorted(box.iterkeys(), key=lambda key: (box.get_message(key).get_date(), key))
    parser = BytesParser(policy=policy.default)
    return [parser.parsebytes(box.get_bytes(key)) for key in keyed]


class ScriptedHandler(MaildirHandler):
    """A ``MaildirHandler`` that fails on purpose, then behaves normally.

    ``rcpt_replies`` and ``data_replies`` are answered in turn to RCPT and DATA (e.g.
    ``"451 4.3.0 try later"``, ``"550 5.1.1 no such user"``); ``drop_data`` closes the
    connection in the middle of that many DATA commands. It records what the server saw:
    ``rcpt_calls``, ``data_calls``, the Message-ID of each DATA and each SMTP session
    (one per connection that reached RCPT).
    """

    def __init__(
        self,
        maildir: Path,
        *,
        rcpt_replies: Iterable[str] = (),
        data_replies: Iterable[str] = (),
        drop_data: int = 0,
        on_message: OnMessage | None = None,
    ) -> None:
        super().__init__(maildir, on_message)
        self._rcpt_replies = list(rcpt_replies)
        self._data_replies = list(data_replies)
        self._drop_data = drop_data
        self.rcpt_calls = 0
        self.data_calls = 0
        self.message_ids: list[str | None] = []
        self.sessions: list[Session] = []

    @property
    def connections(self) -> int:
        return len(self.sessions)

    async def handle_RCPT(
        self,
        server: SMTP,
        session: Session,
        envelope: Envelope,
        address: str,
        rcpt_options: list[str],
    ) -> str:
        self.rcpt_calls += 1
        if not any(seen is session for seen in self.sessions):
            self.sessions.append(session)
        if self._rcpt_replies:
            return self._rcpt_replies.pop(0)
        envelope.rcpt_tos.append(address)
        envelope.rcpt_options.extend(rcpt_options)
        return "250 OK"

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        self.data_calls += 1
        self.message_ids.append(_message_id(envelope.original_content or b""))
        if self._drop_data > 0:
            self._drop_data -= 1
            assert server.transport is not None
            server.transport.close()
            return "421 4.3.2 closing the connection on purpose"
        if self._data_replies:
            return self._data_replies.pop(0)
        return await super().handle_DATA(server, session, envelope)


def _message_id(content: bytes) -> str | None:
    headers = BytesParser(policy=policy.default).parsebytes(content, headersonly=True)
    value = headers.get("Message-ID")
    return None if value is None else str(value).strip()  # folded: " <...>"
