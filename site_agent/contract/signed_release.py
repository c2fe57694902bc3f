"""Signed release files: how a site that cannot open a connection still takes part.

An air-gapped site answers a protocol into a file (``sitepool site answer-into-file``), carries
it out by whatever route its rules allow, and the coordinator pools a folder of such files.
The file is a :class:`SignedRelease`: the site's reply exactly as its disclosure gate let it
leave (a release or a decline), the receipt of that answer in the site's ledger, the protocol
hash and round it answers, the site's name, the fingerprint of the site's public key, and an
ECDSA P-384 signature (SHA-384) over the canonical JSON of every other field.

Keys are the site's node-authentication pair in OpenSSH format, the same pair a connected site
gives its SuperNode: the coordinator admits a site by keeping its public key as
``<site name>.pub`` in an admitted-keys directory (the file it registers with Flower), and
checks a file's signature against the key admitted under the file's site name.

A file is refused, with one line naming why (:class:`~site_agent.exceptions.ReleaseFileRefused`),
when it is unreadable, names a site that was not admitted, was signed by another key, was
changed after signing, or answers another protocol or round. The signature covers the parsed
JSON content (canonical form: sorted keys, no whitespace), so re-indenting the file does not
break it and changing any value does.

References: ECDSA as in FIPS 186-5 (NIST, 2023); the key fingerprint is OpenSSH's
``SHA256:`` form (unpadded base64 of the SHA-256 of the public key blob, RFC 4253 section 6.6).
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
from datetime import datetime
from pathlib import Path
from typing import Any, Literal

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import (
    Encoding,
    PublicFormat,
    load_ssh_private_key,
    load_ssh_public_key,
)
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from site_agent.contract.protocol import Operation
from site_agent.contract.release import SITE_NAME_PATTERN
from site_agent.contract.wire import SiteReply
from site_agent.exceptions import InputError, ReleaseFileRefused

FILE_FORMAT: Literal["sitepool-signed-release/1"] = "sitepool-signed-release/1"
"""Value of a signed release file's ``format`` field."""
PUBLIC_KEY_SUFFIX = ".pub"
"""An admitted site's public key is ``<admitted dir>/<site name>.pub``."""
SIGNED_RELEASE_SUFFIX = ".signed-release.json"
"""Name ending of a signed release file in a folder to pool."""
_CURVE = ec.SECP384R1


class SignedRelease(BaseModel):
    """One site's answer to one protocol round, signed with the site's key."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    format: Literal["sitepool-signed-release/1"] = FILE_FORMAT
    site: str = Field(min_length=1, max_length=80, pattern=SITE_NAME_PATTERN)
    protocol_hash: str = Field(pattern=r"^[0-9a-f]{64}$")
    operation: Operation
    round_number: int = Field(ge=1)
    signed_at: datetime
    key_fingerprint: str = Field(pattern=r"^SHA256:[A-Za-z0-9+/]{43}$")
    reply: SiteReply
    disclosure: dict[str, Any] | None = Field(
        default=None, description="The note of what the site's policy changed (as ledgered)."
    )
    ledger_sequence: int | None = Field(default=None, ge=1)
    ledger_entry_hash: str | None = Field(default=None, pattern=r"^[0-9a-f]{64}$")
    signature: str = Field(default="", description="Base64 DER ECDSA P-384/SHA-384 signature.")

    def to_json(self) -> str:
        """Return the file's text."""
        return self.model_dump_json(indent=2) + "\n"


def key_fingerprint(public_key: ec.EllipticCurvePublicKey) -> str:
    """Return OpenSSH's ``SHA256:...`` fingerprint of ``public_key``."""
    line = public_key.public_bytes(Encoding.OpenSSH, PublicFormat.OpenSSH)
    blob = base64.b64decode(line.split()[1])
    return "SHA256:" + base64.b64encode(hashlib.sha256(blob).digest()).decode().rstrip("=")


def load_private_key(path: Path) -> ec.EllipticCurvePrivateKey:
    """Load a site's OpenSSH private key (ECDSA P-384, unencrypted).

    Raises
    ------
    InputError
        If the file cannot be read or holds another kind of key; the message names the
        file only, never its content.
    """
    try:
        key = load_ssh_private_key(Path(path).read_bytes(), password=None)
    except (OSError, ValueError, TypeError) as exc:
        raise InputError(f"{path} is not a readable OpenSSH private key") from exc
    if not isinstance(key, ec.EllipticCurvePrivateKey) or not isinstance(key.curve, _CURVE):
        raise InputError(f"{path} is not an ECDSA P-384 key")
    return key


