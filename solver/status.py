"""One status vocabulary for every solver, with one message table and one status rule.

Backends map their own codes into :class:`Status` and keep their raw code in the
message text, so a result always says both what kktrace concluded and what the
backend reported.

**The status rule** (:func:`decide`, the only place it is written): a run is
``converged`` only when its backend's own stopping test was met *and* the shared
certificate (:mod:`solver.certificate`) meets the run's ``kkt_tol``.  A backend that says
it finished while the certificate's maximal violation exceeds ``kkt_tol`` gives status
``certificate_not_met``; the backend's own word stays in the message.  Every solver
applies the rule to its result, the store applies it again to every run it reads, and
train, compare, replay, the report and every JSON output read the status it gives.
"""

from __future__ import annotations

import enum

from .vocabulary import figure_text


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
    CERTIFICATE_NOT_MET = 8

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
    Status.CERTIFICATE_NOT_MET: "the solver's own stopping test was met, but the shared "
                                "certificate's maximal KKT violation exceeds kkt_tol",
}


def status_message(status: Status, detail: str = "") -> str:
    """The table message for ``status``, with an optional backend detail appended."""
    base = MESSAGES[Status(status)]
    return f"{base} ({detail})" if detail else base


def decide(backend_status: Status, max_violation: float, kkt_tol: float) -> Status:
    """The status rule: ``backend_status`` unless it is CONVERGED while the shared
    certificate's ``max_violation`` exceeds ``kkt_tol`` (then CERTIFICATE_NOT_MET).

    A NaN violation does not meet the tolerance.
    """
    backend_status = Status(backend_status)
    if backend_status == Status.CONVERGED and not max_violation <= kkt_tol:
        return Status.CERTIFICATE_NOT_MET
    return backend_status


def settle(backend_status: Status, detail: str, max_violation: float,
           kkt_tol: float) -> tuple[Status, str]:
    """Status and message of a result under :func:`decide`.

    ``detail`` is the backend's own word (e.g. ``"cvxopt status 'optimal'"``); it stays in
    the message, followed by both figures when the certificate overrules the backend.
    """
    status = decide(backend_status, max_violation, kkt_tol)
    if status != backend_status:
        own = f"{detail}; " if detail else ""
        detail = (f"{own}shared certificate maximal violation {figure_text(max_violation)} "
                  f"> kkt_tol {figure_text(kkt_tol)}")
    return status, status_message(status, detail)
