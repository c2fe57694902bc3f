"""The site's Flower ClientApp: decode a request, answer it with the site service, reply.

Every reply leaves through :data:`SITE_MODS`, the one list of Flower mods wrapped around
every handler of this app; a site-side rule that must see each outgoing reply (the
disclosure policy) is added there. The handler itself never raises: a request it cannot
read, or a node configuration it cannot use, is answered with a scrubbed ``declined`` reply.
"""

from __future__ import annotations

import numpy as np
from flwr.app import Array, ArrayRecord, Context, Message, MetricRecord, RecordDict
from flwr.clientapp import ClientApp
from flwr.clientapp.typing import Mod

from site_agent.contract.node_config import SITE_NAME_KEY, UNNAMED_SITE
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.wire import (
    LOCAL_UPDATE_RECORD,
    SITE_ACTION,
    WEIGHTS_RECORD,
    decode_request,
    encode_reply,
)
from site_agent.disclosure.gate import disclosure_mod
from site_agent.disclosure.update_release import (
    NUM_EXAMPLES,
    PROXIMAL_MU,
    TRAIN_ARRAYS,
    TRAIN_CONFIG,
    TRAIN_METRICS,
    read_train_request,
)
from site_agent.exceptions import ProtocolError
from site_agent.service import SiteSettings, answer_with_update, declined_reply, site_table

SITE_MODS: list[Mod] = [disclosure_mod]
"""Mods applied to every message this app handles, outermost first."""

app = ClientApp(mods=SITE_MODS)


@app.evaluate(SITE_ACTION)
def evaluate(msg: Message, context: Context) -> Message:
    """Answer an ``evaluate.sitepool`` request with this site's release or a decline.

    A fine_tune request that asks for the site-local update gets it beside the release in
    :data:`~site_agent.contract.wire.LOCAL_UPDATE_RECORD`; the disclosure mod decides whether it
    leaves.
    """
    site = str(context.node_config.get(SITE_NAME_KEY, "")) or UNNAMED_SITE
    request_id = ""
    update = None
    try:
        request, bundle = decode_request(msg.content)
        request_id = request.request_id
        settings = SiteSettings.from_node_config(context.node_config)
    except Exception as exc:  # an unreadable request or configuration is declined, scrubbed
        reply = declined_reply(site[:80], request_id, exc)
    else:
        reply, update = answer_with_update(
            request, bundle, settings, weights=sent_weights(msg.content)
        )
    content = encode_reply(reply)
    if update is not None:  # raw: the disclosure mod clips, noises, ledgers or refuses it
        content[LOCAL_UPDATE_RECORD] = ArrayRecord({k: Array(v) for k, v in update.items()})
    return Message(content, reply_to=msg)


@app.train()
def train(msg: Message, context: Context) -> Message:
    """Train on this site's local pool for one round of a Flower strategy.

    Only reached through :func:`site_agent.disclosure.gate.disclosure_mod`, which has checked
    the request and declines (scrubbed) whatever this handler raises.
    """
    # Imported here: torch costs seconds to import, and evaluation-only sites never need it.
    from site_agent.training.local_training import local_data, train_round
    from site_agent.training.model_bundle import load_bundle

    request, bundle = read_train_request(msg.content)
    protocol = StudyProtocol.from_json(request.protocol_json)
    if protocol.model is None or protocol.adaptation is None:
        raise ProtocolError("fine_tune needs a protocol that names a model and an adaptation plan")
    settings = SiteSettings.from_node_config(context.node_config)
    model = load_bundle(bundle, expected_sha256=protocol.model.sha256)
    data = local_data(site_table(settings), model, protocol.adaptation)
    mu = msg.content.config_records[TRAIN_CONFIG].get(PROXIMAL_MU, 0.0)
    incoming = msg.content.array_records[TRAIN_ARRAYS]
    state, n = train_round(
        data,
        model,
        {k: v.numpy() for k, v in incoming.items()},
        protocol.adaptation,
        proximal_mu=float(mu) if isinstance(mu, int | float) else 0.0,
    )
    content = RecordDict(
        {
            TRAIN_ARRAYS: ArrayRecord({k: Array(v) for k, v in state.items()}),
            TRAIN_METRICS: MetricRecord({NUM_EXAMPLES: n}),
        }
    )
    return Message(content, reply_to=msg)


def sent_weights(content: RecordDict) -> dict[str, np.ndarray] | None:
    """Return the weights a request carries in :data:`~site_agent.contract.wire.WEIGHTS_RECORD`."""
    if WEIGHTS_RECORD not in content.array_records:
        return None
    return {k: v.numpy() for k, v in content.array_records[WEIGHTS_RECORD].items()}
