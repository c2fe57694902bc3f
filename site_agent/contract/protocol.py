"""The study protocol: what a coordinator may ask of a site, fixed before the study starts.

A protocol is pre-registered: its content hash is what a site approves, and a request
whose protocol hash differs from an approved one is refused. The protocol is part of
the wire contract, so it lives in ``site_agent`` and the coordinator imports it.
"""

from __future__ import annotations

import hashlib
import json
from datetime import date
from enum import StrEnum
from itertools import pairwise
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from site_agent.contract.score_scales import logit_edges
from site_agent.exceptions import ProtocolError

DEFAULT_THRESHOLDS: tuple[float, ...] = (0.5,)
DEFAULT_HISTOGRAM_BINS = 100
DEFAULT_CALIBRATION_BINS = 10
DEFAULT_REPLY_TIMEOUT_S = 300.0
DEFAULT_WINDOW_MONTHS = 1
DEFAULT_BASELINE_WINDOWS = 3
DEFAULT_LABEL_HORIZON_MONTHS = 12
"""Months after a window closes during which its pending labels are still awaited (our
default: a year covers biopsy and most follow-up confirmations). Part of the hash contract:
a plan at this value hashes as one written before the field existed, so never change it."""
MAX_WINDOWS = 240


def uniform_edges(bins: int) -> tuple[float, ...]:
    """Return ``bins + 1`` equally spaced edges on [0, 1], rounded to avoid float noise."""
    return tuple(round(i / bins, 12) for i in range(bins + 1))


class Operation(StrEnum):
    """Operations a protocol may ask of a site; a site's policy allows a subset."""

    EVALUATE = "evaluate"
    FINE_TUNE = "fine_tune"
    MONITOR = "monitor"


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class EvaluationPlan(_Frozen):
    """Which aggregate statistics a site computes in an evaluation round."""

    thresholds: tuple[float, ...] = Field(
        default=DEFAULT_THRESHOLDS, description="Score thresholds for confusion counts."
    )
    histogram_edges: tuple[float, ...] = Field(
        default_factory=lambda: logit_edges(DEFAULT_HISTOGRAM_BINS),
        description="Fixed bin edges on [0, 1] for class-conditional score histograms "
        "(default: equal steps of log-odds, see site_agent.contract.score_scales).",
    )
    calibration_bins: int = Field(default=DEFAULT_CALIBRATION_BINS, ge=2, le=100)
    calibration_edges: tuple[float, ...] | None = Field(
        default=None,
        description="Fixed calibration bin edges on [0, 1]; None: calibration_bins equal "
        "bins. Edges that are also histogram edges add no cut to the release's score "
        "partition (site_agent.disclosure.partition), so fewer cuts are withheld.",
    )
    subgroups: tuple[str, ...] = Field(
        default=(), description="Case attribute columns to report subgroups by."
    )

    @field_validator("thresholds")
    @classmethod
    def _thresholds_in_unit_interval(cls, v: tuple[float, ...]) -> tuple[float, ...]:
        if not v:
            raise ValueError("at least one threshold is needed")
        if any(not 0.0 <= t <= 1.0 for t in v):
            raise ValueError("thresholds must lie in [0, 1]")
        return tuple(sorted(set(v)))

    @field_validator("histogram_edges", "calibration_edges")
    @classmethod
    def _edges_cover_unit_interval(cls, v: tuple[float, ...] | None) -> tuple[float, ...] | None:
        if v is None:
            return v
        if len(v) < 3:
            raise ValueError("bin edges need at least two bins")
        if v[0] != 0.0 or v[-1] != 1.0:
            raise ValueError("bin edges must start at 0 and end at 1")
        if any(b <= a for a, b in pairwise(v)):
            raise ValueError("bin edges must increase strictly")
        return v

    def calibration_bin_edges(self) -> tuple[float, ...]:
        """Return the calibration bin edges: the fixed ones, else equal bins."""
        return self.calibration_edges or uniform_edges(self.calibration_bins)


class ModelReference(_Frozen):
    """The model under study, identified by the SHA-256 of its bundle file."""

    name: str
    architecture: str
    sha256: str = Field(pattern=r"^[0-9a-f]{64}$")


class MonitoringPlan(_Frozen):
    """Repeated evaluation of each site over consecutive time windows of ``acquired_on``.

    Window ``i`` (from 0) covers ``[first_window_start + i·window_months,
    first_window_start + (i+1)·window_months)`` in calendar months. The first
    ``baseline_windows`` windows are each site's reference for drift.
    """

    first_window_start: date = Field(description="Start of the first window (inclusive).")
    window_months: int = Field(default=DEFAULT_WINDOW_MONTHS, ge=1, le=24)
    windows: int = Field(ge=2, le=MAX_WINDOWS, description="Number of consecutive windows.")
    baseline_windows: int = Field(default=DEFAULT_BASELINE_WINDOWS, ge=1)
    mix_attributes: tuple[str, ...] = Field(
        default=(), description="Case attributes whose level counts a window release carries."
    )
    label_horizon_months: int = Field(
        default=DEFAULT_LABEL_HORIZON_MONTHS,
        ge=0,
        le=120,
        description="Months after a window's end during which a window with pending labels "
        "is asked again; later its stored release is final.",
    )

    @model_validator(mode="after")
    def _baseline_before_end(self) -> MonitoringPlan:
        if self.baseline_windows >= self.windows:
            raise ValueError("baseline_windows must be fewer than windows")
        return self


class FederatedStrategy(StrEnum):
    """How federated fine-tuning aggregates the sites' updates (Flower's strategies)."""

    FEDAVG = "fedavg"
    FEDPROX = "fedprox"


