"""Training workflow: data → standardised problem → kernel audit → solve(s) → explanation →
held-out scores → comparison → saved runs.  Public entry point :func:`train` (re-exported by
:mod:`solver.api` and :mod:`solver`).
"""

from __future__ import annotations

import math
import shlex
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._workflow import (
    KERNEL_CHOICES,
    SOLVER_CHOICES,
    ProgressFn,
    _align,
    _confusion,
    _fingerprint,
    _load_data,
    open_store,
)
from .data import Dataset
from .errors import ConvergenceWarning, DataWarning, InvalidInputError, StoreWarning
from .kernels import make_kernel
from .model import Model, Standardiser, model_from_solution
from .plaindata import to_plain
from .problem import DualProblem, binary_classification
from .result import TRACE_LEVELS, SolveResult
from .run import RunRecord
from .status import Status

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
) -> SolveResult:
    from .solvers import get_solver

    if method == "qp":
        # the challenger runs to cvxopt's own (tight) tolerance; ``kkt_tol`` is the certificate's
        options: dict[str, Any] = {"kkt_tol": kkt_tol, "trace": trace}
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
    data: Any, label: str | None, opts: Mapping[str, Any], holdout: Any
) -> dict[str, Any]:
    """The CLI command and Python call that reproduce a training run."""
    py_args = ", ".join(f"{k}={v!r}" for k, v in opts.items() if v is not None)
    if isinstance(data, (str, Path)):
        argv = ["kktrace", "train", str(data)]
        if label is not None:
            argv += ["--label", label]
        for k, v in opts.items():
            if v is None or k in ("standardise",):
                continue
            argv += ["--" + k.replace("_", "-"), str(v)]
        if not opts.get("standardise", True):
            argv.append("--no-standardise")
        if holdout is not None and isinstance(holdout, (str, Path)):
            argv += ["--holdout", str(holdout)]
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
    """

    run_ids: tuple[str, ...]
    records: tuple[RunRecord, ...]
    summaries: tuple[dict[str, Any], ...]
    comparison: Any | None
    challenger_skipped: str | None
    store: Path
    warnings: tuple[str, ...] = field(default=())

    @property
    def run_id(self) -> str:
        """Id of the primary run."""
        return self.run_ids[0]

    @property
    def converged(self) -> bool:
        """True only when every run met its optimality test."""
        return all(s["status"] == Status.CONVERGED.label for s in self.summaries)

    @property
    def verdict(self) -> str | None:
        """Solver-agreement verdict, or None without a challenger."""
        return None if self.comparison is None else str(self.comparison.verdict)

    def summary(self) -> dict[str, Any]:
        """Plain data: the primary run's key figures, plus ``verdict`` and ``challenger``."""
        out = dict(self.summaries[0])
        out["converged"] = self.converged
        if len(self.summaries) > 1:
            out["challenger"] = dict(self.summaries[1])
        if self.comparison is not None:
            out["verdict"] = self.verdict
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
        "run_dir": str(run_dir),
        "n_rows": int(record.problem.n),
        "kernel": record.problem.kernel.describe(),
        "C": record.problem.info.get("C"),
    }
    hold = record.attachments.get("holdout")
    if hold:
        s["holdout_accuracy"] = hold["accuracy"]
        s["holdout_balanced_accuracy"] = hold["balanced_accuracy"]
    return s


def _audit(problem: DualProblem, feature_names: Sequence[str]) -> dict[str, Any]:
    from .audit import audit_kernel

    return to_plain(audit_kernel(problem.kernel, problem.X,
                                  feature_names=feature_names).to_dict())


