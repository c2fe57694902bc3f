"""What ``sitepool meta`` computes and prints: both models, the input notes and the notice.

The command itself (:mod:`coordinator.cli`) parses options and imports this module only
when it runs, so that ``sitepool --help`` does not load SciPy and pandas.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from coordinator.pooling.meta_analysis import (
    METHOD_LABELS,
    MetaAnalysis,
    Method,
    inverse_transform,
    meta_analyze,
)
from coordinator.pooling.meta_inputs import Measure, SiteInputs
from coordinator.pooling.records import ResultRecord
from site_agent.notices import RESEARCH_NOTICE

_MEASURE_NAMES: dict[str, str] = {
    "estimate": "estimate",
    "auc": "AUC",
    "sensitivity": "sensitivity",
    "specificity": "specificity",
    "dor": "DOR",
}


class MetaCommandResult(ResultRecord):
    """What ``sitepool meta --json`` prints: both models, the input notes and the notice."""

    source: str
    measure: Measure
    input_notes: tuple[str, ...]
    fixed: MetaAnalysis
    random: MetaAnalysis
    notice: str = RESEARCH_NOTICE


def run_meta(
    inputs: SiteInputs, *, source: str, method: Method = "reml", hksj: bool = False
) -> MetaCommandResult:
    """Run the fixed-effect model and the ``method`` random-effects model (HKSJ if asked)."""
    runs: tuple[tuple[Method, bool], ...] = (("fixed", False), (method, hksj))
    fixed, random = (
        meta_analyze(
            inputs.estimates,
            inputs.variances,
            labels=inputs.labels,
            method=kind,
            hksj=adjust,
            transform=inputs.transform,
        )
        for kind, adjust in runs
    )
    return MetaCommandResult(
        source=source,
        measure=inputs.measure,
        input_notes=inputs.notes,
        fixed=fixed,
        random=random,
    )


def render_table(result: MetaCommandResult) -> list[str]:
    """Render the result as readable text lines, ending with the research notice."""
    fixed, random = result.fixed, result.random
    scale = random.scale
    natural = scale != "identity"
    name = _MEASURE_NAMES[result.measure]
    level = f"{100 * random.confidence:g}%"
    how = "as given" if not natural else f"on the {scale} scale"
    lines = [
        f"Meta-analysis of {random.k} sites from {result.source}: {name}, analysed {how}",
        "",
        "Per-site estimates",
    ]
    site_head = ["site", "estimate", f"{level} CI", "weight fixed", "weight random"]
    if natural:
        site_head += [name, f"{name} {level} CI"]
    site_rows = []
    for f_site, r_site in zip(fixed.sites, random.sites, strict=True):
        row = [
            r_site.label,
            _num(r_site.estimate),
            _ci(r_site.lower, r_site.upper),
            _pct(f_site.weight_percent),
            _pct(r_site.weight_percent),
        ]
        if natural:
            row += [
                _num(inverse_transform(r_site.estimate, scale)),
                _ci(inverse_transform(r_site.lower, scale), inverse_transform(r_site.upper, scale)),
            ]
        site_rows.append(row)
    lines += _table(site_head, site_rows)

    lines += ["", f"Pooled estimates ({level})"]
    pooled_head = ["model", "estimate", "SE", f"{level} CI", "interval"]
    if natural:
        pooled_head += [name, f"{name} {level} CI"]
    label = METHOD_LABELS[random.method] + (" + HKSJ" if random.hksj else "")
    pooled_rows = [_pooled_row(METHOD_LABELS["fixed"], fixed), _pooled_row(label, random)]
    prediction = [
        "prediction interval, new site",
        "",
        "",
        _ci(random.prediction_lower, random.prediction_upper),
        f"t, {random.k - 2} df" if random.k >= 3 else "n/a",
    ]
    if natural and random.back_transformed is not None:
        back = random.back_transformed
        prediction += ["", _ci(back.prediction_lower, back.prediction_upper)]
    pooled_rows.append(prediction)
    lines += _table(pooled_head, pooled_rows)

    lines += [
        "",
        "Heterogeneity between sites",
        f"tau² {_num(random.tau2)} ({level} CI {_ci(random.tau2_lower, random.tau2_upper)}, "
        f"Q-profile); tau {_num(random.tau)}",
        f"I² {_pct(100 * random.i2)}; H² {_num(random.h2, 2)}",
        f"Cochran's Q {_num(random.q, 2)} on {random.q_df} df, p {_p(random.q_pvalue)}",
        "",
        "Notes",
    ]
    notes = [
        *result.input_notes,
        *random.notes,
        f"prediction interval: {random.prediction_convention}",
    ]
    lines += [f"- {note}" for note in dict.fromkeys(notes)]
    lines += ["", RESEARCH_NOTICE]
    return lines


def _pooled_row(label: str, res: MetaAnalysis) -> list[str]:
    row = [label, _num(res.estimate), _num(res.se), _ci(res.lower, res.upper), res.interval]
    if res.back_transformed is not None:
        back = res.back_transformed
        row += [_num(back.estimate), _ci(back.lower, back.upper)]
    return row


def _table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in [head, *rows]) for i in range(len(head))]
    return [
        "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip()
        for r in [head, *rows]
    ]


def _num(value: float, digits: int = 4) -> str:
    return f"{value:.{digits}f}" if math.isfinite(value) else "n/a"


def _ci(lower: float, upper: float) -> str:
    return f"{_num(lower)} to {_num(upper)}" if math.isfinite(lower) else "n/a"


def _pct(value: float) -> str:
    return f"{value:.1f}%" if math.isfinite(value) else "n/a"


def _p(value: float) -> str:
    return "< 0.0001" if value < 1e-4 else f"= {value:.4f}"
