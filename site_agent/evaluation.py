"""Evaluate a site's predictions under a plan and build the release that may leave the site.

Cases whose reference standard is pending are left out of every label metric (confusion
counts, class histograms, calibration, AUCs) but are counted in the label-free score
histogram and in agreement tables, which need no label.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from pydantic import ValidationError

from site_agent.contract.protocol import EvaluationPlan
from site_agent.contract.release import (
    MAX_MIX_LEVELS,
    AttributeCounts,
    AucRecord,
    CalibrationRecord,
    EstimateRecord,
    ExactEstimates,
    ReaderComparison,
    SiteRelease,
    SubgroupRelease,
)
from site_agent.data.predictions import MISSING, Predictions
from site_agent.exceptions import InputError
from site_agent.statistics.calibration import calibration_intercept_slope
from site_agent.statistics.roc import delong, obuchowski, paired_delong
from site_agent.statistics.summaries import Scale, compute_statistics, reader_scales

DEFAULT_CONFIDENCE = 0.95


def evaluate_site(
    predictions: Predictions,
    plan: EvaluationPlan,
    *,
    site: str,
    protocol_hash: str,
    confidence: float = DEFAULT_CONFIDENCE,
    mix_attributes: Sequence[str] = (),
) -> SiteRelease:
    """Compute everything an evaluation releases from one site.

    Parameters
    ----------
    predictions
        The site's validated predictions table.
    plan
        Thresholds, bins and subgroup attributes from the study protocol.
    site
        The site's name as it appears in the release.
    protocol_hash
        Content hash of the study protocol, or ``"unregistered"`` for a local run.
    confidence
        Two-sided level of every interval.
    mix_attributes
        Case attributes whose level counts the release carries (monitoring of case mix).

    Raises
    ------
    InputError
        If a subgroup attribute is not a column of the table, a subgroup level name is
        unusable, or the site name or protocol hash is malformed.
    """
    for attribute in (*plan.subgroups, *mix_attributes):
        if attribute not in predictions.attributes:
            raise InputError(
                f"subgroup attribute {attribute!r} is not a case attribute column of the table"
            )
    scales = reader_scales(predictions)
    try:
        return SiteRelease(
            site=site,
            protocol_hash=protocol_hash,
            statistics=compute_statistics(predictions, plan, scales=scales),
            exact=_exact(predictions, scales, confidence),
            subgroups=tuple(_subgroups(predictions, plan, scales, confidence)),
            attribute_counts=tuple(_attribute_counts(predictions, mix_attributes)),
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"]) or "release"
        raise InputError(f"cannot build the release: {where}: {first['msg']}") from exc


def _labelled_auc(predictions: Predictions, confidence: float) -> AucRecord:
    known = predictions.labelled
    return AucRecord.of(delong(predictions.score[known], predictions.label[known], confidence))


def _exact(predictions: Predictions, scales: dict[str, Scale], confidence: float) -> ExactEstimates:
    known = predictions.labelled
    scores, labels = predictions.score[known], predictions.label[known]
    fit = calibration_intercept_slope(scores, labels, confidence)
    readers = []
    for name in scales:
        calls = predictions.readers[name]
        both = known & (calls != MISSING)
        y = predictions.label[both]
        difference = paired_delong(
            predictions.score[both], calls[both].astype(np.float64), y, confidence
        )
        n_positive = int((y == 1).sum())
        readers.append(
            ReaderComparison.of(
                name, difference, n_positive=n_positive, n_negative=int(y.size - n_positive)
            )
        )
    return ExactEstimates(
        auc=AucRecord.of(delong(scores, labels, confidence)),
        clustered_auc=AucRecord.of(
            obuchowski(scores, labels, predictions.patient_id[known].astype(str), confidence)
        ),
        calibration=CalibrationRecord(
            intercept=EstimateRecord.of(fit.intercept),
            slope=EstimateRecord.of(fit.slope),
            reason=fit.reason,
        ),
        readers=tuple(readers),
    )


def _subgroups(
    predictions: Predictions,
    plan: EvaluationPlan,
    scales: dict[str, Scale],
    confidence: float,
) -> list[SubgroupRelease]:
    out = []
    for attribute in plan.subgroups:
        values = predictions.attributes[attribute]
        for level in sorted(set(values.tolist())):
            subset = predictions.subset(values == level)
            out.append(
                SubgroupRelease(
                    attribute=attribute,
                    level=level,
                    statistics=compute_statistics(subset, plan, scales=scales),
                    auc=_labelled_auc(subset, confidence),
                )
            )
    return out


def _attribute_counts(predictions: Predictions, attributes: Sequence[str]) -> list[AttributeCounts]:
    out = []
    for attribute in attributes:
        levels, counts = np.unique(predictions.attributes[attribute], return_counts=True)
        if levels.size > MAX_MIX_LEVELS:
            raise InputError(
                f"attribute {attribute!r} has more than {MAX_MIX_LEVELS} levels to count"
            )
        out.append(
            AttributeCounts(
                attribute=attribute,
                levels=tuple(str(v) for v in levels),
                counts=tuple(int(c) for c in counts),
            )
        )
    return out
