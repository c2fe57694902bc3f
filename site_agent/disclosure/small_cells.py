"""Small-cell control: what the site's policy does to a release before it leaves.

:func:`apply_policy` takes the release a site computed and returns it as the site's policy
lets it leave, with a :class:`DisclosureNote` of what was changed; the gate
(:func:`site_agent.disclosure.gate.disclosure_mod`) calls it on every evaluation and
monitoring reply and sends the note beside the release.

(Just over 500 lines for a reason: the rules below run in one pass over one release, and
each depends on what the earlier ones withheld; the list of rules is their one statement.)

Rules enforced on a release (``m`` is the policy's ``min_cell``; "small" means 1 to m−1)
-------------------------------------------------------------------------------------
1. Refused: a subgroup attribute the policy does not allow (checked on the request too,
   before any data is read: :mod:`site_agent.disclosure.request_check`).
2. Refused as case-level output: a calibration table or threshold list with more entries
   than the site has cases (its resolution is then one case, not a bin). A histogram may
   have more bins than the site has cases: rules 4a and 5 leave every released bin 0 or
   at least ``m``.
3. Refused: a small site total (cases, positives, negatives, patients); a small total in
   any subgroup level. A small number of pending labels is withheld instead (pending cases
   leave the release: their counts, the ``all`` histogram row and the agreement tables,
   which count them too, are dropped), from the site and every level at once: the levels'
   pending counts add up to the site's, so withholding one alone would not hide it.
   Pending cases are counted in the site's ``all`` row only; a subgroup's ``all`` row
   counts its labelled cases (noted as withheld).
4. Refused: subgroup combinations. The cases of an attribute in no released level must
   not be small, and no signed sum of one union of levels per attribute and the site
   total may be small (nested levels, overlaps of three attributes;
   :mod:`site_agent.disclosure.subgroup_combinations` states the rule). More than
   ``MAX_COMBINED_ATTRIBUTES`` attributes in one release are refused.
4a. One partition per population: all thresholds, histogram and calibration edges
   together cut the score axis into cells; in each class, every cell of the site, of each
   subgroup level and of each attribute's rest holds 0 or at least ``m`` cases. The site's
   cuts are chosen from the site alone; each attribute's levels keep a subset of them.
   Cuts that break this are withheld by everything of that population that reports them
   (threshold cells censored, bins merged or suppressed as the policy says; merged
   histogram bins per class) and listed in
   the note (:mod:`site_agent.disclosure.partition`). Model-versus-reader agreement tables whose
   threshold splits off a small count of a reader's calls are withheld.
5. Small cells: a small confusion cell and its partner in the same class (class totals
   are released) are marked censored, with the range each can be and the class total
   (:class:`~site_agent.statistics.censored.CensoredCount`, never a count); the
   threshold's patient moments are dropped with them. Agreement cells are suppressed
   (withheld as null, never 0; listed in the note; the table marked ``censored`` so that
   no kappa is derived from it). Histogram and calibration bins are suppressed, with further bins
   until no row's suppressed sum is small, or merged with their neighbours until every
   row of every bin is 0 or at least ``m`` (the new edges are a subset of the old; under
   merging each class row keeps its own edges, rule 4a). Agreement tables
   of the model at two thresholds against one reader are withheld whole when their
   difference would isolate a small number of cases (:mod:`site_agent.disclosure.threshold_tables`).
6. With differential privacy on, every count and per-bin sum gets noise *first*
   (:mod:`site_agent.disclosure.privacy_budget`); rules 2-5 then run on the noisy values, which is
   post-processing. The exact site-level estimates and the patient moments are withheld,
   since their sensitivity is not bounded; the unit of privacy is one case (observation).
   Attribute counts are withheld under differential privacy.
7. Attribute counts (case mix of a monitoring window): small levels are pooled under one
   level name, with secondary pooling until the pooled count is 0 or at least ``m``; the
   counts are withheld when pending cases are (they include them).

Limits, said plainly
--------------------
Exact estimates (AUC, calibration slope) of groups that pass the count rules are released
as computed. The partition rule (4a) bounds the score cells of a subgroup-by-threshold
table by level, rest and the combinations of rule 4, but agreement tables only per
reader, not by subgroup combination. What one release adds to an *earlier* one is checked
by the gate (:mod:`site_agent.disclosure.release_history`), not here. Only differential
privacy bounds what any combination of releases can reveal; the count rules are the
customary first line.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

from pydantic import BaseModel, ConfigDict

from site_agent.contract.release import POOLED_LEVELS, AttributeCounts, SiteRelease
from site_agent.disclosure.partition import PartitionControl, control_partition
from site_agent.disclosure.policy import (
    SitePolicy,
    SmallCellAction,
    censored_cells,
    suppressed_confusion_cells,
)
from site_agent.disclosure.privacy_budget import noised_release
from site_agent.disclosure.refusals import RefusalCode, refusal
from site_agent.disclosure.subgroup_combinations import (
    check_subgroup_combinations,
    link_agreement_suppression,
)
from site_agent.disclosure.threshold_tables import differencing_tables
from site_agent.statistics.censored import Cell, CensoredCount
from site_agent.statistics.summaries import (
    CLASS_ROWS,
    AgreementTable,
    CalibrationBins,
    ConfusionCounts,
    ScoreHistogram,
    SufficientStatistics,
)


class AttributeCutsWithheld(BaseModel):
    """The score cuts withheld for the levels of one subgroup attribute (partition rule)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    attribute: str
    positive: tuple[float, ...] = ()
    """Cuts at which no positive count of any level of the attribute is released."""
    negative: tuple[float, ...] = ()
    """The same for negative cases."""


