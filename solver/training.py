"""Training workflow: data → standardised problem → kernel audit → solve(s) → explanation →
held-out scores → comparison → saved runs.  Public entry point :func:`train` (re-exported by
:mod:`solver.api` and :mod:`solver`).
"""

from __future__ import annotations

import math
import shlex
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._intake import SCALE_ADVICE, SCALE_WARNING
from ._workflow import (
    HOLDOUT_ROWS,
    KERNEL_CHOICES,
    NO_CHOICE,
    SOLVER_CHOICES,
    Columns,
    ProgressFn,
    _align,
    _confusion,
    _fingerprint,
    _holdout_rows,
    _load_data,
    check_known_labels,
    open_store,
)
from .data import Dataset
from .errors import ConvergenceWarning, DataWarning, InvalidInputError, StoreWarning
from .kernels import make_kernel
from .model import Model, Standardiser, model_from_solution
from .phases import PhaseClock
from .plaindata import to_plain
from .problem import DualProblem
from .result import TRACE_LEVELS, SolveResult
from .run import Member, ParentRecord, RunRecord
from .status import Status
from .tasks import MemberSpec, WeightSpec
from .tasks._labels import BALANCED_RULE

if TYPE_CHECKING:  # pragma: no cover
    from .store import RunStore

__all__ = ["TrainOutcome", "train"]


def _make_kernel(kernel: str, gamma: float | None, degree: int, offset: float):
    if kernel not in KERNEL_CHOICES:
        raise InvalidInputError(
            f"unknown kernel {kernel!r}; choose one of {', '.join(KERNEL_CHOICES)}"
        )
    params: dict[str, Any] = {}
    if kernel in ("poly", "rbf", "sigmoid"):
        params["gamma"] = gamma
    if kernel == "poly":
        params["degree"] = degree
    if kernel in ("poly", "sigmoid"):
        params["offset"] = offset
    return make_kernel(kernel, **params)


def _solve(
    method: str,
    problem: DualProblem,
    *,
    kkt_tol: float,
    iteration_limit: int | None,
    trace: str,
    progress: ProgressFn | None,
    interior_point_tol: float | None = None,
) -> SolveResult:
    from .solvers import get_solver

    if method == "qp":
        # the challenger runs to cvxopt's own (tight) tolerance; ``kkt_tol`` is the certificate's
        options: dict[str, Any] = {"kkt_tol": kkt_tol, "trace": trace}
        if interior_point_tol is not None:
            options["interior_point_tol"] = interior_point_tol
    else:
        options = {"kkt_tol": kkt_tol, "trace": trace}
    if iteration_limit is not None:
        options["iteration_limit"] = iteration_limit
    if progress is not None:

        def cb(state: Mapping[str, Any]) -> None:
            info = {"solver": method, "kkt_tol": kkt_tol, "iteration_limit": iteration_limit}
            info.update({k: state[k] for k in ("iteration", "violation", "gap", "objective")
                         if state.get(k) is not None})
            progress("solve", info)

        options["callback"] = cb
        if method == "smo":
            options["callback_every"] = 200
    try:
        return get_solver(method)(problem, **options)
    finally:
        if progress is not None:
            progress("done", {"task": "solve", "solver": method})


def _qp_limit() -> int:
    """Largest problem the QP challenger solves without being forced."""
    from .qp import DEFAULT_SIZE_LIMIT

    return int(DEFAULT_SIZE_LIMIT)


def _command(
    data: Any, label: str | None, opts: Mapping[str, Any], holdout: Any,
    columns: Columns = NO_CHOICE,
) -> dict[str, Any]:
    """The CLI command and Python call that reproduce a training run (held-out file,
    column choice and delimiter included)."""
    py_opts = {**opts, "feature_columns": None if columns.features is None else
               list(columns.features), "ignore_columns": None if columns.ignore is None else
               list(columns.ignore), "delimiter": columns.delimiter}
    py_args = ", ".join(f"{k}={v!r}" for k, v in py_opts.items() if v is not None)
    if holdout is not None:
        py_args += (f", holdout={str(holdout)!r}" if isinstance(holdout, (str, Path))
                    else ", holdout=held_out")
    if isinstance(data, (str, Path)):
        argv = ["kktrace", "train", str(data)]
        if label is not None:
            argv += ["--label", label]
        for k, v in opts.items():
            if v is None or k in ("standardise", "probabilities"):
                continue
            if k.startswith("calibration_") and not opts.get("probabilities"):
                continue
            argv += ["--positive" if k == "positive_label" else "--" + k.replace("_", "-"),
                     str(v)]
        if not opts.get("standardise", True):
            argv.append("--no-standardise")
        if opts.get("probabilities"):
            argv.append("--probabilities")
        if holdout is not None and isinstance(holdout, (str, Path)):
            argv += ["--holdout", str(holdout)]
        for flag, names in (("--features", columns.features), ("--ignore", columns.ignore)):
            if names is not None:
                argv += [flag, ",".join(names)]
        if columns.delimiter is not None:
            argv += ["--delimiter", columns.delimiter]
        py = f"solver.train({str(data)!r}, label={label!r}, {py_args})"
        return {"argv": argv, "text": shlex.join(argv), "python": py}
    return {
        "argv": None,
        "text": None,
        "python": f"solver.train(dataset, {py_args})",
        "note": "trained from an in-memory dataset: reproduce with the Python call and the "
        "same data (checked against the fingerprint)",
    }


