"""Errors raised by sitepool.

Every error the project raises derives from :class:`SitepoolError`::

    SitepoolError
    ├── InputError               bad input from a user or a file; nothing was released
    │   ├── PredictionsError     a predictions table failed validation (row, column)
    │   ├── ScenarioError        a simulation scenario file is invalid
    │   ├── EmptyWindowError     a monitoring request's time window holds no case
    │   └── ReleaseFileRefused   a signed release file failed a check (path, site)
    ├── ProtocolError            a study protocol is malformed or does not match its hash
    ├── BundleError              a model bundle is missing, corrupt or fails its hash check
    ├── DisclosureRefused        a site's policy refused a request (reason, operation)
    ├── LedgerError              the release ledger is damaged or fails verification
    └── DeploymentError          a transport or engine fault (Flower, subprocesses, timeouts)

Library errors (pydantic, Flower, torch, httpx) are translated into these at the
boundary where they occur. Messages never carry a value taken from a site's data.
"""

from __future__ import annotations


class SitepoolError(Exception):
    """Base class of every error raised by sitepool."""


class InputError(SitepoolError):
    """Invalid input from a user or a file; nothing was written or released."""


class PredictionsError(InputError):
    """A predictions table failed validation.

    Parameters
    ----------
    message
        What is wrong, in one line.
    row
        1-based data row number in the file (header not counted), if one row is at fault.
    column
        Name of the offending column, if one column is at fault.
    """

    def __init__(self, message: str, *, row: int | None = None, column: str | None = None):
        where = []
        if row is not None:
            where.append(f"row {row}")
        if column is not None:
            where.append(f"column {column!r}")
        prefix = f"{', '.join(where)}: " if where else ""
        super().__init__(f"{prefix}{message}")
        self.row = row
        self.column = column


class ScenarioError(InputError):
    """A simulation scenario file is invalid."""


class EmptyWindowError(InputError):
    """A monitoring request's time window holds no case at the site; nothing to release."""


class ReleaseFileRefused(InputError):
    """A signed release file failed a check and is not pooled.

    Parameters
    ----------
    reason
        One line naming the failed check; never a value from the release.
    path
        The file.
    site
        The site the file names, when it could be read.
    """

    def __init__(self, reason: str, *, path: object, site: str | None = None):
        super().__init__(f"{path}: refused: {reason}")
        self.reason = reason
        self.path = path
        self.site = site


class ProtocolError(SitepoolError):
    """A study protocol is malformed or does not match the expected content hash."""


class BundleError(SitepoolError):
    """A model bundle is missing, corrupt, or fails its content-hash check."""


class DisclosureRefused(SitepoolError):
    """A site's disclosure policy refused a request.

    Parameters
    ----------
    reason
        Why the request was refused; never contains a value from the site's data.
    operation
        The operation that was asked for (``evaluate``, ``fine_tune``, ``monitor``).
    """

    def __init__(self, reason: str, *, operation: str | None = None):
        super().__init__(reason)
        self.reason = reason
        self.operation = operation


class LedgerError(SitepoolError):
    """The release ledger is damaged or fails verification."""


class DeploymentError(SitepoolError):
    """A transport or engine fault: Flower, subprocesses, timeouts."""
