import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simulations.dataset import load_public_dataset
from simulations.scenario import AcquisitionShift
from simulations.shifts import (
    ReferenceStats,
    apply_acquisition_shift,
    class_counts,
    jitter_duplicates,
    sample_population,
    size_weights,
)

TABLE = load_public_dataset()
REFERENCE = ReferenceStats.of(TABLE.features)
SIZE_Z = (
    (TABLE.features["feature_mean_radius"] - REFERENCE.means["feature_mean_radius"])
    / REFERENCE.sds["feature_mean_radius"]
).to_numpy()


def _shift(**params: float) -> pd.DataFrame:
    return apply_acquisition_shift(
        TABLE.features,
        AcquisitionShift(**params),
        TABLE.groups,
        REFERENCE,
        np.random.default_rng(0),
    )


def test_identity_shift_leaves_features_unchanged() -> None:
    """Default shift parameters return the features as they were."""
    pd.testing.assert_frame_equal(_shift(), TABLE.features)


def test_intensity_gain_multiplies_intensity_means_and_nothing_else() -> None:
    """Gain g multiplies intensity-like features (and their mean) by g; others are untouched."""
    shifted = _shift(intensity_gain=1.4)
    intensity = list(TABLE.groups.intensity)
    np.testing.assert_allclose(
        shifted[intensity].mean(), 1.4 * TABLE.features[intensity].mean(), rtol=1e-12
    )
    others = [c for c in TABLE.feature_names if c not in intensity]
    pd.testing.assert_frame_equal(shifted[others], TABLE.features[others])


def test_intensity_offset_adds_offset_times_reference_sd() -> None:
    """Offset o adds o reference SDs to each intensity-like feature."""
    shifted = _shift(intensity_offset=0.5)
    intensity = list(TABLE.groups.intensity)
    diff = shifted[intensity] - TABLE.features[intensity]
    np.testing.assert_allclose(diff.to_numpy(), np.tile(0.5 * REFERENCE.sds[intensity], (569, 1)))


def test_texture_gain_multiplies_texture_features() -> None:
    """Texture gain multiplies smoothness and fractal-dimension features."""
    shifted = _shift(texture_gain=0.8)
    texture = list(TABLE.groups.texture)
    np.testing.assert_allclose(shifted[texture], 0.8 * TABLE.features[texture], rtol=1e-12)


def test_shape_smoothing_shrinks_shape_spread_keeping_the_mean() -> None:
    """Smoothing s scales shape features' SD by (1 - s) and keeps their mean."""
    shifted = _shift(shape_smoothing=0.25)
    shape = list(TABLE.groups.shape)
    np.testing.assert_allclose(shifted[shape].std(), 0.75 * TABLE.features[shape].std(), rtol=1e-9)
    np.testing.assert_allclose(shifted[shape].mean(), TABLE.features[shape].mean(), rtol=1e-9)


def test_noise_sd_is_a_fraction_of_each_feature_sd() -> None:
    """Measurement noise on mean radius has SD noise_sd * SD, by a chi-square interval."""
    big = pd.concat([TABLE.features] * 20, ignore_index=True)
    shifted = apply_acquisition_shift(
        big, AcquisitionShift(noise_sd=0.5), TABLE.groups, REFERENCE, np.random.default_rng(1)
    )
    # mean radius lies far above 0, so clipping at 0 never acts on it.
    diff = (shifted["feature_mean_radius"] - big["feature_mean_radius"]).to_numpy()
    sigma = 0.5 * REFERENCE.sds["feature_mean_radius"]
    n = diff.size
    # Chi-square confidence interval for a normal variance (common practice), 99.99 %.
    low, high = stats.chi2.ppf([0.00005, 0.99995], n) / n
    assert low < np.mean(diff**2) / sigma**2 < high
    assert shifted.min().min() >= 0.0  # non-negative features stay non-negative


def test_class_counts_round_prevalence_and_keep_both_classes() -> None:
    """Counts follow the prevalence and always include one case of each class."""
    assert class_counts(200, 0.25) == (50, 150)
    assert class_counts(10, 0.01) == (1, 9)
    assert class_counts(10, 0.99) == (9, 1)


def test_size_weights_are_normalised_exponential_tilts() -> None:
    """Weights equal exp(beta * z) / sum, also for large z (no overflow)."""
    z = np.array([-1.0, 0.0, 2.0])
    np.testing.assert_allclose(size_weights(z, 0.7), np.exp(0.7 * z) / np.exp(0.7 * z).sum())
    assert np.isfinite(size_weights(np.array([1000.0, 0.0]), 5.0)).all()


