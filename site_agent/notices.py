"""The caution that every report and help text carries."""

from __future__ import annotations

RESEARCH_NOTICE = (
    "sitepool is a research tool. It is not a medical device and must not be used for "
    "clinical decisions. Follow your local ethics board, data-protection law and licensed "
    "clinical practice."
)