@dataclass(frozen=True, eq=False)
class TrainOutcome:
    """Result of :func:`train`.

    run_ids : stored run ids, primary first (SMO, or QP with ``solver="qp"``), then the
        challenger when one ran.
    records : the saved :class:`~solver.run.RunRecord` objects, same order.
    summaries : one plain-data summary per run (see :meth:`summary`).
    comparison : the solver-agreement :class:`~solver.agreement.Comparison`, or None.
    challenger_skipped : why the QP challenger did not run (None when it ran or was not asked).
    store : root directory of the store.
    task : the task that made the fit (``"binary"``, ``"multiclass"``).
    members : for a task with a parent record, one summary per member run (pairs and
        their challengers, each with ``role`` and ``key``); empty otherwise.
    parent : the saved :class:`~solver.run.ParentRecord`, or None.  With a parent,
        ``run_ids`` holds the parent id only and ``summaries`` its one summary.
    """

    run_ids: tuple[str, ...]
    records: tuple[RunRecord, ...]
    summaries: tuple[dict[str, Any], ...]
    comparison: Any | None
    challenger_skipped: str | None
    store: Path
    warnings: tuple[str, ...] = field(default=())
    task: str = "binary"
    members: tuple[dict[str, Any], ...] = field(default=())
    parent: ParentRecord | None = None

    @property
    def run_id(self) -> str:
        """Id of the primary run."""
        return self.run_ids[0]

    @property
    def converged(self) -> bool:
        """True only when every run met its optimality test."""
        runs = self.members or self.summaries
        return all(s["status"] == Status.CONVERGED.label for s in runs)

    @property
    def verdict(self) -> str | None:
        """Solver-agreement verdict (with a parent: the worst pair's), or None without a
        challenger."""
        if self.parent is not None:
            return self.summaries[0].get("worst_verdict")
        return None if self.comparison is None else str(self.comparison.verdict)

    def summary(self) -> dict[str, Any]:
        """Plain data: the primary run's key figures, plus ``verdict`` and ``challenger``."""
        out = dict(self.summaries[0])
        out["converged"] = self.converged
        if len(self.summaries) > 1:
            out["challenger"] = dict(self.summaries[1])
        if self.comparison is not None or (self.parent is not None and self.verdict):
            out["verdict"] = self.verdict
        if self.members:
            out["member_runs"] = [dict(m) for m in self.members]
        if self.challenger_skipped is not None:
            out["challenger_skipped"] = self.challenger_skipped
        out["warnings"] = list(self.warnings)
        return out


def _run_summary(record: RunRecord, run_id: str, run_dir: Path) -> dict[str, Any]:
    r, c = record.result, record.result.certificate
    s = {
        "run_id": run_id,
        "solver": r.solver,
        "status": r.status.label,
        "converged": bool(r.success),
        "message": r.message,
        "iterations": int(r.iterations),
        "dual_objective": float(c.dual_objective),
        "primal_objective": float(c.primal_objective),
        "duality_gap": float(c.duality_gap),
        "relative_gap": float(c.relative_gap),
        "max_violation": float(c.max_violation),
        "kkt_tol": float(c.kkt_tol),
        "n_support": int(c.n_support),
        "n_free": int(c.n_free),
        "n_bounded": int(c.n_bounded),
        "bias": float(r.bias),
        "seconds": float(r.seconds),
        **r.timing,
        "phase_seconds": dict(record.attachments.get("phases") or {}),
        "run_dir": str(run_dir),
        "n_rows": int(record.problem.n),
        "kernel": record.problem.kernel.describe(),
        "C": record.problem.info.get("C"),
    }
    labels = record.problem.info.get("labels")
    if isinstance(labels, Mapping) and "positive" in labels:
        s["labels"] = {"negative": labels["negative"], "positive": labels["positive"]}
    cal = record.attachments.get("calibration")
    if cal:
        s["calibration"] = {k: cal.get(k) for k in ("status", "message", "A", "B", "n_folds",
                                                    "seed")}
    hold = record.attachments.get("holdout")
    if hold and "accuracy" in hold:
        s["holdout_accuracy"] = hold["accuracy"]
        s["holdout_balanced_accuracy"] = hold["balanced_accuracy"]
    return s


def _audit(problem: DualProblem, feature_names: Sequence[str]) -> dict[str, Any]:
    from .audit import audit_kernel

    return to_plain(audit_kernel(problem.kernel, problem.X,
                                  feature_names=feature_names).to_dict())


def _explanation(problem: DualProblem, result: SolveResult
                 ) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """(the explanation table's columns, how its decision values were obtained)."""
    from .explanation import point_table

    table = point_table(problem, result)
    return dict(table.to_columns()), dict(table.values_note)


def _holdout_facts(
    model: Model, hold: Dataset, feature_names: Sequence[str]
) -> dict[str, Any]:
    Xh = _align(hold, feature_names, "held-out data")
    values = model.values(Xh)
    pred = model.classify(Xh)
    facts = _confusion(hold.labels, pred, model.labels)
    facts.update(
        fingerprint=_fingerprint(hold),
        source=hold.source,
        min_abs_value=float(np.min(np.abs(values))) if values.size else None,
    )
    return facts


def _calibration(problem: DualProblem, method: str, kkt_tol: float, limit: int | None,
                 n_folds: int, seed: int, model: Model, hold: Dataset | None,
                 feature_names: Sequence[str]) -> dict[str, Any]:
    """Cross-validated Platt scaling of the primary run (plain data for the attachment)."""
    from .calibration import calibrate

    cal = calibrate(problem, n_folds=n_folds, seed=seed, solver=method, kkt_tol=kkt_tol,
                    iteration_limit=limit)
    if hold is not None and hold.X.shape[0] > 0:
        Xh = _align(hold, feature_names, "held-out data")
        positive = np.asarray([v == model.labels[1] for v in hold.labels.tolist()], dtype=bool)
        cal = cal.with_holdout(model.values(Xh), positive, source=hold.source,
                               fingerprint=_fingerprint(hold))
    return cal.to_attachment()


