"""Limits for the label-free drift statistics that account for how many cases a window holds.

PSI and the binned Kolmogorov-Smirnov distance between a window and the baseline are biased
upward and noisy on small windows: two samples drawn from one distribution give a PSI of
about ``(1/n_ref + 1/n_cur)·(B − 1)`` on ``B`` bins, so a fixed cut-off such as 0.25 alarms
on a 60-case window far more often than on a 600-case one. Here the limits come from the
sampling distribution of the statistic itself:

- :func:`psi_limits`: under no drift, ``PSI / (1/n_ref + 1/n_cur)`` is asymptotically
  chi-square with ``B − 1`` degrees of freedom (PSI is the symmetrised Kullback-Leibler
  divergence, whose scaled sample value behaves like Pearson's chi-square; Yurdakul 2018,
  recalled from memory), times a dispersion factor ``phi``;
- :func:`baseline_dispersion`: ``phi`` is estimated from the baseline windows themselves,
  each compared with the rest of the baseline (leave one out): the mean of
  ``PSI_i / ((1/n_i + 1/n_rest)·(B − 1))``, floored at 1. Cases that share a patient or
  a resampled source make a window's histogram noisier than multinomial sampling; the
  factor carries that extra noise into the limits, as the quasi-likelihood dispersion
  does for a generalised linear model (McCullagh & Nelder 1989, section 4.5).
  Because ``phi`` is itself estimated from ``m`` windows, the shifted limit uses the F
  distribution ``F(B − 1, m·(B − 1))`` rather than the chi-square: the ratio of the
  window's scaled PSI to the baseline's mean scaled PSI;
- the same ``phi`` is a design effect for the Kolmogorov-Smirnov test: its effective
  sample size is divided by ``phi`` (Kish 1965), see
  :func:`coordinator.monitoring.drift.binned_ks`.

Windows are tested one by one; with twelve windows a year, a per-window level of
:data:`DEFAULT_SHIFT_ALPHA` keeps the expected number of false alarms per detector near
0.06 per stable site-year when the model holds.

References
----------
Yurdakul B (2018). Statistical properties of population stability index. PhD dissertation,
Western Michigan University. https://scholarworks.wmich.edu/dissertations/3208
McCullagh P, Nelder JA (1989). Generalized Linear Models, 2nd ed. Chapman & Hall, section
4.5 (dispersion estimated from Pearson's statistic). doi:10.1007/978-1-4899-3242-6
Kish L (1965). Survey Sampling. Wiley, New York, section 8.2 (design effect).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from coordinator.monitoring.drift import DriftLevel
from coordinator.monitoring.suppressed_bounds import ks_lower_bound, psi_lower_bound
from site_agent.exceptions import InputError

DEFAULT_WATCH_ALPHA = 0.05
"""Per-window false-positive rate of the ``watch`` level (common practice)."""
DEFAULT_SHIFT_ALPHA = 0.005
"""Per-window false-positive rate of the ``shifted`` level: 12 windows a year x 0.005 is
0.06 expected false alarms per stable site-year, under the 0.2 the project aims at."""


@dataclass(frozen=True, slots=True)
class Dispersion:
    """Extra-multinomial noise of a site's score histograms, from its baseline windows.

    ``phi`` is at least 1; ``df`` is the denominator degrees of freedom of the F limit
    (``m·(B − 1)``; infinite when ``phi`` could not be estimated and 1 is assumed).
    """

    phi: float
    df: float
    windows: int
    reason: str | None = None


def baseline_dispersion(
    windows: Sequence[Sequence[int]], totals: Sequence[int] | None = None
) -> Dispersion:
    """Estimate the dispersion factor ``phi`` from baseline windows' band counts.

    Each window with cases is compared with the sum of the others (leave one out); ``phi``
    is the mean of the PSIs divided by their multinomial expectation
    ``(1/n_i + 1/n_rest)·(B − 1)``, floored at 1 (see the module docstring).

    Parameters
    ----------
    windows
        Counts per band of each baseline window, all on the same bands.
    totals
        Cases each window stands for (more than its counts where cells were suppressed;
        the PSI is then its lower bound, :func:`~coordinator.monitoring.suppressed_bounds.
        psi_lower_bound`); default: the counts' sums.
    """
    sizes = list(totals) if totals is not None else [int(sum(w)) for w in windows]
    if len(sizes) != len(windows):
        raise InputError("one total per baseline window is needed")
    kept = [(np.asarray(w, dtype=float), n) for w, n in zip(windows, sizes, strict=True) if n > 0]
    counts = [w for w, _ in kept]
    if len(counts) < 2:
        return Dispersion(1.0, math.inf, len(counts), "fewer than two baseline windows")
    bins = {c.size for c in counts}
    if len(bins) != 1 or counts[0].size < 2:
        raise InputError("baseline windows must share the same two or more bands")
    total = np.sum(counts, axis=0)
    grand = sum(n for _, n in kept)
    b = counts[0].size
    ratios = []
    for c, n in kept:
        rest, n_rest = total - c, grand - n
        if n_rest == 0:
            continue
        scale = (1.0 / n + 1.0 / n_rest) * (b - 1)
        psi = psi_lower_bound(rest.astype(int).tolist(), n_rest, c.astype(int).tolist(), n)
        ratios.append(psi.value / scale)
    if not ratios:
        return Dispersion(1.0, math.inf, 0, "no baseline window could be compared")
    return Dispersion(max(1.0, float(np.mean(ratios))), float(len(ratios) * (b - 1)), len(ratios))


def psi_limits(
    n_reference: int,
    n_current: int,
    bins: int,
    dispersion: Dispersion | None = None,
    *,
    watch_alpha: float = DEFAULT_WATCH_ALPHA,
    shift_alpha: float = DEFAULT_SHIFT_ALPHA,
) -> tuple[float, float]:
    """Return the ``(watch, shifted)`` PSI limits for these window sizes and bin count.

    ``limit = phi · (1/n_ref + 1/n_cur) · q`` with ``q`` the upper-``alpha`` quantile of
    chi-square(``B − 1``) when ``phi`` is known (1), and ``(B − 1)·F(B − 1, df)`` when it
    is estimated from baseline windows with ``df`` degrees of freedom.

    Raises
    ------
    InputError
        If a window is empty, fewer than two bins, or an alpha is outside (0, 0.5).
    """
    if n_reference < 1 or n_current < 1:
        raise InputError("both windows need at least one case for a PSI limit")
    if bins < 2:
        raise InputError("a PSI limit needs at least two bins")
    if not (0 < shift_alpha <= watch_alpha < 0.5):
        raise InputError("alphas must satisfy 0 < shift_alpha <= watch_alpha < 0.5")
    d = dispersion or Dispersion(1.0, math.inf, 0)
    scale = d.phi * (1.0 / n_reference + 1.0 / n_current)
    dof = bins - 1

    def quantile(alpha: float) -> float:
        if math.isinf(d.df):
            return float(stats.chi2.isf(alpha, dof))
        return float(dof * stats.f.isf(alpha, dof, d.df))

    return scale * quantile(watch_alpha), scale * quantile(shift_alpha)


@dataclass(frozen=True, slots=True)
class LabelFreeDrift:
    """PSI and binned KS of a window against the baseline, bounded and judged.

    ``bounded`` is true when suppressed cells made either histogram incomplete: the values
    are then the smallest consistent with the release (``suppressed_bounds``).
    """

    psi: float
    psi_limits: tuple[float, float]
    psi_level: DriftLevel
    ks_distance: float
    ks_p_value: float
    ks_level: DriftLevel
    bounded: bool


def label_free_drift(
    reference: Sequence[int],
    reference_total: int,
    current: Sequence[int],
    current_total: int,
    dispersion: Dispersion,
    *,
    p_thresholds: tuple[float, float] = (DEFAULT_WATCH_ALPHA, DEFAULT_SHIFT_ALPHA),
    fixed_psi_limits: tuple[float, float] | None = None,
    bands: Sequence[tuple[int, int]] | None = None,
    reference_capacity: Sequence[float] | None = None,
    current_capacity: Sequence[float] | None = None,
) -> LabelFreeDrift:
    """Judge a window's score histogram against the baseline's, suppressed cells bounded.

    The capacities say how many suppressed cases each bin can hold (see
    :mod:`~coordinator.monitoring.suppressed_bounds`). PSI runs on ``bands`` (groups of
    bins; every bin alone by default) against
    :func:`psi_limits` for the two totals (or ``fixed_psi_limits``); KS runs on every bin,
    with Smirnov's p-value at the effective size ``n_ref·n_cur/(n_ref + n_cur)/phi``
    (as SciPy's ``ks_2samp(method="asymp")`` at ``phi = 1``).

    References
    ----------
    Smirnov NV (1948). Annals of Mathematical Statistics 19:279–281.
    Kish L (1965). Survey Sampling. Wiley, section 8.2.
    """
    groups = list(bands) if bands is not None else [(i, i + 1) for i in range(len(reference))]
    ref_b = [int(sum(reference[a:b])) for a, b in groups]
    cur_b = [int(sum(current[a:b])) for a, b in groups]
    rc = None if reference_capacity is None else [sum(reference_capacity[a:b]) for a, b in groups]
    cc = None if current_capacity is None else [sum(current_capacity[a:b]) for a, b in groups]
    psi = psi_lower_bound(
        ref_b, reference_total, cur_b, current_total, reference_capacity=rc, current_capacity=cc
    )
    limits = fixed_psi_limits or psi_limits(
        reference_total,
        current_total,
        len(groups),
        dispersion,
        watch_alpha=p_thresholds[0],
        shift_alpha=p_thresholds[1],
    )
    ks = ks_lower_bound(
        reference,
        reference_total,
        current,
        current_total,
        reference_capacity=reference_capacity,
        current_capacity=current_capacity,
    )
    effective = reference_total * current_total / (reference_total + current_total)
    rounded = max(1.0, float(np.round(effective / dispersion.phi)))
    p_value = float(np.clip(stats.kstwo.sf(ks.value, rounded), 0.0, 1.0))
    return LabelFreeDrift(
        psi=psi.value,
        psi_limits=limits,
        psi_level=_level(psi.value >= limits[1], psi.value >= limits[0]),
        ks_distance=ks.value,
        ks_p_value=p_value,
        ks_level=_level(p_value < p_thresholds[1], p_value < p_thresholds[0]),
        bounded=bool(psi.missing_reference or psi.missing_current),
    )


def _level(shifted: bool, watch: bool) -> DriftLevel:
    if shifted:
        return DriftLevel.SHIFTED
    return DriftLevel.WATCH if watch else DriftLevel.STABLE
