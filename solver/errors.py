"""Error and warning types shared by every kktrace module.

Only the Python layer raises; numerical cores return status codes.
"""

from __future__ import annotations


class KktraceError(Exception):
    """Base class of every error kktrace raises on purpose."""


class InvalidInputError(KktraceError, ValueError):
    """The caller's data, file or option is wrong; the message names where and what."""


class IntegrityError(KktraceError):
    """A stored run does not match its recorded digests or format."""


class ProblemMismatchError(KktraceError, ValueError):
    """Two runs that were to be compared describe different problems."""


class ConvergenceWarning(UserWarning):
    """A solver stopped before its optimality test was met; the result says why."""


class DataWarning(UserWarning):
    """Input data are usable but suspicious.

    Examples: conflicting duplicates, constant or unscaled features.
    """


class StoreWarning(UserWarning):
    """A run was saved, but a side record was not brought up to date.

    Examples: the catalog was locked or unwritable (it is then stale until the next save
    indexes the folder), the audit log could not be appended to.
    """
