"""A site's key pair: how the coordinator knows which hospital a connection comes from.

The site makes an ECDSA P-384 key pair in OpenSSH format (the format Flower's SuperNode
authentication reads), keeps the private key (mode 0600, never sent anywhere) and hands
the public key to the coordinator, who admits it under the site's name. Every message
the site's SuperNode sends is then signed with the private key; a connection with a key
the coordinator has not admitted is refused by the SuperLink.

Nothing here prints or logs key material: the fingerprint (SHA-256 of the public key,
as OpenSSH shows it, common practice) is what people compare over the phone.
"""

from __future__ import annotations

import base64
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric import ec

from site_agent.exceptions import InputError

PRIVATE_KEY_FILE = "site.key"
PUBLIC_KEY_FILE = "site.key.pub"


@dataclass(frozen=True, slots=True)
class SiteKeyFiles:
    """Where a site's key pair was written, and the public key's fingerprint."""

    private_key: Path
    public_key: Path
    fingerprint: str


def make_site_keys(directory: Path, *, comment: str = "sitepool-site") -> SiteKeyFiles:
    """Write a new ECDSA P-384 key pair in OpenSSH format under ``directory``.

    Raises
    ------
    InputError
        If a key already exists there: a site's key is never overwritten, since the
        coordinator admitted the old one.
    """
    directory = Path(directory)
    private_path = directory / PRIVATE_KEY_FILE
    public_path = directory / PUBLIC_KEY_FILE
    if private_path.exists() or public_path.exists():
        raise InputError(f"a site key already exists in {directory}; it is never overwritten")
    if not comment or any(c.isspace() for c in comment):
        raise InputError("the key comment must be one word")
    directory.mkdir(parents=True, exist_ok=True)
    key = ec.generate_private_key(ec.SECP384R1())
    private = key.private_bytes(
        serialization.Encoding.PEM,
        serialization.PrivateFormat.OpenSSH,
        serialization.NoEncryption(),
    )
    public = key.public_key().public_bytes(
        serialization.Encoding.OpenSSH, serialization.PublicFormat.OpenSSH
    )
    descriptor = os.open(private_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(descriptor, "wb") as sink:
        sink.write(private)
    public_path.write_bytes(public + b" " + comment.encode() + b"\n")
    return SiteKeyFiles(private_path, public_path, fingerprint(public_path))


def fingerprint(public_key: Path) -> str:
    """Return ``SHA256:...`` of an OpenSSH public key file, as ``ssh-keygen -l`` shows it.

    Raises
    ------
    InputError
        If the file is not an OpenSSH ECDSA P-384 public key.
    """
    fields = read_public_key(public_key).split()
    digest = hashlib.sha256(base64.b64decode(fields[1])).digest()
    return "SHA256:" + base64.b64encode(digest).decode().rstrip("=")


def private_fingerprint(private_key: Path) -> str:
    """Return the fingerprint of the public half of a site's private key (``SHA256:...``)."""
    key = serialization.load_ssh_private_key(Path(private_key).read_bytes(), password=None)
    public = key.public_key().public_bytes(
        serialization.Encoding.OpenSSH, serialization.PublicFormat.OpenSSH
    )
    digest = hashlib.sha256(base64.b64decode(public.split()[1])).digest()
    return "SHA256:" + base64.b64encode(digest).decode().rstrip("=")


def read_public_key(public_key: Path) -> str:
    """Return the text of an OpenSSH ECDSA P-384 public key file, checked.

    Raises
    ------
    InputError
        If the file cannot be read or is not such a key (a private key given by
        mistake is named as such, never echoed).
    """
    try:
        text = Path(public_key).read_text().strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the public key {Path(public_key).name}") from exc
    if "PRIVATE KEY" in text:
        raise InputError(
            f"{Path(public_key).name} is a private key: give the .pub file, and keep the "
            "private key at the site"
        )
    try:
        key = serialization.load_ssh_public_key(text.encode())
    except (ValueError, TypeError) as exc:
        raise InputError(f"{Path(public_key).name} is not an OpenSSH public key") from exc
    if not isinstance(key, ec.EllipticCurvePublicKey) or key.curve.name != "secp384r1":
        raise InputError(f"{Path(public_key).name} is not an ECDSA P-384 key")
    return text


def check_private_key(private_key: Path) -> None:
    """Check that a site's private key is an unencrypted OpenSSH ECDSA P-384 key.

    Raises
    ------
    InputError
        If it is not; the message names the file, never its content.
    """
    name = Path(private_key).name
    try:
        data = Path(private_key).read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the site key {name}") from exc
    try:
        key = serialization.load_ssh_private_key(data, password=None)
    except (ValueError, TypeError) as exc:
        raise InputError(f"the site key {name} is not an unencrypted OpenSSH private key") from exc
    if not isinstance(key, ec.EllipticCurvePrivateKey) or key.curve.name != "secp384r1":
        raise InputError(f"the site key {name} is not an ECDSA P-384 key")
