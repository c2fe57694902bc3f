"""A throwaway consortium CA and server certificate, for trying a deployment out.

In production the hospitals' own public-key infrastructure issues the coordinator's
server certificate, and each site trusts the consortium's CA certificate; this module
only makes a self-signed CA and one server certificate it signs, so that a study can be
tried on one machine or a test network with TLS switched on.

The server certificate carries ``IP:127.0.0.1`` and ``DNS:localhost`` in its subject
alternative names, plus any host names or IP addresses given; a site checks the name it
dials against that list. Keys are ECDSA P-384 (NIST SP 800-57 strength of 192 bits,
common practice for TLS in 2020s) and private keys are written with mode 0600.

:func:`check_server_files` is the coordinator's preflight before the SuperLink starts: it
names an expired or not-yet-valid certificate, a key that does not belong to the
certificate, or a certificate the CA did not sign, in one line and without key material.
"""

from __future__ import annotations

import ipaddress
import os
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

from cryptography import x509
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from coordinator.deployment.defaults import DEFAULT_VALID_DAYS
from site_agent.exceptions import DeploymentError, InputError

CA_CERT_FILE = "ca.pem"
CA_KEY_FILE = "ca.key"
SERVER_CERT_FILE = "server.pem"
SERVER_KEY_FILE = "server.key"


@dataclass(frozen=True, slots=True)
class CertificateFiles:
    """Where :func:`make_certificates` wrote the CA and the server certificate."""

    ca_cert: Path
    ca_key: Path
    server_cert: Path
    server_key: Path
    names: tuple[str, ...]
    not_after: datetime


def make_certificates(
    directory: Path,
    *,
    names: tuple[str, ...] = (),
    consortium: str = "sitepool trial consortium",
    valid_days: int = DEFAULT_VALID_DAYS,
    now: datetime | None = None,
) -> CertificateFiles:
    """Make a self-signed CA and a server certificate it signs, under ``directory``.

    Parameters
    ----------
    directory
        Where to write ``ca.pem``, ``ca.key``, ``server.pem`` and ``server.key``.
    names
        Extra host names or IP addresses the coordinator is reached by.
    consortium
        The CA's common name.
    valid_days
        Days both certificates stay valid (a negative value makes expired ones, for tests).
    now
        The issue time (default: now).

    Raises
    ------
    InputError
        If a certificate already exists there (never overwritten) or a name is empty.
    """
    directory = Path(directory)
    files = [directory / n for n in (CA_CERT_FILE, CA_KEY_FILE, SERVER_CERT_FILE, SERVER_KEY_FILE)]
    if any(path.exists() for path in files):
        raise InputError(f"certificates already exist in {directory}; remove them or pick another")
    if any(not name.strip() for name in names):
        raise InputError("an empty host name was given for the server certificate")
    directory.mkdir(parents=True, exist_ok=True)
    issued = (now or datetime.now(UTC)) - timedelta(minutes=5)
    expires = issued + timedelta(days=valid_days)
    if valid_days < 0:  # an already-expired pair: issued before it expires
        issued, expires = expires - timedelta(days=1), issued + timedelta(days=valid_days)
    ca_key = ec.generate_private_key(ec.SECP384R1())
    ca_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, consortium)])
    ca_cert = (
        x509.CertificateBuilder()
        .subject_name(ca_name)
        .issuer_name(ca_name)
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(issued)
        .not_valid_after(expires)
        .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
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
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(ca_key.public_key()), False)
        .sign(ca_key, hashes.SHA384())
    )
    server_key = ec.generate_private_key(ec.SECP384R1())
    all_names = tuple(dict.fromkeys(("127.0.0.1", "localhost", *names)))
    server_cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, all_names[-1])]))
        .issuer_name(ca_name)
        .public_key(server_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(issued)
        .not_valid_after(expires)
        .add_extension(x509.SubjectAlternativeName([_general_name(n) for n in all_names]), False)
        .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH]), False)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_public_key(ca_key.public_key()), False
        )
        .sign(ca_key, hashes.SHA384())
    )
    ca_cert_path, ca_key_path, server_cert_path, server_key_path = files
    ca_cert_path.write_bytes(ca_cert.public_bytes(serialization.Encoding.PEM))
    server_cert_path.write_bytes(server_cert.public_bytes(serialization.Encoding.PEM))
    _write_private(ca_key_path, ca_key)
    _write_private(server_key_path, server_key)
    return CertificateFiles(
        ca_cert=ca_cert_path,
        ca_key=ca_key_path,
        server_cert=server_cert_path,
        server_key=server_key_path,
        names=all_names,
        not_after=expires,
    )


def check_server_files(
    ca_cert: Path, server_cert: Path, server_key: Path, *, now: datetime | None = None
) -> datetime:
    """Check the coordinator's TLS files before the SuperLink starts; return the expiry.

    Raises
    ------
    DeploymentError
        One line naming the cause: a file missing or unreadable, a certificate expired or
        not yet valid, a server certificate the CA did not sign, or a key that does not
        belong to the server certificate. No key material is ever in the message.
    """
    ca = _read_certificate(ca_cert, "CA certificate")
    cert = _read_certificate(server_cert, "server certificate")
    try:
        key = serialization.load_pem_private_key(Path(server_key).read_bytes(), password=None)
    except (OSError, ValueError, TypeError) as exc:
        raise DeploymentError(
            f"cannot read the server key {Path(server_key).name}: not an unencrypted PEM key"
        ) from exc
    moment = now or datetime.now(UTC)
    for label, item in (("CA certificate", ca), ("server certificate", cert)):
        if item.not_valid_after_utc < moment:
            raise DeploymentError(
                f"the {label} expired on {item.not_valid_after_utc:%Y-%m-%d %H:%M} UTC"
            )
        if item.not_valid_before_utc > moment:
            raise DeploymentError(
                f"the {label} is not valid before {item.not_valid_before_utc:%Y-%m-%d %H:%M} UTC"
            )
    try:
        cert.verify_directly_issued_by(ca)
    except (ValueError, TypeError, InvalidSignature) as exc:
        raise DeploymentError(
            f"the server certificate {Path(server_cert).name} was not signed by the CA "
            f"{Path(ca_cert).name}"
        ) from exc
    public = key.public_key().public_bytes(
        serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo
    )
    expected = cert.public_key().public_bytes(
        serialization.Encoding.DER, serialization.PublicFormat.SubjectPublicKeyInfo
    )
    if public != expected:
        raise DeploymentError(
            f"the server key {Path(server_key).name} does not belong to the server certificate"
        )
    return cert.not_valid_after_utc


def _read_certificate(path: Path, label: str) -> x509.Certificate:
    try:
        return x509.load_pem_x509_certificate(Path(path).read_bytes())
    except OSError as exc:
        raise DeploymentError(f"cannot read the {label} {Path(path).name}") from exc
    except ValueError as exc:
        raise DeploymentError(f"the {label} {Path(path).name} is not a PEM certificate") from exc


def _general_name(name: str) -> x509.GeneralName:
    try:
        return x509.IPAddress(ipaddress.ip_address(name))
    except ValueError:
        return x509.DNSName(name)


def _write_private(path: Path, key: ec.EllipticCurvePrivateKey) -> None:
    data = key.private_bytes(
        serialization.Encoding.PEM,
        serialization.PrivateFormat.PKCS8,
        serialization.NoEncryption(),
    )
    descriptor = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(descriptor, "wb") as sink:
        sink.write(data)
