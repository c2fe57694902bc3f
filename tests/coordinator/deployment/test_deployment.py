"""A real deployment on 127.0.0.1: a TLS hub with site authentication and three connected sites.

Everything runs through the installed commands (``sitepool coordinator start``, ``sitepool
site connect``, ``sitepool coordinator run``) as separate processes, the way three
hospitals and a coordinator would run them from their own terminals. One hub and three
connected sites serve every test of the module (a module-scoped fixture); the tests that
kill a process run last. The hospitals, the study and every number are invented for tests
only.

References: the deployed results are checked against the in-process engine on the same
files (which is itself checked against the direct computation in ``test_loopback.py``);
ledgers against :class:`site_agent.disclosure.ledger.ReleaseLedger`; teardown against the
kernel's process table (``/proc``).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from datetime import date
from pathlib import Path

import numpy as np
import pytest
from pydantic import BaseModel

from coordinator.deployment.certificates import make_certificates
from coordinator.deployment.hub import CONNECTION, HubState, admit_site, list_sites
from coordinator.monitoring.results_store import SqliteResultsStore
from coordinator.pooling.assemble import SiteInfo, build_results
from coordinator.pooling.study_results import StudyResults
from coordinator.runs.engines import run_monitoring, run_study
from coordinator.runs.loopback import submit_run, write_app
from coordinator.runs.server_app import RunRecord, StudyRunConfig
from coordinator.runs.study_state import SqliteStudyState
from site_agent.contract.protocol import (
    EvaluationPlan,
    MonitoringPlan,
    Operation,
    StudyProtocol,
    uniform_edges,
)
from site_agent.contract.signed_release import SIGNED_RELEASE_SUFFIX
from site_agent.deployment.keys import make_site_keys
from site_agent.deployment.offline_answer import answer_into_file
from site_agent.deployment.processes import flower_environment, free_port
from site_agent.disclosure.approvals import approve
from site_agent.disclosure.ledger import Outcome, ReleaseLedger, verify_ledger
from site_agent.disclosure.policy import SitePolicy
from site_agent.disclosure.repeat_answer import REPEAT_KEY
from site_agent.exceptions import DeploymentError
from site_agent.service import SiteSettings

pytestmark = pytest.mark.loopback

SITES = ("Northgate", "Riverside", "Lowmoor")
POLICY = SitePolicy(
    allowed_operations=(Operation.EVALUATE, Operation.MONITOR),
    allowed_subgroup_attributes=("scanner_vendor",),
)
SITEPOOL = str(Path(sys.executable).parent / "sitepool")
WAIT_S = 90.0


def _table(path: Path, seed: int, n_cases: int = 60) -> Path:
    """Write an invented scored predictions table (two cases per patient, three months)."""
    rng = np.random.default_rng(seed)
    label = (rng.random(n_cases) < 0.4).astype(int)
    score = np.clip(rng.beta(2 + 3 * label, 5 - 3 * label), 0.0, 1.0)
    vendor = rng.choice(["vendor-a", "vendor-b"], size=n_cases)
    day = rng.integers(1, 28, size=n_cases)
    rows = ["case_id,patient_id,label,score,scanner_vendor,acquired_on"]
    rows += [
        f"c{i},p{i // 2},{label[i]},{score[i]:.6f},{vendor[i]},2031-{1 + i % 3:02d}-{day[i]:02d}"
        for i in range(n_cases)
    ]
    path.write_text("\n".join(rows) + "\n")
    return path


def _protocol(
    study_id: str, *, rounds: int = 1, reply_timeout_s: float = 60.0, quorum: int = 2
) -> StudyProtocol:
    return StudyProtocol(
        study_id=study_id,
        title="External validation of an invented nodule classifier",
        evaluation=EvaluationPlan(
            thresholds=(0.3, 0.5), histogram_edges=uniform_edges(20), subgroups=("scanner_vendor",)
        ),
        quorum=quorum,
        rounds=rounds,
        reply_timeout_s=reply_timeout_s,
    )


def _pids_with_env(key: str, value: str) -> list[int]:
    marker = f"{key}={value}".encode()
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit() and int(entry.name) != os.getpid():
            try:
                if marker in (entry / "environ").read_bytes().split(b"\0"):
                    stat = (entry / "stat").read_text().rsplit(")", 1)[1].split()
                    if stat[0] not in ("Z", "X"):
                        found.append(int(entry.name))
            except (OSError, IndexError):
                continue
    return found


def _kill_home(home: Path, sig: signal.Signals = signal.SIGKILL) -> None:
    """Send ``sig`` to every process carrying ``FLWR_HOME=home`` (a crash, when SIGKILL)."""
    for _ in range(3):
        for pid in _pids_with_env("FLWR_HOME", str(home)):
            try:
                os.kill(pid, sig)
            except ProcessLookupError:
                pass
        time.sleep(0.3)


class Consortium:
    """The hub and three sites, each a process tree of its own, all on 127.0.0.1."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.port = free_port()
        self.certs = make_certificates(root / "certs")
        self.hub = HubState(root / "hub")
        self.settings: dict[str, SiteSettings] = {}
        self.keys: dict[str, Path] = {}
        self.processes: dict[str, subprocess.Popen[bytes]] = {}
        for index, name in enumerate(SITES):
            home = root / "sites" / name
            home.mkdir(parents=True)
            (home / "policy.json").write_text(POLICY.model_dump_json())
            self.keys[name] = make_site_keys(home / "keys").private_key
            self.settings[name] = SiteSettings(
                site=name,
                data_path=_table(home / "cases.csv", seed=31 + index),
                policy_path=home / "policy.json",
                ledger_path=home / "ledger.jsonl",
            )

    def site_state(self, name: str) -> Path:
        return self.root / "sites" / name / "connection"

    def start_hub(self) -> None:
        log_path = self.root / "hub-command.log"
        seen = log_path.stat().st_size if log_path.exists() else 0  # only this start's lines
        with log_path.open("ab") as log:
            self.processes["hub"] = subprocess.Popen(
                [
                    SITEPOOL,
                    "coordinator",
                    "start",
                    "--state",
                    str(self.hub.root),
                    "--ca",
                    str(self.certs.ca_cert),
                    "--cert",
                    str(self.certs.server_cert),
                    "--key",
                    str(self.certs.server_key),
                    "--port",
                    str(self.port),
                ],
                env=flower_environment(self.hub.home, self.hub.tmp),
                stdout=log,
                stderr=subprocess.STDOUT,
                start_new_session=True,
            )
        deadline = time.monotonic() + WAIT_S
        while b"hub listening" not in log_path.read_bytes()[seen:]:
            assert self.processes["hub"].poll() is None, "the hub command exited"
            assert time.monotonic() < deadline, "the hub did not start"
            time.sleep(0.3)

    def connect(
        self, name: str, key: Path | None = None, state: Path | None = None
    ) -> subprocess.Popen[bytes]:
        """Start ``sitepool site connect``; its output is piped only for another key."""
        settings = self.settings[name]
        state = state or self.site_state(name)
        state.mkdir(parents=True, exist_ok=True)
        process = subprocess.Popen(
            [
                SITEPOOL,
                "site",
                "connect",
                "--hub",
                f"127.0.0.1:{self.port}",
                "--ca",
                str(self.certs.ca_cert),
                "--key",
                str(key or self.keys[name]),
                "--site",
                name,
                "--data",
                str(settings.data_path),
                "--policy",
                str(settings.policy_path),
                "--ledger",
                str(settings.ledger_path),
                "--state",
                str(state),
            ],
            env=flower_environment(state / "flower-home", state / "tmp"),
            stdout=subprocess.PIPE if key else subprocess.DEVNULL,
            stderr=subprocess.PIPE if key else subprocess.DEVNULL,
            start_new_session=True,
        )
        self.processes[name if key is None else f"{name}-other-key"] = process
        return process

    def wait_online(self, names: tuple[str, ...]) -> None:
        deadline = time.monotonic() + WAIT_S
        while True:
            try:
                rows = list_sites(self.hub)
            except DeploymentError:  # the hub's control interface may still be starting
                rows = []
            online = {site.name for site, status in rows if status == "online"}
            if set(names) <= online:
                return
            assert time.monotonic() < deadline, f"sites not online: {set(names) - online}"
            time.sleep(1.0)

    def approve_everywhere(self, protocol: StudyProtocol) -> Path:
        for settings in self.settings.values():
            assert settings.policy_path is not None
            approve(protocol, settings.policy_path.parent / POLICY.approvals_file)
        path = self.root / f"{protocol.study_id}.json"
        path.write_text(protocol.model_dump_json(indent=2))
        return path

    def run(
        self, protocol_path: Path, out: Path, extra: Sequence[str] = ()
    ) -> subprocess.Popen[bytes]:
        return subprocess.Popen(
            [
                SITEPOOL,
                "coordinator",
                "run",
                "--state",
                str(self.hub.root),
                "--protocol",
                str(protocol_path),
                "--out",
                str(out),
                "--wait",
                "30",
                "--timeout",
                "150",
                *extra,
            ],
            env=flower_environment(self.hub.home, self.hub.tmp),
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            start_new_session=True,
        )

    def crash_hub(self) -> None:
        _kill_home(self.hub.home)
        self.processes["hub"].wait(timeout=10)

    def stop_all(self) -> None:
        for process in self.processes.values():
            if process.poll() is None:
                os.killpg(process.pid, signal.SIGTERM)
        for process in self.processes.values():
            try:
                process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(process.pid, signal.SIGKILL)
        _kill_home(self.hub.home)
        for name in SITES:
            _kill_home(self.site_state(name) / "flower-home")


