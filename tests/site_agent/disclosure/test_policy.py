import json
from pathlib import Path

import pytest

from site_agent.contract.protocol import Operation
from site_agent.disclosure.policy import (
    DEFAULT_MIN_CELL,
    SitePolicy,
    SmallCellAction,
    policy_json_schema,
)
from site_agent.exceptions import InputError

# Invented scenario: the policy of "Lakeshore General", an invented hospital.
LAKESHORE_TOML = """
min_cell = 8
small_cells = "merge"
allowed_operations = ["evaluate", "monitor"]
allowed_subgroup_attributes = ["sex", "scanner_vendor"]
allowed_coordinators = ["harbourview-imaging-consortium"]

[privacy]
enabled = true
study_epsilon = 2.0
release_epsilon = 0.5
"""


def test_policy_loads_from_toml_file(tmp_path: Path) -> None:
    """A hand-written TOML policy file loads with every field as written."""
    path = tmp_path / "policy.toml"
    path.write_text(LAKESHORE_TOML)

    policy = SitePolicy.load(path)

    assert policy.min_cell == 8
    assert policy.small_cells is SmallCellAction.MERGE
    assert policy.allowed_operations == (Operation.EVALUATE, Operation.MONITOR)
    assert policy.allowed_subgroup_attributes == ("sex", "scanner_vendor")
    assert policy.privacy.enabled
    assert policy.privacy.release_epsilon == 0.5


def test_policy_loads_the_same_from_json_and_toml(tmp_path: Path) -> None:
    """The JSON form of a policy loads to the same policy as its TOML form."""
    toml_path = tmp_path / "policy.toml"
    toml_path.write_text(LAKESHORE_TOML)
    from_toml = SitePolicy.load(toml_path)
    json_path = tmp_path / "policy.json"
    json_path.write_text(from_toml.model_dump_json())

    assert SitePolicy.load(json_path) == from_toml


def test_default_policy_is_restrictive() -> None:
    """An empty policy allows only evaluation, no subgroups, and min cell 5 (common practice)."""
    policy = SitePolicy.from_text("", suffix=".toml")

    # A minimum cell of 5 is common practice in health-statistics disclosure control.
    assert policy.min_cell == DEFAULT_MIN_CELL == 5
    assert policy.allowed_operations == (Operation.EVALUATE,)
    assert policy.allowed_subgroup_attributes == ()
    assert not policy.privacy.enabled


def test_policy_rejects_unknown_keys_with_their_location() -> None:
    """A misspelt key is refused, naming where it is, rather than silently ignored."""
    with pytest.raises(InputError, match="invalid site policy at min_cel"):
        SitePolicy.from_text("min_cel = 3", suffix=".toml")


def test_policy_rejects_release_epsilon_above_study_budget() -> None:
    """A release that would spend more than the whole study budget is refused at load."""
    text = "[privacy]\nenabled = true\nstudy_epsilon = 0.5\nrelease_epsilon = 1.0\n"
    with pytest.raises(InputError, match="release_epsilon must not exceed study_epsilon"):
        SitePolicy.from_text(text, suffix=".toml")


def test_policy_rejects_unparseable_text() -> None:
    """Text that is not TOML is refused as a parse error."""
    with pytest.raises(InputError, match="site policy does not parse"):
        SitePolicy.from_text("min_cell = = 5", suffix=".toml")


def test_missing_policy_file_is_an_input_error(tmp_path: Path) -> None:
    """A policy path that does not exist is refused with the path in the message."""
    with pytest.raises(InputError, match="cannot read site policy"):
        SitePolicy.load(tmp_path / "absent.toml")


def test_policy_json_schema_is_json_and_describes_every_field() -> None:
    """The exported JSON Schema serialises and names each policy field with a description."""
    schema = json.loads(json.dumps(policy_json_schema()))

    assert set(schema["properties"]) == set(SitePolicy.model_fields)
    assert schema["properties"]["min_cell"]["minimum"] == 1
    assert schema["additionalProperties"] is False


def test_update_release_is_off_by_default_and_reads_from_toml() -> None:
    """Without an [updates] table no update may leave; the table sets release and noise."""
    text = LAKESHORE_TOML + (
        "\n[updates]\nallowed = true\n"
        "noise = { clipping_norm = 1.0, sensitivity = 1.0, epsilon = 0.5, delta = 1e-5 }\n"
    )

    default = SitePolicy.from_text(LAKESHORE_TOML, suffix=".toml")
    written = SitePolicy.from_text(text, suffix=".toml")

    assert default.updates.allowed is False and default.updates.noise is None
    assert written.updates.allowed is True
    assert written.updates.noise is not None and written.updates.noise.delta == 1e-5


def test_update_noise_without_sensitivity_is_refused() -> None:
    """Zero sensitivity would add no noise while charging epsilon: the policy is invalid."""
    text = (
        "[updates]\nallowed = true\n"
        "noise = { clipping_norm = 1.0, sensitivity = 0.0, epsilon = 0.5, delta = 1e-5 }\n"
    )

    with pytest.raises(InputError, match="invalid site policy at updates"):
        SitePolicy.from_text(text, suffix=".toml")
