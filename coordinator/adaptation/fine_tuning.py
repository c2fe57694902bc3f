"""The fine-tuning stage of a study: site-local adaptation, then federated rounds.

Run by the ServerApp after the evaluation rounds when the protocol lists ``fine_tune``:
first every site fine-tunes on the plan's grid of local case counts and seeds and releases
performance before and after (:func:`coordinator.adaptation.requests.request_adaptation`),
then the sites fine-tune together through Flower's strategies and measure the federated
model (:func:`coordinator.adaptation.federated.run_federated`). Both use the same held-out
test set at each site, the one the site's split (seeded by the plan) sets aside.

:func:`add_fine_tuning` carries the outcome into the study results: the adaptation curves
(:func:`coordinator.adaptation.curves.adaptation_rows`), the smallest adequate case counts and the
reference lines per site (no adaptation, site-local, federated and, in simulation only,
centralized training on the pooled data), with plain-language findings: for every
degraded site, the paired DeLong change of AUC that local adaptation brought
(:func:`change_findings`).
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping

from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict

from coordinator.adaptation.curves import (
    AUC_CHANGE,
    POOLED,
    adaptation_rows,
    adequate_cases,
    count_label,
)
from coordinator.adaptation.federated import FederatedRun, run_federated
from coordinator.adaptation.requests import AdaptationRound, request_adaptation
from coordinator.pooling.study_results import (
    AdaptationRow,
    AdequateCases,
    ReferenceLine,
    StudyResults,
)
from site_agent.contract.protocol import StudyProtocol
from site_agent.contract.release import AucRecord


class FineTuningOutcome(BaseModel):
    """What the fine-tuning stage produced."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)

    local: AdaptationRound
    federated: FederatedRun | None = None


def run_fine_tuning(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes,
    seconds: dict[str, float] | None = None,
) -> FineTuningOutcome:
    """Run site-local adaptation, then (if the plan asks for rounds) federated fine-tuning.

    ``seconds``, if given, receives the wall time of ``site_local`` and ``federated``.

    Raises
    ------
    ProtocolError
        If the protocol lacks the fine_tune operation, the plan or the model.
    DeploymentError
        If fewer sites than the quorum take part in a step.
    """
    timed = seconds if seconds is not None else {}
    started = time.perf_counter()
    local = request_adaptation(grid, protocol, bundle)
    timed["site_local"] = time.perf_counter() - started
    plan = protocol.adaptation
    started = time.perf_counter()
    federated = (
        run_federated(grid, protocol, bundle)
        if plan is not None and plan.federated_rounds > 0
        else None
    )
    timed["federated"] = time.perf_counter() - started
    return FineTuningOutcome(local=local, federated=federated)


REFERENCE_LINES = ("none", "site-local", "federated", "centralized")
"""The four reference lines, in report order (centralized exists only in simulation)."""


def reference_auc(results: StudyResults) -> float:
    """Return the development site's DeLong AUC from the evaluation round (NaN if absent)."""
    development = {s.site for s in results.sites if s.role == "development"}
    for row in results.metrics:
        if (
            row.site in development
            and row.metric == "auc"
            and row.method == "delong"
            and row.subgroup is None
        ):
            return row.estimate
    return math.nan


def add_fine_tuning(
    results: StudyResults,
    protocol: StudyProtocol,
    outcome: FineTuningOutcome,
    *,
    centralized: Mapping[str, AucRecord] | None = None,
) -> StudyResults:
    """Return ``results`` with the fine-tuning stage's curves, lines and findings added.

    Adds the adaptation curves, the smallest adequate case counts and the reference lines.

    ``centralized`` holds, per site, the AUC on its held-out test set of a model trained on
    all sites' pooled training pools; only a simulation can compute it.
    """
    plan = protocol.adaptation
    if plan is None:
        return results
    thresholds = protocol.evaluation.thresholds
    rows = adaptation_rows(outcome.local.releases, thresholds)
    reference = reference_auc(results)
    adequate = adequate_cases(rows, reference, plan.margin)
    lines = _reference_lines(rows, outcome, centralized or {})
    findings = [
        *results.findings,
        *_findings(lines, adequate, reference, plan.margin),
        *change_findings(rows, lines, reference, plan.margin),
    ]
    return results.model_copy(
        update={
            "adaptation": rows,
            "adequate_cases": adequate,
            "reference_lines": lines,
            "findings": findings,
        }
    )


def _auc_line(site: str, line: str, record: AucRecord) -> ReferenceLine:
    nan = math.nan
    return ReferenceLine(
        site=site,
        line=line,
        estimate=nan if record.auc is None else record.auc,
        lower=nan if record.lower is None else record.lower,
        upper=nan if record.upper is None else record.upper,
        method="delong",
        n=record.n_positive + record.n_negative,
        reason=record.reason,
    )


