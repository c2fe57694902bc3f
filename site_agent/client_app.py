"""The site's Flower ClientApp: decode a request, answer it with the site service, reply.

Every reply leaves through :data:`SITE_MODS`, the one list of Flower mods wrapped around
every handler of this app; a site-side rule that must see each outgoing reply (the
disclosure policy) is added there. The handler itself never raises: a request it cannot
read, or a node configuration it cannot use, is answered with a scrubbed ``declined`` reply.
"""

from __future__ import annotations

from flwr.app import Context, Message
from flwr.clientapp import ClientApp
from flwr.clientapp.typing import Mod

from site_agent.disclosure import disclosure_mod
from site_agent.service import SITE_NAME_KEY, UNNAMED_SITE, SiteSettings, answer, declined_reply
from site_agent.wire import SITE_ACTION, decode_request, encode_reply

SITE_MODS: list[Mod] = [disclosure_mod]
"""Mods applied to every message this app handles, outermost first."""

app = ClientApp(mods=SITE_MODS)


@app.evaluate(SITE_ACTION)
def evaluate(msg: Message, context: Context) -> Message:
    """Answer an ``evaluate.sitepool`` request with this site's release or a decline."""
    site = str(context.node_config.get(SITE_NAME_KEY, "")) or UNNAMED_SITE
    request_id = ""
    try:
        request, bundle = decode_request(msg.content)
        request_id = request.request_id
        settings = SiteSettings.from_node_config(context.node_config)
    except Exception as exc:  # an unreadable request or configuration is declined, scrubbed
        reply = declined_reply(site[:80], request_id, exc)
    else:
        reply = answer(request, bundle, settings)
    return Message(encode_reply(reply), reply_to=msg)
