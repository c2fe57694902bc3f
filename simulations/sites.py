"""Synthetic sites: one table of shifted cases per invented hospital, reproducible by seed.

:func:`build_sites` turns a :class:`~simulations.scenario.Scenario` and a public
:class:`~simulations.dataset.FeatureTable` into one :class:`SyntheticSite` per scenario site.
The public cases are first split (stratified by label) into a development pool, a share
``scenario.development_share`` of them, and an external pool; the development site draws from
the first and every other site from the second, so no external site holds a shifted copy of
a case the model was trained on. Site ``i`` draws with its own generator
(``SeedSequence(scenario.seed, spawn_key=(i + 1,))``), so adding sites leaves earlier ones
unchanged.

Each site table holds, per observation: ``case_id`` (site code prefix), ``patient_id``
(a patient has one or more observations, all with the same label), ``acquired_on`` (ISO
date, uniform over the scenario span), ``label``, the attributes ``scanner_vendor``,
``field_strength`` (per observation) and ``sex``, ``age_band`` (per patient), the
``reader_<name>`` calls, and the shifted ``feature_*`` columns. Rows are in date order.

Invented data for rehearsal only.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pandas as pd

from simulations.dataset import FeatureTable
from simulations.readers import reader_columns
from simulations.scenario import Scenario, SiteSpec
from simulations.shifts import (
    ReferenceStats,
    apply_acquisition_shift,
    jitter_duplicates,
    sample_population,
)
from site_agent.exceptions import ScenarioError
from site_agent.training.splits import grouped_train_test_split

ID_COLUMNS = ("case_id", "patient_id", "acquired_on", "label")
ATTRIBUTE_COLUMNS = ("scanner_vendor", "field_strength", "sex", "age_band")
DEFAULT_TEST_FRACTION = 0.3


@dataclass(frozen=True)
class SyntheticSite:
    """One invented hospital's case table and how it was made; treat ``table`` as read-only.

    Attributes
    ----------
    name, code
        Hospital name and the prefix of its case and patient ids.
    table
        One row per observation (columns in the module docstring).
    n_resampled
        Rows that are jittered with-replacement duplicates of a pool case.
    spec
        The scenario entry the site was built from (its shifts and case mix).
    is_development
        Whether this is where the model is developed.
    resampled_ids
        ``case_id`` of every resampled row, so that a table cut in time (a drift event)
        can count the duplicates it keeps.
    """

    name: str
    code: str
    table: pd.DataFrame
    n_resampled: int
    spec: SiteSpec
    is_development: bool
    resampled_ids: frozenset[str] = frozenset()

    @property
    def shift_description(self) -> str:
        """One line saying how this site differs from the public data."""
        spec, acq = self.spec, self.spec.acquisition
        parts = [f"prevalence {spec.prevalence:g}"]
        if spec.covariate_shift:
            direction = "larger" if spec.covariate_shift > 0 else "smaller"
            parts.append(f"case mix toward {direction} lesions (beta {spec.covariate_shift:g})")
        if acq.intensity_gain != 1 or acq.intensity_offset != 0:
            parts.append(
                f"intensity gain {acq.intensity_gain:g}, offset {acq.intensity_offset:g} SD"
            )
        if acq.texture_gain != 1:
            parts.append(f"texture gain {acq.texture_gain:g}")
        if acq.shape_smoothing:
            parts.append(f"shape smoothing {acq.shape_smoothing:g}")
        if acq.noise_sd:
            parts.append(f"measurement noise {acq.noise_sd:g} SD")
        if acq.corruption_sd:
            which = ", ".join(f"'{f}'" for f in acq.corrupted_features)
            parts.append(f"unreliable {which} features (log-scale error SD {acq.corruption_sd:g})")
        if self.n_resampled:
            parts.append(f"{self.n_resampled} resampled cases")
        return "; ".join(parts)


def build_sites(scenario: Scenario, dataset: FeatureTable) -> list[SyntheticSite]:
    """Build every site of ``scenario`` from ``dataset``; identical output for the same seed.

    Raises
    ------
    ScenarioError
        If a site asks for a covariate shift and the dataset has no lesion-size feature.
    site_agent.exceptions.InputError
        If a case pool lacks a class.
    """
    reference = ReferenceStats.of(dataset.features)
    if dataset.size_feature is None:
        for spec in scenario.sites:
            if spec.covariate_shift != 0:
                raise ScenarioError(
                    f"site {spec.name!r}: covariate_shift needs a lesion-size feature"
                )
        size_z = np.zeros(dataset.n_cases)
    else:
        column = dataset.size_feature
        size_z = (
            (dataset.features[column] - reference.means[column]) / reference.sds[column]
        ).to_numpy(dtype=np.float64)
    development_pool, external_pool = _split_pool(
        dataset.labels, scenario.development_share, _rng(scenario.seed, 0)
    )
    codes = scenario.site_codes()
    sites = []
    for i, spec in enumerate(scenario.sites):
        is_development = i == scenario.development_index
        pool = development_pool if is_development else external_pool
        if len(scenario.sites) == 1:
            pool = np.arange(dataset.n_cases)
        sites.append(
            _build_site(
                spec,
                codes[i],
                is_development,
                pool,
                dataset,
                size_z,
                reference,
                scenario,
                _rng(scenario.seed, i + 1),
            )
        )
    return sites


def development_split(
    site: SyntheticSite, test_fraction: float = DEFAULT_TEST_FRACTION, seed: int = 0
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split a site's table into ``(train_frame, eval_frame)`` by patient, stratified by label.

    Whole patients go to one side (:func:`site_agent.training.splits.grouped_train_test_split`), so
    no patient's observations straddle the split; about ``test_fraction`` of patients are
    held out. Model development uses the training part only; the site evaluates on the
    held-out part.

    Raises
    ------
    InputError
        If ``test_fraction`` is not in (0, 1) or there are fewer than two patients.
    """
    table = site.table
    train, test = grouped_train_test_split(
        table["label"].to_numpy(), table["patient_id"].to_numpy(), test_fraction, seed
    )
    return (
        table.iloc[train].reset_index(drop=True),
        table.iloc[test].reset_index(drop=True),
    )


