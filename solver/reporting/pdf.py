"""Multi-page A4 PDF written with matplotlib's ``PdfPages`` (no browser involved).

The document is planned first (:func:`plan_pages`): text pages are laid out line by line
with fixed line heights, so the page count and each page's heading are known before
drawing.  Fonts are embedded as TrueType (``pdf.fonttype`` 42) so text can be extracted.
"""

from __future__ import annotations

import re
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure

from ..vocabulary import SUPERSCRIPT_DIGITS, heading, label
from ._records import figure_numbers, section_numbers
from .content import FigureData, ReportContent, RunContent, Table
from .figures import PALETTE, draw, plain_text, style
from .html import HOLDOUT_TABLE_KEYS, _evidence_line, _termination_rows, comparison_table, fmt

__all__ = ["PdfPage", "plan_pages", "render_pdf", "pdf_num"]

PAGE = (8.27, 11.69)  # A4 portrait, inches
LEFT, TOP, BOTTOM = 0.075, 0.945, 0.06
LINE = 0.0145  # height of one body line, figure fraction (≈ 12 pt)
CHARS = 104  # monospace characters per line at 7.5 pt
SANS_CHARS = 112  # sans characters per body line at 8 pt (conservative)
PAGE_LINES = (TOP - 0.045 - BOTTOM - 0.01) / LINE  # body lines that fit below the heading
FIGS_PER_PAGE = 2
FOOT_CHARS = 150  # footer characters per line at 6.2 pt
MIN_LINES = 10  # a continued text page carries at least this many lines


_POWER = re.compile(r"×10\^(-?[0-9]+)")


def pdf_num(v: Any) -> str:
    """The HTML's display text of a value, powers of ten as superscripts (1×10⁻⁵): one
    style for a figure in the HTML, the PDF and the terminal."""
    return _POWER.sub(lambda m: "×10" + m.group(1).translate(SUPERSCRIPT_DIGITS), fmt(v))


@dataclass(frozen=True)
class PdfPage:
    """One planned page: ``heading`` (printed at the top) and either text lines or figures."""

    heading: str
    lines: tuple[tuple[str, str], ...] = ()
    figures: tuple[FigureData, ...] = ()


class _Lines:
    """Accumulates (style, text) lines; styles: h (heading), p (body), m (monospace), f (flag)."""

    def __init__(self, numbers: dict[str, str] | None = None) -> None:
        self.items: list[tuple[str, str]] = []
        #: heading → section number, as in the HTML (:func:`._records.section_numbers`)
        self.numbers = numbers or {}

    def heading(self, text: str) -> None:
        num = self.numbers.get(text)
        self.items += [("gap", ""), ("h", f"{num} {text}" if num else text)]

    def para(self, text: str, style_: str = "p") -> None:
        width = SANS_CHARS if style_ in ("p", "i") else CHARS
        for line in textwrap.wrap(text, width=width, break_long_words=True) or [""]:
            self.items.append((style_, line))

    def flag(self, severity: str, text: str) -> None:
        mark = {"stop": "[STOP]", "caution": "[CAUTION]"}.get(severity, "[NOTE]")
        lines = textwrap.wrap(f"{mark} {text}", width=SANS_CHARS - 4, subsequent_indent="    ")
        self.items += [("fs" if severity == "stop" else "f", ln) for ln in lines]

    def kv(self, items: Sequence[tuple[str, Any]]) -> None:
        """Name / value rows; a long name or value wraps (nothing is cut)."""
        for k, v in items:
            keys = textwrap.wrap(label(str(k)), width=34, break_long_words=True) or [""]
            text = pdf_num(v)
            chunks = textwrap.wrap(text, width=CHARS - 36, break_long_words=True) or [""]
            for i in range(max(len(keys), len(chunks))):
                key = keys[i] if i < len(keys) else ""
                val = chunks[i] if i < len(chunks) else ""
                self.items.append(("m", (key.ljust(36, " ") + val).rstrip()))

    def pre(self, text: str) -> None:
        for raw in text.splitlines() or [""]:
            for line in textwrap.wrap(raw, width=CHARS, break_long_words=True,
                                      subsequent_indent="    ") or [""]:
                self.items.append(("m", line))

    def table(self, t: Table, skip: Sequence[str] = ()) -> None:
        """Monospace table with the vocabulary's headings; never cuts a cell: columns
        that do not fit go to a further block (the first column repeated), and the last
        column of a block wraps within the room left."""
        if t.note:
            self.para(t.note, "i")
        keep = [k for k, c in enumerate(t.columns) if c not in skip]
        heads = [heading(t.columns[k]) for k in keep]
        cells = [[t.blank if row[k] is None and t.blank else pdf_num(row[k])
                  for k in keep] for row in t.rows]
        for block, widths in _blocks([len(h) for h in heads], cells):
            self._block([heads[c] for c in block],
                        [[r[c] for c in block] for r in cells], widths)

    def _block(self, heads: list[str], cells: list[list[str]], widths: list[int]) -> None:
        def lines(values: Sequence[str]) -> list[str]:
            parts = [textwrap.wrap(v, width=w, break_long_words=True) or [""]
                     for v, w in zip(values, widths, strict=True)]
            depth = max(len(p) for p in parts)
            return ["  ".join((p[i] if i < len(p) else "").ljust(w)
                              for p, w in zip(parts, widths, strict=True)).rstrip()
                    for i in range(depth)]

        self.items += [("mb", ln) for ln in lines(heads)]
        for r in cells:
            self.items += [("m", ln) for ln in lines(r)]
        self.items.append(("gap", ""))