class DisclosureNote(BaseModel):
    """What the site's policy did to a release; sent beside it and kept in the ledger."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    min_cell: int
    small_cells: SmallCellAction
    suppressed: tuple[str, ...] = ()
    """Cells suppressed because they were small (paths into the release): confusion cells
    are marked censored, other cells set to 0."""
    merged: tuple[str, ...] = ()
    """Histograms whose adjacent bins were merged (their edges changed)."""
    withheld: tuple[str, ...] = ()
    """Parts of the release left out or emptied (pending cases, exact estimates...)."""
    epsilon: float | None = None
    """Epsilon spent by this release, or None without differential privacy."""
    noise_scale: float | None = None
    """Laplace scale of the noise on every count and sum, or None."""
    positive_cuts_withheld: tuple[float, ...] = ()
    """Score cuts (thresholds, bin edges) at which no positive count is released: kept,
    they would split off fewer than ``min_cell`` positive cases (partition rule)."""
    negative_cuts_withheld: tuple[float, ...] = ()
    """The same for negative cases."""
    attribute_cuts_withheld: tuple[AttributeCutsWithheld, ...] = ()
    """Per subgroup attribute, the cuts withheld for its levels: the site's, and those at
    which a level or the attribute's rest would split off fewer than ``min_cell`` cases.
    The site's own counts at a cut listed only here are released."""

    def cuts_withheld(self, attribute: str | None = None) -> dict[str, tuple[float, ...]]:
        """Return the withheld cuts by class (``positive``, ``negative``).

        The site's, or with ``attribute`` those of that attribute's levels (the site's
        when the note lists nothing for it).
        """
        for entry in self.attribute_cuts_withheld:
            if attribute is not None and entry.attribute == attribute:
                return {"positive": entry.positive, "negative": entry.negative}
        return {
            "positive": self.positive_cuts_withheld,
            "negative": self.negative_cuts_withheld,
        }


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
        raise refusal(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED)
    if any(a.attribute not in policy.allowed_subgroup_attributes for a in release.attribute_counts):
        raise refusal(RefusalCode.SUBGROUP_ATTRIBUTE_NOT_ALLOWED)
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
        raise refusal(RefusalCode.TOTAL_BELOW_MIN_CELL)
    for sub in release.subgroups:
        if not all(_ok(v, m) for v in _totals(sub.statistics)):
            raise refusal(RefusalCode.SUBGROUP_BELOW_MIN_CELL)
    check_subgroup_combinations(release, m)
    release, partition = control_partition(release, m, policy.small_cells)
    note.absorb(partition)
    stats = release.statistics
    # Pending counts of the site and its levels add up: one small count withholds them all.
    pending_out = any(
        not _ok(s.n_pending, m) for s in (stats, *(sub.statistics for sub in release.subgroups))
    )
    controlled = release.model_copy(
        update={
            "statistics": _controlled(
                stats, m, policy.small_cells, "statistics", note, pending_out=pending_out
            ),
            "subgroups": tuple(
                sub.model_copy(
                    update={
                        "statistics": _controlled(
                            sub.statistics,
                            m,
                            policy.small_cells,
                            f"subgroups[{i}].statistics",
                            note,
                            pending_out=pending_out,
                        )
                    }
                )
                for i, sub in enumerate(release.subgroups)
            ),
        }
    )
    controlled = link_agreement_suppression(controlled, note.suppressed)
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
        self.cuts_withheld: dict[str, tuple[float, ...]] = {}
        self.attribute_cuts_withheld: dict[str, dict[str, tuple[float, ...]]] = {}

    def absorb(self, partition: PartitionControl) -> None:
        self.suppressed.extend(partition.suppressed)
        self.merged.extend(partition.merged)
        self.withheld.extend(partition.withheld)
        self.cuts_withheld.update(partition.cuts_withheld)
        self.attribute_cuts_withheld.update(partition.attribute_cuts_withheld)

    def freeze(self) -> DisclosureNote:
        return DisclosureNote(
            min_cell=self.policy.min_cell,
            small_cells=self.policy.small_cells,
            suppressed=tuple(self.suppressed),
            merged=tuple(self.merged),
            withheld=tuple(self.withheld),
            epsilon=self.epsilon,
            noise_scale=self.noise_scale,
            positive_cuts_withheld=self.cuts_withheld.get("positive", ()),
            negative_cuts_withheld=self.cuts_withheld.get("negative", ()),
            attribute_cuts_withheld=tuple(
                AttributeCutsWithheld(
                    attribute=attribute,
                    positive=by_class.get("positive", ()),
                    negative=by_class.get("negative", ()),
                )
                for attribute, by_class in self.attribute_cuts_withheld.items()
            ),
        )