def write_site_tables(sites: list[SyntheticSite], directory: Path | str) -> dict[str, Path]:
    """Write one CSV per site (``<site-slug>.csv``) and return the paths by site name."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    for site in sites:
        path = directory / f"{site.spec.slug}.csv"
        site.table.to_csv(path, index=False)
        paths[site.name] = path
    return paths


def _rng(seed: int, stream: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(stream,)))


def _split_pool(
    labels: npt.NDArray[np.int64], share: float, rng: np.random.Generator
) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Split case positions into a development and an external pool, stratified by label."""
    development, external = [], []
    for label in (0, 1):
        members = rng.permutation(np.flatnonzero(labels == label))
        cut = min(max(round(len(members) * share), 1), max(len(members) - 1, 1))
        development.append(members[:cut])
        external.append(members[cut:])
    return (
        np.sort(np.concatenate(development)).astype(np.int64),
        np.sort(np.concatenate(external)).astype(np.int64),
    )


def _build_site(
    spec: SiteSpec,
    code: str,
    is_development: bool,
    pool: npt.NDArray[np.int64],
    dataset: FeatureTable,
    size_z: npt.NDArray[np.float64],
    reference: ReferenceStats,
    scenario: Scenario,
    rng: np.random.Generator,
) -> SyntheticSite:
    sample = sample_population(
        dataset.labels[pool], size_z[pool], spec.n_cases, spec.prevalence, spec.covariate_shift, rng
    )
    rows = pool[sample.indices]
    features = dataset.features.iloc[rows].reset_index(drop=True)
    features = jitter_duplicates(
        features, sample.resampled, reference, scenario.resample_jitter, rng
    )
    features = apply_acquisition_shift(features, spec.acquisition, dataset.groups, reference, rng)
    labels = dataset.labels[rows]
    n = len(labels)

    patient = _assign_patients(labels, spec.observations_per_patient, rng)
    n_patients = int(patient.max()) + 1
    sex = _draw(spec.sex_mix, n_patients, rng)[patient]
    age_band = _draw(spec.age_band_mix, n_patients, rng)[patient]
    start = pd.Timestamp(scenario.start_date)
    span_days = ((start + pd.DateOffset(months=scenario.months)) - start).days
    days = rng.integers(0, span_days, size=n)

    table = pd.DataFrame(
        {
            "patient_index": patient,
            "acquired_on": start + pd.to_timedelta(days, unit="D"),
            "label": labels.astype(np.int64),
            "scanner_vendor": _draw(spec.vendor_mix, n, rng),
            "field_strength": _draw(spec.field_strength_mix, n, rng),
            "sex": sex,
            "age_band": age_band,
            **reader_columns(labels, spec.readers, rng),
            "_resampled": sample.resampled,
        }
    )
    table = pd.concat([table, features], axis=1)
    table = table.iloc[rng.permutation(n)].sort_values("acquired_on", kind="stable")
    table = table.reset_index(drop=True)
    # Patients are numbered in order of their first observation.
    first_seen = {p: k for k, p in enumerate(pd.unique(table["patient_index"]))}
    width = max(5, len(str(n)))
    table.insert(0, "case_id", [f"{code}-{k + 1:0{width}d}" for k in range(n)])
    table.insert(
        1,
        "patient_id",
        [f"{code}-P{first_seen[p] + 1:0{width}d}" for p in table["patient_index"]],
    )
    resampled_ids = frozenset(table.loc[table["_resampled"], "case_id"])
    table = table.drop(columns=["patient_index", "_resampled"])
    table["acquired_on"] = table["acquired_on"].dt.strftime("%Y-%m-%d")
    return SyntheticSite(
        name=spec.name,
        code=code,
        table=table,
        n_resampled=sample.n_resampled,
        spec=spec,
        is_development=is_development,
        resampled_ids=resampled_ids,
    )


def _assign_patients(
    labels: npt.NDArray[np.int64], mean_observations: float, rng: np.random.Generator
) -> npt.NDArray[np.int64]:
    """Group cases of the same label into patients of size 1 + Poisson(mean - 1)."""
    patient = np.empty(len(labels), dtype=np.int64)
    next_id = 0
    for label in (0, 1):
        members = rng.permutation(np.flatnonzero(labels == label))
        start = 0
        while start < len(members):
            size = 1 + int(rng.poisson(mean_observations - 1.0))
            patient[members[start : start + size]] = next_id
            next_id += 1
            start += size
    return patient


def _draw(mix: dict[str, float], n: int, rng: np.random.Generator) -> npt.NDArray[np.str_]:
    categories = list(mix)
    probabilities = np.array([mix[c] for c in categories], dtype=np.float64)
    return np.asarray(categories)[
        rng.choice(len(categories), size=n, p=probabilities / probabilities.sum())
    ]
