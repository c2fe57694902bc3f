"""The gate for weight updates: what a site sends back to Flower's federated strategies.

Flower's strategies (``FedAvg``, ``FedProx``) send ``train`` messages holding the global
weights (an ``ArrayRecord``) and a ``ConfigRecord`` into which the coordinator puts our
:class:`~site_agent.wire.SiteRequest` (operation ``fine_tune``) and the model bundle.
:func:`update_disclosure` is called by :func:`site_agent.disclosure.disclosure_mod` for
every such message, so updates pass the same gate as every other reply:

1. the request is checked as any other (:func:`site_agent.disclosure.check_request`):
   coordinator, approved protocol, and the site's policy must allow ``fine_tune``, which
   is how the site's policy decides whether it takes part;
2. when the protocol asks for noise on updates, Flower's ``LocalDpMod`` clips the update
   to the plan's norm and adds Gaussian noise before anything leaves; a site whose policy
   turns differential privacy on declines an update without such noise;
3. the reply may hold exactly one ``ArrayRecord`` and one ``MetricRecord`` with only
   ``num-examples``, which must not be a small count;
4. the release (round, number of examples, parameter count, SHA-256 of the update) or
   the refusal is written to the site's ledger. A refusal leaves as a Flower ``Error``
   with code :data:`DECLINED_ERROR_CODE` and one of our fixed reason texts, which the
   strategy counts as a failure and leaves out of the aggregate.

What this does not do: an update is a function of every training case, and without noise
nothing bounds what it reveals. Secure aggregation is not used (see the project's notes).
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Callable
from pathlib import Path

from flwr.app import ArrayRecord, ConfigRecord, Context, Error, Message, MetricRecord, RecordDict
from flwr.clientapp.mod import LocalDpMod
from pydantic import JsonValue

from site_agent.disclosure import (
    COORDINATOR_NAME_KEY,
    RefusalCode,
    check_request,
    refusal_reason,
)
from site_agent.exceptions import DisclosureRefused, ProtocolError
from site_agent.ledger import Outcome, ReleaseLedger
from site_agent.policy import SitePolicy
from site_agent.protocol import Operation, StudyProtocol
from site_agent.service import LEDGER_PATH_KEY, POLICY_PATH_KEY, SITE_NAME_KEY, UNNAMED_SITE
from site_agent.wire import SiteRequest

logger = logging.getLogger(__name__)

TRAIN_CONFIG = "config"
TRAIN_ARRAYS = "arrays"
TRAIN_METRICS = "metrics"
"""Record names Flower's strategies use in train messages and expect in replies."""
NUM_EXAMPLES = "num-examples"
PROXIMAL_MU = "proximal-mu"
SERVER_ROUND = "server-round"
REQUEST_KEY = "sitepool-request"
BUNDLE_KEY = "sitepool-bundle"
"""Keys of the train ConfigRecord that carry our request and the model bundle."""
UPDATE_RECORD = "sitepool.update"
"""ConfigRecord beside an update: the site's name and its ledger receipt."""
DECLINED_ERROR_CODE = 4100
"""Flower ``Error`` code of an update a site declined (ours, outside Flower's codes)."""


def train_config(request: SiteRequest, bundle: bytes) -> ConfigRecord:
    """Return the ConfigRecord a coordinator hands a strategy as its ``train_config``."""
    return ConfigRecord({REQUEST_KEY: request.model_dump_json(), BUNDLE_KEY: bundle})


def read_train_request(content: RecordDict) -> tuple[SiteRequest, bytes]:
    """Return the request and bundle of a train message.

    Raises
    ------
    ProtocolError
        If the message does not carry a well-formed request and bundle.
    """
    if TRAIN_CONFIG not in content.config_records:
        raise ProtocolError("malformed train message: no config record")
    config = content.config_records[TRAIN_CONFIG]
    text, bundle = config.get(REQUEST_KEY), config.get(BUNDLE_KEY)
    if not isinstance(text, str) or not isinstance(bundle, bytes):
        raise ProtocolError("malformed train message: no sitepool request or bundle")
    try:
        request = SiteRequest.model_validate_json(text)
    except ValueError as exc:
        raise ProtocolError("malformed train message: the request does not validate") from exc
    return request, bundle


def update_digest(arrays: ArrayRecord) -> str:
    """Return the SHA-256 of an update's parameter names and bytes (for the ledger)."""
    digest = hashlib.sha256()
    for name, array in arrays.items():
        digest.update(name.encode())
        digest.update(array.numpy().tobytes())
    return digest.hexdigest()


