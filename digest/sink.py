"""The local test mail sink: an aiosmtpd server that stores every message in a Maildir.

Administrators rehearse a run against it (``digest sink``, ``digest run --dry-run``) and the
tests deliver to it. It speaks STARTTLS with a certificate the client verifies, so a
rehearsal exercises the same verified-TLS client path as the real relay; when no
certificate is given it makes a throwaway one (``digest.tlsutil``) and says which CA file
the client must trust.

Pitfalls handled here (libraries.md §2): the Controller is always given ``hostname``
(otherwise it may bind ``::1`` only) and ``server_hostname`` (otherwise ``getfqdn()`` can
block for seconds); port 0 is refused because the Controller cannot use it; the Maildir's
``tmp/new/cur`` are created explicitly; a failure to store becomes a 4xx reply without the
exception text (an uncaught handler exception would be a 5xx that leaks it); a failed AUTH
answers 535 (``AuthResult(handled=False)``) instead of leaving the client hanging.
"""

from __future__ import annotations

import argparse
import hmac
import logging
import mailbox
import signal
import smtplib
import socket
import ssl
import sys
import tempfile
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from email import policy
from email.parser import BytesHeaderParser
from pathlib import Path
from types import FrameType, TracebackType
from typing import Any, Literal

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import SMTP, AuthResult, Envelope, LoginPassword, Session

from digest.config import RelayConfig, SinkConfig
from digest.deliver import is_loopback_host
from digest.errors import ConfigError, DigestError
from digest.tlsutil import (
    CA_FILE,
    LOOPBACK_NAMES,
    GeneratedCertificate,
    generate_certificate,
    load_server_context,
    server_context,
    write_certificate,
)

LOG = logging.getLogger("digest.sink")

SERVER_HOSTNAME = "sink.digest.test"  # name in the greeting; avoids socket.getfqdn()
Security = Literal["starttls", "tls", "none"]


# ---- storing messages ---------------------------------------------------------------------


@dataclass(frozen=True)
class StoredMessage:
    """One message the sink stored; ``str()`` is the one line ``digest sink`` prints."""

    key: str
    mail_from: str
    rcpt_tos: tuple[str, ...]
    subject: str
    size: int

    def __str__(self) -> str:
        return f"stored {self.size} bytes for {', '.join(self.rcpt_tos)}: {self.subject!r}"


OnMessage = Callable[[StoredMessage], object]


def open_maildir(path: Path) -> mailbox.Maildir:
    """Open (creating ``tmp``, ``new`` and ``cur``) a Maildir at ``path``.

    ``mailbox.Maildir(create=True)`` skips the subfolders when ``path`` already exists, and
    ``add()`` then fails (libraries.md §2.2), so they are made here.
    """
    for sub in ("tmp", "new", "cur"):
        (path / sub).mkdir(parents=True, exist_ok=True)
    return mailbox.Maildir(path, factory=None, create=False)


class MaildirHandler:
    """aiosmtpd handler: store each message, envelope first, in a standard Maildir.

    The stored message starts with ``X-Sink-Mail-From`` and ``X-Sink-Rcpt-To`` (the ``To:``
    header is not where a message was delivered). ``on_message`` is called once per stored
    message; its failures are logged and do not affect the reply.
    """

    def __init__(self, maildir: Path | str, on_message: OnMessage | None = None) -> None:
        self.path = Path(maildir)
        self.box = open_maildir(self.path)
        self.on_message = on_message

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        try:
            stored = self.store(envelope)
        except Exception:
            # Logged here for the administrator; the client gets a transient reply without
            # the exception text (RFC 5321 §4.2.1: 4yz, try again later).
            LOG.exception("could not store a message for %s in %s", envelope.rcpt_tos, self.path)
            return "451 4.3.0 The sink could not store the message; try again later"
        self._announce(stored)
        return f"250 2.0.0 Stored as {stored.key}"

    def store(self, envelope: Envelope) -> StoredMessage:
        """Add the message to the Maildir (raises OSError when it cannot be written)."""
        content = envelope.original_content or b""
        mail_from = envelope.mail_from or ""
        head = f"X-Sink-Mail-From: <{mail_from}>\nX-Sink-Rcpt-To: {', '.join(envelope.rcpt_tos)}\n"
        # Maildir files use the local line end; mailbox keeps the CRLF of bytes as they are.
        stored = head.encode("utf-8", "surrogateescape") + content.replace(b"\r\n", b"\n")
        key = self.box.add(stored)
        return StoredMessage(
            key, mail_from, tuple(envelope.rcpt_tos), _subject(content), len(content)
        )

    def _announce(self, stored: StoredMessage) -> None:
        LOG.info(
            "stored %d bytes for %s, subject %r, as %s",
            stored.size,
            ", ".join(stored.rcpt_tos),
            stored.subject,
            stored.key,
        )
        if self.on_message is None:
            return
        try:
            self.on_message(stored)
        except Exception:
            LOG.exception("on_message callback failed for %s", stored.key)