def train(
    data: Dataset | str | Path,
    *,
    label: str | None = None,
    kernel: str = "rbf",
    gamma: float | None = None,
    degree: int = 3,
    offset: float = 0.0,
    C: float = 1.0,
    kkt_tol: float = 1e-3,
    iteration_limit: int | None = None,
    solver: str = "smo",
    standardise: bool = True,
    holdout: Dataset | str | Path | None = None,
    store: Any = None,
    trace: str = "full",
    explain: bool = True,
    quiet: bool = True,
    progress: ProgressFn | None = None,
    class_weight: str | Mapping[str, float] | None = None,
    weight_column: str | None = None,
    max_classes: int | None = None,
    parallel: str = "auto",
    task: str = "classification",
    target: str | None = None,
    epsilon: float = 0.1,
    nu: float = 0.5,
    outlier_column: str | None = None,
    probabilities: bool = False,
    calibration_folds: int = 5,
    calibration_seed: int = 0,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
    positive_label: Any = None,
) -> TrainOutcome:
    """Train a kernel SVM (two classes, one-vs-one over three or more classes, ε-regression
    or one-class), audit it and save the run(s) to the store.

    ``task="regression"`` fits ε-regression to the numeric ``target`` column with tube
    half-width ``epsilon`` (target units); ``task="one-class"`` fits a one-class model with
    ``nu`` in (0, 1] and no label, optionally setting aside ``outlier_column`` (known
    outliers, not fitted on; used for the held-out confusion).  See
    :mod:`solver.training_kinds`.

    Parameters
    ----------
    data : a :class:`~solver.data.Dataset` or a CSV / Parquet / ``.npy`` / ``.npz`` file.
    label : label column (required for files).
    kernel, gamma, degree, offset : kernel ``linear`` | ``poly`` | ``rbf`` | ``sigmoid``;
        gamma None means the median heuristic on the standardised rows (recorded).
    C : penalty (> 0).  kkt_tol : stopping tolerance on the maximal KKT violation.
    iteration_limit : iteration limit (None: the solver's default); with ``"both"`` it applies to
        SMO only (the QP challenger keeps its own interior-point limit).
    solver : ``"smo"``, ``"qp"``, or ``"both"`` (SMO plus the QP challenger and their
        comparison; the challenger is skipped, with the reason recorded, above its size limit).
    standardise : standardise features (mean 0, sd 1; parameters stored with the model).
    holdout : held-out labelled data scored with each run (confusion matrix, accuracy,
        balanced accuracy, fingerprint; attachment ``"holdout"``).
    store : store directory or :class:`~solver.store.RunStore` (default ``$KKTRACE_STORE``
        or ``./traces``).
    trace : trace level ``"full"``, ``"sampled"`` or ``"off"``.
    explain : compute and store the per-point table (attachment ``"explanation"``).
    quiet : keep solver and data warnings out of the warnings machinery (they are
        recorded in the outcome either way).
    progress : optional ``progress(task, info)`` callable (see :data:`ProgressFn`).
    class_weight : ``"balanced"`` (w_c = n / (k · n_c)) or a mapping label → factor > 0
        scaling C for that class.
    weight_column : a column of per-row factors > 0 scaling C per row (not a feature).
        Both reach the bounds uᵢ = C · w_class · w_row.
    max_classes : limit on the number of classes (default 30).
    parallel : where the pairs of a multi-class fit run: ``"auto"``, ``"sequential"``,
        ``"local"`` (a Dask LocalCluster) or a Dask scheduler address (see
        :mod:`solver.distributed`).

    probabilities : also fit Platt scaling on cross-validated decision values of the
        primary run (attachment ``"calibration"``; see :mod:`solver.calibration`); with
        three or more classes every pair run gets its own sigmoid, combined at apply time
        by pairwise coupling.
    feature_columns, ignore_columns : the training file's feature columns (default every
        column but the label / target / known-outlier and weight columns) and columns left
        out (an ID column, say); held-out files are read by the run's feature names, their
        other columns ignored with a warning naming them.
    delimiter : CSV delimiter of the data files (default detected).
    positive_label : the label value (or its text) that f(x) > 0 predicts, two classes
        only; default the later of the two sorted labels.  The mapping is recorded
        (problem info ``labels``) and printed by ``train`` and the report.
    calibration_folds, calibration_seed : the stratified folds of that cross-validation
        (recorded with the run, so a re-run reproduces the probabilities bitwise).

    With three or more label values the fit is one-vs-one (:mod:`solver.tasks.multiclass`):
    one complete run per pair of classes, tied together by a stored parent record.

    Returns
    -------
    TrainOutcome
        Run ids, records, summaries and the comparison.  A run that did not converge is
        stored with its status and reported as such (``outcome.converged`` is False).

    Examples
    --------
    >>> out = train("batches.csv", label="lab_decision", solver="both")  # doctest: +SKIP
    >>> out.summary()["verdict"]  # doctest: +SKIP
    'agree'
    """
    if solver not in SOLVER_CHOICES:
        raise InvalidInputError(
            f"unknown solver {solver!r}; choose one of {', '.join(SOLVER_CHOICES)}"
        )
    if trace not in TRACE_LEVELS:
        raise InvalidInputError(
            f"unknown trace level {trace!r}; choose one of {', '.join(TRACE_LEVELS)}"
        )
    if not (isinstance(kkt_tol, (int, float)) and math.isfinite(kkt_tol) and kkt_tol > 0):
        raise InvalidInputError(f"kkt_tol must be a finite number > 0, got {kkt_tol!r}")
    if iteration_limit is not None and (isinstance(iteration_limit,
                                                   bool) or not isinstance(iteration_limit, int)
                                 or iteration_limit < 1):
        raise InvalidInputError(
            f"iteration_limit must be a positive integer, got {iteration_limit!r}")
    if task != "classification":
        from .training_kinds import kind_of_task

        kind_of_task(task)
    elif target is not None or outlier_column is not None:
        raise InvalidInputError("--target and --outlier-column belong to the regression and "
                                "one-class tasks; name the task with --task")
    elif isinstance(data, (str, Path)) and label is None:
        raise InvalidInputError("name the label column of the training file (--label COLUMN)")
    if max_classes is not None and (isinstance(max_classes, bool)
                                    or not isinstance(max_classes, int) or max_classes < 3):
        raise InvalidInputError(f"max_classes must be an integer >= 3, got {max_classes!r}")
    run_store = open_store(store)
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always")
        outcome = _train(
            data, label=label, kernel=kernel, gamma=gamma, degree=degree, offset=offset, C=C,
            kkt_tol=float(kkt_tol), iteration_limit=iteration_limit, solver=solver,
            standardise=standardise,
            holdout=holdout, store=run_store, trace=trace, explain=explain, progress=progress,
            class_weight=class_weight, weight_column=weight_column, max_classes=max_classes,
            parallel=parallel,
            probabilities=bool(probabilities), calibration_folds=calibration_folds,
            calibration_seed=calibration_seed,
            columns=Columns.of(feature_columns, ignore_columns, delimiter),
            positive_label=positive_label,
            kinds={"task": task, "target": target, "epsilon": epsilon, "nu": nu,
                   "outlier_column": outlier_column},
        )
    for w in wlist:
        if issubclass(w.category, (ConvergenceWarning, DataWarning, StoreWarning)):
            caught.append(str(w.message))
        if not quiet or not issubclass(w.category,
                                       (ConvergenceWarning, DataWarning, StoreWarning)):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    seen: list[str] = []
    for m in [*outcome.warnings, *caught]:
        m = _for_settings(m, standardise)
        if m is None or f"data: {m}" in seen:
            continue
        # a solver's own warning ("qp solver: MESSAGE") repeats a run's note ("... did not
        # converge: MESSAGE"): say it once
        tail = m.split(": ", 1)[-1]
        if m not in seen and not any(s != m and s.endswith(tail) for s in seen):
            seen.append(m)
    return replace(outcome, warnings=tuple(seen))


