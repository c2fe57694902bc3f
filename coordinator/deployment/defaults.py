"""Named defaults of a deployment, in one light module the command line reads at start-up."""

from __future__ import annotations

DEFAULT_PORT = 9092
"""The one port of the hub that sites dial (Fleet, Control and Runtime APIs in Flower 1.42)."""

DEFAULT_VALID_DAYS = 30
"""Validity of a throwaway certificate: long enough to try a study, short enough to lapse."""

DEFAULT_STUDY_TIMEOUT_S = 1800.0
"""Longest a whole study may run before the coordinator stops waiting for it."""

DEFAULT_NODE_WAIT_S = 60.0
"""Longest the coordinator waits for admitted sites to connect before a round."""
