"""Hand rendered digests to the organisation's SMTP relay.

One SMTP transaction per recipient (``send_message(..., to_addrs=[one])``), several
transactions over one connection, a fresh connection after a dropped one.

Security (RFC 3207, RFC 8314): ``starttls`` always upgrades with a verifying context and
never falls back to plaintext, so a relay that does not offer STARTTLS is a configuration
error and nothing is sent; ``tls`` is implicit TLS (port 465); ``none`` is plaintext and
only ever to a loopback host (validated in the config and checked again here). The
context is ``ssl.create_default_context(cafile=relay.ca_file)``: chain and host name are
verified, so ``relay.host`` must be a name on the relay's certificate.

How an attempt ends (RFC 5321 §4.2.1: 4yz transient, 5yz permanent; RFC 4954 §6 for AUTH):

==================================================  =========  ==============================
what happened                                        kind       what ``deliver`` does
==================================================  =========  ==============================
250 after DATA                                       sent       next message
4yz reply, dropped connection, timeout, refused      temporary  retry with backoff, up to
connection, DNS failure, TLS error other than a                 ``relay.attempts`` tries
failed certificate check
5yz reply to MAIL, RCPT or DATA                      permanent  record, do not retry
certificate check failed, no STARTTLS offered,       config     record every unsent message as
530/534/535/538 (AUTH), 5yz while connecting                    ``failed_temporary`` (it is not
                                                                their fault), then raise
                                                                ``DeliveryError(permanent=True)``
==================================================  =========  ==============================

When the relay cannot be reached at all (a temporary failure while connecting, after every
try), the rest of the batch is not attempted: those messages are recorded as
``failed_temporary`` with ``attempts=0`` and ``deliver`` returns normally, leaving them for
the next run.

Duplicates: if a connection drops after the final "." but before the 250, the relay may
have accepted the message and a retry can deliver it twice. Retries are few, and the
Message-ID stays the same (the same message is sent every time) so a duplicate can
be recognised.

Layers, smallest first, so a durable outbox can drive them one message at a time:
``open_connection`` -> ``send_one`` (one message, one open connection, one ``Attempt``) ->
``RelaySession`` (reuse, reconnect) -> ``deliver`` (retry policy for a batch).

Secrets: the password is never logged and is removed from any error text; message bodies
are never logged (recipient, outbox id, Message-ID, code and attempt number are).
"""

from __future__ import annotations

import base64
import ipaddress
import logging
import smtplib
import ssl
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from email import policy
from email.message import EmailMessage
from email.parser import BytesHeaderParser
from types import TracebackType
from typing import Any, Literal

from digest.config import RelayConfig
from digest.errors import ConfigError, DeliveryError

LOG = logging.getLogger("digest.deliver")

Status = Literal["sent", "failed_permanent", "failed_temporary"]
Kind = Literal["sent", "temporary", "permanent", "config"]
Stage = Literal["connect", "send"]
Logger = logging.Logger | logging.LoggerAdapter[Any]
ResultCallback = Callable[["DeliveryResult"], None]

# RFC 4954 §6: 530 authentication required, 534 mechanism too weak, 535 credentials
# invalid, 538 encryption required. Retrying with the same settings cannot help.
CONFIG_CODES = frozenset({530, 534, 535, 538})
_CODE_HINTS = {
    530: "the relay wants AUTH; set relay.username and relay.password_env",
    534: "the relay refuses the offered AUTH mechanisms",
    535: "check relay.username and the password in the variable named by relay.password_env",
    538: "the relay wants an encrypted session for AUTH",
}
NO_STARTTLS = (
    "the relay does not offer STARTTLS (RFC 3207), so nothing was sent; check relay.host "
    'and relay.port, or set security = "tls" for an implicit-TLS port such as 465'
)


