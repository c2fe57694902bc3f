"""A simulation scenario: invented hospitals, their case mix, shifts and readers.

A scenario is a hand-edited file (TOML, YAML or JSON, chosen by suffix) that says how a
public dataset is turned into synthetic sites. Every field is documented on the models
below; :func:`default_scenario` reads the packaged ``default_scenario.toml``.

Invented data for rehearsal only: the hospitals, vendors and readers are fictional.
"""

from __future__ import annotations

import json
import re
import tomllib
from datetime import date
from importlib import resources
from pathlib import Path
from typing import Any

import tomli_w
import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from site_agent.exceptions import ScenarioError

DEFAULT_SCENARIO_FILE = "default_scenario.toml"
DEFAULT_RESAMPLE_JITTER = 0.05
DEFAULT_DEVELOPMENT_SHARE = 0.5
_MIX_TOLERANCE = 1e-6
_SUFFIXES = {".toml": "toml", ".yaml": "yaml", ".yml": "yaml", ".json": "json"}


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


def _check_mix(mix: dict[str, float]) -> dict[str, float]:
    if not mix:
        raise ValueError("a mix needs at least one category")
    if any(not 0.0 <= p <= 1.0 for p in mix.values()):
        raise ValueError("mix proportions must lie in [0, 1]")
    if abs(sum(mix.values()) - 1.0) > _MIX_TOLERANCE:
        raise ValueError("mix proportions must sum to 1")
    return mix


class ReaderSpec(_Model):
    """A simulated human reader whose calls appear as column ``reader_<name>``."""

    name: str = Field(pattern=r"^[a-z][a-z0-9_]{0,39}$", description="Column suffix.")
    sensitivity: float = Field(gt=0.0, lt=1.0, description="P(positive call | disease).")
    specificity: float = Field(gt=0.0, lt=1.0, description="P(negative call | no disease).")
    ordinal: bool = Field(
        default=False,
        description=(
            "If true, the reader scores 1..5 (5 = most suspicious) and a score of 3 or more "
            "is a positive call at the stated sensitivity and specificity."
        ),
    )


class AcquisitionShift(_Model):
    """How a site's imaging chain alters measured features (see ``simulations.shifts``)."""

    intensity_gain: float = Field(
        default=1.0, gt=0.0, le=10.0, description="Multiplies intensity-like features."
    )
    intensity_offset: float = Field(
        default=0.0,
        ge=-10.0,
        le=10.0,
        description="Added to intensity-like features, in units of each feature's SD.",
    )
    texture_gain: float = Field(
        default=1.0, gt=0.0, le=10.0, description="Multiplies texture-like features."
    )
    noise_sd: float = Field(
        default=0.0,
        ge=0.0,
        le=5.0,
        description="Measurement noise on every feature, as a fraction of the feature's SD.",
    )
    shape_smoothing: float = Field(
        default=0.0,
        ge=0.0,
        lt=1.0,
        description="Fraction by which shape features are pulled toward their mean.",
    )
    corrupted_features: tuple[str, ...] = Field(
        default=(),
        max_length=30,
        description=(
            "Name fragments (e.g. 'worst', 'concave') of feature columns that this site's "
            "software computes unreliably; each matching column gets its own multiplicative error."
        ),
    )
    corruption_sd: float = Field(
        default=0.0,
        ge=0.0,
        le=10.0,
        description=(
            "SD of the log of a multiplicative error on corrupted features (0.5: values "
            "typically off by a factor of 0.6 to 1.6). Unlike gain and offset, no refit on a "
            "few cases can undo it: a model must learn to lean on other features instead."
        ),
    )

    @model_validator(mode="after")
    def _corruption_named(self) -> AcquisitionShift:
        if self.corruption_sd > 0 and not self.corrupted_features:
            raise ValueError("corruption_sd needs corrupted_features to name the columns")
        return self