def _subject(content: bytes) -> str:
    try:
        headers = BytesHeaderParser(policy=policy.default).parsebytes(content)
        subject = str(headers.get("Subject", ""))
    except Exception:  # a malformed header must not cost the message
        return "(unreadable subject)"
    return " ".join(subject.split())


# ---- the server -----------------------------------------------------------------------------


def _authenticator(username: str, password: str) -> Callable[..., AuthResult]:
    expected = (username.encode("utf-8"), password.encode("utf-8"))

    def authenticate(
        server: SMTP, session: Session, envelope: Envelope, mechanism: str, auth_data: Any
    ) -> AuthResult:
        if isinstance(auth_data, LoginPassword):
            login_ok = hmac.compare_digest(auth_data.login, expected[0])
            password_ok = hmac.compare_digest(auth_data.password, expected[1])
            if login_ok and password_ok:
                return AuthResult(success=True)
        # handled=False makes aiosmtpd answer 535; the default (True) sends nothing at all.
        return AuthResult(success=False, handled=False)

    return authenticate


class Sink:
    """A running test sink: an aiosmtpd ``Controller`` around a ``MaildirHandler``.

    TLS: pass ``tls_context`` or ``tls_cert`` + ``tls_key``. Then STARTTLS is required
    before MAIL (or, with ``implicit_tls=True``, the port speaks TLS from the first byte).
    ``auth=(username, password)`` requires AUTH, which is offered only after TLS. Use it as
    a context manager, or call ``start()`` and ``stop()``.
    """

    def __init__(
        self,
        maildir: Path | str | None = None,
        *,
        handler: Any = None,
        host: str = "127.0.0.1",
        port: int = 8025,
        tls_context: ssl.SSLContext | None = None,
        tls_cert: Path | None = None,
        tls_key: Path | None = None,
        implicit_tls: bool = False,
        auth: tuple[str, str] | None = None,
        on_message: OnMessage | None = None,
        server_hostname: str = SERVER_HOSTNAME,
        ready_timeout: float = 5.0,
    ) -> None:
        if port == 0:
            raise ValueError(
                "aiosmtpd cannot listen on port 0; pick one with digest.testing.free_port()"
            )
        tls_context = _tls_context(tls_context, tls_cert, tls_key)
        if auth is not None and tls_context is None:
            raise ValueError(
                "AUTH without TLS would send the password in clear; give a certificate"
            )
        if implicit_tls and tls_context is None:
            raise ValueError("implicit_tls needs a certificate")
        if implicit_tls and auth is not None:
            # aiosmtpd 1.4 counts only STARTTLS as TLS for AUTH, so it would never offer it.
            raise ValueError("aiosmtpd offers AUTH only after STARTTLS; drop implicit_tls or auth")
        if handler is None:
            if maildir is None:
                raise ValueError("give a maildir or a handler")
            handler = MaildirHandler(maildir, on_message)
        self.handler = handler
        self.host = host
        self.port = port
        self.security: Security = (
            "none" if tls_context is None else ("tls" if implicit_tls else "starttls")
        )
        self._controller_options: dict[str, Any] = dict(
            hostname=host,
            port=port,
            server_hostname=server_hostname,
            ready_timeout=ready_timeout,
            ssl_context=tls_context if implicit_tls else None,
            **_smtp_options(tls_context if not implicit_tls else None, auth),
        )
        self.controller: Controller | None = None  # made by start(): it owns an event loop

    @property
    def running(self) -> bool:
        return self.controller is not None

    def start(self) -> Sink:
        """Listen; raises OSError when the port is taken."""
        if self.controller is not None:
            raise RuntimeError("the sink is already running")
        _check_bindable(self.host, self.port)  # else Controller.start() waits ready_timeout
        controller = Controller(self.handler, **self._controller_options)
        try:
            controller.start()
        except BaseException:
            controller.stop(no_assert=True)
            if not controller.loop.is_closed():  # a failed start leaves it open
                controller.loop.close()
            raise
        self.controller = controller
        LOG.info("sink listening on %s:%d (%s)", self.host, self.port, self.security)
        return self

    def stop(self) -> None:
        """Stop listening and end the server thread; does nothing if not running."""
        controller, self.controller = self.controller, None
        if controller is not None:
            controller.stop()
            LOG.info("sink on %s:%d stopped", self.host, self.port)

    def __enter__(self) -> Sink:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()