@dataclass(frozen=True)
class Outgoing:
    """One message for one recipient, as the outbox hands it over.

    ``message`` is an ``EmailMessage``, or the finished RFC 5322 bytes with CRLF line ends
    (as an outbox stores them; sent exactly as they are, so the Message-ID never changes).
    """

    id: str
    envelope_from: str
    recipient: str
    message: EmailMessage | bytes

    @property
    def message_id(self) -> str | None:
        """The Message-ID header, or None when there is none."""
        if isinstance(self.message, bytes):
            headers = BytesHeaderParser(policy=policy.default).parsebytes(self.message)
            value = headers.get("Message-ID")
        else:
            value = self.message.get("Message-ID")
        return None if value is None else str(value).strip()


@dataclass(frozen=True)
class DeliveryResult:
    """What happened to one ``Outgoing`` in one run."""

    id: str
    recipient: str
    status: Status
    attempts: int
    code: int | None = None
    error: str | None = None


@dataclass(frozen=True)
class Attempt:
    """The outcome of one try: ``kind`` as in the module docstring, the SMTP reply code if
    there was one, a one-line error, and whether it failed while connecting or sending."""

    kind: Kind
    code: int | None = None
    error: str | None = None
    stage: Stage = "send"


_STATUSES: tuple[Status, ...] = ("sent", "failed_permanent", "failed_temporary")
SENT = Attempt("sent", 250)
_STATUS_OF: dict[Kind, Status] = {
    "sent": "sent",
    "permanent": "failed_permanent",
    "temporary": "failed_temporary",
    "config": "failed_temporary",  # not the message's fault: keep it for the next run
}  # smtplib.sendmail raises unless DATA was answered 250


# ---- checks before any connection -------------------------------------------------------


def is_loopback_host(host: str) -> bool:
    """``localhost`` or a loopback address (127.0.0.0/8, ::1)."""
    if host.lower() in {"localhost", "localhost."}:
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def check_relay(relay: RelayConfig, password: str | None) -> None:
    """Raise ConfigError for settings that cannot work, before anything is sent."""
    if relay.security == "none" and not is_loopback_host(relay.host):
        raise ConfigError(
            f"relay.security: 'none' (plaintext) is allowed only for a loopback host, "
            f"not {relay.host!r}; use starttls or tls"
        )
    if relay.username and password is None:
        raise ConfigError(
            "relay.username is set but no password was given; set relay.password_env "
            "and export that variable"
        )


def client_context(relay: RelayConfig) -> ssl.SSLContext:
    """A verifying client context: the system store, or ``relay.ca_file`` when set."""
    cafile = None if relay.ca_file is None else str(relay.ca_file)
    try:
        return ssl.create_default_context(cafile=cafile)
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError(
            f"relay.ca_file: cannot load {cafile}: {exc}; point it at a PEM file of the "
            "certificate authority that issued the relay's certificate"
        ) from None


def check_outgoing(item: Outgoing) -> str | None:
    """Why ``item`` must not be sent, or None. Addresses were validated at config load;
    this is the last line of defence (smtplib may silently cut CR/LF tails, libraries §3.3)."""
    for label, address in (("envelope sender", item.envelope_from), ("recipient", item.recipient)):
        if not _plain_address(address):
            return f"{label} {address!r} is not a plain ASCII address; not sent"
    if item.message_id is None:
        return "the message has no Message-ID header (the renderer must set one); not sent"
    return None


def _plain_address(address: str) -> bool:
    if not address or any(ord(ch) <= 32 or ord(ch) >= 127 or ch in "<>" for ch in address):
        return False
    local, _, domain = address.rpartition("@")
    return bool(local) and bool(domain) and "@" not in domain


# ---- one connection, one message ----------------------------------------------------------


