"""The study protocol: what a coordinator may ask of a site, fixed before the study starts.

A protocol is pre-registered: its content hash is what a site approves, and a request
whose protocol hash differs from an approved one is refused. The protocol is part of
the wire contract, so it lives in ``site_agent`` and the coordinator imports it.
"""

from __future__ import annotations

import hashlib
import json
from enum import StrEnum
from itertools import pairwise
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from site_agent.exceptions import ProtocolError

DEFAULT_THRESHOLDS: tuple[float, ...] = (0.5,)
DEFAULT_HISTOGRAM_BINS = 100
DEFAULT_CALIBRATION_BINS = 10
DEFAULT_REPLY_TIMEOUT_S = 300.0


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
        default_factory=lambda: uniform_edges(DEFAULT_HISTOGRAM_BINS),
        description="Fixed bin edges on [0, 1] for class-conditional score histograms.",
    )
    calibration_bins: int = Field(default=DEFAULT_CALIBRATION_BINS, ge=2, le=100)
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

    @field_validator("histogram_edges")
    @classmethod
    def _edges_cover_unit_interval(cls, v: tuple[float, ...]) -> tuple[float, ...]:
        if len(v) < 3:
            raise ValueError("histogram needs at least two bins")
        if v[0] != 0.0 or v[-1] != 1.0:
            raise ValueError("histogram edges must start at 0 and end at 1")
        if any(b <= a for a, b in pairwise(v)):
            raise ValueError("histogram edges must increase strictly")
        return v


class ModelReference(_Frozen):
    """The model under study, identified by the SHA-256 of its bundle file."""

    name: str
    architecture: str
    sha256: str = Field(pattern=r"^[0-9a-f]{64}$")


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

    @model_validator(mode="after")
    def _operations_not_empty(self) -> StudyProtocol:
        if not self.operations:
            raise ValueError("a protocol needs at least one operation")
        return self

    def canonical_json(self) -> str:
        """Return the protocol as JSON with sorted keys and no whitespace (what is hashed)."""
        return json.dumps(self.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))

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