class UpdateNoise(_Frozen):
    """Clipping and Gaussian noise on each site's weight update (Flower's ``LocalDpMod``)."""

    clipping_norm: float = Field(gt=0, description="L2 bound on a site's update.")
    sensitivity: float = Field(ge=0)
    epsilon: float = Field(gt=0)
    delta: float = Field(gt=0, lt=1)


class AdaptationPlan(_Frozen):
    """Site-local and federated fine-tuning of the model under study (operation fine_tune).

    Each site splits its labelled cases once, by patient and stratified by label, with
    ``seed`` into a local training pool and a held-out test set (``test_fraction`` of
    patients). Fine-tuning only ever sees the pool; every metric is computed on the test set.
    For each count in ``case_counts`` (and the whole pool when ``include_all``) and each of
    ``repeats`` seeds, the site draws that many pool cases by whole patients and fine-tunes
    for ``epochs`` full-batch steps with an L2 pull towards the starting weights. No model
    selection happens anywhere: the number of steps is fixed here, in advance.
    """

    case_counts: tuple[int, ...] = Field(
        default=(0, 10, 25, 50, 100), description="Local training cases to try (0: none)."
    )
    include_all: bool = Field(default=True, description="Also fine-tune on the whole pool.")
    repeats: int = Field(default=5, ge=1, le=50, description="Seeds per case count.")
    seed: int = Field(default=0, ge=0, description="Seeds the split; repeat r uses seed + r.")
    test_fraction: float = Field(default=0.4, gt=0.0, lt=1.0)
    epochs: int = Field(default=100, ge=1, le=10_000, description="Full-batch steps.")
    learning_rate: float = Field(default=0.01, gt=0.0, le=10.0)
    l2_to_initial: float = Field(default=1.0, ge=0.0, description="Pull to start weights.")
    margin: float = Field(
        default=0.02, ge=0.0, lt=1.0, description="AUC margin to the development site."
    )
    federated_rounds: int = Field(default=10, ge=0, le=1000)
    local_epochs: int = Field(default=10, ge=1, le=10_000, description="Steps per round.")
    strategy: FederatedStrategy = FederatedStrategy.FEDAVG
    proximal_mu: float = Field(default=0.1, ge=0.0, description="FedProx only.")
    update_noise: UpdateNoise | None = None

    @field_validator("case_counts")
    @classmethod
    def _counts(cls, v: tuple[int, ...]) -> tuple[int, ...]:
        if any(n < 0 for n in v):
            raise ValueError("case counts must be non-negative")
        return tuple(sorted(set(v)))


class StudyProtocol(_Frozen):
    """A pre-registered multi-site study protocol."""

    study_id: str = Field(min_length=1, max_length=80, pattern=r"^[A-Za-z0-9._-]+$")
    title: str = Field(min_length=1, max_length=300)
    model: ModelReference | None = Field(
        default=None, description="None when sites supply their own model scores."
    )
    evaluation: EvaluationPlan = Field(default_factory=EvaluationPlan)
    operations: tuple[Operation, ...] = (Operation.EVALUATE,)
    rounds: int = Field(default=1, ge=1)
    quorum: int = Field(default=2, ge=1, description="Minimum sites that must reply.")
    reply_timeout_s: float = Field(default=DEFAULT_REPLY_TIMEOUT_S, gt=0)
    monitoring: MonitoringPlan | None = Field(
        default=None, description="Windowed monitoring rounds; None for a one-off evaluation."
    )
    adaptation: AdaptationPlan | None = Field(
        default=None, description="Fine-tuning plan; needed by the fine_tune operation."
    )

    @model_validator(mode="after")
    def _operations_not_empty(self) -> StudyProtocol:
        if not self.operations:
            raise ValueError("a protocol needs at least one operation")
        if self.monitoring is not None and self.rounds < self.monitoring.windows:
            raise ValueError("a monitoring protocol needs at least one round per window")
        return self

    def canonical_json(self) -> str:
        """Return the protocol as JSON with sorted keys and no whitespace (what is hashed).

        A protocol without monitoring (or adaptation) leaves that key out, a monitoring plan
        leaves out a label horizon at its default, and an evaluation plan leaves out
        calibration edges it does not fix, so protocols written before these fields existed
        keep their hash (and their sites' approvals).
        """
        data = self.model_dump(mode="json")
        if self.evaluation.calibration_edges is None:
            del data["evaluation"]["calibration_edges"]
        if self.monitoring is None:
            del data["monitoring"]
        elif self.monitoring.label_horizon_months == DEFAULT_LABEL_HORIZON_MONTHS:
            del data["monitoring"]["label_horizon_months"]
        if self.adaptation is None:
            del data["adaptation"]
        return json.dumps(data, sort_keys=True, separators=(",", ":"))

    def content_hash(self) -> str:
        """Return the SHA-256 hex digest of :meth:`canonical_json`."""
        return hashlib.sha256(self.canonical_json().encode()).hexdigest()

    @classmethod
    def from_json(cls, text: str) -> StudyProtocol:
        """Parse a protocol from JSON, raising :class:`ProtocolError` on any defect."""
        try:
            return cls.model_validate_json(text)
        except ValidationError as exc:
            raise ProtocolError(f"invalid study protocol: {exc.errors()[0]['msg']}") from exc

    @classmethod
    def load(cls, path: Path) -> StudyProtocol:
        """Read a protocol JSON file."""
        try:
            text = Path(path).read_text()
        except OSError as exc:
            raise ProtocolError(f"cannot read protocol file {path}: {exc.strerror}") from exc
        return cls.from_json(text)
