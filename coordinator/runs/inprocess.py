"""The in-process engine: the real ServerApp and ClientApp objects in one process, no network.

:class:`InProcessGrid` implements Flower's public abstract ``Grid``. Each message pushed
to it is converted to Flower's protobuf form and back (content that would not cross a real
SuperLink fails here too), handed to the ClientApp with that node's own ``Context``
(``node_config`` naming the site and its data, a ``state`` kept for the run), and the
reply goes through protobuf again before the ServerApp pulls it. An exception escaping
the ClientApp becomes an error reply with Flower's code 2, as a real SuperNode sends.
Delivery is synchronous, so ``send_and_receive`` returns every reply at once.

Private Flower touches, pinned to ``flwr==1.42.0`` and kept in this module only:

* ``TaskIdentity`` (``flwr.supercore.task_identity``): ``Message(...)`` reads the run,
  node and task ids of the process from it; a real runtime sets it when it starts the
  ServerApp process. :func:`run_inprocess` sets it for the call and restores it after.
* ``Metadata.__dict__["_message_id"]``: a SuperLink assigns message ids; so do we,
  as Flower's own in-memory grid does.
* ``flwr.common.serde.message_to_proto`` / ``message_from_proto``: the protobuf round trip.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager

from flwr.app import Context, Error, Message, RecordDict
from flwr.clientapp import ClientApp
from flwr.common.constant import SUPERLINK_NODE_ID, ErrorCode
from flwr.common.serde import message_from_proto, message_to_proto
from flwr.proto.message_pb2 import Message as ProtoMessage
from flwr.serverapp import Grid, ServerApp
from flwr.supercore.run import Run
from flwr.supercore.task_identity import TaskIdentity

from site_agent.exceptions import DeploymentError

FIRST_NODE_ID = 10_001
"""Node id of the first site; the others follow in the order given."""
_SERVER_TASK_ID = 1


class InProcessGrid(Grid):
    """A ``Grid`` that delivers each message to a ClientApp in this process.

    Parameters
    ----------
    client_app
        The ClientApp every node runs, or one ClientApp per node (a site running
        other code, for fault rehearsals).
    node_configs
        One ``node_config`` per node, in node-id order from :data:`FIRST_NODE_ID`.
    run_id
        Id of the run the nodes' contexts belong to.
    run_config
        The run config the nodes' contexts carry.
    """

    def __init__(
        self,
        client_app: ClientApp | Sequence[ClientApp],
        node_configs: Sequence[Mapping[str, bool | int | float | str]],
        *,
        run_id: int = 1,
        run_config: Mapping[str, bool | int | float | str] | None = None,
    ) -> None:
        apps = [client_app] * len(node_configs) if isinstance(client_app, ClientApp) else client_app
        if len(apps) != len(node_configs):
            raise ValueError("give one ClientApp, or one per node")
        self._apps = {FIRST_NODE_ID + i: app for i, app in enumerate(apps)}
        self._run = Run.create_empty(run_id)
        self._contexts = {
            FIRST_NODE_ID + i: Context(
                run_id=run_id,
                node_id=FIRST_NODE_ID + i,
                node_config=dict(config),
                state=RecordDict(),
                run_config=dict(run_config or {}),
            )
            for i, config in enumerate(node_configs)
        }
        self._replies: dict[str, Message] = {}

    def set_run(self, run: Run) -> None:
        """Set the run this grid operates in."""
        self._run = run

    @property
    def run(self) -> Run:
        """Run information."""
        return self._run

    def create_message(
        self,
        content: RecordDict,
        message_type: str,
        dst_node_id: int,
        group_id: str,
        ttl: float | None = None,
    ) -> Message:
        """Create an instruction message (Flower deprecates this; build ``Message`` directly)."""
        return Message(content, dst_node_id, message_type, ttl=ttl, group_id=group_id)

    def get_node_ids(self) -> Iterable[int]:
        """Return the ids of the in-process nodes."""
        return list(self._contexts)

    def push_messages(self, messages: Iterable[Message]) -> Iterable[str]:
        """Deliver each message to its node's ClientApp now; return the ids of those delivered.

        A message for an unknown node is dropped and gets no id, as a SuperLink does.
        """
        ids: list[str] = []
        for message in messages:
            message_id = uuid.uuid4().hex
            message.metadata.__dict__["_message_id"] = message_id  # private, see module doc
            context = self._contexts.get(message.metadata.dst_node_id)
            if context is None or message.metadata.run_id != self._run.run_id:
                continue
            delivered = _through_protobuf(message)
            reply = _answer(self._apps[context.node_id], delivered, context)
            reply.metadata.__dict__["_message_id"] = uuid.uuid4().hex
            self._replies[message_id] = _through_protobuf(reply)
            ids.append(message_id)
        return ids

    def pull_messages(self, message_ids: Iterable[str]) -> Iterable[Message]:
        """Return (and forget) the replies to the given message ids that have arrived."""
        return [self._replies.pop(i) for i in message_ids if i in self._replies]

    def send_and_receive(
        self, messages: Iterable[Message], *, timeout: float | None = None
    ) -> Iterable[Message]:
        """Deliver the messages and return every reply (delivery is synchronous)."""
        return self.pull_messages(self.push_messages(messages))


def run_inprocess(
    server_app: ServerApp,
    client_app: ClientApp | Sequence[ClientApp],
    node_configs: Sequence[Mapping[str, bool | int | float | str]],
    run_config: Mapping[str, bool | int | float | str],
    *,
    run_id: int = 1,
) -> None:
    """Run ``server_app`` against in-process nodes running ``client_app``.

    Exceptions raised by the ServerApp propagate unchanged.
    """
    grid = InProcessGrid(client_app, node_configs, run_id=run_id, run_config=run_config)
    context = Context(
        run_id=run_id,
        node_id=SUPERLINK_NODE_ID,
        node_config={},
        state=RecordDict(),
        run_config=dict(run_config),
    )
    with _task_identity(run_id=run_id, node_id=SUPERLINK_NODE_ID, task_id=_SERVER_TASK_ID):
        server_app(grid, context)


@contextmanager
def _task_identity(*, run_id: int, node_id: int, task_id: int) -> Iterator[None]:
    """Set Flower's process-global task identity for the block, then restore it (private)."""
    saved = (TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id)
    TaskIdentity.run_id, TaskIdentity.node_id, TaskIdentity.task_id = run_id, node_id, task_id
    try:
        yield
    finally:
        TaskIdentity._run_id, TaskIdentity._node_id, TaskIdentity._task_id = saved


def _answer(app: ClientApp, message: Message, context: Context) -> Message:
    """Run a ClientApp as a SuperNode's ClientApp process does (flwr 1.42 run_clientapp)."""
    try:
        return app(message, context)
    except Exception as exc:  # a SuperNode turns any ClientApp exception into code 2
        reason = f"{type(exc)}:<'{exc}'>"
        return Message(
            Error(code=ErrorCode.CLIENT_APP_RAISED_EXCEPTION, reason=reason), reply_to=message
        )


def _through_protobuf(message: Message) -> Message:
    """Serialise a message to Flower's protobuf bytes and back, as it would cross the wire."""
    try:
        wire = message_to_proto(message).SerializeToString()
        return message_from_proto(ProtoMessage.FromString(wire))
    except Exception as exc:  # Flower raises assorted types for content it cannot serialise
        raise DeploymentError(
            f"message of type {message.metadata.message_type!r} cannot be serialised by Flower: "
            f"{type(exc).__name__}"
        ) from exc