def _for_settings(message: str, standardise: bool) -> str | None:
    """A warning as it applies to this run: the intake's feature-scale warning is dropped
    when the run standardises (the default) and says so when it does not."""
    if SCALE_WARNING not in message:
        return message
    if standardise:
        return None
    return message.replace(SCALE_ADVICE, "; this run does not standardise them "
                           "(--no-standardise): unscaled features slow SMO and let the "
                           "widest column dominate the kernel")


def _weights(ds: Dataset, class_weight: Any, weight_column: str | None
             ) -> tuple[Dataset, WeightSpec]:
    """Split the per-row weight column off the dataset and validate the weights."""
    if weight_column is None:
        return ds, WeightSpec(class_weight=class_weight)
    if not isinstance(weight_column, str) or not weight_column:
        raise InvalidInputError(f"weight column must be a column name, got {weight_column!r}")
    where = f"{ds.source}: " if ds.source else ""
    if weight_column == ds.label_name:
        raise InvalidInputError(f"{where}weight column {weight_column!r} is also the label "
                                "column; name a separate column of per-row weights")
    names = list(ds.feature_names)
    if weight_column not in names:
        raise InvalidInputError(f"{where}weight column {weight_column!r} not found; the "
                                f"columns are {', '.join(names)}")
    c = names.index(weight_column)
    w = np.array(ds.X[:, c], dtype=np.float64)
    bad = np.flatnonzero(~(np.isfinite(w) & (w > 0)))
    if bad.size:
        r = int(bad[0])
        raise InvalidInputError(f"{where}row {r + 1}, column {weight_column!r}: weight "
                                f"{float(w[r])!r} must be a finite number > 0")
    keep = [k for k in range(len(names)) if k != c]
    if not keep:
        raise InvalidInputError(f"{where}no feature columns left besides the weight column")
    out = replace(ds, X=ds.X[:, keep], feature_names=tuple(names[k] for k in keep))
    return out, WeightSpec(class_weight=class_weight, sample_weight=w,
                           weight_column=weight_column)


def _drop_column(ds: Dataset, column: str | None) -> Dataset:
    """``ds`` without feature column ``column`` (held-out files may carry the weights)."""
    if column is None or column not in ds.feature_names:
        return ds
    keep = [k for k, n in enumerate(ds.feature_names) if n != column]
    return replace(ds, X=ds.X[:, keep], feature_names=tuple(ds.feature_names[k] for k in keep))


def _subset(ds: Dataset, rows: np.ndarray) -> Dataset:
    """The dataset restricted to ``rows`` (same columns, same source)."""
    if rows.shape[0] == ds.X.shape[0]:
        return ds
    return replace(ds, X=ds.X[rows], labels=None if ds.labels is None else ds.labels[rows])


