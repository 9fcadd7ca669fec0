"""One status vocabulary for every solver, with one message table.

Backends map their own codes into :class:`Status` and keep their raw code in the
message text, so a result always says both what kktrace concluded and what the
backend reported.
"""

from __future__ import annotations

import enum


class Status(enum.IntEnum):
    """Why a solver stopped.  Only ``CONVERGED`` means the optimality test was met."""

    CONVERGED = 0
    ITERATION_LIMIT = 1
    TIME_LIMIT = 2
    STALLED = 3
    NUMERICAL_ERROR = 4
    SINGULAR_KKT = 5
    STOPPED_BY_CALLBACK = 6
    NOT_OPTIMAL = 7

    @property
    def label(self) -> str:
        """Lower-case name used in manifests, JSON and the CLI (e.g. ``"iteration_limit"``)."""
        return self.name.lower()

    @classmethod
    def from_label(cls, label: str) -> Status:
        """Inverse of :attr:`label`; raises ``ValueError`` for an unknown label."""
        try:
            return cls[label.upper()]
        except KeyError:
            raise ValueError(f"unknown status label {label!r}") from None


MESSAGES: dict[Status, str] = {
    Status.CONVERGED: "optimality test met: maximal KKT violation within tolerance",
    Status.ITERATION_LIMIT: "stopped at the iteration limit before the optimality test was met",
    Status.TIME_LIMIT: "stopped at the wall-clock budget before the optimality test was met",
    Status.STALLED: "stopped because the objective did not decrease over a long window",
    Status.NUMERICAL_ERROR: "stopped on a non-finite or inconsistent intermediate value",
    Status.SINGULAR_KKT: "the interior-point Newton system became singular",
    Status.STOPPED_BY_CALLBACK: "stopped on request of a progress callback",
    Status.NOT_OPTIMAL: "a supplied (external) solution that does not meet the optimality test",
}


def status_message(status: Status, detail: str = "") -> str:
    """The table message for ``status``, with an optional backend detail appended."""
    base = MESSAGES[Status(status)]
    return f"{base} ({detail})" if detail else base
