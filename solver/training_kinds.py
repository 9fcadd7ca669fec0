"""Training workflow for ε-regression and one-class (novelty) fits.

The same stages as classification (:mod:`solver.training`): data → standardised problem →
kernel audit → SMO (+ QP challenger) → per-point explanation → held-out facts →
comparison → saved runs; only the problem, the explanation vocabulary and the held-out
facts differ.  Entered through :func:`solver.training.train` with ``task="regression"`` or
``task="one-class"``.

Held-out facts: regression — RMSE, MAE, R², ε-tube coverage (target units); one-class —
share flagged as outliers, and with a known-outlier column the confusion against it.  Every
one-class run also stores the ν-property check (attachment ``nu_property``).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._workflow import (
    HOLDOUT_ROWS,
    NO_CHOICE,
    Columns,
    ProgressFn,
    _align,
    _fingerprint,
    _holdout_rows,
    _load_data,
)
from .data import Dataset
from .errors import InvalidInputError
from .model import Model, Standardiser, model_from_solution
from .phases import PhaseClock
from .plaindata import to_plain
from .problem import ONE_CLASS_KIND, REGRESSION_KIND, DualProblem
from .run import RunRecord

if TYPE_CHECKING:  # pragma: no cover
    from .store import RunStore

__all__ = ["KIND_TASKS", "train_kind", "numeric_column", "known_outliers", "kind_of_task"]

#: task name (as on the command line) → problem kind
KIND_TASKS = {"regression": REGRESSION_KIND, "one-class": ONE_CLASS_KIND}


def kind_of_task(task: str) -> str:
    """Problem kind of a task name, with a one-line error for an unknown name."""
    if task not in KIND_TASKS:
        raise InvalidInputError(f"unknown task {task!r}; choose one of classification, "
                                f"{', '.join(KIND_TASKS)}")
    return KIND_TASKS[task]


def numeric_column(ds: Dataset, what: str) -> np.ndarray:
    """The dataset's split-off column (``ds.labels``) as finite floats; the error names the
    file, the 1-based data row and the column."""
    where = f"{ds.source}: " if ds.source else ""
    col = ds.label_name
    vals = np.asarray(ds.labels, dtype=object)
    out = np.empty(vals.shape[0])
    for k, v in enumerate(vals.tolist()):
        try:
            x = float(v)
        except (TypeError, ValueError):
            x = float("nan")
        if isinstance(v, bool) or not np.isfinite(x):
            raise InvalidInputError(f"{where}row {k + 1}, column {col!r}: {what} value {v!r} is "
                                    "not a finite number")
        out[k] = x
    return out


_TRUE = {"1", "true", "yes", "outlier", "unusual"}
_FALSE = {"0", "false", "no", "inlier", "usual"}


def known_outliers(ds: Dataset) -> np.ndarray:
    """The known-outlier column as booleans (1/0, true/false, yes/no, outlier/inlier)."""
    where = f"{ds.source}: " if ds.source else ""
    out = np.zeros(len(ds.labels), dtype=bool)
    for k, v in enumerate(np.asarray(ds.labels, dtype=object).tolist()):
        text = str(v).strip().lower()
        if text.endswith(".0"):
            text = text[:-2]
        if text in _TRUE:
            out[k] = True
        elif text not in _FALSE:
            raise InvalidInputError(
                f"{where}row {k + 1}, column {ds.label_name!r}: known-outlier value {v!r} is "
                "not one of 1/0, true/false, yes/no, outlier/inlier")
    return out


def _load_training(data: Any, task: str, target: str | None, label: str | None,
                   outlier_column: str | None, columns: Columns = NO_CHOICE
                   ) -> tuple[Dataset, np.ndarray | None]:
    if task == "regression":
        if label is not None:
            raise InvalidInputError("regression uses --target COLUMN for the continuous "
                                    "target; --label is the classification column")
        if outlier_column is not None:
            raise InvalidInputError("--outlier-column belongs to the one-class task")
        if isinstance(data, (str, Path)) and target is None:
            raise InvalidInputError("name the target column of the training file "
                                    "(--target COLUMN)")
        ds = _load_data(data, target, "training data", columns)
        if ds.labels is None:
            raise InvalidInputError("training data have no target column")
        t = numeric_column(ds, "target")
        if np.all(t == t[0]):
            where = f"{ds.source}: " if ds.source else ""
            raise InvalidInputError(f"{where}column {ds.label_name!r}: the target is constant "
                                    f"({t[0]:g} on every row); there is nothing to regress")
        return ds, t
    if target is not None:
        raise InvalidInputError("--target belongs to the regression task; a one-class fit "
                                "has no target")
    if label is not None:
        raise InvalidInputError(
            f"a label column ({label!r}) was given for a one-class task, which learns from "
            "features alone; to set aside a column of known outliers (not used for fitting, "
            "used for the held-out confusion) name it with --outlier-column instead")
    if outlier_column is not None and isinstance(data, (str, Path)):
        from .api import _has_column

        if not _has_column(Path(data), outlier_column):
            outlier_column = None  # the training file need not carry it
    ds = _load_data(data, outlier_column, "training data", columns)
    if outlier_column is not None and ds.labels is not None:
        known_outliers(ds)  # validated now; the fit never uses it
    return ds, None


def _held_out(problem: DualProblem, model: Model, hold: Dataset,
              names: list[str]) -> dict[str, Any]:
    """The task's held-out facts (:meth:`solver.tasks.Task.applied`) with the data's identity."""
    from .tasks import task_for_kind

    X = _align(hold, names, "held-out data")
    _, facts = task_for_kind(problem.kind).applied(problem, model.values(X), hold)
    if facts is None:  # pragma: no cover - the held-out target is required before solving
        raise InvalidInputError("held-out data need the target column to be scored")
    facts = dict(facts)
    facts.update(fingerprint=_fingerprint(hold), source=hold.source)
    return facts


def _interior_point_tol(kkt_tol: float) -> float:
    """cvxopt's tolerance for the QP challenger of a regression or one-class fit.

    The interior-point accuracy in the gradient is about the square root of the final gap
    (:data:`solver.qp.DEFAULT_INTERIOR_POINT_TOL`), so a certificate at ``kkt_tol`` needs a
    gap near kkt_tol²; the default 1e-9 left a maximal violation of 4e-5 on a small RBF
    ε-regression at kkt_tol 1e-5 and 1e-10 gave 1e-6 (measured).  Never looser than the
    default.
    """
    from .qp import DEFAULT_INTERIOR_POINT_TOL

    return float(min(DEFAULT_INTERIOR_POINT_TOL, 0.1 * kkt_tol**2))


def train_kind(
    data: Dataset | str | Path, *, task: str, target: str | None, label: str | None,
    outlier_column: str | None, epsilon: float, nu: float, kern: Any, C: float,
    kkt_tol: float, iteration_limit: int | None, solver: str, standardise: bool,
    holdout: Dataset | str | Path | None, store: RunStore, trace: str, explain: bool,
    progress: ProgressFn | None, opts: dict[str, Any], columns: Columns = NO_CHOICE,
) -> dict[str, Any]:
    """Fit, explain, score and save one regression or one-class problem (module notes).

    Returns the pieces :func:`solver.training.train` turns into its outcome: ``records``
    (saved, primary first), ``ids``, ``comparison``, ``skipped``, ``notes``, ``dataset``.
    Everything the user can get wrong is checked before the first solve, so nothing is
    stored for bad input.
    """
    from . import training as _t
    from .explanation import kind_point_table

    kind = kind_of_task(task)
    clock = PhaseClock()
    with clock.phase("load"):
        ds, t = _load_training(data, task, target, label, outlier_column, columns)
    hold = None
    if holdout is not None:
        col = ds.label_name if kind == REGRESSION_KIND else outlier_column
        hold_cols = replace(columns, features=None)
        with clock.phase("load"):
            hold = _load_data(holdout, col, "held-out data", hold_cols,
                              names=ds.feature_names)
        if kind == REGRESSION_KIND and hold.labels is None:
            raise InvalidInputError("held-out data need the target column to be scored")
        if kind == REGRESSION_KIND:
            numeric_column(hold, "target")
        elif hold.labels is not None:
            known_outliers(hold)
    from .tasks import get_task

    fit_task = get_task(task)
    with clock.phase("standardise"):
        std = Standardiser.fit(ds.X) if standardise else Standardiser.identity(ds.X.shape[1])
        Z = std.transform(ds.X)
        problem: DualProblem = fit_task.fit_problem(Z, t, kernel=kern, C=C,
                                                    options={"epsilon": epsilon, "nu": nu})
    methods = ["qp"] if solver == "qp" else ["smo"]
    skipped = None
    if solver == "both":
        limit = _t._qp_limit()
        if problem.n <= limit:
            methods.append("qp")
        else:
            skipped = (f"QP challenger skipped: {problem.n} dual variables exceed its size "
                       f"limit of {limit}")
    with clock.phase("audit"):
        audit = _t._audit(problem, ds.feature_names)
    data_facts = {
        "fingerprint": _fingerprint(ds), "feature_names": list(ds.feature_names),
        "label_name": None, "target_name": target if kind == REGRESSION_KIND else None,
        "outlier_column": ds.label_name if kind == ONE_CLASS_KIND else None,
        "known_outlier_column": outlier_column if kind == ONE_CLASS_KIND else None,
        "task": task, "source": ds.source,
        "warnings": list(ds.warnings), "n_rows": int(ds.X.shape[0]),
    }
    extra_opts = ({"epsilon": epsilon} if kind == REGRESSION_KIND else {"nu": nu})
    command = _t._command(data, None, {"task": task, "target": target,
                                       "outlier_column": outlier_column, **extra_opts, **opts,
                                       "solver": solver}, holdout, columns)
    records: list[RunRecord] = []
    for method in methods:
        lim = iteration_limit if (method == "smo" or solver == "qp") else None
        own = clock.copy()
        with own.phase("solve"):
            result = _t._solve(method, problem, kkt_tol=kkt_tol, iteration_limit=lim,
                               trace=trace, progress=progress,
                               interior_point_tol=_interior_point_tol(kkt_tol))
        att: dict[str, Any] = {"audit": audit, "command": command}
        with own.phase("explanation"):
            table = kind_point_table(problem, result)
        if explain:
            att["explanation"] = table.to_columns()
        model = model_from_solution(problem, result, std)
        att.update(fit_task.fit_attachments(problem, result, table, t))
        if hold is not None:
            with own.phase("holdout"):
                att["holdout"] = _held_out(problem, model, hold, list(ds.feature_names))
            att[HOLDOUT_ROWS] = _holdout_rows(hold, ds.feature_names)
        if method == "smo" and skipped:
            att["challenger"] = {"ran": False, "reason": skipped}
        att["phases"] = own.to_dict()
        records.append(RunRecord(problem=problem, result=result, data=data_facts,
                                 standardiser=std, attachments=att))
    comparison = None
    if len(records) == 2:
        from .agreement import compare_runs

        hX = None if hold is None else _align(hold, ds.feature_names, "held-out data")
        comparison = compare_runs(records[0], records[1], holdout_X=hX)
        records[1] = replace(records[1], attachments={
            **records[1].attachments, "comparison": to_plain(comparison.to_dict())})
    ids: list[str] = []
    saved: list[RunRecord] = []
    for k, rec in enumerate(records):
        rid = store.save(rec, parent=ids[0] if k else None)
        ids.append(rid)
        saved.append(replace(rec, run_id=rid, parent_id=ids[0] if k else None))
    notes = [f"data: {w}" for w in ds.warnings]
    if skipped:
        notes.append(skipped)
    for rec in saved:
        nuc = rec.attachments.get("nu_property")
        if nuc and not nuc["holds"]:
            notes.append(f"{rec.result.solver} run {rec.run_id}: the ν-property does not hold "
                         f"(outlier share {nuc['outlier_share']:.4g}, ν {nuc['nu']:g}, "
                         f"support share {nuc['support_share']:.4g})")
    return {"records": saved, "ids": ids, "comparison": comparison, "skipped": skipped,
            "notes": notes}


def kind_summary(record: RunRecord) -> dict[str, Any]:
    """Task facts added to a run summary: the task, ε or ν, held-out and training facts."""
    from .tasks import task_for_kind

    task = task_for_kind(record.problem.kind)
    out: dict[str, Any] = {"task": task.name, **task.summary_facts(record)}
    hold = record.attachments.get("holdout")
    if hold:
        out["holdout"] = dict(hold)
    return out
