"""Monitoring rounds: one evaluation round per time window, each window's releases stored.

A monitoring protocol (:class:`~site_agent.contract.protocol.MonitoringPlan`) fixes a sequence of
calendar windows of ``acquired_on``. :func:`run_monitoring_rounds` asks the sites for one
window at a time (operation ``monitor``, the window in the request; round number = window
number), and writes every released window into a
:class:`~coordinator.monitoring.results_store.ResultsStore` as the JSON the site sent.

Labels mature. A site releases a window with the labels it knows at the time; cases still
awaiting their reference standard are counted as pending and left out of the label-based
statistics. A stored window is *final* once no label is pending, or once the run's
``as_of`` date is ``label_horizon_months`` or more after the window's end (labels that
have not come by then are not waited for). A run asks again, at every site, each window
that is not final there; the store keeps one current release per window and replaces it
only by one with at least as many labelled cases (:mod:`coordinator.monitoring.results_store`).

Resuming: final windows are not asked again. A window is skipped when the store holds a
final release of it for as many sites as there are connected nodes; otherwise only the
nodes whose site has no final release are asked (a node's site is learnt from its first
reply in the run, so until then a node is asked, and the store leaves a window it already
holds unchanged when the site sends the same release). A study interrupted after any
window therefore resumes where it stopped, and re-running it stores nothing twice.

Unlike an evaluation round, a monitoring round does not stop at a missed quorum: a site
that declines a window (too few cases this month, no case at all) leaves a gap in its
series, which the drift analysis skips, and is asked again on the next run.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from datetime import UTC, date, datetime

import pandas as pd
from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict, Field

from coordinator.monitoring.results_store import ResultsStore, WindowWrite
from coordinator.runs.rounds import NodeFault, SiteDecline, ask_sites
from site_agent.contract.protocol import MonitoringPlan, Operation, StudyProtocol
from site_agent.contract.wire import TimeWindow
from site_agent.exceptions import InputError

logger = logging.getLogger(__name__)

Progress = Callable[[str], None]


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class WindowRound(_Record):
    """What one monitoring round did for one time window."""

    window_number: int = Field(ge=1, description="1-based position of the window.")
    window_start: date
    window_end: date
    skipped: bool = Field(description="Every site had a final release of this window.")
    stored: list[str] = Field(description="Sites whose first release was stored in this round.")
    revised: list[str] = Field(
        default_factory=list, description="Sites whose stored release this round replaced."
    )
    already_stored: list[str] = Field(
        description="Sites whose stored release this round left as it was."
    )
    awaiting_labels: list[str] = Field(
        default_factory=list,
        description="Sites whose stored release still has pending labels within the horizon.",
    )
    declines: list[SiteDecline]
    faults: list[NodeFault]


class MonitoringOutcome(_Record):
    """Every window of one monitoring run."""

    study_id: str
    protocol_hash: str
    as_of: date | None = Field(default=None, description="The date the run took as today.")
    windows: list[WindowRound]

    def revised_windows(self) -> int:
        """Return how many (site, window) releases this run replaced."""
        return sum(len(w.revised) for w in self.windows)


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


def is_final(pending_cases: int, window_end: date, plan: MonitoringPlan, as_of: date) -> bool:
    """Return whether a stored window is not to be asked again (see the module docstring)."""
    if pending_cases == 0:
        return True
    horizon = pd.Timestamp(window_end) + pd.DateOffset(months=plan.label_horizon_months)
    return pd.Timestamp(as_of) >= horizon


def run_monitoring_rounds(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes | None,
    store: ResultsStore,
    *,
    as_of: date | None = None,
    progress: Progress | None = None,
) -> MonitoringOutcome:
    """Run one round per window of ``protocol.monitoring`` that is not final in ``store``.

    Parameters
    ----------
    as_of
        The date taken as today for the label horizon; None: today (UTC).

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
    as_of = as_of or datetime.now(UTC).date()
    protocol_hash = protocol.content_hash()
    pending: dict[tuple[date, date], dict[str, int]] = {}
    for record in store.windows(protocol.study_id):
        key = (record.window_start, record.window_end)
        pending.setdefault(key, {})[record.site] = record.pending_cases
    site_of_node: dict[int, str] = {}
    rounds = []
    windows = monitoring_windows(plan)
    for number, window in enumerate(windows, start=1):
        held = pending.setdefault((window.start, window.end), {})
        final = {site for site, n in held.items() if is_final(n, window.end, plan, as_of)}
        nodes = sorted(grid.get_node_ids())
        label = f"window {number}/{len(windows)} ({window.start} to {window.end})"
        if nodes and len(final) >= len(nodes):
            say(f"{label}: final for every site, skipped")
            rounds.append(_skipped(number, window, held))
            continue
        targets = [n for n in nodes if site_of_node.get(n) not in final]
        result = ask_sites(
            grid, protocol, bundle, number, Operation.MONITOR, targets, window=window
        )
        site_of_node.update({node: site for site, node in result.node_of_site.items()})
        writes: dict[str, WindowWrite] = {}
        for site, release in result.releases.items():
            statistics = release.statistics
            writes[site] = store.put_window(
                protocol.study_id,
                site,
                window.start,
                window.end,
                release.model_dump_json(),
                round_id=number,
                labelled_cases=statistics.n_positive + statistics.n_negative,
                pending_cases=statistics.n_pending,
            )
            if writes[site] in (WindowWrite.STORED, WindowWrite.REVISED):
                held[site] = statistics.n_pending
        new = sorted(s for s, w in writes.items() if w is WindowWrite.STORED)
        revised = sorted(s for s, w in writes.items() if w is WindowWrite.REVISED)
        awaiting = sorted(s for s, n in held.items() if not is_final(n, window.end, plan, as_of))
        say(
            f"{label}: {len(new)} stored, {len(revised)} revised, "
            f"{len(awaiting)} awaiting labels, {len(result.declines)} declined, "
            f"{len(result.faults)} without answer"
        )
        rounds.append(
            WindowRound(
                window_number=number,
                window_start=window.start,
                window_end=window.end,
                skipped=False,
                stored=new,
                revised=revised,
                already_stored=sorted(set(held) - set(new) - set(revised)),
                awaiting_labels=awaiting,
                declines=result.declines,
                faults=result.faults,
            )
        )
    return MonitoringOutcome(
        study_id=protocol.study_id, protocol_hash=protocol_hash, as_of=as_of, windows=rounds
    )


def _skipped(number: int, window: TimeWindow, held: dict[str, int]) -> WindowRound:
    return WindowRound(
        window_number=number,
        window_start=window.start,
        window_end=window.end,
        skipped=True,
        stored=[],
        already_stored=sorted(held),
        declines=[],
        faults=[],
    )