def _check_bindable(host: str, port: int) -> None:
    """Raise OSError (EADDRINUSE ...) at once if ``host:port`` cannot be bound.

    Same options as asyncio's ``create_server`` (SO_REUSEADDR on POSIX), which still
    refuses a port that another socket is listening on.
    """
    for family, kind, proto, _, address in socket.getaddrinfo(
        host or None, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE
    ):
        with socket.socket(family, kind, proto) as probe:
            if hasattr(socket, "SO_REUSEADDR") and sys.platform != "win32":
                probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            if family == socket.AF_INET6:
                probe.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_V6ONLY, 1)
            probe.bind(address)


def _tls_context(
    context: ssl.SSLContext | None, cert: Path | None, key: Path | None
) -> ssl.SSLContext | None:
    if (cert is None) != (key is None):
        raise ValueError("give both tls_cert and tls_key, or neither")
    if cert is not None and key is not None:
        if context is not None:
            raise ValueError("give tls_context or tls_cert + tls_key, not both")
        return server_context(cert, key)
    return context


def _smtp_options(
    starttls_context: ssl.SSLContext | None, auth: tuple[str, str] | None
) -> dict[str, Any]:
    options: dict[str, Any] = {"enable_SMTPUTF8": False}
    if starttls_context is not None:
        options.update(tls_context=starttls_context, require_starttls=True)
    if auth is not None:
        options.update(
            authenticator=_authenticator(*auth), auth_required=True, auth_require_tls=True
        )
    return options


# ---- where a client finds the sink --------------------------------------------------------


@dataclass(frozen=True)
class SinkEndpoint:
    """How a client reaches a sink: address, TLS mode and the CA file to trust.

    ``started`` is True when the sink runs in this process (``ensure_sink`` started it).
    """

    host: str
    port: int
    maildir: Path
    ca_file: Path | None
    security: Security = "starttls"
    started: bool = False

    def relay_config(
        self,
        *,
        attempts: int = 2,
        backoff: float = 1.0,
        timeout: float = 10.0,
        local_hostname: str = "localhost",
    ) -> RelayConfig:
        """A ``RelayConfig`` pointing the real client at this sink (no AUTH)."""
        return RelayConfig(
            host=self.host,
            port=self.port,
            security=self.security,
            ca_file=self.ca_file,
            timeout=timeout,
            local_hostname=local_hostname,
            attempts=attempts,
            backoff=backoff,
        )


_WILDCARDS = {"": "127.0.0.1", "0.0.0.0": "127.0.0.1", "::": "::1"}


def _client_host(host: str) -> str:
    """The address a local client uses for a sink bound to ``host``."""
    return _WILDCARDS.get(host, host)


def _certificate_hosts(host: str) -> list[str]:
    hosts = list(LOOPBACK_NAMES)
    if host in _WILDCARDS:
        hosts.append(socket.gethostname())
    elif host not in hosts:
        hosts.append(host)
    return hosts


def exposure_warning(host: str) -> str | None:
    """A warning when the sink would listen beyond this machine, else None."""
    if is_loopback_host(host):
        return None
    return (
        f"warning: the sink will listen on {host!r}, not loopback: other machines may be able "
        "to send it mail. It is a test tool; use 127.0.0.1 unless you mean this"
    )


def _listening(host: str, port: int, timeout: float) -> bool:
    try:
        with socket.create_connection((_client_host(host), port), timeout=timeout):
            return True
    except OSError:
        return False


