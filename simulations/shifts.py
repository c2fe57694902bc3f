"""Dataset shift, as pure functions of a features frame, reference statistics and a generator.

Two kinds of shift make a synthetic site differ from the development site:

*Population shift* (:func:`sample_population`) changes **who** is imaged: the prevalence of
disease and, within each class, the case mix by lesion size. Each case of class ``c`` is drawn
with probability proportional to ``exp(beta * z)``, ``z`` its lesion size standardised with
the reference mean and SD; ``beta > 0`` favours large lesions, ``beta < 0`` small ones. This
is covariate shift in the sense of Shimodaira (2000): P(label | features) is unchanged, the
distribution of features within each class is re-weighted. Cases are drawn without
replacement while the pool allows (each successive draw by the weights of the cases left,
as :meth:`numpy.random.Generator.choice` does), so when a site takes a large part of a class
pool the realised shift is weaker than the weights alone suggest.

*Acquisition shift* (:func:`apply_acquisition_shift`) changes **how** the same case is
measured, acting on feature groups (see :mod:`simulations.dataset`). With ``m_j``, ``s_j`` the
reference mean and SD of feature ``j`` and ``e`` standard normal noise, in this order:

1. intensity-like features: ``x <- intensity_gain * x + intensity_offset * s_j``;
2. texture-like features: ``x <- texture_gain * x``;
3. shape-like features: ``x <- m_j + (1 - shape_smoothing) * (x - m_j)``;
4. every feature: ``x <- x + noise_sd * s_j * e`` (measurement noise);
5. corrupted features (columns whose name contains one of ``corrupted_features``):
   ``x <- x * exp(corruption_sd * e' - corruption_sd**2 / 2)`` with fresh noise ``e'``,
   a multiplicative (log-normal) error that keeps each feature's mean and sign.

Features that are non-negative in the reference (all WDBC features) are clipped at 0 after
noise, since a size or a count cannot be negative. Gain and offset model a scanner's
calibration, texture gain a sharpening or blurring kernel, shape smoothing a
lower-resolution contour, noise a noisier detector; none is fitted to real scanners.
Steps 1-3 are affine per feature, so a model refitted on a handful of the site's labelled
cases can largely undo them. Step 5 is *site-specific feature corruption*, e.g. a
segmentation pipeline whose extreme-value ("worst") measurements are unstable: it destroys
information in some features, so adaptation must learn new weights for the others, which
takes tens to hundreds of cases rather than ten.

When a site asks for more cases of a class than the pool holds, every pool case of that
class is taken once (by the weights, without replacement) and the remainder is drawn with
replacement; each such duplicate gets independent Gaussian jitter (:func:`jitter_duplicates`)
so that it is not an exact copy. The number of duplicates is returned for the report.

References
----------
H. Shimodaira (2000). Improving predictive inference under covariate shift by weighting the
log-likelihood function. Journal of Statistical Planning and Inference 90(2):227-244.
DOI: 10.1016/S0378-3758(00)00115-4

J.G. Moreno-Torres, T. Raeder, R. Alaiz-Rodriguez, N.V. Chawla, F. Herrera (2012). A unifying
view on dataset shift in classification. Pattern Recognition 45(1):521-530.
DOI: 10.1016/j.patcog.2011.06.019
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd

from simulations.dataset import FeatureGroups
from simulations.scenario import AcquisitionShift
from site_agent.exceptions import InputError


@dataclass(frozen=True)
class ReferenceStats:
    """Per-feature statistics of the public dataset that shifts are scaled by.

    Attributes
    ----------
    means, sds
        Mean and SD (SD > 0) per feature column, by name.
    non_negative
        Columns whose reference minimum is >= 0; clipped at 0 after noise and jitter.
    """

    means: pd.Series
    sds: pd.Series
    non_negative: frozenset[str]

    @classmethod
    def of(cls, features: pd.DataFrame) -> ReferenceStats:
        """Compute reference statistics from a features frame (SD 0 is replaced by 1)."""
        sds = features.std(axis=0, ddof=1).fillna(1.0)
        return cls(
            means=features.mean(axis=0),
            sds=sds.where(sds > 0, 1.0),
            non_negative=frozenset(str(c) for c in features.columns if features[c].min() >= 0),
        )


@dataclass(frozen=True)
class PopulationSample:
    """Rows drawn from a pool for one site.

    Attributes
    ----------
    indices
        Positions in the pool, positives first, then negatives.
    resampled
        True where the row is a with-replacement duplicate (jittered later).
    """

    indices: npt.NDArray[np.int64]
    resampled: npt.NDArray[np.bool_]

    @property
    def n_resampled(self) -> int:
        """Number of duplicate rows drawn because a class pool was too small."""
        return int(self.resampled.sum())


def class_counts(n_cases: int, prevalence: float) -> tuple[int, int]:
    """Return ``(n_positive, n_negative)``, rounded, with at least one case of each class."""
    n_positive = min(max(round(n_cases * prevalence), 1), n_cases - 1)
    return n_positive, n_cases - n_positive


def size_weights(size_z: npt.NDArray[np.float64], beta: float) -> npt.NDArray[np.float64]:
    """Return sampling weights ``exp(beta * z)`` normalised to sum to 1.

    Parameters
    ----------
    size_z
        Standardised lesion size of each candidate case.
    beta
        Covariate-shift strength; 0 gives equal weights.
    """
    logits = beta * np.asarray(size_z, dtype=np.float64)
    weights = np.exp(logits - logits.max())  # shift by the max for numerical stability
    return np.asarray(weights / weights.sum(), dtype=np.float64)


def sample_population(
    labels: npt.NDArray[np.int64],
    size_z: npt.NDArray[np.float64],
    n_cases: int,
    prevalence: float,
    beta: float,
    rng: np.random.Generator,
) -> PopulationSample:
    """Draw a site's cases from a pool by prevalence and lesion-size weights.

    Parameters
    ----------
    labels
        0/1 label of each pool case.
    size_z
        Standardised lesion size of each pool case (zeros if the table has none).
    n_cases
        Cases the site holds.
    prevalence
        Fraction of the site's cases with label 1.
    beta
        Covariate-shift strength, see :func:`size_weights`.
    rng
        Source of randomness.

    Raises
    ------
    InputError
        If the pool lacks a class the site needs.
    """
    n_positive, n_negative = class_counts(n_cases, prevalence)
    chosen: list[npt.NDArray[np.int64]] = []
    duplicate: list[npt.NDArray[np.bool_]] = []
    for label, wanted in ((1, n_positive), (0, n_negative)):
        pool = np.flatnonzero(labels == label).astype(np.int64)
        if len(pool) == 0:
            raise InputError(f"the case pool has no cases with label {label}")
        weights = size_weights(size_z[pool], beta)
        first = min(wanted, len(pool))
        unique = rng.choice(pool, size=first, replace=False, p=weights)
        extra = rng.choice(pool, size=wanted - first, replace=True, p=weights)
        chosen.extend([unique.astype(np.int64), extra.astype(np.int64)])
        duplicate.extend([np.zeros(first, dtype=bool), np.ones(wanted - first, dtype=bool)])
    return PopulationSample(indices=np.concatenate(chosen), resampled=np.concatenate(duplicate))


def jitter_duplicates(
    features: pd.DataFrame,
    resampled: npt.NDArray[np.bool_],
    reference: ReferenceStats,
    jitter: float,
    rng: np.random.Generator,
) -> pd.DataFrame:
    """Return a copy with Gaussian jitter of SD ``jitter * s_j`` added to resampled rows.

    Parameters
    ----------
    features
        The site's features, one row per case.
    resampled
        Rows to jitter (with-replacement duplicates).
    reference
        Reference SDs that scale the jitter.
    jitter
        Jitter SD as a fraction of each feature's reference SD; 0 leaves duplicates exact.
    rng
        Source of randomness.
    """
    out = features.copy()
    n = int(resampled.sum())
    if n == 0 or jitter == 0:
        return out
    sds = reference.sds[out.columns].to_numpy(dtype=np.float64)
    rows = out.to_numpy(dtype=np.float64, copy=True)
    rows[resampled] += rng.standard_normal((n, len(sds))) * jitter * sds
    out.loc[:, :] = rows
    return _clip_non_negative(out, reference)


def apply_acquisition_shift(
    features: pd.DataFrame,
    shift: AcquisitionShift,
    groups: FeatureGroups,
    reference: ReferenceStats,
    rng: np.random.Generator,
) -> pd.DataFrame:
    """Return a copy of ``features`` as a site with acquisition ``shift`` would measure them.

    The four steps and their parameters are given in the module docstring. The identity
    shift (gains 1, offset 0, noise 0, smoothing 0) returns the input unchanged.

    Parameters
    ----------
    features
        One row per case, ``feature_*`` columns.
    shift
        ``intensity_gain``, ``intensity_offset`` (in SDs), ``texture_gain``, ``noise_sd``
        (fraction of SD) and ``shape_smoothing`` (fraction toward the mean).
    groups
        Which columns are intensity-, texture- and shape-like.
    reference
        Reference means and SDs.
    rng
        Source of the measurement noise.
    """
    out = features.astype(np.float64)
    intensity = [c for c in groups.intensity if c in out.columns]
    texture = [c for c in groups.texture if c in out.columns]
    shape = [c for c in groups.shape if c in out.columns]
    if intensity:
        offset = shift.intensity_offset * reference.sds[intensity]
        out[intensity] = shift.intensity_gain * out[intensity] + offset
    if texture:
        out[texture] = shift.texture_gain * out[texture]
    if shape:
        centre = reference.means[shape]
        out[shape] = centre + (1.0 - shift.shape_smoothing) * (out[shape] - centre)
    if shift.noise_sd > 0:
        sds = reference.sds[out.columns].to_numpy(dtype=np.float64)
        noise = rng.standard_normal(out.shape) * shift.noise_sd * sds
        out.loc[:, :] = out.to_numpy(dtype=np.float64) + noise
        out = _clip_non_negative(out, reference)
    corrupted = corrupted_columns(tuple(str(c) for c in out.columns), shift.corrupted_features)
    if corrupted and shift.corruption_sd > 0:
        sigma = shift.corruption_sd
        error = np.exp(sigma * rng.standard_normal((len(out), len(corrupted))) - sigma**2 / 2)
        out[corrupted] = out[corrupted].to_numpy(dtype=np.float64) * error
    return out


def corrupted_columns(columns: tuple[str, ...], fragments: tuple[str, ...]) -> list[str]:
    """Return the columns whose name contains any of ``fragments`` (step 5), in order."""
    return [c for c in columns if any(f in c for f in fragments)]


def _clip_non_negative(features: pd.DataFrame, reference: ReferenceStats) -> pd.DataFrame:
    columns = [c for c in features.columns if c in reference.non_negative]
    if columns:
        features[columns] = features[columns].clip(lower=0.0)
    return features
