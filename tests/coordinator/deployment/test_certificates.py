"""Trial TLS files, and the one-line errors a wrong CA or an expired certificate gets.

References: certificates are checked with the ``cryptography`` package's X.509 parser and
Python's ``ssl`` module (OpenSSL's chain verification) dialling a TLS server on 127.0.0.1.
"""

from __future__ import annotations

import socket
import ssl
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from cryptography import x509

from coordinator.deployment.certificates import (
    CertificateFiles,
    check_server_files,
    make_certificates,
)
from site_agent.deployment.connection import check_hub
from site_agent.deployment.keys import (
    check_private_key,
    fingerprint,
    make_site_keys,
    read_public_key,
)
from site_agent.exceptions import DeploymentError, InputError


@contextmanager
def _tls_server(files: CertificateFiles) -> Iterator[int]:
    """Serve TLS handshakes with ``files`` on a free port of 127.0.0.1 until the block ends."""
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    context.load_cert_chain(files.server_cert, files.server_key)
    listener = socket.create_server(("127.0.0.1", 0))
    listener.settimeout(0.2)
    stop = threading.Event()

    def serve() -> None:
        while not stop.is_set():
            try:
                raw, _ = listener.accept()
            except TimeoutError:
                continue
            try:
                with context.wrap_socket(raw, server_side=True):
                    pass
            except (ssl.SSLError, OSError):
                raw.close()

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield int(listener.getsockname()[1])
    finally:
        stop.set()
        thread.join(timeout=5)
        listener.close()


def test_server_certificate_names_loopback_and_given_hosts(tmp_path: Path) -> None:
    """The server certificate carries IP:127.0.0.1 and every name given, signed by the CA."""
    files = make_certificates(tmp_path, names=("hub.consortium.example", "10.0.0.7"))

    cert = x509.load_pem_x509_certificate(files.server_cert.read_bytes())
    names = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value

    assert "hub.consortium.example" in names.get_values_for_type(x509.DNSName)
    assert {str(ip) for ip in names.get_values_for_type(x509.IPAddress)} == {
        "127.0.0.1",
        "10.0.0.7",
    }
    assert files.server_key.stat().st_mode & 0o777 == 0o600
    assert check_server_files(files.ca_cert, files.server_cert, files.server_key)


def test_certificates_are_never_overwritten(tmp_path: Path) -> None:
    """A second call into the same directory refuses rather than replacing the CA."""
    make_certificates(tmp_path)
    with pytest.raises(InputError, match="already exist"):
        make_certificates(tmp_path)


def test_expired_and_foreign_certificates_get_one_line_errors(tmp_path: Path) -> None:
    """The coordinator's preflight names an expired certificate and a CA that did not sign."""
    expired = make_certificates(tmp_path / "old", valid_days=-1)
    good = make_certificates(tmp_path / "good")
    other = make_certificates(tmp_path / "other")

    with pytest.raises(DeploymentError, match="expired") as late:
        check_server_files(expired.ca_cert, expired.server_cert, expired.server_key)
    with pytest.raises(DeploymentError, match="not signed by the CA") as foreign:
        check_server_files(other.ca_cert, good.server_cert, good.server_key)
    with pytest.raises(DeploymentError, match="does not belong") as mismatch:
        check_server_files(good.ca_cert, good.server_cert, other.server_key)

    for error in (late, foreign, mismatch):
        assert "\n" not in str(error.value)
        assert "PRIVATE" not in str(error.value)


def test_site_dial_names_a_wrong_ca_and_an_expired_hub_certificate(tmp_path: Path) -> None:
    """A site checking the hub with the wrong CA, or reaching an expired hub, gets one line."""
    good = make_certificates(tmp_path / "good")
    expired = make_certificates(tmp_path / "expired", valid_days=-1)
    other = make_certificates(tmp_path / "other")

    with _tls_server(good) as port:
        check_hub(f"127.0.0.1:{port}", good.ca_cert)
        with pytest.raises(DeploymentError, match=r"not signed by the CA ca\.pem"):
            check_hub(f"127.0.0.1:{port}", other.ca_cert)
    with _tls_server(expired) as port, pytest.raises(DeploymentError, match="has expired"):
        check_hub(f"127.0.0.1:{port}", expired.ca_cert)


def test_site_keys_are_openssh_p384_with_a_stable_fingerprint(tmp_path: Path) -> None:
    """``site keys`` writes an OpenSSH ECDSA P-384 pair; the private key stays 0600."""
    files = make_site_keys(tmp_path)

    assert read_public_key(files.public_key).startswith("ecdsa-sha2-nistp384 ")
    check_private_key(files.private_key)
    assert files.private_key.stat().st_mode & 0o777 == 0o600
    assert fingerprint(files.public_key) == files.fingerprint
    with pytest.raises(InputError, match="is a private key"):
        read_public_key(files.private_key)
    with pytest.raises(InputError, match="never overwritten"):
        make_site_keys(tmp_path)