def open_connection(
    relay: RelayConfig, password: str | None, *, context: ssl.SSLContext | None = None
) -> smtplib.SMTP:
    """Connect, secure the session and log in. Raises what smtplib, ssl and socket raise;
    ``classify(exc, stage="connect")`` turns that into an ``Attempt``."""
    if relay.security != "none":
        context = context or client_context(relay)
    conn = _connect(relay, context)
    try:
        _ehlo(conn)
        if relay.security == "starttls":
            if not conn.has_extn("starttls"):
                raise smtplib.SMTPNotSupportedError(NO_STARTTLS)
            conn.starttls(context=context)  # never without context=: that would not verify
            _ehlo(conn)  # RFC 3207 §4.2: forget what was learned before TLS
        if relay.username:
            conn.login(relay.username, password or "")
    except BaseException:
        conn.close()
        raise
    return conn


def _connect(relay: RelayConfig, context: ssl.SSLContext | None) -> smtplib.SMTP:
    if relay.security == "tls":
        return smtplib.SMTP_SSL(
            relay.host,
            relay.port,
            local_hostname=relay.local_hostname,
            timeout=relay.timeout,
            context=context,
        )
    return smtplib.SMTP(
        relay.host, relay.port, local_hostname=relay.local_hostname, timeout=relay.timeout
    )


def _ehlo(conn: smtplib.SMTP) -> None:
    code, reply = conn.ehlo()
    if not 200 <= code < 300:
        raise smtplib.SMTPHeloError(code, reply)


def send_one(conn: smtplib.SMTP, item: Outgoing) -> Attempt:
    """Send ``item`` over an open connection in one SMTP transaction; never raises for
    SMTP, TLS or network trouble."""
    try:
        if isinstance(item.message, bytes):
            conn.sendmail(item.envelope_from, [item.recipient], item.message)
        else:
            conn.send_message(item.message, from_addr=item.envelope_from, to_addrs=[item.recipient])
    except (OSError, ValueError) as exc:  # every smtplib and ssl error is an OSError
        return classify(exc, stage="send")
    return SENT


def classify(exc: BaseException, *, stage: Stage) -> Attempt:
    """Map an exception from smtplib/ssl/socket to an ``Attempt`` (table in the docstring)."""
    if isinstance(exc, ssl.SSLCertVerificationError):
        detail = getattr(exc, "verify_message", None) or str(exc)
        return Attempt(
            "config",
            None,
            f"the relay's certificate could not be verified ({detail}); nothing was sent "
            "(RFC 8314 §5). Set relay.ca_file to the CA that issued it and relay.host to a "
            "name on it",
            stage,
        )
    if isinstance(exc, smtplib.SMTPNotSupportedError):
        return Attempt("config" if stage == "connect" else "permanent", None, str(exc), stage)
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        code, reply = next(iter(exc.recipients.values()), (-1, b"recipient refused"))
        return _by_code(code, reply, stage)
    if isinstance(exc, smtplib.SMTPResponseException):
        return _by_code(exc.smtp_code, exc.smtp_error, stage)
    if isinstance(exc, UnicodeError) and stage == "connect":
        # The exception text would quote a character of the user name or password.
        return Attempt(
            "config",
            None,
            "relay.username, the password or relay.local_hostname has non-ASCII characters",
            stage,
        )
    if isinstance(exc, ValueError):
        return Attempt("permanent", None, f"the message cannot be sent as is: {exc}", stage)
    # SMTPServerDisconnected, ConnectionError, TimeoutError, socket.gaierror, other SSLError.
    return Attempt("temporary", None, _one_line(f"{type(exc).__name__}: {exc}"), stage)


def _by_code(code: int, reply: bytes | str, stage: Stage) -> Attempt:
    text = reply.decode("utf-8", "replace") if isinstance(reply, bytes) else reply
    error = _one_line(f"{code} {text}")
    if code in CONFIG_CODES:
        return Attempt("config", code, f"{error} ({_CODE_HINTS[code]})", stage)
    if 400 <= code < 500:
        return Attempt("temporary", code, error, stage)
    if 500 <= code < 600:
        # Refused while connecting (greeting, EHLO, STARTTLS): no message will get through.
        return Attempt("config" if stage == "connect" else "permanent", code, error, stage)
    return Attempt("temporary", code if code > 0 else None, error, stage)