def update_disclosure(
    msg: Message, context: Context, call_next: Callable[[Message, Context], Message]
) -> Message:
    """Gate one train message and its reply (see module doc). Never raises."""
    site = (str(context.node_config.get(SITE_NAME_KEY, "")) or UNNAMED_SITE)[:80]
    ledger: ReleaseLedger | None = None
    request: SiteRequest | None = None
    study_id: str | None = None
    try:
        policy_path = str(context.node_config.get(POLICY_PATH_KEY, ""))
        ledger_path = str(context.node_config.get(LEDGER_PATH_KEY, ""))
        if not policy_path or not ledger_path:
            raise DisclosureRefused(RefusalCode.POLICY_UNAVAILABLE.value)
        ledger = ReleaseLedger(Path(ledger_path))
        try:
            policy = SitePolicy.load(Path(policy_path))
        except Exception as exc:
            raise DisclosureRefused(RefusalCode.POLICY_UNAVAILABLE.value) from exc
        try:
            request, _ = read_train_request(msg.content)
        except Exception as exc:
            raise DisclosureRefused(RefusalCode.REQUEST_UNREADABLE.value) from exc
        if request.operation is not Operation.FINE_TUNE:
            raise DisclosureRefused(RefusalCode.PROTOCOL_INVALID.value)
        coordinator = context.run_config.get(COORDINATOR_NAME_KEY)
        protocol = check_request(
            request, policy, coordinator=None if coordinator is None else str(coordinator)
        )
        study_id = protocol.study_id
        reply = _call(msg, context, call_next, protocol, policy)
        if reply.has_error():
            raise DisclosureRefused(RefusalCode.SITE_ERROR.value)
        released = _checked_update(reply, policy, msg)
        entry = ledger.append(
            outcome=Outcome.RELEASED,
            study_id=study_id,
            protocol_hash=request.protocol_hash,
            operation=Operation.FINE_TUNE.value,
            released=released,
        )
        reply.content[UPDATE_RECORD] = ConfigRecord(
            {"site": site, "ledger_sequence": entry.sequence, "ledger_entry_hash": entry.entry_hash}
        )
        return reply
    except Exception as exc:  # every failure is declined with a fixed reason code only
        code = _code(exc)
        logger.error("site %s declined a weight update: %s", site, code.value, exc_info=exc)
        if ledger is not None:
            try:
                ledger.append(
                    outcome=Outcome.DECLINED,
                    study_id=study_id,
                    protocol_hash=request.protocol_hash if request is not None else None,
                    operation=Operation.FINE_TUNE.value,
                    reason=code.value,
                )
            except Exception as failure:  # the decline is sent even if the ledger fails
                logger.error("site %s could not ledger a decline", site, exc_info=failure)
        return Message(Error(code=DECLINED_ERROR_CODE, reason=refusal_reason(code)), reply_to=msg)


def _call(
    msg: Message,
    context: Context,
    call_next: Callable[[Message, Context], Message],
    protocol: StudyProtocol,
    policy: SitePolicy,
) -> Message:
    plan = protocol.adaptation
    if plan is None:
        raise DisclosureRefused(RefusalCode.PROTOCOL_INVALID.value)
    noise = plan.update_noise
    if noise is None:
        if policy.privacy.enabled:
            raise DisclosureRefused(RefusalCode.NOT_COVERED_BY_PRIVACY.value)
        return call_next(msg, context)
    mod = LocalDpMod(noise.clipping_norm, noise.sensitivity, noise.epsilon, noise.delta)
    return mod(msg, context, call_next)


def _checked_update(reply: Message, policy: SitePolicy, msg: Message) -> dict[str, JsonValue]:
    content = reply.content
    if set(content.array_records) != {TRAIN_ARRAYS} or set(content.metric_records) != {
        TRAIN_METRICS
    }:
        raise DisclosureRefused(RefusalCode.SITE_ERROR.value)
    metrics: MetricRecord = content.metric_records[TRAIN_METRICS]
    n = metrics.get(NUM_EXAMPLES)
    if set(metrics) != {NUM_EXAMPLES} or not isinstance(n, int):
        raise DisclosureRefused(RefusalCode.CASE_LEVEL_OUTPUT.value)
    if 0 < n < policy.min_cell:
        raise DisclosureRefused(RefusalCode.TOTAL_BELOW_MIN_CELL.value)
    arrays = content.array_records[TRAIN_ARRAYS]
    config = msg.content.config_records.get(TRAIN_CONFIG)
    server_round = config.get(SERVER_ROUND) if config is not None else None
    return {
        "round": server_round if isinstance(server_round, int) else None,
        NUM_EXAMPLES: n,
        "parameters": int(sum(a.numpy().size for a in arrays.values())),
        "update_sha256": update_digest(arrays),
    }


def _code(exc: BaseException) -> RefusalCode:
    if isinstance(exc, DisclosureRefused):
        try:
            return RefusalCode(exc.reason)
        except ValueError:
            return RefusalCode.SITE_ERROR
    return RefusalCode.SITE_ERROR
