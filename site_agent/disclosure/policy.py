"""The site's disclosure policy: what a hospital lets leave, written by the hospital.

A policy is a local file (TOML or JSON) that the site edits by hand; the coordinator
never sends or sees it. :func:`policy_json_schema` exports its JSON Schema for editors.

Example (TOML)::

    min_cell = 5
    small_cells = "merge"
    allowed_operations = ["evaluate"]
    allowed_subgroup_attributes = ["sex", "scanner_vendor"]
    allowed_coordinators = ["harbourview-imaging-consortium"]
    approvals_file = "approvals.json"
    history_scope = "site"   # compare each release with every earlier one, any study

    [privacy]
    enabled = true
    study_epsilon = 2.0
    release_epsilon = 0.5

    [updates]                # weight updates (site-local or federated fine-tuning)
    allowed = true
    noise = { clipping_norm = 1.0, sensitivity = 1.0, epsilon = 0.5, delta = 1e-5 }
"""

from __future__ import annotations

import json
import tomllib
from collections.abc import Mapping, Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from site_agent.contract.adaptation_release import ThresholdPerformance
from site_agent.contract.node_config import DEFAULT_APPROVALS_FILE
from site_agent.contract.protocol import Operation, UpdateNoise
from site_agent.exceptions import InputError
from site_agent.statistics.censored import Cell, CensoredCount, censor_pair
from site_agent.statistics.summaries import ConfusionCounts

# Smallest count a site releases for any cell, bin or subgroup. Thresholds between 3 and
# 11 are common practice in statistical disclosure control of health tables; 5 is a
# frequent default (common practice, no single source).
DEFAULT_MIN_CELL = 5
DEFAULT_STUDY_EPSILON = 1.0
DEFAULT_RELEASE_EPSILON = 0.25


class SmallCellAction(StrEnum):
    """What the site does with a histogram bin below ``min_cell``.

    Counts that are not histogram bins (confusion cells, subgroup sizes) are always
    suppressed or refused; merging only applies to ordered histogram bins.
    """

    SUPPRESS = "suppress"
    MERGE = "merge"


class HistoryScope(StrEnum):
    """Which earlier releases a new release is compared with (release history rule)."""

    STUDY = "study"
    """Earlier releases of the same study."""
    SITE = "site"
    """Every earlier release of the site, whatever the study."""


class NoiseMechanism(StrEnum):
    """Noise mechanisms the site can add to released counts."""

    DISCRETE_LAPLACE = "discrete_laplace"


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class PrivacySettings(_Frozen):
    """Differential privacy applied to released counts and histogram bins."""

    enabled: bool = Field(default=False, description="Add calibrated noise to released counts.")
    study_epsilon: float = Field(
        default=DEFAULT_STUDY_EPSILON,
        gt=0,
        description="Total epsilon one study may spend at this site (sequential composition).",
    )
    release_epsilon: float = Field(
        default=DEFAULT_RELEASE_EPSILON, gt=0, description="Epsilon spent by one release."
    )
    mechanism: NoiseMechanism = NoiseMechanism.DISCRETE_LAPLACE

    @model_validator(mode="after")
    def _release_fits_in_study(self) -> PrivacySettings:
        if self.release_epsilon > self.study_epsilon:
            raise ValueError("release_epsilon must not exceed study_epsilon")
        return self


class UpdateRelease(_Frozen):
    """Whether model weight updates may leave the site, and the noise put on them.

    Off by default. ``allowed`` covers both kinds of update: the one a site-local
    fine-tuning request asks for beside its metrics, and every reply to a federated round
    (which *is* an update). Federated participation therefore needs ``fine_tune`` in
    ``allowed_operations`` **and** ``allowed = true``; either one missing declines it.

    ``noise``, when set, clips every released update to ``clipping_norm`` in L2 norm and
    adds Gaussian noise of standard deviation ``sensitivity · √(2 ln(1.25/δ)) / ε``
    (Flower's ``LocalDpMod``); it takes precedence over the protocol's ``update_noise``.
    Each noisy update charges ``epsilon`` to the study's budget at the site
    (``privacy.study_epsilon``), whether or not noise on counts is on.
    """

    allowed: bool = Field(default=False, description="Let weight updates leave the site.")
    noise: UpdateNoise | None = Field(
        default=None, description="Clipping and Gaussian noise on every released update."
    )

    @model_validator(mode="after")
    def _noise_is_noise(self) -> UpdateRelease:
        if self.noise is not None and self.noise.sensitivity <= 0:
            raise ValueError("update noise needs a positive sensitivity")
        return self


