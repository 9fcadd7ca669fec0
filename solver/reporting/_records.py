"""Plain-data records of a report (:class:`ReportContent` and its parts) and small helpers.

Shared by the content builders (:mod:`._provenance`, :mod:`._convergence`, :mod:`._points`,
:mod:`._flags`) and the renderers.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..status import Status
from ..vocabulary import CAUTION, figure_text

__all__ = ["CAUTION", "SEVERITIES", "Flag", "Table", "FigureData", "TaskSection", "RunContent",
           "ReportContent", "run_outline", "section_numbers", "figure_numbers"]

#: Severity order used for sorting flags: "stop" (result not usable as is), "caution", "note".
SEVERITIES = ("stop", "caution", "note")


@dataclass(frozen=True)
class Flag:
    """One warning: ``code`` (stable identifier), ``severity`` (stop/caution/note), message."""

    code: str
    severity: str
    message: str
    run: str | None = None


@dataclass(frozen=True, eq=False)
class Table:
    """A small table of plain values (str, int, float, None)."""

    columns: tuple[str, ...]
    rows: tuple[tuple[Any, ...], ...]
    note: str = ""
    #: what the renderers print for a None cell ("" → the usual dash); the JSON keeps null
    blank: str = ""


@dataclass(frozen=True, eq=False)
class FigureData:
    """Plot-ready data for one figure; ``kind`` selects the drawing routine in :mod:`.figures`."""

    key: str
    kind: str
    title: str
    caption: str
    data: Mapping[str, Any]


@dataclass(frozen=True, eq=False)
class TaskSection:
    """The section a run's task adds (regression fit, one-class boundary, ...): ``task`` is
    its registry name; facts, tables, figures and flags as the task supplied them."""

    task: str
    title: str
    intro: str
    facts: tuple[tuple[str, Any], ...]
    tables: tuple[Table, ...]
    figures: tuple[FigureData, ...]
    flags: tuple[Flag, ...] = ()


@dataclass(frozen=True, eq=False)
class RunContent:
    """Everything shown about one run.  ``label`` is the short name used across the report."""

    label: str
    run_id: str | None
    solver: str
    identity: tuple[tuple[str, Any], ...]
    environment: tuple[tuple[str, Any], ...]
    reproduce_command: str | None
    reproduce_python: str | None
    reproduce_note: str | None
    reproduce_code: str
    problem: tuple[tuple[str, Any], ...]
    options: tuple[tuple[str, Any], ...]
    audit: tuple[tuple[str, Any], ...] | None
    audit_verdict: str
    data_warnings: tuple[str, ...]
    termination: Mapping[str, Any]
    figures: tuple[FigureData, ...]
    figure_notes: tuple[str, ...]
    categories: Mapping[str, int]
    categories_source: str
    influential: Table | None
    influential_note: str
    loo: Table | None
    loo_figure: FigureData | None
    loo_note: str
    holdout: Mapping[str, Any] | None
    confusion: Table | None
    decision_map: FigureData | None
    decision_note: str
    flags: tuple[Flag, ...]
    series: Mapping[str, Mapping[str, list[float]]] = field(default_factory=dict)
    data_facts: Mapping[str, Any] = field(default_factory=dict)
    #: leave-one-out scalars by key (:data:`solver.vocabulary.LEAVE_ONE_OUT`), with
    #: ``kept_as`` / ``kept_digest`` when they come from a child record; {} when absent
    loo_facts: Mapping[str, Any] = field(default_factory=dict)
    #: the manifest digest and the verification done while writing (rows, JSON facts)
    evidence: tuple[tuple[str, Any], ...] = ()
    evidence_facts: Mapping[str, Any] = field(default_factory=dict)
    #: the decision rule (from the run's task) and the standardiser per feature
    decision_rule: tuple[tuple[str, str], ...] = ()
    scaling: Table | None = None
    #: probability calibration section (:mod:`._calibration`), None without probabilities
    calibration: Any = None
    task_section: TaskSection | None = None
    task_note: str = ""
    #: the run's diagnosis (:mod:`solver.diagnosis`): findings table (severity, code,
    #: finding, action) and its statement plus unchecked codes; None when it failed
    diagnosis: Table | None = None
    diagnosis_note: str = ""
    diagnosis_skipped: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class ReportContent:
    """The whole report as plain data."""

    title: str
    generated: str
    kktrace_version: str
    caution: str
    notes: str | None
    runs: tuple[RunContent, ...]
    comparison: Mapping[str, Any] | None
    comparison_note: str
    flags: tuple[Flag, ...]
    #: convergence of the runs side by side (two or more runs of one problem), or None
    #: with ``overlay_note`` saying why
    overlay: FigureData | None = None
    overlay_note: str = ""

    @property
    def converged(self) -> bool:
        """True when every run met its optimality test."""
        return all(r.termination.get("converged") for r in self.runs)


# --------------------------------------------------------------------------- helpers


def _plain(v: Any) -> Any:
    """Numpy scalars → Python scalars; arrays → short description; mappings recursively."""
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        if v.size <= 8 and v.ndim <= 1:
            return [_plain(x) for x in v.tolist()]
        return f"array of shape {tuple(v.shape)}"
    if isinstance(v, Status):
        return v.label
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        if len(v) > 20:
            return f"{len(v)} items"
        return [_plain(x) for x in v]
    if isinstance(v, (str, int, float, bool)) or v is None:
        return v
    return repr(v)


def _scalar_items(
    d: Mapping[str, Any] | None, skip: Sequence[str] = ()
) -> tuple[tuple[str, Any], ...]:
    if not d:
        return ()
    out = []
    for k, v in d.items():
        if k in skip:
            continue
        out.append((str(k), _plain(v)))
    return tuple(out)


def _status_of(result: Any) -> Status | None:
    s = getattr(result, "status", None)
    if isinstance(s, Status):
        return s
    try:
        return Status(int(s)) if isinstance(s, (int, np.integer)) else Status.from_label(str(s))
    except (ValueError, TypeError):
        return None


def _as_mapping(obj: Any) -> Mapping[str, Any] | None:
    if obj is None:
        return None
    if isinstance(obj, Mapping):
        return obj
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        d = to_dict()
        return d if isinstance(d, Mapping) else None
    return None


def _float(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f


def _fmt_num(v: Any) -> str:
    f = _float(v)
    if f is None:
        return str(v)
    return figure_text(f)


# --------------------------------------------------------------------------- numbering


def run_outline(r: RunContent) -> list[str]:
    """Titles of a run's numbered subsections, in order (``k.1``, ``k.2``, …): the HTML
    and the PDF number their headings from this one list."""
    titles = ["Provenance", "Evidence checked while writing", "Decision rule and scaling",
              "How to reproduce", "Problem set-up", "Kernel check", "Data remarks",
              "Stopping and certificate", "Path to the solution", "Points carrying the solution",
              "Held-out outcomes"]
    if getattr(r, "calibration", None) is not None:
        titles.append("Probability calibration")
    ts = getattr(r, "task_section", None)
    if ts is not None:
        titles.append(ts.title)
    elif getattr(r, "task_note", ""):
        titles.append("Task section")
    titles += ["Diagnosis", "Decision map"]
    return titles


def section_numbers(r: RunContent, k: int) -> dict[str, str]:
    """Title → number (``"k.j"``) of run ``k``'s subsections (:func:`run_outline`)."""
    return {t: f"{k}.{j}" for j, t in enumerate(run_outline(r), start=1)}


def figure_numbers(content: ReportContent) -> dict[int, int]:
    """``id(figure)`` → its number, in the HTML's order: per run its convergence figures,
    the leave-one-out figure, the calibration figures, the task's figures and the decision
    map; then the side-by-side overlay.  The PDF prints the same numbers."""
    order: list[Any] = []
    for r in content.runs:
        order += list(r.figures)
        order.append(r.loo_figure)
        cal = getattr(r, "calibration", None)
        order += list(getattr(cal, "figures", ()) or ())
        ts = getattr(r, "task_section", None)
        order += list(getattr(ts, "figures", ()) or ())
        order.append(r.decision_map)
    order.append(getattr(content, "overlay", None))
    nums: dict[int, int] = {}
    for fd in order:
        if fd is not None and id(fd) not in nums:
            nums[id(fd)] = len(nums) + 1
    return nums
