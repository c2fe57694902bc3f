"""The site's task runner on a real SuperLink and SuperNode (127.0.0.1): foreign code refused.

A run whose app bundle carries a module that would write a marker file, and whose project
file names that module's ClientApp, is submitted with Flower's own ``flwr run``. The site's
runner must refuse it before anything of the bundle is installed or imported, ledger the
refusal, and never write the marker. The hospital and the study are invented.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest

from coordinator.runs import loopback
from coordinator.runs.engines import _configured
from site_agent.contract.protocol import StudyProtocol
from site_agent.deployment.processes import (
    LOOPBACK,
    flower_environment,
    flower_tool,
    free_port,
    process_groups,
    site_runner_command,
    wait_for_port,
)
from site_agent.disclosure.ledger import ReleaseLedger, verify_ledger
from site_agent.service import SiteSettings

pytestmark = pytest.mark.loopback

_WAIT_S = 180.0


def test_bundle_carrying_a_module_is_refused_and_its_code_never_runs(
    tmp_path: Path, study_protocol: StudyProtocol, three_sites: list[SiteSettings]
) -> None:
    """The marker module never runs; the site's ledger records the refused bundle."""
    site = three_sites[0]
    marker = tmp_path / "marker-written-by-foreign-code"
    config = _configured(study_protocol, None, [site], tmp_path / "run", store_path=None)
    layout = loopback._Layout(tmp_path / "run")
    env = flower_environment(layout.home, layout.tmp)
    with process_groups(env) as processes:
        link_port = free_port()
        processes.start(
            "superlink",
            [
                flower_tool("flower-superlink"),
                "--insecure",
                "--host",
                LOOPBACK,
                "--port",
                str(link_port),
                "--disable-runtime-dependency-installation",
            ],
            layout.log("superlink"),
        )
        runtime_port = free_port()
        processes.start(
            "supernode",
            [
                flower_tool("flower-supernode"),
                "--insecure",
                "--superlink",
                f"{LOOPBACK}:{link_port}",
                "--host",
                LOOPBACK,
                "--port",
                str(runtime_port),
                "--node-config",
                str(layout.node_config(0, site.to_node_config())),
                "--isolation",
                "process",
            ],
            layout.log("supernode"),
        )
        processes.start(
            "runner",
            site_runner_command(f"{LOOPBACK}:{runtime_port}"),
            layout.log("runner"),
        )
        wait_for_port(link_port, 30.0, processes)
        loopback._write_connection(layout, link_port)
        app_dir = loopback.write_app(layout.app, config)
        (app_dir / "marker_app.py").write_text(
            "from pathlib import Path\nfrom flwr.clientapp import ClientApp\n"
            f"Path({str(marker)!r}).write_text('ran')\napp = ClientApp()\n"
        )
        project = app_dir / "pyproject.toml"
        project.write_text(
            project.read_text().replace('"site_agent.client_app:app"', '"marker_app:app"')
        )
        loopback.submit_run(
            app_dir, loopback.CONNECTION_NAME, env, layout.root, processes.log_tails
        )
        assert site.ledger_path is not None
        deadline = time.monotonic() + _WAIT_S
        reasons: list[str | None] = []
        while time.monotonic() < deadline and not reasons:
            processes.check_alive()
            reasons = [e.reason for e in ReleaseLedger(site.ledger_path).entries()]
            time.sleep(0.5)

    assert reasons == ["app_bundle_carries_code"], processes.log_tails()
    assert not marker.exists()
    assert verify_ledger(site.ledger_path).ok
