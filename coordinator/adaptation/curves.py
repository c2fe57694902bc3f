"""The adaptation budget: how many local cases a site needs for the model to work there.

:func:`request_adaptation` sends every site one ``fine_tune`` request; the protocol's
:class:`~site_agent.contract.protocol.AdaptationPlan` is the whole grid (case counts x seeds), so
one message per site suffices. Sent with weights (a federated model), the same request
asks the site only to measure those weights on its held-out test set. With
``return_update`` the request also asks for each site's site-local update (fine-tuned minus
initial weights), which a site returns only if its policy allows updates
(:class:`LocalUpdate`; a site that does not allow it declines the whole request).

:func:`adaptation_rows` summarises the releases:

- per site and case count, the metric after fine-tuning is combined over the seeds by
  Rubin's rules on the logit scale (:func:`combine_over_seeds`): the mean of the seeds'
  logits, with a variance that adds the mean within-seed variance (DeLong for the AUC,
  binomial for sensitivity and specificity) and the between-seed variance; where a seed's
  AUC is exactly 0 or 1 the AUC is combined on its own scale and the interval truncated to
  [0, 1] (:func:`combine_auc_over_seeds`);
- pooled across sites, the *mean of the sites' logit estimates* with every site weighted
  equally; its interval treats the sites as fixed (it describes these sites, not a new
  one; the random-effects analysis of the evaluation round speaks to new sites);
- per site and case count, the paired DeLong change of AUC (after − before, on the same
  held-out cases) combined over the seeds by Rubin's rules on its own scale
  (:func:`combine_differences`; rows with metric :data:`AUC_CHANGE`, not pooled);
- per site, the smallest case count whose combined AUC comes within the plan's margin of
  the development site's AUC (:func:`adequate_cases`, judged on the point estimate).

References
----------
D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley, New York.
Chapter 3 (combining rules, degrees of freedom). DOI: 10.1002/9780470316696
J.A. Hanley, B.J. McNeil (1982). Radiology 143:29-36 (AUC variance, used when the
DeLong variance is 0).
"""

from __future__ import annotations

import math
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from flwr.app import Array, ArrayRecord, Message
from flwr.serverapp import Grid
from pydantic import BaseModel, ConfigDict, Field
from scipy import stats

from coordinator.pooling.study_results import AdaptationRow, AdequateCases
from site_agent.contract.adaptation_release import AdaptationPoint, AdaptationRelease, Performance
from site_agent.contract.protocol import Operation, StudyProtocol
from site_agent.contract.release import AucRecord
from site_agent.contract.wire import (
    EVALUATE_MESSAGE_TYPE,
    LOCAL_UPDATE_RECORD,
    WEIGHTS_RECORD,
    ReplyStatus,
    SiteRequest,
    decode_reply,
    encode_request,
)
from site_agent.disclosure.update_release import update_digest, update_norm
from site_agent.exceptions import DeploymentError, InputError, ProtocolError
from site_agent.statistics.estimates import two_sided_z
from site_agent.statistics.roc import hanley_mcneil_se

POOLED = "pooled"
WHOLE_POOL = "all"
"""Label of the whole training pool among the case counts."""
METRICS = ("auc", "sensitivity", "specificity")
AUC_CHANGE = "auc_change"
"""Metric name of the rows holding the paired DeLong AUC change after − before."""
MAX_REASON_CHARS = 200


class _Record(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=True)


class AdaptationDecline(_Record):
    """A node that did not release: declined (with the site's reason) or faulted."""

    node_id: int
    site: str | None = None
    reason: str


class LocalUpdate(_Record):
    """A site-local update as the site released it (clipped and noised if its policy says)."""

    sha256: str = Field(description="SHA-256 of names and bytes, as in the site's ledger.")
    l2_norm: float = Field(description="L2 norm over all arrays, as in the site's ledger.")
    shapes: dict[str, list[int]]
    weights: dict[str, list[float]] = Field(description="The update, flattened, by name.")

    def arrays(self) -> dict[str, npt.NDArray[np.float32]]:
        """Return the update as float32 arrays of their shapes."""
        return {
            k: np.asarray(v, dtype=np.float32).reshape(self.shapes[k])
            for k, v in self.weights.items()
        }