@pytest.fixture(scope="module")
def consortium(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Consortium]:
    """Start the hub, admit the three sites and connect them; stop everything afterwards."""
    group = Consortium(tmp_path_factory.mktemp("deployment"))
    try:
        group.start_hub()
        for name in SITES:
            admit_site(group.hub, name, group.keys[name].with_name("site.key.pub"))
            group.connect(name)
        group.wait_online(SITES)
        yield group
    finally:
        group.stop_all()
    leftovers = _pids_with_env("FLWR_HOME", str(group.hub.home))
    assert leftovers == [], f"processes left running: {leftovers}"


def _results(out: Path) -> StudyResults:
    return StudyResults.model_validate_json((out / "results.json").read_text())


def _json(rows: Sequence[BaseModel]) -> list[str]:
    return [row.model_dump_json() for row in rows]


def _finish(process: subprocess.Popen[bytes]) -> tuple[int, str, str]:
    stdout, stderr = process.communicate(timeout=200)
    return process.returncode, stdout.decode(), stderr.decode()


def test_three_sites_over_tls_with_site_keys_equal_the_inprocess_engine(
    consortium: Consortium, tmp_path: Path
) -> None:
    """A deployed study writes results, exports and report equal to the in-process engine's."""
    protocol = _protocol("deployed-nodule-2031")
    path = consortium.approve_everywhere(protocol)

    code, stdout, stderr = _finish(consortium.run(path, tmp_path / "deployed"))

    assert code == 0, stderr
    for name in SITES:
        assert f"{name}: released" in stdout
    assert (tmp_path / "deployed" / "report.html").exists()
    assert (tmp_path / "deployed" / "sites.csv").exists()
    deployed = _results(tmp_path / "deployed")
    inprocess = run_study(
        protocol,
        None,
        list(consortium.settings.values()),
        engine="inprocess",
        workdir=tmp_path / "inprocess",
    )
    reference = build_results(
        protocol,
        inprocess.rounds[-1],
        engine="deployment",
        sites={name: SiteInfo() for name in SITES},
        notes=deployed.notes,
    )
    assert _json(deployed.metrics) == _json(reference.metrics)  # NaN-safe comparison
    assert _json(deployed.meta) == _json(reference.meta)
    assert _json(deployed.flow) == _json(reference.flow)


