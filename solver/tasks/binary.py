"""The ``binary`` task: one soft-margin classification problem over two label values.

Wraps :func:`solver.problem.binary_classification` exactly as ``train`` used it before
tasks existed (the positive label is the larger of the two sorted labels); the run is
stored on its own, without a parent record.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .._workflow import _confusion
from ..errors import InvalidInputError
from ..explanation._table import CATEGORIES
from ..problem import DualProblem, binary_classification
from ._base import MemberSpec, Prediction, Task, WeightSpec
from ._labels import class_order, resolve_class_weight

__all__ = ["BinaryTask", "TASK"]


class BinaryTask(Task):
    """Two classes, one dual problem; f(x) > 0 predicts the positive (larger) label."""

    name = "binary"
    problem_kinds = ("binary_classification",)
    parent_record = False
    categories = tuple(CATEGORIES)
    measures = ("matrix", "accuracy", "balanced_accuracy")

    def members(
        self, labels: np.ndarray, *, weights: WeightSpec | None = None,
        options: Mapping[str, Any] | None = None,
    ) -> list[MemberSpec]:
        labels = np.asarray(labels)
        classes = class_order(labels)
        if len(classes) != 2:
            raise InvalidInputError(
                f"binary classification needs exactly two label values, found {len(classes)}")
        w = weights or WeightSpec()
        cw = resolve_class_weight(w.class_weight, labels, classes)
        return [MemberSpec(role="model", key=None, rows=np.arange(labels.shape[0]),
                           labels=labels, build={"class_weight": cw,
                                                 "sample_weight": w.sample_weight})]

    def build_problem(
        self, X: np.ndarray, member: MemberSpec, *, kernel: Any, C: float
    ) -> DualProblem:
        return binary_classification(
            X, member.labels, kernel=kernel, C=C,
            class_weight=member.build.get("class_weight"),
            sample_weight=member.build.get("sample_weight"),
            positive_label=member.build.get("positive_label"))

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        (model,) = models
        values = model.values(X)
        neg, pos = model.labels
        labels = np.where(values > 0, np.asarray(pos, dtype=object),
                          np.asarray(neg, dtype=object))
        return Prediction(labels=labels, values=values[:, None], member_keys=(None,))

    def decision_rule(self, record: Any) -> list[tuple[str, str]]:
        """Sign convention, the label at f = 0 and the label mapping of a binary run
        (the rule of :meth:`solver.model.Model.classify`)."""
        labels = record.problem.labels
        if not labels:
            return super().decision_rule(record)
        neg, pos = (str(v) for v in labels)
        return [
            ("decision value", "f(x) = Σ αᵢyᵢK(xᵢ, x) + b on the standardised features"),
            ("sign convention", f"f(x) > 0 → {pos!r} (y = +1); f(x) < 0 → {neg!r} (y = −1)"),
            ("label at f = 0", f"{neg!r}: only f(x) > 0 gives the positive label"),
            ("label mapping", f"y = +1 ↔ {pos!r} (positive label); y = −1 ↔ {neg!r}"),
        ]

    def held_out(self, prediction: Prediction, truth: np.ndarray,
                 classes: Sequence[Any]) -> dict[str, Any]:
        return _confusion(truth, prediction.labels, tuple(classes))


TASK = BinaryTask()