class AdaptationRound(_Record):
    """What one round of ``fine_tune`` requests produced."""

    weights: str = Field(description="'bundle' (the grid) or 'sent' (measure sent weights).")
    releases: dict[str, AdaptationRelease]
    node_of_site: dict[str, int]
    declines: list[AdaptationDecline] = Field(default_factory=list)
    updates: dict[str, LocalUpdate] = Field(
        default_factory=dict, description="Site-local updates, when they were asked for."
    )


def request_adaptation(
    grid: Grid,
    protocol: StudyProtocol,
    bundle: bytes,
    *,
    weights: Mapping[str, npt.NDArray[np.floating]] | None = None,
    quorum: int | None = None,
    return_update: bool = False,
) -> AdaptationRound:
    """Send every connected node one ``fine_tune`` request and collect the releases.

    With ``return_update`` (not with ``weights``) each site is also asked for its
    site-local update; a release that comes without one counts as a decline.

    Raises
    ------
    ProtocolError
        If the protocol has no adaptation plan or does not list ``fine_tune``.
    DeploymentError
        If fewer sites than ``quorum`` (default: the protocol's) released.
    """
    if protocol.adaptation is None or Operation.FINE_TUNE not in protocol.operations:
        raise ProtocolError("the protocol lists no fine_tune operation with an adaptation plan")
    protocol_hash = protocol.content_hash()
    requests: dict[int, SiteRequest] = {}
    messages = []
    for node_id in sorted(grid.get_node_ids()):
        request = SiteRequest(
            operation=Operation.FINE_TUNE,
            protocol_json=protocol.canonical_json(),
            protocol_hash=protocol_hash,
            round_number=1,
            request_id=uuid.uuid4().hex,
            return_update=return_update,
        )
        requests[node_id] = request
        content = encode_request(request, bundle)
        if weights is not None:
            content[WEIGHTS_RECORD] = ArrayRecord(
                {k: Array(np.asarray(v, dtype=np.float32)) for k, v in weights.items()}
            )
        messages.append(Message(content, node_id, EVALUATE_MESSAGE_TYPE, group_id="fine-tune"))
    replies = grid.send_and_receive(messages, timeout=protocol.reply_timeout_s)
    outcome = _sorted(replies, requests, "sent" if weights is not None else "bundle", return_update)
    needed = protocol.quorum if quorum is None else quorum
    if len(outcome.releases) < needed:
        raise DeploymentError(
            f"fine_tune: {len(outcome.releases)} of {len(requests)} sites released, "
            f"the quorum is {needed}"
        )
    return outcome


def _sorted(
    replies: Iterable[Message],
    requests: Mapping[int, SiteRequest],
    weights: str,
    return_update: bool = False,
) -> AdaptationRound:
    releases: dict[str, AdaptationRelease] = {}
    updates: dict[str, LocalUpdate] = {}
    node_of_site: dict[str, int] = {}
    declines: list[AdaptationDecline] = []
    answered: set[int] = set()
    for reply in replies:
        node_id = reply.metadata.src_node_id
        if node_id not in requests or node_id in answered:
            continue
        answered.add(node_id)
        if reply.has_error():
            declines.append(
                AdaptationDecline(node_id=node_id, reason=_short(reply.error.reason or "error"))
            )
            continue
        try:
            answer = decode_reply(reply.content)
        except ProtocolError as exc:
            declines.append(AdaptationDecline(node_id=node_id, reason=_short(str(exc))))
            continue
        release = answer.adaptation
        valid = (
            answer.request_id == requests[node_id].request_id
            and answer.site not in node_of_site
            and (release is None or release.site == answer.site)
        )
        if not valid:
            declines.append(AdaptationDecline(node_id=node_id, reason="inconsistent reply"))
            continue
        node_of_site[answer.site] = node_id
        arrays = reply.content.array_records.get(LOCAL_UPDATE_RECORD)
        if answer.status is ReplyStatus.RELEASED and return_update and arrays is None:
            declines.append(
                AdaptationDecline(node_id=node_id, site=answer.site, reason="no update returned")
            )
        elif answer.status is ReplyStatus.RELEASED and release is not None:
            releases[answer.site] = release
            if return_update and arrays is not None:
                updates[answer.site] = _local_update(arrays)
        else:
            declines.append(
                AdaptationDecline(node_id=node_id, site=answer.site, reason=answer.reason or "")
            )
    declines.extend(
        AdaptationDecline(node_id=n, reason="no reply before the reply timeout")
        for n in sorted(set(requests) - answered)
    )
    return AdaptationRound(
        weights=weights,
        releases=dict(sorted(releases.items())),
        node_of_site=dict(sorted(node_of_site.items())),
        declines=declines,
        updates=dict(sorted(updates.items())),
    )


