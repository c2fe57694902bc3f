"""The run's app bundle (Flower's FAB): accepted only when it brings no code to the site.

In a Flower deployment each run's app bundle travels from the SuperLink to every SuperNode,
and Flower's own ClientApp process installs it and imports the ClientApp it names. A bundle
can carry Python modules, so a coordinator could make a hospital run code the hospital never
installed. A site agent accepts a bundle only when

* it carries no file but the manifest and the project file (and plain-text documents:
  ``.md``, ``.txt``), and its project file names this site agent's own ClientApp,
  :data:`SITE_CLIENT_APP`; or
* its SHA-256 is one the site approved (an approved-bundles file, as protocols are approved).

Even an accepted bundle is never installed nor imported: the site's task runner
(:mod:`site_agent.deployment.task_runner`) answers with the ClientApp the hospital installed. The
check
reads the bundle's zip directory and its ``pyproject.toml`` only, in memory.
"""

from __future__ import annotations

import hashlib
import io
import json
import tomllib
import zipfile
from collections.abc import Collection
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path, PurePosixPath

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from site_agent.exceptions import InputError

SITE_CLIENT_APP = "site_agent.client_app:app"
"""The only ClientApp a bundle without approval may name: the site agent's own."""
_MANIFEST = ".info/CONTENT"
_PROJECT = "pyproject.toml"
_TEXT_SUFFIXES = frozenset({".md", ".txt"})


class BundleVerdict(StrEnum):
    """Why a bundle was accepted or refused (the refusal codes are ledgered)."""

    NO_CODE = "no_code"
    APPROVED = "approved_by_hash"
    CARRIES_CODE = "app_bundle_carries_code"
    OTHER_CLIENT_APP = "app_bundle_names_another_clientapp"
    UNREADABLE = "app_bundle_unreadable"
    HASH_MISMATCH = "app_bundle_hash_mismatch"


@dataclass(frozen=True, slots=True)
class BundleCheck:
    """The outcome of :func:`check_app_bundle`."""

    verdict: BundleVerdict
    sha256: str
    detail: str

    @property
    def accepted(self) -> bool:
        """Whether the run may be answered."""
        return self.verdict in (BundleVerdict.NO_CODE, BundleVerdict.APPROVED)


class _ApprovedBundles(BaseModel):
    model_config = ConfigDict(extra="forbid")

    approved: list[str] = Field(default_factory=list)


def load_approved_bundles(path: Path | None) -> frozenset[str]:
    """Read ``{"approved": ["<sha256>", ...]}``; a missing or None path approves none.

    Raises
    ------
    InputError
        If the file exists but is not a valid approved-bundles file.
    """
    if path is None or not Path(path).exists():
        return frozenset()
    try:
        approved = _ApprovedBundles.model_validate_json(Path(path).read_text()).approved
    except (ValidationError, OSError) as exc:
        raise InputError(f"approved-bundles file {path} is not valid") from exc
    return frozenset(a.lower() for a in approved)


def approve_bundle(sha256: str, path: Path) -> None:
    """Add a bundle's SHA-256 to the approved-bundles file at ``path``."""
    approved = set(load_approved_bundles(path)) | {sha256.lower()}
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    Path(path).write_text(json.dumps({"approved": sorted(approved)}, indent=2) + "\n")


def check_app_bundle(
    content: bytes, claimed_hash: str | None, approved: Collection[str] = ()
) -> BundleCheck:
    """Decide whether a run's app bundle is accepted, without installing or importing it.

    Parameters
    ----------
    content
        The bundle's bytes (a zip archive).
    claimed_hash
        The hash Flower gives for the bundle; it must be the SHA-256 of ``content``.
    approved
        SHA-256 hashes the site approved.
    """
    digest = hashlib.sha256(content).hexdigest()
    if claimed_hash is not None and claimed_hash.lower() != digest:
        return BundleCheck(BundleVerdict.HASH_MISMATCH, digest, "hash differs from its content")
    if digest in approved:
        return BundleCheck(BundleVerdict.APPROVED, digest, "hash approved by the site")
    try:
        with zipfile.ZipFile(io.BytesIO(content)) as archive:
            names = [i.filename for i in archive.infolist() if not i.is_dir()]
            project = archive.read(_PROJECT) if _PROJECT in names else None
    except (zipfile.BadZipFile, OSError, KeyError) as exc:
        return BundleCheck(BundleVerdict.UNREADABLE, digest, type(exc).__name__)
    foreign = [n for n in names if not _allowed(n)]
    if foreign:
        return BundleCheck(BundleVerdict.CARRIES_CODE, digest, f"{len(foreign)} file(s) of code")
    if project is None:
        return BundleCheck(BundleVerdict.UNREADABLE, digest, "no pyproject.toml")
    try:
        config = tomllib.loads(project.decode("utf-8"))
        component = config["tool"]["flwr"]["app"]["components"]["clientapp"]
    except (UnicodeDecodeError, tomllib.TOMLDecodeError, KeyError, TypeError) as exc:
        return BundleCheck(BundleVerdict.UNREADABLE, digest, type(exc).__name__)
    if component != SITE_CLIENT_APP:
        return BundleCheck(BundleVerdict.OTHER_CLIENT_APP, digest, "names another ClientApp")
    return BundleCheck(BundleVerdict.NO_CODE, digest, "manifest and project file only")


def _allowed(name: str) -> bool:
    path = PurePosixPath(name)
    if name in (_MANIFEST, _PROJECT):
        return True
    return len(path.parts) == 1 and path.suffix.lower() in _TEXT_SUFFIXES
