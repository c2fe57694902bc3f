"""Mergeable sufficient statistics: counts from which every pooled metric is derived.

(Over 500 lines for a reason: the confusion, histogram, calibration and agreement summaries
share one merge and re-binning algebra, and the release schema takes them as one model.)

A site computes these from its predictions table; the coordinator adds them up across
sites. Every model here holds counts, sums and bin edges only, never a per-case value,
and every list is as long as a set of bins, thresholds or categories fixed by the plan.
Merging the statistics of two disjoint sets of cases (patients are distinct across sites)
gives exactly the statistics of their union; that is what makes them *sufficient* for
pooled sensitivity, specificity, histogram AUC, calibration and agreement.

Conventions
-----------
- A case is called positive at threshold ``t`` when ``score >= t`` (common practice).
- Bin ``i`` of edges ``e`` holds scores in ``[e[i], e[i+1])``; the last bin is closed,
  ``[e[-2], 1]``.
- Label metrics (confusion counts, class histograms, calibration) use only cases whose
  reference standard is known; the label-free histogram ``all`` counts every case.
- Agreement tables count cases where both raters made a call. A reader is *binary* when
  every call it made at the site is 0 or 1, otherwise *ordinal*. Ordinal tables span the
  contiguous integer range of the calls seen (one level if all calls agree), so that
  category index distances equal call distances; merging two ordinal tables widens both
  to the union of their ranges (empty rows and columns leave the kappas unchanged).
- Validators check shapes (one entry per bin, threshold or category; counts are
  non-negative integers) but do not cross-check counts against each other: a site's
  disclosure step may add noise to released counts.
"""

from __future__ import annotations

from collections.abc import Mapping, Set
from itertools import pairwise
from typing import Any, Literal, TypeVar

import numpy as np
import numpy.typing as npt
from pydantic import BaseModel, ConfigDict, Field, NonNegativeInt, model_validator

from site_agent.contract.protocol import EvaluationPlan
from site_agent.data.predictions import MISSING, Predictions
from site_agent.exceptions import InputError
from site_agent.statistics.censored import Cell, CensoredCount, is_censored, merge_pair
from site_agent.statistics.proportions import ClusterMoments

MAX_BINS = 1000
"""Most bins a histogram may have: keeps a release from carrying per-case values."""
MAX_THRESHOLDS = 100
CLASS_ROWS = ("positive", "negative")
"""The class rows of a score histogram."""
MAX_CATEGORIES = 20
"""Most levels an ordinal agreement table may span."""
MAX_AGREEMENT_TABLES = 200
MODEL_CATEGORY = "model_category"
"""Rater name of the model's ordinal ``category`` output in agreement tables."""

Scale = Literal["binary", "ordinal"]
ProportionName = Literal["sensitivity", "specificity", "ppv", "npv"]
PROPORTIONS: tuple[ProportionName, ...] = ("sensitivity", "specificity", "ppv", "npv")


