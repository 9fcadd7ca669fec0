"""The ``study`` task: the kind of a study's parent record.

A study is not a model: its members are the cross-validation fits of a grid, each a
complete run of its own task.  The task object exists so that commands that look a
parent's task up (:func:`solver.tasks.task_of_manifest`) get a clear answer instead of
treating the fits as the members of one model.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..tasks._base import MemberSpec, Prediction, Task, WeightSpec

__all__ = ["StudyTask", "TASK"]

_NOT_A_MODEL = ("a study is a record of cross-validation fits, not a model; apply, explain, "
                "compare or export one of its member runs instead (kktrace runs lists them "
                "under the study)")


class StudyTask(Task):
    """Parent-record kind of a study (grid × folds); gives no predictions."""

    name = "study"
    #: a study builds no dual problem of its own; "study" is the kind its summary names
    problem_kinds = ("study",)
    parent_record = True
    #: the one category of a study's members (cross-validation fits)
    categories = ("member_fit",)
    measures = ("accuracy", "balanced_accuracy")

    #: parent workflows that need a model (apply, explain, compare) refuse with this
    not_a_model = _NOT_A_MODEL

    def write_report(self, store: Any, run_id: str, out_dir: Any,
                     formats: Sequence[str]) -> dict[str, Any]:
        """The study report (:func:`solver.studies.study_report`), used by ``report``."""
        from .report import study_report

        return study_report(run_id, store=store, out_dir=out_dir, formats=formats)

    def members(self, labels: np.ndarray, *, weights: WeightSpec | None = None,
                options: Mapping[str, Any] | None = None) -> list[MemberSpec]:
        raise InvalidInputError("a study's fits are made by solver.study(), not by train")

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        raise InvalidInputError(_NOT_A_MODEL)

    def held_out(self, prediction: Prediction, truth: np.ndarray,
                 classes: Sequence[Any]) -> dict[str, Any]:
        raise InvalidInputError(_NOT_A_MODEL)

    def export_mapping(self, parent: Any, members: Sequence[Any]) -> Any:
        raise InvalidInputError(_NOT_A_MODEL)


TASK = StudyTask()
