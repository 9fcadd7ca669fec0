"""One self-contained HTML file: inline CSS and SVG, no scripts, no fonts or links fetched.

Every value that can come from the user (run ids, column names, labels, file names, notes,
attachment texts) passes through :func:`esc` (``html.escape``).  A Content-Security-Policy
meta tag forbids scripts and remote loads as a second line of defence.
"""

from __future__ import annotations

import html
import re
from collections.abc import Mapping, Sequence
from importlib import resources
from typing import Any

from ..vocabulary import figure_text, heading, label, phase_label
from ._records import figure_numbers, section_numbers
from .content import AGREE_VERDICTS, LOOSE_VERDICTS, Flag, ReportContent, RunContent, Table
from .figures import figure_svg

__all__ = ["render_html", "esc", "fmt", "comparison_table"]

_CSP = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; "
        "form-action 'none'")
#: Held-out keys shown as the confusion table rather than as plain values.
HOLDOUT_TABLE_KEYS = ("confusion_matrix", "confusion", "matrix", "labels")
_POWER = re.compile(r"×10\^(-?[0-9]+)")
_SEVERITY_MARK = {"stop": "■", "caution": "▲", "note": "●"}
_SEVERITY_WORD = {"stop": "stop", "caution": "caution", "note": "note"}


def esc(v: Any) -> str:
    """HTML-escaped text of ``v`` (quotes included)."""
    return html.escape(str(v), quote=True)


def fmt(v: Any) -> str:
    """Display text for a plain value (:func:`solver.vocabulary.figure_text`, the exponent
    as ``×10^n`` for :func:`_num_html` to set as a superscript)."""
    if isinstance(v, Mapping):
        return "; ".join(f"{k}: {fmt(x)}" for k, x in v.items()) or "—"
    if isinstance(v, (list, tuple)):
        return ", ".join(fmt(x) for x in v) or "—"
    return figure_text(v, power="caret")


def _num_html(v: Any) -> str:
    """Escaped display text, with powers of ten set as superscripts."""
    return _POWER.sub(r"×10<sup>\1</sup>", esc(fmt(v)))


def _css() -> str:
    return resources.files("solver.reporting").joinpath("report.css").read_text(encoding="utf-8")


def _cell_class(v: Any) -> str:
    return "num" if isinstance(v, (int, float)) and not isinstance(v, bool) else "txt"


class _Doc:
    """Small HTML builder that numbers figures and sections."""

    def __init__(self) -> None:
        self.parts: list[str] = []
        self.n_fig = 0
        #: id(figure) → number (:func:`._records.figure_numbers`), set by render_html
        self.numbers: dict[int, int] = {}

    def add(self, s: str) -> None:
        self.parts.append(s)

    def kv(self, items: Sequence[tuple[str, Any]], cls: str = "kv") -> None:
        rows = "".join(f"<tr><th scope=\"row\">{esc(label(k))}</th><td>{_num_html(v)}</td></tr>"
                       for k, v in items)
        self.add(f'<table class="{cls}"><tbody>{rows}</tbody></table>')

    def table(self, t: Table, cls: str = "grid", detail: str | None = None) -> None:
        """Render ``t``; a column named ``detail`` becomes a full-width line under each row."""
        d = t.columns.index(detail) if detail in t.columns else None
        cols = [c for k, c in enumerate(t.columns) if k != d]
        head = "".join(f'<th scope="col">{esc(heading(c))}</th>' for c in cols)
        body = []
        for row in t.rows:
            cells = "".join(f'<td class="{_cell_class(v)}">'
                            f'{esc(t.blank) if v is None and t.blank else _num_html(v)}</td>'
                            for k, v in enumerate(row) if k != d)
            if d is None:
                body.append(f"<tr>{cells}</tr>")
            else:
                body.append(f'<tr class="main">{cells}</tr><tr class="detail"><td '
                            f'colspan="{len(cols)}">{esc(row[d])}</td></tr>')
        note = f'<caption>{esc(t.note)}</caption>' if t.note else ""
        self.add(f'<div class="tablewrap"><table class="{cls}">{note}<thead><tr>{head}</tr>'
                 f'</thead><tbody>{"".join(body)}</tbody></table></div>')

    def figure(self, fd: Any) -> None:
        self.n_fig = self.numbers.get(id(fd), self.n_fig + 1)  # shared with the PDF
        prefix = f"k{self.n_fig}"
        svg = figure_svg(fd, prefix)
        label = esc(fd.title)
        svg = svg.replace("<svg", f'<svg role="img" aria-label="{label}"', 1)
        self.add(f'<figure class="plot" id="figure-{self.n_fig}"><div class="svgbox">{svg}</div>'
                 f'<figcaption><span class="figno">Figure {self.n_fig}</span> '
                 f'<span class="figtitle">{label}.</span> {esc(fd.caption)}</figcaption></figure>')

    def missing(self, text: str) -> None:
        self.add(f'<p class="absent">{esc(text)}</p>')


