"""Disclosure control: the one gate every reply of a site passes before it leaves.

:func:`disclosure_mod` is a Flower client mod wrapped around every handler of the site's
ClientApp. Before the handler runs it checks the request (:func:`check_request`); after,
it applies the site's policy to the release (:func:`apply_policy`), records the outcome
in the release ledger, and sends either the controlled release or a ``declined`` reply
whose reason is one of our fixed :class:`RefusalCode` texts, never an error's own text.

Rules enforced on a release (``m`` is the policy's ``min_cell``; "small" means 1 to m−1)
-------------------------------------------------------------------------------------
1. Refused: a subgroup attribute the policy does not allow.
2. Refused as case-level output: a histogram, calibration table or threshold list with
   more entries than the site has cases (its resolution is then one case, not a bin).
3. Refused: a small site total (cases, positives, negatives, patients); a small total in
   any subgroup level. A small number of pending labels is withheld instead (pending cases
   leave the release: their counts, the ``all`` histogram row and the agreement tables,
   which count them too, are dropped).
4. Refused: subgroup differences. Within an attribute, the cases in no released level
   (site total minus the sum of levels) must not be small. Across two attributes, the
   totals of any two levels must not differ by a small number: if one level nests in the
   other, the difference isolates that many cases. Counts cannot tell nesting apart, so
   the rule is applied to every cross-attribute pair.
5. Small cells: confusion cells and agreement cells are suppressed (set to 0, listed in
   the note; the threshold's patient moments are dropped with them). A small confusion
   cell takes its partner in the same class with it (class totals are released). Histogram
   and calibration bins are suppressed, with further bins until no row's suppressed sum is
   small, or merged with their neighbours until every row of every bin is 0 or at least
   ``m`` (the new edges are a subset of the old).
6. With differential privacy on, every count and per-bin sum gets noise *first*
   (:mod:`site_agent.disclosure.privacy_budget`); rules 2-5 then run on the noisy values, which is
   post-processing. The exact site-level estimates and the patient moments are withheld,
   since their sensitivity is not bounded; the unit of privacy is one case (observation).
   Attribute counts are withheld under differential privacy.
7. Attribute counts (case mix of a monitoring window): small levels are pooled under one
   level name, with secondary pooling until the pooled count is 0 or at least ``m``; the
   counts are withheld when pending cases are (they include them).
8. Weight updates (a site-local update asked for beside fine-tuning metrics, and every
   federated reply) leave only when the policy's ``updates.allowed`` is on; otherwise the
   request is refused before any data is read. Clipping and noise on updates, their
   epsilon charge and their ledger record are in :mod:`site_agent.disclosure.update_release`.

Limits, said plainly
--------------------
Rule 4 checks pairs, not every linear combination of released counts (three or more
subgroups can still be combined); it can refuse harmless pairs of unrelated attributes.
Thresholds that fall inside histogram bins refine the bins they split; rule 5 does not
look at that refinement. Exact estimates (AUC, calibration slope) of groups that pass the
count rules are released as computed. Only differential privacy bounds what any
combination of releases can reveal; the count rules are the customary first line.
"""

from __future__ import annotations

import itertools
import json
import logging
from collections.abc import Callable, Mapping, Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any

from flwr.app import ConfigRecord, Context, Message, MessageType
from pydantic import BaseModel, ConfigDict

from site_agent.contract.adaptation_release import control_adaptation
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.release import POOLED_LEVELS, AttributeCounts, SiteRelease
from site_agent.contract.wire import (
    LOCAL_UPDATE_RECORD,
    ReplyStatus,
    SiteReply,
    SiteRequest,
    decode_reply,
    decode_request,
    encode_reply,
)
from site_agent.disclosure.approvals import ApprovalStatus, approval_status
from site_agent.disclosure.ledger import LedgerEntry, LedgerSession, Outcome, ReleaseLedger
from site_agent.disclosure.policy import SitePolicy, SmallCellAction, suppressed_confusion_cells
from site_agent.disclosure.privacy_budget import check_budget, noised_release
from site_agent.disclosure.repeat_answer import (
    data_fingerprint,
    find_earlier_answer,
    ledger_repeat,
    repeated_reply,
    request_key,
)
from site_agent.exceptions import DisclosureRefused
from site_agent.service import LEDGER_PATH_KEY, POLICY_PATH_KEY, SITE_NAME_KEY, UNNAMED_SITE
from site_agent.statistics.summaries import (
    AgreementTable,
    CalibrationBins,
    ConfusionCounts,
    PatientMoments,
    ScoreHistogram,
    SufficientStatistics,
)

