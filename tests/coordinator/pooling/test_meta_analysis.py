"""Checks of coordinator.pooling.meta_analysis against published results and reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats
from statsmodels.stats.meta_analysis import combine_effects, effectsize_2proportions

from coordinator.pooling.meta_analysis import (
    MetaAnalysis,
    meta_analyze,
    pooled_vs_meta_note,
)
from site_agent.exceptions import InputError

# BCG vaccine trials: Colditz et al. (1994), JAMA 271:698-702, 13 trials. Counts as
# distributed with the metafor package (dataset dat.bcg; Viechtbauer 2010, J Stat Softw
# 36(3), doi:10.18637/jss.v036.i03): TB cases / non-cases, vaccinated and control arms.
BCG_TPOS = np.array([4, 6, 3, 62, 33, 180, 8, 505, 29, 17, 186, 5, 27], dtype=float)
BCG_TNEG = np.array(
    [119, 300, 228, 13536, 5036, 1361, 2537, 87886, 7470, 1699, 50448, 2493, 16886], dtype=float
)
BCG_CPOS = np.array([11, 29, 11, 248, 47, 372, 10, 499, 45, 65, 141, 3, 29], dtype=float)
BCG_CNEG = np.array(
    [128, 274, 209, 12619, 5761, 1079, 619, 87892, 7232, 1600, 27197, 2338, 17825], dtype=float
)


def _bcg_log_risk_ratios() -> tuple[np.ndarray, np.ndarray]:
    n1, n2 = BCG_TPOS + BCG_TNEG, BCG_CPOS + BCG_CNEG
    y = np.log(BCG_TPOS / n1) - np.log(BCG_CPOS / n2)
    v = 1 / BCG_TPOS - 1 / n1 + 1 / BCG_CPOS - 1 / n2  # common practice (log risk ratio)
    return y, v


# Kacker (2004) example, with results of R metafor rma() (tol 1e-9) as recorded in the
# statsmodels test suite (statsmodels/stats/tests/results/results_meta.py, exk1_*).
KACKER_Y = np.array([61.0, 61.4, 62.21, 62.3, 62.34, 62.6, 62.7, 62.84, 65.9])
KACKER_V = np.array([0.2025, 1.21, 0.09, 0.2025, 0.3844, 0.5625, 0.0676, 0.0225, 1.8225])


def _generalized_q(y: np.ndarray, v: np.ndarray, tau2: float) -> float:
    w = 1 / (v + tau2)
    return float(np.sum(w * (y - np.sum(w * y) / np.sum(w)) ** 2))


def _reml_negative_loglik(tau2: float, y: np.ndarray, v: np.ndarray) -> float:
    """Slow reference: minus the REML log-likelihood of the random-effects model."""
    w = 1 / (v + tau2)
    mu = np.sum(w * y) / np.sum(w)
    return float(0.5 * (np.sum(np.log(v + tau2)) + np.log(np.sum(w)) + np.sum(w * (y - mu) ** 2)))


def test_bcg_log_risk_ratios_match_statsmodels_effect_sizes() -> None:
    """The BCG log risk ratios and variances agree with statsmodels' effect-size helper."""
    y, v = _bcg_log_risk_ratios()
    ref_y, ref_v = effectsize_2proportions(
        BCG_TPOS, BCG_TPOS + BCG_TNEG, BCG_CPOS, BCG_CPOS + BCG_CNEG, statistic="risk-ratio"
    )  # statsmodels 0.15, checked there against metafor escalc
    np.testing.assert_allclose(y, ref_y, rtol=1e-12)
    np.testing.assert_allclose(v, ref_v, rtol=1e-12)


