"""CUSUM and EWMA control charts over a site's per-window metrics.

(Over 500 lines for a reason: the self-starting charts share this module's chart engine.)

A site releases, per time window, either an estimate with its standard error (AUC, a
calibration slope) or a count pair (true positives out of diseased cases for
sensitivity). Each window is first *standardized* against the in-control target::

    z_t = (x_t − target) / se_t                                  (value, se)
    z_t = (p̂_t − p0) / sqrt(p0 (1 − p0) / n_t)                   (successes, trials)

so that, while nothing has changed, ``z_t`` is approximately N(0, 1) whatever the window
size. The charts then run on ``z_t`` with the design constants of the published
average-run-length (ARL) tables for a unit-variance normal sequence. For proportions
this is the *standardized binomial* CUSUM/EWMA: it leans on the normal approximation of
each window's proportion, so with few cases per window (say ``n p0 (1 − p0) < 5``,
common practice) the real ARL departs from the table; a Bernoulli CUSUM
(Reynolds & Stoumbos 1999) would be the exact alternative and is not implemented.

A window whose statistic is undefined (no trials, a NaN estimate, a zero standard
error) is *skipped*: its ``z`` is NaN, the chart keeps its previous state, and the
window index is listed in ``skipped``. After an alarm the chart restarts from zero, so
later alarms flag a shift that persists rather than the echo of the first one.

References
----------
Page ES (1954). Continuous inspection schemes. Biometrika 41:100–115.
doi:10.1093/biomet/41.1-2.100
Roberts SW (1959). Control chart tests based on geometric moving averages.
Technometrics 1:239–250. doi:10.1080/00401706.1959.10489860
Siegmund D (1985). Sequential Analysis: Tests and Confidence Intervals. Springer,
New York, chapter X. doi:10.1007/978-1-4757-1862-1
Lucas JM, Saccucci MS (1990). Exponentially weighted moving average control schemes:
properties and enhancements. Technometrics 32:1–12. doi:10.1080/00401706.1990.10484583
Montgomery DC (2009). Introduction to Statistical Quality Control, 6th ed. Wiley,
chapter 9.
Hawkins DM, Olwell DH (1998). Cumulative Sum Charts and Charting for Quality
Improvement. Springer, New York. doi:10.1007/978-1-4612-1686-5
Hawkins DM (1987). Self-starting CUSUM charts for location and scale. The Statistician
36:299–316. doi:10.2307/2348827 (:func:`self_starting_z`: in-control values estimated
from a short baseline, their uncertainty carried by the t distribution).
Reynolds MR, Stoumbos ZG (1999). A CUSUM chart for monitoring a proportion when
inspecting continuously. Journal of Quality Technology 31:87–108.
doi:10.1080/00224065.1999.11979900
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats
from scipy.optimize import brentq

from site_agent.exceptions import InputError

Side = Literal["both", "upper", "lower"]
"""Which departures raise an alarm: increases, decreases, or both."""

DEFAULT_CUSUM_K = 0.5
"""Reference value in standard-deviation units: tuned to detect a 1 σ shift (Page 1954)."""
DEFAULT_CUSUM_H = 4.77
"""Decision interval giving a two-sided in-control ARL of about 370 with k = 0.5.

Montgomery (2009), section 9.1, recalled from memory; :func:`siegmund_arl` gives 371.
"""
DEFAULT_EWMA_LAMBDA = 0.1
"""Smoothing weight of the EWMA chart (Lucas & Saccucci 1990)."""
DEFAULT_EWMA_WIDTH = 2.814
"""Limit width L giving an in-control ARL of about 500 with λ = 0.1.

Lucas & Saccucci (1990), as tabulated in Montgomery (2009) Table 9.11; recalled from memory.
"""
SIEGMUND_CORRECTION = 1.166
"""Siegmund's (1985) overshoot correction ``2·0.583`` added to the decision interval."""


@dataclass(frozen=True, slots=True)
class CusumResult:
    """A tabular CUSUM over per-window standardized values.

    ``upper[t]`` and ``lower[t]`` are ``C⁺`` and ``C⁻`` after window ``t`` (before the
    restart that follows an alarm). ``alarms`` lists the windows where the monitored
    side(s) exceeded ``h``; ``first_alarm`` is the first of them or ``None``.
    """

    method: str
    z: tuple[float, ...]
    upper: tuple[float, ...]
    lower: tuple[float, ...]
    k: float
    h: float
    side: Side
    alarms: tuple[int, ...]
    first_alarm: int | None
    skipped: tuple[int, ...]


