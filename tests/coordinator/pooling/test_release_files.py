"""Signed release files: sites that cannot connect answer into files the coordinator pools.

The hospitals, the study and every number are invented for these tests. Files are made by
the real site path (``answer_into_file``: the site's ClientApp and disclosure gate) and
checked by the real coordinator path; the reference for the pooled results is the same study
run over Flower messages on the in-process engine.
"""

from __future__ import annotations

import json
import subprocess
from collections.abc import Sequence
from pathlib import Path

import pytest
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.hazmat.primitives.serialization import (
    Encoding,
    NoEncryption,
    PrivateFormat,
    PublicFormat,
)

from coordinator.pooling.assemble import build_results
from coordinator.pooling.release_files import (
    FILE_NODE_ID,
    file_round,
    file_sites,
    read_release_folder,
    with_file_releases,
)
from coordinator.pooling.study_results import MetricRow
from coordinator.runs.engines import run_study
from coordinator.runs.rounds import RoundOutcome
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.signed_release import (
    SIGNED_RELEASE_SUFFIX,
    key_fingerprint,
    load_private_key,
    sign_release,
    verify_release_file,
)
from site_agent.contract.wire import ReplyStatus
from site_agent.deployment.offline_answer import answer_into_file
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.ledger import ReleaseLedger, verify_ledger
from site_agent.disclosure.policy import PrivacySettings, SitePolicy
from site_agent.exceptions import DeploymentError, ReleaseFileRefused
from site_agent.service import SiteSettings


def _make_keys(directory: Path, site: str, admitted: Path | None) -> Path:
    """Write an ECDSA P-384 key pair in OpenSSH format; admit the public key as <site>.pub."""
    directory.mkdir(parents=True, exist_ok=True)
    key = ec.generate_private_key(ec.SECP384R1())
    private = directory / f"{site}.key"
    private.write_bytes(key.private_bytes(Encoding.PEM, PrivateFormat.OpenSSH, NoEncryption()))
    public = key.public_key().public_bytes(Encoding.OpenSSH, PublicFormat.OpenSSH)
    (directory / f"{site}.pub").write_bytes(public + b"\n")
    if admitted is not None:
        admitted.mkdir(parents=True, exist_ok=True)
        (admitted / f"{site}.pub").write_bytes(public + b"\n")
    return private


def _answer(site: SiteSettings, protocol: StudyProtocol, key: Path, folder: Path) -> Path:
    signed = answer_into_file(protocol, site, key)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{site.site}{SIGNED_RELEASE_SUFFIX}"
    path.write_text(signed.to_json())
    return path


def _rows(rows: Sequence[MetricRow]) -> list[str]:
    """Rows as JSON text, so undefined values (NaN) compare equal."""
    return [r.model_dump_json() for r in rows]


@pytest.fixture
def admitted(tmp_path: Path) -> Path:
    return tmp_path / "coordinator" / "admitted-keys"


