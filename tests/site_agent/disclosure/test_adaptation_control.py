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
from site_agent.disclosure.adaptation_control import control_adaptation
from site_agent.disclosure.policy import SitePolicy
from site_agent.exceptions import DisclosureRefused
from site_agent.statistics.censored import CENSORED_REASON, CensoredCount
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


def test_small_confusion_cell_is_censored_with_its_partner_and_proportions() -> None:
    """A false-negative count of 3 (< 5) is censored with tp; sensitivity becomes a range."""
    out, suppressed = control_adaptation(_release(tp=27, fn=3), SitePolicy(min_cell=5))

    row = out.before.at_thresholds[0]
    # Complementary suppression (common practice): with n_test_positive released, keeping
    # tp would give fn back as n_test_positive − tp. Known: fn in 1..4, tp + fn = 30.
    assert row.fn == CensoredCount(low=1, high=4, class_total=30)
    assert row.tp == CensoredCount(low=26, high=29, class_total=30)
    assert (row.fp, row.tn) == (6, 34)  # the negative class has no small cell: kept
    sens = row.sensitivity
    assert sens.estimate is None and sens.reason == CENSORED_REASON
    assert (sens.estimate_low, sens.estimate_high) == (26 / 30, 29 / 30)
    # The hull holds the unsuppressed Wilson interval of 27/30 (Wilson 1927, via our wilson).
    true = wilson(27, 30)
    assert sens.lower is not None and sens.upper is not None
    assert sens.lower <= true.lower and true.upper <= sens.upper
    assert sens.lower == wilson(26, 30).lower and sens.upper == wilson(29, 30).upper
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