class SiteSpec(_Model):
    """One synthetic hospital."""

    name: str = Field(min_length=1, max_length=80)
    code: str | None = Field(
        default=None,
        pattern=r"^[A-Z][A-Z0-9]{0,7}$",
        description="Prefix of case and patient ids; derived from the name's initials if unset.",
    )
    n_cases: int = Field(ge=2, le=1_000_000, description="Observations (not patients).")
    prevalence: float = Field(gt=0.0, lt=1.0, description="Fraction of cases with disease.")
    covariate_shift: float = Field(
        default=0.0,
        ge=-5.0,
        le=5.0,
        description=(
            "beta in the sampling weight exp(beta * z), z = standardised lesion size; "
            "positive favours larger lesions, negative smaller ones, within each class."
        ),
    )
    acquisition: AcquisitionShift = Field(default_factory=AcquisitionShift)
    vendor_mix: dict[str, float] = Field(default_factory=lambda: {"Vendor A": 1.0})
    field_strength_mix: dict[str, float] = Field(default_factory=lambda: {"1.5T": 1.0})
    sex_mix: dict[str, float] = Field(default_factory=lambda: {"F": 1.0})
    age_band_mix: dict[str, float] = Field(
        default_factory=lambda: {"<50": 0.35, "50-64": 0.4, "65+": 0.25}
    )
    observations_per_patient: float = Field(
        default=1.0, ge=1.0, le=10.0, description="Mean observations per patient."
    )
    readers: tuple[ReaderSpec, ...] = ()

    @field_validator("vendor_mix", "field_strength_mix", "sex_mix", "age_band_mix")
    @classmethod
    def _valid_mix(cls, v: dict[str, float]) -> dict[str, float]:
        return _check_mix(v)

    @field_validator("readers")
    @classmethod
    def _unique_readers(cls, v: tuple[ReaderSpec, ...]) -> tuple[ReaderSpec, ...]:
        if len({r.name for r in v}) != len(v):
            raise ValueError("reader names must be unique within a site")
        return v

    @property
    def slug(self) -> str:
        """File-name form of the site name (lower case, hyphens)."""
        return re.sub(r"[^a-z0-9]+", "-", self.name.lower()).strip("-") or "site"


class DriftEvent(_Model):
    """A change at one site from a given month on (see ``simulations.drift_events``).

    Every field left unset keeps the site's own value; cases acquired from the start of
    month ``from_month`` (1 = the scenario's first month) are drawn with the new values.
    """

    site: str = Field(description="Name of the site that changes.")
    from_month: int = Field(ge=2, le=240, description="First month (1-based) of the change.")
    description: str = Field(default="", max_length=200, description="What happened, in words.")
    acquisition: AcquisitionShift | None = Field(
        default=None, description="New acquisition shift (a scanner change)."
    )
    vendor_mix: dict[str, float] | None = Field(default=None, description="New vendor mix.")
    prevalence: float | None = Field(default=None, gt=0.0, lt=1.0, description="New prevalence.")

    @field_validator("vendor_mix")
    @classmethod
    def _valid_mix(cls, v: dict[str, float] | None) -> dict[str, float] | None:
        return None if v is None else _check_mix(v)


