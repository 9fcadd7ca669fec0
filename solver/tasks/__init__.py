"""Tasks: binary classification, one-vs-one multi-class, ε-regression and one-class.

:data:`TASKS` maps a task name to ``"module:attribute"`` of its :class:`Task` object,
imported on first use (the same pattern as :data:`solver.solvers.SOLVERS`).  Commands and
the report find the task of a stored record with :func:`task_of_manifest` (a parent
record names its task; a run is looked up by its problem kind through
:func:`task_for_kind`) and ask it instead of branching on the kind.

Registering a task (e.g. for ε-regression): write ``solver/tasks/regression.py`` with a
:class:`Task` subclass instance ``TASK`` whose ``problem_kinds`` lists the
``DualProblem.kind`` values it builds, and add ``"regression":
"solver.tasks.regression:TASK"`` to :data:`TASKS`.  See :mod:`solver.tasks._base` for the
protocol.
"""

from __future__ import annotations

from collections.abc import Mapping
from importlib import import_module
from typing import Any

from ..errors import InvalidInputError
from ._base import MemberSpec, Prediction, Task, WeightSpec

__all__ = ["TASKS", "Task", "MemberSpec", "Prediction", "WeightSpec", "get_task",
           "task_for_kind", "task_of_manifest", "classification_task"]

#: name → "module:attribute" of the task object; imported on first use.
TASKS: dict[str, str] = {
    "binary": "solver.tasks.binary:TASK",
    "multiclass": "solver.tasks.multiclass:TASK",
    "regression": "solver.tasks.regression:TASK",
    "one-class": "solver.tasks.one_class:TASK",
    "study": "solver.studies.task:TASK",
}


def get_task(name: str) -> Task:
    """The task registered under ``name``."""
    target = TASKS.get(name) if isinstance(name, str) else None
    if target is None:
        raise InvalidInputError(f"unknown task {name!r}; choose one of {', '.join(TASKS)}")
    module, attr = target.split(":")
    return getattr(import_module(module), attr)


def task_for_kind(kind: str) -> Task:
    """The task whose member problems have ``DualProblem.kind == kind``."""
    for name in TASKS:
        task = get_task(name)
        if kind in task.problem_kinds and not task.parent_record:
            return task
    for name in TASKS:
        task = get_task(name)
        if kind in task.problem_kinds:
            return task
    raise InvalidInputError(f"no task builds problems of kind {kind!r}")


def task_of_manifest(manifest: Mapping[str, Any]) -> Task:
    """The task of a stored record: a parent names it, a run by its problem kind."""
    if manifest.get("record") == "parent":
        return get_task(str(manifest.get("task")))
    return task_for_kind(str((manifest.get("problem") or {}).get("kind")))


def classification_task(n_classes: int) -> Task:
    """The classification task for a label column with ``n_classes`` distinct values:
    ``binary`` for two, ``multiclass`` (one-vs-one) for three or more."""
    return get_task("binary" if n_classes <= 2 else "multiclass")