def _flag_list(flags: Sequence[Flag]) -> str:
    if not flags:
        return '<p class="noflags">No flags raised.</p>'
    items = "".join(
        f'<li class="flag {esc(f.severity)}"><span class="sev" aria-hidden="true">'
        f'{_SEVERITY_MARK.get(f.severity, "●")}</span><span class="sevword">'
        f'{esc(_SEVERITY_WORD.get(f.severity, f.severity))}</span> {esc(f.message)}'
        f' <span class="code">[{esc(f.code)}]</span></li>' for f in flags)
    return f'<ul class="flags">{items}</ul>'


def _evidence_line(r: RunContent) -> str:
    """Run id, manifest digest and the verification done while writing, in one line."""
    ev = r.evidence_facts
    if not ev.get("manifest_sha256"):
        return f"run id {r.run_id or 'not stored'}; not read from a store, so not verified"
    state = "verified" if ev.get("verified") else "FAILED verification"
    return (f"run id {r.run_id}; manifest SHA-256 {ev['manifest_sha256']}; {state} while "
            f"writing this report ({ev.get('checked_at')})")


def _banner(c: ReportContent) -> str:
    rows = []
    for r in c.runs:
        t = r.termination
        ok = bool(t.get("converged"))  # the status rule: solver.status.decide
        word = "CONVERGED" if ok else "NOT CONVERGED"
        cls = "ok" if ok else "bad"
        rows.append(
            f'<div class="state {cls}"><p class="stateword">{esc(r.label)} · {esc(r.solver)} · '
            f"<strong>{word}</strong></p><p>status <code>{esc(t.get('status'))}</code> after "
            f"{_num_html(t.get('iterations'))} iterations — {esc(t.get('message'))}</p>"
            f"<p>maximal violation {_num_html(t.get('max_violation'))} against kkt_tol "
            f"{_num_html(t.get('kkt_tol'))}; duality gap {_num_html(t.get('duality_gap'))} "
            f"(relative {_num_html(t.get('relative_gap'))})</p>"
            f"<p>{esc(_evidence_line(r))}</p></div>")
    if c.comparison:
        v = c.comparison["verdict"]
        cls = ("ok" if v in AGREE_VERDICTS and not c.comparison["failed"]
               else "loose" if v in LOOSE_VERDICTS else "bad")
        text = c.comparison.get("verdict_text") or ""
        rows.append(f'<div class="state {cls}"><p class="stateword">'
                    f"challenger comparison · <strong>{esc(v)}</strong></p>"
                    + (f"<p>{esc(text)}</p>" if text else "") + "</div>")
    return f'<section class="banner" aria-label="outcome">{"".join(rows)}</section>'


def _keyfigs(c: ReportContent) -> str:
    cells = []
    for r in c.runs:
        t = r.termination
        figs = [("iterations", t.get("iterations")), ("dual objective", t.get("dual_objective")),
                ("primal objective", t.get("primal_objective")),
                ("duality gap", t.get("duality_gap")),
                ("support vectors", t.get("n_support")), ("at upper bound", t.get("n_bounded")),
                ("free", t.get("n_free")), ("solve time (s)", t.get("solve_seconds")),
                ("compile time (s)", t.get("compile_seconds"))]
        items = "".join(f"<div><dt>{esc(k)}</dt><dd>{_num_html(v)}</dd></div>" for k, v in figs)
        cells.append(f'<div class="keyrun"><p class="keylabel">{esc(r.label)}</p>'
                     f'<dl class="keyfigs">{items}</dl></div>')
    return "".join(cells)


