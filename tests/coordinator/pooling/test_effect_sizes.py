"""Checks of coordinator.pooling.effect_sizes against reference libraries and published formulas."""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.genmod.families import Binomial
from statsmodels.genmod.generalized_linear_model import GLM
from statsmodels.stats.contingency_tables import Table2x2

from coordinator.pooling.effect_sizes import (
    log_diagnostic_odds_ratio,
    logit_auc,
    logit_sensitivity,
    logit_specificity,
)
from coordinator.pooling.meta_analysis import inverse_transform
from site_agent.exceptions import InputError


def test_logit_auc_variance_matches_numerical_derivative() -> None:
    """The delta-method variance equals se² times the squared numerical slope of logit."""
    auc, se = np.array([0.71, 0.93]), np.array([0.03, 0.02])
    sizes = logit_auc(auc, se)
    h = 1e-6
    slope = (np.log((auc + h) / (1 - auc - h)) - np.log((auc - h) / (1 - auc + h))) / (2 * h)
    # delta method, common practice
    np.testing.assert_allclose(sizes.variances, se**2 * slope**2, rtol=1e-6)
    np.testing.assert_allclose(sizes.estimates, np.log(auc / (1 - auc)), rtol=1e-12)
    assert sizes.transform == "logit"
    assert inverse_transform(sizes.estimates[0], "logit") == pytest.approx(0.71)


def test_logit_auc_refuses_auc_of_one() -> None:
    """An AUC of exactly 1 has no logit and is refused."""
    with pytest.raises(InputError, match="strictly between 0 and 1"):
        logit_auc([0.8, 1.0], [0.02, 0.02])


def test_logit_sensitivity_matches_binomial_glm_intercept() -> None:
    """Logit sensitivity and its variance equal a binomial GLM intercept and its squared SE."""
    tp, fn = np.array([45, 38]), np.array([5, 12])
    sizes = logit_sensitivity(tp, fn)
    for i in range(2):
        # statsmodels 0.15 GLM (Binomial family, intercept only, one row per case); IRLS precision.
        endog = np.r_[np.ones(tp[i]), np.zeros(fn[i])]
        fit = GLM(endog, np.ones((endog.size, 1)), family=Binomial()).fit(tol=1e-13)
        assert sizes.estimates[i] == pytest.approx(fit.params[0], rel=1e-7)
        assert sizes.variances[i] == pytest.approx(fit.bse[0] ** 2, rel=1e-7)


def test_logit_specificity_corrects_only_sites_with_a_zero_cell() -> None:
    """A site with no false positives gets 0.5 added to both cells; the others do not."""
    sizes = logit_specificity([420.0, 210.0], [30.0, 0.0])
    assert sizes.corrected == (1,)
    assert sizes.estimates[0] == pytest.approx(math.log(420 / 30))
    assert sizes.estimates[1] == pytest.approx(math.log(210.5 / 0.5))
    assert sizes.variances[1] == pytest.approx(1 / 210.5 + 1 / 0.5)
    assert any("continuity correction" in note for note in sizes.notes)


def test_log_dor_matches_statsmodels_table2x2_with_and_without_zero_cells() -> None:
    """Log DOR and Woolf SE agree with statsmodels Table2x2 on the (corrected) table."""
    tp, fp, fn, tn = [45.0, 20.0], [30.0, 11.0], [5.0, 0.0], [420.0, 210.0]
    sizes = log_diagnostic_odds_ratio(tp, fp, fn, tn)
    # statsmodels 0.15 Table2x2: log_oddsratio and its Woolf (1955) standard error. Its own
    # zero handling replaces zeros by 0.5, so the zero-cell site is passed with 0.5 already
    # added to all four cells (Glas et al. 2003), and shifting is switched off.
    for i, shift in ((0, 0.0), (1, 0.5)):
        table = np.array([[tp[i], fn[i]], [fp[i], tn[i]]]) + shift
        ref = Table2x2(table, shift_zeros=False)
        assert sizes.estimates[i] == pytest.approx(ref.log_oddsratio, rel=1e-12)
        assert sizes.variances[i] == pytest.approx(ref.log_oddsratio_se**2, rel=1e-12)
    assert sizes.corrected == (1,)
    assert sizes.transform == "log"


def test_counts_must_be_whole_and_non_negative() -> None:
    """Fractional or negative counts are refused."""
    with pytest.raises(InputError, match="whole numbers"):
        logit_sensitivity([4.5, 3.0], [1.0, 2.0])
    with pytest.raises(InputError, match="whole numbers"):
        log_diagnostic_odds_ratio([4, 3], [-1, 2], [1, 1], [9, 9])