def test_population_sample_meets_prevalence_without_resampling_when_pool_suffices() -> None:
    """A site smaller than each class pool gets distinct cases and no duplicates."""
    sample = sample_population(TABLE.labels, SIZE_Z, 200, 0.3, 0.0, np.random.default_rng(0))
    assert sample.n_resampled == 0
    assert len(np.unique(sample.indices)) == 200
    assert TABLE.labels[sample.indices].sum() == 60


def test_resampling_counts_exactly_the_cases_beyond_the_class_pool() -> None:
    """Asking for 300 positives from 212 resamples exactly 88, all of them positives."""
    sample = sample_population(TABLE.labels, SIZE_Z, 400, 0.75, 0.0, np.random.default_rng(0))
    assert sample.n_resampled == 300 - 212
    assert TABLE.labels[sample.indices[sample.resampled]].min() == 1
    positives = sample.indices[TABLE.labels[sample.indices] == 1]
    assert len(np.unique(positives)) == 212  # every positive used before any repeat


@pytest.mark.parametrize("beta", [-1.0, 1.0])
def test_covariate_shift_moves_mean_lesion_size_in_the_stated_direction(beta: float) -> None:
    """A positive beta raises, a negative one lowers the mean lesion size within each class."""
    rng = np.random.default_rng(0)
    for label in (0, 1):
        base = SIZE_Z[TABLE.labels == label].mean()
        moves = []
        for _ in range(20):
            sample = sample_population(TABLE.labels, SIZE_Z, 100, 0.5, beta, rng)
            chosen = sample.indices[TABLE.labels[sample.indices] == label]
            moves.append(SIZE_Z[chosen].mean() - base)
        # 20 draws; require the average move to exceed 4 standard errors of itself.
        mean, se = np.mean(moves), np.std(moves, ddof=1) / np.sqrt(len(moves))
        assert np.sign(mean) == np.sign(beta) and abs(mean) > 4 * se


def test_jitter_perturbs_only_resampled_rows_by_the_stated_fraction() -> None:
    """Jitter of fraction j has SD j * feature SD on resampled rows; other rows are untouched."""
    big = pd.concat([TABLE.features] * 10, ignore_index=True)
    mask = np.zeros(len(big), dtype=bool)
    mask[569:] = True
    out = jitter_duplicates(big, mask, REFERENCE, 0.05, np.random.default_rng(2))
    pd.testing.assert_frame_equal(out[~mask], big[~mask])
    diff = (out["feature_mean_area"] - big["feature_mean_area"]).to_numpy()[mask]
    ratio = diff.std() / (0.05 * REFERENCE.sds["feature_mean_area"])
    assert 0.95 < ratio < 1.05


def test_feature_corruption_is_a_mean_preserving_log_normal_error_on_named_columns() -> None:
    """Values times exp(s e - s^2/2): log-ratio SD s, mean kept, other columns untouched.

    Reference: the log-normal mean exp(mu + s^2/2) (common practice); the SD of the log
    ratio is checked with scipy.stats.chi2 bounds on a sample variance.
    """
    sigma = 0.5
    shifted = apply_acquisition_shift(
        TABLE.features,
        AcquisitionShift(corrupted_features=("worst",), corruption_sd=sigma),
        TABLE.groups,
        REFERENCE,
        np.random.default_rng(3),
    )
    worst = [c for c in TABLE.features.columns if "worst" in c]
    others = [c for c in TABLE.features.columns if c not in worst]
    pd.testing.assert_frame_equal(shifted[others], TABLE.features[others])
    column = "feature_worst_radius"  # strictly positive in WDBC
    log_ratio = np.log(shifted[column] / TABLE.features[column])
    n = len(log_ratio)
    low = sigma**2 * stats.chi2.ppf(0.0005, n - 1) / (n - 1)
    high = sigma**2 * stats.chi2.ppf(0.9995, n - 1) / (n - 1)
    assert low <= log_ratio.var(ddof=1) <= high
    assert log_ratio.mean() == pytest.approx(-(sigma**2) / 2, abs=4 * sigma / np.sqrt(n))


def test_corruption_sd_without_named_features_is_refused() -> None:
    """A corruption strength with no columns named is a scenario error, not a silent no-op."""
    with pytest.raises(ValueError, match="corrupted_features"):
        AcquisitionShift(corruption_sd=0.5)