def test_an_unadmitted_key_is_refused_in_one_line(consortium: Consortium, tmp_path: Path) -> None:
    """A site whose key was never admitted is refused; the error names the cause, not the key."""
    stranger = make_site_keys(tmp_path / "stranger")

    code, stdout, stderr = _finish(
        consortium.connect("Lowmoor", key=stranger.private_key, state=tmp_path / "state")
    )

    assert code == 2
    (line,) = stderr.strip().splitlines()
    assert "refused this site's key (not admitted)" in line
    assert stranger.fingerprint in line
    key_text = stranger.private_key.read_text()
    body = "".join(key_text.splitlines()[1:-1])
    assert body[:40] not in stdout + stderr


def _runner_pids(state: Path) -> list[int]:
    """Process ids of the site task runner started by ``sitepool site connect`` at ``state``."""
    return [
        pid
        for pid in _pids_with_env("FLWR_HOME", str(state / "flower-home"))
        if b"site_agent.deployment.task_runner" in Path(f"/proc/{pid}/cmdline").read_bytes()
    ]


def test_a_run_whose_app_bundle_carries_code_is_refused_at_connected_sites(
    consortium: Consortium, tmp_path: Path
) -> None:
    """A bundle with a marker-writing module, submitted to the TLS hub: refused and ledgered."""
    protocol = _protocol("foreign-code-nodule-2031", reply_timeout_s=20.0)
    path = consortium.approve_everywhere(protocol)
    marker = tmp_path / "marker-written-by-foreign-code"
    config = StudyRunConfig(
        protocol_path=path,
        results_path=tmp_path / "outcome.json",
        expected_sites=len(SITES),
        node_wait_s=5.0,
        state_path=tmp_path / "study-state.sqlite",
        site_names=SITES,
    )
    app_dir = write_app(tmp_path / "app", config)
    (app_dir / "marker_app.py").write_text(
        "from pathlib import Path\nfrom flwr.clientapp import ClientApp\n"
        f"Path({str(marker)!r}).write_text('ran')\napp = ClientApp()\n"
    )
    project = app_dir / "pyproject.toml"
    project.write_text(
        project.read_text().replace('"site_agent.client_app:app"', '"marker_app:app"')
    )
    assert all(_runner_pids(consortium.site_state(name)) for name in SITES)

    submit_run(app_dir, CONNECTION, consortium.hub.env(), consortium.hub.tmp)
    deadline = time.monotonic() + WAIT_S
    while not config.results_path.exists():
        assert time.monotonic() < deadline, "the run wrote no outcome"
        time.sleep(0.5)

    record = RunRecord.read(config.results_path)
    assert record.outcome is None  # every site refused: below quorum
    for name in SITES:  # the coordinator is told who refused and why
        assert f"{name}: app_bundle_carries_code" in (record.error or "")
    for settings in consortium.settings.values():
        assert settings.ledger_path is not None
        refusals = [
            entry
            for entry in ReleaseLedger(settings.ledger_path).entries()
            if entry.protocol_hash == protocol.content_hash()
        ]
        assert [(e.outcome, e.reason) for e in refusals] == [
            (Outcome.DECLINED, "app_bundle_carries_code")
        ], settings.site
        assert verify_ledger(settings.ledger_path).ok
    assert not marker.exists()


