"""The test mail sink (digest.sink) and its throwaway certificates (digest.tlsutil).

Real servers on loopback, real clients (smtplib, digest.deliver). External sources beside
the checks: RFC 5321 §4.2.1 (4yz transient, 5yz permanent), RFC 3207 §4 (530 before
STARTTLS), RFC 4954 §4/§6 (AUTH offered after TLS; 535 for bad credentials), RFC 5280
§4.2.1 (basicConstraints, keyUsage, subjectAltName), and libraries.md §2 for aiosmtpd's
traps (Maildir subfolders, handler exceptions as 5xx, AuthResult handled=False).
"""

from __future__ import annotations

import argparse
import ipaddress
import shutil
import signal
import smtplib
import socket
import ssl
import stat
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import trustme
from cryptography import x509

from digest.config import SinkConfig
from digest.deliver import deliver
from digest.errors import ConfigError
from digest.sink import (
    MaildirHandler,
    Sink,
    SinkEndpoint,
    StoredMessage,
    add_sink_arguments,
    ensure_sink,
    exposure_warning,
    serve_sink,
    sink_command,
)
from digest.testing import (
    SENDER,
    free_port,
    make_message,
    outgoing,
    read_maildir,
    relay_for,
    running_sink,
)
from digest.tlsutil import CA_FILE, KEY_FILE, generate_certificate, write_certificate

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def ca() -> trustme.CA:
    return trustme.CA()


@pytest.fixture(scope="module")
def server_tls(ca: trustme.CA) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ca.issue_cert("localhost", "127.0.0.1").configure_cert(context)
    return context


@pytest.fixture
def client_tls(ca: trustme.CA) -> ssl.SSLContext:
    context = ssl.create_default_context()
    ca.configure_trust(context)
    return context


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


def listening(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=1):
            return True
    except OSError:
        return False


# ---- the handler ------------------------------------------------------------------------------


def test_handler_stores_envelope_first_and_reports_one_line(tmp_path: Path) -> None:
    maildir = tmp_path  # an existing, empty folder: the trap of mailbox.Maildir(create=True)
    seen: list[StoredMessage] = []
    message = make_message("a@district.example.org", subject="Digest: 3 alerts")
    with (
        running_sink(maildir, on_message=seen.append) as sink,
        smtplib.SMTP(sink.host, sink.port, local_hostname="client.test", timeout=5) as client,
    ):
        client.send_message(
            message, from_addr=SENDER, to_addrs=["a@district.example.org", "b@district.example.org"]
        )

    [stored] = seen
    assert stored.rcpt_tos == ("a@district.example.org", "b@district.example.org")
    assert stored.subject == "Digest: 3 alerts"
    wire = message.as_bytes(policy=message.policy.clone(linesep="\r\n"))
    assert stored.size == len(wire)  # as received, CRLF line ends
    line = str(stored)
    assert "\n" not in line
    assert "a@district.example.org, b@district.example.org" in line
    assert "'Digest: 3 alerts'" in line and f"{stored.size} bytes" in line

    [parsed] = read_maildir(maildir)
    assert parsed["X-Sink-Mail-From"] == f"<{SENDER}>"
    assert parsed["X-Sink-Rcpt-To"] == "a@district.example.org, b@district.example.org"
    assert parsed.get_content() == "Three values need a look.\n"
    for sub in ("tmp", "new", "cur"):
        assert (maildir / sub).is_dir()
    # Maildir files use the local line end (mailbox would keep CRLF of bytes as they are).
    [path] = (maildir / "new").iterdir()
    assert b"\r\n" not in path.read_bytes()


