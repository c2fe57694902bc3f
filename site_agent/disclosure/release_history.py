"""Release history: what the site already released, so a new release is not subtracted from it.

The same protocol evaluated again after one case was added releases counts that differ
from the first release by that case: its label, and the score cell it fell in. Each
release passes the count rules alone; together they isolate one case. The gate therefore
keeps, beside its ledger, a *history file* (``<ledger>.history.jsonl``, JSON Lines) of the
counts every release made derivable, and compares each new release with the earlier ones
before it leaves.

What is kept (a :class:`Footprint` per population of a release)
----------------------------------------------------------------
For the site and for each subgroup level: the totals (cases, positives, negatives,
pending) and, for each class, the count at or above every score cut the release let out
for that class and population (cuts the partition rule withheld for the site, or for the
subgroups, are left out). These are the numbers anyone holding the release can derive;
nothing per case.

Rule (``m`` is the policy's ``min_cell``; "small" means 1 to m−1)
----------------------------------------------------------------
A new release is compared with every earlier one in scope (the same study, or every study
when the policy's ``history_scope`` is ``site``) whose population it may contain or be
contained in: the same time window, or either one without a window (the whole table holds
every window). For the same population key (site, or attribute and level):

- no total may differ by a small number, in either direction;
- on the cuts both releases let out for a class, the differences of the counts at or
  above each cut are cut into cells like the partition rule's cells; no cell may hold a
  small difference.

A release that breaks the rule is refused (``release_difference_below_min_cell``); the
study can ask again once enough cases have been added. Monitoring windows are disjoint by
design (window ``i`` covers ``[start + i·months, start + (i+1)·months)``, see
:class:`~site_agent.contract.protocol.MonitoringPlan`): a window that overlaps an earlier
released window without being the same window is refused
(``window_overlaps_earlier_release``); the same window asked again (its late labels
arrived) is compared as above.

Limits: counts cannot tell cases added from cases removed, so a table that gained and
lost the same number of cases in a cell shows no difference. Subgroup combinations of
differences (rule 4 across two releases) are not checked. With differential privacy on,
the history is neither checked nor written: every release is charged to the study's
budget, and the budget, not this rule, bounds what releases reveal together.

The file is hash-chained like the ledger, and every record names the hash of the ledger
entry of its release; a record whose ledger entry is missing, or a broken chain, stops
the site from releasing (the history cannot be trusted to be complete).
"""

from __future__ import annotations

import hashlib
import json
import os
from datetime import date
from itertools import pairwise
from pathlib import Path

from pydantic import BaseModel, ConfigDict, ValidationError

from site_agent.contract.release import SiteRelease
from site_agent.contract.wire import TimeWindow
from site_agent.disclosure.ledger import GENESIS_HASH, LedgerEntry, LedgerSession, canonical_json
from site_agent.disclosure.partition import CLASSES, cumulative_counts, score_cuts
from site_agent.disclosure.policy import HistoryScope, SitePolicy
from site_agent.disclosure.refusals import RefusalCode, refusal
from site_agent.disclosure.small_cells import DisclosureNote
from site_agent.exceptions import LedgerError
from site_agent.statistics.summaries import SufficientStatistics

HISTORY_SUFFIX = ".history.jsonl"
SITE_KEY = "site"


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class Footprint(_Frozen):
    """The counts of one population of a release that a later release could be set against."""

    key: str
    """``site``, or ``attribute=level`` for a subgroup level."""
    totals: tuple[int, int, int, int]
    """Cases, positives, negatives, pending."""
    positive: tuple[tuple[float, int], ...]
    """(cut, positives at or above it) for every cut released for positives."""
    negative: tuple[tuple[float, int], ...]
    """The same for negatives."""


class HistoryRecord(_Frozen):
    """One line of the history file: the footprints of one release."""

    ledger_entry_hash: str
    previous_hash: str
    record_hash: str
    study_id: str
    protocol_hash: str
    window: tuple[date, date] | None
    footprints: tuple[Footprint, ...]


def release_footprints(
    computed: SiteRelease, released: SiteRelease, note: DisclosureNote
) -> tuple[Footprint, ...]:
    """Return the footprints of a release: counts at cuts from the one computed at the site.

    ``released`` is the same release after small-cell control (its totals are what left:
    a withheld pending count is not in them); ``note`` says which cuts the partition rule
    did not let out, for the site and for each attribute's levels. The counts at every
    other cut are derivable from what left, since the partition rule makes every released
    count of a population a difference of its counts at its kept cuts; they are read from
    ``computed``, whose bins are not suppressed.
    """
    populations: list[tuple[str, str | None, SufficientStatistics, SufficientStatistics]] = [
        (SITE_KEY, None, computed.statistics, released.statistics)
    ]
    populations += [
        (f"{s.attribute}={s.level}", s.attribute, s.statistics, r.statistics)
        for s, r in zip(computed.subgroups, released.subgroups, strict=True)
    ]
    out = []
    for key, attribute, stats, left in populations:
        cuts = score_cuts(stats)
        cuts_withheld = note.cuts_withheld(attribute)
        by_class = []
        for which, name in enumerate(CLASSES):
            kept = [c for c in cuts if c not in set(cuts_withheld.get(name, ()))]
            by_class.append(tuple(zip(kept, cumulative_counts(stats, kept, which), strict=True)))
        out.append(
            Footprint(
                key=key,
                totals=(left.n_observations, left.n_positive, left.n_negative, left.n_pending),
                positive=by_class[0],
                negative=by_class[1],
            )
        )
    return tuple(out)