class SitePolicy(_Frozen):
    """A hospital's disclosure policy; every reply from the site is checked against it."""

    min_cell: int = Field(
        default=DEFAULT_MIN_CELL,
        ge=1,
        description="Smallest nonzero count released for any cell, bin or subgroup.",
    )
    small_cells: SmallCellAction = Field(
        default=SmallCellAction.SUPPRESS,
        description="Suppress small histogram bins, or merge them with adjacent bins.",
    )
    allowed_operations: tuple[Operation, ...] = Field(
        default=(Operation.EVALUATE,), description="Operations a protocol may ask of the site."
    )
    allowed_subgroup_attributes: tuple[str, ...] = Field(
        default=(), description="Case attributes the site agrees to report subgroups by."
    )
    allowed_coordinators: tuple[str, ...] = Field(
        default=(),
        description=(
            "Coordinator names allowed to ask; empty allows any coordinator that reaches the "
            "site through its authenticated connection."
        ),
    )
    history_scope: HistoryScope = Field(
        default=HistoryScope.STUDY,
        description=(
            "Compare a new release with the site's earlier releases of the same study, "
            "or with all of them (across studies)."
        ),
    )
    privacy: PrivacySettings = Field(default_factory=PrivacySettings)
    updates: UpdateRelease = Field(default_factory=UpdateRelease)
    approvals_file: Path = Field(
        default=DEFAULT_APPROVALS_FILE,
        description="The site's approvals file; a relative path is read beside the policy file.",
    )

    @classmethod
    def from_text(cls, text: str, *, suffix: str) -> SitePolicy:
        """Parse a policy from TOML (``suffix == ".toml"``) or JSON text.

        Raises
        ------
        InputError
            If the text does not parse or does not validate.
        """
        try:
            data: Any = tomllib.loads(text) if suffix == ".toml" else json.loads(text)
        except (tomllib.TOMLDecodeError, json.JSONDecodeError) as exc:
            raise InputError(f"site policy does not parse: {exc}") from exc
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"]) or "policy"
            raise InputError(f"invalid site policy at {where}: {first['msg']}") from exc

    @classmethod
    def load(cls, path: Path) -> SitePolicy:
        """Read a policy file; ``.toml`` is read as TOML, anything else as JSON."""
        path = Path(path)
        try:
            text = path.read_text()
        except OSError as exc:
            raise InputError(f"cannot read site policy {path}: {exc.strerror}") from exc
        policy = cls.from_text(text, suffix=path.suffix.lower())
        if not policy.approvals_file.is_absolute():
            policy = policy.model_copy(
                update={"approvals_file": path.parent / policy.approvals_file}
            )
        return policy


_CLASS_PARTNER = {"tp": "fn", "fn": "tp", "fp": "tn", "tn": "fp"}


def suppressed_confusion_cells(cells: Mapping[str, int], min_cell: int) -> tuple[str, ...]:
    """Return the confusion cells (``tp``, ``fp``, ``fn``, ``tn``) that must be suppressed.

    Each small cell (1 to ``min_cell`` − 1) goes, and so does its partner in the same class
    (``tp`` with ``fn``, ``fp`` with ``tn``): the class totals are released beside the
    cells, so a small cell suppressed alone would be its class total minus its partner
    (complementary suppression, common practice in statistical disclosure control).
    """
    small = {k for k, v in cells.items() if 0 < v < min_cell}
    small |= {_CLASS_PARTNER[k] for k in small}
    return tuple(k for k in cells if k in small)


def exact_cells(c: ConfusionCounts | ThresholdPerformance) -> dict[str, int]:
    """Return the four confusion cells of a release not yet controlled (all exact).

    Raises
    ------
    InputError
        When a cell is already censored (the control runs once, on exact counts).
    """
    cells = {"tp": c.tp, "fp": c.fp, "fn": c.fn, "tn": c.tn}
    exact = {k: v for k, v in cells.items() if not isinstance(v, CensoredCount)}
    if len(exact) != len(cells):
        raise InputError("confusion cells are already censored")
    return exact


def censored_cells(
    cells: Mapping[str, int], small: Sequence[str], min_cell: int
) -> dict[str, Cell]:
    """Return the cells with each suppressed one (``small``) marked censored, never 0.

    Each suppressed class pair becomes two :class:`CensoredCount` (what is known: the small
    cell lies in 1..m−1; the class total), see
    :func:`site_agent.statistics.censored.censor_pair`.
    """
    out: dict[str, Cell] = dict(cells)
    for a, b in (("tp", "fn"), ("fp", "tn")):
        if a not in small or a not in cells or b not in cells:
            continue
        primary, partner = (a, b) if 0 < cells[a] < min_cell else (b, a)
        out[primary], out[partner] = censor_pair(cells[primary], cells[partner], min_cell)
    return out


def policy_json_schema() -> dict[str, Any]:
    """Return the JSON Schema of :class:`SitePolicy` for editors and validators."""
    return SitePolicy.model_json_schema()
