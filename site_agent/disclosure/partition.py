"""One partition per population: every count on the score axis controlled together.

A release reports the score axis in several ways at once: confusion counts at each
threshold (a case is called positive when ``score >= t``), histogram bins and calibration
bins (``[e_i, e_{i+1})``), for the site and for every subgroup level. Each of them tells,
for each class, how many cases score at or above some *cut*; the differences between any
two cuts, whatever reported them, give the count between them. The finest partition a
release implies is therefore the one made by *all* its cuts together: thresholds that
fall between two neighbouring scores, or inside a histogram bin, split off a few cases
that no single released count shows. (The module is longer than most: the rule, the
argument for it and its application to each kind of count are kept together.)

Rule (``m`` is the policy's ``min_cell``; "small" means 1 to m−1)
----------------------------------------------------------------
For each class (positive, negative) separately; dynamic programming keeps the most cuts,
thresholds first, and first of all the cuts both classes can keep together (the row of
all cases is binned on those, so that it stays as fine as one shared partition allows).

1. *The site*, ``K_site``: every cell of the site's partition holds 0 or at least ``m``.
2. *The subgroups*, ``K_sub ⊆ K_site``, one set for every level of every attribute:
   every cell of each level and of each attribute's rest (cases in no released level)
   holds 0 or at least ``m``, and no combination of subgroup counts in a cell
   (:mod:`site_agent.disclosure.subgroup_combinations`) is small.
3. *The site's own cuts*: the site keeps a cut the subgroups lost only when the release
   has one subgroup attribute and, inside the subgroup cell around the cut, every level
   and the rest that has cases there has cases in each of the site's cells there.
   Otherwise the site loses the cut too (its other cuts first, thresholds last).

A small level thus no longer costs the site a pre-registered threshold, unless the site
would show what the level hides (step 3). A cut taken away from a population is withheld
by everything of that population that reported it:

- a threshold loses the cells of that class (``tp`` and ``fn``, or ``fp`` and ``tn``),
  which are censored (a range, listed in the note, with its patient moments);
- a histogram edge is merged away from the class row that lost it (policy ``merge``: the
  bins either side become one; each class row keeps its own cuts, and the row of all
  cases keeps the cuts both classes kept), or the bins either side are suppressed in that
  class's row (policy ``suppress``: the edges stay, so that windows of a monitored site
  stay comparable bin by bin, and the suppressed cells are bounded downstream);
- a calibration edge is merged away (policy ``merge``) or the bins either side are
  suppressed (policy ``suppress``); calibration bins count both classes, so their edge
  goes if either class loses it;
- the note lists the cuts each class lost for the site (``positive_cuts_withheld``,
  ``negative_cuts_withheld``) and, per attribute, those its levels lost
  (``attribute_cuts_withheld``, which include the site's).

Every count still released for a population is then a difference of its cumulative
counts at its kept cuts, i.e. a union of its cells that each hold 0 or at least ``m``.

Why the site's own cuts isolate nobody
--------------------------------------
The standard is the tests' (``tests/site_agent/disclosure/test_combined_releases.py``):
a set of cases is exposed when its indicator is a linear combination of the sets behind
the released numbers, every empty group of cases counting as known. Fix a class; ``P(c)``
is the count of population ``P`` at or above ``c``. What is released is exactly ``S(c)``
for the site at ``c ∈ {0} ∪ K_site`` and ``L(c)`` for every level at ``c ∈ {0} ∪ K_sub``;
every other count is a difference of these. Take a subgroup cell ``[a, b)`` holding the
site's cells ``f₁ … f_k`` (``k ≥ 2``, cut at site-only cuts such as ``c``). Each released
set meets ``[a, b)`` in a whole site cell ``f_i`` or in a whole level cell ``L ∩ [a, b)``
(``L(a) − L(b)``; ``L(c)`` is not released), so a derivable set is derivable cell by cell,
as ``Σ αᵢ·fᵢ + Σ γ_L·L`` taking 0 or 1 on every occupied group ``(fᵢ, L)``. By step 3
every level with cases in ``[a, b)`` occupies every ``fᵢ``: if ``αᵢ ≠ αⱼ``, then
``αᵢ + γ_L`` and ``αⱼ + γ_L`` in ``{0, 1}`` for every ``L`` force one ``γ`` for all levels,
and the set is a union of whole site cells; if all ``α`` are equal it is a union of whole
level cells. Either holds 0 or at least ``m`` cases (steps 1 and 2). So neither a level's
count in ``[a, c)`` or ``[c, b)``, nor ``S(c) − Σ_{L′≠L} L′(c)`` (the ``L′(c)`` are
withheld), nor any other combination isolates fewer than ``m`` cases.

Why step 3 is needed: when a level has no case in ``[a, c)``, ``(S(c) − S(b)) − (L(a) −
L(b))`` *is* the count of everyone else in ``[c, b)``, small when that is why ``c`` went
for the subgroups (tested). Why one shared ``K_sub`` and one attribute: levels of two
attributes may occupy the two sides of ``c`` crosswise (``A₁∩B₁`` and ``A₂∩B₂`` below,
``A₁∩B₂`` and ``A₂∩B₁`` above) and then every group is derivable, though each level has
cases on both sides; the release holds no joint counts to rule this out. With one set per
attribute the brute-force search found 1 to 4 cases derivable on nested and on crossing
designs. Not covered here: pending cases (no class of this rule; their bins are
controlled by :mod:`site_agent.disclosure.small_cells`) and agreement tables (one series
per reader, see :func:`control_agreement`).

Agreement tables of the model at a threshold against a binary reader form one more cut
series per reader (cases the reader called 0, and called 1): a table whose threshold would
split off a small number of either is withheld as a whole.

The cells are computed from the release itself, so the rule needs no access to the data;
with differential privacy on, it runs on the noisy counts (post-processing).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from site_agent.contract.release import SiteRelease
from site_agent.disclosure.policy import SmallCellAction
from site_agent.disclosure.refusals import RefusalCode, refusal
from site_agent.disclosure.subgroup_combinations import combination_isolates
from site_agent.statistics.censored import Cell, CensoredCount
from site_agent.statistics.summaries import (
    CalibrationBins,
    ConfusionCounts,
    ScoreHistogram,
    SufficientStatistics,
    model_rater,
)

CLASSES = ("positive", "negative")
_THRESHOLD_WEIGHT = 1000
"""A kept threshold counts as this many kept edges: thresholds are what a protocol asks."""
_SHARED_WEIGHT = 1e9
"""Weight that keeps, in each class, every cut both classes could keep together."""


@dataclass
class PartitionControl:
    """What the partition rule changed in a release (merged into the disclosure note).

    ``cuts_withheld`` are the site's, by class; ``attribute_cuts_withheld`` maps each
    subgroup attribute to the cuts withheld for its levels, by class (a superset of the
    site's; the same set for every attribute, see the module docstring).
    """

    suppressed: list[str] = field(default_factory=list)
    merged: list[str] = field(default_factory=list)
    withheld: list[str] = field(default_factory=list)
    cuts_withheld: dict[str, tuple[float, ...]] = field(default_factory=dict)
    attribute_cuts_withheld: dict[str, dict[str, tuple[float, ...]]] = field(default_factory=dict)


def control_partition(
    release: SiteRelease, m: int, action: SmallCellAction
) -> tuple[SiteRelease, PartitionControl]:
    """Apply the rule of the module docstring to a release; return it and what changed.

    Callers have checked the site's and each subgroup's totals and the subgroup
    combinations on totals, so the coarsest partition (one cell) always passes.

    Raises
    ------
    DisclosureRefused
        ``protocol_invalid`` when a subgroup's cuts differ from the site's.
    """
    site = release.statistics
    cuts = _cuts(site)
    if any(_cuts(sub.statistics) != cuts for sub in release.subgroups):
        raise refusal(RefusalCode.PROTOCOL_INVALID)
    thresholds = set(site.thresholds)
    weights = np.array(
        [0.0, *(1.0 + _THRESHOLD_WEIGHT * (c in thresholds) for c in cuts)], dtype=np.float64
    )
    by_attribute: dict[str, list[SufficientStatistics]] = {}
    for sub in release.subgroups:
        by_attribute.setdefault(sub.attribute, []).append(sub.statistics)
    out = PartitionControl()
    site_kept: dict[str, frozenset[float]] = {}
    subgroup_kept: dict[str, frozenset[float]] = {}
    # The cuts both classes can keep together come first (they bin the row of all cases);
    # each class then adds the cuts its own counts allow.
    shared = _kept_starts(np.vstack([_cells(site, cuts, w) for w in (0, 1)]), weights, m)
    class_weights = weights.copy()
    class_weights[shared] += _SHARED_WEIGHT
    for which, name in enumerate(CLASSES):
        site_row = _cells(site, cuts, which)
        site_starts = _kept_starts(site_row[np.newaxis, :], class_weights, m)
        if release.subgroups:
            level_rows = [
                [_cells(s, cuts, which) for s in levels] for levels in by_attribute.values()
            ]
            site_starts, starts = _subgroup_starts(site_starts, site_row, level_rows, weights, m)
            subgroup_kept[name] = frozenset(cuts[s - 1] for s in starts if s > 0)
            withheld = tuple(c for c in cuts if c not in subgroup_kept[name])
            for attribute in by_attribute:
                out.attribute_cuts_withheld.setdefault(attribute, {})[name] = withheld
        site_kept[name] = frozenset(cuts[s - 1] for s in site_starts if s > 0)
        out.cuts_withheld[name] = tuple(c for c in cuts if c not in site_kept[name])
    controlled = release.model_copy(
        update={
            "statistics": _apply(site, site_kept, action, m, "statistics", out),
            "subgroups": tuple(
                sub.model_copy(
                    update={
                        "statistics": _apply(
                            sub.statistics,
                            subgroup_kept,
                            action,
                            m,
                            f"subgroups[{i}].statistics",
                            out,
                        )
                    }
                )
                for i, sub in enumerate(release.subgroups)
            ),
        }
    )
    return controlled, out


def _cuts(stats: SufficientStatistics) -> tuple[float, ...]:
    """Return every cut on the score axis that ``stats`` reports, increasing."""
    cuts = {t for t in stats.thresholds if t > 0}
    cuts.update(stats.histogram.edges[1:-1], stats.calibration.edges[1:-1])
    return tuple(sorted(cuts))


def _tail(row: Sequence[int]) -> list[int]:
    """Return ``sum(row[j:])`` for every ``j``."""
    return [int(v) for v in np.cumsum(np.asarray(row[::-1], dtype=np.int64))[::-1]]


def cumulative_counts(
    stats: SufficientStatistics, cuts: Sequence[float], which: int
) -> tuple[int, ...]:
    """Return how many cases of a class score at or above each cut (``which``: 0 positive).

    The count is read from the thresholds, else the histogram, else the calibration bins
    (they agree on exact counts; noisy ones may not). Every cut must be one ``stats``
    reports.
    """
    at_or_above: dict[float, int] = {}
    cal = stats.calibration
    cal_row = (
        cal.label_sum
        if which == 0
        else tuple(n - k for n, k in zip(cal.count, cal.label_sum, strict=True))
    )
    for edge, tail in zip(cal.edges[1:-1], _tail(cal_row)[1:], strict=True):
        at_or_above[edge] = tail
    hist = stats.histogram
    hist_row = hist.positive if which == 0 else hist.negative
    for edge, tail in zip(hist.edges[1:-1], _tail(hist_row)[1:], strict=True):
        at_or_above[edge] = tail
    for c in stats.confusion:
        if c.threshold > 0:
            at_or_above[c.threshold] = _exact(c.tp if which == 0 else c.fp)
    return tuple(at_or_above[c] for c in cuts)


def _exact(cell: Cell) -> int:
    """Return an exact cell; the partition runs before any cell is censored."""
    if isinstance(cell, CensoredCount):
        raise TypeError("the partition rule runs on exact counts, before small-cell control")
    return cell


def score_cuts(stats: SufficientStatistics) -> tuple[float, ...]:
    """Return every cut on the score axis that ``stats`` reports, increasing."""
    return _cuts(stats)


def _cells(
    stats: SufficientStatistics, cuts: tuple[float, ...], which: int
) -> npt.NDArray[np.int64]:
    """Return the class's count in each cell ``[0, c₁), [c₁, c₂), …, [c_k, 1]``."""
    total = stats.n_positive if which == 0 else stats.n_negative
    cumulative = np.array([total, *cumulative_counts(stats, cuts, which), 0], dtype=np.int64)
    return cumulative[:-1] - cumulative[1:]


def _kept_starts(
    rows: npt.NDArray[np.int64], weights: npt.NDArray[np.float64], m: int
) -> list[int]:
    """Return the first cell of each group of a partition into contiguous groups.

    Every row's sum over every group is 0 or at least ``m`` in absolute value; among
    such partitions, the one with the largest total weight of kept cuts (``weights[i]``
    is the cut before cell ``i``). Exact dynamic programming, O(cells² · rows).
    """
    cells = rows.shape[1]
    prefix = np.zeros((rows.shape[0], cells + 1), dtype=np.int64)
    prefix[:, 1:] = np.cumsum(rows, axis=1)
    best = np.full(cells + 1, -np.inf)
    best[0] = 0.0
    back = np.zeros(cells + 1, dtype=np.int64)
    for end in range(1, cells + 1):
        sums = prefix[:, end : end + 1] - prefix[:, :end]
        ok = np.all((sums == 0) | (np.abs(sums) >= m), axis=0)
        candidate = np.where(ok, best[:end] + weights[:end], -np.inf)
        start = int(np.argmax(candidate))
        best[end], back[end] = candidate[start], start
    if not np.isfinite(best[cells]):  # only when a row's total is itself small (noisy)
        return [0]
    starts, end = [], cells
    while end > 0:
        end = int(back[end])
        starts.append(end)
    return starts[::-1]


def _kept_within(
    rows: npt.NDArray[np.int64],
    weights: npt.NDArray[np.float64],
    m: int,
    allowed: list[int],
) -> list[int]:
    """Return the kept group starts, as :func:`_kept_starts`, among ``allowed`` starts only.

    ``allowed`` (increasing, from 0) are the site's kept starts: cells between two of them
    are summed into one before the search, so the result is a subset of ``allowed``.
    """
    grouped = np.add.reduceat(rows, allowed, axis=1)
    return [allowed[g] for g in _kept_starts(grouped, weights[allowed], m)]


def _subgroup_starts(
    site_starts: list[int],
    site_row: npt.NDArray[np.int64],
    level_rows: list[list[npt.NDArray[np.int64]]],
    weights: npt.NDArray[np.float64],
    m: int,
) -> tuple[list[int], list[int]]:
    """Return the site's and the subgroups' kept starts (steps 2 and 3 of the rule).

    With two or more attributes the site keeps the subgroups' starts: their joint
    occupancy is not in the release (module docstring).
    """
    rows = [r for levels in level_rows for r in levels]
    rows += [site_row - np.sum(levels, axis=0) for levels in level_rows]
    starts = _kept_within(np.array(rows), weights, m, site_starts)
    starts = _merge_combinations(starts, site_row, level_rows, m)
    if len(level_rows) > 1:
        return list(starts), starts
    return _occupied_on_every_side(site_starts, starts, np.array(rows), weights), starts


def _occupied_on_every_side(
    site_starts: list[int],
    starts: list[int],
    rows: npt.NDArray[np.int64],
    weights: npt.NDArray[np.float64],
) -> list[int]:
    """Take away the site's own cuts until no row is empty in part of a subgroup cell.

    Inside each subgroup cell, every row (a level or the rest) that is not 0 on the whole
    cell must be non-zero in each of the site's cells there; where one is 0, the site cut
    on the lighter side of that site cell is taken away (the cut of a threshold last).
    """
    kept = set(starts)
    site = list(site_starts)
    bounds = [*starts, rows.shape[1]]
    for lo, hi in itertools.pairwise(bounds):
        while True:
            inner = [s for s in site if lo < s < hi]
            edges = [lo, *inner, hi]
            empty = next(
                (
                    (u, v)
                    for row in rows
                    if row[lo:hi].any()
                    for u, v in itertools.pairwise(edges)
                    if not row[u:v].any()
                ),
                None,
            )
            if empty is None or not inner:
                break
            u, v = empty
            candidates = [c for c in (u, v) if c not in kept and lo < c < hi]
            site.remove(min(candidates, key=lambda c: weights[c]))
    return site


def _merge_combinations(
    starts: list[int],
    site_row: npt.NDArray[np.int64],
    level_rows: list[list[npt.NDArray[np.int64]]],
    m: int,
) -> list[int]:
    """Merge groups with a neighbour until no subgroup combination in a group is small."""
    starts = list(starts)

    def isolates(i: int) -> bool:
        lo = starts[i]
        hi = starts[i + 1] if i + 1 < len(starts) else len(site_row)
        total = int(site_row[lo:hi].sum())
        attributes = []
        for levels in level_rows:
            parts = [int(r[lo:hi].sum()) for r in levels]
            attributes.append([*parts, total - sum(parts)])
        return combination_isolates(total, attributes, m)

    i = 0
    while i < len(starts):
        if len(starts) > 1 and isolates(i):
            del starts[i + 1 if i + 1 < len(starts) else i]
            i = max(i - 1, 0)
        else:
            i += 1
    return starts


def _apply(
    stats: SufficientStatistics,
    kept: dict[str, frozenset[float]],
    action: SmallCellAction,
    m: int,
    path: str,
    out: PartitionControl,
) -> SufficientStatistics:
    both = kept["positive"] & kept["negative"]
    stats = control_agreement(stats, m, path, out, allowed=both)
    return stats.model_copy(
        update={
            "confusion": tuple(
                _confusion(c, kept, f"{path}.confusion[{i}]", out, stats.confusion)
                for i, c in enumerate(stats.confusion)
            ),
            "histogram": _histogram(stats.histogram, kept, action, f"{path}.histogram", out),
            "calibration": _calibration(
                stats.calibration, both, action, f"{path}.calibration", out
            ),
        }
    )


_CLASS_CELLS = {"positive": ("tp", "fn"), "negative": ("fp", "tn")}


def _confusion(
    c: ConfusionCounts,
    kept: dict[str, frozenset[float]],
    path: str,
    out: PartitionControl,
    table: tuple[ConfusionCounts, ...] = (),
) -> ConfusionCounts:
    """Withhold a threshold's cells in each class whose cut is withheld: censored, not 0.

    The count at or above a withheld cut lies between the counts at the nearest thresholds
    of this release kept above and below it in that class (0 and the class total past the
    ends); those are released exactly (cells between kept cuts hold 0 or at least ``m``
    cases, so no later small-cell rule touches them), so the range discloses nothing new.
    """
    if c.threshold <= 0:
        return c
    gone = [name for name in CLASSES if c.threshold not in kept[name]]
    if not gone:
        return c
    out.suppressed.extend(f"{path}.{k}" for name in gone for k in _CLASS_CELLS[name])
    out.withheld.append(f"{path}.patient_moments")
    cells: dict[str, Cell] = {"tp": c.tp, "fp": c.fp, "fn": c.fn, "tn": c.tn}
    for name in gone:
        above, below = _CLASS_CELLS[name]
        total = _class_total(c, name)
        lower_bound, upper_bound = 0, total
        for other in table:
            if other.threshold <= 0 or other.threshold not in kept[name]:
                continue
            count = other.tp if name == "positive" else other.fp
            if not isinstance(count, int):
                continue
            if other.threshold > c.threshold:
                lower_bound = max(lower_bound, count)
            elif other.threshold < c.threshold:
                upper_bound = min(upper_bound, count)
        cells[above] = CensoredCount(low=lower_bound, high=upper_bound, class_total=total)
        cells[below] = CensoredCount(
            low=total - upper_bound, high=total - lower_bound, class_total=total
        )
    return c.with_censored(cells)


def _class_total(c: ConfusionCounts, name: str) -> int:
    above, below = _CLASS_CELLS[name]
    total = 0
    for cell in (getattr(c, above), getattr(c, below)):
        if isinstance(cell, CensoredCount):
            return cell.class_total
        total += cell
    return total


def _next_to_removed(edges: tuple[float, ...], keep: frozenset[float]) -> set[int]:
    """Return the bins on either side of an interior edge not in ``keep``."""
    bins: set[int] = set()
    for j, edge in enumerate(edges[1:-1], start=1):
        if edge not in keep:
            bins.update((j - 1, j))
    return bins


def _histogram(
    h: ScoreHistogram,
    kept: dict[str, frozenset[float]],
    action: SmallCellAction,
    path: str,
    out: PartitionControl,
) -> ScoreHistogram:
    """Withhold, from each class row, the edges that class lost.

    ``merge``: each class row keeps its own kept cuts (the bins either side of a lost
    edge become one) and the row of all cases keeps the cuts both classes kept.
    ``suppress``: the edges stay; the bins either side of a lost edge are suppressed in
    that class's row and listed in the note.
    """
    both = kept["positive"] & kept["negative"]
    inner = h.edges[1:-1]
    if all(e in both for e in inner):
        return h
    if action is SmallCellAction.MERGE:
        out.merged.append(path)

        def on(keep: frozenset[float]) -> tuple[float, ...]:
            return (0.0, *(e for e in inner if e in keep), 1.0)

        return h.with_edges(on(both), on(kept["positive"]), on(kept["negative"]))
    pending = [a - p - n for a, p, n in zip(h.all, h.positive, h.negative, strict=True)]
    rows, hidden = [], []
    for name, row in (("positive", h.positive), ("negative", h.negative)):
        gone = _next_to_removed(h.edges, kept[name])
        out.suppressed.extend(f"{path}.{name}[{i}]" for i in sorted(gone))
        rows.append(tuple(0 if i in gone else v for i, v in enumerate(row)))
        hidden.append(tuple(sorted({*getattr(h, f"{name}_suppressed"), *gone})))
    return ScoreHistogram(
        edges=h.edges,
        positive=rows[0],
        negative=rows[1],
        all=tuple(p + n + q for p, n, q in zip(rows[0], rows[1], pending, strict=True)),
        positive_suppressed=hidden[0],
        negative_suppressed=hidden[1],
    )


def _calibration(
    c: CalibrationBins,
    both: frozenset[float],
    action: SmallCellAction,
    path: str,
    out: PartitionControl,
) -> CalibrationBins:
    if all(e in both for e in c.edges[1:-1]):
        return c
    if action is SmallCellAction.MERGE:
        out.merged.append(path)
        return c.coarsened((0.0, *(e for e in c.edges[1:-1] if e in both), 1.0))
    gone = _next_to_removed(c.edges, both)
    out.suppressed.extend(f"{path}[{i}]" for i in sorted(gone))
    return c.without_bins(gone)


def control_agreement(
    stats: SufficientStatistics,
    m: int,
    path: str,
    out: PartitionControl,
    *,
    allowed: frozenset[float],
) -> SufficientStatistics:
    """Withhold model-versus-reader tables whose threshold splits off a small count.

    A table is kept only at a threshold that both classes kept (``allowed``), and only
    when the release carries no pending case: the reader's calls cross the classes and
    count pending cases, which the release cuts only at histogram edges, so a table at a
    threshold could be set against the class counts to isolate pending or uncalled cases.
    Among those thresholds, for each binary reader, three series must hold 0 or at least
    ``m`` cases (in absolute value) between kept thresholds: the cases the reader called 0,
    those called 1, and the labelled cases minus both (the labelled cases the reader did
    not call, when no pending case is in the release).
    """
    by_name = {model_rater(t): t for t in stats.thresholds}
    series: dict[str, list[tuple[float, int]]] = {}
    for i, table in enumerate(stats.agreement):
        first = table.raters[0]
        if table.scale == "binary" and first in by_name and by_name[first] > 0:
            series.setdefault(table.raters[1], []).append((by_name[first], i))
    confusion = {c.threshold: c for c in stats.confusion}
    dropped: set[int] = {
        i for ts in series.values() for t, i in ts if t not in allowed or stats.n_pending > 0
    }
    for reader_tables in series.values():
        reader_tables[:] = [(t, i) for t, i in reader_tables if i not in dropped]
        if not reader_tables:
            continue
        reader_tables.sort()
        rows = []
        lowest = stats.agreement[reader_tables[0][1]]
        for v in (0, 1):
            known = lowest.exact_counts()
            total = known[0][v] + known[1][v]
            cumulative = [
                total,
                *(stats.agreement[i].exact_counts()[1][v] for _, i in reader_tables),
                0,
            ]
            rows.append(np.diff(-np.asarray(cumulative, dtype=np.int64)))
        labelled = [
            stats.n_positive + stats.n_negative,
            *(_exact(confusion[t].tp) + _exact(confusion[t].fp) for t, _ in reader_tables),
            0,
        ]
        rows.append(np.diff(-np.asarray(labelled, dtype=np.int64)) - rows[0] - rows[1])
        weights = np.ones(len(reader_tables) + 1, dtype=np.float64)
        weights[0] = 0.0
        starts = set(_kept_starts(np.array(rows), weights, m))
        dropped |= {i for k, (_, i) in enumerate(reader_tables, start=1) if k not in starts}
    if not dropped:
        return stats
    out.withheld.extend(f"{path}.agreement[{i}]" for i in sorted(dropped))
    return stats.withholding(dropped)