@contextmanager
def ensure_sink(
    config: SinkConfig,
    *,
    on_message: OnMessage | None = None,
    probe_timeout: float = 2.0,
) -> Iterator[SinkEndpoint]:
    """A sink for ``digest run --dry-run``: the one already listening, or one started here.

    If something listens at ``config.host:config.port`` it must be an SMTP server offering
    STARTTLS (else ConfigError); the client will trust ``sink-ca.pem`` beside the configured
    Maildir if that file exists (``digest sink`` writes it there), else the system store.
    Otherwise an in-process sink is started with a throwaway certificate (STARTTLS
    required), its CA in a temporary folder, and stopped when the block ends.
    """
    if _listening(config.host, config.port, probe_timeout):
        yield _existing_endpoint(config, probe_timeout)
        return
    warning = exposure_warning(config.host)
    if warning:
        LOG.warning("%s", warning)
    generated = generate_certificate(_certificate_hosts(config.host))
    sink = Sink(
        config.maildir,
        host=config.host,
        port=config.port,
        tls_context=load_server_context(generated),
        on_message=on_message,
    )
    with tempfile.TemporaryDirectory(prefix="digest-sink-") as folder:
        ca_file = Path(folder) / CA_FILE
        ca_file.write_bytes(generated.ca_pem)
        _start_or_explain(sink)
        try:
            yield SinkEndpoint(
                _client_host(config.host), config.port, config.maildir, ca_file, "starttls", True
            )
        finally:
            sink.stop()


def _existing_endpoint(config: SinkConfig, timeout: float) -> SinkEndpoint:
    host = _client_host(config.host)
    try:
        with smtplib.SMTP(host, config.port, local_hostname="localhost", timeout=timeout) as probe:
            probe.ehlo()
            starttls = probe.has_extn("starttls")
    except (OSError, smtplib.SMTPException) as exc:
        raise ConfigError(
            f"sink: something listens on {host}:{config.port} but does not answer like an SMTP "
            f"server ({type(exc).__name__}); stop it or set sink.port to a free port"
        ) from None
    if not starttls:
        raise ConfigError(
            f"sink: the SMTP server on {host}:{config.port} does not offer STARTTLS, and the "
            "client never sends in plaintext; stop it and start `digest sink`, which does"
        )
    ca_file = config.maildir.parent / CA_FILE
    LOG.info("using the sink already listening on %s:%d", host, config.port)
    return SinkEndpoint(
        host, config.port, config.maildir, ca_file if ca_file.is_file() else None, "starttls"
    )


def _start_or_explain(sink: Sink) -> None:
    try:
        sink.start()
    except OSError as exc:
        raise ConfigError(
            f"sink: cannot listen on {sink.host}:{sink.port} ({exc.strerror or exc}); "
            "stop whatever uses that port or choose another one"
        ) from None


# ---- digest sink ------------------------------------------------------------------------------


def serve_sink(
    host: str = "127.0.0.1",
    port: int = 8025,
    maildir: Path | str = Path("out/maildir"),
    tls_cert: Path | None = None,
    tls_key: Path | None = None,
    on_message: OnMessage = print,
    *,
    say: Callable[[str], object] = print,
    stop: threading.Event | None = None,
    on_ready: Callable[[SinkEndpoint], object] | None = None,
) -> None:
    """Run a sink until Ctrl+C, SIGTERM (main thread only) or ``stop.set()``.

    Without ``tls_cert``/``tls_key`` a throwaway certificate is made and its CA written to
    ``sink-ca.pem`` beside the Maildir (after the port is bound, so a failed start leaves
    a running sink's files alone). Raises ConfigError for bad arguments or a taken port.
    """
    maildir = Path(maildir).absolute()
    warning = exposure_warning(host)
    if warning:
        say(warning)
    sink, generated = _build_sink(host, port, maildir, tls_cert, tls_key, on_message)
    _start_or_explain(sink)
    try:
        ca_file = (
            None if generated is None else write_certificate(generated, maildir.parent).ca_file
        )
        endpoint = SinkEndpoint(_client_host(host), port, maildir, ca_file, "starttls", True)
        for line in _banner(endpoint, tls_cert):
            say(line)
        if on_ready is not None:
            on_ready(endpoint)
        _wait(stop or threading.Event())
    finally:
        sink.stop()
    say("digest sink: stopped")