def _reference_lines(
    rows: list[AdaptationRow], outcome: FineTuningOutcome, centralized: Mapping[str, AucRecord]
) -> list[ReferenceLine]:
    lines = []
    for site, release in outcome.local.releases.items():
        lines.append(_auc_line(site, "none", release.before.auc))
        curve = [r for r in rows if r.site == site and r.metric == "auc"]
        if curve:
            last = curve[-1]  # the whole pool when the plan includes it, else the largest n
            lines.append(
                ReferenceLine(
                    site=site,
                    line="site-local",
                    estimate=last.estimate,
                    lower=last.lower,
                    upper=last.upper,
                    method=f"{last.method} (n = {count_label(last.n_cases)})",
                    n=release.n_test,
                    reason=last.reason,
                )
            )
        federated = outcome.federated
        if federated is not None and federated.evaluation is not None:
            measured = federated.evaluation.releases.get(site)
            if measured is not None:
                lines.append(_auc_line(site, "federated", measured.before.auc))
        if site in centralized:
            lines.append(_auc_line(site, "centralized", centralized[site]))
    return lines


def degraded_sites(lines: list[ReferenceLine], reference: float, margin: float) -> list[str]:
    """Return the sites whose AUC without adaptation is below ``reference − margin``.

    Without a defined reference AUC, every site with a defined AUC counts.
    """
    out = []
    for row in lines:
        if row.line != "none" or not math.isfinite(row.estimate):
            continue
        if not math.isfinite(reference) or row.estimate < reference - margin:
            out.append(row.site)
    return sorted(out)


def change_findings(
    rows: list[AdaptationRow], lines: list[ReferenceLine], reference: float, margin: float
) -> list[str]:
    """Return one finding per degraded site: the AUC change local adaptation brought.

    The change is that of the site-local line's case count (the whole pool when the plan
    includes it, else the largest count): the paired DeLong difference after − before on
    the site's held-out test set, combined over seeds by Rubin's rules.
    """
    out = []
    for site in degraded_sites(lines, reference, margin):
        changes = [r for r in rows if r.site == site and r.metric == AUC_CHANGE]
        if not changes or not math.isfinite(changes[-1].estimate):
            continue
        row = changes[-1]
        # Only an interval wholly on one side of 0 shows a direction.
        if row.lower > 0 or row.upper < 0:
            verb = "raised" if row.estimate > 0 else "lowered"
            said = f"{verb} AUC at {site} by {abs(row.estimate):.3f}"
        else:
            said = (
                f"did not measurably change AUC at {site}: {row.estimate:+.3f}, an interval "
                "that includes no change"
            )
        out.append(
            f"Local adaptation {said} (95% CI {row.lower:+.3f} to {row.upper:+.3f}; paired "
            f"DeLong on its held-out test set, n = {count_label(row.n_cases)} local cases, "
            f"{row.repeats} seeds)."
        )
    return out


def _ci(row: ReferenceLine) -> str:
    return f"{row.estimate:.3f} (95% CI {row.lower:.3f} to {row.upper:.3f})"


def _findings(
    lines: list[ReferenceLine], adequate: list[AdequateCases], reference: float, margin: float
) -> list[str]:
    by_site: dict[str, dict[str, ReferenceLine]] = {}
    for row in lines:
        by_site.setdefault(row.site, {})[row.line] = row
    base = {
        s: v["none"]
        for s, v in by_site.items()
        if "none" in v and math.isfinite(v["none"].estimate)
    }
    out = []
    if base:
        worst = min(base, key=lambda s: base[s].estimate)
        parts = [
            f"At the most degraded site, {worst}, the AUC without adaptation was {_ci(base[worst])}"
        ]
        for line, words in (
            ("site-local", "site-local fine-tuning on its training pool gave"),
            ("federated", "federated fine-tuning gave"),
            ("centralized", "training on all sites' pooled data (simulation only) gave"),
        ):
            found = by_site[worst].get(line)
            if found is not None and math.isfinite(found.estimate):
                change = found.estimate - base[worst].estimate
                parts.append(f"{words} {_ci(found)}, a change of {change:+.3f}")
        out.append("; ".join(parts) + ".")
    needs = [a for a in adequate if a.site != POOLED]
    if needs and math.isfinite(reference):
        said = []
        for a in needs:
            if a.n_cases is not None:
                said.append(f"{a.site}: {a.n_cases}")
            elif a.whole_pool:
                said.append(f"{a.site}: the whole pool")
            else:
                said.append(f"{a.site}: not reached")
        out.append(
            f"Local cases needed to come within {margin:.2f} AUC of the development site "
            f"({reference:.3f}), judged on the mean over seeds: " + "; ".join(said) + "."
        )
    return out
