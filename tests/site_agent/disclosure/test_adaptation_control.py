"""The minimum cell size on fine-tuning releases (statistical disclosure control).

Rule, common practice in statistical disclosure control of health tables: a count is
releasable when it is 0 or at least the minimum cell size.
"""

from __future__ import annotations

import pytest

from site_agent.contract.adaptation_release import (
    AdaptationRelease,
    Performance,
    ThresholdPerformance,
)
from site_agent.contract.release import AucRecord, EstimateRecord
from site_agent.disclosure.adaptation_control import SUPPRESSED, control_adaptation
from site_agent.disclosure.policy import SitePolicy
from site_agent.exceptions import DisclosureRefused
from site_agent.statistics.proportions import wilson

AUC = AucRecord(
    auc=0.8,
    variance=0.001,
    se=0.03,
    lower=0.74,
    upper=0.86,
    logit_lower=None,
    logit_upper=None,
    n_positive=30,
    n_negative=40,
    method="delong",
    confidence=0.95,
)


def _release(tp: int, fn: int, n_test_positive: int = 30) -> AdaptationRelease:
    cells = ThresholdPerformance(
        threshold=0.5,
        tp=tp,
        fp=6,
        fn=fn,
        tn=34,
        sensitivity=EstimateRecord.of(wilson(tp, tp + fn)),
        specificity=EstimateRecord.of(wilson(34, 40)),
    )
    return AdaptationRelease(
        site="wren-valley",
        protocol_hash="unregistered",
        weights="bundle",
        n_pool=100,
        n_test=70,
        n_test_positive=n_test_positive,
        n_test_negative=40,
        before=Performance(auc=AUC, at_thresholds=(cells,)),
    )


def test_small_confusion_cell_is_suppressed_with_its_partner_and_proportions() -> None:
    """A false-negative count of 3 (< 5) is zeroed with tp; its proportions are withheld."""
    out, suppressed = control_adaptation(_release(tp=27, fn=3), SitePolicy(min_cell=5))

    row = out.before.at_thresholds[0]
    # Complementary suppression (common practice): with n_test_positive released, keeping
    # tp would give fn back as n_test_positive − tp.
    assert row.fn == 0 and row.tp == 0
    assert (row.fp, row.tn) == (6, 34)  # the negative class has no small cell: kept
    assert row.sensitivity.estimate is None and row.sensitivity.reason == SUPPRESSED
    assert suppressed == ("before.at_thresholds[0].tp", "before.at_thresholds[0].fn")
    assert out.before.auc == AUC


def test_small_test_set_total_refuses_the_release() -> None:
    """A test set with 3 positives is refused as a whole."""
    with pytest.raises(DisclosureRefused, match="total_below_min_cell"):
        control_adaptation(_release(tp=2, fn=1, n_test_positive=3), SitePolicy(min_cell=5))


def test_release_without_small_cells_passes_unchanged() -> None:
    """Every cell at least 5: nothing is changed."""
    release = _release(tp=20, fn=10)

    out, suppressed = control_adaptation(release, SitePolicy(min_cell=5))

    assert out == release and suppressed == ()