def _ok(value: int, min_cell: int) -> bool:
    """Return whether a count is 0 or at least ``min_cell`` (releasable; common practice)."""
    return value == 0 or value >= min_cell


def _totals(stats: SufficientStatistics) -> tuple[int, ...]:
    return (stats.n_observations, stats.n_positive, stats.n_negative, stats.n_patients)


def _check_resolution(stats: SufficientStatistics) -> None:
    cases = stats.n_observations
    # Histograms are exempt: rules 4a and 5 leave every released bin 0 or at least m
    # cases, so their resolution is never one case.
    sizes = (len(stats.calibration.edges) - 1, len(stats.confusion))
    if any(size > cases for size in sizes):
        raise refusal(RefusalCode.CASE_LEVEL_OUTPUT)


def _controlled(
    stats: SufficientStatistics,
    m: int,
    action: SmallCellAction,
    path: str,
    note: _Note,
    *,
    pending_out: bool,
) -> SufficientStatistics:
    """Apply rule 5 (small cells) and the pending-case rule to one set of statistics.

    ``pending_out``: some population of the release has a small pending count, so every
    population withholds its pending cases (their counts add up across the levels).
    """
    histogram = stats.histogram
    if pending_out and stats.n_pending:
        note.withheld.append(f"{path}.pending")
        if stats.agreement:
            # Agreement tables count pending cases too: their totals would give the count away.
            note.withheld.append(f"{path}.agreement")
        stats = stats.withholding(pending=True)
        histogram = _labelled_only(histogram)
    elif stats.n_pending and path != "statistics":
        # A subgroup's all row counts its labelled cases only: pending cases are no class
        # of the partition rule, and a level's pending counts at its edges could be set
        # against the site's (and the other levels') to recover a small pending count
        # the site's own bins merged away (found by the brute-force tests).
        note.withheld.append(f"{path}.histogram.pending")
        histogram = _labelled_only(histogram)
    # Model-at-threshold tables that two thresholds would difference into a small cell.
    dropped = differencing_tables(stats.agreement, [c.threshold for c in stats.confusion], m)
    note.withheld.extend(f"{path}.agreement[{i}]" for i in sorted(dropped))
    kept = [(i, t) for i, t in enumerate(stats.agreement) if i not in dropped]
    stats = stats.withholding(dropped)
    return SufficientStatistics(
        **{
            **dict(stats),
            "confusion": tuple(
                _confusion(c, m, f"{path}.confusion[{i}]", note)
                for i, c in enumerate(stats.confusion)
            ),
            "histogram": _histogram(histogram, m, action, f"{path}.histogram", note),
            "calibration": _calibration(stats.calibration, m, action, f"{path}.calibration", note),
            "agreement": tuple(_agreement(t, m, f"{path}.agreement[{i}]", note) for i, t in kept),
        }
    )