@dataclass(frozen=True, slots=True)
class EwmaResult:
    """An EWMA chart over per-window standardized values.

    ``statistic[t]`` is the EWMA after window ``t``; the control limits are
    ``±control_limit`` (asymptotic limits, as in the Lucas & Saccucci tables).
    """

    method: str
    z: tuple[float, ...]
    statistic: tuple[float, ...]
    lam: float
    width: float
    control_limit: float
    side: Side
    alarms: tuple[int, ...]
    first_alarm: int | None
    skipped: tuple[int, ...]


def _check_side(side: str) -> None:
    if side not in ("both", "upper", "lower"):
        raise InputError(f"side must be 'both', 'upper' or 'lower', got {side!r}")


def _standardize_values(
    values: ArrayLike, standard_errors: ArrayLike, target: float
) -> NDArray[np.float64]:
    x = np.asarray(values, dtype=float)
    se = np.asarray(standard_errors, dtype=float)
    if x.ndim != 1 or se.shape != x.shape:
        raise InputError("values and standard_errors must be sequences of the same length")
    if not math.isfinite(target):
        raise InputError("target must be finite")
    if np.any(se < 0):
        raise InputError("standard errors must not be negative")
    usable = np.isfinite(x) & np.isfinite(se) & (se > 0)
    z = np.full(x.shape, np.nan)
    z[usable] = (x[usable] - target) / se[usable]
    return z


def _standardize_proportions(
    successes: ArrayLike, trials: ArrayLike, target_rate: float
) -> NDArray[np.float64]:
    s = np.asarray(successes)
    n = np.asarray(trials)
    if s.ndim != 1 or n.shape != s.shape:
        raise InputError("successes and trials must be sequences of the same length")
    if s.size and (
        not np.issubdtype(s.dtype, np.integer)
        or not np.issubdtype(n.dtype, np.integer)
        or s.dtype == np.bool_
        or n.dtype == np.bool_
    ):
        raise InputError("successes and trials must be whole-number counts")
    if np.any(s < 0) or np.any(s > n):
        raise InputError("counts must satisfy 0 <= successes <= trials")
    if not 0.0 < target_rate < 1.0:
        raise InputError(f"target_rate must lie strictly between 0 and 1, got {target_rate}")
    z = np.full(s.shape, np.nan)
    used = n > 0
    # Binomial standard error under the in-control rate p0, not the window's own p̂,
    # so that a window with p̂ = 0 or 1 still has a finite z.
    se = np.sqrt(target_rate * (1.0 - target_rate) / n[used])
    z[used] = (s[used] / n[used] - target_rate) / se
    return z


def _cusum(z: NDArray[np.float64], k: float, h: float, side: Side, method: str) -> CusumResult:
    if not (math.isfinite(k) and k >= 0):
        raise InputError(f"k must be finite and non-negative, got {k}")
    if not (math.isfinite(h) and h > 0):
        raise InputError(f"h must be finite and positive, got {h}")
    _check_side(side)
    watch_upper = side in ("both", "upper")
    watch_lower = side in ("both", "lower")
    upper: list[float] = []
    lower: list[float] = []
    alarms: list[int] = []
    skipped: list[int] = []
    c_plus = c_minus = 0.0
    for t, zt in enumerate(z.tolist()):
        if zt != zt:  # NaN: the window's statistic is undefined
            skipped.append(t)
            upper.append(c_plus)
            lower.append(c_minus)
            continue
        # Page (1954), tabular form (Montgomery 2009, §9.1):
        # C⁺_t = max(0, C⁺_{t−1} + z_t − k),  C⁻_t = max(0, C⁻_{t−1} − z_t − k)
        c_plus = max(0.0, c_plus + zt - k)
        c_minus = max(0.0, c_minus - zt - k)
        upper.append(c_plus)
        lower.append(c_minus)
        if (watch_upper and c_plus > h) or (watch_lower and c_minus > h):
            alarms.append(t)
            c_plus = c_minus = 0.0
    return CusumResult(
        method,
        tuple(z.tolist()),
        tuple(upper),
        tuple(lower),
        k,
        h,
        side,
        tuple(alarms),
        alarms[0] if alarms else None,
        tuple(skipped),
    )