def _contents(c: ReportContent) -> str:
    def item(mark: str, href: str, text: str) -> str:
        return f'<li><span class="navno">{mark}</span><a href="#{href}">{text}</a></li>'

    items = [item("!", "flags", "Flags raised")]
    for k, r in enumerate(c.runs, start=1):
        items.append(item(str(k), f"run-{k}", f"Record of {esc(r.label)}"))
    items.append(item(str(len(c.runs) + 1), "challenger", "Challenger cross-check"))
    if c.notes:
        items.append(item("✎", "notes", "Notes from the preparer"))
    items.append(item("§", "scope", "Scope of this record"))
    return f'<nav class="contents" aria-label="contents"><ul>{"".join(items)}</ul></nav>'


def _phase_text(phases: Any) -> str | None:
    """``load 0.41 · audit 0.12 · solver call 1.20 …`` (solver.phases; the solve phase is
    the whole solver call, so it is not labelled "solve"), or None when not recorded."""
    if not phases:
        return None
    return " · ".join(f"{phase_label(k)} {float(v):.3g}" for k, v in dict(phases).items())


def _termination_rows(t: Mapping[str, Any]) -> list[tuple[str, Any]]:
    meets = t.get("meets_tol")
    rows = [
        ("status", t.get("status")), ("message", t.get("message")),
        ("iterations", t.get("iterations")), ("solve time (s)", t.get("solve_seconds")),
        ("compile time (s)", t.get("compile_seconds")), ("set-up time (s)", t.get("setup_seconds")),
        ("whole solver call (s)", t.get("seconds")),
        ("phases of the fit (s)", _phase_text(t.get("phase_seconds"))),
        ("decision values of the point table", t.get("decision_values_from")),
        ("tolerance (kkt_tol)", t.get("kkt_tol")), ("final maximal violation",
                                                    t.get("max_violation")),
        ("violation within kkt_tol", meets),
        ("m(α) (max over I_up)", t.get("m_up")), ("M(α) (min over I_low)", t.get("M_low")),
        ("dual objective (minimised)", t.get("dual_objective")),
        ("primal objective", t.get("primal_objective")),
        ("duality gap (primal + dual)", t.get("duality_gap")),
        ("relative gap", t.get("relative_gap")),
        ("bias b", t.get("bias")), ("bias from", t.get("bias_from")),
        ("largest bound violation", t.get("bound_violation")),
        ("equality residual |yᵀα − Δ|", t.get("equality_residual")),
        ("largest per-point KKT residual", t.get("max_kkt_residual")),
        ("support vectors", t.get("n_support")), ("free (0 < α < u)", t.get("n_free")),
        ("at upper bound", t.get("n_bounded")), ("at lower bound (not support)", t.get("n_zero")),
    ]
    if "replay_reproduced" in t:
        rows.append(("trace replay gives final α", t["replay_reproduced"]))
        rows.append(("replay largest difference", t.get("replay_max_difference")))
    ev = t.get("events") or {}
    rows.append(("recorded events", ev if ev else "none"))
    return rows


