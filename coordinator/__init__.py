"""The coordinator: runs a study protocol over Flower and turns releases into results.

Public names are imported on first use (PEP 562), so that importing one module does
not pay for the rest: torch, Flower and OpenDP load only where they are needed.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

_EXPORTS: dict[str, str] = {
    "DriftAlert": "coordinator.alerts",
    "DriftFindings": "coordinator.window_drift",
    "MetaAnalysis": "coordinator.meta_analysis",
    "ResultsStore": "coordinator.results_store",
    "RoundOutcome": "coordinator.rounds",
    "SqliteResultsStore": "coordinator.results_store",
    "StudyOutcome": "coordinator.rounds",
    "StudyResults": "coordinator.study_results",
    "WebhookAlerter": "coordinator.alerts",
    "analyse_windows": "coordinator.window_drift",
    "binned_ks": "coordinator.drift",
    "build_results": "coordinator.pooling",
    "cusum_chart": "coordinator.control_charts",
    "ewma_chart": "coordinator.control_charts",
    "kruskal_wallis_binned": "coordinator.comparisons",
    "meta_analyze": "coordinator.meta_analysis",
    "population_stability_index": "coordinator.drift",
    "render_report": "coordinator.report",
    "request_adaptation": "coordinator.adaptation",
    "run_federated": "coordinator.federated",
    "run_monitoring": "coordinator.engines",
    "run_study": "coordinator.engines",
    "write_drift_report": "coordinator.drift_report",
    "write_exports": "coordinator.exports",
}

__all__ = [
    "DriftAlert",
    "DriftFindings",
    "MetaAnalysis",
    "ResultsStore",
    "RoundOutcome",
    "SqliteResultsStore",
    "StudyOutcome",
    "StudyResults",
    "WebhookAlerter",
    "analyse_windows",
    "binned_ks",
    "build_results",
    "cusum_chart",
    "ewma_chart",
    "kruskal_wallis_binned",
    "meta_analyze",
    "population_stability_index",
    "render_report",
    "request_adaptation",
    "run_federated",
    "run_monitoring",
    "run_study",
    "write_drift_report",
    "write_exports",
]


def __getattr__(name: str) -> Any:
    """Import a public name from the module that defines it, on first use."""
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'coordinator' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*globals(), *__all__])


if TYPE_CHECKING:
    from coordinator.adaptation import request_adaptation
    from coordinator.alerts import DriftAlert, WebhookAlerter
    from coordinator.comparisons import kruskal_wallis_binned
    from coordinator.control_charts import cusum_chart, ewma_chart
    from coordinator.drift import binned_ks, population_stability_index
    from coordinator.drift_report import write_drift_report
    from coordinator.engines import run_monitoring, run_study
    from coordinator.exports import write_exports
    from coordinator.federated import run_federated
    from coordinator.meta_analysis import MetaAnalysis, meta_analyze
    from coordinator.pooling import build_results
    from coordinator.report import render_report
    from coordinator.results_store import ResultsStore, SqliteResultsStore
    from coordinator.rounds import RoundOutcome, StudyOutcome
    from coordinator.study_results import StudyResults
    from coordinator.window_drift import DriftFindings, analyse_windows
