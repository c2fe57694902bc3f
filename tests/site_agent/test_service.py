"""The site's request handler, without Flower.

References: a release is checked against ``evaluate_site`` called directly on the site's
file (and, for a table without scores, against ``load_bundle(...).predict`` run directly);
the invented hospitals and numbers are for tests only.
"""

from __future__ import annotations

import logging
import uuid
from pathlib import Path

import numpy as np
import pytest
import torch

from site_agent.contract.protocol import (
    EvaluationPlan,
    ModelReference,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.contract.wire import ReplyStatus, SiteRequest
from site_agent.data.predictions import load_predictions, read_table, validate_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import InputError
from site_agent.service import SiteSettings, answer, declined_reply
from site_agent.training.model_bundle import BundleManifest, build_model, bundle_bytes, load_bundle

PLAN = EvaluationPlan(thresholds=(0.4, 0.6), histogram_edges=uniform_edges(10))


def _table(path: Path, *, with_scores: bool, seed: int = 3, n: int = 40) -> Path:
    rng = np.random.default_rng(seed)
    label = (rng.random(n) < 0.5).astype(int)
    x1 = rng.normal(label, 1.0)
    x2 = rng.normal(0.0, 1.0, n)
    score = 1 / (1 + np.exp(-x1))
    head = "case_id,patient_id,label," + ("score" if with_scores else "feature_x1,feature_x2")
    rows = [
        f"k{i},q{i // 2},{label[i]}," + (f"{score[i]:.6f}" if with_scores else f"{x1[i]},{x2[i]}")
        for i in range(n)
    ]
    path.write_text(head + "\n" + "\n".join(rows) + "\n")
    return path


def _bundle() -> bytes:
    torch.manual_seed(0)
    model = build_model("logistic", 2)
    manifest = BundleManifest(
        name="invented-nodule-net",
        architecture="logistic",
        feature_names=("feature_x1", "feature_x2"),
        feature_means=(0.5, 0.0),
        feature_sds=(1.1, 1.0),
    )
    return bundle_bytes(model, manifest)


def _protocol(bundle: bytes | None = None, **changes: object) -> StudyProtocol:
    model = None
    if bundle is not None:
        digest = load_bundle(bundle).sha256
        model = ModelReference(name="invented-nodule-net", architecture="logistic", sha256=digest)
    protocol = StudyProtocol(study_id="wren-valley-2032", title="Invented", model=model)
    return protocol.model_copy(update={"evaluation": PLAN, **changes})


def _request(protocol: StudyProtocol, **changes: object) -> SiteRequest:
    fields: dict[str, object] = {
        "operation": Operation.EVALUATE,
        "protocol_json": protocol.canonical_json(),
        "protocol_hash": protocol.content_hash(),
        "round_number": 1,
        "request_id": uuid.uuid4().hex,
    }
    fields.update(changes)
    return SiteRequest.model_validate(fields)


def test_answer_releases_what_evaluate_site_computes(tmp_path: Path) -> None:
    """A site with scores releases exactly the direct evaluation of its file."""
    settings = SiteSettings(
        site="wren-valley", data_path=_table(tmp_path / "t.csv", with_scores=True)
    )
    protocol = _protocol()
    request = _request(protocol)

    reply = answer(request, None, settings)

    assert reply.status is ReplyStatus.RELEASED
    assert reply.request_id == request.request_id
    assert reply.release == evaluate_site(
        load_predictions(settings.data_path),
        PLAN,
        site="wren-valley",
        protocol_hash=protocol.content_hash(),
    )


def test_answer_scores_a_feature_table_with_the_verified_bundle(tmp_path: Path) -> None:
    """Without a score column the site runs the bundle; the release equals the direct run."""
    table = _table(tmp_path / "f.csv", with_scores=False)
    bundle = _bundle()
    protocol = _protocol(bundle)
    settings = SiteSettings(site="wren-valley", data_path=table)

    reply = answer(_request(protocol), bundle, settings)

    frame = read_table(table)
    frame["score"] = load_bundle(bundle).predict(frame)
    direct = evaluate_site(
        validate_predictions(frame), PLAN, site="wren-valley", protocol_hash=protocol.content_hash()
    )
    assert reply.status is ReplyStatus.RELEASED
    assert reply.release == direct


def test_bundle_that_fails_the_protocol_hash_is_declined(tmp_path: Path) -> None:
    """A bundle whose SHA-256 differs from the protocol's model reference is refused."""
    bundle = _bundle()
    protocol = _protocol(bundle)
    settings = SiteSettings(
        site="wren-valley", data_path=_table(tmp_path / "f.csv", with_scores=False)
    )

    reply = answer(_request(protocol), bundle + b"tampered", settings)

    assert reply.status is ReplyStatus.DECLINED
    assert reply.error_class == "BundleError"


def test_feature_table_without_bundle_is_declined(tmp_path: Path) -> None:
    """A table without scores and a request without bundle cannot be evaluated."""
    protocol = _protocol(_bundle())
    settings = SiteSettings(
        site="wren-valley", data_path=_table(tmp_path / "f.csv", with_scores=False)
    )

    reply = answer(_request(protocol), None, settings)

    assert reply.error_class == "BundleError"
    assert reply.reason is not None and "no model bundle was sent" in reply.reason


@pytest.mark.parametrize(
    ("changes", "match"),
    [
        ({"protocol_hash": "0" * 64}, "does not match its content hash"),
        ({"operation": Operation.FINE_TUNE}, "not in the study protocol"),
        ({"round_number": 2}, "round number exceeds"),
    ],
)
def test_request_failing_protocol_checks_is_declined(
    tmp_path: Path, changes: dict[str, object], match: str
) -> None:
    """A protocol that does not match its hash, or asks beyond itself, is refused."""
    settings = SiteSettings(
        site="wren-valley", data_path=_table(tmp_path / "t.csv", with_scores=True)
    )

    reply = answer(_request(_protocol(), **changes), None, settings)

    assert reply.status is ReplyStatus.DECLINED
    assert reply.error_class == "ProtocolError"
    assert reply.reason is not None and match in reply.reason


def test_broken_table_is_declined_without_any_value_from_it(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """The decline names the fault but quotes no cell; the full error goes to the local log."""
    table = tmp_path / "broken.csv"
    table.write_text(
        "case_id,patient_id,label,score\nMRN-5521,PT-0042,1,0.9\nMRN-5522,PT-0042,2,0.8\n"
    )
    settings = SiteSettings(site="wren-valley", data_path=table)

    with caplog.at_level(logging.ERROR, logger="site_agent.service"):
        reply = answer(_request(_protocol()), None, settings)

    assert reply.status is ReplyStatus.DECLINED
    assert reply.error_class == "PredictionsError"
    assert reply.reason is not None
    assert not any(v in reply.reason for v in ("MRN-55", "PT-0042", "0.8", "0.9"))
    assert caplog.records and caplog.records[0].exc_info is not None


def test_foreign_exception_text_never_reaches_the_reason() -> None:
    """Only our own errors' messages are forwarded; any other is reduced to its class."""
    leaky = KeyError("patient PT-0042 has score 0.91")

    reply = declined_reply("wren-valley", "r1", leaky)

    assert reply.reason is not None and reply.reason.startswith("KeyError: ")
    assert "PT-0042" not in reply.reason and "0.91" not in reply.reason


def test_settings_round_trip_through_node_config(tmp_path: Path) -> None:
    """Settings written as a SuperNode node_config read back equal."""
    settings = SiteSettings(
        site="wren-valley",
        data_path=tmp_path / "t.csv",
        policy_path=tmp_path / "policy.json",
        ledger_path=tmp_path / "ledger.jsonl",
    )

    assert SiteSettings.from_node_config(settings.to_node_config()) == settings


def test_node_config_without_data_path_raises_input_error() -> None:
    """A node configured without a data path is refused, naming the missing key."""
    with pytest.raises(InputError, match="data-path"):
        SiteSettings.from_node_config({"site-name": "wren-valley"})