@dataclass(frozen=True, eq=False)
class _MemberJob:
    """Everything one member fit needs; sent to a worker process as is."""

    task: str
    member: MemberSpec
    data: Dataset
    hold: Dataset | None
    kernel: tuple[str, float | None, int, float]
    C: float
    kkt_tol: float
    iteration_limit: int | None
    solver: str
    standardise: bool
    trace: str
    explain: bool
    command: Any
    extra_data: Mapping[str, Any]
    probabilities: bool = False
    calibration_folds: int = 5
    calibration_seed: int = 0
    phases: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class _MemberFit:
    records: list[RunRecord]
    comparison: Any | None
    skipped: str | None


def _fit_member(job: _MemberJob, progress: ProgressFn | None = None) -> _MemberFit:
    """One member: standardise, build the problem, audit, solve (and challenge), explain,
    score held-out rows.  Pure: nothing is saved here."""
    from .tasks import get_task

    task = get_task(job.task)
    ds = job.data
    kern = _make_kernel(*job.kernel)
    clock = PhaseClock(job.phases)
    with clock.phase("standardise"):
        std = (Standardiser.fit(ds.X) if job.standardise
               else Standardiser.identity(ds.X.shape[1]))
        problem = task.build_problem(std.transform(ds.X), job.member, kernel=kern, C=job.C)
    methods = ["qp"] if job.solver == "qp" else ["smo"]
    skipped = None
    if job.solver == "both":
        limit = _qp_limit()
        if problem.n <= limit:
            methods.append("qp")
        else:
            skipped = (
                f"QP challenger skipped: {problem.n} training points exceed its size limit of "
                f"{limit}"
            )
    with clock.phase("audit"):
        audit = _audit(problem, ds.feature_names)
    data_facts = {
        "fingerprint": _fingerprint(ds),
        "feature_names": list(ds.feature_names),
        "label_name": ds.label_name,
        "source": ds.source,
        "warnings": list(ds.warnings),
        "n_rows": int(ds.X.shape[0]),
        **job.extra_data,
    }
    records: list[RunRecord] = []
    for method in methods:
        # with "both" the iteration limit is SMO's; the challenger keeps cvxopt's own
        limit = job.iteration_limit if (method == "smo" or job.solver == "qp") else None
        own = clock.copy()
        with own.phase("solve"):
            result = _solve(method, problem, kkt_tol=job.kkt_tol, iteration_limit=limit,
                            trace=job.trace, progress=progress)
        attachments: dict[str, Any] = {"audit": audit, "command": job.command}
        if job.explain:
            with own.phase("explanation"):
                attachments["explanation"], attachments["explanation_values"] = \
                    _explanation(problem, result)
        model = model_from_solution(problem, result, std)
        if job.hold is not None and job.hold.X.shape[0] > 0:
            with own.phase("holdout"):
                attachments["holdout"] = _holdout_facts(model, job.hold, ds.feature_names)
            attachments[HOLDOUT_ROWS] = _holdout_rows(job.hold, ds.feature_names)
        if method == "smo" and skipped:
            attachments["challenger"] = {"ran": False, "reason": skipped}
        if job.probabilities and not records:
            with own.phase("calibration"):
                attachments["calibration"] = _calibration(
                    problem, method, job.kkt_tol, limit, job.calibration_folds,
                    job.calibration_seed, model, job.hold, ds.feature_names)
        attachments["phases"] = own.to_dict()
        records.append(RunRecord(problem=problem, result=result, data=data_facts,
                                 standardiser=std, attachments=attachments))
    comparison = None
    if len(records) == 2:
        from .agreement import compare_runs

        hX = None if job.hold is None or job.hold.X.shape[0] == 0 else _align(
            job.hold, ds.feature_names, "held-out data")
        comparison = compare_runs(records[0], records[1], holdout_X=hX)
        records[1] = replace(records[1], attachments={
            **records[1].attachments, "comparison": to_plain(comparison.to_dict())})
    return _MemberFit(records=records, comparison=comparison, skipped=skipped)


def _warm_up() -> None:
    """Compile the SMO kernels once in a worker before it takes fits."""
    from .kernels import make_kernel as mk
    from .problem import binary_classification as bc
    from .smo import solve_smo

    X = np.array([[0.0], [1.0], [2.0], [3.0]])
    solve_smo(bc(X, [0, 0, 1, 1], kernel=mk("linear"), C=1.0), trace="full")


