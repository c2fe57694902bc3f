"""Figures of the study report, drawn with matplotlib and returned as inline SVG text.

Every function returns the markup of one ``<svg>`` element, ready to be placed in an
HTML page: no XML prologue, no metadata block, and element ids prefixed so that several
figures can share one page without clashing. Nothing here reads files or the network.
"""

from __future__ import annotations

import io
import itertools
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import PercentFormatter

from coordinator.pooling.study_results import CurvePoints, MetaRow

POOLED_SITE = "pooled"
"""Site name that marks statistics computed on all released sites merged as one cohort."""

STYLE: dict[Any, Any] = {  # rc keys are typed as literals in matplotlib's stubs
    "font.family": "sans-serif",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "svg.fonttype": "none",
    "svg.hashsalt": "sitepool",
}
"""matplotlib rc settings of every report figure (study and drift reports)."""
_PALETTE = ("#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#17becf", "#8c564b")
_POOLED_COLOUR = "#222222"
_ID_COUNTER = itertools.count(1)


@dataclass(frozen=True)
class ForestSite:
    """One site's estimate in a forest plot."""

    label: str
    estimate: float
    lower: float
    upper: float


def svg(fig: Figure) -> str:
    """Return the figure as one ``<svg>`` element with ids unique on the page."""
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", bbox_inches="tight")
    plt.close(fig)
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.DOTALL)
    prefix = f"f{next(_ID_COUNTER)}-"
    text = re.sub(r'id="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', text)
    text = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}{m.group(1)}"', text)
    text = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{prefix}{m.group(1)})", text)
    return text.strip()


def colour(index: int) -> str:
    """Return the palette colour of the ``index``-th series (the palette repeats)."""
    return _PALETTE[index % len(_PALETTE)]


def _finite(*values: float) -> bool:
    return all(math.isfinite(v) for v in values)


def forest_svg(
    title: str,
    sites: Sequence[ForestSite],
    meta: MetaRow,
    cohort: ForestSite | None,
    *,
    percent: bool,
    log: bool = False,
) -> str:
    """Draw a forest plot: per-site intervals, random-effects diamond, prediction bar.

    Parameters
    ----------
    title
        Axis title, e.g. ``"AUC"``.
    sites
        Per-site estimates with their confidence intervals, top to bottom.
    meta
        The meta-analysis row: its estimate and CI draw the diamond, its prediction
        interval the bar beneath it.
    cohort
        The estimate from all sites merged as one cohort, drawn as a separate marker.
    percent
        Label the axis in percent (the values stay proportions).
    log
        Draw the axis on a log scale (ratios such as the diagnostic odds ratio).
    """
    labels = [s.label for s in sites]
    rows = len(sites)
    extra = ["Pooled" if meta.method == "fixed" else "Random-effects pooled", "Prediction interval"]
    if cohort is not None:
        extra.append(cohort.label)
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(7.0, 0.42 * (rows + len(extra)) + 1.1))
        for i, site in enumerate(sites):
            y = -i
            if _finite(site.estimate, site.lower, site.upper):
                ax.plot([site.lower, site.upper], [y, y], color=colour(i), linewidth=1.6)
                ax.plot(site.estimate, y, "s", color=colour(i), markersize=6)
            elif math.isfinite(site.estimate):
                ax.plot(site.estimate, y, "s", color=colour(i), markersize=6)
        y_meta = -rows - 0.4
        if _finite(meta.estimate, meta.lower, meta.upper):
            ax.fill(
                [meta.lower, meta.estimate, meta.upper, meta.estimate],
                [y_meta, y_meta + 0.3, y_meta, y_meta - 0.3],
                color=_POOLED_COLOUR,
            )
        y_pred = y_meta - 1
        if _finite(meta.prediction_lower, meta.prediction_upper):
            ax.plot(
                [meta.prediction_lower, meta.prediction_upper],
                [y_pred, y_pred],
                color=_POOLED_COLOUR,
                linewidth=4,
                alpha=0.35,
                solid_capstyle="butt",
            )
        ticks = [-i for i in range(rows)] + [y_meta, y_pred]
        if cohort is not None:
            y_cohort = y_pred - 1
            ticks.append(y_cohort)
            if _finite(cohort.lower, cohort.upper):
                ax.plot([cohort.lower, cohort.upper], [y_cohort, y_cohort], color="#555555")
            if math.isfinite(cohort.estimate):
                ax.plot(
                    cohort.estimate,
                    y_cohort,
                    "o",
                    markerfacecolor="white",
                    markeredgecolor=_POOLED_COLOUR,
                    markersize=7,
                )
        if math.isfinite(meta.estimate):
            ax.axvline(meta.estimate, color="#888888", linestyle=":", linewidth=1)
        ax.set_yticks(ticks, labels + extra)
        ax.set_title(title, loc="left")
        if log:
            ax.set_xscale("log")
        if percent:
            ax.xaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=0))
        ax.grid(axis="x", color="#e5e5e5")
        ax.set_axisbelow(True)
        ax.spines["left"].set_visible(False)
        ax.tick_params(axis="y", length=0)
        return svg(fig)