def test_reml_bcg_matches_published_metafor_results() -> None:
    """REML on the BCG trials reproduces metafor's documented estimate, SE, tau², I² and Q."""
    y, v = _bcg_log_risk_ratios()
    res = meta_analyze(y, v, method="reml", transform="log")
    # metafor rma(yi, vi) on dat.bcg, Viechtbauer (2010) J Stat Softw 36(3) and metafor
    # documentation; recalled from memory (4 decimals).
    assert res.estimate == pytest.approx(-0.7145, abs=5e-5)
    assert res.se == pytest.approx(0.1798, abs=5e-5)
    assert res.tau2 == pytest.approx(0.3132, abs=5e-5)
    assert 100 * res.i2 == pytest.approx(92.22, abs=5e-3)
    assert res.h2 == pytest.approx(12.86, abs=5e-3)
    assert res.q == pytest.approx(152.2330, abs=5e-5)
    assert res.q_df == 12
    # metafor confint(res): tau² 95% CI 0.1197 to 1.1115; recalled from memory.
    assert res.tau2_lower == pytest.approx(0.1197, abs=5e-5)
    assert res.tau2_upper == pytest.approx(1.1115, abs=5e-5)
    # metafor predict(res, transf=exp): 0.4894 (0.3441 to 0.6962); recalled from memory.
    assert res.back_transformed is not None
    assert res.back_transformed.estimate == pytest.approx(0.4894, abs=5e-5)
    assert res.back_transformed.lower == pytest.approx(0.3441, abs=5e-5)
    assert res.back_transformed.upper == pytest.approx(0.6962, abs=5e-5)


def test_reml_bcg_prediction_half_width_matches_metafor_after_quantile_swap() -> None:
    """Our t(k-2) prediction interval equals metafor's normal one once the quantile is swapped."""
    y, v = _bcg_log_risk_ratios()
    res = meta_analyze(y, v, method="reml")
    t_crit = stats.t.ppf(0.975, res.k - 2)  # Higgins, Thompson & Spiegelhalter (2009)
    spread = (res.prediction_upper - res.prediction_lower) / (2 * t_crit)
    z_lower = res.estimate - stats.norm.ppf(0.975) * spread
    z_upper = res.estimate + stats.norm.ppf(0.975) * spread
    # metafor predict(res, transf=exp) uses the normal quantile: PI 0.1546 to 1.5490;
    # recalled from memory.
    assert math.exp(z_lower) == pytest.approx(0.1546, abs=5e-5)
    assert math.exp(z_upper) == pytest.approx(1.5490, abs=5e-5)


def test_dl_bcg_matches_published_metafor_results() -> None:
    """DerSimonian-Laird on the BCG trials reproduces metafor's documented values."""
    y, v = _bcg_log_risk_ratios()
    res = meta_analyze(y, v, method="dl")
    # metafor rma(yi, vi, method="DL") on dat.bcg; recalled from memory (4 decimals).
    assert res.estimate == pytest.approx(-0.7141, abs=5e-5)
    assert res.se == pytest.approx(0.1787, abs=5e-5)
    assert res.tau2 == pytest.approx(0.3088, abs=5e-5)


@pytest.mark.parametrize(("method", "reference"), [("dl", "dl"), ("pm", "pm")])
def test_bcg_random_effects_match_statsmodels_combine_effects(method: str, reference: str) -> None:
    """DL and PM estimate, SE, tau², HKSJ interval, Q and I² agree with statsmodels."""
    y, v = _bcg_log_risk_ratios()
    ref = combine_effects(y, v, method_re=reference, use_t=True, atol=1e-13, maxiter=200)
    if reference == "dl":
        ref = combine_effects(y, v, method_re=reference, use_t=True)
    plain = meta_analyze(y, v, method=method)  # type: ignore[arg-type]
    adjusted = meta_analyze(y, v, method=method, hksj=True)  # type: ignore[arg-type]
    # statsmodels 0.15 combine_effects; conf_int()[3] is the random-effects WLS (HKSJ) interval.
    assert plain.estimate == pytest.approx(ref.mean_effect_re, rel=1e-10)
    assert plain.se == pytest.approx(ref.sd_eff_w_re, rel=1e-10)
    assert plain.tau2 == pytest.approx(ref.tau2, rel=1e-9)
    assert adjusted.se == pytest.approx(ref.sd_eff_w_re_hksj, rel=1e-9)
    hksj_ci = ref.conf_int(alpha=0.05, use_t=True)[3]
    assert (adjusted.lower, adjusted.upper) == pytest.approx(tuple(hksj_ci), rel=1e-9)
    homogeneity = ref.test_homogeneity()
    assert plain.q == pytest.approx(homogeneity.statistic, rel=1e-12)
    assert plain.q_pvalue == pytest.approx(homogeneity.pvalue, rel=1e-9)


