"""Label-free drift of one window against its site's baseline, available when the window closes.

The score histogram of every case (pending labels included) is compared with the merged
baseline histogram by the population stability index over score bands and the binned
Kolmogorov–Smirnov test over every common bin; the mix of one acquisition attribute
(scanner vendor) by Pearson's chi-square and the total variation distance. The
statistics themselves live in :mod:`coordinator.monitoring.drift`; this module merges the
baseline, finds the common bins and the PSI bands, and writes one window's row.

References
----------
Siddiqi N (2006). Credit Risk Scorecards. Wiley, chapter 8.
"""

from __future__ import annotations

import math

from coordinator.monitoring.drift import category_chi_square, total_variation_distance
from coordinator.monitoring.findings import DriftSettings, finite_or_none
from coordinator.monitoring.window_null import Dispersion, baseline_dispersion, label_free_drift
from site_agent.contract.release import SiteRelease
from site_agent.statistics.summaries import ScoreHistogram, common_edges

PSI_BAND_SHARE = 0.1
"""PSI is taken over score bands holding at least this share of the baseline each (about
ten bands, as scorecards use deciles; Siddiqi 2006, common practice), so that sparse bins
and their floored shares do not dominate it. KS uses every common bin."""


def merged_histogram(histograms: list[ScoreHistogram]) -> ScoreHistogram | None:
    """Return the histograms merged bin by bin; None when there are none."""
    if not histograms:
        return None
    merged = histograms[0]
    for h in histograms[1:]:
        merged = merged.merge(h)
    return merged


def mix_counts(releases: list[SiteRelease], attribute: str | None) -> dict[str, int] | None:
    """Return the attribute's counts summed over the releases; None if none released them."""
    total: dict[str, int] | None = None
    for release in releases:
        counts = attribute_counts(release, attribute)
        if counts is None:
            continue
        total = total or {}
        for level, n in counts.items():
            total[level] = total.get(level, 0) + n
    return total


def attribute_counts(release: SiteRelease, attribute: str | None) -> dict[str, int] | None:
    """Return one release's counts of the attribute's levels, or None if not released."""
    for counts in release.attribute_counts:
        if counts.attribute == attribute:
            return counts.as_dict()
    return None


def capacity(release: SiteRelease) -> list[float]:
    """Most suppressed cases each bin of a window's histogram can hold.

    A suppressed cell reads 0 in its row (positive, negative or pending), and each row's
    total is released, so a bin can hold at most, summed over its rows that read 0, what
    that row is missing; a bin with no zero cell lost nothing to suppression.
    """
    stats = release.statistics
    h = stats.histogram
    positive, negative = h.class_on_edges("positive"), h.class_on_edges("negative")
    pending = [a - p - n for a, p, n in zip(h.all, positive, negative, strict=True)]
    rows = (
        (positive, stats.n_positive - sum(positive)),
        (negative, stats.n_negative - sum(negative)),
        (pending, stats.n_pending - sum(pending)),
    )
    return [
        float(sum(max(0, lost) for row, lost in rows if row[i] == 0)) for i in range(len(pending))
    ]


def baseline_capacity(
    baseline: list[SiteRelease], base_hist: ScoreHistogram | None
) -> list[float] | None:
    """Per bin, the suppressed baseline cases it can hold, summed over the baseline windows."""
    if base_hist is None:
        return None
    total = [0.0] * (len(base_hist.edges) - 1)
    for release in baseline:
        histogram = release.statistics.histogram
        if tuple(histogram.edges) != tuple(base_hist.edges):
            return None
        cap = capacity(release)
        total = [t + c for t, c in zip(total, cap, strict=True)]
    return total


