"""The task's own report section: asked of the run's task object, never by branching on kinds.

:func:`_task_section` finds the task of a stored run (:func:`solver.tasks.task_for_kind`)
and turns the plain data of its :meth:`~solver.tasks.Task.report_section` into a
:class:`TaskSection` (tables, :class:`FigureData`, flags).  A task without a section (binary
classification) gives None; a failing section gives a note instead of losing the report.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..run import RunRecord
from ._records import FigureData, Flag, Table, TaskSection, _plain

__all__ = ["_task_section", "_parent_section"]


def _table(raw: Mapping[str, Any]) -> Table:
    return Table(columns=tuple(str(c) for c in raw["columns"]),
                 rows=tuple(tuple(_plain(v) for v in row) for row in raw["rows"]),
                 note=str(raw.get("note", "")))


def _task_section(rec: RunRecord, label: str) -> tuple[TaskSection | None, str]:
    """(section, note) for one run; the note says why there is none when it failed."""
    from ..errors import InvalidInputError
    from ..tasks import task_for_kind

    try:
        task = task_for_kind(rec.problem.kind)
    except InvalidInputError:
        return None, ""
    try:
        raw = task.report_section(None, [rec])
    except Exception as exc:  # noqa: BLE001 - a section failure must not lose the report
        return None, (f"The {task.name} section is not available: "
                      f"{type(exc).__name__}: {exc}")
    if raw is None:
        return None, ""
    return _section_from_raw(task, raw, label), ""


def _parent_section(parent: Any, members: list[RunRecord], label: str
                    ) -> tuple[TaskSection | None, str]:
    """(section, note) of a parent record (a multi-class model): asked of the parent's
    task with the parent and its member runs (member order)."""
    from ..tasks import get_task

    task = get_task(parent.task)
    try:
        raw = task.report_section(parent, members)
    except Exception as exc:  # noqa: BLE001 - a section failure must not lose the report
        return None, (f"The {task.name} section is not available: "
                      f"{type(exc).__name__}: {exc}")
    if raw is None:
        return None, ""
    return _section_from_raw(task, raw, label), ""


def _section_from_raw(task: Any, raw: Mapping[str, Any], label: str) -> TaskSection:
    figures = tuple(
        FigureData(key=f"task_{f['key']}", kind=str(f["kind"]), title=f"{label}: {f['title']}",
                   caption=str(f["caption"]), data=f["data"])
        for f in raw.get("figures", ()))
    flags = tuple(Flag(str(f["code"]), str(f["severity"]), f"{label}: {f['message']}", label)
                  for f in raw.get("flags", ()))
    return TaskSection(
        task=task.name, title=str(raw["title"]), intro=str(raw.get("intro", "")),
        facts=tuple((str(k), _plain(v)) for k, v in raw.get("facts", ())),
        tables=tuple(_table(t) for t in raw.get("tables", ())), figures=figures,
        flags=flags)
