"""Monitoring rounds: one evaluation round per time window, each window's releases stored.

A monitoring protocol (:class:`~site_agent.protocol.MonitoringPlan`) fixes a sequence of
calendar windows of ``acquired_on``. :func:`run_monitoring_rounds` asks the sites for one
window at a time (operation ``monitor``, the window in the request; round number = window
number), and writes every released window into a
:class:`~coordinator.results_store.ResultsStore` as the JSON the site sent.

Resuming: windows already stored are not asked again. A window is skipped when the store
holds it for as many sites as there are connected nodes; otherwise only the nodes whose
site has not stored it are asked (a node's site is learnt from its first reply in the
run, so in the first round of a run every node is asked and the store ignores a window it
already holds). A study interrupted after any window therefore resumes where it stopped,
and re-running it stores nothing twice.

Unlike an evaluation round, a monitoring round does not stop at a missed quorum: a site
that declines a window (too few cases this month, no case at all) leaves a gap in its
series, which the drift analysis skips, and is asked again on the next run.
"""

from __future__ import annotations

import logging
import uuid
from collections.abc import Callable
from datetime import date

import pandas as pd
from flwr.app import Message
from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict, Field

from coordinator.results_store import ResultsStore
from coordinator.rounds import NodeFault, RoundOutcome, SiteDecline, _sorted_replies
from site_agent.exceptions import InputError
from site_agent.protocol import MonitoringPlan, Operation, StudyProtocol
from site_agent.wire import EVALUATE_MESSAGE_TYPE, SiteRequest, TimeWindow, encode_request

logger = logging.getLogger(__name__)

Progress = Callable[[str], None]


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class WindowRound(_Record):
    """What one monitoring round did for one time window."""

    window_number: int = Field(ge=1, description="1-based position of the window.")
    window_start: date
    window_end: date
    skipped: bool = Field(description="Every site had already stored this window.")
    stored: list[str] = Field(description="Sites whose release was stored in this round.")
    already_stored: list[str] = Field(description="Sites that had stored this window before.")
    declines: list[SiteDecline]
    faults: list[NodeFault]


class MonitoringOutcome(_Record):
    """Every window of one monitoring run."""

    study_id: str
    protocol_hash: str
    windows: list[WindowRound]


def monitoring_windows(plan: MonitoringPlan) -> list[TimeWindow]:
    """Return the plan's consecutive calendar windows ``[start, end)``, in order."""
    start = pd.Timestamp(plan.first_window_start)
    return [
        TimeWindow(
            start=(start + pd.DateOffset(months=i * plan.window_months)).date(),
            end=(start + pd.DateOffset(months=(i + 1) * plan.window_months)).date(),
        )
        for i in range(plan.windows)
    ]


def run_monitoring_rounds(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    store: ResultsStore,
    *,
    progress: Progress | None = None,
) -> MonitoringOutcome:
    """Run one round per window of ``protocol.monitoring``, storing each released window.

    Raises
    ------
    InputError
        If the protocol has no monitoring plan or does not include the ``monitor`` operation.
    """
    plan = protocol.monitoring
    if plan is None:
        raise InputError("the protocol has no monitoring plan")
    if Operation.MONITOR not in protocol.operations:
        raise InputError("the protocol does not include the monitor operation")
    say = progress or (lambda line: logger.info("%s", line))
    protocol_hash = protocol.content_hash()
    stored: dict[tuple[date, date], set[str]] = {}
    for record in store.windows(protocol.study_id):
        stored.setdefault((record.window_start, record.window_end), set()).add(record.site)
    site_of_node: dict[int, str] = {}
    rounds = []
    windows = monitoring_windows(plan)
    for number, window in enumerate(windows, start=1):
        done = stored.get((window.start, window.end), set())
        nodes = sorted(grid.get_node_ids())
        label = f"window {number}/{len(windows)} ({window.start} to {window.end})"
        if nodes and len(done) >= len(nodes):
            say(f"{label}: already stored for every site, skipped")
            rounds.append(_skipped(number, window, done))
            continue
        targets = [n for n in nodes if site_of_node.get(n) not in done]
        result = _ask(grid, protocol, protocol_hash, bundle, window, number, targets)
        site_of_node.update({node: site for site, node in result.node_of_site.items()})
        new: list[str] = []
        old = sorted(done & set(result.releases))
        for site, release in result.releases.items():
            inserted = store.put_window(
                protocol.study_id,
                site,
                window.start,
                window.end,
                release.model_dump_json(),
                round_id=number,
            )
            (new if inserted else old).append(site)
        done |= set(result.releases)
        stored[(window.start, window.end)] = done
        say(
            f"{label}: {len(new)} stored, {len(result.declines)} declined, "
            f"{len(result.faults)} without answer"
        )
        rounds.append(
            WindowRound(
                window_number=number,
                window_start=window.start,
                window_end=window.end,
                skipped=False,
                stored=sorted(new),
                already_stored=sorted(set(old)),
                declines=result.declines,
                faults=result.faults,
            )
        )
    return MonitoringOutcome(
        study_id=protocol.study_id, protocol_hash=protocol_hash, windows=rounds
    )


def _skipped(number: int, window: TimeWindow, done: set[str]) -> WindowRound:
    return WindowRound(
        window_number=number,
        window_start=window.start,
        window_end=window.end,
        skipped=True,
        stored=[],
        already_stored=sorted(done),
        declines=[],
        faults=[],
    )


def _ask(
    grid: Grid,
    protocol: StudyProtocol,
    protocol_hash: str,
    bundle: bytes | None,
    window: TimeWindow,
    number: int,
    nodes: list[int],
) -> RoundOutcome:
    requests: dict[int, SiteRequest] = {}
    messages: list[Message] = []
    for node_id in nodes:
        request = SiteRequest(
            operation=Operation.MONITOR,
            protocol_json=protocol.canonical_json(),
            protocol_hash=protocol_hash,
            round_number=number,
            request_id=uuid.uuid4().hex,
            window=window,
        )
        requests[node_id] = request
        messages.append(
            Message(
                encode_request(request, bundle),
                node_id,
                EVALUATE_MESSAGE_TYPE,
                group_id=str(number),
            )
        )
    replies = list(grid.send_and_receive(messages, timeout=protocol.reply_timeout_s))
    return _sorted_replies(replies, requests, protocol_hash, number)
