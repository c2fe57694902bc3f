"""Disclosure control, adversarially: each attack is refused, nothing leaves, the ledger says so.

Hospitals, the study and every number are invented for these tests. Requests travel as
real Flower messages through the in-process engine (protobuf round trip) into the real
site ClientApp, whose mod list holds :func:`site_agent.disclosure.gate.disclosure_mod`.
"""

from __future__ import annotations

import json
import uuid
from pathlib import Path

import numpy as np
import pytest
from flwr.app import Context, Message
from flwr.clientapp import ClientApp
from flwr.serverapp import Grid, ServerApp

from coordinator.runs.inprocess import run_inprocess
from site_agent.client_app import app as site_client_app
from site_agent.contract.node_config import (
    DATA_PATH_KEY,
    LEDGER_PATH_KEY,
    POLICY_PATH_KEY,
    SITE_NAME_KEY,
)
from site_agent.contract.protocol import EvaluationPlan, Operation, StudyProtocol, uniform_edges
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import (
    EVALUATE_MESSAGE_TYPE,
    SITE_ACTION,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    decode_reply,
    encode_reply,
    encode_request,
)
from site_agent.data.predictions import load_predictions
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.gate import disclosure_mod, read_disclosure
from site_agent.disclosure.ledger import Outcome, ReleaseLedger, verify_ledger
from site_agent.disclosure.policy import PrivacySettings, SitePolicy, SmallCellAction
from site_agent.disclosure.refusals import RefusalCode
from site_agent.disclosure.request_check import COORDINATOR_NAME_KEY
from site_agent.disclosure.small_cells import apply_policy
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import DisclosureRefused

SITE = "fernbrook-county-hospital"
SECRET = "PAT-SECRET-0042"