def _train(
    data: Dataset | str | Path,
    *,
    label: str | None,
    kernel: str,
    gamma: float | None,
    degree: int,
    offset: float,
    C: float,
    kkt_tol: float,
    iteration_limit: int | None,
    solver: str,
    standardise: bool,
    holdout: Dataset | str | Path | None,
    store: RunStore,
    trace: str,
    explain: bool,
    progress: ProgressFn | None,
    class_weight: Any = None,
    weight_column: str | None = None,
    max_classes: int | None = None,
    parallel: str = "auto",
    probabilities: bool = False,
    calibration_folds: int = 5,
    calibration_seed: int = 0,
    kinds: dict[str, Any] | None = None,
    columns: Columns = NO_CHOICE,
    positive_label: Any = None,
) -> TrainOutcome:
    if kinds and kinds["task"] != "classification":
        if positive_label is not None:
            raise InvalidInputError(f"--positive belongs to two-class classification; "
                                    f"{kinds['task']} runs have no labels")
        if probabilities:
            raise InvalidInputError(
                f"--probabilities needs a classification task (two or more classes); "
                f"{kinds['task']} runs give no class probabilities")
        return _train_kind(data, label=label, kernel=kernel, gamma=gamma, degree=degree,
                           offset=offset, C=C, kkt_tol=kkt_tol, iteration_limit=iteration_limit,
                           solver=solver, standardise=standardise, holdout=holdout, store=store,
                           trace=trace, explain=explain, progress=progress,
                           columns=columns, **kinds)
    from .distributed import run_jobs
    from .tasks import classification_task
    from .tasks._labels import class_order

    if weight_column is not None and columns.features is not None and \
            weight_column not in columns.features:
        columns = replace(columns, features=(*columns.features, weight_column))
    loading = PhaseClock()
    with loading.phase("load"):
        ds0 = _load_data(data, label, "training data", columns)
    if ds0.labels is None:
        raise InvalidInputError("training data have no label column")
    ds, weights = _weights(ds0, class_weight, weight_column)
    _make_kernel(kernel, gamma, degree, offset)  # fail on a bad kernel before anything else
    classes = class_order(ds.labels)
    task = classification_task(len(classes))
    members = task.members(ds.labels, weights=weights,
                           options={"max_classes": max_classes, "label_name": ds.label_name})
    if positive_label is not None:
        members = _with_positive(members, positive_label, classes, ds, task.parent_record)
    if probabilities:
        _check_calibration_folds(ds.labels, calibration_folds, calibration_seed)
    hold = None
    if holdout is not None:
        with loading.phase("load"):
            hold = _load_data(holdout, ds.label_name, "held-out data",
                              replace(columns, features=None), names=ds.feature_names)
        if hold.labels is None:
            raise InvalidInputError("held-out data need the label column to be scored")
        check_known_labels(hold, classes, "held-out data")
        if task.parent_record:
            task.held_out(_NoPrediction(hold.labels), hold.labels, classes)  # unseen labels
    opts = {"kernel": kernel, "gamma": gamma, "degree": degree if kernel == "poly" else None,
            "offset": offset if kernel in ("poly", "sigmoid") else None, "C": C,
            "kkt_tol": kkt_tol, "iteration_limit": iteration_limit, "standardise": standardise}
    cmd_opts = dict(opts)
    if probabilities:
        cmd_opts.update(probabilities=True, calibration_folds=int(calibration_folds),
                        calibration_seed=int(calibration_seed))
    if class_weight is not None:
        cmd_opts["class_weight"] = (class_weight if isinstance(class_weight, str) else
                                    ",".join(f"{k}={v}" for k, v in class_weight.items()))
    if weight_column is not None:
        cmd_opts["weight_column"] = weight_column
    if positive_label is not None:
        cmd_opts["positive_label"] = str(positive_label)
    command = _command(data, label, {**cmd_opts, "solver": solver}, holdout, columns)
    extra: dict[str, Any] = {}
    if weights.weight_column is not None:
        extra["weight_column"] = weights.weight_column
    if class_weight is not None:
        extra["class_weight_rule"] = ("balanced: " + BALANCED_RULE
                                      if class_weight == "balanced" else "given")
    jobs = []
    for m in members:
        sub_hold = None
        if hold is not None:
            keep = np.isin(np.array([str(v) for v in hold.labels.tolist()]),
                           [str(v) for v in class_order(m.labels)])
            sub_hold = _subset(hold, np.flatnonzero(keep))
        jobs.append(_MemberJob(
            task=task.name, member=m, data=_subset(ds, m.rows), hold=sub_hold,
            kernel=(kernel, gamma, degree, offset), C=C, kkt_tol=kkt_tol,
            iteration_limit=iteration_limit, solver=solver, standardise=standardise,
            trace=trace, explain=explain, command=command, extra_data=extra,
            probabilities=bool(probabilities), calibration_folds=int(calibration_folds),
            calibration_seed=int(calibration_seed), phases=loading.to_dict()))
    from .store.format import preload_parquet

    preload_parquet()  # loaded while the solve runs; the save writes Parquet
    if len(jobs) == 1:
        fits, execution = [_fit_member(jobs[0], progress)], None
    else:
        fits, execution = run_jobs(_fit_member, jobs, sizes=[j.member.rows.shape[0] for j in jobs],
                                   where=parallel, warm_up=_warm_up)

    ids: list[str] = []
    saved: list[RunRecord] = []
    member_refs: list[Member] = []
    member_summaries: list[dict[str, Any]] = []
    for job, fit in zip(jobs, fits, strict=True):
        first = None
        for k, rec in enumerate(fit.records):
            t_save = time.perf_counter()
            rid = store.save(rec, parent=first)
            t_save = time.perf_counter() - t_save
            saved.append(replace(rec, run_id=rid, parent_id=first))
            ids.append(rid)
            role = job.member.role if k == 0 else f"{job.member.role}_challenger"
            member_refs.append(Member(run_id=rid, role=role, key=job.member.key))
            summ = _run_summary(saved[-1], rid, store.run_dir(rid))
            summ["phase_seconds"] = {**summ.get("phase_seconds", {}), "save": t_save}
            if task.parent_record:
                summ["role"], summ["key"] = role, list(job.member.key or ())
            if k == 1 and fit.comparison is not None:
                summ["verdict"] = str(fit.comparison.verdict)
            member_summaries.append(summ)
            first = first or rid
    notes = [f"data: {w}" for w in ds.warnings]
    for s in member_summaries:
        if not s["converged"]:
            where = f" (pair {' vs '.join(s['key'])})" if s.get("key") else ""
            notes.append(f"{s['solver']} run {s['run_id']}{where} did not converge: "
                         f"{s['message']}")
    for rec in saved:
        cal = rec.attachments.get("calibration")
        if cal and cal["status"] != "fitted":
            key = rec.problem.info.get("labels") or {}
            where = (f" (pair {key.get('negative')} vs {key.get('positive')})"
                     if task.parent_record else "")
            notes.append(f"probabilities{where}: {cal['message']}; this "
                         f"{'model' if task.parent_record else 'run'} gives no probabilities")
    skipped_all = [f.skipped for f in fits if f.skipped]
    if skipped_all:
        notes.append(skipped_all[0] + ("" if len(skipped_all) == 1 else
                                       f" (and in {len(skipped_all) - 1} more pairs)"))
    if not task.parent_record:
        comparison = fits[0].comparison
        return TrainOutcome(
            run_ids=tuple(ids), records=tuple(saved), summaries=tuple(member_summaries),
            comparison=comparison, challenger_skipped=fits[0].skipped, store=Path(store.root),
            warnings=tuple(notes), task=task.name,
        )
    info = task.describe(members, ds.labels, weights)
    info["execution"] = execution.to_dict() if execution is not None else None
    info["options"] = {**opts, "solver": solver, "class_weight": cmd_opts.get("class_weight"),
                       "weight_column": weight_column}
    parent_data = {
        "fingerprint": _fingerprint(ds), "feature_names": list(ds.feature_names),
        "label_name": ds.label_name, "source": ds.source, "warnings": list(ds.warnings),
        "n_rows": int(ds.X.shape[0]), **extra,
    }
    # which training row is in which pair (explain of the parent reads it)
    cls_text = [str(c) for c in classes]
    attachments: dict[str, Any] = {"training_rows": {
        "class_index": [cls_text.index(str(v)) for v in ds.labels.tolist()],
        "rule": "class_index[r] is training row r's position in info.classes; a pair "
                "(a, b) trains on the rows of classes a and b in row order"}}
    if hold is not None:
        models = [model_from_solution(r.problem, r.result, r.standardiser)
                  for r, m in zip(saved, member_refs, strict=True) if m.role == "pair"]
        hX = _align(hold, ds.feature_names, "held-out data")
        pred = task.predict(models, hX, info)
        facts = task.held_out(pred, hold.labels, classes)
        facts.update(fingerprint=_fingerprint(hold), source=hold.source,
                     ties=int(np.sum(pred.tie)),
                     min_abs_value=float(np.min(np.abs(pred.values))) if hX.shape[0] else None)
        attachments["holdout"] = facts
    if probabilities:
        from .calibration.multiclass import parent_attachment

        pair_refs = [(m, r) for m, r in zip(member_refs, saved, strict=True) if m.role == "pair"]
        held = {} if hold is None else {"values": pred.values, "truth": hold.labels.tolist(),
                                        "voted": pred.labels.tolist(), "source": hold.source}
        attachments["calibration"] = parent_attachment(
            info["class_values"], [m.key for m, _ in pair_refs],
            [r.attachments.get("calibration") for _, r in pair_refs], **held)
    summary = _parent_summary(member_summaries, ds, kernel, C, kkt_tol, task.name,
                              attachments.get("holdout"))
    parent = ParentRecord(task=task.name, members=tuple(member_refs), info=info,
                          data=parent_data, summary=summary, attachments=attachments,
                          command=command)
    pid = store.save_parent(parent)
    parent_summary = {**_flat_summary(summary), "run_id": pid,
                      "run_dir": str(store.run_dir(pid))}
    return TrainOutcome(
        run_ids=(pid,), records=tuple(saved), summaries=(parent_summary,), comparison=None,
        challenger_skipped=skipped_all[0] if skipped_all else None, store=Path(store.root),
        warnings=tuple(notes), task=task.name, members=tuple(member_summaries),
        parent=replace(parent, run_id=pid),
    )