def test_fixed_effect_bcg_matches_statsmodels() -> None:
    """The inverse-variance fixed effect and its Q-based I² agree with statsmodels."""
    y, v = _bcg_log_risk_ratios()
    ref = combine_effects(y, v, method_re="dl")  # statsmodels 0.15
    res = meta_analyze(y, v, method="fixed")
    assert res.estimate == pytest.approx(ref.mean_effect_fe, rel=1e-12)
    assert res.se == pytest.approx(ref.sd_eff_w_fe, rel=1e-12)
    assert res.i2 == pytest.approx(ref.i2, rel=1e-12)
    assert res.h2 == pytest.approx(ref.h2, rel=1e-12)
    assert math.isnan(res.prediction_lower)
    assert any("fixed-effect" in note for note in res.notes)


def test_kacker_example_matches_metafor_values_recorded_in_statsmodels() -> None:
    """PM, DL, DL with HKSJ and FE match metafor output for the Kacker (2004) example."""
    pm = meta_analyze(KACKER_Y, KACKER_V, method="pm")
    dl = meta_analyze(KACKER_Y, KACKER_V, method="dl")
    dl_hksj = meta_analyze(KACKER_Y, KACKER_V, method="dl", hksj=True)
    fe = meta_analyze(KACKER_Y, KACKER_V, method="fixed")
    # metafor rma(method="PM"), statsmodels results_meta.exk1_metafor
    assert pm.estimate == pytest.approx(62.4076199113286, rel=1e-9)
    assert pm.se == pytest.approx(0.338030602684471, rel=1e-7)
    assert pm.tau2 == pytest.approx(0.705395309224248, rel=1e-7)
    assert 100 * pm.i2 == pytest.approx(83.7218626490482, rel=1e-7)
    assert pm.h2 == pytest.approx(6.14320900751909, rel=1e-7)
    # metafor rma(method="DL"), statsmodels results_meta.exk1_dl
    assert dl.estimate == pytest.approx(62.3901386044504, rel=1e-12)
    assert dl.se == pytest.approx(0.245749668040304, rel=1e-10)
    assert dl.tau2 == pytest.approx(0.288049246973751, rel=1e-10)
    assert (dl.lower, dl.upper) == pytest.approx((61.9084781058787, 62.8717991030221), rel=1e-12)
    assert dl.q == pytest.approx(24.801897741835, rel=1e-10)
    assert dl.q_pvalue == pytest.approx(0.00167935146372742, rel=1e-8)
    assert 100 * dl.i2 == pytest.approx(67.744403741711, rel=1e-10)
    assert dl.h2 == pytest.approx(3.10023721772938, rel=1e-10)
    # metafor rma(method="DL", test="knha"), statsmodels results_meta.exk1_dl_hksj
    assert dl_hksj.se == pytest.approx(0.29477605699879, rel=1e-10)
    assert (dl_hksj.lower, dl_hksj.upper) == pytest.approx(
        (61.710383798052, 63.0698934108488), rel=1e-12
    )
    # metafor rma(method="FE"), statsmodels results_meta.exk1_fe
    assert fe.estimate == pytest.approx(62.5833970939982, rel=1e-12)
    assert fe.se == pytest.approx(0.107845705498231, rel=1e-10)
    assert 100 * fe.i2 == pytest.approx(67.744403741711, rel=1e-10)


