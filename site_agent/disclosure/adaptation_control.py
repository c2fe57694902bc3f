"""The minimum cell size on what a fine-tuning request releases.

:func:`control_adaptation` applies the site's minimum cell size to an
:class:`~site_agent.contract.adaptation_release.AdaptationRelease`: it refuses a release
whose test-set totals are small and suppresses small confusion cells with their partners in
the same class (they are marked censored, never 0, and the sensitivity and specificity that
rest on them become the hull over the censored range). The gate
(:func:`site_agent.disclosure.gate.disclosure_mod`) calls it on every ``fine_tune`` reply
before the release leaves. :func:`preview_adaptation` is what ``sitepool site fine-tune
--policy`` shows: the same control, after the two policy checks the gate makes on a
``fine_tune`` release (operation allowed, no noise on counts asked).
"""

from __future__ import annotations

from site_agent.contract.adaptation_release import (
    AdaptationRelease,
    Performance,
    ThresholdPerformance,
)
from site_agent.contract.protocol import Operation
from site_agent.contract.release import EstimateRecord
from site_agent.disclosure.policy import (
    SitePolicy,
    censored_cells,
    exact_cells,
    suppressed_confusion_cells,
)
from site_agent.disclosure.refusals import RefusalCode, refusal
from site_agent.statistics.censored import Cell, cells_hull, is_censored
from site_agent.statistics.proportions import wilson


def control_adaptation(
    release: AdaptationRelease, policy: SitePolicy
) -> tuple[AdaptationRelease, tuple[str, ...]]:
    """Return the release as the site's minimum cell size lets it leave, and what was cut.

    A count is releasable when it is 0 or at least ``min_cell`` (common practice in
    statistical disclosure control). Test-set totals and the pool size must be releasable;
    small confusion cells and their partners in the same class (the class totals are
    released) are marked censored, and their sensitivity and specificity become the hull
    of the Wilson intervals over the censored range.

    Raises
    ------
    DisclosureRefused
        With reason ``total_below_min_cell`` when a site total is small.
    """
    m = policy.min_cell
    totals = (release.n_pool, release.n_test, release.n_test_positive, release.n_test_negative)
    if not all(_ok(v, m) for v in totals):
        raise refusal(RefusalCode.TOTAL_BELOW_MIN_CELL, "fine_tune")
    suppressed: list[str] = []
    before = _controlled(release.before, m, "before", suppressed)
    points = tuple(
        p.model_copy(update={"after": _controlled(p.after, m, f"points[{i}].after", suppressed)})
        for i, p in enumerate(release.points)
    )
    out = release.model_copy(update={"before": before, "points": points})
    return AdaptationRelease.model_validate(out.model_dump()), tuple(suppressed)


def preview_adaptation(
    release: AdaptationRelease, policy: SitePolicy
) -> tuple[AdaptationRelease, tuple[str, ...]]:
    """Return what the gate would let leave of a local fine-tuning release, and what it cut.

    The gate refuses ``fine_tune`` when the policy does not allow the operation, and when
    the policy adds noise to counts (no differential privacy covers these metrics); then it
    applies :func:`control_adaptation`. Approval of the protocol is checked by the gate on a
    live request and is not part of a preview.

    Raises
    ------
    DisclosureRefused
        With the reason the gate would give.
    """
    if Operation.FINE_TUNE not in policy.allowed_operations:
        raise refusal(RefusalCode.OPERATION_NOT_ALLOWED, Operation.FINE_TUNE.value)
    if policy.privacy.enabled:
        raise refusal(RefusalCode.NOT_COVERED_BY_PRIVACY, Operation.FINE_TUNE.value)
    return control_adaptation(release, policy)


def _ok(value: int, min_cell: int) -> bool:
    return value == 0 or value >= min_cell


def _controlled(perf: Performance, m: int, path: str, suppressed: list[str]) -> Performance:
    rows = []
    for i, t in enumerate(perf.at_thresholds):
        cells = exact_cells(t)
        small = suppressed_confusion_cells(cells, m)
        if not small:
            rows.append(t)
            continue
        suppressed.extend(f"{path}.at_thresholds[{i}].{k}" for k in small)
        marked = censored_cells(cells, small, m)
        rows.append(
            ThresholdPerformance(
                threshold=t.threshold,
                **marked,
                sensitivity=_hull(t.sensitivity, marked["tp"], marked["fn"]),
                specificity=_hull(t.specificity, marked["tn"], marked["fp"]),
            )
        )
    return perf.model_copy(update={"at_thresholds": tuple(rows)})


def _hull(e: EstimateRecord, successes: Cell, failures: Cell) -> EstimateRecord:
    """Return a Wilson proportion as the censored cells allow (unchanged if neither is).

    Only sensitivity and specificity come here: their two cells split one class.
    """
    if not is_censored(successes, failures):
        return e
    hull = cells_hull(successes, failures, wilson, e.confidence, partners=True)
    return EstimateRecord.of_hull(hull, method=e.method, n=e.n, confidence=e.confidence)
