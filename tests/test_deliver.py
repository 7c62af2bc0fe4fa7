"""digest.deliver against real aiosmtpd servers on loopback (no mocks).

External sources beside the checks: RFC 5321 §4.2.1 (4yz transient, 5yz permanent
negative replies), RFC 3207 (STARTTLS; the client must not fall back to plaintext), RFC 4954
§6 (530/534/535/538 AUTH failures, 454 temporary), RFC 8314 §5 (an unverified certificate
does not make a session confidential), and libraries.md §2.4/§3.2, which recorded by
experiment what smtplib raises for each server behaviour.
"""

from __future__ import annotations

import base64
import logging
import smtplib
import socket
import ssl
import threading
import time
from collections.abc import Iterator
from email.message import EmailMessage
from pathlib import Path

import pytest
import trustme

from digest.config import RelayConfig
from digest.deliver import (
    Attempt,
    DeliveryResult,
    Outgoing,
    RelaySession,
    backoff_delay,
    classify,
    deliver,
    send_one,
)
from digest.errors import ConfigError, DeliveryError
from digest.testing import (
    SENDER,
    ScriptedHandler,
    free_port,
    make_message,
    outgoing,
    read_maildir,
    relay_for,
    running_sink,
)

USER = "digest"
PASSWORD = "s3cret-Password-7f2c"  # distinctive, so a leak is easy to find in logs
WRONG = "not-the-password-9b1e"


def message_id(message: EmailMessage) -> str:
    # A long Message-ID is folded onto its own line when sent; parsing keeps the leading
    # space of the continuation line, so compare without it.
    return str(message["Message-ID"]).strip()


@pytest.fixture(scope="module")
def ca() -> trustme.CA:
    return trustme.CA()


@pytest.fixture(scope="module")
def server_tls(ca: trustme.CA) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("localhost", "127.0.0.1").configure_cert(context)
    return context


@pytest.fixture
def ca_file(ca: trustme.CA, tmp_path: Path) -> Path:
    path = tmp_path / "ca.pem"
    ca.cert_pem.write_to_path(str(path))
    return path


@pytest.fixture
def maildir(tmp_path: Path) -> Path:
    return tmp_path / "maildir"


@pytest.fixture
def sleeps() -> list[float]:
    """Passed as ``sleep=sleeps.append``: records the backoff without waiting."""
    return []


@pytest.fixture(autouse=True)
def no_leftover_threads() -> Iterator[None]:
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 2
    while time.monotonic() < deadline:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        if not extra:
            return
        time.sleep(0.02)
    pytest.fail(f"threads left running: {extra}")


# ---- success paths ------------------------------------------------------------------------


def test_starttls_and_auth_deliver_a_message_that_parses_back(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path, sleeps: list[float]
) -> None:
    item = outgoing(subject="Digest for Kigoma district")
    with running_sink(maildir, tls_context=server_tls, auth=(USER, PASSWORD)) as sink:
        relay = relay_for(sink, ca_file=ca_file, username=USER)
        results = deliver([item], relay, password=PASSWORD, sleep=sleeps.append)

    assert results == [DeliveryResult(item.id, item.recipient, "sent", 1, 250, None)]
    assert sleeps == []
    [stored] = read_maildir(maildir)  # BytesParser(policy=default)
    assert stored["Subject"] == "Digest for Kigoma district"
    assert message_id(stored) == item.message_id
    assert stored["X-Sink-Mail-From"] == f"<{SENDER}>"
    assert stored["X-Sink-Rcpt-To"] == item.recipient
    body = stored.get_body(("plain",))
    assert body is not None and body.get_content() == "Three values need a look.\n"