@pytest.mark.parametrize("seed", range(8))
def test_reml_tau2_maximizes_restricted_likelihood(seed: int) -> None:
    """Fisher scoring lands on the maximum of the REML likelihood found by a bounded search."""
    rng = np.random.default_rng(seed)
    k = int(rng.integers(3, 15))
    v = rng.uniform(0.01, 0.3, k)
    y = rng.normal(0.5, np.sqrt(v + rng.uniform(0, 0.2)))
    res = meta_analyze(y, v, method="reml")
    # Slow reference: scipy bounded minimization of the REML criterion (Viechtbauer 2005).
    search = optimize.minimize_scalar(
        _reml_negative_loglik,
        bounds=(0.0, 10.0),
        args=(y, v),
        method="bounded",
        options={"xatol": 1e-10},
    )
    assert res.tau2 == pytest.approx(search.x, abs=1e-6)
    assert _reml_negative_loglik(res.tau2, y, v) <= search.fun + 1e-10


@pytest.mark.parametrize("seed", range(8))
def test_q_profile_bounds_solve_the_chi2_equations(seed: int) -> None:
    """Each positive Q-profile bound makes generalized Q equal its scipy chi² quantile."""
    rng = np.random.default_rng(100 + seed)
    k = int(rng.integers(4, 20))
    v = rng.uniform(0.01, 0.2, k)
    y = rng.normal(0.0, np.sqrt(v + 0.3))
    res = meta_analyze(y, v, method="dl")
    # Viechtbauer (2007) Stat Med 26:37: Q(tau²) = chi²_{k-1} quantiles at the bounds.
    for bound, quantile in ((res.tau2_lower, 0.975), (res.tau2_upper, 0.025)):
        target = stats.chi2.ppf(quantile, k - 1)
        if bound > 0:
            assert _generalized_q(y, v, bound) == pytest.approx(target, rel=1e-9)
        else:
            assert _generalized_q(y, v, 0.0) <= target


@pytest.mark.parametrize("seed", range(8))
def test_dl_q_i2_and_t_interval_match_statsmodels_on_random_data(seed: int) -> None:
    """On random sites, Q, its p-value, I² and the HKSJ t interval agree with statsmodels."""
    rng = np.random.default_rng(200 + seed)
    k = int(rng.integers(2, 25))
    v = rng.uniform(0.005, 0.5, k)
    y = rng.normal(1.0, np.sqrt(v + rng.uniform(0, 0.5)))
    with np.errstate(invalid="ignore"):  # statsmodels takes sqrt of a negative DL tau² fit
        ref = combine_effects(y, v, method_re="dl", use_t=True)  # statsmodels 0.15
    res = meta_analyze(y, v, method="dl", hksj=True, confidence=0.9)
    assert res.q == pytest.approx(ref.q, rel=1e-10)
    assert res.q_pvalue == pytest.approx(ref.test_homogeneity().pvalue, rel=1e-9, abs=1e-300)
    assert res.i2 == pytest.approx(max(0.0, ref.i2), abs=1e-12)
    if ref.tau2 >= 0:  # statsmodels does not truncate the DL tau² at zero
        hksj_ci = ref.conf_int(alpha=0.1, use_t=True)[3]
        assert (res.lower, res.upper) == pytest.approx(tuple(hksj_ci), rel=1e-9)


def test_prediction_interval_needs_three_sites() -> None:
    """With two sites the prediction interval is NaN and a note says why."""
    res = meta_analyze([0.1, 0.9], [0.01, 0.02], method="reml")
    assert math.isnan(res.prediction_lower) and math.isnan(res.prediction_upper)
    assert any("at least 3 sites" in note for note in res.notes)


def test_prediction_interval_uses_t_with_k_minus_2_df() -> None:
    """The prediction half-width is t_{k-2} · sqrt(tau² + SE²) (Higgins et al. 2009)."""
    y, v = _bcg_log_risk_ratios()
    res = meta_analyze(y, v, method="dl")
    half = stats.t.ppf(0.975, 11) * math.sqrt(res.tau2 + res.se**2)  # scipy t quantile
    assert res.prediction_upper - res.estimate == pytest.approx(half, rel=1e-12)
    assert "t(k−2)" in res.prediction_convention


def test_result_survives_json_round_trip_with_nan_as_null() -> None:
    """A result written to JSON reads back identical; NaN travels as null."""
    res = meta_analyze([0.1, 0.9], [0.01, 0.02], method="dl", transform="logit")
    text = res.model_dump_json()
    assert '"prediction_lower":null' in text
    again = MetaAnalysis.model_validate_json(text)
    assert again.model_dump_json() == text


