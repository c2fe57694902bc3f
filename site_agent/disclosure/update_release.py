"""The gate for weight updates: what a site sends back to Flower's federated strategies.

Flower's strategies (``FedAvg``, ``FedProx``) send ``train`` messages holding the global
weights (an ``ArrayRecord``) and a ``ConfigRecord`` into which the coordinator puts our
:class:`~site_agent.contract.wire.SiteRequest` (operation ``fine_tune``) and the model bundle.
:func:`update_disclosure` is called by :func:`site_agent.disclosure.gate.disclosure_mod` for
every such message, so updates pass the same gate as every other reply:

1. the request is checked as any other
   (:func:`site_agent.disclosure.request_check.check_request`):
   coordinator, approved protocol, and the site's policy must allow ``fine_tune``;
2. a federated reply *is* a weight update, so the policy must also allow updates
   (``updates.allowed``, off by default). Taking part needs both settings;
3. noise on updates (:func:`update_noise`): the policy's ``updates.noise`` if it sets one,
   else the protocol's ``update_noise``. With either, Flower's ``LocalDpMod`` clips the
   update (released minus received weights) to ``clipping_norm`` in L2 norm and adds
   Gaussian noise of standard deviation :func:`noise_std` to every weight before anything
   leaves; a site whose policy turns differential privacy on declines an update without
   such noise;
4. the reply may hold exactly one ``ArrayRecord`` and one ``MetricRecord`` with only
   ``num-examples``, which must not be a small count, and no ``ConfigRecord``;
5. the noisy update's epsilon is charged to the study's budget at the site
   (``privacy.study_epsilon``, sequential composition over the ledger); over budget, the
   update is declined and nothing is charged;
6. the release (round, number of examples, parameter count, SHA-256 of the released
   weights, L2 norm of the released update, noise settings) or the refusal is written to
   the site's ledger. A refusal leaves as a Flower ``Error`` with code
   :data:`DECLINED_ERROR_CODE` and one of our fixed reason texts, which the strategy counts
   as a failure and leaves out of the aggregate.

A site-local update (requested beside fine-tuning metrics, ``SiteRequest.return_update``)
passes the same steps 2, 3, 5 and 6 in :func:`site_agent.disclosure.gate.disclosure_mod` by
:func:`released_local_update` and :func:`charge_update`; there the clipping and noise are
Flower's own functions that ``LocalDpMod`` applies, on an update whose reference is zero.

What this does not do: an update is a function of every training case, and without noise
nothing bounds what it reveals. The Gaussian mechanism's calibration
``σ = Δ·√(2 ln(1.25/δ))/ε`` is the classical one, proven for ``ε < 1``; the unit it
protects is whatever ``sensitivity`` bounds (the site sets it; the clipping norm bounds one
site's whole update). Secure aggregation is not used (see :mod:`coordinator.adaptation.federated`).

References
----------
C. Dwork, A. Roth (2014). The algorithmic foundations of differential privacy. Foundations
and Trends in Theoretical Computer Science 9(3-4), Theorem A.1 (Gaussian mechanism) and
Theorem 3.16 (composition). doi:10.1561/0400000042
"""

from __future__ import annotations

import hashlib
import logging
import math
from collections.abc import Callable
from pathlib import Path

import numpy as np
from flwr.app import (
    Array,
    ArrayRecord,
    ConfigRecord,
    Context,
    Error,
    Message,
    MetricRecord,
    RecordDict,
)
from flwr.clientapp.mod import LocalDpMod
from flwr.supercore.differential_privacy import add_gaussian_noise_inplace, clip_inputs_inplace
from pydantic import JsonValue

from site_agent.contract.node_config import (
    LEDGER_PATH_KEY,
    POLICY_PATH_KEY,
    SITE_NAME_KEY,
    UNNAMED_SITE,
)
from site_agent.contract.protocol import Operation, StudyProtocol, UpdateNoise
from site_agent.contract.wire import LOCAL_UPDATE_RECORD, SiteRequest
from site_agent.disclosure.ledger import LedgerSession, Outcome, ReleaseLedger
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.privacy_budget import BudgetCheck
from site_agent.disclosure.refusals import RefusalCode, refusal_code, refusal_reason
from site_agent.disclosure.request_check import COORDINATOR_NAME_KEY, check_request
from site_agent.exceptions import DisclosureRefused, ProtocolError

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


def update_norm(released: ArrayRecord, reference: ArrayRecord | None = None) -> float:
    """Return the L2 norm of ``released − reference`` over all arrays (of ``released`` alone)."""
    total = 0.0
    for name, array in released.items():
        value = array.numpy().astype(np.float64)
        if reference is not None:
            value = value - reference[name].numpy().astype(np.float64)
        total += float(np.sum(value * value))
    return math.sqrt(total)


def update_noise(policy: SitePolicy, protocol: StudyProtocol) -> UpdateNoise | None:
    """Return the clipping and noise a released update gets: the policy's, else the protocol's."""
    if policy.updates.noise is not None:
        return policy.updates.noise
    return protocol.adaptation.update_noise if protocol.adaptation is not None else None


def noise_std(noise: UpdateNoise) -> float:
    """Return ``σ = Δ·√(2 ln(1.25/δ))/ε``, the Gaussian noise ``LocalDpMod`` adds.

    References
    ----------
    Dwork & Roth (2014), Theorem A.1 (see module doc); the same expression as
    ``flwr.clientapp.mod.LocalDpMod`` in Flower 1.42.
    """
    return noise.sensitivity * math.sqrt(2.0 * math.log(1.25 / noise.delta)) / noise.epsilon


