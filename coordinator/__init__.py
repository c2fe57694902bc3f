"""The coordinator: runs a study protocol over Flower and turns releases into results.

Public names are imported on first use (:mod:`site_agent.lazy_surface`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from site_agent.lazy_surface import lazy_surface

_EXPORTS: dict[str, str] = {
    "DriftAlert": "coordinator.monitoring.alerts",
    "DriftFindings": "coordinator.monitoring.analysis",
    "MetaAnalysis": "coordinator.pooling.meta_analysis",
    "ResultsStore": "coordinator.monitoring.results_store",
    "RoundOutcome": "coordinator.runs.rounds",
    "SqliteResultsStore": "coordinator.monitoring.results_store",
    "StudyOutcome": "coordinator.runs.rounds",
    "StudyResults": "coordinator.pooling.study_results",
    "WebhookAlerter": "coordinator.monitoring.alerts",
    "analyse_windows": "coordinator.monitoring.analysis",
    "binned_ks": "coordinator.monitoring.drift",
    "build_results": "coordinator.pooling.assemble",
    "cusum_chart": "coordinator.monitoring.control_charts",
    "ewma_chart": "coordinator.monitoring.control_charts",
    "kruskal_wallis_binned": "coordinator.pooling.comparisons",
    "meta_analyze": "coordinator.pooling.meta_analysis",
    "population_stability_index": "coordinator.monitoring.drift",
    "render_report": "coordinator.report.study_report",
    "request_adaptation": "coordinator.adaptation.requests",
    "run_federated": "coordinator.adaptation.federated",
    "run_monitoring": "coordinator.runs.engines",
    "run_study": "coordinator.runs.engines",
    "write_drift_report": "coordinator.report.drift_report",
    "write_exports": "coordinator.report.exports",
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

__getattr__, __dir__ = lazy_surface(__name__, _EXPORTS)


if TYPE_CHECKING:
    from coordinator.adaptation.federated import run_federated
    from coordinator.adaptation.requests import request_adaptation
    from coordinator.monitoring.alerts import DriftAlert, WebhookAlerter
    from coordinator.monitoring.analysis import DriftFindings, analyse_windows
    from coordinator.monitoring.control_charts import cusum_chart, ewma_chart
    from coordinator.monitoring.drift import binned_ks, population_stability_index
    from coordinator.monitoring.results_store import ResultsStore, SqliteResultsStore
    from coordinator.pooling.assemble import build_results
    from coordinator.pooling.comparisons import kruskal_wallis_binned
    from coordinator.pooling.meta_analysis import MetaAnalysis, meta_analyze
    from coordinator.pooling.study_results import StudyResults
    from coordinator.report.drift_report import write_drift_report
    from coordinator.report.exports import write_exports
    from coordinator.report.study_report import render_report
    from coordinator.runs.engines import run_monitoring, run_study
    from coordinator.runs.rounds import RoundOutcome, StudyOutcome