def _run_section(doc: _Doc, r: RunContent, k: int) -> None:
    doc.add(f'<section class="run" id="run-{k}">')
    doc.add(f'<h2><span class="secno">{k}</span>Record of {esc(r.label)}'
            f'<span class="runid">{esc(r.run_id or "not stored")}</span></h2>')
    numbers = section_numbers(r, k)  # the PDF numbers its headings from the same list

    def h3(title: str, anchor: str) -> None:
        doc.add(f'<h3 id="run-{k}-{anchor}"><span class="subno">{numbers[title]}</span>'
                f"{esc(title)}</h3>")

    if r.flags:
        doc.add(_flag_list(r.flags))
    h3("Provenance", "provenance")
    doc.kv(r.identity)
    if r.environment:
        doc.add('<p class="sub">Environment recorded with the run</p>')
        doc.kv(r.environment)
    else:
        doc.missing("Environment not available (the run carries no stored manifest).")
    h3("Evidence checked while writing", "evidence")
    doc.kv(r.evidence)
    h3("Decision rule and scaling", "rule")
    doc.kv(r.decision_rule)
    if r.scaling is not None:
        doc.table(r.scaling, cls="grid narrow")
    h3("How to reproduce", "reproduce")
    if r.reproduce_command:
        doc.add('<p class="sub">Command recorded with the run</p>')
        doc.add(f'<pre class="code">{esc(r.reproduce_command)}</pre>')
    else:
        doc.missing("No command line was recorded with this run.")
    if r.reproduce_python:
        doc.add('<p class="sub">Python call recorded with the run</p>')
        doc.add(f'<pre class="code">{esc(r.reproduce_python)}</pre>')
    if r.reproduce_note:
        doc.add(f'<p class="quiet">{esc(r.reproduce_note)}</p>')
    doc.add('<p class="sub">Python code repeating the solve on the stored problem</p>')
    doc.add(f'<pre class="code">{esc(r.reproduce_code)}</pre>')
    h3("Problem set-up", "problem")
    doc.kv(r.problem)
    doc.add('<p class="sub">Solver options (all defaults resolved)</p>')
    if r.options:
        doc.kv(r.options)
    else:
        doc.missing("Solver options not recorded.")
    h3("Kernel check", "audit")
    doc.add(f'<p class="verdictline">{esc(r.audit_verdict)}</p>')
    if r.audit:
        doc.kv(r.audit)
    else:
        doc.missing("Kernel audit not available for this run.")
    h3("Data remarks", "data")
    if r.data_warnings:
        doc.add("<ul class=\"remarks\">" + "".join(f"<li>{esc(w)}</li>" for w in r.data_warnings)
                + "</ul>")
    else:
        doc.add('<p class="quiet">No data warnings were recorded at intake.</p>')
    h3("Stopping and certificate", "certificate")
    doc.kv(_termination_rows(r.termination), cls="kv cert")
    h3("Path to the solution", "convergence")
    for note in r.figure_notes:
        doc.missing(note)
    for fd in r.figures:
        doc.figure(fd)
    h3("Points carrying the solution", "support")
    cats = Table(columns=("category", "points"),
                 rows=tuple((k2, v) for k2, v in r.categories.items()),
                 note=f"Final category of every training point ({r.categories_source}).")
    doc.table(cats, cls="grid narrow")
    if r.influential is not None:
        doc.table(r.influential, cls="grid points", detail="reason")
    if r.influential_note:
        doc.missing(r.influential_note)
    doc.add('<p class="sub">Leave-one-out</p>')
    if r.loo is not None:
        doc.table(r.loo, cls="grid narrow")
    if r.loo_figure is not None:
        doc.figure(r.loo_figure)
    if r.loo_note:
        doc.missing(r.loo_note)
    h3("Held-out outcomes", "holdout")
    if r.holdout:
        scal = [(k2, v) for k2, v in r.holdout.items() if k2 not in HOLDOUT_TABLE_KEYS]
        doc.kv(scal)
        if r.confusion is not None:
            doc.table(r.confusion, cls="grid confusion")
    else:
        doc.missing("Held-out outcomes not available: no held-out data were scored with this run.")
    if r.calibration is not None:
        h3("Probability calibration", "calibration")
        _calibration_html(doc, r.calibration)
    if r.task_section is not None:
        ts = r.task_section
        h3(ts.title, "task")
        if ts.intro:
            doc.add(f"<p>{esc(ts.intro)}</p>")
        doc.kv(ts.facts)
        for t in ts.tables:
            doc.table(t, cls="grid")
        for fd in ts.figures:
            doc.figure(fd)
    elif r.task_note:
        h3("Task section", "task")
        doc.missing(r.task_note)
    h3("Diagnosis", "diagnosis")
    doc.add(f"<p>{esc(r.diagnosis_note)}</p>")
    if r.diagnosis is not None:
        doc.table(r.diagnosis, cls="grid")
    for code, why in r.diagnosis_skipped.items():
        doc.missing(f"Not checked: {code} — {why}")
    h3("Decision map", "map")
    if r.decision_map is not None:
        doc.figure(r.decision_map)
    else:
        doc.missing(r.decision_note)
    doc.add("</section>")