def _blocks(head_widths: list[int], cells: list[list[str]]) -> list[tuple[list[int], list[int]]]:
    """Split columns into blocks that fit :data:`CHARS` (column 0 starts every block);
    returns (column positions, widths).  Only a block's last column may be narrower than
    its widest cell (it wraps within the room left)."""
    n = len(head_widths)
    natural = [max([head_widths[c]] + [len(r[c]) for r in cells]) for c in range(n)]
    first = min(natural[0], CHARS // 3)
    out: list[tuple[list[int], list[int]]] = []
    cur, widths = [0], [first]

    def room() -> int:
        return CHARS - sum(widths) - 2 * len(widths)

    for c in range(1, n):
        if natural[c] <= room():
            cur.append(c)
            widths.append(natural[c])
        elif room() >= 24 and (c == n - 1 or natural[c] > CHARS // 2):
            cur.append(c)
            widths.append(room())
            out.append((cur, widths))
            cur, widths = [0], [first]
        else:
            if len(cur) > 1:
                out.append((cur, widths))
                cur, widths = [0], [first]
            cur.append(c)
            widths.append(min(natural[c], room()))
    if len(cur) > 1 or not out:
        out.append((cur, widths))
    return out


def _height(kind: str) -> float:
    """Height of one line item in body lines."""
    return {"gap": 0.6, "h": 1.35, "t": 1.35}.get(kind, 1.0)


def _paginate(heading: str, lines: _Lines) -> list[PdfPage]:
    """Cut line items into pages by height; a heading is never left last on a page."""
    items = list(lines.items)
    pages: list[list[tuple[str, str]]] = [[]]
    used = 0.0
    for it in items:
        h = _height(it[0])
        need = h + (1.0 if it[0] in ("h", "gap") else 0.0)  # keep a heading with its next line
        if used + need > PAGE_LINES and pages[-1]:
            pages.append([])
            used = 0.0
        if not pages[-1] and it[0] == "gap":
            continue
        pages[-1].append(it)
        used += h
    if len(pages) > 1 and len(pages[-1]) < MIN_LINES:
        # no near-empty last page: it takes the tail of the page before (never leaving a
        # heading last there)
        prev = pages[-2]
        cut = max(1, len(prev) - (MIN_LINES - len(pages[-1])))
        while cut > 1 and prev[cut - 1][0] in ("h", "gap", "t"):
            cut -= 1
        moved = prev[cut:]
        if moved and moved[0][0] == "gap":
            moved = moved[1:]
        pages[-2], pages[-1] = prev[:cut], moved + pages[-1]
    return [PdfPage(heading=heading if k == 0 else f"{heading} (continued)", lines=tuple(p))
            for k, p in enumerate(pages)]


#: Characters per line of the cover's title line (10.5 pt; conservative for A4).
TITLE_CHARS = 84


def _cover(c: ReportContent) -> list[PdfPage]:
    L = _Lines()
    head, _, rest = c.title.partition(" — ")
    for line in textwrap.wrap(rest, width=TITLE_CHARS, break_long_words=True):
        L.items.append(("t", line))
    L.para(f"prepared {c.generated} with kktrace {c.kktrace_version} · {len(c.runs)} run(s)", "i")
    L.heading("Outcome")
    for r in c.runs:
        t = r.termination
        ok = bool(t.get("converged"))  # the status rule: solver.status.decide
        L.para(f"{r.label} ({r.solver}, run id {r.run_id or 'not stored'}): "
               f"{'CONVERGED' if ok else 'NOT CONVERGED'} — status {t.get('status')} after "
               f"{fmt(t.get('iterations'))} iterations.", "p" if ok else "ps")
        L.kv([("final maximal violation", t.get("max_violation")), ("kkt_tol", t.get("kkt_tol")),
              ("dual objective", t.get("dual_objective")),
              ("primal objective", t.get("primal_objective")),
              ("duality gap", t.get("duality_gap")), ("relative gap", t.get("relative_gap")),
              ("support vectors (free / at bound)",
               f"{t.get('n_support')} ({t.get('n_free')} / {t.get('n_bounded')})")])
        L.para(_evidence_line(r), "i")
    if c.comparison:
        L.para(f"Challenger comparison verdict: {c.comparison['verdict']}")
    else:
        L.para("Challenger comparison: not available.")
    L.heading("Flags raised")
    if c.flags:
        for f in c.flags:
            L.flag(f.severity, f.message)
    else:
        L.para("No flags raised.")
    # the scope sentence (the standing caution) is in every page's footer, once per page
    return _paginate(head, L)


def _run_text(r: RunContent, k: int = 1) -> list[PdfPage]:
    L = _Lines(section_numbers(r, k))
    L.heading("Provenance")
    L.kv(r.identity)
    if r.environment:
        L.para("Environment recorded with the run:", "i")
        L.kv(r.environment)
    else:
        L.para("Environment not available.", "i")
    L.heading("Evidence checked while writing")
    L.kv(r.evidence)
    L.heading("Decision rule and scaling")
    L.kv(r.decision_rule)
    if r.scaling is not None:
        L.table(r.scaling)
    L.heading("How to reproduce")
    if r.reproduce_command:
        L.para("Command recorded with the run:", "i")
        L.pre(r.reproduce_command)
    else:
        L.para("No command line was recorded with this run.", "i")
    if r.reproduce_python:
        L.para("Python call recorded with the run:", "i")
        L.pre(r.reproduce_python)
    if r.reproduce_note:
        L.para(r.reproduce_note, "i")
    L.para("Python code repeating the solve on the stored problem:", "i")
    L.pre(r.reproduce_code)
    L.heading("Problem set-up")
    L.kv(r.problem)
    if r.options:
        L.para("Solver options:", "i")
        L.kv(r.options)
    L.heading("Kernel check")
    L.para(r.audit_verdict)
    if r.audit:
        L.kv(r.audit)
    else:
        L.para("Kernel audit not available for this run.", "i")
    L.heading("Data remarks")
    for w in r.data_warnings or ("No data warnings were recorded at intake.",):
        L.para(w)
    L.heading("Stopping and certificate")
    L.kv(_termination_rows(r.termination))
    for note in r.figure_notes:
        L.para(note, "i")
    return _paginate(f"{k} Record of {r.label}: provenance, set-up, certificate", L)


def _run_support(r: RunContent, k: int = 1) -> list[PdfPage]:
    L = _Lines(section_numbers(r, k))
    L.heading("Points carrying the solution")
    L.table(Table(columns=("category", "points"), rows=tuple(r.categories.items()),
                  note=f"Final category of every training point ({r.categories_source})."))
    if r.influential is not None:
        L.table(r.influential, skip=("reason",))
        reason_col = next((k for k, c in enumerate(r.influential.columns) if c == "reason"), None)
        if reason_col is not None:
            L.para("Reasons in full:", "i")
            for row in r.influential.rows:
                L.para(f"index {row[0]}: {row[reason_col]}")
    if r.influential_note:
        L.para(r.influential_note, "i")
    L.heading("Leave-one-out")
    if r.loo is not None:
        L.table(r.loo)
    if r.loo_note:
        L.para(r.loo_note, "i")
    L.heading("Held-out outcomes")
    if r.holdout:
        L.kv([(k, v) for k, v in r.holdout.items() if k not in HOLDOUT_TABLE_KEYS])
        if r.confusion is not None:
            L.table(r.confusion)
    else:
        L.para("Held-out outcomes not available: no held-out data were scored with this run.",
               "i")
    if r.task_section is not None:
        ts = r.task_section
        L.heading(ts.title)
        if ts.intro:
            L.para(ts.intro)
        L.kv(ts.facts)
        for t in ts.tables:
            L.table(t)
    elif r.task_note:
        L.heading("Task section")
        L.para(r.task_note, "i")
    L.heading("Diagnosis")
    L.para(r.diagnosis_note)
    if r.diagnosis is not None:
        L.table(r.diagnosis)
    for code, why in r.diagnosis_skipped.items():
        L.para(f"Not checked: {code} — {why}", "i")
    if r.decision_map is None:
        L.heading("Decision map")
        L.para(r.decision_note, "i")
    return _paginate(f"{k} Record of {r.label}: support vectors and outcomes", L)


def _run_calibration(r: RunContent, k: int = 1) -> list[PdfPage]:
    """Text and figure pages of the probability section (none without probabilities)."""
    cal = r.calibration
    if cal is None:
        return []
    L = _Lines(section_numbers(r, k))
    L.heading("Probability calibration")
    for note in cal.notes:
        L.para(note, "i")
    L.kv(cal.facts)
    if cal.bins is not None:
        L.table(cal.bins)
    if cal.folds is not None:
        L.table(cal.folds)
    pages = _paginate(f"Record of {r.label}: probability calibration", L)
    if cal.figures:
        pages.append(PdfPage(heading=f"Probability calibration — {r.label}",
                             figures=tuple(cal.figures)))
    return pages


def _challenger(c: ReportContent) -> list[PdfPage]:
    L = _Lines()
    comp = c.comparison
    if not comp:
        L.para(c.comparison_note, "i")
    else:
        L.para(f"Verdict: {comp['verdict']}"
               + (f" — {comp['verdict_text']}" if comp.get("verdict_text") else ""))
        L.table(comparison_table(comp))
        if comp.get("extra"):
            L.kv(list(comp["extra"].items()))
    if c.notes:
        L.heading("Notes from the preparer")
        for para in c.notes.splitlines() or [""]:
            L.para(para)
    return _paginate(f"{len(c.runs) + 1} Challenger cross-check", L)


def plan_pages(content: ReportContent) -> list[PdfPage]:
    """Every page of the PDF in order (headings, text lines, figures).

    A run's convergence figures, its leave-one-out figure and its decision map share
    figure pages two by two, so at most one figure page per run is half empty."""
    pages = _cover(content)
    for k, r in enumerate(content.runs, start=1):
        pages += _run_text(r, k)
        numbers = section_numbers(r, k)
        conv = list(r.figures)
        figs = conv + [f for f in (r.loo_figure, r.decision_map) if f is not None]
        for i in range(0, len(figs), FIGS_PER_PAGE):
            chunk = tuple(figs[i:i + FIGS_PER_PAGE])
            titles = list(dict.fromkeys(
                "Path to the solution" if any(f is c for c in conv)
                else "Decision map" if f is r.decision_map else "Points carrying the solution"
                for f in chunk))
            head = " and ".join(f"{numbers[t]} {t}" for t in titles)
            pages.append(PdfPage(heading=f"{head} — {r.label}", figures=chunk))
        pages += _run_support(r, k)
        pages += _run_calibration(r, k)
        if r.task_section is not None and r.task_section.figures:
            tf = list(r.task_section.figures)
            for i in range(0, len(tf), FIGS_PER_PAGE):
                pages.append(PdfPage(heading=f"{numbers[r.task_section.title]} "
                                     f"{r.task_section.title} — {r.label}",
                                     figures=tuple(tf[i:i + FIGS_PER_PAGE])))
    if content.overlay is not None:
        pages.append(PdfPage(heading="Convergence side by side", figures=(content.overlay,)))
    pages += _challenger(content)
    return pages


_FONTS = {
    "h": dict(family="DejaVu Sans", size=10.5, color=PALETTE["tide"]),
    "t": dict(family="DejaVu Sans", size=10.5, color=PALETTE["ink"]),
    "p": dict(family="DejaVu Sans", size=8.0, color=PALETTE["ink"]),
    "ps": dict(family="DejaVu Sans", size=8.0, color=PALETTE["oxblood"]),
    "i": dict(family="DejaVu Sans", size=8.0, color="#5f676d"),
    "m": dict(family="DejaVu Sans Mono", size=7.2, color=PALETTE["ink"]),
    "mb": dict(family="DejaVu Sans Mono", size=7.2, color=PALETTE["tide"]),
    "f": dict(family="DejaVu Sans", size=8.0, color="#8a5f00"),
    "fs": dict(family="DejaVu Sans", size=8.0, color=PALETTE["oxblood"]),
}


def _frame(fig: Figure, page: PdfPage, number: int, total: int, content: ReportContent) -> None:
    fig.text(LEFT, 0.975, "kktrace · convergence and audit record", fontsize=7,
             color=PALETTE["tide"], family="DejaVu Sans")
    fig.text(1 - LEFT, 0.975, f"page {number} of {total}", fontsize=7, ha="right",
             color="#5f676d", family="DejaVu Sans")
    fig.text(LEFT, TOP, plain_text(page.heading, 200), fontsize=13 if len(page.heading) <= 64
             else 10.5, color=PALETTE["ink"], family="DejaVu Sans", va="top")
    fig.add_artist(_rule(TOP - 0.024))
    fig.text(LEFT, 0.035, textwrap.fill(plain_text(content.caution, 400), width=FOOT_CHARS),
             fontsize=6.2, color="#5f676d", family="DejaVu Sans", va="top", linespacing=1.3)


def _rule(y: float) -> Any:
    from matplotlib.lines import Line2D

    return Line2D([LEFT, 1 - LEFT], [y, y], linewidth=0.8, color=PALETTE["tide"])


def _draw_text_page(fig: Figure, page: PdfPage) -> None:
    y = TOP - 0.045
    for kind, text in page.lines:
        if kind == "gap":
            y -= LINE * 0.6
            continue
        fig.text(LEFT, y, plain_text(text, 400), va="top", **_FONTS[kind])
        y -= LINE * (1.35 if kind in ("h", "t") else 1.0)


def _draw_figure_page(fig: Figure, page: PdfPage, numbers: dict[int, int]) -> None:
    # always FIGS_PER_PAGE slots, so a lone figure keeps the size it has on a full page;
    # fixed margins, no layout engine (see figures._margins)
    sub = fig.subfigures(FIGS_PER_PAGE + 2, 1,
                         height_ratios=[0.16] + [1.0] * FIGS_PER_PAGE + [0.06])
    for sf, fd in zip(sub[1:-1], page.figures, strict=False):
        inner = sf.subfigures(3, 1, height_ratios=[0.08, 1.0, 0.2])
        num = numbers.get(id(fd))
        title = f"Figure {num}. {fd.title}" if num else fd.title  # the HTML's number
        inner[0].text(LEFT, 0.3, plain_text(title, 200), fontsize=9.5,
                      family="DejaVu Sans", color=PALETTE["tide"])
        # inset left and right so plots line up with the text margins of the page
        plot = inner[1].subfigures(1, 3, width_ratios=[0.035, 1.0, 0.05])[1]
        draw(plot, fd)
        caption = textwrap.fill(plain_text(fd.caption, 2000), width=140)
        inner[2].text(LEFT, 0.9, caption, va="top", fontsize=6.8, family="DejaVu Sans",
                      color=PALETTE["ink"])


def render_pdf(content: ReportContent, path: str | Path) -> int:
    """Write the PDF to ``path``; returns the number of pages written."""
    pages = plan_pages(content)
    total = len(pages)
    numbers = figure_numbers(content)
    meta = {"Title": content.title, "Creator": f"kktrace {content.kktrace_version}",
            "Subject": "convergence and audit record", "CreationDate": None}
    with style(), PdfPages(path, metadata=meta) as pdf:
        for k, page in enumerate(pages, start=1):
            fig = Figure(figsize=PAGE)
            if page.figures:
                _draw_figure_page(fig, page, numbers)
            else:
                _draw_text_page(fig, page)
            _frame(fig, page, k, total, content)
            pdf.savefig(fig)
    return total
