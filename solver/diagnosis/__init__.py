"""Diagnosis of one run: why it was hard, where in the run it went wrong, what would change it.

:func:`diagnose` takes a :class:`~solver.run.RunRecord` (as loaded from the store, or
straight from a solve) and returns a :class:`Diagnosis`: findings with stable codes
(:data:`FINDING_CODES`), severities (stop / caution / note), evidence and a suggested
action, plus the run's phases and every figure the checks computed.  It reads only the
record's arrays and plain data — nothing here opens files or evaluates stored text — and
its cost is O(trace rows) for the series checks plus one gradient O(n·|S|·d) and a kernel
probe of PROBE_ROWS rows.

Checks that need trace rows (phases, stall, cycling, objective rises) are listed in
``skipped`` with the reason when the run was stored with ``trace="off"`` (cycling also
needs a full trace); the others still run.  Thresholds are module constants of
:mod:`._series` and :mod:`._problem`, stated in every finding's evidence.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np

from ..certificate import certify
from ..kernels import PrecomputedKernel
from ..run import RunRecord
from ..status import Status
from . import _problem, _series
from ._records import FINDING_CODES, NO_FINDING, SEVERITIES, Diagnosis, Finding, Phase

__all__ = ["diagnose", "Diagnosis", "Finding", "Phase", "FINDING_CODES", "SEVERITIES",
           "NO_FINDING", "GAP_POINTS"]

#: snapshots of the run's second half at which the duality gap is rebuilt (penalty check)
GAP_POINTS = 5


def _pair_facts(record: RunRecord):
    prob = record.problem
    F = prob.features()
    precomputed = isinstance(prob.kernel, PrecomputedKernel)
    scale = float(np.median(np.linalg.norm(F[:200] - F[:200].mean(axis=0), axis=1))) or 1.0

    def describe(i: int, j: int) -> dict[str, Any]:
        opposite = bool(prob.y[i] != prob.y[j])
        if precomputed:
            kd = float(prob.kernel_block([i, i, j], [i, j, j])[[0, 0, 1], [0, 1, 2]] @
                       np.array([1.0, -2.0, 1.0]))
            rel = "zero curvature" if kd <= 0 else "distinct"
            return {"opposite_labels": opposite, "curvature": kd, "relation": rel}
        dist = float(np.linalg.norm(F[i] - F[j]))
        rel = ("exact duplicate" if dist == 0 else
               "near duplicate" if dist <= 1e-3 * scale else "distinct")
        if opposite and rel != "distinct":
            rel += ", opposite labels"
        return {"opposite_labels": opposite, "distance": dist, "relation": rel}

    return describe


def _gap_series(record: RunRecord) -> list[dict[str, Any]]:
    tr = record.result.trace
    if tr is None or tr.snapshot_iterations.size < 2:
        return []
    its = tr.snapshot_iterations
    half = np.flatnonzero(its >= its[-1] / 2)
    pick = np.unique(np.linspace(half[0], its.size - 1, min(GAP_POINTS, half.size)).astype(int))
    out = []
    for k in pick:
        c = certify(record.problem, tr.snapshots[k], kkt_tol=record.result.certificate.kkt_tol)
        out.append({"iteration": int(its[k]), "relative_gap": float(c.relative_gap),
                    "max_violation": float(c.max_violation)})
    return out


def _status_findings(record: RunRecord) -> list[Finding]:
    r, c = record.result, record.result.certificate
    if r.status != Status.CONVERGED:
        return [Finding(
            "not_converged", "stop",
            f"the run stopped with status {r.status.label} after {r.iterations} iterations: "
            f"maximal violation {c.max_violation:.3g} against kkt_tol {c.kkt_tol:g}, "
            f"relative duality gap {c.relative_gap:.3g}",
            {"status": r.status.label, "message": r.message, "iterations": int(r.iterations),
             "max_violation": c.max_violation, "kkt_tol": c.kkt_tol,
             "relative_gap": c.relative_gap},
            "its multipliers are not an optimal solution: resume it (kktrace resume) or act "
            "on the other findings first")]
    if not c.meets_tol:
        return [Finding(
            "tolerance_not_met", "stop",
            f"the status is converged but the certificate's maximal violation "
            f"{c.max_violation:.3g} exceeds kkt_tol {c.kkt_tol:g}",
            {"max_violation": c.max_violation, "kkt_tol": c.kkt_tol},
            "resume the run or re-run it with the same kkt_tol")]
    return []


def diagnose(record: RunRecord) -> Diagnosis:
    """Findings, phases and check figures for one SMO (or other) run; see the module notes."""
    res, prob = record.result, record.problem
    cert, tr = res.certificate, res.trace
    kkt_tol = float(cert.kkt_tol)
    precomputed = isinstance(prob.kernel, PrecomputedKernel)
    names = list(record.data.get("feature_names") or []) or None
    std = record.standardiser
    standardised = not bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    findings = _status_findings(record)
    checks: dict[str, Any] = {}
    skipped: dict[str, str] = {}
    phases: tuple[Phase, ...] = ()

    cols = tr.columns if tr is not None else {}
    has_rows = tr is not None and tr.n_rows > 0 and "violation" in cols
    if has_rows:
        it = np.asarray(cols["iteration"])
        viol, objective = np.asarray(cols["violation"]), np.asarray(cols["objective"])
        wi, wj = np.asarray(cols["i"]), np.asarray(cols["j"])
        phases, plateau, checks["phases"] = _series.phases(it, viol, objective, kkt_tol=kkt_tol)
        st, stretch, checks["stall"] = _series.stall(it, viol, wi, wj, kkt_tol=kkt_tol)
        rise, checks["objective_increase"] = _series.objective_increase(it, objective)
        if st is not None and res.options.get("selection") == "first_order":
            st = replace(st, try_change="selection=second_order")
        findings += [f for f in (plateau, st, rise) if f is not None]
        if tr.level == "full":
            cyc, checks["cycling"] = _series.cycling(it, wi, wj, stretch, _pair_facts(record),
                                                      converged=res.status == Status.CONVERGED)
            if cyc is not None:
                findings.append(cyc)
        else:
            skipped["cycling"] = (f"needs a full trace (this run's trace is {tr.level}: "
                                  "sampled rows do not show consecutive pairs)")
    else:
        why = ("the run was stored without trace rows (trace level off)" if tr is not None
               else "the run has no trace")
        if tr is not None and tr.n_rows > 0:
            why = (f"the {tr.solver} trace has no per-iteration violation column (these "
                   "checks read SMO traces)")
        for code, (_, need) in FINDING_CODES.items():
            if need in ("trace", "full"):
                skipped[code] = f"needs the trace: {why}"

    events = tr.events if tr is not None else {"iteration": np.zeros(0, np.int64),
                                               "kind": np.zeros(0, np.int8),
                                               "value": np.zeros(0)}
    kinds = dict(tr.event_kinds) if tr is not None else {}
    if tr is not None:
        sh, checks["shrinking"] = _series.unshrink_reopened(events, kinds, prob.n,
                                                            int(res.iterations))
        if sh is not None:
            findings.append(sh)

    probe = _problem.kernel_probe(prob)
    checks["kernel_probe"] = probe
    sv_share = (cert.n_free + cert.n_bounded) / prob.n
    gamma = getattr(prob.kernel, "gamma", None)
    findings += _problem.conditioning(probe, sv_share, None if gamma is None else float(gamma))
    audit = record.attachments.get("audit") if record.attachments else None
    ind, checks["indefinite"] = _problem.indefinite(probe, audit, events, kinds,
                                                    prob.kernel.is_psd)
    findings += ind
    converged = res.status == Status.CONVERGED
    slow = (not converged) or res.iterations >= 50 * prob.n
    gaps = _gap_series(record) if slow else []
    scale = _problem.unscaled(prob, standardised, names, precomputed)
    findings += _problem.penalty(prob, np.asarray(res.alpha), cert, converged=converged,
                                 iterations=int(res.iterations), gap_series=gaps,
                                 unscaled=bool(scale))
    findings += _problem.duplicates(prob, precomputed)
    findings += _problem.imbalance(prob)
    findings += _problem.collinear(prob, names, precomputed)
    findings += scale
    last_value = float(cols["objective"][-1]) if has_rows else None
    loop_value = res.extra.get("loop_objective") if res.extra else None
    dr, checks["drift"] = _problem.drift(prob, np.asarray(res.alpha), cert, kkt_tol,
                                         None if loop_value is None else float(loop_value),
                                         last_value)
    findings += dr
    order = {s: k for k, s in enumerate(SEVERITIES)}
    findings.sort(key=lambda f: order[f.severity])
    return Diagnosis(run_id=record.run_id, status=res.status.label,
                     iterations=int(res.iterations),
                     trace_level=None if tr is None else tr.level, findings=tuple(findings),
                     phases=phases, skipped=skipped, checks=checks)
