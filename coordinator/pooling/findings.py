"""Plain-language findings of a study, written from its result rows.

Sentences a clinician reads first: the AUC at the development site against the range at
external sites, the sites whose interval lies wholly below the development AUC, the
random-effects mean with its prediction interval for a new site, and the sites that
released nothing. Every number is taken from a row of the results; none is computed here.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

from coordinator.pooling.sites import SiteInfo
from coordinator.pooling.study_results import MetaRow, MetricRow, SiteOutcome


def study_findings(
    outcomes: Sequence[SiteOutcome],
    metrics: Sequence[MetricRow],
    meta: Sequence[MetaRow],
    info: Mapping[str, SiteInfo],
    confidence: float,
) -> list[str]:
    """Plain-language findings: development versus external AUC, pooling, heterogeneity."""
    level = f"{confidence:.0%}"
    aucs = {
        r.site: r
        for r in metrics
        if r.metric == "auc" and r.method == "delong" and r.subgroup is None
    }
    findings = []
    development = [s for s, i in info.items() if i.role == "development" and s in aucs]
    external = sorted(
        (r for s, r in aucs.items() if s not in development and math.isfinite(r.estimate)),
        key=lambda r: r.estimate,
    )
    for site in development:
        r = aucs[site]
        findings.append(
            f"At the development site {site} the AUC was {r.estimate:.3f} "
            f"({level} CI {r.lower:.3f} to {r.upper:.3f})."
        )
    if external:
        low, high = external[0], external[-1]
        findings.append(
            f"At the {len(external)} external sites the AUC ranged from {low.estimate:.3f} "
            f"({low.site}) to {high.estimate:.3f} ({high.site})."
        )
        if development:
            dev = aucs[development[0]].estimate
            worse = [r for r in external if r.upper < dev]
            if worse:
                names = ", ".join(r.site for r in worse)
                findings.append(
                    f"The model performed measurably worse than at the development site at "
                    f"{len(worse)} site(s), whose {level} CI lies wholly below the development "
                    f"AUC: {names}."
                )
    for row in meta:
        if row.metric == "auc" and row.subgroup == "role=external":
            findings.append(
                f"Across the external sites alone (REML, HKSJ), the mean AUC is "
                f"{row.estimate:.3f} ({level} CI {row.lower:.3f} to {row.upper:.3f}); "
                f"{_new_site(row.prediction_lower, row.prediction_upper, level)}."
            )
        if row.metric == "auc" and row.method == "reml" and row.subgroup is None:
            findings.append(
                f"Random-effects meta-analysis (REML, HKSJ) gives a mean AUC of "
                f"{row.estimate:.3f} ({level} CI {row.lower:.3f} to {row.upper:.3f}); "
                f"{_new_site(row.prediction_lower, row.prediction_upper, level)}; "
                f"I² = {100 * row.i2:.0f}%."
            )
    not_released = [o for o in outcomes if o.status != "released"]
    if not_released:
        findings.append(
            "Sites that released nothing: "
            + "; ".join(f"{o.site} ({o.status}: {o.reason})" for o in not_released)
            + "."
        )
    return findings


def _new_site(lower: float, upper: float, level: str) -> str:
    """Return the prediction interval for a new site, or why there is none (never 'nan')."""
    if math.isfinite(lower) and math.isfinite(upper):
        return f"{level} prediction interval for a new site {lower:.3f} to {upper:.3f}"
    return (
        "no prediction interval for a new site: it needs at least three sites "
        "(t with k − 2 degrees of freedom)"
    )