def _with_positive(members: list[MemberSpec], positive: Any, classes: Sequence[Any],
                   ds: Dataset, parent: bool) -> list[MemberSpec]:
    """The binary member with its positive label chosen by value or by text."""
    where = f"{ds.source}: " if ds.source else ""
    if parent:
        raise InvalidInputError(
            f"{where}--positive applies to two classes; label column {ds.label_name!r} has "
            f"{len(classes)}, and each one-vs-one pair's positive label is its later class")
    match = [c for c in classes if c == positive or str(c) == str(positive)]
    if not match:
        raise InvalidInputError(
            f"{where}label column {ds.label_name!r} has no value {str(positive)!r} for "
            f"--positive (its values: {', '.join(repr(str(c)) for c in classes)})")
    (m,) = members
    return [replace(m, build={**m.build, "positive_label": match[0]})]


def _check_calibration_folds(labels: np.ndarray, n_folds: int, seed: int) -> None:
    """Refuse, before anything is solved, a bad fold count or seed and a class with fewer
    rows than calibration folds (the rule of :func:`solver.calibration.stratified_folds`,
    which every fit applies again to its own rows)."""
    from .calibration import stratified_folds

    stratified_folds(np.array([str(v) for v in np.asarray(labels, dtype=object).tolist()]),
                     n_folds, seed)


class _NoPrediction:
    """Stand-in prediction whose labels are the truth (checks held-out labels early)."""

    def __init__(self, labels: np.ndarray) -> None:
        self.labels = labels


_STATUS_ORDER = ("converged", "certificate_not_met", "stopped_by_callback", "time_limit",
                 "iteration_limit", "stalled", "singular_kkt", "numerical_error")
_VERDICT_ORDER = ("agree", "agree_within_tolerances", "disagree")