logger = logging.getLogger(__name__)

COORDINATOR_NAME_KEY = "coordinator-name"
"""Run-config key naming the coordinator; checked against ``allowed_coordinators``."""
DISCLOSURE_RECORD = "sitepool.disclosure"
"""ConfigRecord of a reply that carries the :class:`DisclosureNote` and the ledger receipt."""
_NOTE_KEY = "json"
_SEQUENCE_KEY = "ledger_sequence"
_HASH_KEY = "ledger_entry_hash"


class RefusalCode(StrEnum):
    """Why a site released nothing; the only reasons a declined reply carries."""

    POLICY_UNAVAILABLE = "policy_unavailable"
    REQUEST_UNREADABLE = "request_unreadable"
    COORDINATOR_NOT_ALLOWED = "coordinator_not_allowed"
    PROTOCOL_NOT_APPROVED = "protocol_not_approved"
    PROTOCOL_CHANGED = "protocol_changed_since_approval"
    OPERATION_NOT_ALLOWED = "operation_not_allowed"
    SUBGROUP_ATTRIBUTE_NOT_ALLOWED = "subgroup_attribute_not_allowed"
    CASE_LEVEL_OUTPUT = "case_level_output"
    TOTAL_BELOW_MIN_CELL = "total_below_min_cell"
    SUBGROUP_BELOW_MIN_CELL = "subgroup_below_min_cell"
    SUBGROUP_DIFFERENCE_BELOW_MIN_CELL = "subgroup_difference_below_min_cell"
    PRIVACY_BUDGET_EXHAUSTED = "privacy_budget_exhausted"
    PROTOCOL_INVALID = "protocol_invalid"
    MODEL_BUNDLE_INVALID = "model_bundle_invalid"
    SITE_DATA_INVALID = "site_data_invalid"
    SITE_ERROR = "site_error"
    WINDOW_WITHOUT_CASES = "window_without_cases"
    NOT_COVERED_BY_PRIVACY = "not_covered_by_privacy"
    UPDATE_NOT_ALLOWED = "update_release_not_allowed"


REFUSAL_TEXT: Mapping[RefusalCode, str] = {
    RefusalCode.UPDATE_NOT_ALLOWED: "the site's policy does not let weight updates leave",
    RefusalCode.NOT_COVERED_BY_PRIVACY: (
        "the site's differential privacy does not cover this output, so it is not released"
    ),
    RefusalCode.POLICY_UNAVAILABLE: "the site's policy or ledger is not configured or readable",
    RefusalCode.REQUEST_UNREADABLE: "the request is not a well-formed sitepool request",
    RefusalCode.COORDINATOR_NOT_ALLOWED: "the site's policy does not allow this coordinator",
    RefusalCode.PROTOCOL_NOT_APPROVED: "the site has not approved this study protocol",
    RefusalCode.PROTOCOL_CHANGED: "the protocol differs from the version the site approved",
    RefusalCode.OPERATION_NOT_ALLOWED: "the site's policy does not allow this operation",
    RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED: "a subgroup attribute is not allowed by policy",
    RefusalCode.CASE_LEVEL_OUTPUT: "the requested output would resolve individual cases",
    RefusalCode.TOTAL_BELOW_MIN_CELL: "a site total is below the site's minimum cell size",
    RefusalCode.SUBGROUP_BELOW_MIN_CELL: "a subgroup is below the site's minimum cell size",
    RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL: (
        "differences between subgroups would isolate fewer cases than the minimum cell size"
    ),
    RefusalCode.PRIVACY_BUDGET_EXHAUSTED: "the study's privacy budget at this site is spent",
    RefusalCode.PROTOCOL_INVALID: "the protocol or request failed the site's checks",
    RefusalCode.MODEL_BUNDLE_INVALID: "the model bundle failed the site's checks",
    RefusalCode.SITE_DATA_INVALID: "the site's data failed validation; see the site's log",
    RefusalCode.SITE_ERROR: "the site agent failed; details are in the site's own log",
    RefusalCode.WINDOW_WITHOUT_CASES: "no case at this site was acquired in the time window",
}

_ERROR_CODES: Mapping[str, RefusalCode] = {
    "ProtocolError": RefusalCode.PROTOCOL_INVALID,
    "BundleError": RefusalCode.MODEL_BUNDLE_INVALID,
    "InputError": RefusalCode.SITE_DATA_INVALID,
    "PredictionsError": RefusalCode.SITE_DATA_INVALID,
    "EmptyWindowError": RefusalCode.WINDOW_WITHOUT_CASES,
}