class _Stat(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


def model_rater(threshold: float) -> str:
    """Return the rater name of the model binarised at ``threshold`` (``model@0.5``)."""
    return f"model@{threshold:g}"


def _check_edges(edges: tuple[float, ...]) -> None:
    if not 2 <= len(edges) <= MAX_BINS + 1:  # one bin: a site merged every bin
        raise ValueError(f"edges must define between 1 and {MAX_BINS} bins")
    if edges[0] != 0.0 or edges[-1] != 1.0:
        raise ValueError("edges must start at 0 and end at 1")
    if any(b <= a for a, b in pairwise(edges)):
        raise ValueError("edges must increase strictly")


def _same(kind: str, a: object, b: object) -> None:
    if a != b:
        raise InputError(f"cannot merge statistics computed with different {kind}")


def common_edges(a: tuple[float, ...], b: tuple[float, ...]) -> tuple[float, ...]:
    """Return the edges two binnings share, for re-binning both exactly.

    Both binnings start at 0 and end at 1, so at worst one bin, [0, 1], remains: the merged
    histogram then carries no ordering, and pooled AUCs are taken from the sites' own
    histograms instead (:func:`site_agent.statistics.roc.mixed_histogram_auc`).
    """
    return tuple(sorted(set(a) & set(b)))


def _groups_for(old: tuple[float, ...], new: tuple[float, ...]) -> list[tuple[int, int]]:
    """Return, for each bin of ``new``, the range of ``old`` bins it covers."""
    position = {edge: i for i, edge in enumerate(old)}
    if any(edge not in position for edge in new) or new[0] != old[0] or new[-1] != old[-1]:
        raise InputError("cannot re-bin: the new edges are not a subset of the old ones")
    return [(position[lo], position[hi]) for lo, hi in pairwise(new)]


def _regrouped_bins(bins: tuple[int, ...], groups: list[tuple[int, int]]) -> tuple[int, ...]:
    """Return the new bins (of ``groups``, see :func:`_groups_for`) holding any of ``bins``."""
    return tuple(k for k, (lo, hi) in enumerate(groups) if any(lo <= i < hi for i in bins))


def hidden_bins(suppressed: tuple[int, ...], counts: tuple[int, ...]) -> list[int]:
    """Return the bins a row's hidden cases may lie in: those listed as suppressed.

    For a row that lists none (released before suppressed bins were listed), every bin
    that reads 0.
    """
    return list(suppressed) or [i for i, c in enumerate(counts) if c == 0]


def _union(*groups: tuple[int, ...] | Set[int]) -> tuple[int, ...]:
    """Return the sorted union of bin indices."""
    return tuple(sorted(set().union(*groups)))


_Number = TypeVar("_Number", int, float)


def _regroup(values: tuple[_Number, ...], groups: list[tuple[int, int]]) -> tuple[_Number, ...]:
    return tuple(sum(values[lo:hi]) for lo, hi in groups)


def _add(a: tuple[int, ...], b: tuple[int, ...]) -> tuple[int, ...]:
    return tuple(x + y for x, y in zip(a, b, strict=True))


def _addf(a: tuple[float, ...], b: tuple[float, ...]) -> tuple[float, ...]:
    return tuple(x + y for x, y in zip(a, b, strict=True))


def _bin_index(scores: npt.NDArray[np.float64], edges: tuple[float, ...]) -> npt.NDArray[np.intp]:
    """Return the bin of each score: ``[e[i], e[i+1])``, the last bin closed at 1."""
    index = np.searchsorted(np.asarray(edges), scores, side="right") - 1
    return np.clip(index, 0, len(edges) - 2)


def _bin_counts(index: npt.NDArray[np.intp], bins: int) -> tuple[int, ...]:
    return tuple(int(c) for c in np.bincount(index, minlength=bins))


def _bin_sums(
    index: npt.NDArray[np.intp], weights: npt.NDArray[np.float64], bins: int
) -> tuple[float, ...]:
    return tuple(float(s) for s in np.bincount(index, weights=weights, minlength=bins))


class PatientMoments(_Stat):
    """Per-patient moments of one proportion (see :class:`~.proportions.ClusterMoments`).

    With ``a_i`` successes among ``m_i`` trials for patient ``i``: the number of patients
    with at least one trial, ``Σa_i²``, ``Σa_i·m_i`` and ``Σm_i²``. Moments of disjoint sets
    of patients add.
    """

    clusters: NonNegativeInt = 0
    sum_a2: NonNegativeInt = 0
    sum_am: NonNegativeInt = 0
    sum_m2: NonNegativeInt = 0

    def merge(self, other: PatientMoments) -> PatientMoments:
        """Return the moments of the union of two disjoint sets of patients."""
        return PatientMoments(
            clusters=self.clusters + other.clusters,
            sum_a2=self.sum_a2 + other.sum_a2,
            sum_am=self.sum_am + other.sum_am,
            sum_m2=self.sum_m2 + other.sum_m2,
        )


class ConfusionCounts(_Stat):
    """Confusion counts at one threshold, with per-patient moments of each proportion."""

    threshold: float = Field(ge=0.0, le=1.0)
    tp: NonNegativeInt | CensoredCount
    fp: NonNegativeInt | CensoredCount
    fn: NonNegativeInt | CensoredCount
    tn: NonNegativeInt | CensoredCount
    sensitivity: PatientMoments = Field(default_factory=PatientMoments)
    specificity: PatientMoments = Field(default_factory=PatientMoments)
    ppv: PatientMoments = Field(default_factory=PatientMoments)
    npv: PatientMoments = Field(default_factory=PatientMoments)

    @model_validator(mode="after")
    def _censored_in_pairs(self) -> ConfusionCounts:
        for a, b in ((self.tp, self.fn), (self.fp, self.tn)):
            if is_censored(a) != is_censored(b):
                raise ValueError("a censored confusion cell needs its class partner censored")
            if isinstance(a, CensoredCount) and isinstance(b, CensoredCount):
                total = a.class_total
                if b.class_total != total or a.low + b.high != total or a.high + b.low != total:
                    raise ValueError("censored partners must share their class total")
        return self

    @property
    def censored(self) -> bool:
        """Whether any cell is censored by a site's minimum-cell rule."""
        return is_censored(self.tp, self.fp, self.fn, self.tn)

    def cells(self, name: ProportionName) -> tuple[Cell, Cell]:
        """Return the (successes, failures) cells of a proportion: sensitivity is (tp, fn)."""
        return {
            "sensitivity": (self.tp, self.fn),
            "specificity": (self.tn, self.fp),
            "ppv": (self.tp, self.fp),
            "npv": (self.tn, self.fn),
        }[name]

    def counts(self, name: ProportionName) -> tuple[int, int] | None:
        """Return (successes, trials) of a proportion, or None when a cell of it is censored."""
        successes, failures = self.cells(name)
        if isinstance(successes, CensoredCount) or isinstance(failures, CensoredCount):
            return None
        return successes, successes + failures

    def moments(self, name: ProportionName) -> ClusterMoments:
        """Return the full cluster moments of a proportion for the clustered interval.

        Raises
        ------
        InputError
            When a cell of the proportion is censored (its counts are not known).
        """
        counts = self.counts(name)
        if counts is None:
            raise InputError(f"{name} rests on a censored confusion cell")
        successes, total = counts
        pm: PatientMoments = getattr(self, name)
        return ClusterMoments(
            successes, total, pm.clusters, float(pm.sum_a2), float(pm.sum_am), float(pm.sum_m2)
        )

    def with_censored(self, cells: dict[str, Cell]) -> ConfusionCounts:
        """Return the counts with ``cells`` (by name) replaced, patient moments withheld.

        The moments of a proportion leave with a censored cell of it; they are dropped
        for the whole threshold.
        """
        empty = PatientMoments()
        current: dict[str, Cell] = {"tp": self.tp, "fp": self.fp, "fn": self.fn, "tn": self.tn}
        return ConfusionCounts(
            threshold=self.threshold,
            **{**current, **cells},
            sensitivity=empty,
            specificity=empty,
            ppv=empty,
            npv=empty,
        )

    def merge(self, other: ConfusionCounts) -> ConfusionCounts:
        """Return the counts of the union of two disjoint sets of cases."""
        _same("thresholds", self.threshold, other.threshold)
        tp, fn = merge_pair(self.tp, self.fn, other.tp, other.fn)
        fp, tn = merge_pair(self.fp, self.tn, other.fp, other.tn)
        return ConfusionCounts(
            threshold=self.threshold,
            tp=tp,
            fp=fp,
            fn=fn,
            tn=tn,
            sensitivity=self.sensitivity.merge(other.sensitivity),
            specificity=self.specificity.merge(other.specificity),
            ppv=self.ppv.merge(other.ppv),
            npv=self.npv.merge(other.npv),
        )


class ScoreHistogram(_Stat):
    """Score counts per bin: diseased, non-diseased, and every case (pending labels too).

    ``edges`` bin the ``all`` row, and each class row unless the class has edges of its
    own (``positive_edges``, ``negative_edges``): disclosure control keeps for each class
    the cuts its own counts allow (:mod:`site_agent.disclosure.partition`), so a class row
    may be finer than ``all``, never coarser (every edge of ``all`` is an edge of both
    classes). None means the class row is on ``edges``.

    ``positive_suppressed`` and ``negative_suppressed`` list the bins of a class row that
    the site's policy suppressed (they read 0; after a re-binning or a merge, every bin
    that holds a suppressed one): the class's hidden cases lie in them.
    """

    edges: tuple[float, ...]
    positive: tuple[NonNegativeInt, ...]
    negative: tuple[NonNegativeInt, ...]
    all: tuple[NonNegativeInt, ...]
    positive_edges: tuple[float, ...] | None = None
    negative_edges: tuple[float, ...] | None = None
    positive_suppressed: tuple[NonNegativeInt, ...] = ()
    negative_suppressed: tuple[NonNegativeInt, ...] = ()

    @model_validator(mode="after")
    def _lengths_match_edges(self) -> ScoreHistogram:
        _check_edges(self.edges)
        if len(self.all) != len(self.edges) - 1:
            raise ValueError("histogram counts must have one entry per bin")
        for name in CLASS_ROWS:
            edges = self.class_edges(name)
            _check_edges(edges)
            if len(getattr(self, name)) != len(edges) - 1:
                raise ValueError("histogram counts must have one entry per bin")
            if not set(self.edges) <= set(edges):
                raise ValueError(f"every edge of the all row must be an edge of {name}")
            hidden = list(getattr(self, f"{name}_suppressed"))
            if hidden != sorted(set(hidden)) or any(i >= len(edges) - 1 for i in hidden):
                raise ValueError(f"suppressed {name} bins must be unique, sorted bin indices")
        return self

    def class_edges(self, name: str) -> tuple[float, ...]:
        """Return the edges of class row ``name`` (``positive`` or ``negative``)."""
        own: tuple[float, ...] | None = getattr(self, f"{name}_edges")
        return self.edges if own is None else own

    def class_histogram(self, name: str) -> tuple[tuple[float, ...], tuple[int, ...]]:
        """Return ``(edges, counts)`` of class row ``name``."""
        return self.class_edges(name), getattr(self, name)

    def class_on_edges(self, name: str) -> tuple[int, ...]:
        """Return class row ``name`` on ``edges`` (the all row's bins; exact)."""
        edges, counts = self.class_histogram(name)
        return _regroup(counts, _groups_for(edges, self.edges))

    def suppressed_on_edges(self, name: str) -> tuple[int, ...]:
        """Return the bins of ``edges`` that hold a suppressed bin of class row ``name``."""
        groups = _groups_for(self.class_edges(name), self.edges)
        return _regrouped_bins(getattr(self, f"{name}_suppressed"), groups)

    def coarsened(self, edges: tuple[float, ...]) -> ScoreHistogram:
        """Return the histogram with every row on ``edges``, a subset of ``edges`` (exact)."""
        return self.with_edges(edges, edges, edges)

    def with_edges(
        self,
        edges: tuple[float, ...],
        positive_edges: tuple[float, ...],
        negative_edges: tuple[float, ...],
    ) -> ScoreHistogram:
        """Return the histogram re-binned row by row to subsets of its own edges (exact)."""
        rows: dict[str, tuple[int, ...]] = {}
        for name, new in (("positive", positive_edges), ("negative", negative_edges)):
            old, counts = self.class_histogram(name)
            groups = _groups_for(old, new)
            rows[name] = _regroup(counts, groups)
            rows[f"{name}_suppressed"] = _regrouped_bins(
                getattr(self, f"{name}_suppressed"), groups
            )
        return ScoreHistogram(
            edges=edges,
            all=_regroup(self.all, _groups_for(self.edges, edges)),
            positive_edges=None if positive_edges == edges else positive_edges,
            negative_edges=None if negative_edges == edges else negative_edges,
            **rows,
        )

    def merge(self, other: ScoreHistogram) -> ScoreHistogram:
        """Return the histogram of the union of two disjoint sets of cases.

        Each row is first re-binned to the edges both histograms kept for it (sites keep
        different edges once disclosure control merges small bins), which is exact.
        """
        shared = [
            common_edges(self.edges, other.edges),
            *(common_edges(self.class_edges(n), other.class_edges(n)) for n in CLASS_ROWS),
        ]
        a, b = self.with_edges(*shared), other.with_edges(*shared)
        return a.model_copy(
            update={
                "positive": _add(a.positive, b.positive),
                "negative": _add(a.negative, b.negative),
                "all": _add(a.all, b.all),
                **{
                    f"{n}_suppressed": _union(
                        getattr(a, f"{n}_suppressed"), getattr(b, f"{n}_suppressed")
                    )
                    for n in CLASS_ROWS
                },
            }
        )


class CalibrationBins(_Stat):
    """Per-bin sums of labelled cases: count, Σscore, Σlabel and Σ(score − label)²."""

    edges: tuple[float, ...]
    count: tuple[NonNegativeInt, ...]
    score_sum: tuple[float, ...]
    label_sum: tuple[NonNegativeInt, ...]
    squared_error_sum: tuple[float, ...]
    suppressed: tuple[NonNegativeInt, ...] = Field(
        default=(),
        description="Bins the site's policy suppressed (their count and sums read 0); after "
        "a merge, every bin that holds a suppressed bin of either side.",
    )

    @model_validator(mode="after")
    def _lengths_match_edges(self) -> CalibrationBins:
        _check_edges(self.edges)
        bins = len(self.edges) - 1
        fields = (self.count, self.score_sum, self.label_sum, self.squared_error_sum)
        if any(len(f) != bins for f in fields):
            raise ValueError("calibration sums must have one entry per bin")
        if list(self.suppressed) != sorted(set(self.suppressed)) or any(
            i >= bins for i in self.suppressed
        ):
            raise ValueError("suppressed calibration bins must be unique, sorted bin indices")
        return self

    def coarsened(self, edges: tuple[float, ...]) -> CalibrationBins:
        """Return the sums on ``edges``, a subset of this one's edges (exact)."""
        groups = _groups_for(self.edges, edges)
        return CalibrationBins(
            edges=edges,
            count=_regroup(self.count, groups),
            score_sum=_regroup(self.score_sum, groups),
            label_sum=_regroup(self.label_sum, groups),
            squared_error_sum=_regroup(self.squared_error_sum, groups),
            suppressed=_regrouped_bins(self.suppressed, groups),
        )

    def without_bins(self, bins: Set[int]) -> CalibrationBins:
        """Return the sums with every bin in ``bins`` suppressed (its count and sums 0)."""

        def keep(values: tuple[Any, ...]) -> tuple[Any, ...]:
            return tuple(type(v)(0) if i in bins else v for i, v in enumerate(values))

        return CalibrationBins(
            edges=self.edges,
            count=keep(self.count),
            score_sum=keep(self.score_sum),
            label_sum=keep(self.label_sum),
            squared_error_sum=keep(self.squared_error_sum),
            suppressed=_union(self.suppressed, bins),
        )

    def merge(self, other: CalibrationBins) -> CalibrationBins:
        """Return the sums of the union of two disjoint sets of cases (re-binned as needed)."""
        if self.edges != other.edges:
            edges = common_edges(self.edges, other.edges)
            return self.coarsened(edges).merge(other.coarsened(edges))
        return CalibrationBins(
            edges=self.edges,
            count=_add(self.count, other.count),
            score_sum=_addf(self.score_sum, other.score_sum),
            label_sum=_add(self.label_sum, other.label_sum),
            squared_error_sum=_addf(self.squared_error_sum, other.squared_error_sum),
            suppressed=_union(self.suppressed, other.suppressed),
        )


class AgreementTable(_Stat):
    """A square table of two raters' calls: ``counts[i][j]`` cases rated ``i`` and ``j``."""

    raters: tuple[str, str]
    scale: Scale
    categories: tuple[int, ...]
    counts: tuple[tuple[NonNegativeInt | None, ...], ...]
    """Cases per pair of calls; None for a cell a site's minimum-cell rule withheld."""
    censored: bool = False
    """True when cells of the table were withheld (None): ``n`` is then a lower bound and
    no kappa is derived from the table."""

    @model_validator(mode="after")
    def _square_over_categories(self) -> AgreementTable:
        k = len(self.categories)
        if self.scale == "binary" and self.categories != (0, 1):
            raise ValueError("a binary agreement table has categories (0, 1)")
        if not 1 <= k <= MAX_CATEGORIES:
            raise ValueError(f"an agreement table has between 1 and {MAX_CATEGORIES} categories")
        if list(self.categories) != list(range(self.categories[0], self.categories[0] + k)):
            raise ValueError("agreement categories must be consecutive integers")
        if len(self.counts) != k or any(len(row) != k for row in self.counts):
            raise ValueError("agreement counts must be a square table over the categories")
        if any(v is None for row in self.counts for v in row) and not self.censored:
            raise ValueError("a table with withheld cells must be marked censored")
        return self

    @property
    def n(self) -> int:
        """Number of cases both raters called (those in released cells when censored)."""
        return sum(v for row in self.counts for v in row if v is not None)

    def exact_counts(self) -> tuple[tuple[int, ...], ...]:
        """Return the counts, every cell known.

        Raises
        ------
        InputError
            When cells were withheld (the table is censored).
        """
        if any(v is None for row in self.counts for v in row):
            raise InputError(f"cells of the {self.raters} agreement table were withheld")
        return tuple(tuple(v for v in row if v is not None) for row in self.counts)

    def matrix(self) -> npt.NDArray[np.int64]:
        """Return the counts as a ``k × k`` integer array (every cell known; see above)."""
        return np.asarray(self.exact_counts(), dtype=np.int64).reshape(len(self.categories), -1)

    def _widened(self, low: int, high: int) -> list[list[int | None]]:
        size = high - low + 1
        out: list[list[int | None]] = [[0] * size for _ in range(size)]
        start = self.categories[0] - low
        for i, row in enumerate(self.counts):
            out[start + i][start : start + len(row)] = row
        return out

    def merge(self, other: AgreementTable) -> AgreementTable:
        """Return the table of the union of two disjoint sets of cases.

        Raises
        ------
        InputError
            If the raters or the scale differ, or if the union of two ordinal tables
            spans more than :data:`MAX_CATEGORIES` levels.
        """
        _same("agreement raters", self.raters, other.raters)
        _same("agreement scales (binary and ordinal)", self.scale, other.scale)
        low = min(self.categories[0], other.categories[0])
        high = max(self.categories[-1], other.categories[-1])
        if high - low + 1 > MAX_CATEGORIES:
            raise InputError(f"merged ordinal calls span more than {MAX_CATEGORIES} levels")
        total = tuple(
            tuple(None if a is None or b is None else a + b for a, b in zip(r, q, strict=True))
            for r, q in zip(self._widened(low, high), other._widened(low, high), strict=True)
        )
        return AgreementTable(
            raters=self.raters,
            scale=self.scale,
            categories=tuple(range(low, high + 1)),
            counts=total,
            censored=self.censored or other.censored,
        )


class SufficientStatistics(_Stat):
    """Everything a site releases about its cases as a whole, in mergeable form."""

    n_observations: NonNegativeInt
    n_positive: NonNegativeInt
    n_negative: NonNegativeInt
    n_pending: NonNegativeInt
    n_patients: NonNegativeInt
    confusion: tuple[ConfusionCounts, ...] = Field(max_length=MAX_THRESHOLDS)
    histogram: ScoreHistogram
    calibration: CalibrationBins
    agreement: tuple[AgreementTable, ...] = Field(default=(), max_length=MAX_AGREEMENT_TABLES)
    withheld_agreement: tuple[tuple[str, str], ...] = Field(
        default=(),
        max_length=MAX_AGREEMENT_TABLES,
        description="Raters of the agreement tables the site's policy withheld whole.",
    )
    pending_withheld: bool = Field(
        default=False,
        description="The site's policy withheld its pending cases (at least one): "
        "n_pending reads 0 and n_observations leaves them out.",
    )

    @model_validator(mode="after")
    def _thresholds_and_tables_ordered(self) -> SufficientStatistics:
        if not self.confusion:
            raise ValueError("at least one threshold is needed")
        thresholds = [c.threshold for c in self.confusion]
        if any(b <= a for a, b in pairwise(thresholds)):
            raise ValueError("thresholds must increase strictly")
        raters = [t.raters for t in self.agreement]
        if raters != sorted(set(raters)):
            raise ValueError("agreement tables must be unique and sorted by raters")
        withheld = list(self.withheld_agreement)
        if withheld != sorted(set(withheld)) or set(withheld) & set(raters):
            raise ValueError("withheld agreement tables must be unique, sorted and not released")
        if self.pending_withheld and self.n_pending:
            raise ValueError("withheld pending cases must read 0")
        return self

    @property
    def thresholds(self) -> tuple[float, ...]:
        """Thresholds of the confusion counts, increasing."""
        return tuple(c.threshold for c in self.confusion)

    def class_bins(self, name: str) -> list[tuple[tuple[float, ...], tuple[int, ...]]]:
        """Return class ``name``'s released bins, with its hidden cases as one more bin.

        A site whose policy suppresses small bins releases them as 0 (listed in its note);
        the class total is released, so the cases they held are known in number but not
        in place. They are returned as one bin spanning the suppressed bins of the row
        (``{name}_suppressed``; for a release that does not list them, the bins that read
        0), so that every AUC bound and ROC point computed from the bins counts them as
        unknown within that span, never as absent. Only the released row when nothing is
        hidden (or when noisy counts sum above the total).
        """
        edges, counts = self.histogram.class_histogram(name)
        hidden = (self.n_positive if name == "positive" else self.n_negative) - sum(counts)
        if hidden <= 0:
            return [(edges, counts)]
        listed = getattr(self.histogram, f"{name}_suppressed")
        zeros = hidden_bins(listed, counts) or [0, len(counts) - 1]
        return [(edges, counts), ((edges[zeros[0]], edges[zeros[-1] + 1]), (hidden,))]

    def merge(self, other: SufficientStatistics) -> SufficientStatistics:
        """Return the statistics of the union of two disjoint sets of cases.

        Agreement tables are matched by their raters; a table only one side has is kept,
        and a table either side withheld is withheld from the union (the rest would not be
        all of its cases).

        Raises
        ------
        InputError
            If thresholds, histogram edges, calibration bins or a table's scale differ.
        """
        _same("thresholds", self.thresholds, other.thresholds)
        tables = {t.raters: t for t in self.agreement}
        for t in other.agreement:
            tables[t.raters] = tables[t.raters].merge(t) if t.raters in tables else t
        withheld = {*self.withheld_agreement, *other.withheld_agreement}
        return SufficientStatistics(
            n_observations=self.n_observations + other.n_observations,
            n_positive=self.n_positive + other.n_positive,
            n_negative=self.n_negative + other.n_negative,
            n_pending=self.n_pending + other.n_pending,
            n_patients=self.n_patients + other.n_patients,
            confusion=tuple(
                a.merge(b) for a, b in zip(self.confusion, other.confusion, strict=True)
            ),
            histogram=self.histogram.merge(other.histogram),
            calibration=self.calibration.merge(other.calibration),
            agreement=tuple(tables[k] for k in sorted(tables) if k not in withheld),
            withheld_agreement=tuple(sorted(withheld)),
            pending_withheld=self.pending_withheld or other.pending_withheld,
        )

    def withholding(
        self, tables: Set[int] = frozenset(), *, pending: bool = False
    ) -> SufficientStatistics:
        """Return these statistics with agreement tables ``tables`` (indices) withheld.

        ``pending``: also withhold the pending cases, and with them every agreement table
        (tables count pending cases too, so their totals would give the count away).
        """
        out = set(range(len(self.agreement))) if pending and self.n_pending else set(tables)
        raters = {*self.withheld_agreement, *(self.agreement[i].raters for i in out)}
        update: dict[str, Any] = {
            "agreement": tuple(t for i, t in enumerate(self.agreement) if i not in out),
            "withheld_agreement": tuple(sorted(raters)),
        }
        if pending and self.n_pending:
            update |= {
                "n_observations": self.n_observations - self.n_pending,
                "n_pending": 0,
                "pending_withheld": True,
            }
        return self.model_copy(update=update)


def reader_scales(predictions: Predictions) -> dict[str, Scale]:
    """Return each reader's scale: binary when every call made is 0 or 1, else ordinal.

    Readers who made no call at all are left out.
    """
    scales: dict[str, Scale] = {}
    for name, calls in predictions.readers.items():
        made = calls[calls != MISSING]
        if made.size:
            scales[name] = "binary" if bool(np.all(made <= 1)) else "ordinal"
    return scales


def compute_statistics(
    predictions: Predictions,
    plan: EvaluationPlan,
    *,
    scales: Mapping[str, Scale] | None = None,
) -> SufficientStatistics:
    """Compute a site's sufficient statistics under an evaluation plan.

    Parameters
    ----------
    predictions
        The validated predictions table (any number of rows, zero included).
    plan
        Thresholds, histogram edges and calibration bins.
    scales
        Scale of each reader; by default taken from ``predictions`` with
        :func:`reader_scales`. Subgroups pass the whole site's scales so that a
        subgroup's tables match the site's.

    Raises
    ------
    InputError
        If ordinal calls span more than :data:`MAX_CATEGORIES` levels.
    """
    scales = reader_scales(predictions) if scales is None else dict(scales)
    labelled = predictions.labelled
    positive = labelled & (predictions.label == 1)
    negative = labelled & (predictions.label == 0)
    _, patient = np.unique(predictions.patient_id.astype(str), return_inverse=True)
    patient = patient.reshape(-1)
    n_patients = int(np.unique(patient).size)

    confusion = tuple(
        _confusion(t, predictions.score >= t, positive, negative, patient) for t in plan.thresholds
    )
    edges = plan.histogram_edges
    bins = len(edges) - 1
    hist_index = _bin_index(predictions.score, edges)
    histogram = ScoreHistogram(
        edges=edges,
        positive=_bin_counts(hist_index[positive], bins),
        negative=_bin_counts(hist_index[negative], bins),
        all=_bin_counts(hist_index, bins),
    )
    cal_edges = plan.calibration_bin_edges()
    cal_bins = len(cal_edges) - 1
    cal_index = _bin_index(predictions.score[labelled], cal_edges)
    scores = predictions.score[labelled]
    labels = predictions.label[labelled].astype(np.float64)
    calibration = CalibrationBins(
        edges=cal_edges,
        count=_bin_counts(cal_index, cal_bins),
        score_sum=_bin_sums(cal_index, scores, cal_bins),
        label_sum=tuple(round(s) for s in _bin_sums(cal_index, labels, cal_bins)),
        squared_error_sum=_bin_sums(cal_index, (scores - labels) ** 2, cal_bins),
    )
    return SufficientStatistics(
        n_observations=len(predictions),
        n_positive=int(positive.sum()),
        n_negative=int(negative.sum()),
        n_pending=int((~labelled).sum()),
        n_patients=n_patients,
        confusion=confusion,
        histogram=histogram,
        calibration=calibration,
        agreement=_agreement_tables(predictions, plan, scales),
    )


def _confusion(
    threshold: float,
    called: npt.NDArray[np.bool_],
    positive: npt.NDArray[np.bool_],
    negative: npt.NDArray[np.bool_],
    patient: npt.NDArray[np.intp],
) -> ConfusionCounts:
    def moments(success: npt.NDArray[np.bool_], trial: npt.NDArray[np.bool_]) -> PatientMoments:
        # a_i successes among m_i trials per patient (Rao & Scott 1992; see
        # site_agent.statistics.proportions.ClusterMoments); patients without a trial are left out.
        a = np.bincount(patient[success], minlength=1).astype(np.int64)
        m = np.bincount(patient[trial], minlength=1).astype(np.int64)
        a = np.pad(a, (0, max(m.size - a.size, 0)))[m > 0]
        m = m[m > 0]
        return PatientMoments(
            clusters=int(m.size),
            sum_a2=int(np.dot(a, a)),
            sum_am=int(np.dot(a, m)),
            sum_m2=int(np.dot(m, m)),
        )

    tp, fn = positive & called, positive & ~called
    fp, tn = negative & called, negative & ~called
    return ConfusionCounts(
        threshold=threshold,
        tp=int(tp.sum()),
        fp=int(fp.sum()),
        fn=int(fn.sum()),
        tn=int(tn.sum()),
        sensitivity=moments(tp, positive),
        specificity=moments(tn, negative),
        ppv=moments(tp, tp | fp),
        npv=moments(tn, tn | fn),
    )


def _agreement_tables(
    predictions: Predictions, plan: EvaluationPlan, scales: Mapping[str, Scale]
) -> tuple[AgreementTable, ...]:
    readers = {name: predictions.readers[name] for name in scales if name in predictions.readers}
    binary = [r for r in readers if scales[r] == "binary"]
    ordinal = [r for r in readers if scales[r] == "ordinal"]
    tables: list[AgreementTable] = []
    for t in plan.thresholds:
        model_calls = (predictions.score >= t).astype(np.int64)
        for r in binary:
            tables.append(_binary_table((model_rater(t), r), model_calls, readers[r]))
    for i, a in enumerate(binary):
        for b in binary[i + 1 :]:
            tables.append(_binary_table((a, b), readers[a], readers[b]))
    if predictions.category is not None:
        for r in ordinal:
            table = _ordinal_table((MODEL_CATEGORY, r), predictions.category, readers[r])
            tables.extend([table] if table is not None else [])
    for i, a in enumerate(ordinal):
        for b in ordinal[i + 1 :]:
            table = _ordinal_table((a, b), readers[a], readers[b])
            tables.extend([table] if table is not None else [])
    return tuple(sorted(tables, key=lambda t: t.raters))


def _table(
    raters: tuple[str, str],
    scale: Scale,
    low: int,
    k: int,
    a: npt.NDArray[np.int64],
    b: npt.NDArray[np.int64],
) -> AgreementTable:
    counts = np.zeros((k, k), dtype=np.int64)
    np.add.at(counts, (a - low, b - low), 1)
    return AgreementTable(
        raters=raters,
        scale=scale,
        categories=tuple(range(low, low + k)),
        counts=tuple(tuple(int(c) for c in row) for row in counts),
    )


def _binary_table(
    raters: tuple[str, str], a: npt.NDArray[np.int64], b: npt.NDArray[np.int64]
) -> AgreementTable:
    both = (a != MISSING) & (b != MISSING)
    # A binary rater's calls are 0 or 1 (checked by reader_scales); clip guards the model.
    return _table(raters, "binary", 0, 2, np.clip(a[both], 0, 1), np.clip(b[both], 0, 1))


def _ordinal_table(
    raters: tuple[str, str], a: npt.NDArray[np.int64], b: npt.NDArray[np.int64]
) -> AgreementTable | None:
    both = (a != MISSING) & (b != MISSING)
    if not both.any():
        return None
    a, b = a[both], b[both]
    low = int(min(a.min(), b.min()))
    high = int(max(a.max(), b.max()))
    if high - low + 1 > MAX_CATEGORIES:
        raise InputError(
            f"ordinal calls of {raters[0]!r} and {raters[1]!r} span more than "
            f"{MAX_CATEGORIES} levels"
        )
    return _table(raters, "ordinal", low, high - low + 1, a, b)
