"""Simulated human readers: calls on each case at a set sensitivity and specificity.

A *binary* reader calls each case independently: positive with probability
``sensitivity`` when the case has disease, with probability ``1 - specificity`` when not.

An *ordinal* reader scores 1..5 (5 = most suspicious) from the binormal model of ROC
analysis: a latent suspicion ``t`` is N(0, 1) for cases without disease and N(mu, 1) for
cases with disease, and cut at four points ``c_1 < ... < c_4`` spaced
:data:`ORDINAL_CUT_SPACING` latent SDs apart. ``c_2`` is placed so that a score of 3 or more
(``t >= c_2``) is a positive call at exactly the stated sensitivity and specificity:
``c_2 = Phi^-1(specificity)`` and ``mu = c_2 + Phi^-1(sensitivity)``.

References
----------
D.D. Dorfman, E. Alf (1969). Maximum-likelihood estimation of parameters of signal-detection
theory and determination of confidence intervals -- rating-method data. Journal of
Mathematical Psychology 6(3):487-496. DOI: 10.1016/0022-2496(69)90019-4
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
from scipy.stats import norm

from simulations.scenario import ReaderSpec

READER_PREFIX = "reader_"
ORDINAL_CUT_SPACING = 0.75
"""Distance between adjacent latent cut points of an ordinal reader, in latent SDs."""


def binary_calls(
    labels: npt.NDArray[np.int64], sensitivity: float, specificity: float, rng: np.random.Generator
) -> npt.NDArray[np.int64]:
    """Return 0/1 calls: P(1 | label 1) = sensitivity, P(0 | label 0) = specificity."""
    p_positive = np.where(labels == 1, sensitivity, 1.0 - specificity)
    return (rng.random(len(labels)) < p_positive).astype(np.int64)


def ordinal_scores(
    labels: npt.NDArray[np.int64], sensitivity: float, specificity: float, rng: np.random.Generator
) -> npt.NDArray[np.int64]:
    """Return 1..5 scores (binormal model); score >= 3 has the given sensitivity, specificity."""
    c2 = float(norm.ppf(specificity))
    mu = c2 + float(norm.ppf(sensitivity))
    cuts = c2 + ORDINAL_CUT_SPACING * np.array([-1.0, 0.0, 1.0, 2.0])
    latent = rng.standard_normal(len(labels)) + mu * (labels == 1)
    scores = 1 + np.searchsorted(cuts, latent, side="right")
    return np.asarray(scores, dtype=np.int64)


def reader_columns(
    labels: npt.NDArray[np.int64], readers: Sequence[ReaderSpec], rng: np.random.Generator
) -> dict[str, npt.NDArray[np.int64]]:
    """Return one column of calls per reader, keyed ``reader_<name>``, in reader order."""
    columns: dict[str, npt.NDArray[np.int64]] = {}
    for reader in readers:
        make = ordinal_scores if reader.ordinal else binary_calls
        columns[READER_PREFIX + reader.name] = make(
            labels, reader.sensitivity, reader.specificity, rng
        )
    return columns
