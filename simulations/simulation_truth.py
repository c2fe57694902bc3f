"""What only a simulation knows: the one-cohort AUC computed from every simulated case.

In a study the coordinator pools each site's released histograms into an AUC of all cases
as one cohort, with a worst-case binning bound (:func:`coordinator.pooling.cohort.cohort_auc`).
In a rehearsal the cases are simulated and lie on this machine, so the true value of that
AUC can be computed and set beside the estimate, marked "simulation only". Nothing here
runs at a site or in a real study.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from coordinator.pooling.sites import POOLED
from coordinator.pooling.study_results import SimulationCheck, StudyResults
from site_agent.contract.protocol import StudyProtocol
from site_agent.data.predictions import FloatArray, IntArray, read_table, validate_predictions
from site_agent.service import SiteSettings
from site_agent.statistics.roc import auc

COHORT_METHOD = "hanley-mcneil"
"""Method of the one-cohort AUC row this check sits beside."""


def site_scores(
    bundle_path: Path, protocol: StudyProtocol, settings: Sequence[SiteSettings]
) -> list[tuple[FloatArray, IntArray]]:
    """Return each site's ``(scores, labels)`` for its labelled cases, scored as a site would.

    The model is loaded from the same bundle, checked against the protocol's hash, and
    applied to each site's table, so the scores are the ones the sites binned.
    """
    # Imported here: torch costs seconds to import.
    from site_agent.training.model_bundle import load_bundle

    if protocol.model is None:
        raise ValueError("the protocol names no model to score the simulated cases with")
    model = load_bundle(Path(bundle_path).read_bytes(), expected_sha256=protocol.model.sha256)
    out = []
    for site in settings:
        # The same steps as the site agent's evaluation (site_agent.service).
        frame = read_table(site.data_path)
        predictions = validate_predictions(frame.assign(score=model.predict(frame)))
        mask = predictions.labelled
        out.append((predictions.score[mask], predictions.label[mask]))
    return out


def cohort_truth(
    results: StudyResults,
    bundle_path: Path,
    protocol: StudyProtocol,
    settings: Sequence[SiteSettings],
) -> SimulationCheck | None:
    """Return the one-cohort AUC of every released site's simulated cases beside the estimate.

    Only sites that released results are pooled by the study, so only they count here.
    None when the study has no one-cohort AUC.

    References
    ----------
    Hanley JA, McNeil BJ (1982). Radiology 143:29–36, eq. 1 (AUC = U / (m·n), ties half).
    """
    row = next(
        (
            r
            for r in results.metrics
            if r.site == POOLED
            and r.metric == "auc"
            and r.method == COHORT_METHOD
            and r.subgroup is None
        ),
        None,
    )
    if row is None:
        return None
    released = {s.site for s in results.sites if s.status == "released"}
    parts = site_scores(bundle_path, protocol, [s for s in settings if s.site in released])
    scores = np.concatenate([s for s, _ in parts])
    labels = np.concatenate([y for _, y in parts])
    return SimulationCheck(
        site=POOLED,
        metric="auc",
        method=COHORT_METHOD,
        estimate=row.estimate,
        bound=row.bound,
        true_value=auc(scores, labels),
    )