def _build_sink(
    host: str,
    port: int,
    maildir: Path,
    tls_cert: Path | None,
    tls_key: Path | None,
    on_message: OnMessage,
) -> tuple[Sink, GeneratedCertificate | None]:
    if (tls_cert is None) != (tls_key is None):
        raise ConfigError(
            "sink: pass both --tls-cert and --tls-key, or neither to use a throwaway certificate"
        )
    generated = None
    try:
        if tls_cert is not None and tls_key is not None:
            context = server_context(tls_cert, tls_key)
        else:
            generated = generate_certificate(_certificate_hosts(host))
            context = load_server_context(generated)
    except (OSError, ssl.SSLError) as exc:
        raise ConfigError(f"sink: cannot load the certificate or key: {exc}") from None
    try:
        sink = Sink(maildir, host=host, port=port, tls_context=context, on_message=on_message)
    except (OSError, ValueError) as exc:
        raise ConfigError(f"sink: {exc}") from None
    return sink, generated


def _banner(endpoint: SinkEndpoint, tls_cert: Path | None) -> list[str]:
    trust = (
        f"the throwaway CA in {endpoint.ca_file}"
        if endpoint.ca_file is not None
        else f"the CA that issued {tls_cert}"
    )
    ca_line = f'ca_file = "{endpoint.ca_file}"' if endpoint.ca_file else "ca_file = ..."
    return [
        f"digest sink: listening on {endpoint.host}:{endpoint.port}, STARTTLS required; "
        f"storing mail in {endpoint.maildir}",
        f"digest sink: clients must trust {trust}. Relay settings for a rehearsal:",
        "  [relay]",
        f'  host = "{endpoint.host}"',
        f"  port = {endpoint.port}",
        '  security = "starttls"',
        f"  {ca_line}",
        "digest sink: press Ctrl+C to stop",
    ]


def _wait(stop: threading.Event) -> None:
    """Block until ``stop`` is set, Ctrl+C, or SIGTERM (handled only in the main thread)."""
    in_main = threading.current_thread() is threading.main_thread()
    previous: Any = None
    if in_main:

        def on_sigterm(signum: int, frame: FrameType | None) -> None:
            stop.set()

        previous = signal.signal(signal.SIGTERM, on_sigterm)
    try:
        while not stop.wait(0.5):
            pass
    except KeyboardInterrupt:
        pass
    finally:
        if in_main:
            signal.signal(signal.SIGTERM, previous if previous is not None else signal.SIG_DFL)


def add_sink_arguments(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
    """Add the ``digest sink`` options to ``parser`` (a subcommand parser)."""
    parser.add_argument(
        "--host", default="127.0.0.1", help="address to listen on (default: 127.0.0.1)"
    )
    parser.add_argument("--port", type=int, default=8025, help="port to listen on (default: 8025)")
    parser.add_argument(
        "--maildir",
        type=Path,
        default=Path("out/maildir"),
        help="Maildir to store messages in (default: out/maildir)",
    )
    parser.add_argument(
        "--tls-cert",
        type=Path,
        default=None,
        help="PEM certificate; without it a throwaway CA and certificate are written "
        "beside the Maildir (sink-ca.pem is the file the client must trust)",
    )
    parser.add_argument("--tls-key", type=Path, default=None, help="PEM key for --tls-cert")
    return parser


def sink_command(args: argparse.Namespace) -> int:
    """``digest sink``: serve until stopped. Raises ConfigError for bad arguments."""
    serve_sink(args.host, args.port, args.maildir, args.tls_cert, args.tls_key, _echo, say=_echo)
    return 0


def _echo(line: object) -> None:
    """Print at once: an administrator may be watching a log file, not a terminal."""
    print(line, flush=True)


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m digest.sink``: the same as ``digest sink``, usable before the CLI is."""
    parser = add_sink_arguments(
        argparse.ArgumentParser(prog="python -m digest.sink", description="Local test mail sink.")
    )
    args = parser.parse_args(argv)
    try:
        return sink_command(args)
    except DigestError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return exc.exit_code


if __name__ == "__main__":
    sys.exit(main())