def _ewma(z: NDArray[np.float64], lam: float, width: float, side: Side, method: str) -> EwmaResult:
    if not 0.0 < lam <= 1.0:
        raise InputError(f"lam must lie in (0, 1], got {lam}")
    if not (math.isfinite(width) and width > 0):
        raise InputError(f"width must be finite and positive, got {width}")
    _check_side(side)
    # Roberts (1959); asymptotic limit ±L·σ·sqrt(λ / (2 − λ)) with σ = 1 after standardizing.
    limit = width * math.sqrt(lam / (2.0 - lam))
    watch_upper = side in ("both", "upper")
    watch_lower = side in ("both", "lower")
    statistic: list[float] = []
    alarms: list[int] = []
    skipped: list[int] = []
    current = 0.0
    for t, zt in enumerate(z.tolist()):
        if zt != zt:  # NaN: the window's statistic is undefined
            skipped.append(t)
            statistic.append(current)
            continue
        # Roberts (1959): w_t = λ z_t + (1 − λ) w_{t−1}, w_0 = 0 (the target).
        current = lam * zt + (1.0 - lam) * current
        statistic.append(current)
        if (watch_upper and current > limit) or (watch_lower and current < -limit):
            alarms.append(t)
            current = 0.0
    return EwmaResult(
        method,
        tuple(z.tolist()),
        tuple(statistic),
        lam,
        width,
        limit,
        side,
        tuple(alarms),
        alarms[0] if alarms else None,
        tuple(skipped),
    )


def cusum_chart(
    values: ArrayLike,
    standard_errors: ArrayLike,
    *,
    target: float,
    k: float = DEFAULT_CUSUM_K,
    h: float = DEFAULT_CUSUM_H,
    side: Side = "both",
) -> CusumResult:
    """Run a standardized normal tabular CUSUM over per-window estimates.

    Parameters
    ----------
    values
        Estimate per window (e.g. AUC). NaN marks a window to skip.
    standard_errors
        Standard error of each estimate; a zero or NaN one skips the window.
    target
        In-control value of the metric (e.g. the pre-registered validation estimate).
    k
        Reference value in σ units; half the shift to detect quickly.
    h
        Decision interval in σ units (see :func:`siegmund_arl`).
    side
        ``"upper"``, ``"lower"`` or ``"both"``.

    References
    ----------
    Page ES (1954). Biometrika 41:100–115. doi:10.1093/biomet/41.1-2.100
    Montgomery DC (2009). Introduction to Statistical Quality Control, 6th ed., §9.1.
    """
    z = _standardize_values(values, standard_errors, target)
    return _cusum(z, k, h, side, "standardized normal CUSUM")


def cusum_chart_proportion(
    successes: ArrayLike,
    trials: ArrayLike,
    *,
    target_rate: float,
    k: float = DEFAULT_CUSUM_K,
    h: float = DEFAULT_CUSUM_H,
    side: Side = "both",
) -> CusumResult:
    """Run a standardized binomial CUSUM over per-window proportions (e.g. sensitivity).

    Each window's proportion is standardized with the binomial standard error at
    ``target_rate`` (normal approximation); a window with no trials is skipped. To watch
    for a fall in sensitivity use ``side="lower"``.

    Parameters
    ----------
    successes, trials
        Counts per window (true positives, diseased cases).
    target_rate
        In-control proportion ``p0``, strictly between 0 and 1.
    k, h, side
        As in :func:`cusum_chart`.

    References
    ----------
    Page ES (1954). Biometrika 41:100–115. doi:10.1093/biomet/41.1-2.100
    Hawkins DM, Olwell DH (1998). Cumulative Sum Charts and Charting for Quality
    Improvement. Springer. doi:10.1007/978-1-4612-1686-5
    """
    z = _standardize_proportions(successes, trials, target_rate)
    return _cusum(z, k, h, side, "standardized binomial CUSUM")


