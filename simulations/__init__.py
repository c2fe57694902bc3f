"""The simulator: rehearses a study on synthetic hospitals drawn from a public dataset.

Public names are imported on first use (:mod:`site_agent.lazy_surface`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from site_agent.lazy_surface import lazy_surface

_EXPORTS: dict[str, str] = {
    "Scenario": "simulations.scenario",
    "app": "simulations.cli",
    "build_sites": "simulations.sites",
    "default_scenario": "simulations.scenario",
    "develop_model": "simulations.development",
    "drift_scenario": "simulations.drift_rehearsal",
    "load_feature_table": "simulations.dataset",
    "load_public_dataset": "simulations.dataset",
    "main": "simulations.cli",
    "prepare_study": "simulations.rehearsal",
    "rehearse": "simulations.rehearsal",
    "rehearse_drift": "simulations.drift_rehearsal",
}

__all__ = [
    "Scenario",
    "app",
    "build_sites",
    "default_scenario",
    "develop_model",
    "drift_scenario",
    "load_feature_table",
    "load_public_dataset",
    "main",
    "prepare_study",
    "rehearse",
    "rehearse_drift",
]

__getattr__, __dir__ = lazy_surface(__name__, _EXPORTS)


if TYPE_CHECKING:
    from simulations.cli import app, main
    from simulations.dataset import load_feature_table, load_public_dataset
    from simulations.development import develop_model
    from simulations.drift_rehearsal import drift_scenario, rehearse_drift
    from simulations.rehearsal import prepare_study, rehearse
    from simulations.scenario import Scenario, default_scenario
    from simulations.sites import build_sites