def refusal_reason(code: RefusalCode) -> str:
    """Return the one line a declined reply carries for ``code``."""
    return f"{code.value}: {REFUSAL_TEXT[code]}"


def _refuse(code: RefusalCode, operation: str | None = None) -> DisclosureRefused:
    return DisclosureRefused(code.value, operation=operation)


class DisclosureNote(BaseModel):
    """What the site's policy did to a release; sent beside it and kept in the ledger."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    min_cell: int
    small_cells: SmallCellAction
    suppressed: tuple[str, ...] = ()
    """Cells set to 0 because they were small (paths into the release)."""
    merged: tuple[str, ...] = ()
    """Histograms whose adjacent bins were merged (their edges changed)."""
    withheld: tuple[str, ...] = ()
    """Parts of the release left out or emptied (pending cases, exact estimates...)."""
    epsilon: float | None = None
    """Epsilon spent by this release, or None without differential privacy."""
    noise_scale: float | None = None
    """Laplace scale of the noise on every count and sum, or None."""


# --------------------------------------------------------------------------- request


def check_request(
    request: SiteRequest, policy: SitePolicy, *, coordinator: str | None = None
) -> StudyProtocol:
    """Refuse a request the policy does not allow, before any site data is touched.

    Raises
    ------
    DisclosureRefused
        For a coordinator not allowed, an unapproved or changed protocol, an operation
        or a subgroup attribute the policy does not allow, or a request for a weight
        update the policy does not let leave (``updates.allowed``).
    """
    operation = request.operation.value
    if policy.allowed_coordinators and coordinator not in policy.allowed_coordinators:
        raise _refuse(RefusalCode.COORDINATOR_NOT_ALLOWED, operation)
    try:
        protocol = StudyProtocol.from_json(request.protocol_json)
    except Exception as exc:
        raise _refuse(RefusalCode.PROTOCOL_INVALID, operation) from exc
    # The hash the site approved is the hash of what it is asked to run, not a claim.
    status = approval_status(protocol.content_hash(), protocol.study_id, policy.approvals_file)
    if protocol.content_hash() != request.protocol_hash:
        status = ApprovalStatus.CHANGED
    if status is ApprovalStatus.CHANGED:
        raise _refuse(RefusalCode.PROTOCOL_CHANGED, operation)
    if status is ApprovalStatus.NOT_APPROVED:
        raise _refuse(RefusalCode.PROTOCOL_NOT_APPROVED, operation)
    if request.operation not in policy.allowed_operations:
        raise _refuse(RefusalCode.OPERATION_NOT_ALLOWED, operation)
    if request.return_update and request.operation is not Operation.FINE_TUNE:
        raise _refuse(RefusalCode.PROTOCOL_INVALID, operation)
    if request.return_update and not policy.updates.allowed:
        raise _refuse(RefusalCode.UPDATE_NOT_ALLOWED, operation)
    if any(a not in policy.allowed_subgroup_attributes for a in protocol.evaluation.subgroups):
        raise _refuse(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED, operation)
    mix = protocol.monitoring.mix_attributes if protocol.monitoring is not None else ()
    if any(a not in policy.allowed_subgroup_attributes for a in mix):
        raise _refuse(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED, operation)
    return protocol


# --------------------------------------------------------------------------- release


def apply_policy(
    release: SiteRelease, policy: SitePolicy, *, epsilon: float | None = None
) -> tuple[SiteRelease, DisclosureNote]:
    """Return the release as the policy lets it leave, and a note of what was changed.

    Parameters
    ----------
    release
        The release computed at the site.
    policy
        The site's policy.
    epsilon
        Epsilon to spend on noise, or None for no noise. The caller checks the budget.

    Raises
    ------
    DisclosureRefused
        When a rule in the module docstring refuses the release as a whole.
    """
    if any(s.attribute not in policy.allowed_subgroup_attributes for s in release.subgroups):
        raise _refuse(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED)
    if any(a.attribute not in policy.allowed_subgroup_attributes for a in release.attribute_counts):
        raise _refuse(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED)
    note = _Note(policy)
    if epsilon is not None:
        noised = noised_release(release, epsilon)
        release = noised.release
        note.epsilon, note.noise_scale = epsilon, noised.noise_scale
        note.withheld.extend(noised.withheld)
        if release.attribute_counts:
            release = release.model_copy(update={"attribute_counts": ()})
            note.withheld.append("attribute_counts")
    m = policy.min_cell
    stats = release.statistics
    _check_resolution(stats)
    if not all(_ok(v, m) for v in _totals(stats)):
        raise _refuse(RefusalCode.TOTAL_BELOW_MIN_CELL)
    for sub in release.subgroups:
        if not all(_ok(v, m) for v in _totals(sub.statistics)):
            raise _refuse(RefusalCode.SUBGROUP_BELOW_MIN_CELL)
    _check_subgroup_differences(release, m)
    controlled = release.model_copy(
        update={
            "statistics": _controlled(stats, m, policy.small_cells, "statistics", note),
            "subgroups": tuple(
                sub.model_copy(
                    update={
                        "statistics": _controlled(
                            sub.statistics,
                            m,
                            policy.small_cells,
                            f"subgroups[{i}].statistics",
                            note,
                        )
                    }
                )
                for i, sub in enumerate(release.subgroups)
            ),
        }
    )
    controlled = controlled.model_copy(
        update={"attribute_counts": _attribute_counts(release.attribute_counts, m, note)}
    )
    # Rebuild through validation so the controlled release is a valid SiteRelease.
    return SiteRelease.model_validate(controlled.model_dump()), note.freeze()


class _Note:
    def __init__(self, policy: SitePolicy) -> None:
        self.policy = policy
        self.suppressed: list[str] = []
        self.merged: list[str] = []
        self.withheld: list[str] = []
        self.epsilon: float | None = None
        self.noise_scale: float | None = None

    def freeze(self) -> DisclosureNote:
        return DisclosureNote(
            min_cell=self.policy.min_cell,
            small_cells=self.policy.small_cells,
            suppressed=tuple(self.suppressed),
            merged=tuple(self.merged),
            withheld=tuple(self.withheld),
            epsilon=self.epsilon,
            noise_scale=self.noise_scale,
        )


def _ok(value: int, min_cell: int) -> bool:
    """Return whether a count is 0 or at least ``min_cell`` (releasable; common practice)."""
    return value == 0 or value >= min_cell


def _totals(stats: SufficientStatistics) -> tuple[int, ...]:
    return (stats.n_observations, stats.n_positive, stats.n_negative, stats.n_patients)


def _check_resolution(stats: SufficientStatistics) -> None:
    cases = stats.n_observations
    sizes = (
        len(stats.histogram.edges) - 1,
        len(stats.calibration.edges) - 1,
        len(stats.confusion),
    )
    if any(size > cases for size in sizes):
        raise _refuse(RefusalCode.CASE_LEVEL_OUTPUT)


def _check_subgroup_differences(release: SiteRelease, m: int) -> None:
    site = release.statistics
    by_attribute: dict[str, list[SufficientStatistics]] = {}
    for sub in release.subgroups:
        by_attribute.setdefault(sub.attribute, []).append(sub.statistics)
    for levels in by_attribute.values():
        for total, parts in zip(
            _class_totals(site), zip(*(_class_totals(s) for s in levels), strict=True), strict=True
        ):
            if not _ok(total - sum(parts), m):
                raise _refuse(RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL)
    attributes = list(by_attribute)
    for i, a in enumerate(attributes):
        for b in attributes[i + 1 :]:
            for s in by_attribute[a]:
                for t in by_attribute[b]:
                    for x, y in zip(_class_totals(s), _class_totals(t), strict=True):
                        if not _ok(abs(x - y), m):
                            raise _refuse(RefusalCode.SUBGROUP_DIFFERENCE_BELOW_MIN_CELL)


def _class_totals(stats: SufficientStatistics) -> tuple[int, int, int]:
    return (stats.n_observations, stats.n_positive, stats.n_negative)


def _controlled(
    stats: SufficientStatistics, m: int, action: SmallCellAction, path: str, note: _Note
) -> SufficientStatistics:
    """Apply rule 5 (small cells) and the pending-case rule to one set of statistics."""
    histogram = stats.histogram
    n_observations, n_pending = stats.n_observations, stats.n_pending
    agreement = stats.agreement
    if not _ok(n_pending, m):
        note.withheld.append(f"{path}.pending")
        if agreement:
            # Agreement tables count pending cases too: their totals would give the count away.
            note.withheld.append(f"{path}.agreement")
            agreement = ()
        n_observations -= n_pending
        n_pending = 0
        histogram = histogram.model_copy(
            update={
                "all": tuple(
                    p + q for p, q in zip(histogram.positive, histogram.negative, strict=True)
                )
            }
        )
    return SufficientStatistics(
        n_observations=n_observations,
        n_positive=stats.n_positive,
        n_negative=stats.n_negative,
        n_pending=n_pending,
        n_patients=stats.n_patients,
        confusion=tuple(
            _confusion(c, m, f"{path}.confusion[{i}]", note) for i, c in enumerate(stats.confusion)
        ),
        histogram=_histogram(histogram, m, action, f"{path}.histogram", note),
        calibration=_calibration(stats.calibration, m, action, f"{path}.calibration", note),
        agreement=tuple(
            _agreement(t, m, f"{path}.agreement[{i}]", note) for i, t in enumerate(agreement)
        ),
    )


def _confusion(c: ConfusionCounts, m: int, path: str, note: _Note) -> ConfusionCounts:
    cells = {"tp": c.tp, "fp": c.fp, "fn": c.fn, "tn": c.tn}
    small = suppressed_confusion_cells(cells, m)
    if not small:
        return c
    note.suppressed.extend(f"{path}.{k}" for k in small)
    note.withheld.append(f"{path}.patient_moments")
    empty = PatientMoments()
    return ConfusionCounts(
        threshold=c.threshold,
        **{k: 0 if k in small else v for k, v in cells.items()},
        sensitivity=empty,
        specificity=empty,
        ppv=empty,
        npv=empty,
    )


def _agreement(t: AgreementTable, m: int, path: str, note: _Note) -> AgreementTable:
    cells = [(i, j) for i, row in enumerate(t.counts) for j, v in enumerate(row) if not _ok(v, m)]
    if not cells:
        return t
    note.suppressed.extend(f"{path}.counts[{i}][{j}]" for i, j in cells)
    counts = tuple(
        tuple(0 if (i, j) in cells else v for j, v in enumerate(row))
        for i, row in enumerate(t.counts)
    )
    return t.model_copy(update={"counts": counts})


def _groups(rows: Sequence[Sequence[int]], m: int) -> list[tuple[int, int]]:
    """Group adjacent bins so every row's sum in a group is 0 or >= m, losing least order.

    Among all such partitions into contiguous groups, dynamic programming picks the one
    with the fewest (first row × second row) pairs inside a group, i.e. the fewest
    positive-negative pairs whose order the merged histogram no longer shows (the AUC's
    binning bound, :func:`site_agent.statistics.roc.histogram_auc`), and among those the most
    groups.
    Callers have made sure every row's total is itself 0 or >= m, so a partition exists.
    """
    bins = len(rows[0])
    prefix = [[0, *itertools.accumulate(r)] for r in rows]

    def total(row: int, start: int, end: int) -> int:
        return prefix[row][end] - prefix[row][start]

    inf = (float("inf"), 0)
    best: list[tuple[float, int]] = [(0.0, 0), *([inf] * bins)]  # (lost pairs, -groups)
    cut = [0] * (bins + 1)
    for end in range(1, bins + 1):
        for start in range(end):
            if best[start] == inf:
                continue
            if not all(_ok(total(r, start, end), m) for r in range(len(rows))):
                continue
            lost = best[start][0] + total(0, start, end) * total(1, start, end)
            candidate = (lost, best[start][1] - 1)
            if candidate < best[end]:
                best[end], cut[end] = candidate, start
    groups: list[tuple[int, int]] = []
    end = bins
    while end > 0:
        groups.append((cut[end], end))
        end = cut[end]
    return groups[::-1]


def _histogram(
    h: ScoreHistogram, m: int, action: SmallCellAction, path: str, note: _Note
) -> ScoreHistogram:
    pending = tuple(a - p - n for a, p, n in zip(h.all, h.positive, h.negative, strict=True))
    rows = (h.positive, h.negative, pending)
    if all(_ok(v, m) for row in rows for v in row):
        return h
    if action is SmallCellAction.MERGE:
        groups = _groups(rows, m)
        note.merged.append(path)
        return h.coarsened((*(h.edges[a] for a, _ in groups), h.edges[-1]))
    kept = []
    for name, row in zip(("positive", "negative", "pending"), rows, strict=True):
        small = _with_complements([row], {i for i, v in enumerate(row) if not _ok(v, m)}, m)
        note.suppressed.extend(f"{path}.{name}[{i}]" for i in sorted(small))
        kept.append(tuple(0 if i in small else v for i, v in enumerate(row)))
    return ScoreHistogram(
        edges=h.edges,
        positive=kept[0],
        negative=kept[1],
        all=tuple(sum(col) for col in zip(*kept, strict=True)),
    )


def _with_complements(rows: Sequence[Sequence[int]], small: set[int], m: int) -> set[int]:
    """Return ``small`` grown until each row's suppressed sum is 0 or at least ``m``.

    Every row's total is released (cases, positives, negatives, pending), so the sum of
    the suppressed entries of a row is its total minus what is kept: a small cell
    suppressed alone would be recovered by subtraction. The nonzero bin with the smallest
    count in the first row joins until no row's suppressed sum is small (secondary
    suppression, common practice in statistical disclosure control).
    """
    small = set(small)
    while not all(_ok(sum(row[i] for i in small), m) for row in rows):
        rest = [i for i in range(len(rows[0])) if i not in small and any(r[i] for r in rows)]
        if not rest:  # only possible when a row total is itself small (noisy counts)
            break
        small.add(min(rest, key=lambda i: (rows[0][i], i)))
    return small


def _calibration(
    c: CalibrationBins, m: int, action: SmallCellAction, path: str, note: _Note
) -> CalibrationBins:
    negatives = tuple(n - k for n, k in zip(c.count, c.label_sum, strict=True))
    rows = (c.count, c.label_sum, negatives)
    if all(_ok(v, m) for row in rows for v in row):
        return c
    if action is SmallCellAction.MERGE:
        groups = _groups(rows, m)
        note.merged.append(path)
        return c.coarsened((*(c.edges[a] for a, _ in groups), c.edges[-1]))
    primary = {i for i in range(len(c.count)) if not all(_ok(r[i], m) for r in rows)}
    small = _with_complements(rows, primary, m)
    note.suppressed.extend(f"{path}[{i}]" for i in sorted(small))

    def keep(values: tuple[Any, ...]) -> tuple[Any, ...]:
        return tuple(type(v)(0) if i in small else v for i, v in enumerate(values))

    return CalibrationBins(
        edges=c.edges,
        count=keep(c.count),
        score_sum=keep(c.score_sum),
        label_sum=keep(c.label_sum),
        squared_error_sum=keep(c.squared_error_sum),
    )


def _attribute_counts(
    mixes: tuple[AttributeCounts, ...], m: int, note: _Note
) -> tuple[AttributeCounts, ...]:
    """Rule 7: pool small attribute levels, and withhold the counts with pending cases.

    Levels with a small count are pooled under :data:`POOLED_LEVELS`; while the pooled
    total is itself small, the smallest remaining level joins it (secondary suppression),
    so no small count can be recovered by subtracting released counts from the total.
    The counts include pending cases, so when those are withheld the counts are too.
    """
    if not mixes:
        return mixes
    if "statistics.pending" in note.withheld:
        note.withheld.append("attribute_counts")
        return ()
    out = []
    for i, mix in enumerate(mixes):
        ordered = sorted((c, level) for level, c in mix.as_dict().items() if c > 0)
        pooled = [(c, level) for c, level in ordered if not _ok(c, m)]
        kept = [(c, level) for c, level in ordered if _ok(c, m)]
        while pooled and kept and not _ok(sum(c for c, _ in pooled), m):
            pooled.append(kept.pop(0))
        counts = dict((level, c) for c, level in kept)
        if pooled:
            counts[POOLED_LEVELS] = sum(c for c, _ in pooled)
            note.merged.append(f"attribute_counts[{i}]")
        levels = tuple(sorted(counts))
        out.append(
            AttributeCounts(
                attribute=mix.attribute,
                levels=levels,
                counts=tuple(counts[level] for level in levels),
            )
        )
    return tuple(out)


# --------------------------------------------------------------------------- the mod


def read_disclosure(message: Message) -> tuple[DisclosureNote | None, int | None, str | None]:
    """Return the note, ledger sequence and ledger entry hash a site's reply carries."""
    if not message.has_content() or DISCLOSURE_RECORD not in message.content.config_records:
        return None, None, None
    record = message.content.config_records[DISCLOSURE_RECORD]
    text = record.get(_NOTE_KEY)
    note = DisclosureNote.model_validate_json(text) if isinstance(text, str) else None
    sequence = record.get(_SEQUENCE_KEY)
    digest = record.get(_HASH_KEY)
    return (
        note,
        sequence if isinstance(sequence, int) else None,
        digest if isinstance(digest, str) else None,
    )


