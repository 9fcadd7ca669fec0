"""JSON summary of a report for documentation pipelines; schema: ``summary.schema.json``.

Same figures as the HTML and PDF: identity, certificate, counts, flags, comparison, held-out
scores, plus each convergence series as per-bucket minimum and maximum (at most 200 buckets).
Non-finite numbers are written as ``null``.
"""

from __future__ import annotations

import json
from importlib import resources
from typing import Any

from ..plaindata import to_plain
from ..vocabulary import json_key
from .content import ReportContent, RunContent

__all__ = ["SCHEMA_ID", "summary_dict", "summary_json", "load_schema"]

SCHEMA_ID = "kktrace-report-summary"
SCHEMA_VERSION = 1

_TERMINATION_KEYS = (
    "status", "message", "converged", "iterations", "seconds", "solve_seconds",
    "compile_seconds", "setup_seconds", "total_seconds", "phase_seconds", "kkt_tol",
    "max_violation",
    "meets_tol", "m_up", "M_low", "dual_objective", "primal_objective", "duality_gap",
    "relative_gap", "bias", "bias_from", "decision_values_from", "bound_violation",
    "equality_residual",
    "max_kkt_residual",
)


def _run(r: RunContent) -> dict[str, Any]:
    t = r.termination
    term = {k: t.get(k) for k in _TERMINATION_KEYS}
    return {
        "label": r.label,
        "run_id": r.run_id,
        "solver": r.solver,
        "identity": {json_key(k): v for k, v in r.identity},
        "environment": {json_key(k): v for k, v in r.environment},
        "reproduce": {"command": r.reproduce_command, "python": r.reproduce_code},
        "data": dict(r.data_facts),
        "data_warnings": list(r.data_warnings),
        "problem": {json_key(k): v for k, v in r.problem},
        "options": {json_key(k): v for k, v in r.options},
        "kernel_audit": None if r.audit is None else {json_key(k): v for k, v in r.audit},
        "termination": term,
        "counts": {"support": t.get("n_support"), "free": t.get("n_free"),
                   "bounded": t.get("n_bounded"), "zero": t.get("n_zero")},
        "replay": (None if "replay_reproduced" not in t else
                   {"reproduced": t["replay_reproduced"],
                    "max_abs_difference": t.get("replay_max_difference")}),
        "events": dict(t.get("events") or {}),
        "categories": dict(r.categories),
        "categories_source": r.categories_source,
        "influential": (None if r.influential is None else
                        {"columns": list(r.influential.columns),
                         "rows": [list(row) for row in r.influential.rows],
                         "order": r.influential.note, "null_means": r.influential.blank or None}),
        "holdout": None if r.holdout is None else dict(r.holdout),
        "leave_one_out": None if not r.loo_facts else dict(r.loo_facts),
        "evidence": dict(r.evidence_facts),
        "decision_rule": {json_key(k): v for k, v in r.decision_rule},
        "standardiser": (None if r.scaling is None else
                         {"features": [row[0] for row in r.scaling.rows],
                          "centre": [row[1] for row in r.scaling.rows],
                          "scale": [row[2] for row in r.scaling.rows]}),
        "calibration": None if r.calibration is None else r.calibration.to_dict(),
        "series": {k: dict(v) for k, v in r.series.items()},
        "figures": [{"key": f.key, "title": f.title, "caption": f.caption}
                    for f in (*r.figures, *(x for x in (r.decision_map, r.loo_figure) if x),
                              *(r.task_section.figures if r.task_section else ()),
                              *(r.calibration.figures if r.calibration is not None else ()))],
        "task_section": _task_section(r),
        "diagnosis": {"statement": r.diagnosis_note,
                      "findings": [] if r.diagnosis is None else [
                          dict(zip(("severity", "code", "summary", "action"), row, strict=True))
                          for row in r.diagnosis.rows],
                      "skipped": dict(r.diagnosis_skipped)},
        "flags": [{"code": f.code, "severity": f.severity, "message": f.message}
                  for f in r.flags],
    }


def _task_section(r: RunContent) -> dict[str, Any] | None:
    ts = r.task_section
    if ts is None:
        return None
    return {"task": ts.task, "title": ts.title, "intro": ts.intro,
            "facts": {k: v for k, v in ts.facts},
            "tables": [{"columns": list(t.columns), "rows": [list(row) for row in t.rows],
                        "note": t.note} for t in ts.tables]}


def summary_dict(content: ReportContent) -> dict[str, Any]:
    """The summary as plain JSON-ready data."""
    c = content
    comp = None
    if c.comparison:
        comp = {"verdict": c.comparison["verdict"],
                "verdict_text": c.comparison.get("verdict_text") or "",
                "failed": list(c.comparison["failed"]),
                "measures": [dict(m) for m in c.comparison["measures"]]}
    out = {
        "schema": SCHEMA_ID,
        "schema_version": SCHEMA_VERSION,
        "title": c.title,
        "generated": c.generated,
        "kktrace_version": c.kktrace_version,
        "all_converged": c.converged,
        "caution": c.caution,
        "notes": c.notes,
        "runs": [_run(r) for r in c.runs],
        "comparison": comp,
        "flags": [{"code": f.code, "severity": f.severity, "message": f.message, "run": f.run}
                  for f in c.flags],
        "overlay": None if c.overlay is None else {
            "seconds_note": c.overlay.data["seconds_note"],
            "runs": [{"label": r["label"], "run_id": r["run_id"], "solver": r["solver"],
                      "status": r["status"], "measure": r["measure"],
                      "iterations": r["iterations"][-1], "seconds": r["seconds"][-1],
                      "best": min(r["violation"]), "objective_gap": r["objective_gap"][-1]}
                     for r in c.overlay.data["runs"]]},
    }
    return to_plain(out, nonfinite_as_none=True, other=str)


def summary_json(content: ReportContent) -> str:
    """The summary as JSON text (UTF-8, indented, keys in a fixed order)."""
    return json.dumps(summary_dict(content), indent=1, ensure_ascii=False, allow_nan=False)


def load_schema() -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) the summary follows."""
    text = resources.files("solver.reporting").joinpath("summary.schema.json").read_text("utf-8")
    return json.loads(text)