def test_late_declining_and_file_based_sites_with_quorum_held_by_a_file(
    consortium: Consortium, tmp_path: Path
) -> None:
    """One site answers late, one declines, one answers by signed file; quorum 2 holds.

    Northgate releases over Flower; Riverside's task runner is frozen (SIGSTOP) until the
    reply timeout has passed, so its answer comes late; Lowmoor never approved the
    protocol and declines; Kestrel Valley cannot connect and sends a signed release file.
    The file counts towards the quorum before it is checked, and the report names
    Riverside and Lowmoor with the reason for each.
    """
    protocol = _protocol("mixed-faults-nodule-2031", reply_timeout_s=8.0, quorum=2)
    for name in ("Northgate", "Riverside"):  # Lowmoor does not approve this protocol
        policy_path = consortium.settings[name].policy_path
        assert policy_path is not None
        approve(protocol, policy_path.parent / POLICY.approvals_file)
    path = tmp_path / "protocol.json"
    path.write_text(protocol.model_dump_json(indent=2))
    offline = tmp_path / "kestrel"
    offline.mkdir()
    (offline / "policy.json").write_text(POLICY.model_dump_json())
    approve(protocol, offline / POLICY.approvals_file)
    kestrel = SiteSettings(
        site="Kestrel Valley",
        data_path=_table(offline / "cases.csv", seed=77),
        policy_path=offline / "policy.json",
        ledger_path=offline / "ledger.jsonl",
    )
    keys = make_site_keys(offline / "keys")
    inbox, admitted = tmp_path / "inbox", tmp_path / "file-site-keys"
    inbox.mkdir()
    admitted.mkdir()
    (admitted / "Kestrel Valley.pub").write_bytes(keys.public_key.read_bytes())
    signed = answer_into_file(protocol, kestrel, keys.private_key)
    (inbox / f"kestrel{SIGNED_RELEASE_SUFFIX}").write_text(signed.to_json())
    frozen = _runner_pids(consortium.site_state("Riverside"))
    assert frozen
    try:
        for pid in frozen:
            os.kill(pid, signal.SIGSTOP)
        code, stdout, stderr = _finish(
            consortium.run(
                path,
                tmp_path / "mixed",
                ["--release-files", str(inbox), "--file-site-keys", str(admitted)],
            )
        )
    finally:
        for pid in frozen:
            os.kill(pid, signal.SIGCONT)

    assert code == 0, stderr
    results = _results(tmp_path / "mixed")
    status = {row.site: row for row in results.sites}
    assert {name: row.status for name, row in status.items()} == {
        "Northgate": "released",
        "Kestrel Valley": "released",
        "Riverside": "silent",
        "Lowmoor": "declined",
    }
    assert "reply timeout" in (status["Riverside"].reason or "")
    assert "approv" in (status["Lowmoor"].reason or "")
    report = (tmp_path / "mixed" / "report.html").read_text()
    for name in ("Riverside", "Lowmoor", "Kestrel Valley"):
        assert name in report
    assert "Riverside: silent" in stdout and "Lowmoor: declined" in stdout