class Scenario(_Model):
    """A set of synthetic sites drawn from one public dataset."""

    seed: int = Field(ge=0, description="Seed of every random draw in the scenario.")
    start_date: date = Field(description="First acquisition date.")
    months: int = Field(ge=1, le=240, description="Acquisition dates span this many months.")
    development_site: str = Field(description="Name of the site where the model is developed.")
    development_share: float = Field(
        default=DEFAULT_DEVELOPMENT_SHARE,
        gt=0.0,
        lt=1.0,
        description=(
            "Fraction of public cases (stratified by label) reserved for the development "
            "site; the other sites draw only from the rest, so no external site holds a "
            "shifted copy of a training case."
        ),
    )
    resample_jitter: float = Field(
        default=DEFAULT_RESAMPLE_JITTER,
        ge=0.0,
        le=1.0,
        description="Gaussian jitter on resampled duplicates, as a fraction of feature SD.",
    )
    sites: tuple[SiteSpec, ...] = Field(min_length=1)
    drift_events: tuple[DriftEvent, ...] = Field(
        default=(), description="Changes at sites over time, for monitoring rehearsals."
    )
    pending_label_months: int = Field(
        default=0,
        ge=0,
        le=240,
        description="Labels of cases acquired in the last this-many months are still pending.",
    )

    @model_validator(mode="after")
    def _consistent(self) -> Scenario:
        names = [s.name for s in self.sites]
        if len(set(names)) != len(names):
            raise ValueError("site names must be unique")
        if any(e.site not in names for e in self.drift_events):
            raise ValueError("every drift event must name one of the sites")
        if any(e.from_month > self.months for e in self.drift_events):
            raise ValueError("a drift event must start within the scenario's months")
        if self.development_site not in names:
            raise ValueError("development_site must name one of the sites")
        if len({s.slug for s in self.sites}) != len(names):
            raise ValueError("site names must differ in more than punctuation and case")
        explicit = [s.code for s in self.sites if s.code is not None]
        if len(set(explicit)) != len(explicit):
            raise ValueError("site codes must be unique")
        return self

    @property
    def development_index(self) -> int:
        """Position of the development site in :attr:`sites`."""
        return [s.name for s in self.sites].index(self.development_site)

    def site_codes(self) -> tuple[str, ...]:
        """Return each site's id prefix: its ``code``, else unique initials of its name."""
        taken = {s.code for s in self.sites if s.code is not None}
        codes: list[str] = []
        for site in self.sites:
            if site.code is not None:
                codes.append(site.code)
                continue
            initials = "".join(w[0] for w in re.findall(r"[A-Za-z0-9]+", site.name)).upper()
            base = (initials if initials[:1].isalpha() else "S" + initials)[:6] or "S"
            code, k = base, 2
            while code in taken:
                code, k = f"{base}{k}", k + 1
            taken.add(code)
            codes.append(code)
        return tuple(codes)

    def with_sites(self, n: int) -> Scenario:
        """Return a scenario with ``n`` sites: the development site, then the others cycled.

        Copies beyond the first cycle get a numbered name (``"Riverside Clinic 2"``) and no
        explicit code; their shifts and case mix are those of their template. Used to scale
        benchmarks.
        """
        if n < 1:
            raise ScenarioError("with_sites: n must be at least 1")
        development = self.sites[self.development_index]
        others = [s for s in self.sites if s.name != self.development_site]
        templates = others or [development]
        chosen = [development]
        for k in range(n - 1):
            template = templates[k % len(templates)]
            cycle = k // len(templates) + (0 if others else 1)
            if cycle == 0:
                chosen.append(template)
            else:
                name = f"{template.name} {cycle + 1}"
                chosen.append(template.model_copy(update={"name": name, "code": None}))
        data = self.model_dump()
        data["sites"] = [site.model_dump() for site in chosen]
        return self._from_data(data)

    def to_text(self, fmt: str) -> str:
        """Serialise as ``"toml"``, ``"yaml"`` or ``"json"``."""
        data = self.model_dump(mode="json", exclude_none=True)
        if fmt == "json":
            return json.dumps(data, indent=2) + "\n"
        if fmt == "yaml":
            return str(yaml.safe_dump(data, sort_keys=False))
        if fmt == "toml":
            data["start_date"] = self.start_date
            return tomli_w.dumps(data)
        raise ScenarioError(f"unknown scenario format {fmt!r}; use toml, yaml or json")

    def dump(self, path: Path | str) -> None:
        """Write the scenario to ``path``; the suffix picks the format."""
        path = Path(path)
        try:
            path.write_text(self.to_text(_format_of(path)))
        except OSError as exc:
            raise ScenarioError(f"cannot write scenario file {path}: {exc.strerror}") from exc

    @classmethod
    def from_text(cls, text: str, fmt: str) -> Scenario:
        """Parse scenario text in the given format, raising :class:`ScenarioError` on defects."""
        try:
            if fmt == "toml":
                data: Any = tomllib.loads(text)
            elif fmt == "yaml":
                data = yaml.safe_load(text)
            elif fmt == "json":
                data = json.loads(text)
            else:
                raise ScenarioError(f"unknown scenario format {fmt!r}; use toml, yaml or json")
        except (tomllib.TOMLDecodeError, yaml.YAMLError, json.JSONDecodeError) as exc:
            raise ScenarioError(f"scenario is not valid {fmt.upper()}") from exc
        if not isinstance(data, dict):
            raise ScenarioError("scenario must be a table of fields at the top level")
        return cls._from_data(data)

    @classmethod
    def _from_data(cls, data: dict[str, Any]) -> Scenario:
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = _field_path(first["loc"])
            raise ScenarioError(f"scenario field {where}: {first['msg']}") from exc

    @classmethod
    def load(cls, path: Path | str) -> Scenario:
        """Read a scenario file; ``.toml``, ``.yaml``/``.yml`` or ``.json``."""
        path = Path(path)
        fmt = _format_of(path)
        try:
            text = path.read_text()
        except OSError as exc:
            raise ScenarioError(f"cannot read scenario file {path}: {exc.strerror}") from exc
        return cls.from_text(text, fmt)


def default_scenario() -> Scenario:
    """Return the packaged six-site rehearsal scenario (invented hospitals)."""
    text = resources.files("simulations").joinpath(DEFAULT_SCENARIO_FILE).read_text()
    return Scenario.from_text(text, "toml")


def _format_of(path: Path) -> str:
    try:
        return _SUFFIXES[path.suffix.lower()]
    except KeyError:
        raise ScenarioError(
            f"scenario file {path.name} must end in .toml, .yaml, .yml or .json"
        ) from None


def _field_path(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "(top level)"
