from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binomtest

from simulations.dataset import load_public_dataset
from simulations.scenario import AcquisitionShift, Scenario, SiteSpec, default_scenario
from simulations.shifts import class_counts
from simulations.sites import (
    ATTRIBUTE_COLUMNS,
    ID_COLUMNS,
    build_sites,
    development_split,
    write_site_tables,
)

DATASET = load_public_dataset()
DEFAULT_SITES = build_sites(default_scenario(), DATASET)


def _scenario(*sites: SiteSpec, seed: int = 7, **fields: object) -> Scenario:
    return Scenario(
        seed=seed,
        start_date=date(2023, 3, 1),
        months=6,
        development_site=sites[0].name,
        sites=sites,
        **fields,  # type: ignore[arg-type]
    )


def test_same_seed_gives_identical_site_tables() -> None:
    """Building the default scenario twice gives identical tables and resample counts."""
    second = build_sites(default_scenario(), DATASET)
    for a, b in zip(DEFAULT_SITES, second, strict=True):
        pd.testing.assert_frame_equal(a.table, b.table)
        assert a.n_resampled == b.n_resampled


def test_different_seed_gives_different_site_tables() -> None:
    """Another seed changes every site's table."""
    scenario = default_scenario()
    other = build_sites(scenario.model_copy(update={"seed": scenario.seed + 1}), DATASET)
    for a, b in zip(DEFAULT_SITES, other, strict=True):
        assert not a.table.equals(b.table)


def test_adding_sites_leaves_earlier_sites_unchanged() -> None:
    """Each site draws from its own seeded stream, so growing a scenario keeps old sites."""
    scenario = default_scenario()
    small = build_sites(scenario.with_sites(3), DATASET)
    large = build_sites(scenario.with_sites(8), DATASET)
    for a, b in zip(small, large[:3], strict=True):
        pd.testing.assert_frame_equal(a.table, b.table)


def test_site_tables_have_documented_columns_and_ids() -> None:
    """Every table has ids, date, label, attributes, readers and all features, in that order."""
    for site in DEFAULT_SITES:
        table = site.table
        readers = [f"reader_{r.name}" for r in site.spec.readers]
        expected = [*ID_COLUMNS, *ATTRIBUTE_COLUMNS, *readers, *DATASET.feature_names]
        assert list(table.columns) == expected
        assert table["case_id"].is_unique and len(table) == site.spec.n_cases
        assert table["case_id"].str.startswith(f"{site.code}-").all()
        assert table["patient_id"].str.startswith(f"{site.code}-P").all()
        assert table["acquired_on"].is_monotonic_increasing
        assert table["label"].sum() == class_counts(site.spec.n_cases, site.spec.prevalence)[0]
    assert len({s.code for s in DEFAULT_SITES}) == len(DEFAULT_SITES)


def test_a_patients_observations_share_label_and_attributes() -> None:
    """Label, sex and age band are constant within a patient; mean observations near spec."""
    site = DEFAULT_SITES[3]  # 2.0 observations per patient
    per_patient = site.table.groupby("patient_id")
    assert (per_patient[["label", "sex", "age_band"]].nunique() == 1).all().all()
    mean_size = per_patient.size().mean()
    # 1 + Poisson(1) has mean 2; patients cut short at the end of a class pool pull it down.
    assert 1.8 < mean_size < 2.2


def test_acquisition_dates_lie_in_the_scenario_span() -> None:
    """Dates are ISO strings from the start date up to start + months."""
    spec = SiteSpec(name="Alpha", n_cases=300, prevalence=0.3)
    table = build_sites(_scenario(spec), DATASET)[0].table
    dates = pd.to_datetime(table["acquired_on"], format="%Y-%m-%d")
    assert dates.min() >= pd.Timestamp("2023-03-01") and dates.max() < pd.Timestamp("2023-09-01")
    assert dates.dt.month.nunique() == 6


