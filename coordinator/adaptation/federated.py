"""Federated fine-tuning rounds through Flower's own strategies (FedAvg, FedProx).

:func:`run_federated` starts from the model bundle's weights and runs the plan's number
of rounds with ``flwr.serverapp.strategy.FedAvg`` or ``FedProx``, set up explicitly:
every connected site is asked each round (``fraction_train = 1``), no strategy-side
evaluation rounds (``fraction_evaluate = 0``), the protocol's reply timeout on every wave,
and a quorum: a round in which fewer sites than ``protocol.quorum`` sent an update stops
the run with :class:`~site_agent.exceptions.DeploymentError` (Flower's strategies would
otherwise aggregate whatever arrived). The sites train on their local training pools only
and their disclosure gate (:mod:`site_agent.disclosure.update_release`) decides whether they take
part; a declining site's ``Error`` reply is left out of the aggregate, as Flower does.

Each train message carries the protocol's request and the model bundle in the strategy's
``train_config``; FedProx adds ``proximal-mu``. After the last round every site measures
the federated weights on its held-out test set
(:func:`coordinator.adaptation.requests.request_adaptation`).

Whether a site takes part is its policy's decision: it needs ``fine_tune`` in
``allowed_operations`` and ``updates.allowed`` (a federated reply is a weight update);
clipping and Gaussian noise on its update (Flower's ``LocalDpMod``) come from its policy's
``updates.noise``, else the protocol's ``update_noise``, and are charged to the study's
epsilon budget in its ledger (:mod:`site_agent.disclosure.update_release`).

Secure aggregation (SecAgg+) is not used, and this module cannot use it as built. In
Flower 1.42 SecAgg+ exists only in the legacy stack: ``flwr.server.workflow.
SecAggPlusWorkflow`` raises ``TypeError`` unless it is given a ``LegacyContext`` (a legacy
``flwr.server.strategy`` strategy with ``Parameters`` state), so it cannot wrap the
``flwr.serverapp.strategy`` FedAvg/FedProx used here; and ``flwr.client.mod.secaggplus_mod``
reads the site's reply as a legacy ``FitRes`` (``recorddict_to_fitres``), not the
``arrays``/``metrics`` records our train handler and disclosure gate exchange. Running it
would need a second, legacy federated path (legacy strategy, ``DefaultWorkflow`` with
SecAgg+ as its fit workflow, a FitIns/FitRes train handler), and the site's gate would then
see only masked vectors: it could no longer ledger the hash and L2 norm of the update it
releases, and the clipping and noise would have to run inside the masking mod. Until that
is built and tested, the coordinator sees each site's (clipped, noised if so configured)
update in the clear.

References
----------
H.B. McMahan, E. Moore, D. Ramage, S. Hampson, B. Agüera y Arcas (2017).
Communication-efficient learning of deep networks from decentralized data. AISTATS,
PMLR 54:1273-1282 (FedAvg). arXiv: 1602.05629
T. Li, A.K. Sahu, M. Zaheer, M. Sanjabi, A. Talwalkar, V. Smith (2020). Federated
optimization in heterogeneous networks. MLSys 2:429-450 (FedProx). arXiv: 1812.06127
"""

from __future__ import annotations

import hashlib
import time
import uuid
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np
from flwr.app import Array, ArrayRecord, ConfigRecord, Message, MetricRecord
from flwr.serverapp import Grid
from flwr.serverapp.strategy import FedAvg, FedProx
from pydantic import BaseModel, ConfigDict, Field

from coordinator.adaptation.requests import AdaptationRound, request_adaptation
from site_agent.contract.protocol import FederatedStrategy, Operation, StudyProtocol
from site_agent.contract.wire import SiteRequest
from site_agent.disclosure.update_release import UPDATE_RECORD, train_config
from site_agent.exceptions import DeploymentError, ProtocolError
from site_agent.training.local_training import State, get_state
from site_agent.training.model_bundle import load_bundle


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class FederatedRound(_Record):
    """One round of federated fine-tuning, as the coordinator saw it."""

    round_number: int
    sites_trained: list[str] = Field(description="Sites whose update was aggregated.")
    nodes_declined: list[int] = Field(description="Nodes that declined or failed.")
    nodes_silent: int = Field(default=0, description="Nodes with no reply before the timeout.")
    examples: int = Field(description="Sum of num-examples over the aggregated updates.")
    update_bytes: int = Field(description="Bytes of one site's update (array payload).")
    seconds: float = Field(description="Wall time from sending to aggregating.")


class FederatedRun(_Record):
    """A federated fine-tuning run and the sites' measurement of its final model."""

    strategy: str
    rounds: list[FederatedRound]
    final_weights_sha256: str
    final_weights: dict[str, list[float]] = Field(
        default_factory=dict, description="The federated model's weights, flattened, by name."
    )
    update_noise: bool = False
    evaluation: AdaptationRound | None = None


