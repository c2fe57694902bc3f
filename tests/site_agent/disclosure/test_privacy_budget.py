import math

import numpy as np
import pytest

from site_agent.disclosure.policy import PrivacySettings
from site_agent.disclosure.privacy_budget import check_budget, laplace_scale, noisy_counts
from site_agent.exceptions import InputError

# Enough draws that the sample variance of Laplace-like noise (kurtosis about 6) has a
# relative standard error near sqrt(5 / n) = 1.1 %; the checks allow 5 % (> 4 SE).
DRAWS = 40_000


def _discrete_laplace_variance(scale: float) -> float:
    """Variance of P(k) proportional to exp(-|k| / scale), summed from the definition.

    Definition of the discrete Laplace distribution: Canonne, Kamath & Steinke (2020),
    "The Discrete Gaussian for Differential Privacy", NeurIPS, Definition 1.
    """
    half_width = 60 * math.ceil(scale) + 60
    ks = np.arange(-half_width, half_width + 1)
    weights = np.exp(-np.abs(ks) / scale)
    return float(np.sum(ks.astype(float) ** 2 * weights) / np.sum(weights))


@pytest.mark.parametrize(("epsilon", "sensitivity"), [(0.5, 1), (1.0, 3), (2.0, 1)])
def test_noise_variance_matches_the_discrete_laplace_of_the_stated_scale(
    epsilon: float, sensitivity: int
) -> None:
    """Sample variance of the noise matches the discrete Laplace variance at b = Δ/ε."""
    scale = laplace_scale(epsilon=epsilon, sensitivity=sensitivity)
    true_count = 100_000  # far from zero, so clamping at zero never acts

    noisy = np.array(noisy_counts([true_count] * DRAWS, epsilon=epsilon, sensitivity=sensitivity))
    noise = noisy - true_count

    expected = _discrete_laplace_variance(scale)
    assert abs(noise.var() / expected - 1) < 0.05
    # Mean of symmetric noise is zero: 4 standard errors.
    assert abs(noise.mean()) < 4 * math.sqrt(expected / DRAWS)


def test_noise_variance_approaches_continuous_laplace_2b_squared_at_large_scale() -> None:
    """At b = 10 the noise variance is within 5 % of the Laplace variance 2b²."""
    # Laplace(b) has variance 2b²: Dwork & Roth (2014), "The Algorithmic Foundations of
    # Differential Privacy", Section 3.3; the discrete version differs by < 0.2 % at b = 10.
    epsilon = 0.1
    scale = laplace_scale(epsilon=epsilon, sensitivity=1)
    noisy = np.array(noisy_counts([100_000] * DRAWS, epsilon=epsilon, sensitivity=1))

    assert scale == pytest.approx(10.0)
    assert abs((noisy - 100_000).var() / (2 * scale**2) - 1) < 0.05


def test_noisy_counts_are_non_negative_integers() -> None:
    """Post-processing clamps noise at zero, so small counts never go negative."""
    noisy = noisy_counts([0, 1, 2] * 2_000, epsilon=0.5, sensitivity=1)

    assert all(isinstance(v, int) and v >= 0 for v in noisy)
    assert any(v > 2 for v in noisy)  # noise was added at all


def test_noisy_counts_refuse_negative_counts() -> None:
    """A negative count is invalid input, not something to noise."""
    with pytest.raises(InputError, match="counts must be non-negative"):
        noisy_counts([3, -1], epsilon=1.0, sensitivity=1)


def test_noisy_counts_refuse_zero_epsilon() -> None:
    """Epsilon zero would need infinite noise and is refused."""
    with pytest.raises(InputError, match="epsilon must be a positive"):
        noisy_counts([3], epsilon=0.0, sensitivity=1)


def test_budget_allows_releases_until_sequential_composition_reaches_the_total() -> None:
    """Ten releases of 0.1 fit a budget of 1.0; the eleventh does not (sequential sum)."""
    # Sequential composition: Dwork & Roth (2014), Theorem 3.16 (epsilons add up).
    settings = PrivacySettings(enabled=True, study_epsilon=1.0, release_epsilon=0.1)
    spent = 0.0
    allowed = 0
    while check_budget(spent, settings).allowed:
        spent += settings.release_epsilon
        allowed += 1
        assert allowed < 100

    assert allowed == 10
    assert check_budget(spent, settings).remaining == pytest.approx(0.0, abs=1e-9)