def test_monitoring_windows_over_connected_sites_fill_the_results_store(
    consortium: Consortium, tmp_path: Path
) -> None:
    """``coordinator monitor`` stores each window; ``sitepool monitor`` reads the store.

    Reference: the in-process engine on the same site files (fresh ledgers, so it computes
    rather than repeats the sites' answers) stores the same window releases.
    """
    protocol = StudyProtocol(
        study_id="nodule-watch-deployed-2031",
        title="Invented monitoring study over connected sites",
        evaluation=EvaluationPlan(thresholds=(0.5,), histogram_edges=uniform_edges(5)),
        operations=(Operation.MONITOR,),
        rounds=3,
        quorum=1,
        reply_timeout_s=60.0,
        monitoring=MonitoringPlan(
            first_window_start=date(2031, 1, 1), windows=3, window_months=1, baseline_windows=1
        ),
    )
    path = consortium.approve_everywhere(protocol)
    store = tmp_path / "deployed-store.sqlite"
    command = [SITEPOOL, "coordinator", "monitor", "--state", str(consortium.hub.root)]
    command += ["--protocol", str(path), "--store", str(store), "--as-of", "2033-01-01"]
    done = subprocess.run(
        [*command, "--wait", "30", "--timeout", "150"],
        env=consortium.hub.env(),
        capture_output=True,
        text=True,
        timeout=200,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert "window 3 (2031-03-01 to 2031-04-01): 3 stored" in done.stdout
    fresh = [
        s.model_copy(update={"ledger_path": tmp_path / f"{s.site}-fresh.jsonl"})
        for s in consortium.settings.values()
    ]
    run_monitoring(
        protocol,
        None,
        fresh,
        store_path=tmp_path / "reference-store.sqlite",
        engine="inprocess",
        workdir=tmp_path / "reference",
        as_of=date(2033, 1, 1),
    )
    study = protocol.study_id
    with (
        SqliteResultsStore(store) as deployed,
        SqliteResultsStore(tmp_path / "reference-store.sqlite") as reference,
    ):
        got = [(w.site, w.window_start, w.release_json) for w in deployed.windows(study)]
        want = [(w.site, w.window_start, w.release_json) for w in reference.windows(study)]
    assert {site for site, _, _ in got} == set(SITES)  # a small window may be declined
    assert got == want

    drift = [SITEPOOL, "monitor", "--store", str(store), "--study", study]
    report = subprocess.run(
        [*drift, "--out", str(tmp_path / "drift"), "--baseline-windows", "1"],
        capture_output=True,
        text=True,
        timeout=200,
        check=False,
    )
    assert report.returncode == 0, report.stderr
    assert (tmp_path / "drift" / "drift-report.html").exists()


def test_the_coordinator_killed_mid_study_resumes_with_identical_results(
    consortium: Consortium, tmp_path: Path
) -> None:
    """Kill the hub and the run mid-study; restart: same results, one release per round per site."""
    reference_protocol = _protocol("resumed-nodule-2031-a", rounds=2)
    protocol = _protocol("resumed-nodule-2031-b", rounds=2)
    consortium.approve_everywhere(reference_protocol)
    inprocess = run_study(
        reference_protocol,
        None,
        list(consortium.settings.values()),
        engine="inprocess",
        workdir=tmp_path / "reference",
    )
    path = consortium.approve_everywhere(protocol)
    run = consortium.run(path, tmp_path / "resumed")
    deadline = time.monotonic() + WAIT_S
    while True:  # kill once a first release is stored
        assert run.poll() is None, run.communicate()[1].decode()
        assert time.monotonic() < deadline, "no release stored"
        with SqliteStudyState(consortium.hub.study_state) as state:
            if state.releases(protocol.content_hash(), 1):
                break
        time.sleep(0.2)
    os.killpg(run.pid, signal.SIGKILL)
    run.communicate(timeout=30)
    consortium.crash_hub()

    consortium.start_hub()
    consortium.wait_online(SITES)
    code, _, stderr = _finish(consortium.run(path, tmp_path / "resumed"))

    assert code == 0, stderr
    resumed = _results(tmp_path / "resumed")
    reference = build_results(
        reference_protocol,
        inprocess.rounds[-1],
        engine="deployment",
        sites={name: SiteInfo() for name in SITES},
        notes=resumed.notes,
    )
    assert _json(resumed.metrics) == _json(reference.metrics)
    assert _json(resumed.meta) == _json(reference.meta)
    for settings in consortium.settings.values():
        assert settings.ledger_path is not None
        assert verify_ledger(settings.ledger_path).ok
        entries = [
            entry
            for entry in ReleaseLedger(settings.ledger_path).entries()
            if entry.protocol_hash == protocol.content_hash()
        ]
        assert {entry.outcome for entry in entries} == {Outcome.RELEASED}, settings.site
        first = {
            entry.sequence: entry
            for entry in entries
            if not (isinstance(entry.released, dict) and REPEAT_KEY in entry.released)
        }
        # One answer per (protocol, round): two rounds, two first answers, two request keys.
        assert len(first) == 2, settings.site
        assert len({entry.request_key for entry in first.values()}) == 2, settings.site
        for repeat in (entry for entry in entries if entry.sequence not in first):
            assert isinstance(repeat.released, dict)
            assert repeat.epsilon_spent == 0.0
            original = first[int(str(repeat.released[REPEAT_KEY]))]
            assert repeat.request_key == original.request_key


def test_a_site_killed_mid_round_is_named_missing_while_quorum_holds(
    consortium: Consortium, tmp_path: Path
) -> None:
    """One site dies after the run is submitted: the study goes on and the report names it."""
    consortium.wait_online(SITES)
    protocol = _protocol("silent-site-nodule-2031", reply_timeout_s=15.0)
    path = consortium.approve_everywhere(protocol)
    run = consortium.run(path, tmp_path / "one-down")
    time.sleep(1.0)
    _kill_home(consortium.site_state("Lowmoor") / "flower-home")

    code, _, stderr = _finish(run)

    assert code == 0, stderr
    results = _results(tmp_path / "one-down")
    status = {row.site: row for row in results.sites}
    assert status["Northgate"].status == "released"
    assert status["Riverside"].status == "released"
    assert status["Lowmoor"].status == "silent"
    assert status["Lowmoor"].reason
    assert "Lowmoor" in (tmp_path / "one-down" / "report.html").read_text()


def test_no_key_material_in_any_log(consortium: Consortium) -> None:
    """No private key's body appears in any log the hub or the sites wrote."""
    bodies = [consortium.certs.server_key, consortium.certs.ca_key, *consortium.keys.values()]
    secrets = ["".join(p.read_text().splitlines()[1:-1])[:48] for p in bodies]
    logs = [*consortium.root.rglob("*.log")]
    assert logs
    for log in logs:
        text = log.read_text(errors="replace")
        for secret in secrets:
            assert secret not in text, log
