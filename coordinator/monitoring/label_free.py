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

from coordinator.monitoring.drift import (
    binned_ks,
    category_chi_square,
    population_stability_index,
    total_variation_distance,
)
from coordinator.monitoring.findings import DriftSettings, finite_or_none
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


def label_free_row(
    release: SiteRelease,
    base_hist: ScoreHistogram,
    base_mix: dict[str, int] | None,
    settings: DriftSettings,
) -> dict[str, object]:
    """Return a monitored window's PSI, KS, chi-square and TVD fields and their notes."""
    row: dict[str, object] = {}
    notes: list[str] = []
    current = release.statistics.histogram
    edges = common_edges(base_hist.edges, current.edges)
    if len(edges) < 3:
        notes.append("the window and the baseline share fewer than two score bins")
    else:
        ref, cur = base_hist.coarsened(edges).all, current.coarsened(edges).all
        bands = _bands(ref, PSI_BAND_SHARE)
        psi = population_stability_index(
            [sum(ref[a:b]) for a, b in bands],
            [sum(cur[a:b]) for a, b in bands],
            thresholds=settings.psi_thresholds,
        )
        ks = binned_ks(ref, cur, thresholds=settings.p_thresholds)
        row.update(
            psi=finite_or_none(psi.psi),
            psi_level=psi.level,
            ks_distance=finite_or_none(ks.distance),
            ks_p_value=finite_or_none(ks.p_value),
            ks_level=ks.level,
        )
        notes.extend(r for r in (psi.reason, ks.reason) if r)
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