def load_public_key(path: Path) -> ec.EllipticCurvePublicKey:
    """Load an admitted site's OpenSSH public key (ECDSA P-384).

    Raises
    ------
    InputError
        If the file cannot be read or holds another kind of key.
    """
    try:
        key = load_ssh_public_key(Path(path).read_bytes())
    except (OSError, ValueError, TypeError) as exc:
        raise InputError(f"{path} is not a readable OpenSSH public key") from exc
    if not isinstance(key, ec.EllipticCurvePublicKey) or not isinstance(key.curve, _CURVE):
        raise InputError(f"{path} is not an ECDSA P-384 public key")
    return key


def _signed_bytes(fields: dict[str, Any]) -> bytes:
    """Canonical JSON (sorted keys, no whitespace, ASCII) of every field but the signature."""
    body = {k: v for k, v in fields.items() if k != "signature"}
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()


def sign_release(unsigned: SignedRelease, private_key: ec.EllipticCurvePrivateKey) -> SignedRelease:
    """Return ``unsigned`` with its key fingerprint and signature filled in."""
    fields = unsigned.model_copy(
        update={"key_fingerprint": key_fingerprint(private_key.public_key()), "signature": ""}
    ).model_dump(mode="json")
    der = private_key.sign(_signed_bytes(fields), ec.ECDSA(hashes.SHA384()))
    fields["signature"] = base64.b64encode(der).decode()
    return SignedRelease.model_validate(fields)


def verify_release_file(
    path: Path,
    admitted_keys: Path,
    *,
    protocol_hash: str,
    round_number: int = 1,
) -> SignedRelease:
    """Read a signed release file and return it once every check passes.

    Parameters
    ----------
    path
        The file.
    admitted_keys
        The coordinator's directory of admitted public keys, ``<site name>.pub`` each.
    protocol_hash
        The content hash of the protocol being pooled.
    round_number
        The round being pooled.

    Raises
    ------
    ReleaseFileRefused
        With a one-line reason; no value from the file beyond the site's name is quoted.
    """
    path = Path(path)

    def refuse(reason: str, site: str | None = None) -> ReleaseFileRefused:
        return ReleaseFileRefused(reason, path=path, site=site)

    try:
        fields = json.loads(path.read_bytes())
    except (OSError, ValueError) as exc:
        raise refuse("not a readable JSON file") from exc
    if not isinstance(fields, dict) or fields.get("format") != FILE_FORMAT:
        raise refuse(f"not a {FILE_FORMAT} file")
    try:
        envelope = SignedRelease.model_validate(fields)
    except ValidationError as exc:
        where = ".".join(str(p) for p in exc.errors()[0]["loc"]) or "file"
        raise refuse(f"malformed signed release at {where}") from exc
    site = envelope.site
    key_path = Path(admitted_keys) / f"{site}{PUBLIC_KEY_SUFFIX}"
    if not key_path.is_file():
        raise refuse(f"site {site!r} is not admitted (no {key_path.name})", site)
    public_key = load_public_key(key_path)
    if envelope.key_fingerprint != key_fingerprint(public_key):
        raise refuse(f"signed with a key other than the one admitted for {site!r}", site)
    try:
        signature = base64.b64decode(envelope.signature, validate=True)
        public_key.verify(signature, _signed_bytes(fields), ec.ECDSA(hashes.SHA384()))
    except (InvalidSignature, binascii.Error) as exc:
        raise refuse(
            "the signature does not match the content (changed after signing)", site
        ) from exc
    if envelope.protocol_hash != protocol_hash:
        raise refuse("answers another protocol (its protocol hash differs)", site)
    if envelope.round_number != round_number:
        raise refuse(f"answers round {envelope.round_number}, not round {round_number}", site)
    reply = envelope.reply
    if reply.site != site:
        raise refuse("the reply inside names another site", site)
    if reply.release is not None and (
        reply.release.site != site or reply.release.protocol_hash != protocol_hash
    ):
        raise refuse("the release inside names another site or protocol", site)
    return envelope