def _explanation(problem: DualProblem, result: SolveResult) -> dict[str, np.ndarray]:
    from .explanation import point_table

    return dict(point_table(problem, result).to_columns())


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
) -> TrainOutcome:
    """Train a binary kernel SVM, audit it and save the run(s) to the store.

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
    if isinstance(data, (str, Path)) and label is None:
        raise InvalidInputError("name the label column of the training file (--label COLUMN)")
    run_store = open_store(store)
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always")
        outcome = _train(
            data, label=label, kernel=kernel, gamma=gamma, degree=degree, offset=offset, C=C,
            kkt_tol=float(kkt_tol), iteration_limit=iteration_limit, solver=solver,
            standardise=standardise,
            holdout=holdout, store=run_store, trace=trace, explain=explain, progress=progress,
        )
    for w in wlist:
        if issubclass(w.category, (ConvergenceWarning, DataWarning, StoreWarning)):
            caught.append(str(w.message))
        if not quiet or not issubclass(w.category,
                                       (ConvergenceWarning, DataWarning, StoreWarning)):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    seen: list[str] = []
    for m in [*outcome.warnings, *caught]:
        if m not in seen:
            seen.append(m)
    return replace(outcome, warnings=tuple(seen))


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
) -> TrainOutcome:
    ds = _load_data(data, label, "training data")
    if ds.labels is None:
        raise InvalidInputError("training data have no label column")
    kern = _make_kernel(kernel, gamma, degree, offset)
    hold = None
    if holdout is not None:
        hold = _load_data(holdout, ds.label_name, "held-out data")
        if hold.labels is None:
            raise InvalidInputError("held-out data need the label column to be scored")
        _align(hold, ds.feature_names, "held-out data")  # fail before solving
    std = Standardiser.fit(ds.X) if standardise else Standardiser.identity(ds.X.shape[1])
    problem = binary_classification(std.transform(ds.X), ds.labels, kernel=kern, C=C)

    methods = ["qp"] if solver == "qp" else ["smo"]
    skipped = None
    if solver == "both":
        limit = _qp_limit()
        if problem.n <= limit:
            methods.append("qp")
        else:
            skipped = (
                f"QP challenger skipped: {problem.n} training points exceed its size limit of "
                f"{limit}"
            )
    audit = _audit(problem, ds.feature_names)
    data_facts = {
        "fingerprint": _fingerprint(ds),
        "feature_names": list(ds.feature_names),
        "label_name": ds.label_name,
        "source": ds.source,
        "warnings": list(ds.warnings),
        "n_rows": int(ds.X.shape[0]),
    }
    opts = {"kernel": kernel, "gamma": gamma, "degree": degree if kernel == "poly" else None,
            "offset": offset if kernel in ("poly", "sigmoid") else None, "C": C, "kkt_tol": kkt_tol,
            "iteration_limit": iteration_limit, "standardise": standardise}

    records: list[RunRecord] = []
    for method in methods:
        # with "both" the iteration limit is SMO's; the challenger keeps cvxopt's own
        limit = iteration_limit if (method == "smo" or solver == "qp") else None
        result = _solve(method, problem, kkt_tol=kkt_tol, iteration_limit=limit, trace=trace,
                        progress=progress)
        attachments: dict[str, Any] = {
            "audit": audit,
            "command": _command(data, label, {**opts, "solver": solver}, holdout),
        }
        if explain:
            attachments["explanation"] = _explanation(problem, result)
        model = model_from_solution(problem, result, std)
        if hold is not None:
            attachments["holdout"] = _holdout_facts(model, hold, ds.feature_names)
        if method == "smo" and skipped:
            attachments["challenger"] = {"ran": False, "reason": skipped}
        records.append(RunRecord(problem=problem, result=result, data=data_facts,
                                 standardiser=std, attachments=attachments))

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
    summaries = tuple(
        _run_summary(rec, rid, store.run_dir(rid)) for rec, rid in zip(saved, ids, strict=True)
    )
    if comparison is not None:
        summaries[1]["verdict"] = str(comparison.verdict)
    notes = [f"data: {w}" for w in ds.warnings]
    for s in summaries:
        if not s["converged"]:
            notes.append(f"{s['solver']} run {s['run_id']} did not converge: {s['message']}")
    if skipped:
        notes.append(skipped)
    return TrainOutcome(
        run_ids=tuple(ids), records=tuple(saved), summaries=summaries, comparison=comparison,
        challenger_skipped=skipped, store=Path(store.root), warnings=tuple(notes),
    )