def _one_line(text: str) -> str:
    return " ".join(text.split())


# ---- a connection kept for several messages ----------------------------------------------


class RelaySession:
    """One relay connection reused for several messages and reopened when it has dropped.

    ``send(item)`` is one try for one message and returns an ``Attempt``; a failure to
    connect comes back as an ``Attempt`` with ``stage="connect"``. Raises ConfigError at
    construction for settings that cannot work (see ``check_relay``).
    """

    def __init__(self, relay: RelayConfig, password: str | None) -> None:
        check_relay(relay, password)
        self.relay = relay
        self._password = password if relay.username else None
        self._context = None if relay.security == "none" else client_context(relay)
        self._secrets = _secret_forms(relay.username, self._password)
        self._conn: smtplib.SMTP | None = None
        self._conn_used = False

    def __enter__(self) -> RelaySession:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def send(self, item: Outgoing) -> Attempt:
        conn = self._connection()
        if isinstance(conn, Attempt):
            return conn
        self._conn_used = True
        attempt = send_one(conn, item)
        if attempt.kind != "sent" and conn.sock is None:  # smtplib closed it (421, drop)
            self._discard()
        return self._redact(attempt)

    def close(self) -> None:
        """Say QUIT if the connection is still up, then close it."""
        conn, self._conn = self._conn, None
        if conn is None:
            return
        try:
            if conn.sock is not None:
                conn.quit()
        except (OSError, smtplib.SMTPException):
            pass
        finally:
            conn.close()

    def _connection(self) -> smtplib.SMTP | Attempt:
        if self._conn is not None and self._conn_used and not _alive(self._conn):
            self._discard()
        if self._conn is None:
            try:
                self._conn = open_connection(self.relay, self._password, context=self._context)
            except (OSError, ValueError) as exc:
                return self._redact(classify(exc, stage="connect"))
            self._conn_used = False
        return self._conn

    def _discard(self) -> None:
        conn, self._conn = self._conn, None
        if conn is not None:
            conn.close()

    def _redact(self, attempt: Attempt) -> Attempt:
        if attempt.error is None or not any(s in attempt.error for s in self._secrets):
            return attempt
        error = attempt.error
        for secret in self._secrets:
            error = error.replace(secret, "********")
        return Attempt(attempt.kind, attempt.code, error, attempt.stage)


def _alive(conn: smtplib.SMTP) -> bool:
    """A NOOP round trip on a connection that has been used: relays drop idle sessions."""
    if conn.sock is None:
        return False
    try:
        code, _ = conn.noop()
    except (OSError, smtplib.SMTPException):
        return False
    return code == 250


_MIN_REDACTED = 4


def _secret_forms(username: str | None, password: str | None) -> tuple[str, ...]:
    """The password as typed and as AUTH PLAIN / LOGIN put it on the wire (base64).

    A password shorter than ``_MIN_REDACTED`` is only redacted in its base64 forms:
    blanking every "p" of an error text would hide the error, not the password.
    """
    if not password:
        return ()
    forms = [base64.b64encode(password.encode("utf-8")).decode("ascii")]
    if username:
        plain = f"\0{username}\0{password}".encode()
        forms.append(base64.b64encode(plain).decode("ascii"))
    if len(password) >= _MIN_REDACTED:
        forms.append(password)
    return tuple(form for form in forms if len(form) >= _MIN_REDACTED)


# ---- a batch, with retries -----------------------------------------------------------------


def backoff_delay(backoff: float, failed_attempts: int) -> float:
    """Seconds to wait after the n-th failed try: backoff, 2*backoff, 4*backoff ..."""
    return backoff * 2.0 ** (failed_attempts - 1)