def _local_update(arrays: ArrayRecord) -> LocalUpdate:
    return LocalUpdate(
        sha256=update_digest(arrays),
        l2_norm=update_norm(arrays),
        shapes={k: list(v.shape) for k, v in arrays.items()},
        weights={k: [float(x) for x in v.numpy().ravel()] for k, v in arrays.items()},
    )


def _short(text: str) -> str:
    text = " ".join(text.split())
    return text if len(text) <= MAX_REASON_CHARS else text[: MAX_REASON_CHARS - 3] + "..."


# --------------------------------------------------------------------------- statistics


@dataclass(frozen=True, slots=True)
class Combined:
    """A metric combined over seeds (or sites) on the logit scale, back-transformed."""

    estimate: float
    lower: float
    upper: float
    logit: float
    variance: float
    df: float
    m: int
    reason: str | None = None


def _expit(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def combine_over_seeds(
    logits: Sequence[float], variances: Sequence[float], confidence: float = 0.95
) -> Combined:
    """Combine per-seed logit estimates with Rubin's rules.

    ``q̄ = mean(q)``, ``W = mean(u)``, ``B = var(q, ddof=1)``, ``T = W + (1 + 1/m)·B``,
    ``df = (m − 1)·(1 + W / ((1 + 1/m)·B))²`` (infinite when ``B = 0``); the interval is
    ``q̄ ± t_df·√T``, back-transformed with the logistic function. NaN with a reason when
    no seed gave a finite value.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1,
    equations (3.1.2)-(3.1.6) and the degrees of freedom of Section 3.3.
    """
    pooled = _rubin(logits, variances, confidence)
    if pooled is None:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no seed gave a defined estimate")
    q_bar, total, df, half, m = pooled
    return Combined(_expit(q_bar), _expit(q_bar - half), _expit(q_bar + half), q_bar, total, df, m)


def combine_differences(
    differences: Sequence[float], variances: Sequence[float], confidence: float = 0.95
) -> Combined:
    """Combine per-seed AUC differences (after − before) with Rubin's rules on their scale.

    The same rules as :func:`combine_over_seeds`, without a transformation: a difference of
    AUCs lies in [−1, 1] and its paired DeLong variance is on that scale. ``logit`` holds
    the combined difference itself.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1,
    equations (3.1.2)-(3.1.6) and Section 3.3. DeLong ER, DeLong DM, Clarke-Pearson DL
    (1988). Biometrics 44:837-845 (the per-seed variances).
    """
    pooled = _rubin(differences, variances, confidence)
    if pooled is None:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no seed gave a defined difference")
    q_bar, total, df, half, m = pooled
    return Combined(q_bar, q_bar - half, q_bar + half, q_bar, total, df, m)


def combine_auc_over_seeds(
    records: Sequence[AucRecord], confidence: float = 0.95
) -> tuple[Combined, str]:
    """Combine the seeds' AUCs: on the logit scale, or on the AUC scale when a seed is at 0 or 1.

    While every seed's AUC lies strictly inside (0, 1) this is :func:`combine_over_seeds`
    on :func:`auc_logit` (method ``"rubin-logit"``). A seed whose AUC is exactly 1 (or 0)
    has no finite logit: the half-pair correction puts it at ``log(2·P·N)``, a value set by
    the sample size rather than the data, and the between-seed variance it creates can
    stretch the interval down to 0. Then Rubin's rules run on the AUC scale itself, each
    seed with its DeLong variance (Hanley-McNeil at the half-pair-corrected value where
    DeLong's is 0, as in :func:`auc_logit`), and the interval is truncated to [0, 1]
    (method ``"rubin-auc-truncated"``): its bound at 1 is a bound, not an estimate. The
    returned ``logit`` and ``variance`` are the delta-method transforms of that mean, so
    the pooled mean over sites (:func:`combine_over_sites`) still applies.

    References
    ----------
    D.B. Rubin (1987). Multiple imputation for nonresponse in surveys. Wiley. Section 3.1.
    J.A. Hanley, B.J. McNeil (1982). Radiology 143:29-36, equation (1).
    """
    defined = [r for r in records if r.auc is not None and r.n_positive and r.n_negative]
    if all(r.auc is not None and 0.0 < r.auc < 1.0 for r in defined):
        pairs = [auc_logit(r) for r in records]
        logit_method = combine_over_seeds([a for a, _ in pairs], [b for _, b in pairs], confidence)
        return logit_method, "rubin-logit"
    values = [float(r.auc) for r in defined if r.auc is not None]
    variances = [_auc_variance(r) for r in defined]
    pooled = _rubin(values, variances, confidence)
    assert pooled is not None  # at least one seed is defined on this branch
    q_bar, total, df, half, m = pooled
    pairs_min = min(r.n_positive * r.n_negative for r in defined)
    a = min(max(q_bar, 0.5 / pairs_min), 1.0 - 0.5 / pairs_min)
    combined = Combined(
        q_bar,
        max(0.0, q_bar - half),
        min(1.0, q_bar + half),
        math.log(a / (1.0 - a)),
        total / (a * (1.0 - a)) ** 2,  # delta method, as in auc_logit
        df,
        m,
    )
    return combined, "rubin-auc-truncated"


def _auc_variance(record: AucRecord) -> float:
    """DeLong's variance, or Hanley-McNeil's at the half-pair-corrected AUC where it is 0."""
    if record.variance:
        return float(record.variance)
    assert record.auc is not None  # callers pass defined records only
    pairs = record.n_positive * record.n_negative
    a = min(max(record.auc, 0.5 / pairs), 1.0 - 0.5 / pairs)
    return float(hanley_mcneil_se(a, record.n_positive, record.n_negative) ** 2)


def _rubin(
    estimates: Sequence[float], variances: Sequence[float], confidence: float
) -> tuple[float, float, float, float, int] | None:
    """Return ``q̄, T, df``, the interval's half-width and ``m``; None without finite input."""
    q = np.asarray(estimates, dtype=float)
    u = np.asarray(variances, dtype=float)
    keep = np.isfinite(q) & np.isfinite(u)
    q, u = q[keep], u[keep]
    m = int(q.size)
    if m == 0:
        return None
    q_bar = float(q.mean())
    within = float(u.mean())
    between = float(q.var(ddof=1)) if m > 1 else 0.0
    total = within + (1.0 + 1.0 / m) * between  # Rubin (1987) eq. 3.1.5
    if between > 0:
        df = (m - 1) * (1.0 + within / ((1.0 + 1.0 / m) * between)) ** 2  # Rubin (1987) 3.3
        quantile = float(stats.t.ppf(0.5 + confidence / 2.0, df))
    else:
        df = math.inf
        quantile = two_sided_z(confidence)
    return q_bar, total, df, quantile * math.sqrt(total), m


def combine_over_sites(combined: Sequence[Combined], confidence: float = 0.95) -> Combined:
    """Mean of the sites' logit estimates, each site weighted equally; variance ``ΣT/k²``.

    The sites are treated as fixed: the interval describes the mean over these sites.
    """
    defined = [c for c in combined if math.isfinite(c.logit) and math.isfinite(c.variance)]
    k = len(defined)
    if k == 0:
        nan = math.nan
        return Combined(nan, nan, nan, nan, nan, nan, 0, "no site gave a defined estimate")
    q_bar = sum(c.logit for c in defined) / k
    variance = sum(c.variance for c in defined) / k**2
    half = two_sided_z(confidence) * math.sqrt(variance)
    return Combined(
        _expit(q_bar), _expit(q_bar - half), _expit(q_bar + half), q_bar, variance, math.inf, k
    )


def auc_logit(record: AucRecord) -> tuple[float, float]:
    """Return an AUC's logit and the delta-method variance of that logit.

    ``Var(logit A) ≈ Var(A) / (A(1 − A))²``. An AUC of 0 or 1 is moved half a pair
    inside the unit interval, ``1/(2·P·N)`` (common practice, like the 0.5 correction
    of proportions), and where DeLong's variance is 0 the Hanley-McNeil variance at that
    value stands in. NaN for an undefined AUC.
    """
    if record.auc is None or record.n_positive < 1 or record.n_negative < 1:
        return math.nan, math.nan
    pairs = record.n_positive * record.n_negative
    a = min(max(record.auc, 0.5 / pairs), 1.0 - 0.5 / pairs)
    variance = record.variance if record.variance else 0.0
    if variance <= 0.0:
        variance = hanley_mcneil_se(a, record.n_positive, record.n_negative) ** 2
    return math.log(a / (1.0 - a)), variance / (a * (1.0 - a)) ** 2


def proportion_logit(successes: int, trials: int) -> tuple[float, float]:
    """Return ``logit(p̃)`` and ``1 / (n' p̃ (1 − p̃))`` with ``p̃ = (x + ½)/(n + 1)``.

    The ½ added to each cell (Haldane's correction; common practice) keeps 0 and 1 finite.
    NaN when there are no trials.
    """
    if trials < 1:
        return math.nan, math.nan
    n = trials + 1.0
    p = (successes + 0.5) / n
    return math.log(p / (1.0 - p)), 1.0 / (n * p * (1.0 - p))


def metric_logit(perf: Performance, metric: str, threshold: float | None) -> tuple[float, float]:
    """Return the logit and its variance of ``metric`` in one :class:`Performance`."""
    if metric == "auc":
        return auc_logit(perf.auc)
    for t in perf.at_thresholds:
        if t.threshold != threshold:
            continue
        record = t.sensitivity if metric == "sensitivity" else t.specificity
        if record.estimate is None:  # suppressed by the site's minimum cell size
            return math.nan, math.nan
        if metric == "sensitivity":
            return proportion_logit(t.tp, t.tp + t.fn)
        return proportion_logit(t.tn, t.tn + t.fp)
    return math.nan, math.nan


def _raw(perf: Performance, metric: str, threshold: float | None) -> float:
    if metric == "auc":
        return math.nan if perf.auc.auc is None else perf.auc.auc
    for t in perf.at_thresholds:
        if t.threshold == threshold:
            record = t.sensitivity if metric == "sensitivity" else t.specificity
            return math.nan if record.estimate is None else record.estimate
    return math.nan


def site_rows(
    release: AdaptationRelease, thresholds: Sequence[float], confidence: float = 0.95
) -> tuple[list[AdaptationRow], dict[tuple[str, int | None, float | None], Combined]]:
    """Return one site's adaptation rows and the combined values behind them."""
    counts: list[int | None] = []
    for p in release.points:
        if p.n_requested not in counts:
            counts.append(p.n_requested)
    rows: list[AdaptationRow] = []
    combined: dict[tuple[str, int | None, float | None], Combined] = {}
    for metric, threshold in _metric_keys(thresholds):
        for n in counts:
            points = [p for p in release.points if p.n_requested == n]
            if metric == "auc":
                c, method = combine_auc_over_seeds([p.after.auc for p in points], confidence)
            else:
                pairs = [metric_logit(p.after, metric, threshold) for p in points]
                c = combine_over_seeds([a for a, _ in pairs], [b for _, b in pairs], confidence)
                method = "rubin-logit"
            raw = [
                v for v in (_raw(p.after, metric, threshold) for p in points) if math.isfinite(v)
            ]
            combined[(metric, n, threshold)] = c
            rows.append(
                AdaptationRow(
                    site=release.site,
                    metric=metric,
                    n_cases=n,
                    n_used=float(np.mean([p.n_used for p in points])),
                    estimate=c.estimate,
                    lower=c.lower,
                    upper=c.upper,
                    seed_min=min(raw) if raw else math.nan,
                    seed_max=max(raw) if raw else math.nan,
                    repeats=len(points),
                    threshold=threshold,
                    method=method,
                    reason=c.reason,
                )
            )
    for n in counts:
        points = [p for p in release.points if p.n_requested == n and p.change is not None]
        if points:
            rows.append(_change_row(release.site, n, points, confidence))
    return rows, combined


def _change_row(
    site: str, n: int | None, points: Sequence[AdaptationPoint], confidence: float
) -> AdaptationRow:
    """Combine the seeds' paired DeLong changes (after − before) of one case count."""
    values = [
        (p.change.difference, p.change.variance)
        if p.change is not None and p.change.difference is not None
        else (math.nan, math.nan)
        for p in points
    ]
    d = [math.nan if v is None else v for v, _ in values]
    u = [math.nan if v is None else v for _, v in values]
    c = combine_differences(d, u, confidence)
    raw = [x for x in d if math.isfinite(x)]
    return AdaptationRow(
        site=site,
        metric=AUC_CHANGE,
        n_cases=n,
        n_used=float(np.mean([p.n_used for p in points])),
        estimate=c.estimate,
        lower=c.lower,
        upper=c.upper,
        seed_min=min(raw) if raw else math.nan,
        seed_max=max(raw) if raw else math.nan,
        repeats=len(points),
        method="rubin-paired-delong",
        reason=c.reason,
    )


def _metric_keys(thresholds: Sequence[float]) -> list[tuple[str, float | None]]:
    keys: list[tuple[str, float | None]] = [("auc", None)]
    for t in sorted(set(thresholds)):
        keys += [("sensitivity", t), ("specificity", t)]
    return keys


def adaptation_rows(
    releases: Mapping[str, AdaptationRelease],
    thresholds: Sequence[float],
    confidence: float = 0.95,
) -> list[AdaptationRow]:
    """Return every site's adaptation rows and the pooled rows (mean of logits over sites)."""
    rows: list[AdaptationRow] = []
    by_site = {}
    for site, release in sorted(releases.items()):
        site_out, combined = site_rows(release, thresholds, confidence)
        rows.extend(site_out)
        by_site[site] = (site_out, combined)
    if not by_site:
        return rows
    keys = {key for _, combined in by_site.values() for key in combined}
    for metric, threshold in _metric_keys(thresholds):
        counts = _ordered_counts(n for (m, n, t) in keys if m == metric and t == threshold)
        for n in counts:
            parts = [
                c[(metric, n, threshold)]
                for _, c in by_site.values()
                if (metric, n, threshold) in c
            ]
            pooled = combine_over_sites(parts, confidence)
            used = [
                r.n_used
                for site_out, _ in by_site.values()
                for r in site_out
                if r.metric == metric and r.n_cases == n and r.threshold == threshold
            ]
            rows.append(
                AdaptationRow(
                    site=POOLED,
                    metric=metric,
                    n_cases=n,
                    n_used=float(np.mean(used)),
                    estimate=pooled.estimate,
                    lower=pooled.lower,
                    upper=pooled.upper,
                    seed_min=math.nan,
                    seed_max=math.nan,
                    repeats=pooled.m,
                    threshold=threshold,
                    method="mean-of-site-logits",
                    reason=pooled.reason,
                )
            )
    return rows


def _ordered_counts(counts: Iterable[int | None]) -> list[int | None]:
    unique = set(counts)
    numbers = sorted(n for n in unique if n is not None)
    return [*numbers, None] if None in unique else list(numbers)


def adequate_cases(
    rows: Sequence[AdaptationRow], reference_auc: float, margin: float
) -> list[AdequateCases]:
    """Return, per site (and pooled), the smallest case count whose AUC is within ``margin``.

    A count is adequate when the combined AUC (point estimate) is at least
    ``reference_auc − margin``. The whole pool counts after every explicit count.

    Raises
    ------
    InputError
        If the margin is negative.
    """
    if margin < 0:
        raise InputError("the margin must not be negative")
    out = []
    sites = sorted({r.site for r in rows if r.metric == "auc"}, key=lambda s: (s == POOLED, s))
    for site in sites:
        curve = {r.n_cases: r for r in rows if r.site == site and r.metric == "auc"}
        chosen: int | None = None
        whole = False
        reason: str | None = None
        if not math.isfinite(reference_auc):
            reason = "the development site's AUC is undefined"
        else:
            for n in _ordered_counts(curve):
                if curve[n].estimate >= reference_auc - margin:
                    chosen, whole = n, n is None
                    break
            else:
                reason = "no case count, not even the whole pool, came within the margin"
        out.append(
            AdequateCases(
                site=site,
                reference_auc=reference_auc,
                margin=margin,
                n_cases=chosen,
                whole_pool=whole,
                reason=reason,
            )
        )
    return out


def count_label(n: int | None) -> str:
    """Return a case count as shown in reports: the number, or 'all' for the whole pool."""
    return WHOLE_POOL if n is None else str(n)