class _QuorumRounds:
    """Mixed into a Flower strategy: quorum per round and a record of every round."""

    quorum: int
    records: list[FederatedRound]
    _started: float
    _asked: int

    def _setup(self, quorum: int) -> None:
        self.quorum = quorum
        self.records = []
        self._started = time.perf_counter()
        self._asked = 0

    def configure_train(
        self, server_round: int, arrays: ArrayRecord, config: Any, grid: Grid
    ) -> Any:
        self._started = time.perf_counter()
        messages = list(super().configure_train(server_round, arrays, config, grid))  # type: ignore[misc]
        self._asked = len(messages)
        return messages

    def aggregate_train(
        self, server_round: int, replies: Iterable[Message]
    ) -> tuple[ArrayRecord | None, MetricRecord | None]:
        replies = list(replies)
        valid = [r for r in replies if not r.has_error()]
        declined = sorted(r.metadata.src_node_id for r in replies if r.has_error())
        if len(valid) < self.quorum:
            raise DeploymentError(
                f"federated round {server_round}: {len(valid)} sites sent an update, "
                f"the protocol's quorum is {self.quorum}"
            )
        arrays, metrics = super().aggregate_train(server_round, replies)  # type: ignore[misc]
        self.records.append(
            FederatedRound(
                round_number=server_round,
                sites_trained=sorted(_site(r) for r in valid),
                nodes_declined=declined,
                nodes_silent=max(self._asked - len(replies), 0),
                examples=sum(_examples(r) for r in valid),
                update_bytes=_bytes(valid[0]),
                seconds=time.perf_counter() - self._started,
            )
        )
        return arrays, metrics


class QuorumFedAvg(_QuorumRounds, FedAvg):
    """Flower's FedAvg with an explicit quorum per round."""

    def __init__(self, *, quorum: int, **kwargs: Any) -> None:
        FedAvg.__init__(self, **kwargs)
        self._setup(quorum)


class QuorumFedProx(_QuorumRounds, FedProx):
    """Flower's FedProx with an explicit quorum per round."""

    def __init__(self, *, quorum: int, **kwargs: Any) -> None:
        FedProx.__init__(self, **kwargs)
        self._setup(quorum)


def _site(reply: Message) -> str:
    record = reply.content.config_records.get(UPDATE_RECORD)
    name = record.get("site") if record is not None else None
    return name if isinstance(name, str) else f"node {reply.metadata.src_node_id}"


def _examples(reply: Message) -> int:
    record = next(iter(reply.content.metric_records.values()))
    value = record.get("num-examples")
    return int(value) if isinstance(value, int | float) else 0


def _bytes(reply: Message) -> int:
    return sum(len(a.data) for rec in reply.content.array_records.values() for a in rec.values())


def state_of(arrays: ArrayRecord) -> State:
    """Return an ArrayRecord's arrays as float32 numpy arrays, in order."""
    return {k: np.asarray(v.numpy(), dtype=np.float32) for k, v in arrays.items()}


def state_sha256(state: State) -> str:
    """Return the SHA-256 of a state's names and float32 bytes."""
    digest = hashlib.sha256()
    for name, value in state.items():
        digest.update(name.encode())
        digest.update(np.ascontiguousarray(value, dtype=np.float32).tobytes())
    return digest.hexdigest()


def build_strategy(protocol: StudyProtocol) -> QuorumFedAvg | QuorumFedProx:
    """Return the configured strategy for the protocol's plan (see module doc)."""
    plan = protocol.adaptation
    if plan is None:
        raise ProtocolError("the protocol has no adaptation plan")
    common: dict[str, Any] = {
        "fraction_train": 1.0,
        "fraction_evaluate": 0.0,
        "min_train_nodes": protocol.quorum,
        "min_evaluate_nodes": 0,
        "min_available_nodes": protocol.quorum,
    }
    if plan.strategy is FederatedStrategy.FEDPROX:
        return QuorumFedProx(quorum=protocol.quorum, proximal_mu=plan.proximal_mu, **common)
    return QuorumFedAvg(quorum=protocol.quorum, **common)


def run_federated(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes,
    *,
    evaluate: bool = True,
    evaluate_fn: Callable[[int, ArrayRecord], MetricRecord | None] | None = None,
) -> FederatedRun:
    """Run federated fine-tuning as the protocol's plan says; measure the result at the sites.

    ``evaluate_fn`` is handed to the strategy (called with each round's global weights);
    benchmarks use it in simulation, where the coordinator may see test data.

    Raises
    ------
    ProtocolError
        If the protocol lists no fine_tune operation, has no plan or names no model.
    DeploymentError
        If a round (or the final measurement) misses the quorum.
    """
    plan = protocol.adaptation
    if plan is None or Operation.FINE_TUNE not in protocol.operations or protocol.model is None:
        raise ProtocolError("federated fine-tuning needs fine_tune, an adaptation plan and a model")
    model = load_bundle(bundle, expected_sha256=protocol.model.sha256)
    initial = get_state(model.model)
    request = SiteRequest(
        operation=Operation.FINE_TUNE,
        protocol_json=protocol.canonical_json(),
        protocol_hash=protocol.content_hash(),
        round_number=1,
        request_id=uuid.uuid4().hex,
    )
    strategy = build_strategy(protocol)
    final = initial
    if plan.federated_rounds > 0:
        result = strategy.start(
            grid,
            ArrayRecord({k: Array(v) for k, v in initial.items()}),
            num_rounds=plan.federated_rounds,
            timeout=protocol.reply_timeout_s,
            train_config=train_config(request, bundle),
            evaluate_config=ConfigRecord(),
            evaluate_fn=evaluate_fn,
        )
        final = state_of(result.arrays)
    evaluation = request_adaptation(grid, protocol, bundle, weights=final) if evaluate else None
    return FederatedRun(
        strategy=plan.strategy.value,
        rounds=list(strategy.records),
        final_weights_sha256=state_sha256(final),
        final_weights={k: [float(x) for x in v.ravel()] for k, v in final.items()},
        update_noise=plan.update_noise is not None,
        evaluation=evaluation,
    )
