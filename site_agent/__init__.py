"""The site agent: what a hospital runs beside its own data, and the wire contract.

Public names are imported on first use (:mod:`site_agent.lazy_surface`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from site_agent.lazy_surface import lazy_surface

_EXPORTS: dict[str, str] = {
    "BundleError": "site_agent.exceptions",
    "DeploymentError": "site_agent.exceptions",
    "DisclosureRefused": "site_agent.exceptions",
    "EvaluationPlan": "site_agent.contract.protocol",
    "InputError": "site_agent.exceptions",
    "LedgerError": "site_agent.exceptions",
    "MetricsSummary": "site_agent.statistics.metrics",
    "ModelBundle": "site_agent.training.model_bundle",
    "ModelReference": "site_agent.contract.protocol",
    "Operation": "site_agent.contract.protocol",
    "Predictions": "site_agent.data.predictions",
    "PredictionsError": "site_agent.exceptions",
    "ProtocolError": "site_agent.exceptions",
    "RESEARCH_NOTICE": "site_agent.notices",
    "ReleaseLedger": "site_agent.disclosure.ledger",
    "ScenarioError": "site_agent.exceptions",
    "SitePolicy": "site_agent.disclosure.policy",
    "SiteRelease": "site_agent.contract.release",
    "SiteReply": "site_agent.contract.wire",
    "SiteRequest": "site_agent.contract.wire",
    "SiteSettings": "site_agent.service",
    "SitepoolError": "site_agent.exceptions",
    "StudyProtocol": "site_agent.contract.protocol",
    "SufficientStatistics": "site_agent.statistics.summaries",
    "answer": "site_agent.service",
    "apply_policy": "site_agent.disclosure.small_cells",
    "approve": "site_agent.disclosure.approvals",
    "bundle_sha256": "site_agent.training.model_bundle",
    "compute_statistics": "site_agent.statistics.summaries",
    "disclosure_mod": "site_agent.disclosure.gate",
    "evaluate_site": "site_agent.evaluation",
    "is_approved": "site_agent.disclosure.approvals",
    "load_bundle": "site_agent.training.model_bundle",
    "load_predictions": "site_agent.data.predictions",
    "read_table": "site_agent.data.predictions",
    "save_bundle": "site_agent.training.model_bundle",
    "summarize": "site_agent.statistics.metrics",
    "validate_predictions": "site_agent.data.predictions",
    "verify_ledger": "site_agent.disclosure.ledger",
}

__all__ = [
    "RESEARCH_NOTICE",
    "BundleError",
    "DeploymentError",
    "DisclosureRefused",
    "EvaluationPlan",
    "InputError",
    "LedgerError",
    "MetricsSummary",
    "ModelBundle",
    "ModelReference",
    "Operation",
    "Predictions",
    "PredictionsError",
    "ProtocolError",
    "ReleaseLedger",
    "ScenarioError",
    "SitePolicy",
    "SiteRelease",
    "SiteReply",
    "SiteRequest",
    "SiteSettings",
    "SitepoolError",
    "StudyProtocol",
    "SufficientStatistics",
    "answer",
    "apply_policy",
    "approve",
    "bundle_sha256",
    "compute_statistics",
    "disclosure_mod",
    "evaluate_site",
    "is_approved",
    "load_bundle",
    "load_predictions",
    "read_table",
    "save_bundle",
    "summarize",
    "validate_predictions",
    "verify_ledger",
]

__getattr__, __dir__ = lazy_surface(__name__, _EXPORTS)


if TYPE_CHECKING:
    from site_agent.contract.protocol import (
        EvaluationPlan,
        ModelReference,
        Operation,
        StudyProtocol,
    )
    from site_agent.contract.release import SiteRelease
    from site_agent.contract.wire import SiteReply, SiteRequest
    from site_agent.data.predictions import (
        Predictions,
        load_predictions,
        read_table,
        validate_predictions,
    )
    from site_agent.disclosure.approvals import approve, is_approved
    from site_agent.disclosure.gate import disclosure_mod
    from site_agent.disclosure.ledger import ReleaseLedger, verify_ledger
    from site_agent.disclosure.policy import SitePolicy
    from site_agent.disclosure.small_cells import apply_policy
    from site_agent.evaluation import evaluate_site
    from site_agent.exceptions import (
        BundleError,
        DeploymentError,
        DisclosureRefused,
        InputError,
        LedgerError,
        PredictionsError,
        ProtocolError,
        ScenarioError,
        SitepoolError,
    )
    from site_agent.notices import RESEARCH_NOTICE
    from site_agent.service import SiteSettings, answer
    from site_agent.statistics.metrics import MetricsSummary, summarize
    from site_agent.statistics.summaries import SufficientStatistics, compute_statistics
    from site_agent.training.model_bundle import (
        ModelBundle,
        bundle_sha256,
        load_bundle,
        save_bundle,
    )