def disclosure_mod(
    msg: Message, context: Context, call_next: Callable[[Message, Context], Message]
) -> Message:
    """Flower client mod: the site's disclosure policy on every reply (see module doc).

    Reads ``policy-path`` and ``ledger-path`` from ``context.node_config``. Without both,
    every request is declined (fail closed). Never raises.
    """
    site = (str(context.node_config.get(SITE_NAME_KEY, "")) or UNNAMED_SITE)[:80]
    request_id = ""
    ledger: ReleaseLedger | None = None
    request: SiteRequest | None = None
    study_id: str | None = None
    key: str | None = None
    if msg.metadata.message_type == MessageType.TRAIN:
        # Weight updates for Flower's strategies pass their own gate (imported here: it
        # builds on this module, and it needs torch-free Flower records only).
        from site_agent.disclosure.update_release import update_disclosure

        return update_disclosure(msg, context, call_next)
    try:
        policy_path = str(context.node_config.get(POLICY_PATH_KEY, ""))
        ledger_path = str(context.node_config.get(LEDGER_PATH_KEY, ""))
        if not policy_path or not ledger_path:
            raise _refuse(RefusalCode.POLICY_UNAVAILABLE)
        ledger = ReleaseLedger(Path(ledger_path))
        try:
            policy = SitePolicy.load(Path(policy_path))
        except Exception as exc:
            raise _refuse(RefusalCode.POLICY_UNAVAILABLE) from exc
        try:
            request, _ = decode_request(msg.content)
        except Exception as exc:
            raise _refuse(RefusalCode.REQUEST_UNREADABLE) from exc
        request_id = request.request_id
        coordinator = context.run_config.get(COORDINATOR_NAME_KEY)
        protocol = check_request(
            request, policy, coordinator=None if coordinator is None else str(coordinator)
        )
        study_id = protocol.study_id
        key = request_key(request, data_fingerprint(context.node_config))
        earlier = find_earlier_answer(ledger, key)
        if earlier is not None:  # asked again: the same answer, charged once (repeat_answer)
            return _repeated(msg, earlier, ledger, request, study_id, key)
        reply = call_next(msg, context)
        if reply.has_error():
            raise _refuse(RefusalCode.SITE_ERROR)
        answered = decode_reply(reply.content)
        if answered.status is ReplyStatus.DECLINED or (
            answered.release is None and answered.adaptation is None
        ):
            raise _refuse(_ERROR_CODES.get(answered.error_class or "", RefusalCode.SITE_ERROR))
        if answered.adaptation is not None:
            return _released_adaptation(
                msg, reply, answered, policy, ledger, request, protocol, key
            )
        return _released(msg, answered, policy, ledger, request, study_id, key)
    except Exception as exc:  # every failure is declined with a fixed reason code only
        code = _code_of(exc)
        if isinstance(exc, DisclosureRefused):  # the policy working as meant: no traceback
            logger.warning("site %s refused a request: %s", site, code.value)
        else:
            logger.error("site %s declined a request: %s", site, code.value, exc_info=exc)
        return _declined(msg, site, request_id, code, ledger, request, study_id, answer_key=key)