def _confusion(c: ConfusionCounts, m: int, path: str, note: _Note) -> ConfusionCounts:
    """Censor small cells with their partners; a class the partition rule withheld stays so."""
    cells: dict[str, Cell] = {"tp": c.tp, "fp": c.fp, "fn": c.fn, "tn": c.tn}
    exact = {k: v for k, v in cells.items() if not isinstance(v, CensoredCount)}
    small = suppressed_confusion_cells(exact, m)
    if not small:
        return c
    note.suppressed.extend(f"{path}.{k}" for k in small)
    note.withheld.append(f"{path}.patient_moments")
    return c.with_censored(censored_cells(exact, small, m))


def _agreement(t: AgreementTable, m: int, path: str, note: _Note) -> AgreementTable:
    known = t.exact_counts()  # before any suppression
    cells = [(i, j) for i, row in enumerate(known) for j, v in enumerate(row) if not _ok(v, m)]
    if not cells:
        return t
    note.suppressed.extend(f"{path}.counts[{i}][{j}]" for i, j in cells)
    counts = tuple(
        tuple(None if (i, j) in cells else v for j, v in enumerate(row))
        for i, row in enumerate(known)
    )
    return t.model_copy(update={"counts": counts, "censored": True})


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


def _labelled_only(h: ScoreHistogram) -> ScoreHistogram:
    """Return the histogram with its all row counting labelled cases only."""
    rows = (h.class_on_edges("positive"), h.class_on_edges("negative"))
    return h.model_copy(update={"all": tuple(p + q for p, q in zip(*rows, strict=True))})


def _histogram(
    h: ScoreHistogram, m: int, action: SmallCellAction, path: str, note: _Note
) -> ScoreHistogram:
    """Control small bins of pending cases (and of a class row, should one remain).

    The class rows keep the cuts :mod:`site_agent.disclosure.partition` left them while no
    bin of pending cases is small. Once one is, every row goes to the same bins (merged,
    or suppressed on the same edges): pending cases are no class of the partition rule,
    and a class row finer than the all row could be set against the all row.
    """
    positive, negative = (h.class_on_edges(name) for name in CLASS_ROWS)
    pending = tuple(a - p - n for a, p, n in zip(h.all, positive, negative, strict=True))
    rows = (positive, negative, pending)
    if all(_ok(v, m) for row in rows for v in row) and all(
        _ok(v, m) for name in CLASS_ROWS for v in getattr(h, name)
    ):
        return h
    if action is SmallCellAction.MERGE:
        groups = _groups(rows, m)
        note.merged.append(path)
        return h.coarsened((*(h.edges[a] for a, _ in groups), h.edges[-1]))
    kept, hidden = [], {}
    for name, row in zip(("positive", "negative", "pending"), rows, strict=True):
        small = _with_complements([row], {i for i, v in enumerate(row) if not _ok(v, m)}, m)
        note.suppressed.extend(f"{path}.{name}[{i}]" for i in sorted(small))
        kept.append(tuple(0 if i in small else v for i, v in enumerate(row)))
        if name in CLASS_ROWS:
            before = h.suppressed_on_edges(name)
            hidden[f"{name}_suppressed"] = tuple(sorted({*before, *small}))
    return ScoreHistogram(
        edges=h.edges,
        positive=kept[0],
        negative=kept[1],
        all=tuple(sum(col) for col in zip(*kept, strict=True)),
        **hidden,
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
    return c.without_bins(small)


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