def _write_table(path: Path, n_cases: int = 120, seed: int = 5) -> Path:
    """Write an invented scored table: one case per patient, a sex attribute and two cohort flags.

    ``cohort_a`` is "yes" for the first 30 cases, ``cohort_b`` for the first 31: the two
    subgroups differ by exactly one case. ``ward`` is "icu" for one case only.
    """
    rng = np.random.default_rng(seed)
    label = (rng.random(n_cases) < 0.4).astype(int)
    score = np.clip(rng.beta(2 + 3 * label, 5 - 3 * label), 0.0, 1.0)
    sex = rng.choice(["female", "male"], size=n_cases)
    lines = ["case_id,patient_id,label,score,sex,cohort_a,cohort_b,ward"]
    for i in range(n_cases):
        a = "yes" if i < 30 else "no"
        b = "yes" if i < 31 else "no"
        ward = "icu" if i == 7 else "general"
        lines.append(f"c{i},p{i},{label[i]},{score[i]:.6f},{sex[i]},{a},{b},{ward}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _protocol(**plan: object) -> StudyProtocol:
    return StudyProtocol(
        study_id="FERN-PNEUMO-2031",
        title="Invented external validation of a pneumonia classifier",
        evaluation=EvaluationPlan(**plan),  # type: ignore[arg-type]
        quorum=1,
    )


class _Site:
    """One invented hospital on disk: data, policy, approvals and ledger."""

    def __init__(self, root: Path, policy: SitePolicy) -> None:
        root.mkdir(parents=True, exist_ok=True)
        self.data = _write_table(root / "predictions.csv")
        self.policy_path = root / "policy.json"
        self.policy_path.write_text(policy.model_dump_json())
        self.policy = SitePolicy.load(self.policy_path)
        self.ledger = root / "release-ledger.jsonl"

    def approve(self, protocol: StudyProtocol) -> None:
        approve(protocol, self.policy.approvals_file)

    def node_config(self) -> dict[str, bool | int | float | str]:
        return {
            SITE_NAME_KEY: SITE,
            DATA_PATH_KEY: str(self.data),
            POLICY_PATH_KEY: str(self.policy_path),
            LEDGER_PATH_KEY: str(self.ledger),
        }

    def entries(self) -> list[dict[str, object]]:
        return [e.model_dump(mode="json") for e in ReleaseLedger(self.ledger).entries()]


def _policy(**update: object) -> SitePolicy:
    base = SitePolicy(allowed_subgroup_attributes=("sex", "cohort_a", "cohort_b", "ward"))
    return base.model_copy(update=update)


def _ask(
    site: _Site,
    protocol: StudyProtocol,
    *,
    times: int = 1,
    rounds: list[int] | None = None,
    protocol_hash: str | None = None,
    run_config: dict[str, bool | int | float | str] | None = None,
    client: ClientApp = site_client_app,
) -> list[Message]:
    """Send evaluation requests as real Flower messages; return the raw replies.

    One request per entry of ``rounds`` (its round number), else ``times`` requests of round 1.
    """
    server = ServerApp()
    replies: list[Message] = []

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        for round_number in rounds or [1] * times:
            request = SiteRequest(
                operation=Operation.EVALUATE,
                protocol_json=protocol.canonical_json(),
                protocol_hash=protocol_hash or protocol.content_hash(),
                round_number=round_number,
                request_id=uuid.uuid4().hex,
            )
            (node,) = grid.get_node_ids()
            message = Message(encode_request(request, None), node, EVALUATE_MESSAGE_TYPE)
            replies.extend(grid.send_and_receive([message], timeout=30.0))

    run_inprocess(server, client, [site.node_config()], run_config or {})
    return replies


def _declined_with(reply: Message, code: RefusalCode) -> SiteReply:
    answered = decode_reply(reply.content)
    assert answered.status is ReplyStatus.DECLINED
    assert answered.release is None
    assert answered.reason is not None and answered.reason.startswith(code.value + ":")
    return answered


def _direct_release(site: _Site, protocol: StudyProtocol) -> SiteRelease:
    return evaluate_site(
        load_predictions(site.data),
        protocol.evaluation,
        site=SITE,
        protocol_hash=protocol.content_hash(),
    )


# ----------------------------------------------------------------- releases that pass


def test_approved_request_is_released_with_a_note_and_recorded_verbatim(tmp_path: Path) -> None:
    """An allowed request is released; the ledger holds exactly the reply that left."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10), subgroups=("sex",))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    answered = decode_reply(reply.content)
    assert answered.status is ReplyStatus.RELEASED
    note, sequence, digest = read_disclosure(reply)
    assert note is not None and note.min_cell == 5
    (entry,) = ReleaseLedger(site.ledger).entries()
    assert (sequence, digest) == (entry.sequence, entry.entry_hash)
    assert entry.outcome is Outcome.RELEASED
    assert entry.released == {
        "reply": json.loads(answered.model_dump_json()),
        "disclosure": json.loads(note.model_dump_json()),
    }
    assert verify_ledger(site.ledger).ok


def test_merged_histogram_matches_numpy_histogram_on_the_merged_edges(tmp_path: Path) -> None:
    """Merged bins hold the counts numpy.histogram gives on the new edges, all 0 or >= 5."""
    site = _Site(tmp_path / "fernbrook", _policy(small_cells=SmallCellAction.MERGE))
    protocol = _protocol(histogram_edges=uniform_edges(50))
    release = _direct_release(site, protocol)

    controlled, note = apply_policy(release, site.policy)

    histogram = controlled.statistics.histogram
    assert note.merged and note.merged[0] == "statistics.histogram"
    scores = np.loadtxt(site.data, delimiter=",", skiprows=1, usecols=3)
    labels = np.loadtxt(site.data, delimiter=",", skiprows=1, usecols=2)
    # Reference: numpy.histogram (last bin closed, as in site_agent.statistics.summaries).
    # Each class keeps its own edges; the row of all cases keeps those both kept.
    for name, label in (("positive", 1), ("negative", 0)):
        edges = np.asarray(histogram.class_edges(name))
        expected, _ = np.histogram(scores[labels == label], bins=edges)
        assert list(getattr(histogram, name)) == expected.tolist()
        # Minimum cell size 5: common practice in health-statistics disclosure control.
        assert all(v == 0 or v >= 5 for v in getattr(histogram, name))
        assert set(histogram.edges) <= set(edges) <= set(uniform_edges(50))
    expected_all, _ = np.histogram(scores, bins=np.asarray(histogram.edges))
    assert list(histogram.all) == expected_all.tolist()


def test_suppressed_histogram_cells_are_zero_and_listed(tmp_path: Path) -> None:
    """In suppress mode each small bin becomes 0 and its path is in the note."""
    site = _Site(tmp_path / "fernbrook", _policy(small_cells=SmallCellAction.SUPPRESS))
    protocol = _protocol(histogram_edges=uniform_edges(50))
    release = _direct_release(site, protocol)
    original = release.statistics.histogram.positive

    controlled, note = apply_policy(release, site.policy)

    kept = controlled.statistics.histogram.positive
    small = [i for i, v in enumerate(original) if 0 < v < 5]
    assert small  # the table has small bins to suppress
    assert all(kept[i] == 0 for i in small)
    # A bin next to a cut the partition rule withheld is suppressed too, and listed.
    listed = set(note.suppressed)
    assert all(
        kept[i] == original[i] or f"statistics.histogram.positive[{i}]" in listed
        for i in range(len(original))
        if i not in small
    )
    assert {f"statistics.histogram.positive[{i}]" for i in small} <= set(note.suppressed)


# ----------------------------------------------------------------- attacks, each refused


def test_request_for_per_case_scores_is_refused_as_case_level_output(tmp_path: Path) -> None:
    """Calibration bins outnumbering the cases (per-case scores) are declined and logged.

    (A histogram may have more bins than cases: its bins are merged to 0 or >= m cases.)
    """
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(calibration_edges=uniform_edges(1000))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.CASE_LEVEL_OUTPUT)
    (entry,) = site.entries()
    assert entry["outcome"] == "declined" and entry["reason"] == "case_level_output"


def test_subgroup_holding_one_patient_is_refused(tmp_path: Path) -> None:
    """A subgroup level with a single case (ward = icu) is declined and logged."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10), subgroups=("ward",))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.SUBGROUP_BELOW_MIN_CELL)
    assert site.entries()[-1]["reason"] == "subgroup_below_min_cell"


def test_overlapping_subgroups_whose_difference_isolates_one_case_are_refused(
    tmp_path: Path,
) -> None:
    """Cohorts A and A plus one case, each large enough, are declined as a pair."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10), subgroups=("cohort_a", "cohort_b"))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL)
    assert site.entries()[-1]["reason"] == "subgroup_difference_below_min_cell"


def test_each_overlapping_subgroup_alone_is_released(tmp_path: Path) -> None:
    """Either cohort on its own passes: the refusal above is about the pair."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10), subgroups=("cohort_a",))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    assert decode_reply(reply.content).status is ReplyStatus.RELEASED


def test_repeated_queries_are_refused_once_the_privacy_budget_is_spent(tmp_path: Path) -> None:
    """With ε = 0.5 per release and 1.0 per study, the third request is declined."""
    privacy = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    protocol = _protocol(histogram_edges=uniform_edges(10)).model_copy(update={"rounds": 4})
    site.approve(protocol)

    replies = _ask(site, protocol, rounds=[1, 2, 3, 4])

    # The first two requests each spend ε = 0.5: released, or declined when a rule fires on
    # the noisy counts (that decision is itself a DP output and is charged too).
    statuses = [decode_reply(r.content).status for r in replies]
    assert statuses[2:] == [ReplyStatus.DECLINED] * 2
    _declined_with(replies[2], RefusalCode.PRIVACY_BUDGET_EXHAUSTED)
    entries = site.entries()
    assert [float(str(e["epsilon_spent"])) for e in entries] == [0.5, 0.5, 0.0, 0.0]
    # Sequential composition (Dwork & Roth 2014, Thm. 3.16): spent epsilons add up.
    assert sum(float(str(e["epsilon_spent"])) for e in entries) == pytest.approx(1.0)
    assert [e["reason"] for e in entries[2:]] == ["privacy_budget_exhausted"] * 2


def test_noised_release_withholds_exact_estimates_and_states_its_noise(tmp_path: Path) -> None:
    """Under DP, exact AUCs are withheld and the note gives ε and b = Δ/ε."""
    privacy = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    # 2,000 cases: with noise scale 20, a noisy class total below the minimum cell (which
    # would refuse the release) has probability about e^-40; with 120 cases it was ~6 %.
    _write_table(site.data, n_cases=2000)
    protocol = _protocol(histogram_edges=uniform_edges(10))
    release = _direct_release(site, protocol)

    noised, note = apply_policy(release, site.policy, epsilon=0.5)

    assert noised.exact.auc.auc is None and noised.exact.auc.reason is not None
    assert note.epsilon == 0.5
    # One case moves 3 totals, 1 confusion cell (one threshold), 2 histogram bins, 2
    # calibration counts (Δ_int = 8) and 2 bounded sums (Δ_float = 2): b = 10 / ε.
    assert note.noise_scale == pytest.approx(10 / 0.5)


def test_unapproved_protocol_is_refused_before_any_computation(tmp_path: Path) -> None:
    """A protocol the site never approved is declined and logged with its hash."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.data.unlink()  # had the handler run, it would decline for missing data instead

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.PROTOCOL_NOT_APPROVED)
    (entry,) = site.entries()
    assert entry["protocol_hash"] == protocol.content_hash()
    assert entry["reason"] == "protocol_not_approved"


def test_protocol_edited_after_approval_is_refused(tmp_path: Path) -> None:
    """Adding a subgroup after approval changes the hash; the edited protocol is declined."""
    site = _Site(tmp_path / "fernbrook", _policy())
    approved = _protocol(histogram_edges=uniform_edges(10))
    site.approve(approved)
    edited = _protocol(histogram_edges=uniform_edges(10), subgroups=("sex",))

    (reply,) = _ask(site, edited)

    _declined_with(reply, RefusalCode.PROTOCOL_CHANGED)
    assert site.entries()[-1]["reason"] == "protocol_changed_since_approval"


def test_request_whose_hash_does_not_match_its_protocol_is_refused(tmp_path: Path) -> None:
    """An approved hash attached to a different protocol text is declined as changed."""
    site = _Site(tmp_path / "fernbrook", _policy())
    approved = _protocol(histogram_edges=uniform_edges(10))
    site.approve(approved)
    other = _protocol(histogram_edges=uniform_edges(1000))

    (reply,) = _ask(site, other, protocol_hash=approved.content_hash())

    _declined_with(reply, RefusalCode.PROTOCOL_CHANGED)


def test_operation_not_in_policy_is_refused(tmp_path: Path) -> None:
    """A site that allows only monitoring declines an evaluation."""
    site = _Site(tmp_path / "fernbrook", _policy(allowed_operations=(Operation.MONITOR,)))
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.OPERATION_NOT_ALLOWED)


def test_subgroup_attribute_not_in_policy_is_refused(tmp_path: Path) -> None:
    """A protocol asking for a subgroup attribute the site did not allow is declined."""
    site = _Site(tmp_path / "fernbrook", _policy(allowed_subgroup_attributes=("sex",)))
    protocol = _protocol(histogram_edges=uniform_edges(10), subgroups=("ward",))
    site.approve(protocol)

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED)


def test_coordinator_not_in_policy_is_refused(tmp_path: Path) -> None:
    """A run naming a coordinator the policy does not list is declined."""
    site = _Site(tmp_path / "fernbrook", _policy(allowed_coordinators=("tidewater-consortium",)))
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)

    (reply,) = _ask(site, protocol, run_config={COORDINATOR_NAME_KEY: "unknown-lab"})

    _declined_with(reply, RefusalCode.COORDINATOR_NOT_ALLOWED)


def test_site_without_policy_declines_everything(tmp_path: Path) -> None:
    """A node configured without a policy file fails closed."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)
    site.policy_path.unlink()

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.POLICY_UNAVAILABLE)