def dispersion(baseline: list[SiteRelease], base_hist: ScoreHistogram | None) -> Dispersion:
    """Dispersion of the baseline windows' score histograms on the PSI bands (window_null)."""
    if base_hist is None:
        return Dispersion(1.0, math.inf, 0, "no baseline histogram")
    bands = _bands(base_hist.all, PSI_BAND_SHARE)
    windows, totals = [], []
    for release in baseline:
        # The merged baseline keeps the edges every baseline window kept (sites merge small
        # bins), so each window re-bins onto it exactly.
        counts = release.statistics.histogram.coarsened(base_hist.edges).all
        windows.append([sum(counts[a:b]) for a, b in bands])
        totals.append(max(release.statistics.n_observations, sum(counts)))
    return baseline_dispersion(windows, totals)


def label_free_row(
    release: SiteRelease,
    base_hist: ScoreHistogram,
    base_mix: dict[str, int] | None,
    settings: DriftSettings,
    spread: Dispersion,
    base_total: int,
    base_capacity: list[float] | None,
) -> dict[str, object]:
    """Return a monitored window's PSI, KS, chi-square and TVD fields and their notes.

    PSI and KS are judged against limits that follow the window sizes and the baseline
    windows' own dispersion (:mod:`coordinator.monitoring.window_null`); cases in
    suppressed cells are unknown, so each statistic is the bound closest to the baseline.
    """
    row: dict[str, object] = {}
    notes: list[str] = []
    current = release.statistics.histogram
    edges = common_edges(base_hist.edges, current.edges)
    if len(edges) < 3:
        notes.append("the window and the baseline share fewer than two score bins")
    else:
        ref, cur = base_hist.coarsened(edges).all, current.coarsened(edges).all
        ref_total = max(base_total, sum(ref))
        cur_total = max(release.statistics.n_observations, sum(cur))
        same = tuple(edges) == tuple(current.edges) == tuple(base_hist.edges)
        if sum(ref) and sum(cur):
            drift = label_free_drift(
                ref, ref_total, cur, cur_total, spread,
                p_thresholds=settings.p_thresholds,
                fixed_psi_limits=settings.psi_thresholds,
                bands=_bands(ref, PSI_BAND_SHARE),
                reference_capacity=base_capacity if same else None,
                current_capacity=capacity(release) if same else None,
            )  # fmt: skip
            row.update(
                psi=finite_or_none(drift.psi),
                psi_limit=finite_or_none(drift.psi_limits[1]),
                psi_level=drift.psi_level,
                ks_distance=finite_or_none(drift.ks_distance),
                ks_p_value=finite_or_none(drift.ks_p_value),
                ks_level=drift.ks_level,
            )
            if drift.bounded:
                notes.append("suppressed cells: PSI and KS are lower bounds")
        else:
            notes.append("a window holds no cases")
    mix = attribute_counts(release, settings.mix_attribute)
    if base_mix and mix:
        chi = category_chi_square(base_mix, mix, thresholds=settings.p_thresholds)
        tvd = total_variation_distance(base_mix, mix, thresholds=settings.tvd_thresholds)
        row.update(
            mix_p_value=finite_or_none(chi.p_value),
            mix_level=chi.level,
            tvd=finite_or_none(tvd.distance),
            tvd_level=tvd.level,
        )
        if chi.small_expected:
            notes.append("some expected attribute counts are below 5: chi-square is rough")
    row["notes"] = notes
    return row


def _bands(reference: tuple[int, ...], share: float) -> list[tuple[int, int]]:
    """Group adjacent bins, left to right, until each group holds ``share`` of the reference.

    A last group short of ``share`` joins the one before it. At least two groups are kept
    when the reference has two non-empty bins.
    """
    total = sum(reference)
    groups: list[tuple[int, int]] = []
    start, running = 0, 0
    for end, count in enumerate(reference, start=1):
        running += count
        if total and running >= share * total:
            groups.append((start, end))
            start, running = end, 0
    if start < len(reference):
        if groups and running < share * total:
            groups[-1] = (groups[-1][0], len(reference))
        else:
            groups.append((start, len(reference)))
    if len(groups) < 2:
        return [(i, i + 1) for i in range(len(reference))]
    return groups