def test_key_fingerprint_matches_ssh_keygen(tmp_path: Path) -> None:
    """Our fingerprint is the one OpenSSH's ssh-keygen -l prints for the same public key."""
    private = _make_keys(tmp_path, "larkspur-general", None)
    shown = subprocess.run(
        ["ssh-keygen", "-l", "-E", "sha256", "-f", str(tmp_path / "larkspur-general.pub")],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.split()[1]
    # Reference: OpenSSH ssh-keygen (the fingerprint Flower's node auth keys are listed by).
    assert key_fingerprint(load_private_key(private).public_key()) == shown


def test_files_pool_to_the_same_results_as_the_connected_study(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """Three sites by file give the releases and metrics the in-process Flower run gives."""
    folder = tmp_path / "inbox"
    for site in three_sites:
        _answer(site, study_protocol, _make_keys(tmp_path / "keys", site.site, admitted), folder)
    # Fresh ledgers for the connected run, so it computes rather than repeats the file answers.
    fresh = [
        s.model_copy(update={"ledger_path": tmp_path / f"{s.site}.jsonl"}) for s in three_sites
    ]
    connected = run_study(
        study_protocol, None, fresh, engine="inprocess", workdir=tmp_path / "run"
    ).rounds[-1]

    files = read_release_folder(folder, admitted, protocol_hash=study_protocol.content_hash())
    by_file = file_round(study_protocol, files)

    assert files.refused == ()
    assert by_file.releases == connected.releases  # the same gate made both
    assert set(by_file.node_of_site.values()) == {FILE_NODE_ID}
    pooled_files = build_results(study_protocol, by_file, engine="files").metrics
    pooled_flower = build_results(study_protocol, connected, engine="inprocess").metrics
    assert _rows(pooled_files) == _rows(pooled_flower)
    for site in three_sites:
        assert site.ledger_path is not None and verify_ledger(site.ledger_path).ok


def test_a_study_mixes_connected_and_file_sites(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """Two sites over Flower plus one by file pool to the all-connected results."""
    all_connected = run_study(
        study_protocol, None, three_sites, engine="inprocess", workdir=tmp_path / "all"
    ).rounds[-1]
    *online, offline = three_sites
    key = _make_keys(tmp_path / "keys", offline.site, admitted)
    # A fresh ledger, so the file answer is computed, not repeated from the run above.
    offline = offline.model_copy(update={"ledger_path": tmp_path / "offline-ledger.jsonl"})
    _answer(offline, study_protocol, key, tmp_path / "inbox")
    two = run_study(study_protocol, None, online, engine="inprocess", workdir=tmp_path / "two")

    files = read_release_folder(
        tmp_path / "inbox", admitted, protocol_hash=study_protocol.content_hash()
    )
    mixed = with_file_releases(two.rounds[-1], files)

    assert mixed.releases == all_connected.releases
    assert mixed.node_of_site[offline.site] == FILE_NODE_ID
    assert _rows(build_results(study_protocol, mixed, engine="mixed").metrics) == _rows(
        build_results(study_protocol, all_connected, engine="inprocess").metrics
    )


def test_tampered_file_is_refused_with_one_line(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """One count changed after signing: the file is refused, the reason says so."""
    site = three_sites[0]
    path = _answer(site, study_protocol, _make_keys(tmp_path / "k", site.site, admitted), tmp_path)
    fields = json.loads(path.read_text())
    fields["reply"]["release"]["statistics"]["n_observations"] += 1
    path.write_text(json.dumps(fields))

    with pytest.raises(ReleaseFileRefused, match=r"refused: the signature does not match") as err:
        verify_release_file(path, admitted, protocol_hash=study_protocol.content_hash())
    assert "\n" not in str(err.value)


def test_resigned_file_is_refused(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """A file re-signed with a key that is not the admitted one is refused."""
    site = three_sites[0]
    path = _answer(site, study_protocol, _make_keys(tmp_path / "k", site.site, admitted), tmp_path)
    intruder = load_private_key(_make_keys(tmp_path / "intruder", site.site, None))
    envelope = verify_release_file(path, admitted, protocol_hash=study_protocol.content_hash())
    path.write_text(sign_release(envelope, intruder).to_json())

    with pytest.raises(ReleaseFileRefused, match="signed with a key other than the one admitted"):
        verify_release_file(path, admitted, protocol_hash=study_protocol.content_hash())


def test_unadmitted_site_and_other_protocol_are_refused_and_reported(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """An unadmitted site's file and a file for another protocol become faults with reasons."""
    inbox = tmp_path / "inbox"
    first, second, third = three_sites
    _answer(first, study_protocol, _make_keys(tmp_path / "k", first.site, admitted), inbox)
    _answer(second, study_protocol, _make_keys(tmp_path / "k", second.site, None), inbox)
    other = study_protocol.model_copy(update={"title": "Another invented study"})
    assert third.policy_path is not None
    approve(other, SitePolicy.load(third.policy_path).approvals_file)
    _answer(third, other, _make_keys(tmp_path / "k", third.site, admitted), inbox)

    files = read_release_folder(inbox, admitted, protocol_hash=study_protocol.content_hash())

    reasons = sorted(r.line() for r in files.refused)
    assert len(files.accepted) == 1
    assert reasons == [
        f"{second.site}{SIGNED_RELEASE_SUFFIX}: refused: site {second.site!r} is not admitted "
        f"(no {second.site}.pub)",
        f"{third.site}{SIGNED_RELEASE_SUFFIX}: refused: answers another protocol "
        "(its protocol hash differs)",
    ]
    with pytest.raises(DeploymentError, match="only 1 site"):
        file_round(study_protocol, files)  # quorum 2
    empty = RoundOutcome(
        round_number=1,
        protocol_hash=study_protocol.content_hash(),
        nodes_asked=0,
        releases={},
        node_of_site={},
        declines=[],
        faults=[],
    )
    outcome = with_file_releases(empty, files)
    assert sorted(f.reason for f in outcome.faults) == reasons  # the report's missing sites
    assert list(outcome.releases) == [first.site]
    listed = build_results(study_protocol, outcome, engine="files", sites=file_sites(files)).sites
    silent = {row.site: row.reason or "" for row in listed if row.status == "silent"}
    assert set(silent) == {second.site, third.site}
    assert "answers another protocol" in silent[third.site]


def test_file_answer_is_ledgered_and_a_second_answer_is_not_charged(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """Under DP, answering the same round into a file twice gives one draw, charged once."""
    site = three_sites[0]
    assert site.policy_path is not None
    policy = SitePolicy.load(site.policy_path).model_copy(
        update={"privacy": PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)}
    )
    site.policy_path.write_text(policy.model_dump_json())
    key = _make_keys(tmp_path / "k", site.site, admitted)

    first = answer_into_file(study_protocol, site, key)
    second = answer_into_file(study_protocol, site, key)

    assert first.reply.status in (ReplyStatus.RELEASED, ReplyStatus.DECLINED)
    assert second.reply.release == first.reply.release
    assert second.ledger_entry_hash == first.ledger_entry_hash
    assert site.ledger_path is not None
    entries = ReleaseLedger(site.ledger_path).entries()
    assert [e.epsilon_spent for e in entries] == [0.5, 0.0]


def test_commands_answer_into_a_file_and_pool_the_folder(
    tmp_path: Path, three_sites: list[SiteSettings], study_protocol: StudyProtocol, admitted: Path
) -> None:
    """`site answer-into-file` then `pool-files`: results and report written, tampering named."""
    from typer.testing import CliRunner

    from simulations.cli import app

    runner = CliRunner()
    protocol_path = tmp_path / "protocol.json"
    protocol_path.write_text(study_protocol.model_dump_json())
    inbox = tmp_path / "inbox"
    for site in three_sites:
        key = _make_keys(tmp_path / "keys", site.site, admitted)
        result = runner.invoke(
            app,
            [
                "site",
                "answer-into-file",
                str(protocol_path),
                "--site",
                site.site,
                "--data",
                str(site.data_path),
                "--policy",
                str(site.policy_path),
                "--ledger",
                str(site.ledger_path),
                "--key",
                str(key),
                "--out",
                str(inbox / f"{site.site}{SIGNED_RELEASE_SUFFIX}"),
            ],
        )
        assert result.exit_code == 0, result.output
        assert "released: statistics released" in result.output
    tampered = inbox / f"{three_sites[2].site}{SIGNED_RELEASE_SUFFIX}"
    tampered.write_text(
        tampered.read_text().replace('"n_observations": 60', '"n_observations": 61')
    )

    result = runner.invoke(
        app,
        [
            "pool-files",
            str(inbox),
            "--protocol",
            str(protocol_path),
            "--admitted-keys",
            str(admitted),
            "--out",
            str(tmp_path / "out"),
        ],
    )

    assert result.exit_code == 0, result.output
    assert "pooled 2 site(s) from files; 0 declined; 1 file(s) refused" in result.output
    assert "refused: the signature does not match the content" in result.output
    assert (tmp_path / "out" / "report.html").exists()
    assert "research tool" in result.output
