"""Differential privacy for released counts, and the per-study epsilon budget.

Noise: each released count gets independent discrete Laplace noise from OpenDP's
``make_laplace`` over integer vectors (``l1_distance``), scale ``b = Δ₁ / ε``, where
``Δ₁`` is how much one case can change the whole vector in L1 norm. The noisy counts
are then clamped at zero, which is post-processing and costs no privacy.
:func:`noised_release` applies this to a whole :class:`~site_agent.contract.release.SiteRelease`:
per-bin float sums get continuous Laplace noise at the same scale, and the estimates
whose sensitivity is not bounded (exact AUCs, calibration fit, patient moments) are
withheld. The unit of privacy is one case (observation), not one patient.

Budget: sequential composition (Dwork & Roth 2014, Theorem 3.16): the epsilon of a
study at a site is the sum of the epsilons of its releases. The sum is read from the
release ledger, which records the epsilon of every release, so the ledger is the one
account and a site cannot lose track of it by restarting.

References
----------
.. [1] C. Dwork and A. Roth, "The Algorithmic Foundations of Differential Privacy",
   Foundations and Trends in Theoretical Computer Science 9(3-4), 2014,
   doi:10.1561/0400000042. Laplace mechanism (Def. 3.3, Thm. 3.6), composition (Thm. 3.16).
.. [2] A. Ghosh, T. Roughgarden and M. Sundararajan, "Universally Utility-Maximizing
   Privacy Mechanisms", SIAM J. Computing 41(6), 2012, doi:10.1137/09076828X
   (the geometric, i.e. discrete Laplace, mechanism).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from site_agent.contract.release import AucRecord, CalibrationRecord, EstimateRecord, SiteRelease
from site_agent.disclosure.policy import PrivacySettings, exact_cells
from site_agent.exceptions import InputError
from site_agent.statistics.summaries import (
    CalibrationBins,
    ConfusionCounts,
    ScoreHistogram,
    SufficientStatistics,
)

WITHHELD = "withheld by the site's differential privacy setting"
"""Reason given in place of an estimate that noise cannot protect."""

# Slack for floating-point sums of epsilons (e.g. ten releases of 0.1 against 1.0).
_EPSILON_SLACK = 1e-9


@functools.cache
def _opendp() -> Any:
    """Import OpenDP on first use: it costs seconds, and most releases add no noise."""
    import opendp.prelude as dp

    dp.enable_features("contrib")
    return dp


def laplace_scale(*, epsilon: float, sensitivity: int) -> float:
    """Return the Laplace scale ``b = Δ₁ / ε`` (Dwork & Roth 2014, Def. 3.3)."""
    if not (epsilon > 0 and math.isfinite(epsilon)):
        raise InputError("epsilon must be a positive finite number")
    if sensitivity < 1:
        raise InputError("sensitivity must be a positive integer")
    return sensitivity / epsilon


def noisy_counts(counts: Sequence[int], *, epsilon: float, sensitivity: int) -> list[int]:
    """Return ``counts`` with discrete Laplace noise, clamped to non-negative integers.

    Parameters
    ----------
    counts
        Non-negative integer counts released together.
    epsilon
        Privacy loss of this release of ``counts``.
    sensitivity
        L1 sensitivity of the whole vector: the most one case can change it in total.

    Raises
    ------
    InputError
        If a count is negative or the parameters are not positive.
    """
    values = [int(c) for c in counts]
    if any(v < 0 for v in values):
        raise InputError("counts must be non-negative")
    if not values:
        return []
    scale = laplace_scale(epsilon=epsilon, sensitivity=sensitivity)
    dp = _opendp()
    space = dp.vector_domain(dp.atom_domain(T=int)), dp.l1_distance(T=int)
    measurement = space >> dp.m.then_laplace(scale=scale)
    # OpenDP's own privacy map must confirm the loss we account for.
    if measurement.map(sensitivity) > epsilon * (1 + _EPSILON_SLACK):
        raise InputError("noise scale does not meet the requested epsilon")
    return [max(0, int(v)) for v in measurement(values)]


def noisy_sums(sums: Sequence[float], *, epsilon: float, sensitivity: float) -> list[float]:
    """Return ``sums`` with Laplace noise of scale ``sensitivity / epsilon``, clamped at zero.

    For sums of per-case values in [0, 1] (scores, squared errors): one case changes the
    vector by at most ``sensitivity`` in L1 norm. OpenDP samples the noise exactly on a
    fine grid (see ``make_laplace``).
    """
    values = [float(v) for v in sums]
    if any(not math.isfinite(v) or v < 0 for v in values):
        raise InputError("sums must be non-negative finite numbers")
    if not values:
        return []
    if not (sensitivity > 0 and math.isfinite(sensitivity)):
        raise InputError("sensitivity must be a positive number")
    scale = sensitivity * laplace_scale(epsilon=epsilon, sensitivity=1)
    dp = _opendp()
    space = dp.vector_domain(dp.atom_domain(T=float, nan=False)), dp.l1_distance(T=float)
    measurement = space >> dp.m.then_laplace(scale=scale)
    if measurement.map(float(sensitivity)) > epsilon * (1 + _EPSILON_SLACK):
        raise InputError("noise scale does not meet the requested epsilon")
    return [max(0.0, float(v)) for v in measurement(values)]


@dataclass(frozen=True, slots=True)
class BudgetCheck:
    """Whether a study may spend one more release of epsilon at this site.

    Parameters
    ----------
    spent
        Epsilon already released for the study.
    requested
        Epsilon the next release would spend.
    total
        The study's budget at this site.
    """

    spent: float
    requested: float
    total: float

    @property
    def allowed(self) -> bool:
        """Return whether ``spent + requested`` stays within ``total``."""
        return self.spent + self.requested <= self.total * (1 + _EPSILON_SLACK)

    @property
    def remaining(self) -> float:
        """Return the epsilon left before this release."""
        return max(0.0, self.total - self.spent)


def check_budget(spent: float, settings: PrivacySettings) -> BudgetCheck:
    """Return the budget position of a study that has spent ``spent`` so far."""
    return BudgetCheck(
        spent=spent, requested=settings.release_epsilon, total=settings.study_epsilon
    )


def _int_sensitivity(stats: SufficientStatistics) -> int:
    """Return the most one case changes the integer counts of one statistics set (L1 norm).

    n_observations, its class or pending count, n_patients (3); one confusion cell per
    threshold; one class bin and one ``all`` bin of the histogram (2); one calibration
    count and at most one label (2); one cell per agreement table.
    """
    return 3 + len(stats.confusion) + 2 + 2 + len(stats.agreement)


# Per-bin float sums: Σscore and Σ(score − label)², each moved at most 1 by one case.
_FLOAT_SENSITIVITY = 2


@dataclass(frozen=True, slots=True)
class NoisedRelease:
    """A release with noise on every count and sum, and what that noise was.

    Parameters
    ----------
    release
        The noised release (exact estimates and patient moments emptied).
    noise_scale
        The Laplace scale ``b`` of the noise on every count and sum.
    withheld
        Parts of the release that were emptied because their sensitivity is unbounded.
    """

    release: SiteRelease
    noise_scale: float
    withheld: tuple[str, ...]


def noised_release(release: SiteRelease, epsilon: float) -> NoisedRelease:
    """Add noise to every count and per-bin sum; withhold what has no bounded sensitivity.

    One case is in the site statistics and in at most one level per subgroup attribute,
    so the L1 sensitivity of everything released is ``(1 + attributes) × Δ``. Integer
    counts and float sums share epsilon in proportion to their sensitivities, which gives
    both the same Laplace scale ``b = Δ_total / ε`` (Dwork & Roth 2014, Thm. 3.6, 3.16).
    """
    copies = 1 + len({s.attribute for s in release.subgroups})
    delta_int = copies * _int_sensitivity(release.statistics)
    delta_float = copies * _FLOAT_SENSITIVITY
    eps_int = epsilon * delta_int / (delta_int + delta_float)
    eps_float = epsilon - eps_int
    sets = [release.statistics, *(s.statistics for s in release.subgroups)]
    ints: list[int] = []
    floats: list[float] = []
    for stats in sets:
        ints.extend(_int_fields(stats))
        floats.extend((*stats.calibration.score_sum, *stats.calibration.squared_error_sum))
    noisy_i = iter(noisy_counts(ints, epsilon=eps_int, sensitivity=delta_int))
    noisy_f = iter(noisy_sums(floats, epsilon=eps_float, sensitivity=delta_float))
    rebuilt = [_with_noise(stats, noisy_i, noisy_f) for stats in sets]
    noised = release.model_copy(
        update={
            "statistics": rebuilt[0],
            "exact": release.exact.model_copy(
                update={
                    "auc": _withheld_auc(release.exact.auc),
                    "clustered_auc": _withheld_auc(release.exact.clustered_auc),
                    "calibration": CalibrationRecord(
                        intercept=_withheld_estimate(release.exact.calibration.intercept),
                        slope=_withheld_estimate(release.exact.calibration.slope),
                        reason=WITHHELD,
                    ),
                    "readers": (),
                }
            ),
            "subgroups": tuple(
                sub.model_copy(update={"statistics": stats, "auc": _withheld_auc(sub.auc)})
                for sub, stats in zip(release.subgroups, rebuilt[1:], strict=True)
            ),
        }
    )
    return NoisedRelease(
        release=noised,
        noise_scale=(delta_int + delta_float) / epsilon,
        withheld=("exact", "subgroups.auc", "patient_moments"),
    )


def _int_fields(s: SufficientStatistics) -> list[int]:
    out = [s.n_observations, s.n_positive, s.n_negative, s.n_pending, s.n_patients]
    for c in s.confusion:
        out.extend(exact_cells(c).values())  # noise comes first, on exact counts
    out.extend((*s.histogram.positive, *s.histogram.negative, *s.histogram.all))
    out.extend((*s.calibration.count, *s.calibration.label_sum))
    for t in s.agreement:
        out.extend(v for row in t.exact_counts() for v in row)  # noise comes first
    return out


def _with_noise(s: SufficientStatistics, ints: Any, floats: Any) -> SufficientStatistics:
    def take(n: int) -> tuple[int, ...]:
        return tuple(next(ints) for _ in range(n))

    def take_f(n: int) -> tuple[float, ...]:
        return tuple(next(floats) for _ in range(n))

    totals = take(5)
    confusion = []
    for c in s.confusion:
        tp, fp, fn, tn = take(4)
        confusion.append(ConfusionCounts(threshold=c.threshold, tp=tp, fp=fp, fn=fn, tn=tn))
    bins = len(s.histogram.positive)
    histogram = ScoreHistogram(
        edges=s.histogram.edges, positive=take(bins), negative=take(bins), all=take(bins)
    )
    cal_bins = len(s.calibration.count)
    count, label_sum = take(cal_bins), take(cal_bins)
    calibration = CalibrationBins(
        edges=s.calibration.edges,
        count=count,
        score_sum=take_f(cal_bins),
        label_sum=tuple(min(k, n) for k, n in zip(label_sum, count, strict=True)),
        squared_error_sum=take_f(cal_bins),
    )
    agreement = []
    for t in s.agreement:
        k = len(t.categories)
        flat = take(k * k)
        agreement.append(
            t.model_copy(update={"counts": tuple(flat[i * k : (i + 1) * k] for i in range(k))})
        )
    return SufficientStatistics(
        n_observations=totals[0],
        n_positive=totals[1],
        n_negative=totals[2],
        n_pending=0 if s.pending_withheld else totals[3],
        n_patients=totals[4],
        confusion=tuple(confusion),
        histogram=histogram.model_copy(
            update={
                "all": tuple(
                    max(a, p + n)
                    for a, p, n in zip(
                        histogram.all, histogram.positive, histogram.negative, strict=True
                    )
                )
            }
        ),
        calibration=calibration,
        agreement=tuple(agreement),
        withheld_agreement=s.withheld_agreement,
        pending_withheld=s.pending_withheld,
    )


def _withheld_auc(a: AucRecord) -> AucRecord:
    return AucRecord(
        auc=None,
        variance=None,
        se=None,
        lower=None,
        upper=None,
        logit_lower=None,
        logit_upper=None,
        n_positive=0,
        n_negative=0,
        method=a.method,
        confidence=a.confidence,
        reason=WITHHELD,
    )


def _withheld_estimate(e: EstimateRecord) -> EstimateRecord:
    return EstimateRecord(
        estimate=None,
        lower=None,
        upper=None,
        se=None,
        method=e.method,
        n=0,
        confidence=e.confidence,
        reason=WITHHELD,
    )
