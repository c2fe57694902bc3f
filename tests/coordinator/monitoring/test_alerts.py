"""Tests of webhook alerts against real HTTP receivers on 127.0.0.1."""

from __future__ import annotations

import json
import logging
import math
import socket
import threading
from collections.abc import Callable, Iterator
from datetime import date
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

from coordinator.monitoring.alerts import ALERT_FORMAT, DriftAlert, WebhookAlerter
from coordinator.monitoring.drift import DriftLevel
from site_agent.exceptions import InputError
from site_agent.notices import RESEARCH_NOTICE

# Reply plan of a receiver: one entry per request (the last repeats): an HTTP status to
# send, or None to hang without replying until the test ends.
Plan = list[int | None]


class _Receiver:
    """A real HTTP server on 127.0.0.1 that records request bodies and follows a plan."""

    def __init__(self, plan: Plan):
        self.plan = plan
        self.bodies: list[bytes] = []
        self.content_types: list[str] = []
        self.release = threading.Event()
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("content-length", "0"))
                receiver.bodies.append(self.rfile.read(length))
                receiver.content_types.append(self.headers.get("content-type", ""))
                step = receiver.plan[min(len(receiver.bodies), len(receiver.plan)) - 1]
                if step is None:
                    receiver.release.wait(10)
                    return
                self.send_response(step)
                self.send_header("content-length", "0")
                self.end_headers()

            def log_message(self, format: str, *args: object) -> None:
                pass

        class Server(ThreadingHTTPServer):
            def handle_error(self, request: object, client_address: object) -> None:
                pass  # a hung request whose client gave up ends with a broken pipe

        self.server = Server(("127.0.0.1", 0), Handler)
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hooks/drift"

    def stop(self) -> None:
        self.release.set()
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=10)


@pytest.fixture
def receiver() -> Iterator[Callable[[Plan], _Receiver]]:
    started: list[_Receiver] = []

    def start(plan: Plan) -> _Receiver:
        started.append(_Receiver(plan))
        return started[-1]

    yield start
    for server in started:
        server.stop()


def _alert(statistic: float = 0.31) -> DriftAlert:
    return DriftAlert(
        study_id="study-7",
        site="north",
        window_start=date(2031, 3, 1),
        window_end=date(2031, 4, 1),
        metric="score_distribution",
        method="psi",
        statistic=statistic,
        level=DriftLevel.SHIFTED,
        message="Score distribution shifted against the reference window (PSI above 0.25).",
    )


def test_accepting_receiver_gets_the_alert_as_json_with_the_research_notice(
    receiver: Callable[[Plan], _Receiver],
) -> None:
    """A 2xx receiver gets one JSON body that round-trips to the alert and carries the notice."""
    server = receiver([204])
    alert = _alert()

    with WebhookAlerter(server.url, timeout_s=2.0) as alerter:
        result = alerter.send(alert)

    assert (result.delivered, result.attempts, result.status_code) == (True, 1, 204)
    assert len(server.bodies) == 1
    payload = json.loads(server.bodies[0])
    assert payload["notice"] == RESEARCH_NOTICE
    assert payload["alert_format"] == ALERT_FORMAT
    assert payload["level"] == "shifted"
    assert payload["window_start"] == "2031-03-01"
    assert DriftAlert.model_validate_json(server.bodies[0]) == alert
    assert server.content_types == ["application/json"]


def test_server_error_is_retried_then_reported_and_logged(
    receiver: Callable[[Plan], _Receiver], caplog: pytest.LogCaptureFixture
) -> None:
    """A receiver answering 500 gets 1 + retries attempts; the failure is returned and logged."""
    server = receiver([500])

    with (
        caplog.at_level(logging.WARNING, logger="coordinator.monitoring.alerts"),
        WebhookAlerter(server.url, timeout_s=2.0, retries=2, backoff_s=0.01) as alerter,
    ):
        result = alerter.send(_alert())

    assert (result.delivered, result.attempts, result.status_code) == (False, 3, 500)
    assert result.error == "receiver replied HTTP 500"
    assert len(server.bodies) == 3
    assert "not delivered" in caplog.text and "3 attempt(s)" in caplog.text


def test_a_retry_after_a_server_error_can_succeed(receiver: Callable[[Plan], _Receiver]) -> None:
    """A 503 followed by a 200 is delivered on the second attempt."""
    server = receiver([503, 200])

    with WebhookAlerter(server.url, timeout_s=2.0, retries=3, backoff_s=0.01) as alerter:
        result = alerter.send(_alert())

    assert (result.delivered, result.attempts) == (True, 2)
    assert len(server.bodies) == 2


def test_client_error_is_not_retried(receiver: Callable[[Plan], _Receiver]) -> None:
    """A 4xx reply is final: one attempt, reported as not delivered."""
    server = receiver([404])

    with WebhookAlerter(server.url, timeout_s=2.0, retries=3, backoff_s=0.01) as alerter:
        result = alerter.send(_alert())

    assert (result.delivered, result.attempts, result.status_code) == (False, 1, 404)
    assert len(server.bodies) == 1


def test_hanging_receiver_times_out_on_every_attempt(
    receiver: Callable[[Plan], _Receiver],
) -> None:
    """A receiver that never answers is abandoned after the timeout, retried, then reported."""
    server = receiver([None])

    with WebhookAlerter(server.url, timeout_s=0.3, retries=1, backoff_s=0.01) as alerter:
        result = alerter.send(_alert())

    assert (result.delivered, result.attempts) == (False, 2)
    assert result.error is not None and result.error.startswith("timed out")
    assert len(server.bodies) == 2


def test_closed_port_is_reported_as_a_transport_error() -> None:
    """Nothing listening on the port: connection refused, retried, reported, no exception."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]

    with WebhookAlerter(f"http://127.0.0.1:{port}/", timeout_s=1.0, retries=1, backoff_s=0.01) as a:
        result = a.send(_alert())

    assert (result.delivered, result.attempts, result.status_code) == (False, 2, None)
    assert result.error == "transport error (ConnectError)"


def test_undefined_statistic_is_sent_as_null() -> None:
    """A NaN statistic becomes null in the JSON payload (JSON has no NaN)."""
    alert = _alert(statistic=math.nan)

    assert alert.statistic is None
    assert json.loads(alert.model_dump_json())["statistic"] is None


@pytest.mark.parametrize(
    ("url", "message"),
    [("ftp://127.0.0.1/hook", "http"), ("/relative/hook", "http"), ("http://[::1", "invalid")],
)
def test_invalid_webhook_url_raises_input_error(url: str, message: str) -> None:
    """Non-http(s), relative or malformed URLs are refused when the alerter is built."""
    with pytest.raises(InputError, match=message):
        WebhookAlerter(url)


def test_alert_notice_cannot_be_replaced() -> None:
    """An alert must carry the research notice; another text is refused."""
    fields = _alert().model_dump()
    fields["notice"] = "clinically validated"

    with pytest.raises(ValueError, match="research notice"):
        DriftAlert(**fields)