def test_implicit_tls_mode_delivers(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    # RFC 8314 §3: implicit TLS (port 465 in real life) is the preferred submission form.
    item = outgoing()
    with running_sink(maildir, tls_context=server_tls, implicit_tls=True) as sink:
        relay = relay_for(sink, ca_file=ca_file)
        assert relay.security == "tls"
        results = deliver([item], relay, password=None)
    assert [r.status for r in results] == ["sent"]
    assert [message_id(m) for m in read_maildir(maildir)] == [item.message_id]


def test_one_connection_carries_several_messages(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    items = [outgoing(f"officer{i}@district.example.org") for i in range(3)]
    handler = ScriptedHandler(maildir)
    with running_sink(handler=handler, tls_context=server_tls) as sink:
        results = deliver(items, relay_for(sink, ca_file=ca_file), password=None)
    assert [r.status for r in results] == ["sent"] * 3
    assert handler.connections == 1
    assert handler.rcpt_calls == 3  # one transaction, one RCPT, per recipient
    assert sorted(m["X-Sink-Rcpt-To"] for m in read_maildir(maildir)) == sorted(
        i.recipient for i in items
    )


def test_stored_bytes_are_sent_exactly_as_they_are(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    # What an outbox keeps: the finished RFC 5322 bytes with CRLF line ends.
    message = outgoing().message
    assert isinstance(message, EmailMessage)
    raw = message.as_bytes(policy=message.policy.clone(linesep="\r\n"))
    item = Outgoing("outbox-1", SENDER, "officer@district.example.org", raw)
    assert item.message_id == message["Message-ID"]
    with running_sink(maildir, tls_context=server_tls) as sink:
        [result] = deliver([item], relay_for(sink, ca_file=ca_file), password=None)
    assert result.status == "sent"
    [stored] = read_maildir(maildir)
    assert message_id(stored) == message["Message-ID"]
    assert stored["Subject"] == message["Subject"]


def test_plaintext_is_allowed_to_loopback_only(maildir: Path) -> None:
    with running_sink(maildir) as sink:
        assert sink.security == "none"
        results = deliver([outgoing()], relay_for(sink), password=None)
    assert [r.status for r in results] == ["sent"]

    # The config refuses this already; deliver checks again in case a model was built
    # without validation.
    remote = RelayConfig.model_construct(host="mail.example.org", port=25, security="none")
    with pytest.raises(ConfigError, match="loopback"):
        deliver([outgoing()], remote, password=None)


# ---- the session is refused: nothing is sent ---------------------------------------------


def test_untrusted_certificate_is_refused_and_nothing_is_sent(
    server_tls: ssl.SSLContext, maildir: Path, sleeps: list[float]
) -> None:
    recorded: list[DeliveryResult] = []
    items = [outgoing(), outgoing("second@district.example.org")]
    with running_sink(maildir, tls_context=server_tls) as sink:
        relay = relay_for(sink, ca_file=None, attempts=3)  # system store: trustme CA unknown
        with pytest.raises(DeliveryError) as caught:
            deliver(items, relay, password=None, sleep=sleeps.append, on_result=recorded.append)

    assert caught.value.permanent is True
    assert "could not be verified" in str(caught.value)
    assert read_maildir(maildir) == []
    assert sleeps == []  # a configuration error is not retried
    # Not the messages' fault: both stay deliverable for the next run.
    assert [(r.status, r.attempts) for r in recorded] == [
        ("failed_temporary", 1),
        ("failed_temporary", 0),
    ]


def test_certificate_for_another_name_is_refused(
    ca: trustme.CA, ca_file: Path, maildir: Path
) -> None:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("mail.example.org").configure_cert(context)
    with (
        running_sink(maildir, tls_context=context) as sink,
        pytest.raises(DeliveryError, match="could not be verified"),
    ):
        deliver([outgoing()], relay_for(sink, ca_file=ca_file), password=None)
    assert read_maildir(maildir) == []


def test_relay_without_starttls_gets_nothing(ca_file: Path, maildir: Path) -> None:
    # RFC 3207: with security = "starttls" the client never continues in plaintext.
    with running_sink(maildir) as sink:  # no certificate: STARTTLS is not offered
        relay = relay_for(sink, ca_file=ca_file, security="starttls", attempts=3)
        with pytest.raises(DeliveryError) as caught:
            deliver([outgoing()], relay, password=None)
    message = str(caught.value)
    assert caught.value.permanent is True
    assert "does not offer STARTTLS" in message
    assert "nothing was sent" in message
    assert read_maildir(maildir) == []


def test_wrong_password_is_a_permanent_535(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path, sleeps: list[float]
) -> None:
    recorded: list[DeliveryResult] = []
    item = outgoing()
    with running_sink(maildir, tls_context=server_tls, auth=(USER, PASSWORD)) as sink:
        relay = relay_for(sink, ca_file=ca_file, username=USER, attempts=3)
        with pytest.raises(DeliveryError) as caught:
            deliver([item], relay, password=WRONG, sleep=sleeps.append, on_result=recorded.append)
    assert (caught.value.permanent, caught.value.code) == (True, 535)
    assert recorded == [
        DeliveryResult(item.id, item.recipient, "failed_temporary", 1, 535, recorded[0].error)
    ]
    assert sleeps == []
    assert read_maildir(maildir) == []


def test_password_never_reaches_logs_results_or_errors(
    server_tls: ssl.SSLContext,
    ca_file: Path,
    maildir: Path,
    caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.DEBUG)  # every logger, the sink's aiosmtpd included
    texts: list[str] = []
    with running_sink(maildir, tls_context=server_tls, auth=(USER, PASSWORD)) as sink:
        relay = relay_for(sink, ca_file=ca_file, username=USER)
        texts += [repr(r) for r in deliver([outgoing()], relay, password=PASSWORD)]
        with pytest.raises(DeliveryError) as caught:
            deliver([outgoing()], relay, password=WRONG, on_result=lambda r: texts.append(repr(r)))
        texts.append(str(caught.value))

    captured = caplog.text + "\n".join(texts)
    assert "sent" in caplog.text and "535" in captured  # the logs did capture both runs
    for secret in (PASSWORD, WRONG):
        forms = [
            secret,
            base64.b64encode(secret.encode()).decode(),
            base64.b64encode(f"\0{USER}\0{secret}".encode()).decode(),
        ]
        for form in forms:
            assert form not in captured


def test_a_password_echoed_by_the_relay_is_redacted(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    # A relay that quotes the password back in a reply must not get it into our records.
    handler = ScriptedHandler(maildir, data_replies=[f"554 5.6.0 refused, {PASSWORD}"])
    with running_sink(handler=handler, tls_context=server_tls, auth=(USER, PASSWORD)) as sink:
        relay = relay_for(sink, ca_file=ca_file, username=USER)
        [result] = deliver([outgoing()], relay, password=PASSWORD)
    assert (result.status, result.code) == ("failed_permanent", 554)
    assert result.error is not None and "refused, ********" in result.error
    assert PASSWORD not in result.error


def test_non_ascii_password_stops_without_quoting_it(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    # smtplib encodes AUTH PLAIN/LOGIN as ASCII; its UnicodeEncodeError would quote a
    # character of the password.
    with running_sink(maildir, tls_context=server_tls, auth=(USER, PASSWORD)) as sink:
        relay = relay_for(sink, ca_file=ca_file, username=USER)
        with pytest.raises(DeliveryError, match="non-ASCII") as caught:
            deliver([outgoing()], relay, password="pa\u00dfwort")
    assert "\u00df" not in str(caught.value)


# ---- per-message failures and retries -------------------------------------------------------


def test_451_twice_then_accepted_is_stored_once_after_three_attempts(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path, sleeps: list[float]
) -> None:
    # RFC 5321 §4.2.1: 4yz is a transient failure; the same message may be tried again.
    handler = ScriptedHandler(maildir, data_replies=["451 4.3.0 try again later"] * 2)
    item = outgoing()
    with running_sink(handler=handler, tls_context=server_tls) as sink:
        relay = relay_for(sink, ca_file=ca_file, attempts=4, backoff=0.25)
        [result] = deliver([item], relay, password=None, sleep=sleeps.append)

    assert (result.status, result.attempts, result.code) == ("sent", 3, 250)
    assert sleeps == [0.25, 0.5]  # backoff doubles
    assert handler.data_calls == 3
    assert handler.message_ids == [item.message_id] * 3  # same Message-ID each try
    assert handler.connections == 1  # smtplib sent RSET; the connection stayed usable
    assert [message_id(m) for m in read_maildir(maildir)] == [item.message_id]


def test_550_from_rcpt_is_permanent_and_not_retried(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path, sleeps: list[float]
) -> None:
    # RFC 5321 §4.2.1: 5yz is a permanent failure; repeating the request will not help.
    handler = ScriptedHandler(maildir, rcpt_replies=["550 5.1.1 no such mailbox"])
    first, second = outgoing("gone@district.example.org"), outgoing()
    with running_sink(handler=handler, tls_context=server_tls) as sink:
        relay = relay_for(sink, ca_file=ca_file, attempts=3, backoff=1)
        results = deliver([first, second], relay, password=None, sleep=sleeps.append)

    assert (results[0].status, results[0].attempts, results[0].code) == ("failed_permanent", 1, 550)
    assert results[0].error is not None and "no such mailbox" in results[0].error
    assert results[1].status == "sent"  # the batch goes on, on the same connection
    assert handler.rcpt_calls == 2  # the refused recipient was asked for once
    assert handler.connections == 1
    assert sleeps == []
    assert [m["X-Sink-Rcpt-To"] for m in read_maildir(maildir)] == [second.recipient]


def test_dropped_connection_is_reopened_and_the_message_retried(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path, sleeps: list[float]
) -> None:
    handler = ScriptedHandler(maildir, drop_data=1)
    items = [outgoing(), outgoing("second@district.example.org")]
    with running_sink(handler=handler, tls_context=server_tls) as sink:
        relay = relay_for(sink, ca_file=ca_file, attempts=3, backoff=0.1)
        results = deliver(items, relay, password=None, sleep=sleeps.append)

    assert [(r.status, r.attempts) for r in results] == [("sent", 2), ("sent", 1)]
    assert sleeps == [0.1]
    assert handler.connections == 2
    assert len(read_maildir(maildir)) == 2


def test_nothing_listening_is_temporary_after_all_attempts(
    ca_file: Path, sleeps: list[float]
) -> None:
    port = free_port()  # closed again: connections are refused
    relay = RelayConfig(
        host="127.0.0.1",
        port=port,
        ca_file=ca_file,
        timeout=2,
        attempts=3,
        backoff=0.5,
        local_hostname="client.digest.test",
    )
    items = [outgoing(), outgoing("second@district.example.org")]
    results = deliver(items, relay, password=None, sleep=sleeps.append)

    assert (results[0].status, results[0].attempts) == ("failed_temporary", 3)
    assert results[0].error is not None and "ConnectionRefusedError" in results[0].error
    assert sleeps == [0.5, 1.0]
    # The relay is down: the rest is kept for the next run without hammering it.
    assert (results[1].status, results[1].attempts) == ("failed_temporary", 0)
    assert results[1].error is not None and results[1].error.startswith("not attempted")


def test_message_without_message_id_is_refused_and_the_rest_sent(maildir: Path) -> None:
    message = make_message("a@district.example.org")
    del message["Message-ID"]
    bad, good = Outgoing("no-id", SENDER, "a@district.example.org", message), outgoing()
    with running_sink(maildir) as sink:
        results = deliver([bad, good], relay_for(sink), password=None)
    assert [(r.status, r.attempts) for r in results] == [("failed_permanent", 0), ("sent", 1)]
    assert len(read_maildir(maildir)) == 1


def test_send_one_is_the_unit_an_outbox_can_drive(
    server_tls: ssl.SSLContext, ca_file: Path, maildir: Path
) -> None:
    with running_sink(maildir, tls_context=server_tls) as sink:
        session = RelaySession(relay_for(sink, ca_file=ca_file), None)
        try:
            first = session.send(outgoing())
            conn = session._connection()
            assert isinstance(conn, smtplib.SMTP)
            second = send_one(conn, outgoing("b@district.example.org"))
        finally:
            session.close()
    assert first == second == Attempt("sent", 250)
    assert len(read_maildir(maildir)) == 2


# ---- settings refused before connecting ----------------------------------------------------


def test_username_without_password_is_a_config_error(ca_file: Path) -> None:
    relay = RelayConfig(host="127.0.0.1", port=free_port(), username=USER, ca_file=ca_file)
    with pytest.raises(ConfigError, match="password"):
        deliver([outgoing()], relay, password=None)


def test_missing_ca_file_is_a_config_error(tmp_path: Path) -> None:
    relay = RelayConfig(host="127.0.0.1", port=free_port(), ca_file=tmp_path / "nope.pem")
    with pytest.raises(ConfigError, match=r"relay\.ca_file"):
        deliver([outgoing()], relay, password=None)


def test_empty_batch_contacts_nobody() -> None:
    relay = RelayConfig(host="127.0.0.1", port=free_port())
    assert deliver([], relay, password=None) == []


# ---- the classification table --------------------------------------------------------------


@pytest.mark.parametrize(
    ("exc", "stage", "kind", "code"),
    [
        # RFC 5321 §4.2.1: 4yz transient, 5yz permanent.
        (smtplib.SMTPDataError(451, b"4.3.0 later"), "send", "temporary", 451),
        (smtplib.SMTPDataError(421, b"4.3.2 closing"), "send", "temporary", 421),
        (smtplib.SMTPDataError(554, b"5.6.0 content refused"), "send", "permanent", 554),
        (smtplib.SMTPSenderRefused(553, b"5.1.8 bad sender", SENDER), "send", "permanent", 553),
        (
            smtplib.SMTPRecipientsRefused({"a@b.org": (452, b"4.2.2 full")}),
            "send",
            "temporary",
            452,
        ),
        (
            smtplib.SMTPRecipientsRefused({"a@b.org": (550, b"5.1.1 unknown")}),
            "send",
            "permanent",
            550,
        ),
        # RFC 4954 §6: 454 temporary AUTH failure, 535 bad credentials, 530 AUTH required.
        (smtplib.SMTPAuthenticationError(454, b"4.7.0 try later"), "connect", "temporary", 454),
        (smtplib.SMTPAuthenticationError(535, b"5.7.8 invalid"), "connect", "config", 535),
        (smtplib.SMTPSenderRefused(530, b"5.7.0 auth required", SENDER), "send", "config", 530),
        # A 5yz while connecting (greeting, EHLO) refuses every message, not just one.
        (smtplib.SMTPConnectError(554, b"5.7.1 go away"), "connect", "config", 554),
        (smtplib.SMTPConnectError(421, b"4.3.2 busy"), "connect", "temporary", 421),
        (smtplib.SMTPNotSupportedError("STARTTLS"), "connect", "config", None),
        (smtplib.SMTPNotSupportedError("SMTPUTF8"), "send", "permanent", None),
        (smtplib.SMTPServerDisconnected("gone"), "send", "temporary", None),
        (ConnectionRefusedError(111, "refused"), "connect", "temporary", None),
        (TimeoutError("timed out"), "connect", "temporary", None),
        (socket.gaierror(-2, "Name or service not known"), "connect", "temporary", None),
        (ssl.SSLCertVerificationError(1, "certificate verify failed"), "connect", "config", None),
    ],
)
def test_classify(exc: BaseException, stage: str, kind: str, code: int | None) -> None:
    attempt = classify(exc, stage=stage)  # type: ignore[arg-type]
    assert (attempt.kind, attempt.code) == (kind, code)


def test_backoff_doubles() -> None:
    assert [backoff_delay(2.0, n) for n in (1, 2, 3, 4)] == [2.0, 4.0, 8.0, 16.0]
    assert backoff_delay(0.0, 5) == 0.0
