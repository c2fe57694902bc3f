"""Resumable study rounds: stored releases are reused, sites are never asked twice.

Runs the real ServerApp-side rounds against the real site ClientApp on the in-process
engine. Flower's SuperLink tells the coordinator each authenticated node's admitted name;
:class:`_NamedGrid` gives the in-process nodes their site names the same way.
References: each site's release is checked against the direct computation without Flower
(the ``expected_release`` fixture: ``evaluate_site`` then the site's policy), and the
number of answers against each site's own release ledger.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from pathlib import Path

import pytest
from flwr.app import Context
from flwr.proto.node_pb2 import NodeInfo
from flwr.serverapp import Grid, ServerApp

from coordinator.pooling.release_files import FILE_NODE_ID, FileReleases, read_release_folder
from coordinator.runs.inprocess import FIRST_NODE_ID, run_inprocess
from coordinator.runs.quick_grid import DelegatingGrid
from coordinator.runs.rounds import SiteDisclosure, StudyOutcome
from coordinator.runs.study_state import SqliteStudyState, run_resumable_study_rounds
from site_agent import client_app
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.contract.signed_release import SIGNED_RELEASE_SUFFIX
from site_agent.deployment.keys import make_site_keys
from site_agent.deployment.offline_answer import answer_into_file
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.ledger import ReleaseLedger
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings


class _NamedGrid(DelegatingGrid):
    """Delegate to an in-process grid; name each node as SuperNode authentication does."""

    def __init__(self, inner: Grid, names: dict[int, str]) -> None:
        super().__init__(inner)
        self._names = names

    def get_nodes(self) -> Iterable[NodeInfo]:
        return [NodeInfo(node_id=n, name=self._names[n]) for n in self._inner.get_node_ids()]


def _resumable(
    protocol: StudyProtocol,
    sites: Sequence[SiteSettings],
    state_path: Path,
    expected: Sequence[str] = (),
    file_releases: Callable[[int], FileReleases] | None = None,
) -> StudyOutcome:
    server = ServerApp()
    result: list[StudyOutcome] = []
    names = {FIRST_NODE_ID + i: site.site for i, site in enumerate(sites)}

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        with SqliteStudyState(state_path) as state:
            result.append(
                run_resumable_study_rounds(
                    _NamedGrid(grid, names),
                    protocol,
                    None,
                    state,
                    expected_sites=expected,
                    file_releases=file_releases,
                )
            )

    run_inprocess(server, client_app.app, [s.to_node_config() for s in sites], {})
    return result[0]


def _answers(site: SiteSettings, protocol: StudyProtocol) -> int:
    assert site.ledger_path is not None
    if not site.ledger_path.exists():
        return 0
    return sum(
        entry.protocol_hash == protocol.content_hash()
        for entry in ReleaseLedger(site.ledger_path).entries()
    )


def test_a_site_whose_release_is_stored_is_not_asked_again(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    expected_release: Callable[[SiteSettings, StudyProtocol], SiteRelease],
) -> None:
    """A release stored before a crash is reused; only the other sites are asked."""
    first = three_sites[0]
    stored = expected_release(first, study_protocol)
    with SqliteStudyState(tmp_path / "state.sqlite") as state:
        state.put_release(study_protocol.content_hash(), 1, stored, FIRST_NODE_ID, SiteDisclosure())

    outcome = _resumable(study_protocol, three_sites, tmp_path / "state.sqlite")

    (round_one,) = outcome.rounds
    assert sorted(round_one.releases) == sorted(site.site for site in three_sites)
    for site in three_sites:
        assert round_one.releases[site.site] == expected_release(site, study_protocol)
    assert [_answers(site, study_protocol) for site in three_sites] == [0, 1, 1]


def test_a_finished_round_is_read_back_and_no_site_is_charged_twice(
    tmp_path: Path, study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """Running a finished study again returns the same outcome and asks nobody."""
    first = _resumable(study_protocol, three_sites, tmp_path / "state.sqlite")
    again = _resumable(study_protocol, three_sites, tmp_path / "state.sqlite")

    assert again.model_dump_json() == first.model_dump_json()
    assert [_answers(site, study_protocol) for site in three_sites] == [1, 1, 1]


def test_quorum_failure_names_each_missing_site_and_why(
    tmp_path: Path, study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """An admitted site that never connected is named, and a failed quorum says so."""
    strict = study_protocol.model_copy(update={"quorum": 4})

    with pytest.raises(DeploymentError, match="Kestrel Valley: not connected") as failure:
        _resumable(strict, three_sites, tmp_path / "state.sqlite", expected=["Kestrel Valley"])

    assert "quorum is 4" in str(failure.value)


def test_a_file_based_site_counts_towards_the_quorum_before_it_is_checked(
    tmp_path: Path,
    study_protocol: StudyProtocol,
    three_sites: list[SiteSettings],
    expected_release: Callable[[SiteSettings, StudyProtocol], SiteRelease],
) -> None:
    """Two connected sites and one signed file meet a quorum of three; a bad file is named."""
    strict = study_protocol.model_copy(update={"quorum": 3})
    for site in three_sites:
        assert site.policy_path is not None
        approve(strict, site.policy_path.parent / "approvals.json")
    *online, offline = three_sites
    inbox, admitted = tmp_path / "inbox", tmp_path / "admitted"
    inbox.mkdir()
    admitted.mkdir()
    keys = make_site_keys(tmp_path / "keys")
    (admitted / f"{offline.site}.pub").write_bytes(keys.public_key.read_bytes())
    signed = answer_into_file(strict, offline, keys.private_key)
    (inbox / f"offline{SIGNED_RELEASE_SUFFIX}").write_text(signed.to_json())
    (inbox / f"garbled{SIGNED_RELEASE_SUFFIX}").write_text("{")

    def files(number: int) -> FileReleases:
        return read_release_folder(
            inbox, admitted, protocol_hash=strict.content_hash(), round_number=number
        )

    with pytest.raises(DeploymentError, match="quorum is 3"):  # the two connected alone
        _resumable(strict, online, tmp_path / "without-files.sqlite")
    outcome = _resumable(
        strict, online, tmp_path / "state.sqlite", expected=[offline.site], file_releases=files
    )

    (round_one,) = outcome.rounds
    assert sorted(round_one.releases) == sorted(site.site for site in three_sites)
    for site in three_sites:  # the direct computation, without Flower or files
        assert round_one.releases[site.site] == expected_release(site, strict)
    assert round_one.node_of_site[offline.site] == FILE_NODE_ID
    assert [f.reason for f in round_one.faults] == [
        f"garbled{SIGNED_RELEASE_SUFFIX}: refused: not a readable JSON file"
    ]