class ReleaseHistory:
    """The history file beside a ledger (see the module docstring).

    Parameters
    ----------
    ledger_path
        The site's ledger file; the history is ``<ledger>.history.jsonl`` beside it.
    """

    def __init__(self, ledger_path: Path) -> None:
        ledger_path = Path(ledger_path)
        self.path = ledger_path.with_name(ledger_path.name + HISTORY_SUFFIX)

    def records(self, session: LedgerSession) -> list[HistoryRecord]:
        """Return the verified records; call inside the ledger session that will append.

        Raises
        ------
        LedgerError
            If the chain is broken or a record names no entry of the ledger.
        """
        if not self.path.exists():
            return []
        known = {e.entry_hash for e in session.entries}
        previous = GENESIS_HASH
        records = []
        for number, line in enumerate(self.path.read_text().splitlines(), start=1):
            try:
                record = HistoryRecord.model_validate_json(line)
            except ValidationError as exc:
                raise LedgerError(f"release history line {number} is damaged") from exc
            if record.previous_hash != previous or record.record_hash != _digest(record):
                raise LedgerError(f"release history chain is broken at line {number}")
            if record.ledger_entry_hash not in known:
                raise LedgerError(f"release history line {number} names no ledger entry")
            records.append(record)
            previous = record.record_hash
        return records

    def check(
        self,
        session: LedgerSession,
        *,
        study_id: str,
        window: TimeWindow | None,
        footprints: tuple[Footprint, ...],
        policy: SitePolicy,
    ) -> None:
        """Refuse a release that an earlier one would let isolate fewer than ``m`` cases.

        Raises
        ------
        DisclosureRefused
            ``window_overlaps_earlier_release`` or ``release_difference_below_min_cell``.
        """
        span = None if window is None else (window.start, window.end)
        new = {f.key: f for f in footprints}
        for record in self.records(session):
            if policy.history_scope is HistoryScope.STUDY and record.study_id != study_id:
                continue
            if span is not None and record.window is not None and record.window != span:
                if span[0] < record.window[1] and record.window[0] < span[1]:
                    raise refusal(RefusalCode.WINDOW_OVERLAPS_EARLIER_RELEASE)
                continue  # disjoint windows: disjoint cases
            for old in record.footprints:
                if old.key in new and _isolates(new[old.key], old, policy.min_cell):
                    raise refusal(RefusalCode.RELEASE_DIFFERENCE_BELOW_MIN_CELL)

    def record(
        self,
        session: LedgerSession,
        entry: LedgerEntry,
        *,
        study_id: str,
        window: TimeWindow | None,
        footprints: tuple[Footprint, ...],
    ) -> HistoryRecord:
        """Append the footprints of a release whose ledger entry is ``entry``."""
        records = self.records(session)
        fields = {
            "ledger_entry_hash": entry.entry_hash,
            "previous_hash": records[-1].record_hash if records else GENESIS_HASH,
            "record_hash": "",
            "study_id": study_id,
            "protocol_hash": entry.protocol_hash or "",
            "window": None if window is None else (window.start, window.end),
            "footprints": footprints,
        }
        draft = HistoryRecord.model_validate(fields)
        record = draft.model_copy(update={"record_hash": _digest(draft)})
        with open(self.path, "a", encoding="utf-8") as handle:
            handle.write(record.model_dump_json() + "\n")
            handle.flush()
            os.fsync(handle.fileno())
        return record


def _digest(record: HistoryRecord) -> str:
    body = json.loads(record.model_dump_json(exclude={"record_hash"}))
    return hashlib.sha256(canonical_json(body).encode()).hexdigest()


def _small(value: int, m: int) -> bool:
    return 0 < abs(value) < m


def _isolates(new: Footprint, old: Footprint, m: int) -> bool:
    """Return whether the difference of two footprints of one population is small anywhere."""
    if any(_small(a - b, m) for a, b in zip(new.totals, old.totals, strict=True)):
        return True
    for which, (a, b) in enumerate(((new.positive, old.positive), (new.negative, old.negative))):
        old_at = dict(b)
        common = [(cut, count - old_at[cut]) for cut, count in a if cut in old_at]
        total = new.totals[1 + which] - old.totals[1 + which]
        cumulative = [total, *(d for _, d in common), 0]
        if any(_small(x - y, m) for x, y in pairwise(cumulative)):
            return True
    return False