def _leaky_app(raise_it: bool) -> ClientApp:
    """Return a ClientApp whose handler fails with a message that quotes a patient identifier."""
    app = ClientApp(mods=[disclosure_mod])

    @app.evaluate(SITE_ACTION)
    def leaky(msg: Message, context: Context) -> Message:
        if raise_it:
            raise RuntimeError(f"patient {SECRET} has score 0.8731")
        reply = SiteReply(
            site=SITE,
            request_id="r",
            status=ReplyStatus.DECLINED,
            reason=f"PredictionsError: patient {SECRET} has score 0.8731",
            error_class="PredictionsError",
        )
        return Message(encode_reply(reply), reply_to=msg)

    return app


@pytest.mark.parametrize(
    ("raise_it", "code"),
    [(True, RefusalCode.SITE_ERROR), (False, RefusalCode.SITE_DATA_INVALID)],
)
def test_error_text_carrying_a_data_value_never_leaves_the_site(
    tmp_path: Path, raise_it: bool, code: RefusalCode
) -> None:
    """An exception or decline quoting patient data leaves only as a fixed reason code."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)

    (reply,) = _ask(site, protocol, client=_leaky_app(raise_it))

    _declined_with(reply, code)
    assert not reply.has_error()
    wire_text = json.dumps(
        {k: dict(v) for k, v in reply.content.config_records.items()}, default=str
    )
    assert SECRET not in wire_text and "0.8731" not in wire_text
    assert SECRET not in site.ledger.read_text()
    assert site.entries()[-1]["reason"] == code.value


def test_apply_policy_refuses_disallowed_subgroups_in_a_release(tmp_path: Path) -> None:
    """apply_policy itself refuses a release holding a subgroup attribute not allowed."""
    site = _Site(tmp_path / "fernbrook", _policy(allowed_subgroup_attributes=()))
    release = _direct_release(
        site, _protocol(histogram_edges=uniform_edges(10), subgroups=("sex",))
    )

    with pytest.raises(DisclosureRefused, match="subgroup_attribute_not_allowed"):
        apply_policy(release, site.policy)


def test_reasked_release_is_the_ledgered_one_and_charged_once(tmp_path: Path) -> None:
    """Round 1 asked three times under DP: one noisy draw, sent three times, ε charged once."""
    privacy = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    protocol = _protocol(histogram_edges=uniform_edges(10)).model_copy(update={"rounds": 2})
    site.approve(protocol)

    replies = _ask(site, protocol, rounds=[1, 1, 1, 2])

    answers = [decode_reply(r.content) for r in replies]
    first = answers[0]  # released, or declined on noisy counts (charged): either is repeated
    for again in answers[1:3]:
        assert again.request_id != first.request_id  # addressed to the new request
        assert again == first.model_copy(update={"request_id": again.request_id})
    receipts = [read_disclosure(r)[1:] for r in replies]
    assert receipts[1] == receipts[2] == receipts[0]  # the first answer's ledger receipt
    entries = ReleaseLedger(site.ledger).entries()
    assert [e.epsilon_spent for e in entries] == [0.5, 0.0, 0.0, 0.5]
    assert [e.released.get("repeat_of") for e in entries] == [None, 1, 1, None]  # type: ignore[union-attr]
    assert verify_ledger(site.ledger).ok


def test_reask_after_budget_is_spent_still_gets_the_first_answer(tmp_path: Path) -> None:
    """With the budget spent by rounds 1 and 2, round 1 asked again is still answered."""
    privacy = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    protocol = _protocol(histogram_edges=uniform_edges(10)).model_copy(update={"rounds": 3})
    site.approve(protocol)

    replies = _ask(site, protocol, rounds=[1, 2, 3, 1])

    _declined_with(replies[2], RefusalCode.PRIVACY_BUDGET_EXHAUSTED)
    assert decode_reply(replies[3].content) == decode_reply(replies[0].content).model_copy(
        update={"request_id": decode_reply(replies[3].content).request_id}
    )
    assert sum(e.epsilon_spent for e in ReleaseLedger(site.ledger).entries()) == 1.0


def test_uncharged_decline_is_decided_again_when_reasked(tmp_path: Path) -> None:
    """A decline that cost nothing (data missing) is not repeated: fixed data is released."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)
    table = site.data.read_text()
    site.data.unlink()

    (first,) = _ask(site, protocol)
    site.data.write_text(table)
    (second,) = _ask(site, protocol)

    assert decode_reply(first.content).status is ReplyStatus.DECLINED
    assert decode_reply(second.content).status is ReplyStatus.RELEASED