def ewma_chart(
    values: ArrayLike,
    standard_errors: ArrayLike,
    *,
    target: float,
    lam: float = DEFAULT_EWMA_LAMBDA,
    width: float = DEFAULT_EWMA_WIDTH,
    side: Side = "both",
) -> EwmaResult:
    """Run an EWMA chart over per-window estimates standardized against ``target``.

    Parameters
    ----------
    values, standard_errors, target, side
        As in :func:`cusum_chart`.
    lam
        Smoothing weight λ in (0, 1]; small λ remembers more windows.
    width
        Limit width L in σ units of the EWMA's asymptotic standard deviation.

    References
    ----------
    Roberts SW (1959). Technometrics 1:239–250. doi:10.1080/00401706.1959.10489860
    Lucas JM, Saccucci MS (1990). Technometrics 32:1–12. doi:10.1080/00401706.1990.10484583
    """
    z = _standardize_values(values, standard_errors, target)
    return _ewma(z, lam, width, side, "standardized normal EWMA")


def ewma_chart_proportion(
    successes: ArrayLike,
    trials: ArrayLike,
    *,
    target_rate: float,
    lam: float = DEFAULT_EWMA_LAMBDA,
    width: float = DEFAULT_EWMA_WIDTH,
    side: Side = "both",
) -> EwmaResult:
    """Run an EWMA chart over standardized per-window proportions.

    Parameters
    ----------
    successes, trials, target_rate
        As in :func:`cusum_chart_proportion`.
    lam, width, side
        As in :func:`ewma_chart`.

    References
    ----------
    Roberts SW (1959). Technometrics 1:239–250. doi:10.1080/00401706.1959.10489860
    Lucas JM, Saccucci MS (1990). Technometrics 32:1–12. doi:10.1080/00401706.1990.10484583
    """
    z = _standardize_proportions(successes, trials, target_rate)
    return _ewma(z, lam, width, side, "standardized binomial EWMA")


