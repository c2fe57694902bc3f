"""Cases needed to estimate sensitivity and specificity to a given precision (Buderer 1996).

Sensitivity is a proportion among the diseased, specificity among the non-diseased, so
the precision of each depends on how many cases of its class the study enrols::

    TP + FN = z² Se (1 - Se) / W²,   N_se = (TP + FN) / prevalence
    FP + TN = z² Sp (1 - Sp) / W²,   N_sp = (FP + TN) / (1 - prevalence)

with ``W`` the half-width of the Wald interval ``p ± z sqrt(p(1 - p)/n)``. The study
needs the larger of ``N_se`` and ``N_sp`` (Buderer 1996). Rounded up to whole cases.

References
----------
Buderer NMF (1996). Statistical methodology: I. Incorporating the prevalence of disease
    into the sample size calculation for sensitivity and specificity. Academic Emergency
    Medicine 3(9):895-900. doi:10.1111/j.1553-2712.1996.tb03538.x
Flahault A, Cadilhac M, Thomas G (2005). Sample size calculation should be performed for
    design accuracy in diagnostic test studies. Journal of Clinical Epidemiology
    58(8):859-862. doi:10.1016/j.jclinepi.2004.12.009
"""

from __future__ import annotations

import math

from coordinator.planning.sample_size import SampleSize, check_fraction, check_positive
from site_agent.statistics.estimates import two_sided_z

SOURCE = "Buderer (1996)"


def cases_for_sensitivity(
    sensitivity: float, prevalence: float, half_width: float, *, confidence: float = 0.95
) -> SampleSize:
    """Return the cases needed for a sensitivity interval of half-width ``half_width``.

    References
    ----------
    Buderer NMF (1996). Acad Emerg Med 3(9):895-900.
    """
    return _cases("sensitivity", sensitivity, prevalence, prevalence, half_width, confidence)


def cases_for_specificity(
    specificity: float, prevalence: float, half_width: float, *, confidence: float = 0.95
) -> SampleSize:
    """Return the cases needed for a specificity interval of half-width ``half_width``.

    References
    ----------
    Buderer NMF (1996). Acad Emerg Med 3(9):895-900.
    """
    return _cases("specificity", specificity, prevalence, 1.0 - prevalence, half_width, confidence)


def _cases(
    what: str,
    proportion: float,
    prevalence: float,
    class_share: float,
    half_width: float,
    confidence: float,
) -> SampleSize:
    check_fraction(proportion, what)
    check_fraction(prevalence, "prevalence")
    check_positive(half_width, "half_width")
    z = two_sided_z(confidence)
    # Buderer (1996): cases of the relevant class = z² p (1 - p) / W²; all cases = that / share.
    in_class = z * z * proportion * (1.0 - proportion) / half_width**2
    n_total = math.ceil(in_class / class_share - 1e-9)  # guard against 172.0000001
    achieved = z * math.sqrt(proportion * (1.0 - proportion) / (n_total * class_share))
    label = "diseased" if what == "sensitivity" else "non-diseased"
    return SampleSize(
        criterion=f"{what} {confidence:.0%} CI half-width <= {half_width:g}",
        n_total=n_total,
        n_events=math.ceil(n_total * prevalence),
        target=half_width,
        achieved=achieved,
        source=SOURCE,
        notes=(
            f"{math.ceil(in_class - 1e-9)} {label} cases at prevalence {prevalence:g}; "
            "Wald interval",
        ),
    )
