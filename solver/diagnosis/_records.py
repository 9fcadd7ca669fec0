"""Records of a diagnosis (:class:`Finding`, :class:`Phase`, :class:`Diagnosis`) and the codes."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = ["SEVERITIES", "FINDING_CODES", "Finding", "Phase", "Diagnosis", "NO_FINDING"]

#: Severity order: "stop" (the run's answer is not usable as is), "caution", "note" — the
#: same words as the report's flags.
SEVERITIES = ("stop", "caution", "note")

#: code → (what it means, which part of the run it needs: "trace" rows, "full" trace rows,
#: or "run" — problem, certificate, events, audit — which every stored run has).
FINDING_CODES: dict[str, tuple[str, str]] = {
    "not_converged": ("the solver stopped before its optimality test was met", "run"),
    "tolerance_not_met": ("the status says converged but the certificate misses kkt_tol", "run"),
    "long_plateau": ("most iterations were spent on a plateau between the fast decrease and "
                     "the final tail", "trace"),
    "stall": ("the maximal violation did not improve by the stated factor over a window",
              "trace"),
    "cycling": ("the same few working-set pairs repeat", "full"),
    "objective_increase": ("the recorded dual objective rose between iterations", "trace"),
    "kernel_near_identity": ("off-diagonal kernel values near 0 (γ too large)", "run"),
    "kernel_near_constant": ("kernel values nearly all equal up to sign (γ too small or "
                             "unscaled features)", "run"),
    "unscaled_features": ("features not standardised and their spreads differ widely", "run"),
    "collinear_features": ("two features are almost perfectly correlated", "run"),
    "penalty_large": ("C too large for overlapping classes: huge multipliers and a slow "
                      "duality-gap tail", "run"),
    "penalty_small": ("every support vector sits at its upper bound C", "run"),
    "indefinite_kernel": ("the kernel matrix has negative eigenvalues", "run"),
    "curvature_fixes": ("non-positive pair curvature was replaced by τ during the run", "run"),
    "conflicting_duplicates": ("identical rows carry opposite labels", "run"),
    "class_imbalance": ("one class is much smaller than the other", "run"),
    "numerical_drift": ("the solver's incrementally updated figures differ from ones rebuilt "
                        "from scratch", "run"),
    "shrinking_undone": ("shrinking had to be undone and the run went on over re-opened "
                         "variables", "run"),
}

NO_FINDING = ("no finding: none of the checks found a sign of a hard problem or of trouble "
              "in the optimisation")


@dataclass(frozen=True)
class Finding:
    """One finding of a diagnosis.

    code : stable identifier (a key of :data:`FINDING_CODES`).  severity : stop / caution /
    note.  summary : one plain sentence with the figures.  evidence : plain data (iteration
    ranges, figures, rows or features involved).  action : the suggested change, in words;
    ``try_change`` the same as a what-if change (e.g. ``"standardise"``, ``"C=0.01"``) or None.
    """

    code: str
    severity: str
    summary: str
    evidence: Mapping[str, Any]
    action: str
    try_change: str | None = None

    def __post_init__(self) -> None:
        if self.code not in FINDING_CODES:
            raise ValueError(f"unknown finding code {self.code!r}")
        if self.severity not in SEVERITIES:
            raise ValueError(f"unknown severity {self.severity!r}")

    def to_dict(self) -> dict[str, Any]:
        return {"code": self.code, "severity": self.severity, "summary": self.summary,
                "evidence": dict(self.evidence), "action": self.action,
                "try": self.try_change}


@dataclass(frozen=True)
class Phase:
    """One phase of a run: ``name`` (fast_decrease / plateau / final_tail), first and last
    iteration (inclusive), iteration count, and the violation and objective at its ends."""

    name: str
    first: int
    last: int
    iterations: int
    violation_start: float
    violation_end: float
    objective_start: float
    objective_end: float

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True, eq=False)
class Diagnosis:
    """What :func:`solver.diagnosis.diagnose` found for one run.

    findings : ordered stop → caution → note.  phases : the run's phases (empty without
    trace rows).  skipped : code → why that check could not run (e.g. no trace).
    checks : plain data of every figure the checks computed, found or not (windows,
    factors, thresholds, probe figures).
    """

    run_id: str | None
    status: str
    iterations: int
    trace_level: str | None
    findings: tuple[Finding, ...]
    phases: tuple[Phase, ...] = ()
    skipped: Mapping[str, str] = field(default_factory=dict)
    checks: Mapping[str, Any] = field(default_factory=dict)

    @property
    def codes(self) -> list[str]:
        """Finding codes in order."""
        return [f.code for f in self.findings]

    def worst(self) -> str | None:
        """The most severe severity present, or None without findings."""
        for s in SEVERITIES:
            if any(f.severity == s for f in self.findings):
                return s
        return None

    def statement(self) -> str:
        """One line: the count of findings by severity, or the plain no-finding sentence."""
        if not self.findings:
            return NO_FINDING
        parts = [f"{sum(f.severity == s for f in self.findings)} {s}" for s in SEVERITIES
                 if any(f.severity == s for f in self.findings)]
        return f"{len(self.findings)} finding(s): " + ", ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        return {"run_id": self.run_id, "status": self.status, "iterations": self.iterations,
                "trace_level": self.trace_level, "statement": self.statement(),
                "findings": [f.to_dict() for f in self.findings],
                "phases": [p.to_dict() for p in self.phases],
                "skipped": dict(self.skipped), "checks": dict(self.checks)}
