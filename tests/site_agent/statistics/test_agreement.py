"""Tests of statistics.agreement against a SAS printout, a textbook example and libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import cohens_kappa

from site_agent.exceptions import InputError
from site_agent.statistics.agreement import cohen_kappa, contingency_table

# A 3×3 table whose SAS PROC FREQ output is quoted in statsmodels' test suite
# (statsmodels/stats/tests/test_inter_rater.py, "comparison to printout of a SAS example").
SAS_TABLE = [[0, 4, 1], [0, 8, 0], [0, 1, 5]]


def test_unweighted_kappa_matches_sas_printout() -> None:
    """Kappa, ASE and 95% limits equal the SAS printout for the 3×3 table."""
    result = cohen_kappa(SAS_TABLE)
    # SAS PROC FREQ (via statsmodels test_inter_rater.py): Kappa 0.4842, ASE 0.1380,
    # 95% limits 0.2137 and 0.7547.
    assert result.estimate == pytest.approx(0.4842, abs=5e-5)
    assert result.se == pytest.approx(0.1380, abs=5e-5)
    assert result.lower == pytest.approx(0.2137, abs=5e-5)
    assert result.upper == pytest.approx(0.7547, abs=5e-5)
    assert result.n == 19


def test_linear_weighted_kappa_matches_sas_printout() -> None:
    """Linear-weighted kappa and its ASE equal the SAS weighted-kappa printout."""
    result = cohen_kappa(SAS_TABLE, weights="linear")
    # SAS PROC FREQ weighted kappa (Cicchetti–Allison = linear weights), quoted in
    # statsmodels test_inter_rater.py: Kappa 0.4701, ASE 0.1457, limits 0.1845, 0.7558.
    assert result.estimate == pytest.approx(0.4701, abs=5e-5)
    assert result.se == pytest.approx(0.1457, abs=5e-5)
    assert result.lower == pytest.approx(0.1845, abs=5e-5)
    assert result.upper == pytest.approx(0.7558, abs=5e-5)


def test_kappa_of_fleiss_levin_paik_diagnosis_example() -> None:
    """The three-category diagnosis example gives kappa 0.676."""
    # Fleiss, Levin & Paik (2003) Statistical Methods for Rates and Proportions, 3rd ed.,
    # chapter 18: 100 patients, proportions .75 .01 .04 / .05 .04 .01 / .00 .00 .10,
    # p_o = 0.89, p_e = 0.66, kappa = 0.676 (table and values recalled from memory).
    table = [[75, 1, 4], [5, 4, 1], [0, 0, 10]]
    result = cohen_kappa(table)
    assert result.estimate == pytest.approx((0.89 - 0.66) / (1 - 0.66), abs=1e-12)
    assert result.estimate == pytest.approx(0.676, abs=5e-4)


@pytest.mark.parametrize("weights", ["none", "linear", "quadratic"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_kappa_matches_sklearn_and_statsmodels_on_random_ratings(seed: int, weights: str) -> None:
    """Point estimate equals sklearn; SE equals statsmodels' non-null std_kappa."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 4, size=300)
    b = np.where(rng.random(300) < 0.6, a, rng.integers(0, 4, size=300))
    table = contingency_table(a, b, categories=[0, 1, 2, 3])
    result = cohen_kappa(table, weights=weights)  # type: ignore[arg-type]
    # Reference library: sklearn.metrics.cohen_kappa_score (weights None/linear/quadratic).
    expected = cohen_kappa_score(a, b, weights=None if weights == "none" else weights)
    assert result.estimate == pytest.approx(expected, rel=1e-12)
    # Reference library: statsmodels cohens_kappa; its std_kappa is the Fleiss, Cohen &
    # Everitt (1969) non-null ASE (std_kappa0 is the null-hypothesis one).
    sm = cohens_kappa(table, wt=None if weights == "none" else weights)
    assert result.se == pytest.approx(sm.std_kappa, rel=1e-10)


def test_contingency_table_counts_pairs_by_category_order() -> None:
    """Rows are rater A, columns rater B, in the given category order."""
    table = contingency_table(["neg", "pos", "pos"], ["pos", "pos", "neg"], ["neg", "pos"])
    np.testing.assert_array_equal(table, [[0, 1], [1, 1]])


def test_contingency_table_rejects_unknown_category_without_quoting_it() -> None:
    """A rating outside the categories raises InputError whose message has no data value."""
    with pytest.raises(InputError, match="not one of the given categories") as info:
        contingency_table(["a", "secret-value"], ["a", "a"], ["a", "b"])
    assert "secret-value" not in str(info.value)


def test_kappa_with_single_category_in_use_is_nan_with_reason() -> None:
    """When both raters use one category only, chance agreement is 1 and kappa undefined."""
    result = cohen_kappa([[10, 0], [0, 0]])
    assert math.isnan(result.estimate)
    assert result.reason is not None and "chance agreement" in result.reason


def test_kappa_of_empty_table_is_nan_with_reason() -> None:
    """No rated cases: NaN kappa with a reason."""
    result = cohen_kappa(np.zeros((3, 3)))
    assert math.isnan(result.estimate) and result.n == 0 and result.reason is not None


def test_kappa_rejects_non_square_table() -> None:
    """A rectangular table is invalid input."""
    with pytest.raises(InputError, match="square"):
        cohen_kappa([[1, 2, 3], [4, 5, 6]])


def test_perfect_agreement_has_kappa_one_and_zero_se() -> None:
    """All cases on the diagonal: kappa 1 with zero standard error (common practice)."""
    result = cohen_kappa([[7, 0, 0], [0, 5, 0], [0, 0, 3]], weights="quadratic")
    assert result.estimate == pytest.approx(1.0)
    assert result.se == pytest.approx(0.0, abs=1e-12)
