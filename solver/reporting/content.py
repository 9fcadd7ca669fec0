"""Gather everything a report shows from stored runs into one plain-data :class:`ReportContent`.

The renderers (:mod:`.html`, :mod:`.pdf`, :mod:`.summary`) only lay out what is collected
here, so the three formats always carry the same figures.  Long traces are downsampled for
plotting (min/max per bucket, :func:`._series.minmax_downsample`); stored arrays are read,
never changed.  Any missing attachment leaves its section saying "not available".
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import datetime, timezone
from typing import Any

import numpy as np

from ..run import RunRecord
from ..status import Status, settle
from ._calibration import calibration_content
from ._convergence import _trace_figures
from ._evidence import _decision_items, _evidence_items, _scaling_table
from ._flags import AGREE_VERDICTS, LOOSE_VERDICTS, _comparison, _run_flags
from ._points import _categories, _confusion, _decision_map, _influential, _loo
from ._provenance import (
    _audit_verdict,
    _command_parts,
    _identity,
    _problem_items,
    _reproduce_code,
)
from ._records import (
    CAUTION,
    SEVERITIES,
    FigureData,
    Flag,
    ReportContent,
    RunContent,
    Table,
    _as_mapping,
    _plain,
    _scalar_items,
    _status_of,
)
from ._task import _parent_section, _task_section

__all__ = [
    "AGREE_VERDICTS",
    "CAUTION",
    "LOOSE_VERDICTS",
    "Flag",
    "Table",
    "FigureData",
    "RunContent",
    "ReportContent",
    "build_report_content",
]


def _diagnosis(rec: RunRecord) -> tuple[Table | None, str, dict[str, str]]:
    """The diagnosis table of one run (findings with codes, severities and actions)."""
    from ..diagnosis import diagnose

    try:
        d = diagnose(rec)
    except Exception as exc:  # noqa: BLE001 - a failed check must not lose the report
        return None, f"Diagnosis not available: {type(exc).__name__}: {exc}", {}
    rows = tuple((f.severity, f.code, f.summary, f.action) for f in d.findings)
    table = Table(("severity", "code", "finding", "suggested action"), rows) if rows else None
    return table, d.statement(), dict(d.skipped)


def _overlay(runs: Sequence[RunRecord], labels: list[str]) -> tuple[FigureData | None, str]:
    """The side-by-side convergence figure of two or more runs of one problem."""
    from ..diagnosis.overlay import overlay_series
    from ..errors import InvalidInputError

    if len(runs) < 2:
        return None, ""
    try:
        d = overlay_series(runs, labels)
    except InvalidInputError as exc:
        return None, f"Side-by-side convergence not shown: {exc}"
    if len(d["runs"]) < 2:
        return None, ("Side-by-side convergence not shown: fewer than two of the runs have "
                      "trace rows.")
    return FigureData(
        key="overlay", kind="overlay", title="Convergence of the runs side by side",
        caption=("Best maximal violation so far (relative gap for interior-point runs) and "
                 "objective gap (D − D*)/max(1, |D*|), D* the lowest objective rebuilt from "
                 "the runs' multipliers, against iterations (left) and seconds (right); "
                 + d["seconds_note"] + "."), data=d), ""


def _run_content(rec: RunRecord, label: str, holdout: Mapping | None,
                 evidence: Mapping[str, Any] | None = None) -> RunContent:
    res = rec.result
    cert = res.certificate
    status = _status_of(res)
    message = str(res.message)
    if status is not None:  # the status rule, also for runs stored before it was applied
        ruled, ruled_message = settle(status, f"stored status {status.label!r}: {message}",
                                      cert.max_violation, cert.kkt_tol)
        if ruled != status:
            status, message = ruled, ruled_message
    cd = cert.to_dict()
    term: dict[str, Any] = {
        "status": status.label if status is not None else str(res.status),
        "message": message,
        "converged": status == Status.CONVERGED,
        "iterations": int(res.iterations),
        "seconds": float(res.seconds),
        **res.timing,
        **{k: _plain(v) for k, v in cd.items()},
    }
    ident, env = _identity(rec, label)
    cats, cat_src = _categories(rec)
    figs, fig_notes, facts, series = _trace_figures(rec, label, cats)
    if "replay" in facts:
        term["replay_reproduced"] = facts["replay"]["reproduced"]
        term["replay_max_difference"] = facts["replay"]["max_abs_difference"]
    term["events"] = facts.get("event_counts", {})
    att = rec.attachments or {}
    term["phase_seconds"] = {str(k): float(v) for k, v in
                             (_as_mapping(att.get("phases")) or {}).items()}
    values = _as_mapping(att.get("explanation_values"))
    term["decision_values_from"] = (str(values["reason"]) if values and "reason" in values
                                    else None)
    audit = _as_mapping(att.get("audit"))
    sel = None
    tr = res.trace
    if tr is not None and tr.level == "full" and "i" in tr.columns and rec.problem.n:
        sel = (np.bincount(np.asarray(tr.columns["i"], np.int64), minlength=rec.problem.n)
               + np.bincount(np.asarray(tr.columns["j"], np.int64), minlength=rec.problem.n))
    infl, infl_note = _influential(rec, sel)
    loo_table, loo_fig, loo_note, loo_facts = _loo(rec, label)
    ev_rows, ev_facts = _evidence_items(rec, evidence)
    hold = _as_mapping(holdout) if holdout is not None else _as_mapping(att.get("holdout"))
    confusion = _confusion(hold, rec.problem.labels) if hold else None
    try:
        dmap, dnote = _decision_map(rec, label, cats)
    except Exception as exc:  # noqa: BLE001 - a map failure must not lose the report
        dmap, dnote = None, f"Decision map not available: {type(exc).__name__}: {exc}"
    flags = _run_flags(rec, label, term, audit, facts)
    section, section_note = _task_section(rec, label)
    if section is not None:
        flags += list(section.flags)
    diag, diag_note, diag_skipped = _diagnosis(rec)
    cmd_text, cmd_py, cmd_note = _command_parts(att.get("command"))
    uniq, counts = np.unique(cats, return_counts=True)
    data_facts = {
        "fingerprint": rec.data.get("fingerprint"), "source": rec.data.get("source"),
        "n_rows": _plain(rec.data.get("n_rows", rec.problem.n)),
        "feature_names": [str(v) for v in (rec.data.get("feature_names") or [])],
        "label_name": rec.data.get("label_name"),
    }
    return RunContent(
        label=label, run_id=rec.run_id, solver=str(res.solver), identity=ident,
        environment=env, reproduce_command=cmd_text, reproduce_python=cmd_py,
        reproduce_note=cmd_note,
        reproduce_code=_reproduce_code(rec), problem=_problem_items(rec),
        options=_scalar_items(res.options, skip=("callback",)),
        audit=_scalar_items(audit) if audit else None,
        audit_verdict=_audit_verdict(audit, rec),
        data_warnings=tuple(str(w) for w in (rec.data.get("warnings") or ())),
        termination=term, figures=tuple(figs), figure_notes=tuple(fig_notes),
        categories={str(k): int(v) for k, v in zip(uniq, counts, strict=True)},
        categories_source=cat_src,
        influential=infl, influential_note=infl_note, loo=loo_table, loo_figure=loo_fig,
        loo_note=loo_note, holdout={k: _plain(v) for k, v in hold.items()} if hold else None,
        confusion=confusion, decision_map=dmap, decision_note=dnote, flags=tuple(flags),
        series=series, data_facts=data_facts, task_section=section, task_note=section_note,
        calibration=calibration_content(_as_mapping(att.get("calibration")), label),
        diagnosis=diag, diagnosis_note=diag_note, diagnosis_skipped=diag_skipped,
        loo_facts=loo_facts, evidence=ev_rows, evidence_facts=ev_facts,
        decision_rule=_decision_items(rec), scaling=_scaling_table(rec),
    )


def _title_names(runs: Sequence[RunRecord], contents: Sequence[RunContent]) -> str:
    """The runs by label: ``run A (smo) and run B (qp, challenger of run A)``."""
    names = []
    for k, (rec, rc) in enumerate(zip(runs, contents, strict=True)):
        role = (f", challenger of {contents[0].label}"
                if k > 0 and rec.parent_id and rec.parent_id == runs[0].run_id else "")
        names.append(f"{rc.label} ({rc.solver}{role})")
    return names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]


def build_report_content(
    runs: Sequence[RunRecord],
    *,
    comparison: Any | Mapping | None = None,
    holdout: Mapping | None = None,
    notes: str | None = None,
    title: str | None = None,
    generated: str | None = None,
    parent: Any = None,
    parent_members: Sequence[RunRecord] = (),
    evidence: Sequence[Mapping[str, Any] | None] | None = None,
) -> ReportContent:
    """Collect the report for ``runs`` (one or more stored runs) as plain data.

    parent, parent_members : a parent record (multi-class model) and all its member runs
        in member order; its task's section goes on the first run's pages (the runs are
        then the pair shown in full and its challenger).

    comparison : a :class:`solver.agreement.Comparison` or its ``to_dict()``; default the first
        ``"comparison"`` attachment found on the runs.
    holdout : held-out scores for the first run (default: each run's ``"holdout"`` attachment).
    notes : free text from the person preparing the report (shown escaped).
    generated : ISO time stamp to print (default now, UTC, ``Z`` form).
    evidence : per run, what :meth:`solver.store.RunStore.load_verified` found while the
        report is written (manifest digest, files checked, chain; None: not read from a
        store).
    """
    from .. import __version__
    from ..errors import InvalidInputError

    runs = list(runs)
    if not runs:
        raise InvalidInputError("a report needs at least one run")
    for k, r in enumerate(runs):
        if not isinstance(r, RunRecord):
            raise InvalidInputError(f"report input {k} is a {type(r).__name__}, not a RunRecord")
    letters = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    contents = []
    for k, rec in enumerate(runs):
        label = f"run {letters[k]}" if k < len(letters) else f"run {k + 1}"
        ev = evidence[k] if evidence is not None and k < len(evidence) else None
        contents.append(_run_content(rec, label, holdout if k == 0 else None, ev))
    if parent is not None:
        import dataclasses

        sec, sec_note = _parent_section(parent, list(parent_members), contents[0].label)
        first = contents[0]
        contents[0] = dataclasses.replace(
            first, task_section=sec if sec is not None else first.task_section,
            task_note=sec_note or first.task_note,
            flags=tuple(first.flags) + (tuple(sec.flags) if sec is not None else ()))
    comp_src = comparison
    if comp_src is None:
        comp_src = next((r.attachments.get("comparison") for r in runs
                         if r.attachments and r.attachments.get("comparison") is not None), None)
    comp, comp_flags = _comparison(comp_src)
    comp_note = "" if comp else ("Challenger comparison not available: no second solver's run "
                                 "was compared with this one.")
    flags = [f for rc in contents for f in rc.flags] + comp_flags
    flags.sort(key=lambda f: SEVERITIES.index(f.severity))
    if title is None and parent is not None:
        title = (f"Convergence and audit record — multi-class model {parent.run_id} "
                 f"(pair run {runs[0].run_id} in full)")
    if title is None:
        title = "Convergence and audit record — " + _title_names(runs, contents)
    overlay, overlay_note = _overlay(runs, [rc.label for rc in contents])
    return ReportContent(
        overlay=overlay, overlay_note=overlay_note,
        title=title,
        generated=generated or datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        kktrace_version=__version__, caution=CAUTION, notes=notes, runs=tuple(contents),
        comparison=comp, comparison_note=comp_note, flags=tuple(flags),
    )
