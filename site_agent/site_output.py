"""What ``sitepool site evaluate --json`` prints: what leaves the site, apart from what stays.

:class:`SiteEvaluationOutput` has two halves a script can tell apart by key:

- ``leaves_the_site``: the release exactly as it would be sent, and the disclosure note
  the site's gate sends beside it (None without ``--policy``);
- ``stays_at_site``: the metrics the site derives from that release and prints, with their
  intervals and the method of each (Wilson, Clopper–Pearson, clustered by patient, DeLong,
  Obuchowski, Cohen's kappa, ...). Nothing in this half is sent; the coordinator derives
  the same numbers from the release.

and the research notice. The readable table (``sitepool site evaluate`` without
``--json``) prints the same numbers.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field

from site_agent.contract.release import ExactEstimates, SiteRelease
from site_agent.disclosure.small_cells import DisclosureNote
from site_agent.notices import RESEARCH_NOTICE
from site_agent.statistics.metrics import MetricsSummary, summarize


class _Output(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class LeavesTheSite(_Output):
    """What the site would send: the release and the note of what its policy changed."""

    release: SiteRelease
    disclosure_note: DisclosureNote | None = Field(
        default=None, description="What the policy changed; None when no policy was applied."
    )


class StaysAtSite(_Output):
    """What the site sees and does not send: metrics derived from the release."""

    metrics: MetricsSummary = Field(
        description="Proportions (Wilson, Clopper-Pearson, clustered), accuracy, F1, "
        "histogram AUC, Brier, ECE and kappas, from the released statistics."
    )
    exact: ExactEstimates = Field(
        description="DeLong and Obuchowski AUCs, calibration intercept and slope, reader "
        "comparisons: the values the release carries, as the table shows them."
    )


class SiteEvaluationOutput(_Output):
    """The JSON of ``sitepool site evaluate --json``."""

    leaves_the_site: LeavesTheSite
    stays_at_site: StaysAtSite
    notice: str = RESEARCH_NOTICE


def site_evaluation_output(
    release: SiteRelease, note: DisclosureNote | None = None
) -> SiteEvaluationOutput:
    """Return the output of ``site evaluate --json`` for a release (after any policy)."""
    return SiteEvaluationOutput(
        leaves_the_site=LeavesTheSite(release=release, disclosure_note=note),
        stays_at_site=StaysAtSite(metrics=summarize(release.statistics), exact=release.exact),
    )