def _calibration_html(doc: _Doc, cal: Any) -> None:
    """The probability section (:class:`._calibration.CalibrationContent`)."""
    for note in cal.notes:
        doc.add(f'<p class="quiet">{esc(note)}</p>')
    if cal.facts:
        doc.kv(cal.facts)
    if cal.bins is not None:
        doc.table(cal.bins, cls="grid narrow")
    for fd in cal.figures:
        doc.figure(fd)
    if cal.folds is not None:
        doc.table(cal.folds, cls="grid narrow")


def _challenger(doc: _Doc, c: ReportContent) -> None:
    doc.add('<section class="challenger" id="challenger"><h2><span class="secno">'
            f"{len(c.runs) + 1}</span>Challenger cross-check</h2>")
    comp = c.comparison
    if not comp:
        doc.missing(c.comparison_note)
    else:
        doc.add(f'<p class="verdictline">Verdict: <strong>{esc(comp["verdict"])}</strong>'
                + (f' — {esc(comp["verdict_text"])}' if comp.get("verdict_text") else "")
                + "</p>")
        doc.table(comparison_table(comp))
        if comp.get("extra"):
            doc.kv(list(comp["extra"].items()))
    if c.overlay is not None:
        doc.figure(c.overlay)
    elif c.overlay_note:
        doc.missing(c.overlay_note)
    doc.add("</section>")


def _mark(passed: bool | None) -> str:
    return "within" if passed else ("outside" if passed is False else "—")


def comparison_table(comp: Mapping[str, Any]) -> Table:
    """Every agreement measure with its rule, strict and loose tolerance and outcome."""
    rows = tuple(
        (m["name"], m["value"], m.get("rule") or "", m["tolerance"], _mark(m["passed"]),
         m.get("loose_tolerance"), _mark(m.get("passed_loose")), m.get("waived") or "")
        for m in comp["measures"])
    return Table(columns=("measure", "value", "rule", "strict tolerance", "strict",
                          "loose tolerance", "loose", "waived"), rows=rows,
                 note="Every agreement measure with its tolerances (value must satisfy the rule).")


def render_html(content: ReportContent) -> str:
    """The complete HTML document for ``content`` (UTF-8 text)."""
    c = content
    doc = _Doc()
    doc.numbers = figure_numbers(content)
    doc.add("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">")
    doc.add(f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">')
    doc.add('<meta name="viewport" content="width=device-width, initial-scale=1">')
    doc.add(f'<meta name="generator" content="kktrace {esc(c.kktrace_version)}">')
    doc.add(f"<title>{esc(c.title)}</title><style>{_css()}</style></head><body>")
    doc.add('<header class="masthead"><p class="kicker">kktrace · convergence and audit '
            f"record</p><h1>{esc(c.title)}</h1><p class=\"meta\">prepared {esc(c.generated)} "
            f"with kktrace {esc(c.kktrace_version)} · {len(c.runs)} run(s)</p>"
            f'<p class="scopeline">{esc(c.caution)}</p></header>')
    doc.add("<main>")
    doc.add(_banner(c))
    doc.add(_keyfigs(c))
    doc.add(_contents(c))
    doc.add('<section id="flags" class="flagsec"><h2><span class="secno">!</span>Flags raised'
            "</h2>")
    doc.add(_flag_list(c.flags))
    doc.add("</section>")
    for k, r in enumerate(c.runs, start=1):
        _run_section(doc, r, k)
    _challenger(doc, c)
    if c.notes:
        doc.add('<section id="notes" class="notes"><h2><span class="secno">✎</span>Notes from '
                f'the preparer</h2><p class="notetext">{esc(c.notes)}</p></section>')
    doc.add('<section id="scope" class="scope"><h2><span class="secno">§</span>Scope of this '
            f"record</h2><p>{esc(c.caution)}</p></section>")
    doc.add("</main>")
    doc.add(f'<footer><p>kktrace {esc(c.kktrace_version)} · {esc(c.generated)} · '
            f"{doc.n_fig} figures · this file is self-contained (no scripts, no external "
            "resources)</p></footer></body></html>")
    return "\n".join(doc.parts)
