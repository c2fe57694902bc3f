"""Curve sections of the study report: ROC curves and calibration, per site and pooled.

Curves are drawn from the score bins the sites released (:mod:`coordinator.report.plots`),
so each ROC curve is labelled with the site's exact AUC and, where it differs, the area
under the drawn curve by the trapezoidal rule.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from coordinator.pooling.study_results import CurvePoints, StudyResults
from coordinator.report import plots
from coordinator.report.exports import headline_auc
from coordinator.report.html_parts import html_figure, num, site_order


def _curves(results: StudyResults, kind: str) -> list[CurvePoints]:
    order = {name: i for i, name in enumerate(site_order(results))}
    chosen = [c for c in results.curves if c.kind == kind]
    return sorted(chosen, key=lambda c: order.get(c.site, len(order)))


def roc_section(results: StudyResults) -> str:
    """Return the ROC overview and the per-site small multiples."""
    curves = _curves(results, "roc")
    if not curves:
        return "<p>No ROC curves were released.</p>"
    aucs = {c.site: _roc_label(results, c) for c in curves}
    drawn = (
        "Curves are drawn from the score bins the sites released, so a curve is coarser "
        "than the site's exact AUC when its scores crowd into few bins; the area under the "
        "drawn curve is given beside the AUC where the two differ. Each class keeps its own "
        "bins, so a point at an edge of one class only has its other coordinate "
        "interpolated, with cases spread evenly in log-odds within a bin; dots in the "
        "per-site panels mark the points both classes' counts fix. The pooled curve uses "
        "every site's own bins the same way."
    )
    return html_figure(
        "fig-roc-all",
        plots.roc_overview_svg(curves, aucs),
        "<b>ROC curves of all sites.</b> Each line traces sensitivity against the false-"
        "positive rate as the threshold moves; the dashed black line is all released cases "
        f"as one cohort, the dotted diagonal a test with no discrimination. {drawn}",
    ) + html_figure(
        "fig-roc-sites",
        plots.roc_small_multiples_svg(curves, aucs),
        f"<b>ROC curve per site</b>, titled with the site's AUC. {drawn}",
    )


def _roc_label(results: StudyResults, curve: CurvePoints) -> str:
    """Return the site's AUC, and the area under the drawn (binned) curve if it differs."""
    area = num("auc", _trapezoid_area(curve.x, curve.y))
    row = headline_auc(results, curve.site)
    if row is None or not math.isfinite(row.estimate):
        return f"curve area {area}"
    auc = num("auc", row.estimate)
    return auc if auc == area else f"{auc}; curve area {area}"


def _trapezoid_area(x: Sequence[float], y: Sequence[float]) -> float:
    """Area under a polyline through the points (the trapezoidal rule), as drawn."""
    return math.fsum((x[i + 1] - x[i]) * (y[i + 1] + y[i]) / 2 for i in range(len(x) - 1))


def calibration_section(results: StudyResults) -> str:
    """Return the per-site calibration figure."""
    curves = _curves(results, "calibration")
    if not curves:
        return "<p>No calibration curves were released.</p>"
    return html_figure(
        "fig-calibration-sites",
        plots.calibration_svg(curves),
        "<b>Calibration per site.</b> Each point is one bin of model scores: the mean score "
        "in the bin (x) against the observed share of positive cases (y); larger points hold "
        "more cases. Points on the dotted diagonal are well calibrated; points below it mean "
        "the model over-estimates risk at that site. A bin without a point released no "
        "case: none scored there, or the site's policy suppressed the bin (its cases then "
        "enter the Brier score and ECE only as ranges, in the accuracy table). The pooled "
        "panel shows every site's released bins together, unjoined (merging the sites' "
        "bins would keep only the edges all of them kept).",
    )