def test_reask_on_changed_data_is_answered_afresh_and_charged(tmp_path: Path) -> None:
    """Round 1 asked again after the table changed is a new question: a new draw, charged."""
    privacy = PrivacySettings(enabled=True, study_epsilon=2.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)

    _ask(site, protocol)
    _write_table(site.data, seed=6)  # the same cases' labels and scores, revised
    _ask(site, protocol)

    entries = ReleaseLedger(site.ledger).entries()
    assert [e.epsilon_spent for e in entries] == [0.5, 0.5]
    assert entries[0].request_key != entries[1].request_key


def test_a_tampered_ledger_makes_the_privacy_budget_check_refuse(tmp_path: Path) -> None:
    """Lowering a spent ε in the ledger is caught: the next request is declined, unspent."""
    privacy = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.5)
    site = _Site(tmp_path / "fernbrook", _policy(privacy=privacy))
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)
    _ask(site, protocol, times=2)
    lines = site.ledger.read_text().splitlines()
    # The attack: make the budget look unspent so more releases would pass the check.
    site.ledger.write_text(
        "".join(line.replace('"epsilon_spent":0.5', '"epsilon_spent":0.0') + "\n" for line in lines)
    )

    (reply,) = _ask(site, protocol)

    _declined_with(reply, RefusalCode.LEDGER_UNVERIFIED)
    assert site.entries()[-1]["reason"] == "ledger_unverified"
    assert site.entries()[-1]["epsilon_spent"] == 0.0


# ----------------------------------------------------------------- earlier releases


def test_attack_rerun_after_adding_one_case_is_declined_by_the_gate(tmp_path: Path) -> None:
    """The same protocol after one case was added: the second reply is declined."""
    site = _Site(tmp_path / "fernbrook", _policy())
    protocol = _protocol(histogram_edges=uniform_edges(10))
    site.approve(protocol)
    (first,) = _ask(site, protocol, times=1)
    assert decode_reply(first.content).status is ReplyStatus.RELEASED
    with site.data.open("a") as table:
        table.write("c999,p999,1,0.930000,female,no,no,general\n")

    (second,) = _ask(site, protocol)

    _declined_with(second, RefusalCode.RELEASE_DIFFERENCE_BELOW_MIN_CELL)
    history = (site.ledger.parent / (site.ledger.name + ".history.jsonl")).read_text()
    assert len(history.splitlines()) == 1
