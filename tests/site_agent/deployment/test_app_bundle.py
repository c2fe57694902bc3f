"""The app bundle check: a bundle that brings code to the site is refused unless approved.

Bundles are built by Flower's own builder (``flwr.cli.build.build_fab_from_disk``, the code
``flwr run`` uses), so the check is tested against the format Flower really ships.
"""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import pytest
from flwr.cli.build import build_fab_from_disk

from site_agent.deployment.app_bundle import (
    SITE_CLIENT_APP,
    BundleVerdict,
    approve_bundle,
    check_app_bundle,
    load_approved_bundles,
)
from site_agent.deployment.connection import SiteConnection, connect_site
from site_agent.deployment.keys import make_site_keys
from site_agent.deployment.processes import free_port, site_runner_command
from site_agent.exceptions import InputError
from site_agent.service import SiteSettings

_PROJECT = """[build-system]
requires = ["hatchling"]
build-backend = "hatchling.build"

[project]
name = "kestrel-valley-study"
version = "1.0.0"
description = "Invented study for tests"
license = "Apache-2.0"
dependencies = []

[tool.flwr.app]
publisher = "sitepool"

[tool.flwr.app.components]
serverapp = "coordinator.runs.server_app:app"
clientapp = "{clientapp}"

[tool.flwr.app.config]
"""


def _bundle(root: Path, *, clientapp: str = SITE_CLIENT_APP, module: bool = False) -> bytes:
    root.mkdir(parents=True)
    (root / "pyproject.toml").write_text(_PROJECT.format(clientapp=clientapp))
    if module:
        (root / "marker_app.py").write_text("open('marker', 'w').write('ran')\n")
    with warnings.catch_warnings():  # flwr 1.42's builder uses a pathspec API pathspec deprecates
        warnings.simplefilter("ignore", DeprecationWarning)
        return build_fab_from_disk(root)


def test_bundle_with_only_the_project_file_is_accepted(tmp_path: Path) -> None:
    """The bundle the coordinator builds (project file naming our ClientApp) passes."""
    fab = _bundle(tmp_path / "app")

    check = check_app_bundle(fab, hashlib.sha256(fab).hexdigest())

    assert check.verdict is BundleVerdict.NO_CODE and check.accepted


def test_bundle_carrying_a_module_is_refused(tmp_path: Path) -> None:
    """A Python module in the bundle is refused, even when our ClientApp is named."""
    fab = _bundle(tmp_path / "app", module=True)

    check = check_app_bundle(fab, None)

    assert check.verdict is BundleVerdict.CARRIES_CODE and not check.accepted


def test_bundle_naming_another_clientapp_is_refused(tmp_path: Path) -> None:
    """A project file naming a ClientApp other than the site agent's is refused."""
    fab = _bundle(tmp_path / "app", clientapp="numpy:app")

    assert check_app_bundle(fab, None).verdict is BundleVerdict.OTHER_CLIENT_APP


def test_approved_hash_is_accepted_and_a_false_hash_refused(tmp_path: Path) -> None:
    """A bundle with code passes once its SHA-256 is approved; a claimed hash must match."""
    fab = _bundle(tmp_path / "app", module=True)
    digest = hashlib.sha256(fab).hexdigest()
    approve_bundle(digest, tmp_path / "approved-bundles.json")

    approved = load_approved_bundles(tmp_path / "approved-bundles.json")

    assert check_app_bundle(fab, digest, approved).verdict is BundleVerdict.APPROVED
    assert check_app_bundle(fab, "0" * 64, approved).verdict is BundleVerdict.HASH_MISMATCH
    assert check_app_bundle(b"not a zip", None).verdict is BundleVerdict.UNREADABLE


def test_connect_names_a_damaged_approved_bundles_file_before_starting(tmp_path: Path) -> None:
    """``site connect`` checks the approved-bundles file before it dials the hub.

    The hub address is a closed port: reaching the network step would fail differently.
    """
    keys = make_site_keys(tmp_path / "keys")
    damaged = tmp_path / "approved-bundles.json"
    damaged.write_text('{"approved": 7}')
    connection = SiteConnection(
        hub=f"127.0.0.1:{free_port()}",
        ca_cert=tmp_path / "ca.pem",
        private_key=keys.private_key,
        settings=SiteSettings(site="Northgate", data_path=tmp_path / "cases.csv"),
        state=tmp_path / "state",
        approved_bundles=damaged,
    )

    with pytest.raises(InputError, match="approved-bundles file"):
        connect_site(connection)
    assert not (tmp_path / "state").exists()  # nothing was started
    command = site_runner_command("127.0.0.1:1", damaged)
    assert command[-2:] == ["--approved-bundles", str(damaged.resolve())]
