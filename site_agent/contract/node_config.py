"""The node configuration a site agent reads: the keys of a SuperNode's ``node_config``.

A hospital starts its Flower SuperNode with ``--node-config`` naming the site, its scored
table, its policy and its release ledger. These keys are the whole contract between that
command line and the site agent: the runtime (:mod:`site_agent.service`,
:mod:`site_agent.client_app`) reads the data path, and the disclosure wing
(:mod:`site_agent.disclosure.gate`, :mod:`site_agent.disclosure.update_release`) reads the
policy and ledger paths, each without importing the other.
"""

from __future__ import annotations

from pathlib import Path

SITE_NAME_KEY = "site-name"
DATA_PATH_KEY = "data-path"
POLICY_PATH_KEY = "policy-path"
LEDGER_PATH_KEY = "ledger-path"
IMAGE_CONFIG_KEY = "image-config-path"
"""Keys of a SuperNode's ``node_config`` that configure the site agent."""

UNNAMED_SITE = "unnamed-site"
"""Site name used in a reply when the node's configuration names no site."""

DEFAULT_LEDGER_FILE = Path("release-ledger.jsonl")
"""The site's release ledger when its command line names none."""

DEFAULT_APPROVALS_FILE = Path("approvals.json")
"""The site's approvals file when its policy or command line names none."""