def charge_update(
    session: LedgerSession, study_id: str, noise: UpdateNoise | None, policy: SitePolicy
) -> float:
    """Return the epsilon a released update spends, after checking the study's budget.

    Raises
    ------
    DisclosureRefused
        With ``privacy_budget_exhausted`` when the update would exceed the budget.
    """
    if noise is None:
        return 0.0
    budget = BudgetCheck(
        spent=session.epsilon_spent(study_id),
        requested=noise.epsilon,
        total=policy.privacy.study_epsilon,
    )
    if not budget.allowed:
        raise DisclosureRefused(RefusalCode.PRIVACY_BUDGET_EXHAUSTED.value, operation="fine_tune")
    return noise.epsilon


def released_local_update(
    content: RecordDict, policy: SitePolicy, protocol: StudyProtocol
) -> tuple[ArrayRecord, dict[str, JsonValue], UpdateNoise | None]:
    """Return the site-local update as it may leave, its ledger summary and the noise used.

    The update is clipped and noised as :func:`update_noise` says, with Flower's own
    functions (those ``LocalDpMod`` applies, here with a zero reference).

    Raises
    ------
    DisclosureRefused
        With ``site_error`` when the handler's reply holds no update record.
    """
    if LOCAL_UPDATE_RECORD not in content.array_records:
        raise DisclosureRefused(RefusalCode.SITE_ERROR.value, operation="fine_tune")
    raw = content.array_records[LOCAL_UPDATE_RECORD]
    names = list(raw.keys())
    arrays = [np.array(raw[k].numpy(), dtype=np.float32) for k in names]
    noise = update_noise(policy, protocol)
    if noise is not None:
        clip_inputs_inplace(arrays, noise.clipping_norm)  # FlatClip, as LocalDpMod does
        add_gaussian_noise_inplace(arrays, noise_std(noise))
    released = ArrayRecord({k: Array(v) for k, v in zip(names, arrays, strict=True)})
    return released, _summary(released, update_norm(released), noise), noise


def _summary(released: ArrayRecord, norm: float, noise: UpdateNoise | None) -> dict[str, JsonValue]:
    return {
        "parameters": int(sum(a.numpy().size for a in released.values())),
        "update_sha256": update_digest(released),
        "update_l2_norm": norm,
        "noise": None if noise is None else {**noise.model_dump(), "std": noise_std(noise)},
    }


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
        if not policy.updates.allowed:
            raise DisclosureRefused(RefusalCode.UPDATE_NOT_ALLOWED.value)
        noise = update_noise(policy, protocol)
        reply = _call(msg, context, call_next, protocol, policy, noise)
        if reply.has_error():
            raise DisclosureRefused(RefusalCode.SITE_ERROR.value)
        released = _checked_update(reply, policy, msg, noise)
        with ledger.session() as session:
            entry = session.append(
                outcome=Outcome.RELEASED,
                study_id=study_id,
                protocol_hash=request.protocol_hash,
                operation=Operation.FINE_TUNE.value,
                released=released,
                epsilon_spent=charge_update(session, study_id, noise, policy),
            )
        reply.content[UPDATE_RECORD] = ConfigRecord(
            {"site": site, "ledger_sequence": entry.sequence, "ledger_entry_hash": entry.entry_hash}
        )
        return reply
    except Exception as exc:  # every failure is declined with a fixed reason code only
        code = refusal_code(exc)
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
    noise: UpdateNoise | None,
) -> Message:
    if protocol.adaptation is None:
        raise DisclosureRefused(RefusalCode.PROTOCOL_INVALID.value)
    if noise is None:
        if policy.privacy.enabled:
            raise DisclosureRefused(RefusalCode.NOT_COVERED_BY_PRIVACY.value)
        return call_next(msg, context)
    mod = LocalDpMod(noise.clipping_norm, noise.sensitivity, noise.epsilon, noise.delta)
    return mod(msg, context, call_next)


def _checked_update(
    reply: Message, policy: SitePolicy, msg: Message, noise: UpdateNoise | None
) -> dict[str, JsonValue]:
    content = reply.content
    if (
        set(content.array_records) != {TRAIN_ARRAYS}
        or set(content.metric_records) != {TRAIN_METRICS}
        or content.config_records
    ):
        raise DisclosureRefused(RefusalCode.SITE_ERROR.value)
    metrics: MetricRecord = content.metric_records[TRAIN_METRICS]
    n = metrics.get(NUM_EXAMPLES)
    if set(metrics) != {NUM_EXAMPLES} or not isinstance(n, int):
        raise DisclosureRefused(RefusalCode.CASE_LEVEL_OUTPUT.value)
    if 0 < n < policy.min_cell:
        raise DisclosureRefused(RefusalCode.TOTAL_BELOW_MIN_CELL.value)
    arrays = content.array_records[TRAIN_ARRAYS]
    received = msg.content.array_records.get(TRAIN_ARRAYS)
    if received is None or list(received.keys()) != list(arrays.keys()):
        raise DisclosureRefused(RefusalCode.SITE_ERROR.value)
    config = msg.content.config_records.get(TRAIN_CONFIG)
    server_round = config.get(SERVER_ROUND) if config is not None else None
    return {
        "round": server_round if isinstance(server_round, int) else None,
        NUM_EXAMPLES: n,
        **_summary(arrays, update_norm(arrays, received), noise),
    }