def test_store_failure_is_a_4xx_without_the_exception_text(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    maildir = tmp_path / "maildir"
    with running_sink(maildir) as sink:
        shutil.rmtree(maildir / "tmp")  # works as root too, unlike chmod
        (maildir / "tmp").write_text("not a folder")
        with (
            smtplib.SMTP(sink.host, sink.port, local_hostname="client.test", timeout=5) as client,
            pytest.raises(smtplib.SMTPDataError) as caught,
        ):
            client.send_message(make_message(), from_addr=SENDER, to_addrs=["a@b.example.org"])
        # RFC 5321 §4.2.1: 4yz, so a client keeps the message and tries again later.
        assert caught.value.smtp_code == 451
        reply = str(caught.value.smtp_error)
        assert "Error" not in reply and "Errno" not in reply and "tmp" not in reply

        [result] = deliver([outgoing()], relay_for(sink, attempts=1), password=None)
        assert (result.status, result.code) == ("failed_temporary", 451)
    assert any(r.name == "digest.sink" and r.exc_info for r in caplog.records)


def test_sink_requires_starttls_before_mail(server_tls: ssl.SSLContext, tmp_path: Path) -> None:
    with (
        running_sink(tmp_path / "md", tls_context=server_tls) as sink,
        smtplib.SMTP(sink.host, sink.port, local_hostname="client.test", timeout=5) as client,
    ):
        client.ehlo()
        assert client.has_extn("starttls")
        with pytest.raises(smtplib.SMTPSenderRefused) as caught:
            client.sendmail(SENDER, ["a@b.example.org"], b"Subject: x\r\n\r\nbody\r\n")
    assert caught.value.smtp_code == 530  # RFC 3207 §4: "Must issue a STARTTLS command first"


def test_auth_is_offered_after_tls_and_a_wrong_password_gets_535_at_once(
    server_tls: ssl.SSLContext, client_tls: ssl.SSLContext, tmp_path: Path
) -> None:
    with (
        running_sink(tmp_path / "md", tls_context=server_tls, auth=("u", "right")) as sink,
        smtplib.SMTP(sink.host, sink.port, local_hostname="client.test", timeout=5) as client,
    ):
        client.ehlo()
        assert not client.has_extn("auth")  # RFC 4954 §4: not before TLS here
        client.starttls(context=client_tls)
        client.ehlo()
        assert client.has_extn("auth")
        started = time.monotonic()
        with pytest.raises(smtplib.SMTPAuthenticationError) as caught:
            client.login("u", "wrong")
        assert time.monotonic() - started < 2  # answered, not left to the timeout
        assert caught.value.smtp_code == 535
        client.login("u", "right")
        client.send_message(make_message(), from_addr=SENDER, to_addrs=["a@b.example.org"])
    assert len(read_maildir(tmp_path / "md")) == 1


def test_sink_refuses_settings_that_cannot_work(tmp_path: Path, server_tls: ssl.SSLContext) -> None:
    with pytest.raises(ValueError, match="port 0"):
        Sink(tmp_path / "md", port=0)
    with pytest.raises(ValueError, match="AUTH without TLS"):
        Sink(tmp_path / "md", port=free_port(), auth=("u", "p"))
    with pytest.raises(ValueError, match="both"):
        Sink(tmp_path / "md", port=free_port(), tls_cert=tmp_path / "c.pem")
    with pytest.raises(ValueError, match="certificate"):
        Sink(tmp_path / "md", port=free_port(), implicit_tls=True)
    with pytest.raises(ValueError, match="only after STARTTLS"):
        Sink(
            tmp_path / "md",
            port=free_port(),
            tls_context=server_tls,
            implicit_tls=True,
            auth=("u", "p"),
        )
    assert not (tmp_path / "md").exists()  # nothing made for a sink that cannot work


def test_handler_can_be_used_alone(tmp_path: Path) -> None:
    handler = MaildirHandler(tmp_path / "new-maildir")
    assert (tmp_path / "new-maildir" / "cur").is_dir()
    assert handler.box.keys() == []


# ---- throwaway certificates --------------------------------------------------------------------


def test_generated_certificate_verifies_for_loopback_names(tmp_path: Path) -> None:
    files = write_certificate(generate_certificate(), tmp_path)
    assert stat.S_IMODE(files.key_file.stat().st_mode) == 0o600
    assert files.key_file.name == KEY_FILE and files.ca_file.name == CA_FILE

    leaf = x509.load_pem_x509_certificate(files.cert_file.read_bytes())
    san = leaf.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    assert san.get_values_for_type(x509.DNSName) == ["localhost"]
    assert set(san.get_values_for_type(x509.IPAddress)) == {
        ipaddress.ip_address("127.0.0.1"),
        ipaddress.ip_address("::1"),
    }
    ca_cert = x509.load_pem_x509_certificate(files.ca_file.read_bytes())
    assert ca_cert.extensions.get_extension_for_class(x509.BasicConstraints).value.ca
    assert not leaf.extensions.get_extension_for_class(x509.BasicConstraints).value.ca

    # The same check a client makes, made stricter (Python 3.13 turns this flag on).
    context = ssl.create_default_context(cafile=str(files.ca_file))
    context.verify_flags |= ssl.VERIFY_X509_STRICT
    with Sink(
        tmp_path / "md", port=free_port(), tls_cert=files.cert_file, tls_key=files.key_file
    ) as sink:
        for host in ("127.0.0.1", "localhost"):
            with smtplib.SMTP(host, sink.port, local_hostname="client.test", timeout=5) as client:
                client.starttls(context=context)
                assert client.ehlo()[0] == 250
    # Any other name is refused (implicit TLS here, to name the server without DNS).
    with (
        Sink(
            tmp_path / "md",
            port=free_port(),
            tls_cert=files.cert_file,
            tls_key=files.key_file,
            implicit_tls=True,
        ) as sink,
        socket.create_connection((sink.host, sink.port), timeout=5) as raw,
        pytest.raises(ssl.SSLCertVerificationError, match="mismatch"),
    ):
        context.wrap_socket(raw, server_hostname="mail.example.org")


def test_a_certificate_can_name_another_host(tmp_path: Path) -> None:
    generated = generate_certificate(["sink.lab.example.org", "192.0.2.7"])
    leaf = x509.load_pem_x509_certificate(generated.cert_pem)
    san = leaf.extensions.get_extension_for_class(x509.SubjectAlternativeName).value
    assert san.get_values_for_type(x509.DNSName) == ["sink.lab.example.org"]
    assert san.get_values_for_type(x509.IPAddress) == [ipaddress.ip_address("192.0.2.7")]


# ---- ensure_sink (digest run --dry-run) ----------------------------------------------------------


def test_ensure_sink_starts_a_verified_starttls_sink_in_process(tmp_path: Path) -> None:
    config = SinkConfig(host="127.0.0.1", port=free_port(), maildir=tmp_path / "out" / "maildir")
    with ensure_sink(config) as endpoint:
        assert endpoint.started and endpoint.security == "starttls"
        assert endpoint.ca_file is not None and endpoint.ca_file.is_file()
        relay = endpoint.relay_config(attempts=1, backoff=0, timeout=5)
        with (
            pytest.raises(ssl.SSLCertVerificationError),  # its CA is not in the system store
            smtplib.SMTP(endpoint.host, endpoint.port, local_hostname="c.test", timeout=5) as probe,
        ):
            probe.starttls(context=ssl.create_default_context())
        [result] = deliver([outgoing()], relay, password=None)
        ca_file = endpoint.ca_file
    assert result.status == "sent"
    assert len(read_maildir(config.maildir)) == 1
    assert not listening("127.0.0.1", config.port)
    assert not ca_file.exists()  # the throwaway CA went with the sink


def test_ensure_sink_uses_a_sink_that_is_already_running(tmp_path: Path) -> None:
    maildir = tmp_path / "out" / "maildir"
    port = free_port()
    with serving(port=port, maildir=maildir) as (endpoint, _, _):
        assert endpoint.ca_file == tmp_path / "out" / CA_FILE
        with ensure_sink(SinkConfig(host="127.0.0.1", port=port, maildir=maildir)) as found:
            assert not found.started
            assert found.ca_file == endpoint.ca_file  # digest sink wrote it beside the Maildir
            [result] = deliver([outgoing()], found.relay_config(attempts=1), password=None)
    assert result.status == "sent"
    assert len(read_maildir(maildir)) == 1


def test_ensure_sink_refuses_a_running_server_without_starttls(tmp_path: Path) -> None:
    with running_sink(tmp_path / "md") as sink:  # plaintext
        config = SinkConfig(host=sink.host, port=sink.port, maildir=tmp_path / "md")
        with pytest.raises(ConfigError, match="does not offer STARTTLS"), ensure_sink(config):
            pass


def test_ensure_sink_refuses_a_listener_that_is_not_smtp(tmp_path: Path) -> None:
    with socket.socket() as silent:  # accepts connections (backlog) but never greets
        silent.bind(("127.0.0.1", 0))
        silent.listen()
        port = silent.getsockname()[1]
        config = SinkConfig(host="127.0.0.1", port=port, maildir=tmp_path / "md")
        with pytest.raises(ConfigError, match="SMTP"), ensure_sink(config, probe_timeout=0.5):
            pass


# ---- serve_sink and the command -----------------------------------------------------------------


class serving:
    """Run ``serve_sink`` in a thread; yields (endpoint, said lines, stored messages)."""

    def __init__(self, **kwargs: object) -> None:
        self.kwargs = kwargs
        self.stop = threading.Event()
        self.said: list[str] = []
        self.stored: list[StoredMessage] = []
        self.ready: list[SinkEndpoint] = []
        self.errors: list[BaseException] = []

    def _run(self) -> None:
        try:
            serve_sink(
                on_message=self.stored.append,
                say=self.said.append,
                stop=self.stop,
                on_ready=self.ready.append,
                **self.kwargs,  # type: ignore[arg-type]
            )
        except BaseException as exc:
            self.errors.append(exc)

    def __enter__(self) -> tuple[SinkEndpoint, list[str], list[StoredMessage]]:
        self.thread = threading.Thread(target=self._run, name="serve_sink-test")
        self.thread.start()
        deadline = time.monotonic() + 10
        while not self.ready and not self.errors and time.monotonic() < deadline:
            time.sleep(0.01)
        if not self.ready:
            self.__exit__(None, None, None)
            raise AssertionError(f"serve_sink did not start: {self.errors}")
        return self.ready[0], self.said, self.stored

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        self.thread.join(10)
        assert not self.thread.is_alive()


def test_serve_sink_runs_in_a_thread_and_stops(tmp_path: Path) -> None:
    maildir = tmp_path / "out" / "maildir"
    port = free_port()
    with serving(port=port, maildir=maildir) as (endpoint, said, stored):
        assert endpoint.ca_file is not None
        relay = endpoint.relay_config(attempts=1)
        [result] = deliver([outgoing(subject="Rehearsal")], relay, password=None)
    assert result.status == "sent"
    assert [s.subject for s in stored] == ["Rehearsal"]
    text = "\n".join(said)
    assert str(endpoint.ca_file) in text and f"port = {port}" in text
    assert said[-1] == "digest sink: stopped"
    assert not listening("127.0.0.1", port)


def test_serve_sink_leaves_a_running_sinks_files_alone_when_the_port_is_taken(
    tmp_path: Path,
) -> None:
    maildir = tmp_path / "out" / "maildir"
    started = time.monotonic()
    with (
        running_sink(tmp_path / "other") as busy,
        pytest.raises(ConfigError, match="cannot listen"),
    ):
        serve_sink("127.0.0.1", busy.port, maildir, say=lambda line: None)
    assert time.monotonic() - started < 2  # not aiosmtpd's ready_timeout
    assert not (tmp_path / "out" / CA_FILE).exists()


def test_sink_command_wants_cert_and_key_together(tmp_path: Path) -> None:
    parser = add_sink_arguments(argparse.ArgumentParser())
    args = parser.parse_args(["--tls-cert", str(tmp_path / "c.pem"), "--maildir", str(tmp_path)])
    with pytest.raises(ConfigError, match="both --tls-cert and --tls-key"):
        sink_command(args)
    defaults = parser.parse_args([])
    assert (defaults.host, defaults.port, defaults.maildir) == (
        "127.0.0.1",
        8025,
        Path("out/maildir"),
    )


@pytest.mark.parametrize(
    ("host", "warns"),
    [
        ("127.0.0.1", False),
        ("::1", False),
        ("localhost", False),
        ("0.0.0.0", True),
        ("192.0.2.1", True),
    ],
)
def test_exposure_warning_for_non_loopback_hosts(host: str, warns: bool) -> None:
    assert (exposure_warning(host) is not None) is warns


def test_sink_as_a_process_stops_on_sigterm(tmp_path: Path) -> None:
    maildir = tmp_path / "out" / "maildir"
    ca_file = tmp_path / "out" / CA_FILE
    port = free_port()
    command = [sys.executable, "-m", "digest.sink", "--port", str(port), "--maildir", str(maildir)]
    process = subprocess.Popen(
        command, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    try:
        deadline = time.monotonic() + 20
        while not ca_file.exists():  # written once the port is bound
            assert process.poll() is None, process.communicate()
            assert time.monotonic() < deadline, "the sink process did not start"
            time.sleep(0.05)
        endpoint = SinkEndpoint("127.0.0.1", port, maildir, ca_file)
        [result] = deliver(
            [outgoing(subject="From a process")], endpoint.relay_config(), password=None
        )
        process.send_signal(signal.SIGTERM)
        out, err = process.communicate(timeout=10)
    finally:
        if process.poll() is None:
            process.kill()
            process.communicate()
    assert result.status == "sent"
    assert process.returncode == 0, err
    assert str(ca_file) in out
    assert "'From a process'" in out
    assert out.rstrip().endswith("digest sink: stopped")
