"""Drift injected into synthetic sites over time, and reference standards still pending.

A scenario's :class:`~simulations.scenario.DriftEvent` says that one site changes from a
given month on: a new scanner (acquisition shift and vendor mix) or a different case mix
(prevalence). :func:`build_drifting_sites` builds every site as usual, then, for each
event in month order, builds the changed site (same generator stream, changed spec) and
keeps the original cases acquired before the event's month and the changed site's cases
from that month on. Case and patient ids of the later part get a suffix, so no id is
shared between the two parts, and the site's count of resampled duplicates is that of the
rows it keeps from each part (not the sum of both whole tables).

:func:`with_pending_labels` writes a site's table as it stands on a given day: the label
of every case acquired in the ``pending_label_months`` months before that day is blank,
as a hospital whose biopsy or follow-up results have not come back yet would have it.
On the day the scenario ends, the last ``pending_label_months`` months are pending; that
many months later, every label has come back.

Invented data for rehearsal only.
"""

from __future__ import annotations

import dataclasses
from datetime import date

import pandas as pd

from simulations.dataset import FeatureTable
from simulations.scenario import DriftEvent, Scenario, SiteSpec
from simulations.sites import SyntheticSite, build_sites


def event_start(scenario: Scenario, event: DriftEvent) -> pd.Timestamp:
    """Return the first day of the event's month."""
    return pd.Timestamp(scenario.start_date) + pd.DateOffset(months=event.from_month - 1)


def changed_spec(spec: SiteSpec, event: DriftEvent) -> SiteSpec:
    """Return the site's spec with the event's changes applied."""
    update: dict[str, object] = {}
    if event.acquisition is not None:
        update["acquisition"] = event.acquisition
    if event.vendor_mix is not None:
        update["vendor_mix"] = event.vendor_mix
    if event.prevalence is not None:
        update["prevalence"] = event.prevalence
    return spec.model_copy(update=update)


def build_drifting_sites(scenario: Scenario, dataset: FeatureTable) -> list[SyntheticSite]:
    """Build the scenario's sites with every drift event spliced in at its month.

    Raises
    ------
    ScenarioError
        As :func:`simulations.sites.build_sites`.
    """
    sites = build_sites(scenario, dataset)
    specs = list(scenario.sites)
    names = [s.name for s in specs]
    ordered = sorted(scenario.drift_events, key=lambda e: e.from_month)
    for number, event in enumerate(ordered, start=1):
        i = names.index(event.site)
        specs[i] = changed_spec(specs[i], event)
        changed = build_sites(scenario.model_copy(update={"sites": tuple(specs)}), dataset)[i]
        cutoff = event_start(scenario, event).strftime("%Y-%m-%d")
        before = sites[i].table[sites[i].table["acquired_on"] < cutoff]
        after = changed.table[changed.table["acquired_on"] >= cutoff].copy()
        # Count only the duplicates each part keeps: the site's whole table and the
        # changed site's whole table each hold their own, but only one part of each is used.
        kept = {c for c in before["case_id"] if c in sites[i].resampled_ids}
        kept |= {f"{c}-E{number}" for c in after["case_id"] if c in changed.resampled_ids}
        after["case_id"] = after["case_id"] + f"-E{number}"
        after["patient_id"] = after["patient_id"] + f"-E{number}"
        table = pd.concat([before, after], ignore_index=True)
        sites[i] = dataclasses.replace(
            sites[i],
            table=table,
            n_resampled=len(kept),
            spec=specs[i],
            resampled_ids=frozenset(kept),
        )
    return sites


def scenario_end(scenario: Scenario) -> date:
    """Return the day after the scenario's last month (the end of its last window)."""
    end: date = (pd.Timestamp(scenario.start_date) + pd.DateOffset(months=scenario.months)).date()
    return end


def with_pending_labels(
    table: pd.DataFrame, scenario: Scenario, as_of: date | None = None
) -> pd.DataFrame:
    """Return ``table`` as of ``as_of`` (default: the scenario's end), recent labels blank.

    A case's label is pending when the case was acquired less than
    ``pending_label_months`` months before ``as_of``.
    """
    if scenario.pending_label_months == 0:
        return table
    end = pd.Timestamp(as_of or scenario_end(scenario))
    cutoff = (end - pd.DateOffset(months=scenario.pending_label_months)).strftime("%Y-%m-%d")
    out = table.copy()
    out["label"] = out["label"].astype(object)
    out.loc[out["acquired_on"] >= cutoff, "label"] = ""
    return out