@settings(max_examples=50, deadline=None)
@given(
    sites=st.lists(
        st.tuples(st.floats(-3, 3, allow_nan=False), st.floats(1e-3, 1.0, allow_nan=False)),
        min_size=2,
        max_size=12,
    ),
    method=st.sampled_from(["dl", "reml", "pm", "fixed"]),
)
def test_pooled_estimate_ignores_site_order_and_stays_within_site_range(
    sites: list[tuple[float, float]], method: str
) -> None:
    """Reversing the site order changes nothing, and the pool lies within the site range."""
    y = [s[0] for s in sites]
    v = [s[1] for s in sites]
    forward = meta_analyze(y, v, method=method)  # type: ignore[arg-type]
    backward = meta_analyze(y[::-1], v[::-1], method=method)  # type: ignore[arg-type]
    assert forward.estimate == pytest.approx(backward.estimate, rel=1e-9, abs=1e-9)
    assert forward.tau2 == pytest.approx(backward.tau2, rel=1e-7, abs=1e-9)
    assert min(y) - 1e-9 <= forward.estimate <= max(y) + 1e-9
    assert 0.0 <= forward.i2 <= 1.0


@pytest.mark.parametrize(
    ("estimates", "variances", "message"),
    [
        ([0.2], [0.1], "at least two sites"),
        ([0.2, float("nan")], [0.1, 0.1], "not a finite number"),
        ([0.2, 0.3], [0.1, float("inf")], "not a finite number"),
        ([0.2, 0.3], [0.1, -0.1], "variance must be positive"),
        ([0.2, 0.3], [0.1, 0.0], "variance must be positive"),
        ([0.2, 0.3, 0.4], [0.1, 0.1], "3 estimates but 2 variances"),
    ],
)
def test_invalid_input_raises_input_error(
    estimates: list[float], variances: list[float], message: str
) -> None:
    """Too few sites, non-finite values and non-positive variances are refused."""
    with pytest.raises(InputError, match=message):
        meta_analyze(estimates, variances)


def test_labels_and_confidence_are_validated() -> None:
    """A label count that differs from the site count, or a bad level, is refused."""
    with pytest.raises(InputError, match="1 labels for 2 sites"):
        meta_analyze([0.1, 0.2], [0.1, 0.1], labels=["a"])
    with pytest.raises(InputError, match="confidence"):
        meta_analyze([0.1, 0.2], [0.1, 0.1], confidence=1.0)


def test_site_weights_sum_to_100_percent_and_carry_labels() -> None:
    """Per-site weights are percentages of the total and keep the given labels."""
    res = meta_analyze([0.1, 0.5, 0.3], [0.01, 0.04, 0.02], labels=["A", "B", "C"], method="dl")
    assert [s.label for s in res.sites] == ["A", "B", "C"]
    assert sum(s.weight_percent for s in res.sites) == pytest.approx(100.0)


def test_pooled_vs_meta_note_names_weighting_heterogeneity_and_simpson() -> None:
    """The explanatory note covers weighting, between-site variance and Simpson's paradox."""
    note = pooled_vs_meta_note()
    assert "weight" in note and "tau²" in note and "Simpson" in note


def test_hksj_note_appears_only_when_the_scale_factor_is_below_one() -> None:
    """Paule-Mandel sets the HKSJ scale factor to 1, so no narrowing note is given."""
    y, v = _bcg_log_risk_ratios()
    pm = meta_analyze(y, v, method="pm", hksj=True)
    # Paule & Mandel (1982): generalized Q equals k - 1, so the HKSJ factor is 1 and the
    # adjusted SE equals the unadjusted one.
    assert pm.se == pytest.approx(meta_analyze(y, v, method="pm").se, rel=1e-9)
    assert not any("HKSJ scale factor" in note for note in pm.notes)
    homogeneous = meta_analyze([0.50, 0.51, 0.49], [0.04, 0.04, 0.04], method="dl", hksj=True)
    assert any("HKSJ scale factor is below 1" in note for note in homogeneous.notes)
