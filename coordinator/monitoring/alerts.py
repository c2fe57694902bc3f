"""Drift alerts posted as JSON to a webhook, without ever stopping the coordinator.

:class:`WebhookAlerter` posts a :class:`DriftAlert` with httpx. Connection errors,
timeouts and 5xx replies are retried with exponential backoff (``backoff_s``, then twice
that, and so on); any other 4xx reply is final, since repeating the same request will not
help. Whatever happens, :meth:`WebhookAlerter.send` returns a :class:`DeliveryResult`
and logs a failed delivery: monitoring goes on if the receiver is down.

Every alert carries the research-tool notice: a drift alert is a prompt for people to
look at a site, never a clinical finding. :func:`alarm_alerts` turns the alarms of a drift
analysis into alerts, one per site, metric and method at its onset.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from datetime import UTC, date, datetime
from types import TracebackType
from typing import Self

import httpx
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from coordinator.monitoring.drift import DriftLevel
from coordinator.monitoring.findings import DriftAlarm, DriftFindings
from site_agent.exceptions import InputError
from site_agent.notices import RESEARCH_NOTICE

DEFAULT_TIMEOUT_S = 5.0
DEFAULT_RETRIES = 3
DEFAULT_BACKOFF_S = 0.5
ALERT_FORMAT = "sitepool-drift-alert/1"
"""Tag naming the JSON layout of :class:`DriftAlert`, so receivers can check it."""

_logger = logging.getLogger(__name__)


class DriftAlert(BaseModel):
    """A drift finding for one site and one time window, as posted to a webhook.

    ``statistic`` is the value of the drift statistic (PSI, KS distance, CUSUM ``C⁻``...)
    named by ``method``; ``None`` when it was undefined. ``message`` must not carry any
    value taken from a single case.
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    alert_format: str = Field(default=ALERT_FORMAT, pattern=f"^{ALERT_FORMAT}$")
    study_id: str = Field(min_length=1)
    site: str = Field(min_length=1)
    window_start: date
    window_end: date
    metric: str = Field(min_length=1, description="What drifted, e.g. 'score_distribution'.")
    method: str = Field(min_length=1, description="How it was measured, e.g. 'psi'.")
    statistic: float | None
    level: DriftLevel
    message: str = Field(min_length=1, max_length=2000)
    raised_at: datetime = Field(default_factory=lambda: datetime.now(UTC))
    notice: str = RESEARCH_NOTICE

    @field_validator("statistic")
    @classmethod
    def _finite_or_none(cls, value: float | None) -> float | None:
        if value is not None and not math.isfinite(value):
            return None
        return value

    @model_validator(mode="after")
    def _window_is_ordered(self) -> Self:
        if self.window_end <= self.window_start:
            raise ValueError("window_end must come after window_start")
        return self

    @field_validator("notice")
    @classmethod
    def _notice_is_the_research_notice(cls, value: str) -> str:
        if value != RESEARCH_NOTICE:
            raise ValueError("notice must be the sitepool research notice")
        return value


@dataclass(frozen=True, slots=True)
class DeliveryResult:
    """Outcome of posting one alert: delivered or not, after how many attempts, and why."""

    delivered: bool
    attempts: int
    error: str | None = None
    status_code: int | None = None


class WebhookAlerter:
    """Post drift alerts as JSON to one webhook URL.

    Parameters
    ----------
    url
        The receiver's ``http://`` or ``https://`` URL.
    timeout_s
        Timeout of each attempt (connect, read, write), in seconds.
    retries
        Further attempts after the first one fails transiently; ``retries=3`` makes at most
        four attempts.
    backoff_s
        Wait before the first retry; each later wait doubles.

    Raises
    ------
    InputError
        If the URL is not an absolute http(s) URL or a number is out of range.
    """

    def __init__(
        self,
        url: str,
        *,
        timeout_s: float = DEFAULT_TIMEOUT_S,
        retries: int = DEFAULT_RETRIES,
        backoff_s: float = DEFAULT_BACKOFF_S,
    ):
        try:
            parsed = httpx.URL(url)
        except (httpx.InvalidURL, TypeError) as error:
            raise InputError(f"invalid webhook URL: {error}") from None
        if parsed.scheme not in ("http", "https") or not parsed.host:
            raise InputError("webhook URL must be an absolute http:// or https:// URL")
        if not (math.isfinite(timeout_s) and timeout_s > 0):
            raise InputError(f"timeout_s must be positive, got {timeout_s}")
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise InputError(f"retries must be a non-negative integer, got {retries!r}")
        if not (math.isfinite(backoff_s) and backoff_s >= 0):
            raise InputError(f"backoff_s must be non-negative, got {backoff_s}")
        self._url = parsed
        self._retries = retries
        self._backoff_s = backoff_s
        self._client = httpx.Client(timeout=httpx.Timeout(timeout_s), follow_redirects=False)

    def send(self, alert: DriftAlert) -> DeliveryResult:
        """Post ``alert``; retry transient failures; never raise.

        Returns
        -------
        DeliveryResult
            ``delivered`` is true on a 2xx reply. On failure ``error`` says what went
            wrong on the last attempt, and the failure is logged at WARNING level.
        """
        body = alert.model_dump_json().encode("utf-8")
        headers = {"content-type": "application/json"}
        attempts = 0
        error = "not attempted"
        status: int | None = None
        while True:
            attempts += 1
            transient = False
            try:
                response = self._client.post(self._url, content=body, headers=headers)
            except httpx.TimeoutException as exc:
                error, status, transient = f"timed out ({type(exc).__name__})", None, True
            except httpx.TransportError as exc:
                error, status, transient = f"transport error ({type(exc).__name__})", None, True
            except httpx.HTTPError as exc:
                error, status = f"request failed ({type(exc).__name__})", None
            else:
                status = response.status_code
                if response.is_success:
                    return DeliveryResult(True, attempts, None, status)
                error = f"receiver replied HTTP {status}"
                transient = response.is_server_error
            if not transient or attempts > self._retries:
                break
            # Exponential backoff: backoff_s · 2^(attempt − 1) before the next attempt.
            time.sleep(self._backoff_s * 2 ** (attempts - 1))
        _logger.warning(
            "drift alert for study %s, site %s not delivered to %s after %d attempt(s): %s",
            alert.study_id,
            alert.site,
            self._url.host,
            attempts,
            error,
        )
        return DeliveryResult(False, attempts, error, status)

    def close(self) -> None:
        """Close the HTTP connection pool."""
        self._client.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()


def alarm_alerts(findings: DriftFindings) -> list[DriftAlert]:
    """Return one webhook alert per site, metric and method: its first alarm.

    A persistent shift keeps alarming window after window; one alert at its onset (its
    message says how many windows alarmed in all) keeps the receiver from being flooded.
    """
    groups: dict[tuple[str, str, str], list[DriftAlarm]] = {}
    for alarm in findings.alarms:
        groups.setdefault((alarm.site, alarm.metric, alarm.method), []).append(alarm)
    alerts = []
    for group in groups.values():
        first = min(group, key=lambda a: a.window_number)
        alerts.append(
            DriftAlert(
                study_id=findings.study_id,
                site=first.site,
                window_start=first.window_start,
                window_end=first.window_end,
                metric=first.metric,
                method=first.method,
                statistic=first.statistic,
                level=DriftLevel.SHIFTED,
                message=f"{first.message} ({len(group)} alarming window(s) in this run).",
            )
        )
    return alerts