def test_vendor_mix_is_followed_within_binomial_tolerance() -> None:
    """The share of 'Vendor B' matches its mix proportion by an exact binomial interval."""
    spec = SiteSpec(
        name="Alpha", n_cases=4000, prevalence=0.3, vendor_mix={"Vendor A": 0.7, "Vendor B": 0.3}
    )
    table = build_sites(_scenario(spec), DATASET)[0].table
    count = int((table["scanner_vendor"] == "Vendor B").sum())
    # scipy.stats.binomtest Clopper-Pearson interval; binomial tolerance is common practice.
    interval = binomtest(count, len(table)).proportion_ci(confidence_level=0.9999)
    assert interval.low <= 0.3 <= interval.high


def test_resampling_happens_only_when_the_pool_is_too_small() -> None:
    """Sites within their pool have no duplicates; larger ones count exactly the excess."""
    small = SiteSpec(name="Alpha", n_cases=200, prevalence=0.3)
    large = SiteSpec(name="Beta", n_cases=500, prevalence=0.3)
    sites = build_sites(_scenario(small, large, development_share=0.5), DATASET)
    # Development pool: half of 212 positives and of 357 benign (106 and 178, rounded).
    assert sites[0].n_resampled == 0
    # External pool: 106 positives, 179 benign; Beta wants 150 and 350.
    assert sites[1].n_resampled == (150 - 106) + (350 - 179)
    assert "215 resampled cases" in sites[1].shift_description


def test_external_sites_never_hold_development_cases() -> None:
    """Without shift or jitter, external rows are public cases outside the development pool."""
    identity = {"acquisition": AcquisitionShift()}
    development = SiteSpec(name="Alpha", n_cases=280, prevalence=0.37, **identity)
    external = SiteSpec(name="Beta", n_cases=280, prevalence=0.37, **identity)
    sites = build_sites(_scenario(development, external, resample_jitter=0.0), DATASET)
    rows = [
        set(map(tuple, s.table[list(DATASET.feature_names)].to_numpy().round(10))) for s in sites
    ]
    assert rows[0].isdisjoint(rows[1])
    assert len(rows[0]) + len(rows[1]) <= DATASET.n_cases


def test_covariate_shift_in_a_site_moves_mean_radius_as_stated() -> None:
    """A site with beta = -1 has smaller mean radius in each class than one with beta = +1."""
    low = SiteSpec(name="Alpha", n_cases=150, prevalence=0.3, covariate_shift=-1.0)
    high = SiteSpec(name="Beta", n_cases=150, prevalence=0.3, covariate_shift=1.0)
    sites = build_sites(_scenario(high, low, development_share=0.5), DATASET)
    means = [s.table.groupby("label")["feature_mean_radius"].mean() for s in sites]
    assert (means[1] < means[0]).all()


def test_development_split_keeps_each_patient_on_one_side() -> None:
    """No patient id straddles the split; the parts partition the table by about 30/70."""
    site = DEFAULT_SITES[0]
    train, held_out = development_split(site, test_fraction=0.3, seed=3)
    assert set(train["patient_id"]).isdisjoint(held_out["patient_id"])
    assert sorted([*train["case_id"], *held_out["case_id"]]) == sorted(site.table["case_id"])
    assert 0.2 < len(held_out) / len(site.table) < 0.4
    assert set(held_out["label"]) == {0, 1}


def test_write_site_tables_writes_readable_csv_per_site(tmp_path: Path) -> None:
    """One CSV per site, named by slug, reads back to the same table."""
    paths = write_site_tables(DEFAULT_SITES, tmp_path / "tables")
    assert paths["St. Aldric Medical Centre"].name == "st-aldric-medical-centre.csv"
    for site in DEFAULT_SITES:
        back = pd.read_csv(paths[site.name])
        pd.testing.assert_frame_equal(back, site.table, check_dtype=False, rtol=1e-12)


def test_covariate_shift_without_size_feature_is_refused(tmp_path: Path) -> None:
    """A table with no lesion-size column cannot take a covariate shift."""
    from simulations.dataset import load_feature_table
    from site_agent.exceptions import ScenarioError

    path = tmp_path / "t.csv"
    pd.DataFrame({"label": [0, 1] * 10, "feature_x": np.arange(20.0)}).to_csv(path, index=False)
    spec = SiteSpec(name="Alpha", n_cases=10, prevalence=0.5, covariate_shift=0.5)
    with pytest.raises(ScenarioError, match="needs a lesion-size feature"):
        build_sites(_scenario(spec), load_feature_table(path))
