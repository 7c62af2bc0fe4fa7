"""Throwaway TLS material for the loopback test sink.

``digest sink`` and ``digest run --dry-run`` must exercise the same verified-TLS client
path as a real relay (RFC 8314 §5: a session whose certificate cannot be validated is not
confidential), so the sink speaks STARTTLS with a certificate the client can verify. This
module makes a private certificate authority and one server certificate signed by it, valid
for the loopback names (``localhost``, ``127.0.0.1``, ``::1``) plus any host the sink binds.

The certificates are for a test tool on one machine: short-lived, EC P-256, never meant
for a production relay. The CA's private key is discarded after signing, so the CA file can
be trusted by the client without letting anyone mint further certificates from it.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import os
import ssl
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

LOOPBACK_NAMES: tuple[str, ...] = ("localhost", "127.0.0.1", "::1")
CA_FILE = "sink-ca.pem"
CERT_FILE = "sink-cert.pem"
KEY_FILE = "sink-key.pem"
_CLOCK_SKEW = dt.timedelta(hours=1)


@dataclass(frozen=True)
class GeneratedCertificate:
    """PEM bytes of a throwaway CA certificate, a server certificate and its key."""

    ca_pem: bytes
    cert_pem: bytes
    key_pem: bytes
    hosts: tuple[str, ...]


@dataclass(frozen=True)
class CertificateFiles:
    """Where a generated certificate was written."""

    ca_file: Path
    cert_file: Path
    key_file: Path


def generate_certificate(
    hosts: Sequence[str] = LOOPBACK_NAMES,
    *,
    valid_for: dt.timedelta = dt.timedelta(days=30),
    now: dt.datetime | None = None,
) -> GeneratedCertificate:
    """Make a one-off CA and a server certificate for ``hosts`` (names or IP addresses)."""
    if not hosts:
        raise ValueError("give at least one host name or address for the certificate")
    now = now or dt.datetime.now(dt.UTC)
    not_before, not_after = now - _CLOCK_SKEW, now + valid_for
    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca_name = x509.Name(
        [
            x509.NameAttribute(NameOID.ORGANIZATION_NAME, "digest test sink"),
            x509.NameAttribute(NameOID.COMMON_NAME, "digest test sink CA (throwaway)"),
        ]
    )
    ca_cert = _ca_certificate(ca_key, ca_name, not_before, not_after)
    leaf_key = ec.generate_private_key(ec.SECP256R1())
    leaf_cert = _server_certificate(leaf_key, ca_key, ca_cert, hosts, not_before, not_after)
    return GeneratedCertificate(
        ca_pem=ca_cert.public_bytes(serialization.Encoding.PEM),
        cert_pem=leaf_cert.public_bytes(serialization.Encoding.PEM),
        key_pem=leaf_key.private_bytes(
            serialization.Encoding.PEM,
            serialization.PrivateFormat.PKCS8,
            serialization.NoEncryption(),
        ),
        hosts=tuple(hosts),
    )


def _ca_certificate(
    key: ec.EllipticCurvePrivateKey,
    name: x509.Name,
    not_before: dt.datetime,
    not_after: dt.datetime,
) -> x509.Certificate:
    public = key.public_key()
    return (
        x509.CertificateBuilder()
        .subject_name(name)
        .issuer_name(name)
        .public_key(public)
        .serial_number(x509.random_serial_number())
        .not_valid_before(not_before)
        .not_valid_after(not_after)
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=False,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=True,
                crl_sign=True,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(public), critical=False)
        .sign(key, hashes.SHA256())
    )


def _server_certificate(
    key: ec.EllipticCurvePrivateKey,
    ca_key: ec.EllipticCurvePrivateKey,
    ca_cert: x509.Certificate,
    hosts: Sequence[str],
    not_before: dt.datetime,
    not_after: dt.datetime,
) -> x509.Certificate:
    public = key.public_key()
    ca_ski = ca_cert.extensions.get_extension_for_class(x509.SubjectKeyIdentifier).value
    return (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, hosts[0])]))
        .issuer_name(ca_cert.subject)
        .public_key(public)
        .serial_number(x509.random_serial_number())
        .not_valid_before(not_before)
        .not_valid_after(not_after)
        .add_extension(x509.SubjectAlternativeName(_san_entries(hosts)), critical=False)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                key_cert_sign=False,
                crl_sign=False,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH]), critical=False)
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(public), critical=False)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_subject_key_identifier(ca_ski),
            critical=False,
        )
        .sign(ca_key, hashes.SHA256())
    )


def _san_entries(hosts: Sequence[str]) -> list[x509.GeneralName]:
    entries: list[x509.GeneralName] = []
    for host in dict.fromkeys(hosts):  # keep order, drop repeats
        try:
            entries.append(x509.IPAddress(ipaddress.ip_address(host)))
        except ValueError:
            entries.append(x509.DNSName(host))
    return entries


def write_certificate(generated: GeneratedCertificate, folder: Path) -> CertificateFiles:
    """Write ``sink-ca.pem``, ``sink-cert.pem`` and ``sink-key.pem`` (mode 0600) into ``folder``.

    Each file is written under a temporary name and renamed into place, so a client never
    reads half a file and a running sink's files are replaced whole.
    """
    folder.mkdir(parents=True, exist_ok=True)
    files = CertificateFiles(folder / CA_FILE, folder / CERT_FILE, folder / KEY_FILE)
    _write_atomic(files.ca_file, generated.ca_pem, 0o644)
    _write_atomic(files.cert_file, generated.cert_pem, 0o644)
    _write_atomic(files.key_file, generated.key_pem, 0o600)
    return files


def _write_atomic(path: Path, data: bytes, mode: int) -> None:
    partial = path.with_name(f".{path.name}.{os.getpid()}.partial")
    fd = os.open(partial, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, mode)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(partial, mode)  # the umask may have narrowed or os.open kept an old mode
        os.replace(partial, path)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise


def server_context(cert_file: Path, key_file: Path) -> ssl.SSLContext:
    """A server-side context for the sink: our certificate, no client certificates asked."""
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(certfile=str(cert_file), keyfile=str(key_file))
    return context


def load_server_context(generated: GeneratedCertificate) -> ssl.SSLContext:
    """A server context for an in-memory certificate (``ssl`` only loads chains from files,
    so they pass through a private temporary folder that is removed at once)."""
    with tempfile.TemporaryDirectory(prefix="digest-sink-tls-") as folder:
        files = write_certificate(generated, Path(folder))
        return server_context(files.cert_file, files.key_file)