def _code_of(exc: BaseException) -> RefusalCode:
    if isinstance(exc, DisclosureRefused):
        try:
            return RefusalCode(exc.reason)
        except ValueError:
            return RefusalCode.SITE_ERROR
    return RefusalCode.SITE_ERROR


def _released(
    msg: Message,
    answered: SiteReply,
    policy: SitePolicy,
    ledger: ReleaseLedger,
    request: SiteRequest,
    study_id: str,
    key: str,
) -> Message:
    assert answered.release is not None  # checked by the caller
    operation = request.operation.value
    with ledger.session() as session:
        epsilon: float | None = None
        if policy.privacy.enabled:
            budget = check_budget(session.epsilon_spent(study_id), policy.privacy)
            if not budget.allowed:
                raise _refuse(RefusalCode.PRIVACY_BUDGET_EXHAUSTED, operation)
            epsilon = policy.privacy.release_epsilon
        try:
            release, note = apply_policy(answered.release, policy, epsilon=epsilon)
        except DisclosureRefused as exc:
            if epsilon is None:
                raise
            # Decided on noisy counts, the refusal itself is a DP output: it is charged.
            code = _code_of(exc)
            logger.info("site %s declined a noisy release: %s", answered.site, code.value)
            return _declined(
                msg,
                answered.site,
                answered.request_id,
                code,
                session,
                request,
                study_id,
                epsilon,
                answer_key=key,
            )
        out = answered.model_copy(update={"release": release})
        out = SiteReply.model_validate(out.model_dump())
        content = encode_reply(out)
        note_json = note.model_dump_json()
        released = {
            "reply": json.loads(out.model_dump_json()),
            "disclosure": json.loads(note_json),
        }
        entry = session.append(
            outcome=Outcome.RELEASED,
            study_id=study_id,
            protocol_hash=request.protocol_hash,
            operation=operation,
            released=released,
            epsilon_spent=epsilon or 0.0,
            request_key=key,
        )
    content[DISCLOSURE_RECORD] = ConfigRecord(
        {_NOTE_KEY: note_json, _SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
    )
    return Message(content, reply_to=msg)


def _released_adaptation(
    msg: Message,
    reply: Message,
    answered: SiteReply,
    policy: SitePolicy,
    ledger: ReleaseLedger,
    request: SiteRequest,
    protocol: StudyProtocol,
    key: str,
) -> Message:
    """Release a fine_tune reply under the minimum cell size; ledger it.

    No differential privacy covers the metrics, so a site with noise on counts refuses.
    When the request asked for the site-local update (``check_request`` has made sure the
    policy allows it), the update is clipped and noised if the policy or protocol says so
    (:func:`site_agent.disclosure.update_release.released_local_update`), charged to the study's
    epsilon budget, and ledgered by its SHA-256 and L2 norm, never by its values.
    """
    # Imported here: that module builds on this one.
    from site_agent.disclosure.update_release import charge_update, released_local_update

    assert answered.adaptation is not None  # checked by the caller
    study_id = protocol.study_id
    if policy.privacy.enabled:
        raise _refuse(RefusalCode.NOT_COVERED_BY_PRIVACY, request.operation.value)
    adaptation, suppressed = control_adaptation(answered.adaptation, policy)
    note = DisclosureNote(
        min_cell=policy.min_cell, small_cells=policy.small_cells, suppressed=suppressed
    )
    out = answered.model_copy(update={"adaptation": adaptation})
    out = SiteReply.model_validate(out.model_dump())
    content = encode_reply(out)
    note_json = note.model_dump_json()
    released: dict[str, Any] = {
        "reply": json.loads(out.model_dump_json()),
        "disclosure": json.loads(note_json),
    }
    update, noise = None, None
    if request.return_update:
        update, summary, noise = released_local_update(reply.content, policy, protocol)
        released["update"] = summary
    with ledger.session() as session:
        epsilon = charge_update(session, study_id, noise, policy) if update is not None else 0.0
        entry = session.append(
            outcome=Outcome.RELEASED,
            study_id=study_id,
            protocol_hash=request.protocol_hash,
            operation=request.operation.value,
            released=released,
            epsilon_spent=epsilon,
            request_key=key,
        )
    if update is not None:
        content[LOCAL_UPDATE_RECORD] = update
    content[DISCLOSURE_RECORD] = ConfigRecord(
        {_NOTE_KEY: note_json, _SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
    )
    return Message(content, reply_to=msg)


def _repeated(
    msg: Message,
    earlier: LedgerEntry,
    ledger: ReleaseLedger,
    request: SiteRequest,
    study_id: str,
    key: str,
) -> Message:
    """Send the ledgered answer ``earlier`` again with its own receipt; ledger the repeat."""
    content = encode_reply(repeated_reply(earlier, request))
    ledger_repeat(ledger, earlier, request, study_id, key)
    record = ConfigRecord({_SEQUENCE_KEY: earlier.sequence, _HASH_KEY: earlier.entry_hash})
    released = earlier.released
    if isinstance(released, dict) and "disclosure" in released:
        record[_NOTE_KEY] = json.dumps(released["disclosure"])
    content[DISCLOSURE_RECORD] = record
    return Message(content, reply_to=msg)


def _declined(
    msg: Message,
    site: str,
    request_id: str,
    code: RefusalCode,
    ledger: ReleaseLedger | LedgerSession | None,
    request: SiteRequest | None,
    study_id: str | None,
    epsilon_spent: float = 0.0,
    *,
    answer_key: str | None = None,
) -> Message:
    reply = SiteReply(
        site=site,
        request_id=request_id,
        status=ReplyStatus.DECLINED,
        reason=refusal_reason(code),
        error_class=DisclosureRefused.__name__,
    )
    content = encode_reply(reply)
    if ledger is not None:
        try:
            entry = ledger.append(
                outcome=Outcome.DECLINED,
                study_id=study_id,
                protocol_hash=request.protocol_hash if request is not None else None,
                operation=request.operation.value if request is not None else None,
                reason=code.value,
                released=json.loads(reply.model_dump_json()),
                epsilon_spent=epsilon_spent,
                request_key=answer_key,
            )
            content[DISCLOSURE_RECORD] = ConfigRecord(
                {_SEQUENCE_KEY: entry.sequence, _HASH_KEY: entry.entry_hash}
            )
        except Exception as exc:  # the decline is sent even if the ledger cannot take it
            logger.error("site %s could not record a decline in its ledger", site, exc_info=exc)
    return Message(content, reply_to=msg)