def roc_overview_svg(curves: Sequence[CurvePoints], aucs: dict[str, str]) -> str:
    """Draw every site's ROC curve and the pooled curve on one panel.

    Parameters
    ----------
    curves
        ROC curves (``kind == "roc"``); the one named ``"pooled"`` is drawn dashed black.
    aucs
        Formatted AUC per site name, shown in the legend.
    """
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(5.6, 5.0))
        ax.plot([0, 1], [0, 1], color="#bbbbbb", linestyle=":", linewidth=1)
        for i, curve in enumerate(c for c in curves if c.site != POOLED_SITE):
            label = f"{curve.site} (AUC {aucs[curve.site]})" if curve.site in aucs else curve.site
            ax.plot(curve.x, curve.y, color=colour(i), linewidth=1.5, label=label)
        for curve in curves:
            if curve.site == POOLED_SITE:
                label = f"Pooled (AUC {aucs[POOLED_SITE]})" if POOLED_SITE in aucs else "Pooled"
                ax.plot(curve.x, curve.y, color=_POOLED_COLOUR, linestyle="--", label=label)
        _roc_axes(ax)
        ax.set_xlabel(_ROC_X)
        ax.set_ylabel(_ROC_Y)
        ax.legend(loc="lower right", frameon=False, fontsize=8)
        return svg(fig)


_ROC_X = "1 − specificity (false-positive rate)"
_ROC_Y = "Sensitivity (true-positive rate)"


def _roc_axes(ax: Axes) -> None:
    ax.set_xlim(-0.01, 1.01)
    ax.set_ylim(-0.01, 1.01)
    ax.set_aspect("equal")


def _grid(count: int, columns: int, size: float) -> tuple[Figure, list[Axes]]:
    cols = min(columns, max(count, 1))
    rows = math.ceil(max(count, 1) / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(size * cols, size * rows), squeeze=False)
    flat = [ax for row in axes for ax in row]
    for ax in flat[count:]:
        ax.set_visible(False)
    return fig, flat[:count]


def _outer_labels(axes: Sequence[Axes], columns: int, xlabel: str, ylabel: str) -> None:
    """Label the x axis of panels with nothing below them and the y axis of the first column."""
    for i, ax in enumerate(axes):
        if i + columns >= len(axes):
            ax.set_xlabel(xlabel)
        if i % columns == 0:
            ax.set_ylabel(ylabel)


def roc_small_multiples_svg(curves: Sequence[CurvePoints], aucs: dict[str, str]) -> str:
    """Draw one small ROC panel per site (pooled last), each titled with its AUC.

    Where a curve has points with one interpolated coordinate, its exact points are dots.
    """
    with plt.rc_context(STYLE):
        fig, axes = _grid(len(curves), 3, 3.0)
        for i, (ax, curve) in enumerate(zip(axes, curves, strict=True)):
            pooled = curve.site == POOLED_SITE
            line_colour = _POOLED_COLOUR if pooled else colour(i)
            ax.plot([0, 1], [0, 1], color="#bbbbbb", linestyle=":", linewidth=1)
            ax.plot(curve.x, curve.y, color=line_colour, linestyle="--" if pooled else "-")
            if curve.exact is not None and not all(curve.exact):
                # Dots: points on released counts of both classes; between them one
                # coordinate is interpolated within a bin.
                marks = list(zip(curve.x, curve.y, curve.exact, strict=True))
                ax.scatter(
                    [x for x, _, e in marks if e],
                    [y for _, y, e in marks if e],
                    s=6,
                    color=line_colour,
                    zorder=3,
                )
            name = "Pooled" if pooled else curve.site
            ax.set_title(f"{name}\nAUC {aucs[curve.site]}" if curve.site in aucs else name)
            _roc_axes(ax)
        _outer_labels(axes, 3, _ROC_X, _ROC_Y)
        fig.tight_layout()
        return svg(fig)


def calibration_svg(curves: Sequence[CurvePoints]) -> str:
    """Draw one reliability panel per site: observed rate against mean score per bin.

    Marker area grows with the number of cases in the bin when counts are given.
    """
    with plt.rc_context(STYLE):
        fig, axes = _grid(len(curves), 3, 3.0)
        for i, (ax, curve) in enumerate(zip(axes, curves, strict=True)):
            pooled = curve.site == POOLED_SITE
            line_colour = _POOLED_COLOUR if pooled else colour(i)
            ax.plot([0, 1], [0, 1], color="#bbbbbb", linestyle=":", linewidth=1)
            sizes: list[float] | float = 24.0
            if curve.counts is not None and len(curve.counts) == len(curve.x):
                biggest = max(max(curve.counts), 1)
                sizes = [12.0 + 80.0 * c / biggest for c in curve.counts]
            if not pooled:  # the pooled points are several sites' bins: no line joins them
                ax.plot(curve.x, curve.y, color=line_colour, linewidth=1)
            ax.scatter(curve.x, curve.y, s=sizes, color=line_colour, zorder=3)
            ax.set_title("Pooled" if pooled else curve.site)
            ax.set_xlim(-0.02, 1.02)
            ax.set_ylim(-0.02, 1.02)
            ax.set_aspect("equal")
        _outer_labels(axes, 3, "Mean predicted score in bin", "Observed positive rate")
        fig.tight_layout()
        return svg(fig)
