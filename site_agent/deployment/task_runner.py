"""The site's task runner: answers a SuperNode's tasks in one warm process, with its own code only.

A SuperNode started with ``--isolation process`` does not start Flower's executor; it waits
for a process of the site's choosing to take its tasks from its Runtime API. This runner is
that process. For each task it

1. takes the task (``AcquireTask``, polled every ``poll_s`` seconds) and pulls its input:
   the message, the node's context, the run and the run's app bundle;
2. checks the bundle (:func:`site_agent.deployment.app_bundle.check_app_bundle`) *before anything
of it
   is installed or imported*: a bundle that carries code and whose hash the site has not
   approved is refused, the refusal is ledgered in the site's release ledger (reason code,
   protocol hash, no data), and the coordinator gets an error reply naming the reason code;
3. otherwise answers with :data:`site_agent.client_app.app`, the ClientApp the hospital
   installed (disclosure gate and all), and pushes the reply and the task's status.

Flower's own ClientApp process (``flwr-clientapp``) would install the bundle and import the
ClientApp it names, one fresh Python process per message; this runner never installs or
imports a bundle, and keeps its imports (Flower, SciPy, statsmodels and, after the first
training message, torch) across messages, which is most of the cost of a message wave.

Private Flower touches, pinned to ``flwr==1.42.0`` and kept in this module only: the Runtime
API client and interceptors (``flwr.supercore.runtime``, ``flwr.supercore.interceptors``),
``AcquireTaskRequest``, the task heartbeat, and ``pull_task_input`` / ``push_message`` /
``push_task_output`` of ``flwr.supernode.runtime.run_clientapp`` (the same calls Flower's
ClientApp process makes, in the same order).
"""

from __future__ import annotations

import logging
import threading
import time
from pathlib import Path

from flwr.app import Context, Error, Message
from flwr.common.constant import ErrorCode, SubStatus
from flwr.proto.runtime_pb2 import AcquireTaskRequest
from flwr.supercore.constant import TaskType
from flwr.supercore.heartbeat import HeartbeatSender, make_task_heartbeat_fn_http
from flwr.supercore.interceptors import RuntimeTokenHttpInterceptor, RuntimeVersionHttpInterceptor
from flwr.supercore.retry import make_simple_http_retry_invoker
from flwr.supercore.runtime import RuntimeHttpClient
from flwr.supernode.runtime.run_clientapp import pull_task_input, push_message, push_task_output

from site_agent.contract.node_config import LEDGER_PATH_KEY, SITE_NAME_KEY
from site_agent.contract.wire import decode_request
from site_agent.deployment.app_bundle import BundleCheck, check_app_bundle, load_approved_bundles
from site_agent.disclosure.ledger import Outcome, ReleaseLedger

logger = logging.getLogger(__name__)

DEFAULT_POLL_S = 0.05
"""Seconds between asks for a new task when none was waiting."""
_COMPONENT = "flwr-clientapp"


def run_tasks(
    runtime_api_address: str,
    *,
    approved_bundles: Path | None = None,
    poll_s: float = DEFAULT_POLL_S,
    stop: threading.Event | None = None,
) -> int:
    """Answer the SuperNode's tasks until ``stop`` is set (or forever); return tasks answered.

    Parameters
    ----------
    runtime_api_address
        ``host:port`` of the SuperNode's Runtime API (its ``--host`` and ``--port``).
    approved_bundles
        The site's approved-bundles file (SHA-256 hashes), or None to approve none.
    poll_s
        Seconds between asks when no task was waiting.
    stop
        Set it to end the loop after the task in hand.
    """
    # Import the site's ClientApp and the model code now: paid once, before the first task.
    from site_agent.client_app import app  # noqa: F401
    from site_agent.training import model_bundle  # noqa: F401  (torch, for scoring)

    done = 0
    acquirer = _client(runtime_api_address, token=None)
    try:
        while stop is None or not stop.is_set():
            answer = acquirer.AcquireTask(
                AcquireTaskRequest(supported_task_types=[TaskType.CLIENT_APP.value])
            )
            if answer.HasField("task") and answer.token:
                _run_one(runtime_api_address, answer.token, approved_bundles)
                done += 1
                continue
            time.sleep(poll_s)
    finally:
        acquirer.close()
    return done


