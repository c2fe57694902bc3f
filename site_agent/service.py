"""The site's request handler: check a request, score and evaluate locally, answer.

This module knows nothing of Flower: :func:`answer` takes a decoded
:class:`~site_agent.contract.wire.SiteRequest` and returns a
:class:`~site_agent.contract.wire.SiteReply`.
It never raises. Any failure becomes a ``declined`` reply whose reason is scrubbed
(:func:`declined_reply`): our own errors are written without values from a site's data and
are forwarded; any other exception is reported only by its class and a fixed text. The full
error, with its traceback, goes to the site's own log and nowhere else.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from site_agent.contract.adaptation_release import AdaptationRelease
from site_agent.contract.node_config import (
    DATA_PATH_KEY,
    IMAGE_CONFIG_KEY,
    LEDGER_PATH_KEY,
    POLICY_PATH_KEY,
    SITE_NAME_KEY,
)
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import (
    MAX_REASON_CHARS,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    TimeWindow,
)
from site_agent.data.predictions import Predictions, validate_predictions
from site_agent.evaluation import evaluate_site
from site_agent.exceptions import (
    BundleError,
    EmptyWindowError,
    InputError,
    ProtocolError,
    SitepoolError,
)

logger = logging.getLogger(__name__)


_UNEXPECTED = "the site agent failed unexpectedly; details are in the site's own log"

SUPPORTED_OPERATIONS: tuple[Operation, ...] = (
    Operation.EVALUATE,
    Operation.MONITOR,
    Operation.FINE_TUNE,
)


class SiteSettings(BaseModel):
    """Where a site agent finds its data and its rules (from a SuperNode's ``node_config``)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    site: str = Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9._ -]+$")
    data_path: Path
    policy_path: Path | None = None
    ledger_path: Path | None = None
    image_config_path: Path | None = None

    @classmethod
    def from_node_config(cls, node_config: Mapping[str, bool | int | float | str]) -> SiteSettings:
        """Build settings from ``site-name``, ``data-path``, ``policy-path``, ``ledger-path``.

        Raises
        ------
        InputError
            If a key is missing or a value is invalid.
        """
        keys = {
            "site": SITE_NAME_KEY,
            "data_path": DATA_PATH_KEY,
            "policy_path": POLICY_PATH_KEY,
            "ledger_path": LEDGER_PATH_KEY,
            "image_config_path": IMAGE_CONFIG_KEY,
        }
        values = {
            field: str(node_config[key])
            for field, key in keys.items()
            if key in node_config and str(node_config[key]) != ""
        }
        try:
            return cls.model_validate(values)
        except ValidationError as exc:
            first = exc.errors()[0]
            key = keys.get(str(first["loc"][0]), "?") if first["loc"] else "?"
            raise InputError(f"invalid node configuration: {key}: {first['msg']}") from exc

    def to_node_config(self) -> dict[str, str]:
        """Return the ``node_config`` that :meth:`from_node_config` reads back."""
        config = {SITE_NAME_KEY: self.site, DATA_PATH_KEY: str(self.data_path)}
        if self.policy_path is not None:
            config[POLICY_PATH_KEY] = str(self.policy_path)
        if self.ledger_path is not None:
            config[LEDGER_PATH_KEY] = str(self.ledger_path)
        if self.image_config_path is not None:
            config[IMAGE_CONFIG_KEY] = str(self.image_config_path)
        return config


def answer(
    request: SiteRequest,
    bundle: bytes | None,
    settings: SiteSettings,
    weights: Mapping[str, np.ndarray] | None = None,
) -> SiteReply:
    """Answer one request: verify it, score the site's table if needed, evaluate, release.

    A ``fine_tune`` request is answered by :func:`_fine_tune` instead: fine-tuning on the
    plan's grid, or, when ``weights`` came with the request, measuring those weights.
    Never raises: any error becomes a ``declined`` reply (see :func:`declined_reply`).
    """
    return answer_with_update(request, bundle, settings, weights)[0]


def answer_with_update(
    request: SiteRequest,
    bundle: bytes | None,
    settings: SiteSettings,
    weights: Mapping[str, np.ndarray] | None = None,
) -> tuple[SiteReply, dict[str, np.ndarray] | None]:
    """Like :func:`answer`, and also the site-local update when the request asks for one.

    The update (fine-tuned minus initial weights,
    :func:`site_agent.training.local_training.local_update`)
    is returned raw: whether and how it may leave is the disclosure gate's decision.
    Never raises; a declined reply comes with no update.
    """
    update: dict[str, np.ndarray] | None = None
    try:
        if request.operation is Operation.FINE_TUNE:
            adaptation, update = _fine_tune(request, bundle, settings, weights)
            reply = SiteReply(
                site=settings.site,
                request_id=request.request_id,
                status=ReplyStatus.RELEASED,
                adaptation=adaptation,
            )
            return reply, update
        release = _evaluate(request, bundle, settings)
    except Exception as exc:  # every failure must become a scrubbed decline
        return declined_reply(settings.site, request.request_id, exc), None
    reply = SiteReply(
        site=settings.site,
        request_id=request.request_id,
        status=ReplyStatus.RELEASED,
        release=release,
    )
    return reply, None


def declined_reply(site: str, request_id: str, exc: BaseException) -> SiteReply:
    """Return a ``declined`` reply for ``exc``, logging the full error locally.

    The reason is the error's class and, for our own errors (written without values from
    the site's data), their message; for any other exception a fixed text, never ``str(exc)``.
    """
    logger.error("site %s declined request %s", site, request_id or "(unreadable)", exc_info=exc)
    name = type(exc).__name__
    detail = str(exc) if isinstance(exc, SitepoolError) else _UNEXPECTED
    reason = f"{name}: {detail}"
    if len(reason) > MAX_REASON_CHARS:
        reason = reason[: MAX_REASON_CHARS - 3] + "..."
    return SiteReply(
        site=site,
        request_id=request_id,
        status=ReplyStatus.DECLINED,
        reason=reason,
        error_class=name,
    )


def _evaluate(request: SiteRequest, bundle: bytes | None, settings: SiteSettings) -> SiteRelease:
    protocol = _checked_protocol(request)
    frame = site_table(settings)
    if "score" not in frame.columns:
        frame = _scored(frame, protocol, bundle)
    predictions = validate_predictions(frame)
    if request.window is not None:
        predictions = window_predictions(predictions, request.window)
    mix = protocol.monitoring.mix_attributes if protocol.monitoring is not None else ()
    return evaluate_site(
        predictions,
        protocol.evaluation,
        site=settings.site,
        protocol_hash=request.protocol_hash,
        mix_attributes=mix if request.operation is Operation.MONITOR else (),
    )


def _fine_tune(
    request: SiteRequest,
    bundle: bytes | None,
    settings: SiteSettings,
    weights: Mapping[str, np.ndarray] | None,
) -> tuple[AdaptationRelease, dict[str, np.ndarray] | None]:
    """Fine-tune on the protocol's grid, or measure the weights sent; test set only."""
    protocol = _checked_protocol(request)
    if protocol.model is None or protocol.adaptation is None:
        raise ProtocolError("fine_tune needs a protocol that names a model and an adaptation plan")
    if bundle is None:
        raise BundleError("a fine_tune request came without the model bundle")
    if request.return_update and weights is not None:
        raise ProtocolError("only site-local fine-tuning returns an update, not sent weights")
    # Imported here: torch costs seconds to import, and sites with scores never need it.
    from site_agent.training.local_training import (
        adapt_site,
        evaluate_state,
        local_data,
        local_update,
    )
    from site_agent.training.model_bundle import load_bundle

    model = load_bundle(bundle, expected_sha256=protocol.model.sha256)
    data = local_data(site_table(settings), model, protocol.adaptation)
    thresholds = protocol.evaluation.thresholds
    if weights is not None:
        measured = evaluate_state(
            data,
            model,
            weights,
            thresholds,
            site=settings.site,
            protocol_hash=request.protocol_hash,
        )
        return measured, None
    release = adapt_site(
        data,
        model,
        protocol.adaptation,
        thresholds,
        site=settings.site,
        protocol_hash=request.protocol_hash,
    )
    update = dict(local_update(data, model, protocol.adaptation)) if request.return_update else None
    return release, update


def site_table(settings: SiteSettings) -> pd.DataFrame:
    """Read the site's table; an image manifest gets its images checked and attributes mapped.

    Raises
    ------
    InputError
        If the table, an image path or the image configuration is invalid.
    """
    from site_agent.data.images import ImageSiteConfig, load_site_table

    config = (
        None
        if settings.image_config_path is None
        else ImageSiteConfig.load(settings.image_config_path)
    )
    return load_site_table(settings.data_path, config)


def window_predictions(predictions: Predictions, window: TimeWindow) -> Predictions:
    """Return the cases acquired in ``[window.start, window.end)``.

    Cases without an acquisition date are in no window.

    Raises
    ------
    InputError
        If the table has no ``acquired_on`` column.
    EmptyWindowError
        If no case falls in the window (declined rather than released empty).
    """
    if predictions.acquired_on is None:
        raise InputError("a windowed request needs an acquired_on column in the site's table")
    dates = predictions.acquired_on.astype("datetime64[D]")
    start, end = np.datetime64(window.start, "D"), np.datetime64(window.end, "D")
    inside = (dates >= start) & (dates < end)
    if not inside.any():
        raise EmptyWindowError("the requested time window holds no case at this site")
    return predictions.subset(inside)


def _checked_protocol(request: SiteRequest) -> StudyProtocol:
    protocol = StudyProtocol.from_json(request.protocol_json)
    if protocol.content_hash() != request.protocol_hash:
        raise ProtocolError("the protocol sent does not match its content hash")
    if request.operation not in protocol.operations:
        raise ProtocolError(f"operation {request.operation} is not in the study protocol")
    if request.operation not in SUPPORTED_OPERATIONS:
        raise ProtocolError(f"operation {request.operation} is not supported by this site agent")
    if request.round_number > protocol.rounds:
        raise ProtocolError("round number exceeds the rounds the protocol allows")
    if request.operation is Operation.MONITOR and request.window is None:
        raise ProtocolError("a monitoring request must name a time window")
    return protocol


def _scored(frame: pd.DataFrame, protocol: StudyProtocol, bundle: bytes | None) -> pd.DataFrame:
    """Add the model's ``score`` column to a table that has features but no scores."""
    if protocol.model is None:
        raise ProtocolError("the table has no score column and the protocol names no model")
    if bundle is None:
        raise BundleError("the table has no score column and no model bundle was sent")
    # Imported here: torch costs seconds to import, and sites with scores never need it.
    from site_agent.training.model_bundle import load_bundle

    model = load_bundle(bundle, expected_sha256=protocol.model.sha256)
    return frame.assign(score=model.predict(frame))
