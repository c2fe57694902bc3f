"""Per-site effect sizes on a scale fit for pooling by a meta-analysis.

Each helper turns what a site released (an AUC and its standard error, or the cells of a
2×2 table) into an estimate ``y_i`` and its within-site sampling variance ``v_i`` on a
scale where a normal approximation is reasonable: :func:`logit_auc`,
:func:`logit_sensitivity`, :func:`logit_specificity` (logit scale) and
:func:`log_diagnostic_odds_ratio` (log scale). Zero cells get the 0.5 continuity
correction, at the affected sites only, and the result says which sites got it.

References
----------
Woolf B (1955). On estimating the relation between blood group and disease. Annals of
    Human Genetics 19(4):251-253. doi:10.1111/j.1469-1809.1955.tb01348.x
Glas AS, Lijmer JG, Prins MH, Bonsel GJ, Bossuyt PMM (2003). The diagnostic odds ratio:
    a single indicator of test performance. Journal of Clinical Epidemiology
    56(11):1129-1135. doi:10.1016/S0895-4356(03)00177-X
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from site_agent.exceptions import InputError

Transform = Literal["identity", "logit", "log"]
FloatArray = NDArray[np.float64]

CONTINUITY_CORRECTION = 0.5


@dataclass(frozen=True, slots=True)
class EffectSizes:
    """Per-site estimates and variances on an analysis scale, ready for a meta-analysis.

    Pass them to :func:`~coordinator.pooling.meta_analysis.meta_analyze`.

    Parameters
    ----------
    estimates, variances
        One value per site, on the scale named by ``transform``.
    transform
        The scale of ``estimates``: pass it on as ``meta_analyze(..., transform=...)``.
    corrected
        Indices (0-based) of sites whose counts received the 0.5 continuity correction.
    notes
        How the values were derived, in words fit for a report.
    """

    estimates: tuple[float, ...]
    variances: tuple[float, ...]
    transform: Transform
    corrected: tuple[int, ...] = ()
    notes: tuple[str, ...] = ()


def logit_auc(auc: ArrayLike, se: ArrayLike) -> EffectSizes:
    """Put AUCs on the logit scale with delta-method variances.

    ``y = log(auc / (1 - auc))`` and ``Var(y) = se² / (auc (1 - auc))²``, the first-order
    delta method (common practice).

    Raises
    ------
    InputError
        An AUC outside (0, 1), a standard error that is not positive, non-finite values,
        or lengths that differ.
    """
    a = as_vector(auc, "auc")
    s = as_vector(se, "auc_se")
    if a.size != s.size:
        raise InputError(f"auc has {a.size} values but auc_se has {s.size}")
    if np.any((a <= 0.0) | (a >= 1.0)):
        raise InputError("every AUC must lie strictly between 0 and 1 to be put on the logit scale")
    if np.any(s <= 0.0):
        raise InputError("every AUC standard error must be positive")
    y = np.log(a / (1.0 - a))
    var = s**2 / (a * (1.0 - a)) ** 2  # delta method: d logit(p)/dp = 1 / (p (1 - p))
    return EffectSizes(
        estimates=tuple(float(x) for x in y),
        variances=tuple(float(x) for x in var),
        transform="logit",
        notes=("AUC analysed on the logit scale; variance by the delta method",),
    )


def logit_sensitivity(tp: ArrayLike, fn: ArrayLike) -> EffectSizes:
    """Logit sensitivity ``tp / (tp + fn)`` per site; see :func:`_logit_proportion`."""
    return _logit_proportion(tp, fn, "sensitivity", ("tp", "fn"))


def logit_specificity(tn: ArrayLike, fp: ArrayLike) -> EffectSizes:
    """Logit specificity ``tn / (tn + fp)`` per site; see :func:`_logit_proportion`."""
    return _logit_proportion(tn, fp, "specificity", ("tn", "fp"))


def log_diagnostic_odds_ratio(
    tp: ArrayLike, fp: ArrayLike, fn: ArrayLike, tn: ArrayLike
) -> EffectSizes:
    """Log diagnostic odds ratio ``log(tp·tn / (fp·fn))`` per site, with Woolf's variance.

    ``Var = 1/tp + 1/fp + 1/fn + 1/tn`` (Woolf 1955; Glas et al. 2003). A site with a
    zero cell gets 0.5 added to all four of its cells; other sites are left as they are.

    Raises
    ------
    InputError
        Counts that are negative, not whole numbers, or lengths that differ.

    References
    ----------
    Glas AS et al. (2003). J Clin Epidemiol 56(11):1129-1135.
    doi:10.1016/S0895-4356(03)00177-X
    """
    cells = [_counts(x, name) for x, name in ((tp, "tp"), (fp, "fp"), (fn, "fn"), (tn, "tn"))]
    _same_length(cells, ("tp", "fp", "fn", "tn"))
    table = np.vstack(cells)
    zero = np.any(table == 0, axis=0)
    table = table + CONTINUITY_CORRECTION * zero  # only sites with a zero cell
    a, b, c, d = table
    y = np.log(a * d / (b * c))
    var = 1.0 / a + 1.0 / b + 1.0 / c + 1.0 / d  # Woolf (1955)
    corrected = tuple(int(i) for i in np.flatnonzero(zero))
    return EffectSizes(
        estimates=tuple(float(x) for x in y),
        variances=tuple(float(x) for x in var),
        transform="log",
        corrected=corrected,
        notes=_correction_notes("diagnostic odds ratio analysed on the log scale", corrected),
    )


def _logit_proportion(
    events: ArrayLike, others: ArrayLike, what: str, names: tuple[str, str]
) -> EffectSizes:
    """Logit of ``events / (events + others)`` with variance ``1/events + 1/others``.

    A site with a zero cell gets 0.5 added to both of its cells (common practice);
    other sites are left as they are. A site with no cases at all is invalid input.
    """
    x = _counts(events, names[0])
    r = _counts(others, names[1])
    _same_length([x, r], names)
    if np.any(x + r == 0):
        raise InputError(f"{what} is undefined at a site where {names[0]} + {names[1]} is 0")
    zero = (x == 0) | (r == 0)
    x = x + CONTINUITY_CORRECTION * zero
    r = r + CONTINUITY_CORRECTION * zero
    y = np.log(x / r)
    var = 1.0 / x + 1.0 / r  # delta method for logit of a binomial proportion
    corrected = tuple(int(i) for i in np.flatnonzero(zero))
    return EffectSizes(
        estimates=tuple(float(v) for v in y),
        variances=tuple(float(v) for v in var),
        transform="logit",
        corrected=corrected,
        notes=_correction_notes(f"{what} analysed on the logit scale", corrected),
    )


def _correction_notes(first: str, corrected: tuple[int, ...]) -> tuple[str, ...]:
    if not corrected:
        return (first,)
    return (
        first,
        f"0.5 added to every cell of {len(corrected)} site(s) with a zero cell "
        "(continuity correction; other sites unchanged)",
    )


def as_vector(values: ArrayLike, name: str) -> FloatArray:
    """Return ``values`` as a one-dimensional array of finite floats, or raise naming ``name``."""
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be numbers") from exc
    if arr.ndim != 1:
        raise InputError(f"{name} must be a one-dimensional sequence")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} contains a value that is not a finite number")
    return arr


def _counts(values: ArrayLike, name: str) -> FloatArray:
    arr = as_vector(values, name)
    if np.any(arr < 0) or np.any(arr != np.round(arr)):
        raise InputError(f"{name} counts must be non-negative whole numbers")
    return arr


def _same_length(arrays: Sequence[FloatArray], names: Sequence[str]) -> None:
    if len({a.size for a in arrays}) > 1:
        raise InputError(f"{', '.join(names)} must have the same number of values")
