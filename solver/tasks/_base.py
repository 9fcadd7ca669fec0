"""The task protocol: what a kind of learning problem supplies to the workflow.

A *task* (binary classification, one-vs-one multi-class, regression, one-class, ...) says
how its member problem(s) are built from a dataset, how its members' decision values turn
into a prediction, which held-out measures it reports, its explanation vocabulary, its
report section and (later) its export mapping.  Commands and the report look the task up
(:func:`solver.tasks.get_task`, :func:`solver.tasks.task_of_manifest`) and ask it; they never
branch on the problem kind themselves.

A task that fits a single problem stores one run (``parent_record = False``); a task that
fits several stores every member as a complete run and ties them together with a parent
record (``parent_record = True``, see ``traces/README.md`` section 17).

Adding a task
-------------
Subclass :class:`Task`, fill the class attributes, implement :meth:`Task.members`,
:meth:`Task.predict` and :meth:`Task.held_out` (and :meth:`Task.report_section` when the
report needs a section of its own), and register ``"name": "module:attribute"`` in
:data:`solver.tasks.TASKS`.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..problem import DualProblem

__all__ = ["Task", "MemberSpec", "Prediction", "WeightSpec"]


@dataclass(frozen=True, eq=False)
class WeightSpec:
    """Weights asked for by the user, before they are resolved against the labels.

    class_weight : ``None``, ``"balanced"`` or a mapping label (as text) → factor > 0.
    sample_weight : (n,) per-row factors > 0 (already validated, one per training row)
        or None.
    weight_column : name of the column the per-row factors came from (recorded) or None.
    """

    class_weight: str | Mapping[str, float] | None = None
    sample_weight: np.ndarray | None = None
    weight_column: str | None = None


@dataclass(frozen=True, eq=False)
class MemberSpec:
    """One member problem of a task, as handed to the solver stage.

    role : what the member is to its parent (``"model"`` for a single-problem task,
        ``"pair"`` for one-vs-one).
    key : the member's key within the parent (``None`` for a single-problem task; for a
        pair the two class labels as text, first class first).
    rows : (m,) indices of the dataset rows the member trains on, ascending.
    labels : (m,) label values of those rows.
    build : keyword arguments the member problem is built from (everything except X,
        which the fit stage standardises itself): ``positive_label``, ``class_weight``,
        ``sample_weight``.
    """

    role: str
    key: tuple[str, ...] | None
    rows: np.ndarray
    labels: np.ndarray
    build: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Prediction:
    """A task's prediction for m query rows.

    labels : (m,) predicted label values.
    values : (m, q) every member's decision value (q = number of members).
    member_keys : the q member keys, in column order.
    votes : (m, k) vote counts per class (classification with several members) or None.
    classes : the k class labels in vote-column order, or None.
    tie : (m,) bool, True where the highest vote count was shared, or None.
    """

    labels: np.ndarray
    values: np.ndarray
    member_keys: tuple[Any, ...]
    votes: np.ndarray | None = None
    classes: tuple[Hashable, ...] | None = None
    tie: np.ndarray | None = None


class Task:
    """Base class of every task; see the module docstring.

    Class attributes
    ----------------
    name : registry name (``"binary"``, ``"multiclass"``, ...); stored in the manifest.
    problem_kinds : member problem kinds (``DualProblem.kind``) this task builds.
    parent_record : True when a fit stores a parent record over its member runs.
    categories : the explanation vocabulary: category names the per-point table uses.
    measures : names of the held-out measures :meth:`held_out` returns.
    """

    name: str = ""
    problem_kinds: tuple[str, ...] = ()
    parent_record: bool = False
    categories: tuple[str, ...] = ()
    measures: tuple[str, ...] = ()

    # what a study (:mod:`solver.studies`) asks of the task
    #: grid axes a study of this task walks besides γ and degree
    study_axes: tuple[str, ...] = ("C",)
    #: the split-off column holds classes: folds are stratified by it (else plain k-fold)
    class_labels: bool = True
    #: (held-out measure a study ranks cells by, True when higher is better)
    study_score: tuple[str, bool] = ("accuracy", True)
    #: what the study score means, stated in the study and its report
    study_score_note: str = "share of the validation fold's rows classified correctly"
    #: held-out measures a study's results table carries (one column each)
    study_measures: tuple[str, ...] = ("accuracy", "balanced_accuracy")
    #: the output flips with the sign of f(x): a study counts rows with |f| < 1e-3
    decides_by_sign: bool = True

    def cell_problem(self, X: np.ndarray, member: MemberSpec, *, kernel: Any,
                     cell: Any) -> DualProblem:
        """The dual problem of ``member`` for one study grid cell
        (:class:`solver.studies.Cell`); the default uses the cell's C."""
        return self.build_problem(X, member, kernel=kernel, C=cell.C)

    def study_scores(self, prediction: Prediction, truth: np.ndarray | None,
                     classes: Sequence[Any], cell: Any) -> dict[str, Any]:
        """Held-out measures of one study fit on its validation fold; the default is
        :meth:`held_out`."""
        return self.held_out(prediction, truth, classes)

    # ---------------------------------------------------------------- building

    def members(
        self, labels: np.ndarray, *, weights: WeightSpec | None = None,
        options: Mapping[str, Any] | None = None,
    ) -> list[MemberSpec]:
        """The member problems for a dataset with these (n,) ``labels``.

        Raises :class:`~solver.errors.InvalidInputError` (one line) for labels the task
        cannot use.
        """
        raise NotImplementedError

    def build_problem(
        self, X: np.ndarray, member: MemberSpec, *, kernel: Any, C: float
    ) -> DualProblem:
        """The dual problem of ``member`` on its (standardised) rows ``X`` (m, d)."""
        raise NotImplementedError

    def describe(self, members: Sequence[MemberSpec]) -> dict[str, Any]:
        """Plain data recorded in a parent manifest's ``info`` (classes, rules, ...)."""
        return {}

    # ---------------------------------------------------------------- using a fit

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        """Prediction for raw query rows ``X`` (m, d) from the members' models (member
        order) and the parent's ``info``."""
        raise NotImplementedError

    def held_out(self, prediction: Prediction, truth: np.ndarray,
                 classes: Sequence[Any]) -> dict[str, Any]:
        """Held-out measures (plain data) of ``prediction`` against the true labels
        (``classes``: the training classes in task order; an unseen label is an error)."""
        raise NotImplementedError

    # ---------------------------------------------------------------- presenting

    def decision_rule(self, record: Any) -> list[tuple[str, str]]:
        """How one stored run's decision value f(x) becomes its output, as (name, text)
        rows for the report: the sign convention, what happens at f = 0 and the label
        mapping.  The default describes f(x) alone."""
        return [("decision value", "f(x) = Σ αᵢyᵢK(xᵢ, x) + b on the standardised features")]

    def report_section(self, parent: Any, members: Sequence[Any]) -> dict[str, Any] | None:
        """Plain-data content of the task's own report section (None: no section)."""
        return None

    def run_lines(self, summary: Mapping[str, Any]) -> list[tuple[str, str]]:
        """(heading, text) lines in the task's words about one run's summary (the task's
        own facts and held-out facts, as ``train`` prints them); [] adds none."""
        return []

    def applied_lines(self, facts: Mapping[str, Any] | None) -> list[str]:
        """Sentences on the held-out facts of applying a model of this task to new rows
        (``apply``); [] adds none."""
        return []

    def applied(self, problem: DualProblem, values: np.ndarray,
                data: Any) -> tuple[np.ndarray, dict[str, Any] | None]:
        """(labels, held-out facts) of a single-run model of this task applied to rows whose
        (m,) decision ``values`` are given; ``data`` is the loaded
        :class:`~solver.data.Dataset` (its split-off column, if any, in ``labels``).  Used by
        ``apply`` and ``train --holdout`` for tasks without class labels."""
        raise InvalidInputError(f"task {self.name!r} applies through its class labels")

    def output_columns(self, values: np.ndarray,
                       labels: np.ndarray) -> dict[str, list[Any]] | None:
        """Columns (name → values per row) ``apply`` shows and ``apply --out`` writes after
        ``row``; None keeps the classification layout (decision value, label, ...)."""
        return None

    def export_mapping(self, parent: Any, members: Sequence[Any]) -> Any:
        """The ONNX export subject (:class:`~solver.exchange.subjects.ExportSubject`) of a
        parent record of this task over its member runs (task order).  Tasks whose fits
        are single runs export by problem kind and never get here."""
        raise InvalidInputError(f"task {self.name!r} has no ONNX export mapping for parent "
                                "records")

    def __repr__(self) -> str:
        return f"<task {self.name}>"
