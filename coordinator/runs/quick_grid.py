"""A Grid that waits for replies with a short poll, wrapped around the deployment's Grid.

In flwr 1.42 the deployment Grid's ``send_and_receive`` (``flwr.superlink.grid.http_grid``)
pushes the messages, then asks the SuperLink for replies every 3 s: a message wave whose
replies are all in after 0.6 s still returns only after 3 s, and one whose last reply comes
at 3.1 s returns after 6 s. :class:`QuickPollGrid` keeps every other method of the Grid it
wraps and replaces only that wait, asking every :data:`DEFAULT_POLL_S` seconds through the
public ``push_messages`` / ``pull_messages``. Flower's own strategies (FedAvg, FedProx) call
``send_and_receive`` on the Grid they are given, so they gain the same.

The SuperNode's own idle poll (a fixed 3 s sleep in ``flwr/supernode/start_client_internal.py``
when no message was waiting) is Flower's and is not changed here.
"""

from __future__ import annotations

import time
from collections.abc import Iterable

from flwr.app import Message, RecordDict
from flwr.proto.node_pb2 import NodeInfo
from flwr.serverapp import Grid
from flwr.supercore.run import Run

DEFAULT_POLL_S = 0.1
"""Seconds between asks for replies while a wave is out."""


class DelegatingGrid(Grid):
    """A Grid that hands every call to ``inner``; subclasses replace what they change."""

    def __init__(self, inner: Grid) -> None:
        self._inner = inner

    def set_run(self, run: Run) -> None:
        """Set the run of the wrapped Grid."""
        self._inner.set_run(run)

    @property
    def run(self) -> Run:
        """The wrapped Grid's run."""
        return self._inner.run

    def create_message(
        self,
        content: RecordDict,
        message_type: str,
        dst_node_id: int,
        group_id: str,
        ttl: float | None = None,
    ) -> Message:
        """Delegate to the wrapped Grid (Flower deprecates this; build ``Message`` directly)."""
        return self._inner.create_message(content, message_type, dst_node_id, group_id, ttl)

    def get_node_ids(self) -> Iterable[int]:
        """Return the wrapped Grid's connected node ids."""
        return self._inner.get_node_ids()

    def get_nodes(self) -> Iterable[NodeInfo]:
        """Return the wrapped Grid's connected nodes, with the names the hub admitted them under.

        Without this, Flower's default builds nodes from their ids alone and every name is
        empty: a resumed study could not tell which site's release it already holds.
        """
        return self._inner.get_nodes()

    def push_messages(self, messages: Iterable[Message]) -> Iterable[str]:
        """Push through the wrapped Grid."""
        return self._inner.push_messages(messages)

    def pull_messages(self, message_ids: Iterable[str]) -> Iterable[Message]:
        """Pull through the wrapped Grid."""
        return self._inner.pull_messages(message_ids)

    def send_and_receive(
        self, messages: Iterable[Message], *, timeout: float | None = None
    ) -> Iterable[Message]:
        """Send through the wrapped Grid."""
        return self._inner.send_and_receive(messages, timeout=timeout)


class QuickPollGrid(DelegatingGrid):
    """``inner`` with a ``send_and_receive`` that polls every ``poll_s`` seconds."""

    def __init__(self, inner: Grid, *, poll_s: float = DEFAULT_POLL_S) -> None:
        super().__init__(inner)
        self._poll_s = poll_s

    def send_and_receive(
        self, messages: Iterable[Message], *, timeout: float | None = None
    ) -> Iterable[Message]:
        """Push ``messages`` and collect replies until all are in or ``timeout`` passes.

        Like Flower's: ``timeout=None`` waits until every reply is in.
        """
        waiting = set(self.push_messages(messages))
        deadline = None if timeout is None else time.monotonic() + timeout
        replies: list[Message] = []
        while waiting:
            arrived = list(self.pull_messages(waiting))
            replies.extend(arrived)
            waiting.difference_update(m.metadata.reply_to_message_id for m in arrived)
            if not waiting or (deadline is not None and time.monotonic() >= deadline):
                break
            time.sleep(self._poll_s)
        return replies
