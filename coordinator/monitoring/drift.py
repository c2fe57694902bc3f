"""Drift of a site's case mix and score distribution between two time windows.

Sites release binned score counts on fixed edges and counts of categorical acquisition
attributes, never raw scores, so every statistic here works on counts:

- :func:`population_stability_index` (PSI) between two histograms on the same bins;
- :func:`binned_ks` — the Kolmogorov–Smirnov distance between the two binned
  distributions, with an asymptotic p-value;
- :func:`category_chi_square` — Pearson's chi-square test of a categorical attribute mix
  (scanner vendor, protocol, ward) in a reference and a current window;
- :func:`total_variation_distance` — half the L1 distance between category shares.

Each returns a frozen result that carries the thresholds it was judged against and a
:class:`DriftLevel`. A statistic that cannot be computed (an empty window, a single
category) is NaN with a ``reason`` and level ``undetermined``; it never raises.

Label-free drift says that the inputs changed, not that the classifier got worse: a
shifted score distribution is a prompt to look, and a stable one is no proof of
unchanged accuracy.

References
----------
Siddiqi N (2006). Credit Risk Scorecards: Developing and Implementing Intelligent Credit
Scoring. Wiley, Hoboken NJ. ISBN 978-0-471-75451-0.
Yurdakul B (2018). Statistical properties of population stability index. PhD
dissertation, Western Michigan University. https://scholarworks.wmich.edu/dissertations/3208
Massey FJ (1951). The Kolmogorov–Smirnov test for goodness of fit. Journal of the
American Statistical Association 46:68–78. doi:10.1080/01621459.1951.10500769
Pearson K (1900). On the criterion that a given system of deviations from the probable in
the case of a correlated system of variables is such that it can be reasonably supposed to
have arisen from random sampling. Philosophical Magazine 50:157–175.
doi:10.1080/14786440009463897
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import chi2_contingency, kstwo

from site_agent.exceptions import InputError

DEFAULT_PSI_EPSILON = 1e-4
"""Share given to an empty bin so that ln(a/e) stays finite (common practice)."""
DEFAULT_PSI_THRESHOLDS = (0.1, 0.25)
"""PSI below 0.1 is read as stable, 0.1–0.25 as worth watching, above 0.25 as shifted.

Common practice in credit scoring (Siddiqi 2006); a rule of thumb, not a test.
"""
DEFAULT_P_THRESHOLDS = (0.05, 0.01)
"""p-value cut-offs for ``watch`` and ``shifted`` (common practice); used by KS and chi-square."""
DEFAULT_TVD_THRESHOLDS = (0.1, 0.2)
"""Total variation distance cut-offs for ``watch`` and ``shifted``.