def _client(address: str, token: str | None) -> RuntimeHttpClient:
    interceptors: list[object] = [RuntimeVersionHttpInterceptor(component_name=_COMPONENT)]
    if token is not None:
        interceptors.append(RuntimeTokenHttpInterceptor(token))
    return RuntimeHttpClient.from_server_address(
        server_address=address,
        insecure=True,  # loopback HTTP between the SuperNode and its own runner
        root_certificates=None,
        interceptors=interceptors,  # type: ignore[arg-type]
        retry_invoker=make_simple_http_retry_invoker(),
    )


def _run_one(address: str, token: str, approved_bundles: Path | None) -> None:
    """Run one task as Flower's ClientApp process would, with the bundle check first."""
    from site_agent.client_app import app

    started = time.perf_counter()
    client = _client(address, token)
    heartbeat = HeartbeatSender(make_task_heartbeat_fn_http(client))
    heartbeat.start()
    context: Context | None = None
    status, details = SubStatus.FAILED, "the site's task runner failed"
    try:
        message, context, _run, fab = pull_task_input(client)
        check = check_app_bundle(
            fab.content, fab.hash_str or None, load_approved_bundles(approved_bundles)
        )
        if check.accepted:
            reply = app(message=message, context=context)
            status, details = SubStatus.COMPLETED, ""
        else:
            _ledger_refusal(message, context, check)
            reason = f"{check.verdict.value}: the site runs only the site agent it installed"
            reply = Message(
                Error(code=ErrorCode.LOAD_CLIENT_APP_EXCEPTION, reason=reason), reply_to=message
            )
            details = reason
        push_message(client, reply, context)
    except Exception as exc:  # a failed task is reported to the SuperNode, never raised
        logger.error("the site's task runner failed on a task", exc_info=exc)
    finally:
        push_task_output(client=client, context=context, sub_status=status, details=details)
        if heartbeat.is_running:
            heartbeat.stop()
        client.close()
        logger.info("task %s in %.2f s", status, time.perf_counter() - started)


def _ledger_refusal(message: Message, context: Context, check: BundleCheck) -> None:
    """Record a refused bundle in the site's ledger: reason code and bundle hash, no data."""
    ledger_path = str(context.node_config.get(LEDGER_PATH_KEY, ""))
    site = str(context.node_config.get(SITE_NAME_KEY, ""))
    logger.warning("site %s refused a run's app bundle: %s", site, check.verdict.value)
    if not ledger_path:
        return
    protocol_hash = operation = None
    try:
        request, _ = decode_request(message.content)
        protocol_hash, operation = request.protocol_hash, request.operation.value
    except Exception:  # not one of our requests (e.g. a training message): no hash to note
        operation = message.metadata.message_type[:40]
    ReleaseLedger(Path(ledger_path)).append(
        outcome=Outcome.DECLINED,
        protocol_hash=protocol_hash,
        operation=operation,
        reason=check.verdict.value,
        released={"app_bundle_sha256": check.sha256, "detail": check.detail},
    )


def main(argv: list[str] | None = None) -> None:
    """``python -m site_agent.deployment.task_runner --runtime-api-address HOST:PORT [...]``."""
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runtime-api-address", required=True)
    parser.add_argument("--approved-bundles", type=Path, default=None)
    parser.add_argument("--poll-s", type=float, default=DEFAULT_POLL_S)
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO)
    logging.getLogger("httpx").setLevel(logging.WARNING)  # one line per poll otherwise
    run_tasks(args.runtime_api_address, approved_bundles=args.approved_bundles, poll_s=args.poll_s)


if __name__ == "__main__":
    main()