def self_starting_z(values: ArrayLike, baseline_windows: int) -> NDArray[np.float64]:
    """Return Hawkins' self-starting standardized values of the windows after the baseline.

    The in-control mean and SD are not taken as known: window ``n`` (counting the finite
    values from the first) is compared with the mean ``x̄`` and SD ``s`` of the ``n − 1``
    finite values before it, baseline included::

        T_n = (x_n − x̄_{n−1}) / (s_{n−1} · sqrt(1 + 1/(n − 1)))   ~ t with n − 2 df
        U_n = Φ⁻¹(F_{t, n−2}(T_n))                                 ~ N(0, 1), independent

    while the process is in control and normal (Hawkins 1987). The uncertainty of the
    estimated mean and SD is in the t distribution, so charts on ``U`` keep the published
    run lengths even when the baseline is a handful of windows, and the SD is that of the
    windows themselves (extra noise between windows included), not a within-window
    standard error. Windows before ``baseline_windows`` only feed the running estimates;
    NaN values are skipped (NaN ``U``); a window with fewer than two finite values before
    it, or with ``s = 0``, has NaN ``U``.

    References
    ----------
    Hawkins DM (1987). Self-starting CUSUM charts for location and scale. Journal of the
    Royal Statistical Society, Series D (The Statistician) 36:299–316.
    doi:10.2307/2348827
    Hawkins DM, Olwell DH (1998). Cumulative Sum Charts and Charting for Quality
    Improvement. Springer, section 7.2. doi:10.1007/978-1-4612-1686-5
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise InputError("values must be a one-dimensional sequence")
    if not 0 <= baseline_windows <= x.size:
        raise InputError("baseline_windows must lie between 0 and the number of windows")
    u = np.full(x.size - baseline_windows, np.nan)
    seen: list[float] = []
    for t, xt in enumerate(x.tolist()):
        if not math.isfinite(xt):
            continue
        n = len(seen) + 1
        if t >= baseline_windows and n >= 3:
            mean = float(np.mean(seen))
            sd = float(np.std(seen, ddof=1))
            if sd > 0:
                # Hawkins (1987): T_n = (x_n − x̄_{n−1}) / (s_{n−1} √(1 + 1/(n−1))) ~ t_{n−2}
                tn = (xt - mean) / (sd * math.sqrt(1.0 + 1.0 / (n - 1)))
                u[t - baseline_windows] = float(stats.norm.isf(stats.t.sf(tn, n - 2)))
        seen.append(xt)
    return u


def self_starting_cusum(
    values: ArrayLike,
    baseline_windows: int,
    *,
    k: float = DEFAULT_CUSUM_K,
    h: float = DEFAULT_CUSUM_H,
    side: Side = "both",
) -> CusumResult:
    """Run a tabular CUSUM on :func:`self_starting_z` of the windows after the baseline.

    References
    ----------
    Hawkins DM (1987). The Statistician 36:299–316. doi:10.2307/2348827
    Page ES (1954). Biometrika 41:100–115. doi:10.1093/biomet/41.1-2.100
    """
    return _cusum(self_starting_z(values, baseline_windows), k, h, side, "self-starting CUSUM")


def self_starting_ewma(
    values: ArrayLike,
    baseline_windows: int,
    *,
    lam: float = DEFAULT_EWMA_LAMBDA,
    width: float = DEFAULT_EWMA_WIDTH,
    side: Side = "both",
) -> EwmaResult:
    """Run an EWMA chart on :func:`self_starting_z` of the windows after the baseline.

    References
    ----------
    Hawkins DM (1987). The Statistician 36:299–316. doi:10.2307/2348827
    Roberts SW (1959). Technometrics 1:239–250. doi:10.1080/00401706.1959.10489860
    """
    return _ewma(self_starting_z(values, baseline_windows), lam, width, side, "self-starting EWMA")


def _siegmund_one_sided(delta: float, b: float) -> float:
    if abs(delta) < 1e-12:
        return b * b
    # Siegmund (1985): ARL ≈ (exp(−2Δb) + 2Δb − 1) / (2Δ²)
    return (math.exp(-2.0 * delta * b) + 2.0 * delta * b - 1.0) / (2.0 * delta * delta)


def siegmund_arl(k: float, h: float, *, shift: float = 0.0, side: Side = "both") -> float:
    """Return Siegmund's approximation to the ARL of a CUSUM on a N(shift, 1) sequence.

    For the upper side ``Δ = shift − k``, for the lower side ``Δ = −shift − k``, and
    ``b = h + 1.166``; each side's ARL is ``(exp(−2Δb) + 2Δb − 1) / (2Δ²)`` (``b²`` when
    ``Δ = 0``). Two sides combine as ``1/ARL = 1/ARL⁺ + 1/ARL⁻`` (Montgomery 2009, §9.1).

    Parameters
    ----------
    k, h
        Reference value and decision interval in σ units.
    shift
        Mean of the standardized values, in σ units (0 for the in-control ARL).
    side
        ``"upper"``, ``"lower"`` or ``"both"``.

    References
    ----------
    Siegmund D (1985). Sequential Analysis. Springer, chapter X.
    doi:10.1007/978-1-4757-1862-1
    Montgomery DC (2009). Introduction to Statistical Quality Control, 6th ed., §9.1.
    """
    _check_side(side)
    if not (math.isfinite(k) and k >= 0 and math.isfinite(h) and h > 0):
        raise InputError("k must be non-negative and h positive, both finite")
    if not math.isfinite(shift):
        raise InputError("shift must be finite")
    b = h + SIEGMUND_CORRECTION
    upper = _siegmund_one_sided(shift - k, b)
    lower = _siegmund_one_sided(-shift - k, b)
    if side == "upper":
        return upper
    if side == "lower":
        return lower
    return 1.0 / (1.0 / upper + 1.0 / lower)


def cusum_decision_interval(
    arl0: float, *, k: float = DEFAULT_CUSUM_K, side: Side = "both"
) -> float:
    """Return the decision interval ``h`` whose in-control ARL is ``arl0`` by Siegmund's formula.

    Parameters
    ----------
    arl0
        Wanted in-control average run length, in windows (e.g. 370).
    k, side
        As in :func:`siegmund_arl`.

    References
    ----------
    Siegmund D (1985). Sequential Analysis. Springer, chapter X.
    doi:10.1007/978-1-4757-1862-1
    """
    _check_side(side)
    if not (k > 0 and math.isfinite(k)):
        raise InputError(f"k must be finite and positive, got {k}")
    low, high = 1e-9, 50.0
    smallest, largest = siegmund_arl(k, low, side=side), siegmund_arl(k, high, side=side)
    if not (math.isfinite(arl0) and smallest < arl0 < largest):
        raise InputError(f"arl0 must lie between {smallest:.3g} and {largest:.3g}, got {arl0}")
    return float(brentq(lambda h: siegmund_arl(k, h, side=side) - arl0, low, high))