Our own defaults: there is no published standard. A study protocol should set them.
"""
MIN_EXPECTED_COUNT = 5.0
"""Smallest expected cell count for which the chi-square approximation is trusted
(Cochran 1954, Biometrics 10:417–451; common practice)."""


class DriftLevel(StrEnum):
    """How a drift statistic reads against its thresholds (sitepool's own labels)."""

    STABLE = "stable"
    WATCH = "watch"
    SHIFTED = "shifted"
    UNDETERMINED = "undetermined"


@dataclass(frozen=True, slots=True)
class PsiResult:
    """Population stability index between a reference and a current histogram."""

    psi: float
    level: DriftLevel
    thresholds: tuple[float, float]
    epsilon: float
    empty_bins: int
    n_reference: int
    n_current: int
    reason: str | None = None


@dataclass(frozen=True, slots=True)
class KsResult:
    """Kolmogorov–Smirnov distance between two binned distributions, with its p-value."""

    distance: float
    p_value: float
    effective_n: float
    level: DriftLevel
    thresholds: tuple[float, float]
    n_reference: int
    n_current: int
    reason: str | None = None


@dataclass(frozen=True, slots=True)
class ChiSquareResult:
    """Pearson chi-square test of a category mix in two windows."""

    statistic: float
    dof: int
    p_value: float
    level: DriftLevel
    thresholds: tuple[float, float]
    categories: tuple[str, ...]
    min_expected: float
    small_expected: bool
    n_reference: int
    n_current: int
    reason: str | None = None


@dataclass(frozen=True, slots=True)
class TvdResult:
    """Total variation distance between the category shares of two windows."""

    distance: float
    level: DriftLevel
    thresholds: tuple[float, float]
    categories: tuple[str, ...]
    n_reference: int
    n_current: int
    reason: str | None = None


def _counts(values: ArrayLike, name: str) -> NDArray[np.int64]:
    array = np.asarray(values)
    if array.ndim != 1 or array.size == 0:
        raise InputError(f"{name} must be a non-empty one-dimensional sequence of counts")
    if array.dtype == np.bool_ or not np.issubdtype(array.dtype, np.number):
        raise InputError(f"{name} must hold whole-number counts")
    if not np.all(np.isfinite(array)) or np.any(array != np.round(array)):
        raise InputError(f"{name} must hold whole-number counts")
    if np.any(array < 0):
        raise InputError(f"{name} must not hold negative counts")
    return array.astype(np.int64)


def _paired_histograms(
    reference: ArrayLike, current: ArrayLike
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    ref = _counts(reference, "reference counts")
    cur = _counts(current, "current counts")
    if ref.size != cur.size:
        raise InputError(
            f"histograms have different numbers of bins ({ref.size} and {cur.size}); "
            "they must share the same bin edges"
        )
    if ref.size < 2:
        raise InputError("histograms need at least two bins")
    return ref, cur


def _category_table(
    reference: Mapping[str, int], current: Mapping[str, int]
) -> tuple[tuple[str, ...], NDArray[np.int64], NDArray[np.int64]]:
    categories = tuple(sorted(set(reference) | set(current)))
    if not categories:
        raise InputError("no categories given")
    ref = _counts([reference.get(c, 0) for c in categories], "reference counts")
    cur = _counts([current.get(c, 0) for c in categories], "current counts")
    return categories, ref, cur


def _check_thresholds(thresholds: tuple[float, float], *, increasing: bool) -> None:
    low, high = thresholds
    if not (math.isfinite(low) and math.isfinite(high)):
        raise InputError("thresholds must be finite")
    if increasing and not 0 <= low <= high:
        raise InputError("thresholds must satisfy 0 <= watch <= shifted")
    if not increasing and not 0 < high <= low < 1:
        raise InputError("p-value thresholds must satisfy 0 < shifted <= watch < 1")


def _level_from_distance(value: float, thresholds: tuple[float, float]) -> DriftLevel:
    if math.isnan(value):
        return DriftLevel.UNDETERMINED
    if value >= thresholds[1]:
        return DriftLevel.SHIFTED
    if value >= thresholds[0]:
        return DriftLevel.WATCH
    return DriftLevel.STABLE


def _level_from_p(p_value: float, thresholds: tuple[float, float]) -> DriftLevel:
    if math.isnan(p_value):
        return DriftLevel.UNDETERMINED
    if p_value < thresholds[1]:
        return DriftLevel.SHIFTED
    if p_value < thresholds[0]:
        return DriftLevel.WATCH
    return DriftLevel.STABLE


def population_stability_index(
    reference: ArrayLike,
    current: ArrayLike,
    *,
    epsilon: float = DEFAULT_PSI_EPSILON,
    thresholds: tuple[float, float] = DEFAULT_PSI_THRESHOLDS,
) -> PsiResult:
    """Return the population stability index of ``current`` against ``reference``.

    ``PSI = Σ_i (a_i − e_i) · ln(a_i / e_i)`` where ``e_i`` and ``a_i`` are the shares of
    bin ``i`` in the reference (expected) and current (actual) histogram. It is the
    symmetrised Kullback–Leibler (Jeffreys) divergence ``KL(a‖e) + KL(e‖a)``, so it is
    zero for equal shares, positive otherwise, and symmetric in the two windows.

    An empty bin would make the logarithm infinite; its share is raised to ``epsilon``
    (other shares are left as they are, so the floored shares may sum to slightly more
    than one). The result then depends on ``epsilon``; ``empty_bins`` says how many bins
    were floored. Merge sparse bins before calling if that matters.

    Parameters
    ----------
    reference, current
        Counts per bin on the same bin edges.
    epsilon
        Share given to an empty bin; must lie in (0, 0.01].
    thresholds
        ``(watch, shifted)``: PSI at or above ``watch`` reads ``watch``; at or above
        ``shifted`` reads ``shifted``. Defaults 0.1 and 0.25 are common practice.

    References
    ----------
    Siddiqi N (2006). Credit Risk Scorecards. Wiley, chapter 8 (system stability report).
    Yurdakul B (2018). Statistical properties of population stability index. PhD
    dissertation, Western Michigan University.
    Jeffreys H (1946). An invariant form for the prior probability in estimation problems.
    Proceedings of the Royal Society A 186:453–461. doi:10.1098/rspa.1946.0056
    """
    ref, cur = _paired_histograms(reference, current)
    if not 0 < epsilon <= 0.01:
        raise InputError(f"epsilon must lie in (0, 0.01], got {epsilon}")
    _check_thresholds(thresholds, increasing=True)
    n_ref, n_cur = int(ref.sum()), int(cur.sum())
    if n_ref == 0 or n_cur == 0:
        return PsiResult(
            math.nan,
            DriftLevel.UNDETERMINED,
            thresholds,
            epsilon,
            0,
            n_ref,
            n_cur,
            "a window holds no cases",
        )
    e = ref / n_ref
    a = cur / n_cur
    empty = (e == 0) | (a == 0)
    e = np.where(e == 0, epsilon, e)
    a = np.where(a == 0, epsilon, a)
    # Siddiqi (2006): PSI = Σ (actual% − expected%) · ln(actual% / expected%)
    psi = float(np.sum((a - e) * np.log(a / e)))
    return PsiResult(
        psi,
        _level_from_distance(psi, thresholds),
        thresholds,
        epsilon,
        int(empty.sum()),
        n_ref,
        n_cur,
    )


def binned_ks(
    reference: ArrayLike,
    current: ArrayLike,
    *,
    thresholds: tuple[float, float] = DEFAULT_P_THRESHOLDS,
    design_effect: float = 1.0,
) -> KsResult:
    """Return the two-sample Kolmogorov–Smirnov distance between two binned distributions.

    The distance is ``D = max_j |F_ref(x_j) − F_cur(x_j)|`` over the bin edges ``x_j``,
    with ``F`` the cumulative share. The empirical CDFs of the raw scores are only seen
    at the edges, so ``D`` is a lower bound of the exact KS statistic on the raw scores
    (equal to it when every score sits at one point per bin).

    The p-value is Smirnov's asymptotic two-sided one, computed as SciPy's
    ``ks_2samp(method="asymp")`` does: ``kstwo.sf(D, round(n))`` with the effective size
    ``n = n_ref·n_cur / (n_ref + n_cur)``. Because ``D`` is a lower bound, the p-value is
    an upper bound (conservative). With thousands of cases a tiny, harmless shift is
    "significant": read ``distance`` alongside ``level``.

    Parameters
    ----------
    reference, current
        Counts per bin on the same bin edges.
    thresholds
        ``(watch, shifted)`` p-value cut-offs: p below ``watch`` reads ``watch``, below
        ``shifted`` reads ``shifted``. Defaults 0.05 and 0.01 are common practice.
    design_effect
        Variance inflation of the histograms over multinomial sampling (at least 1; see
        :func:`coordinator.monitoring.window_null.baseline_dispersion`): the effective size
        is divided by it (Kish 1965, section 8.2), so clustered cases do not pass for
        independent ones.

    References
    ----------
    Kish L (1965). Survey Sampling. Wiley, New York, section 8.2 (design effect).
    Smirnov NV (1948). Table for estimating the goodness of fit of empirical distributions.
    Annals of Mathematical Statistics 19:279–281. doi:10.1214/aoms/1177730256
    Massey FJ (1951). Journal of the American Statistical Association 46:68–78.
    doi:10.1080/01621459.1951.10500769
    Simard R, L'Ecuyer P (2011). Computing the two-sided Kolmogorov–Smirnov distribution.
    Journal of Statistical Software 39(11). doi:10.18637/jss.v039.i11
    """
    ref, cur = _paired_histograms(reference, current)
    _check_thresholds(thresholds, increasing=False)
    if not (math.isfinite(design_effect) and design_effect >= 1.0):
        raise InputError(f"design_effect must be finite and at least 1, got {design_effect}")
    n_ref, n_cur = int(ref.sum()), int(cur.sum())
    if n_ref == 0 or n_cur == 0:
        return KsResult(
            math.nan,
            math.nan,
            math.nan,
            DriftLevel.UNDETERMINED,
            thresholds,
            n_ref,
            n_cur,
            "a window holds no cases",
        )
    # Massey (1951): D = sup_x |F_1(x) − F_2(x)|, here taken over the upper bin edges.
    distance = float(np.max(np.abs(np.cumsum(ref) / n_ref - np.cumsum(cur) / n_cur)))
    # Smirnov (1948) asymptotics on the effective size, as in scipy.stats.ks_2samp.
    # Kish (1965): an effective size divided by the design effect.
    effective_n = n_ref * n_cur / (n_ref + n_cur) / design_effect
    rounded_n = max(1.0, float(np.round(effective_n)))
    p_value = float(np.clip(kstwo.sf(distance, rounded_n), 0.0, 1.0))
    return KsResult(
        distance,
        p_value,
        effective_n,
        _level_from_p(p_value, thresholds),
        thresholds,
        n_ref,
        n_cur,
    )


def category_chi_square(
    reference: Mapping[str, int],
    current: Mapping[str, int],
    *,
    thresholds: tuple[float, float] = DEFAULT_P_THRESHOLDS,
) -> ChiSquareResult:
    """Test whether a categorical attribute mix differs between two windows.

    Pearson's chi-square test of homogeneity on the 2 × K table of counts (window by
    category), without Yates' continuity correction, through SciPy's
    ``chi2_contingency(correction=False)``. Categories absent from both windows are
    dropped; a category present in one window only counts as zero in the other.

    The chi-square approximation is poor when expected counts are small: ``small_expected``
    is true when any expected count is below :data:`MIN_EXPECTED_COUNT` (Cochran 1954).

    Parameters
    ----------
    reference, current
        Count per category name.
    thresholds
        ``(watch, shifted)`` p-value cut-offs (common practice 0.05 and 0.01).

    References
    ----------
    Pearson K (1900). Philosophical Magazine 50:157–175. doi:10.1080/14786440009463897
    Cochran WG (1954). Some methods for strengthening the common χ² tests. Biometrics
    10:417–451. doi:10.2307/3001616
    """
    categories, ref, cur = _category_table(reference, current)
    _check_thresholds(thresholds, increasing=False)
    n_ref, n_cur = int(ref.sum()), int(cur.sum())
    seen = (ref + cur) > 0
    kept = tuple(c for c, s in zip(categories, seen, strict=True) if s)

    def undefined(reason: str) -> ChiSquareResult:
        return ChiSquareResult(
            math.nan,
            0,
            math.nan,
            DriftLevel.UNDETERMINED,
            thresholds,
            kept,
            math.nan,
            False,
            n_ref,
            n_cur,
            reason,
        )

    if n_ref == 0 or n_cur == 0:
        return undefined("a window holds no cases")
    if len(kept) < 2:
        return undefined("fewer than two categories occur")
    table = np.vstack([ref[seen], cur[seen]])
    # Pearson (1900): X² = Σ (O − E)² / E with E = row total · column total / n.
    result = chi2_contingency(table, correction=False)
    min_expected = float(np.min(result.expected_freq))
    return ChiSquareResult(
        float(result.statistic),
        int(result.dof),
        float(result.pvalue),
        _level_from_p(float(result.pvalue), thresholds),
        thresholds,
        kept,
        min_expected,
        min_expected < MIN_EXPECTED_COUNT,
        n_ref,
        n_cur,
    )


def total_variation_distance(
    reference: Mapping[str, int],
    current: Mapping[str, int],
    *,
    thresholds: tuple[float, float] = DEFAULT_TVD_THRESHOLDS,
) -> TvdResult:
    """Return the total variation distance between the category shares of two windows.

    ``TVD = ½ Σ_c |p_c − q_c|``: the largest difference in probability that the two
    category mixes give to any set of categories; 0 for equal mixes, 1 for disjoint ones.
    It is an effect size and carries no sampling error; pair it with
    :func:`category_chi_square`.

    Parameters
    ----------
    reference, current
        Count per category name.
    thresholds
        ``(watch, shifted)`` distance cut-offs; defaults are our own (no published
        standard exists).

    References
    ----------
    Levin DA, Peres Y, Wilmer EL (2009). Markov Chains and Mixing Times. American
    Mathematical Society, Proposition 4.2. ISBN 978-0-8218-4739-8.
    """
    categories, ref, cur = _category_table(reference, current)
    _check_thresholds(thresholds, increasing=True)
    n_ref, n_cur = int(ref.sum()), int(cur.sum())
    if n_ref == 0 or n_cur == 0:
        return TvdResult(
            math.nan,
            DriftLevel.UNDETERMINED,
            thresholds,
            categories,
            n_ref,
            n_cur,
            "a window holds no cases",
        )
    # Levin, Peres & Wilmer (2009), Proposition 4.2: ‖μ − ν‖_TV = ½ Σ |μ(x) − ν(x)|.
    distance = 0.5 * float(np.sum(np.abs(ref / n_ref - cur / n_cur)))
    return TvdResult(
        distance,
        _level_from_distance(distance, thresholds),
        thresholds,
        categories,
        n_ref,
        n_cur,
    )
