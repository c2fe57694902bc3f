"""Releases that arrive as signed files, pooled with (or instead of) releases over Flower.

A site that cannot open a connection answers into a signed release file
(:mod:`site_agent.contract.signed_release`). :func:`read_release_folder` checks every
``*.signed-release.json`` file of a folder against the coordinator's admitted keys and the
protocol being pooled; :func:`with_file_releases` adds the files that pass to a round's
outcome, so :func:`coordinator.pooling.assemble.build_results` pools connected and file-based
sites alike, and the report lists them in the same tables.

In the round outcome a file-based site has node id :data:`FILE_NODE_ID` (no SuperLink gave it
one). A refused file is kept as a fault of that node whose reason names the file and the
failed check, so the report says which site is missing and why. A site that answered both
over the network and by file is counted once, from the network; its file is refused.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from coordinator.pooling.sites import SiteInfo
from coordinator.runs.rounds import (
    MAX_FAULT_REASON_CHARS,
    NodeFault,
    RoundOutcome,
    SiteDecline,
    SiteDisclosure,
)
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.signed_release import (
    SIGNED_RELEASE_SUFFIX,
    SignedRelease,
    verify_release_file,
)
from site_agent.contract.wire import ReplyStatus
from site_agent.disclosure.small_cells import DisclosureNote
from site_agent.exceptions import DeploymentError, ReleaseFileRefused

FILE_NODE_ID = 0
"""Node id of a site whose answer came as a file."""


@dataclass(frozen=True, slots=True)
class RefusedFile:
    """A file that was not pooled, and the one line saying why."""

    path: Path
    site: str | None
    reason: str

    def line(self) -> str:
        """Return ``<file name>: refused: <reason>``."""
        return f"{self.path.name}: refused: {self.reason}"


@dataclass(frozen=True, slots=True)
class FileReleases:
    """The checked files of one folder: those accepted and those refused."""

    accepted: tuple[SignedRelease, ...]
    refused: tuple[RefusedFile, ...]


def read_release_folder(
    folder: Path,
    admitted_keys: Path,
    *,
    protocol_hash: str,
    round_number: int = 1,
    skip_other_rounds: bool = False,
) -> FileReleases:
    """Check every ``*.signed-release.json`` file in ``folder`` (not its subfolders).

    Two accepted files from the same site: the first by file name is kept, the rest refused.
    With ``skip_other_rounds`` (a study of several rounds sharing one folder), a file whose
    ``round_number`` field names another round is left for that round, not refused.
    """
    accepted: dict[str, SignedRelease] = {}
    refused: list[RefusedFile] = []
    for path in sorted(Path(folder).glob(f"*{SIGNED_RELEASE_SUFFIX}")):
        if skip_other_rounds and _names_other_round(path, round_number):
            continue
        try:
            envelope = verify_release_file(
                path, admitted_keys, protocol_hash=protocol_hash, round_number=round_number
            )
        except ReleaseFileRefused as exc:
            refused.append(RefusedFile(path=path, site=exc.site, reason=exc.reason))
            continue
        if envelope.site in accepted:
            refused.append(RefusedFile(path, envelope.site, "a second file from the same site"))
            continue
        accepted[envelope.site] = envelope
    return FileReleases(accepted=tuple(accepted.values()), refused=tuple(refused))


def _names_other_round(path: Path, round_number: int) -> bool:
    """Whether the file's (unchecked) round field names a round other than ``round_number``."""
    try:
        fields = json.loads(path.read_bytes())
    except (OSError, ValueError):
        return False  # refused, with its reason, by the full check
    number = fields.get("round_number") if isinstance(fields, dict) else None
    return isinstance(number, int) and number != round_number


def with_file_releases(outcome: RoundOutcome, files: FileReleases) -> RoundOutcome:
    """Return ``outcome`` with the accepted files' releases and declines added.

    Raises
    ------
    DeploymentError
        If ``files`` were checked against another protocol or round than ``outcome``'s.
    """
    releases = dict(outcome.releases)
    node_of_site = dict(outcome.node_of_site)
    declines = list(outcome.declines)
    disclosures = dict(outcome.disclosures)
    faults = list(outcome.faults)
    answered = set(releases) | {d.site for d in declines}
    for envelope in files.accepted:
        if (envelope.protocol_hash, envelope.round_number) != (
            outcome.protocol_hash,
            outcome.round_number,
        ):
            raise DeploymentError("release files were checked against another protocol or round")
        if envelope.site in answered:
            faults.append(_fault(f"{envelope.site}: file refused: already answered over Flower"))
            continue
        reply = envelope.reply
        if reply.status is ReplyStatus.RELEASED and reply.release is not None:
            releases[envelope.site] = reply.release
            node_of_site[envelope.site] = FILE_NODE_ID
        else:
            declines.append(
                SiteDecline(
                    site=envelope.site,
                    node_id=FILE_NODE_ID,
                    reason=reply.reason or "declined",
                    error_class=reply.error_class,
                )
            )
        disclosures[envelope.site] = SiteDisclosure(
            note=None
            if envelope.disclosure is None
            else DisclosureNote.model_validate(envelope.disclosure),
            ledger_sequence=envelope.ledger_sequence,
            ledger_entry_hash=envelope.ledger_entry_hash,
        )
    faults += [_fault(refused.line()) for refused in files.refused]
    return outcome.model_copy(
        update={
            "nodes_asked": outcome.nodes_asked + len(files.accepted) + len(files.refused),
            "releases": releases,
            "node_of_site": node_of_site,
            "declines": declines,
            "disclosures": disclosures,
            "faults": faults,
        }
    )


def file_round(protocol: StudyProtocol, files: FileReleases, round_number: int = 1) -> RoundOutcome:
    """Return the outcome of a round answered by files only, checking the protocol's quorum.

    Raises
    ------
    DeploymentError
        If fewer sites than ``protocol.quorum`` released statistics.
    """
    empty = RoundOutcome(
        round_number=round_number,
        protocol_hash=protocol.content_hash(),
        nodes_asked=0,
        releases={},
        node_of_site={},
        declines=[],
        faults=[],
    )
    outcome = with_file_releases(empty, files)
    if len(outcome.releases) < protocol.quorum:
        raise DeploymentError(
            f"only {len(outcome.releases)} site(s) released statistics by file, the protocol's "
            f"quorum is {protocol.quorum}"
        )
    return outcome


def file_sites(files: FileReleases) -> dict[str, SiteInfo]:
    """Return every site named by a file, accepted or refused, as invited external sites.

    Passed to :func:`~coordinator.pooling.assemble.build_results`, a site whose file was
    refused is listed as a site without a usable reply, with the refusal among the reasons.
    """
    names = {e.site for e in files.accepted} | {r.site for r in files.refused if r.site}
    return {name: SiteInfo() for name in sorted(names)}


def _fault(reason: str) -> NodeFault:
    return NodeFault(node_id=FILE_NODE_ID, code=None, reason=reason[:MAX_FAULT_REASON_CHARS])