def worst(values: Sequence[str], order: Sequence[str]) -> str | None:
    """The entry of ``values`` that comes last in ``order`` (unknown entries count worst)."""
    if not values:
        return None
    return max(values, key=lambda v: order.index(v) if v in order else len(order))


def _parent_summary(members: Sequence[Mapping[str, Any]], ds: Dataset, kernel: str, C: float,
                    kkt_tol: float, task: str, holdout: Mapping[str, Any] | None
                    ) -> dict[str, Any]:
    """Key figures over the member runs (the catalog reads solver / problem / certificate)."""
    prim = [m for m in members if m["role"] == "pair"]
    status = worst([m["status"] for m in prim], _STATUS_ORDER) or "converged"
    verdicts = [m["verdict"] for m in members if m.get("verdict")]
    slow = max(prim, key=lambda m: m["iterations"])
    out: dict[str, Any] = {
        "task": task,
        "members": len(members),
        "pairs": len(prim),
        "status": status,
        "converged": all(m["converged"] for m in members),
        "worst_verdict": worst(verdicts, _VERDICT_ORDER),
        "slowest_pair": {"key": slow.get("key"), "run_id": slow["run_id"],
                         "iterations": slow["iterations"], "seconds": slow["seconds"]},
        "solver": {"name": prim[0]["solver"], "status": status,
                   "iterations": int(sum(m["iterations"] for m in prim)),
                   "seconds": float(sum(m["seconds"] for m in prim))},
        "problem": {"kind": "multiclass_one_vs_one", "n": int(ds.X.shape[0]),
                    "n_features": int(ds.X.shape[1]),
                    "kernel": {"name": kernel, "params": {}}, "info": {"C": float(C)}},
        "certificate": {"kkt_tol": float(kkt_tol),
                        "max_violation": float(max(m["max_violation"] for m in prim)),
                        "duality_gap": float(max(m["duality_gap"] for m in prim)),
                        "relative_gap": float(max(m["relative_gap"] for m in prim)),
                        "dual_objective": float(sum(m["dual_objective"] for m in prim)),
                        "n_support": int(sum(m["n_support"] for m in prim))},
    }
    if holdout:
        out["holdout_accuracy"] = holdout["accuracy"]
        out["holdout_balanced_accuracy"] = holdout["balanced_accuracy"]
    return out


def _flat_summary(summary: Mapping[str, Any]) -> dict[str, Any]:
    """The parent's summary in the flat shape of a run summary (for TrainOutcome)."""
    cert = summary["certificate"]
    out = {
        "task": summary["task"], "record": "parent", "solver": summary["solver"]["name"],
        "status": summary["status"], "converged": summary["converged"],
        "iterations": summary["solver"]["iterations"], "seconds": summary["solver"]["seconds"],
        "max_violation": cert["max_violation"], "duality_gap": cert["duality_gap"],
        "kkt_tol": cert["kkt_tol"], "pairs": summary["pairs"], "members": summary["members"],
        "worst_verdict": summary["worst_verdict"], "slowest_pair": summary["slowest_pair"],
        "n_rows": summary["problem"]["n"], "kernel": summary["problem"]["kernel"],
        "C": summary["problem"]["info"]["C"],
    }
    for k in ("holdout_accuracy", "holdout_balanced_accuracy"):
        if k in summary:
            out[k] = summary[k]
    return out


def _train_kind(data: Any, *, label: str | None, kernel: str, gamma: float | None, degree: int,
                offset: float, C: float, kkt_tol: float, iteration_limit: int | None,
                solver: str, standardise: bool, holdout: Any, store: RunStore, trace: str,
                explain: bool, progress: ProgressFn | None, task: str, target: str | None,
                epsilon: float, nu: float, outlier_column: str | None,
                columns: Columns = NO_CHOICE) -> TrainOutcome:
    """ε-regression and one-class fits (:mod:`solver.training_kinds`) as a TrainOutcome."""
    from .training_kinds import kind_summary, train_kind

    kern = _make_kernel(kernel, gamma, degree, offset)
    opts = {"kernel": kernel, "gamma": gamma, "degree": degree if kernel == "poly" else None,
            "offset": offset if kernel in ("poly", "sigmoid") else None, "C": C,
            "kkt_tol": kkt_tol, "iteration_limit": iteration_limit, "standardise": standardise}
    if task == "one-class":
        opts.pop("C")  # the one-class bounds come from ν
    got = train_kind(data, task=task, target=target, label=label, outlier_column=outlier_column,
                     epsilon=epsilon, nu=nu, kern=kern, C=C, kkt_tol=kkt_tol,
                     iteration_limit=iteration_limit, solver=solver, standardise=standardise,
                     holdout=holdout, store=store, trace=trace, explain=explain,
                     progress=progress, opts=opts, columns=columns)
    ids, saved, comparison = got["ids"], got["records"], got["comparison"]
    summaries = tuple(
        {**_run_summary(rec, rid, store.run_dir(rid)), **kind_summary(rec)}
        for rec, rid in zip(saved, ids, strict=True))
    if comparison is not None:
        summaries[1]["verdict"] = str(comparison.verdict)
    notes = list(got["notes"])
    for s in summaries:
        if not s["converged"]:
            notes.append(f"{s['solver']} run {s['run_id']} did not converge: {s['message']}")
    return TrainOutcome(run_ids=tuple(ids), records=tuple(saved), summaries=summaries,
                        comparison=comparison, challenger_skipped=got["skipped"],
                        store=Path(store.root), warnings=tuple(notes))