def deliver(
    messages: Sequence[Outgoing],
    relay: RelayConfig,
    *,
    password: str | None,
    sleep: Callable[[float], None] = time.sleep,
    log: Logger = LOG,
    on_result: ResultCallback | None = None,
) -> list[DeliveryResult]:
    """Send each message to its one recipient; return one result per message, in order.

    ``on_result`` is called with each result as soon as it is known (an outbox records it
    there). Raises ConfigError before connecting when the settings cannot work, and
    ``DeliveryError(permanent=True)`` after recording every result when the relay setup is
    wrong (bad certificate, no STARTTLS, AUTH refused): see the module docstring.
    """
    results: list[DeliveryResult] = []

    def record(result: DeliveryResult) -> None:
        results.append(result)
        if on_result is not None:
            on_result(result)

    if not messages:
        return results
    with RelaySession(relay, password) as session:
        for index, item in enumerate(messages):
            problem = check_outgoing(item)
            if problem is not None:
                log.error("not sending %s to %s: %s", item.id, item.recipient, problem)
                record(
                    DeliveryResult(item.id, item.recipient, "failed_permanent", 0, None, problem)
                )
                continue
            result, last = _deliver_with_retries(session, item, sleep, log)
            record(result)
            rest = messages[index + 1 :]
            if last.kind == "config":
                _keep_for_next_run(rest, f"not attempted: {last.error}", last.code, record)
                raise _stopped(relay, last, results)
            if last.kind == "temporary" and last.stage == "connect" and rest:
                log.warning(
                    "relay %s:%d unreachable; %d message(s) left for the next run",
                    relay.host,
                    relay.port,
                    len(rest),
                )
                _keep_for_next_run(
                    rest, f"not attempted: relay unreachable ({last.error})", last.code, record
                )
                break
    return results


def _deliver_with_retries(
    session: RelaySession,
    item: Outgoing,
    sleep: Callable[[float], None],
    log: Logger,
) -> tuple[DeliveryResult, Attempt]:
    relay = session.relay
    message_id = item.message_id
    number = 0
    while True:
        number += 1
        attempt = session.send(item)
        if attempt.kind == "sent":
            log.info(
                "sent %s to %s (Message-ID %s, attempt %d)",
                item.id,
                item.recipient,
                message_id,
                number,
            )
            break
        log.log(
            logging.ERROR if attempt.kind == "config" else logging.WARNING,
            "attempt %d of %d for %s to %s failed while %s (%s, code %s): %s",
            number,
            relay.attempts,
            item.id,
            item.recipient,
            "connecting" if attempt.stage == "connect" else "sending",
            attempt.kind,
            attempt.code,
            attempt.error,
        )
        if attempt.kind != "temporary" or number >= relay.attempts:
            break
        delay = backoff_delay(relay.backoff, number)
        log.info("retrying %s to %s in %.1f s", item.id, item.recipient, delay)
        sleep(delay)
    return _result(item, attempt, number), attempt


def _result(item: Outgoing, attempt: Attempt, attempts: int) -> DeliveryResult:
    status = _STATUS_OF[attempt.kind]
    error = None if attempt.kind == "sent" else attempt.error
    return DeliveryResult(item.id, item.recipient, status, attempts, attempt.code, error)


def _keep_for_next_run(
    rest: Sequence[Outgoing], reason: str, code: int | None, record: ResultCallback
) -> None:
    for item in rest:
        record(DeliveryResult(item.id, item.recipient, "failed_temporary", 0, code, reason))


def _stopped(relay: RelayConfig, last: Attempt, results: list[DeliveryResult]) -> DeliveryError:
    counts = {status: sum(r.status == status for r in results) for status in _STATUSES}
    return DeliveryError(
        f"relay {relay.host}:{relay.port}: {(last.error or '').rstrip('.')}. Delivery stopped: "
        f"{counts['sent']} sent, {counts['failed_temporary']} kept for the next run, "
        f"{counts['failed_permanent']} failed permanently",
        permanent=True,
        code=last.code,
    )
