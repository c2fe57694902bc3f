from pathlib import Path

import pytest

from simulations.scenario import AcquisitionShift, Scenario, default_scenario
from site_agent.exceptions import ScenarioError


def test_default_scenario_has_six_invented_sites_with_unshifted_development_site() -> None:
    """The packaged scenario has six sites; the development site is first and unshifted."""
    scenario = default_scenario()
    assert len(scenario.sites) == 6
    assert scenario.development_index == 0
    development = scenario.sites[0]
    assert development.acquisition == AcquisitionShift()
    assert development.covariate_shift == 0.0
    shifted = scenario.sites[1:]
    assert all(s.acquisition != AcquisitionShift() for s in shifted)
    noise = [s.acquisition.noise_sd for s in shifted]
    assert noise == sorted(noise)  # listed from least to most shifted


@pytest.mark.parametrize("suffix", [".toml", ".yaml", ".yml", ".json"])
def test_scenario_round_trips_through_each_file_format(tmp_path: Path, suffix: str) -> None:
    """Dumping and loading a scenario gives an equal scenario in every format."""
    scenario = default_scenario()
    path = tmp_path / f"scenario{suffix}"
    scenario.dump(path)
    assert Scenario.load(path) == scenario


def _write(tmp_path: Path, text: str, suffix: str = ".toml") -> Path:
    path = tmp_path / f"s{suffix}"
    path.write_text(text)
    return path


_HEAD = """
seed = 1
start_date = 2023-01-01
months = 12
development_site = "Alpha"
"""


def test_unknown_field_is_refused_naming_it(tmp_path: Path) -> None:
    """A misspelt field (extra="forbid") gives a ScenarioError with the field's path."""
    text = _HEAD + '[[sites]]\nname = "Alpha"\nn_cases = 10\nprevalence = 0.3\n'
    text += "[sites.acquisition]\nnoise_sigma = 0.2\n"
    with pytest.raises(ScenarioError, match=r"sites\[0\]\.acquisition\.noise_sigma"):
        Scenario.load(_write(tmp_path, text))


def test_out_of_range_value_is_refused_naming_the_field(tmp_path: Path) -> None:
    """A prevalence of 1.5 is refused with the field named."""
    text = _HEAD + '[[sites]]\nname = "Alpha"\nn_cases = 10\nprevalence = 1.5\n'
    with pytest.raises(ScenarioError, match=r"sites\[0\]\.prevalence: .*less than 1"):
        Scenario.load(_write(tmp_path, text))


def test_mix_not_summing_to_one_is_refused(tmp_path: Path) -> None:
    """Vendor proportions must sum to 1."""
    text = _HEAD + '[[sites]]\nname = "Alpha"\nn_cases = 10\nprevalence = 0.3\n'
    text += 'vendor_mix = { "Vendor A" = 0.5, "Vendor B" = 0.4 }\n'
    with pytest.raises(ScenarioError, match=r"sites\[0\]\.vendor_mix: .*sum to 1"):
        Scenario.load(_write(tmp_path, text))


def test_development_site_must_be_listed(tmp_path: Path) -> None:
    """Naming a development site that is not among the sites is refused."""
    text = _HEAD.replace('"Alpha"', '"Omega"')
    text += '[[sites]]\nname = "Alpha"\nn_cases = 10\nprevalence = 0.3\n'
    with pytest.raises(ScenarioError, match="development_site must name one of the sites"):
        Scenario.load(_write(tmp_path, text))


def test_duplicate_site_names_are_refused(tmp_path: Path) -> None:
    """Two sites with one name are refused."""
    site = '[[sites]]\nname = "Alpha"\nn_cases = 10\nprevalence = 0.3\n'
    with pytest.raises(ScenarioError, match="site names must be unique"):
        Scenario.load(_write(tmp_path, _HEAD + site + site))


def test_syntax_errors_and_wrong_suffix_give_scenario_errors(tmp_path: Path) -> None:
    """Broken TOML, YAML or JSON, a non-table top level and an unknown suffix are refused."""
    with pytest.raises(ScenarioError, match="not valid TOML"):
        Scenario.load(_write(tmp_path, "seed = = 1"))
    with pytest.raises(ScenarioError, match="not valid YAML"):
        Scenario.load(_write(tmp_path, "seed: [1", ".yaml"))
    with pytest.raises(ScenarioError, match="not valid JSON"):
        Scenario.load(_write(tmp_path, "{seed: 1}", ".json"))
    with pytest.raises(ScenarioError, match="table of fields"):
        Scenario.load(_write(tmp_path, "[1, 2]", ".json"))
    with pytest.raises(ScenarioError, match=r"must end in \.toml"):
        Scenario.load(_write(tmp_path, "", ".ini"))
    with pytest.raises(ScenarioError, match="cannot read scenario file"):
        Scenario.load(tmp_path / "absent.toml")


def test_missing_required_field_is_named(tmp_path: Path) -> None:
    """Leaving out n_cases is refused with its path."""
    text = _HEAD + '[[sites]]\nname = "Alpha"\nprevalence = 0.3\n'
    with pytest.raises(ScenarioError, match=r"sites\[0\]\.n_cases: Field required"):
        Scenario.load(_write(tmp_path, text))


def test_with_sites_scales_by_cycling_templates() -> None:
    """with_sites(n) keeps the development site first and cycles the others with new names."""
    scenario = default_scenario()
    grown = scenario.with_sites(13)
    names = [s.name for s in grown.sites]
    assert len(names) == 13 and len(set(names)) == 13
    assert grown.sites[0] == scenario.sites[0]
    assert grown.sites[6].name == "Riverside Clinic 2"
    assert grown.sites[6].acquisition == scenario.sites[1].acquisition
    assert len(set(grown.site_codes())) == 13
    assert [s.name for s in scenario.with_sites(2).sites] == [
        "Northgate General",
        "Riverside Clinic",
    ]


def test_with_sites_rejects_zero() -> None:
    """At least one site is needed."""
    with pytest.raises(ScenarioError, match="at least 1"):
        default_scenario().with_sites(0)


def test_derived_site_codes_are_unique_initials() -> None:
    """Sites without a code get initials, made unique by a number."""
    text = _HEAD + "".join(
        f'[[sites]]\nname = "{n}"\nn_cases = 10\nprevalence = 0.3\n'
        for n in ("Alpha", "Alder Park", "Ash")
    )
    scenario = Scenario.from_text(text, "toml")
    assert scenario.site_codes() == ("A", "AP", "A2")
