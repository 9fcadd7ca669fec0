"""The kktrace workflow in Python, with the same names the ``kktrace`` command uses.

``train`` loads data, standardises it, audits the kernel, solves the SVM dual with SMO
(and, with ``solver="both"``, with the independent QP challenger), explains every
training point, scores held-out data and saves each run to the store.  The other
functions are thin wrappers that take run ids (or loaded records) and a store:
``load_run``, ``runs``, ``compare``, ``explain``, ``leave_one_out``, ``replay``,
``verify``, ``score``, ``report`` and ``export_explanation``.

Nothing here prints; progress is reported through an optional ``progress(task, info)``
callable (see :data:`ProgressFn`).
"""

from __future__ import annotations

import math
import os
import shlex
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .data import Dataset
from .errors import ConvergenceWarning, DataWarning, InvalidInputError
from .kernels import make_kernel
from .model import Model, Standardiser, model_from_solution
from .problem import DualProblem, binary_classification
from .result import TRACE_LEVELS, SolveResult
from .run import RunRecord
from .status import Status

if TYPE_CHECKING:  # pragma: no cover
    from .store import RunStore

__all__ = [
    "STORE_ENV",
    "DEFAULT_STORE",
    "SOLVER_CHOICES",
    "KERNEL_CHOICES",
    "ProgressFn",
    "TrainOutcome",
    "Scores",
    "VerifyOutcome",
    "open_store",
    "train",
    "load_run",
    "runs",
    "compare",
    "explain",
    "leave_one_out",
    "replay",
    "verify",
    "score",
    "report",
    "export_explanation",
]

#: Environment variable naming the default store directory.
STORE_ENV = "KKTRACE_STORE"
#: Store directory used when neither an argument nor :data:`STORE_ENV` gives one.
DEFAULT_STORE = "traces"
SOLVER_CHOICES = ("smo", "qp", "both")
KERNEL_CHOICES = ("linear", "poly", "rbf", "sigmoid")

#: ``progress(task, info)``: task is ``"solve"`` (info: solver, iteration, violation, tol,
#: max_iter) or ``"leave_one_out"`` (info: done, total); ``"done"`` ends a task.
ProgressFn = Callable[[str, Mapping[str, Any]], None]

# --------------------------------------------------------------------------- helpers


def open_store(store: Any = None) -> RunStore:
    """The :class:`~solver.store.RunStore` for ``store``: a store, a directory, or None.

    None means ``$KKTRACE_STORE`` if set, else ``./traces``.
    """
    from .store import RunStore

    if isinstance(store, RunStore):
        return store
    if store is None:
        store = os.environ.get(STORE_ENV) or DEFAULT_STORE
    root = Path(store)
    if root.exists() and not root.is_dir():
        raise InvalidInputError(f"store {str(root)!r} exists but is not a directory")
    return RunStore(root)


def load_run(run: str | RunRecord, *, store: Any = None) -> RunRecord:
    """The stored :class:`~solver.run.RunRecord` with id ``run`` (a record is returned as is)."""
    if isinstance(run, RunRecord):
        return run
    if not isinstance(run, str) or not run:
        raise InvalidInputError(f"a run id must be a non-empty string, got {run!r}")
    return open_store(store).load(run)


def runs(*, store: Any = None, **filters: Any) -> list[dict[str, Any]]:
    """Catalog rows (one dict per run, key figures) matching ``filters`` (e.g. ``status=``)."""
    return list(open_store(store).runs(**{k: v for k, v in filters.items() if v is not None}))


def _load_data(data: Dataset | str | Path, label: str | None, what: str) -> Dataset:
    from .data import load_table

    if isinstance(data, Dataset):
        return data
    if not isinstance(data, (str, Path)):
        raise InvalidInputError(
            f"{what} must be a Dataset or a file path, got {type(data).__name__}"
        )
    path = Path(data)
    if not path.exists():
        raise InvalidInputError(f"{what} file {str(path)!r} does not exist")
    if path.is_dir():
        raise InvalidInputError(f"{what} path {str(path)!r} is a directory, not a data file")
    return load_table(path, label=label)


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


def _align(query: Dataset, names: Sequence[str], what: str) -> np.ndarray:
    """Query features in the training column order (matched by name when names are known)."""
    qn = list(query.feature_names)
    if qn == list(names):
        return query.X
    missing = [c for c in names if c not in qn]
    if missing:
        raise InvalidInputError(
            f"{what} lacks training feature column(s) {', '.join(map(repr, missing))}"
            + (f" (file {query.source})" if query.source else "")
        )
    extra = [c for c in qn if c not in names]
    if extra:
        raise InvalidInputError(
            f"{what} has column(s) {', '.join(map(repr, extra))} that the run was not trained "
            "on; remove them or name the label column"
        )
    return query.X[:, [qn.index(c) for c in names]]


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        return v.item()
    return v


def _confusion(truth: np.ndarray, pred: np.ndarray, labels: tuple[Any, Any]) -> dict[str, Any]:
    """Confusion matrix (rows: true label, columns: predicted; order negative, positive)."""
    neg, pos = labels
    t = np.asarray(truth, dtype=object)
    p = np.asarray(pred, dtype=object)
    unknown = sorted({str(v) for v in t.tolist()} - {str(neg), str(pos)})
    if unknown:
        raise InvalidInputError(
            f"held-out labels {', '.join(map(repr, unknown))} were not seen in training "
            f"(training labels: {neg!r}, {pos!r})"
        )
    ts = np.array([str(v) for v in t.tolist()])
    ps = np.array([str(v) for v in p.tolist()])
    sn, sp = str(neg), str(pos)
    m = [[int(np.sum((ts == a) & (ps == b))) for b in (sn, sp)] for a in (sn, sp)]
    n = int(ts.size)
    acc = (m[0][0] + m[1][1]) / n if n else float("nan")
    recalls = [m[i][i] / sum(m[i]) for i in range(2) if sum(m[i]) > 0]
    bal = float(np.mean(recalls)) if recalls else float("nan")
    return {
        "labels": [_plain(neg), _plain(pos)],
        "matrix": m,
        "matrix_layout": "rows: true label, columns: predicted label",
        "n": n,
        "accuracy": float(acc),
        "balanced_accuracy": bal,
    }


def _fingerprint(ds: Dataset) -> str:
    from .data import fingerprint

    return fingerprint(ds)


def _solve(
    method: str,
    problem: DualProblem,
    *,
    tol: float,
    max_iter: int | None,
    trace: str,
    progress: ProgressFn | None,
) -> SolveResult:
    from .solvers import get_solver

    if method == "qp":
        # the challenger runs to cvxopt's own (tight) tolerance; ``tol`` is the certificate's
        options: dict[str, Any] = {"kkt_tol": tol, "trace": trace}
    else:
        options = {"tol": tol, "trace": trace}
    if max_iter is not None:
        options["max_iter"] = max_iter
    if progress is not None:

        def cb(state: Mapping[str, Any]) -> None:
            info = {"solver": method, "tol": tol, "max_iter": max_iter}
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
        flag = {"max_iter": "--max-iter"}
        for k, v in opts.items():
            if v is None or k in ("standardise",):
                continue
            argv += [flag.get(k, f"--{k}"), str(v)]
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


# --------------------------------------------------------------------------- train


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
        "tol": float(c.tol),
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

    return _jsonable(audit_kernel(problem.kernel, problem.X,
                                  feature_names=feature_names).to_dict())


def _jsonable(v: Any) -> Any:
    """Plain JSON-ready data (numpy scalars and arrays converted, NaN kept as float)."""
    if isinstance(v, Mapping):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return _jsonable(v.tolist())
    if isinstance(v, np.generic):
        return v.item()
    return v


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
    tol: float = 1e-3,
    max_iter: int | None = None,
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
    C : penalty (> 0).  tol : stopping tolerance on the maximal KKT violation.
    max_iter : iteration limit (None: the solver's default); with ``"both"`` it applies to
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
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and tol > 0):
        raise InvalidInputError(f"tol must be a finite number > 0, got {tol!r}")
    if max_iter is not None and (isinstance(max_iter, bool) or not isinstance(max_iter, int)
                                 or max_iter < 1):
        raise InvalidInputError(f"max_iter must be a positive integer, got {max_iter!r}")
    if isinstance(data, (str, Path)) and label is None:
        raise InvalidInputError("name the label column of the training file (--label COLUMN)")
    run_store = open_store(store)
    caught: list[str] = []
    with warnings.catch_warnings(record=True) as wlist:
        warnings.simplefilter("always")
        outcome = _train(
            data, label=label, kernel=kernel, gamma=gamma, degree=degree, offset=offset, C=C,
            tol=float(tol), max_iter=max_iter, solver=solver, standardise=standardise,
            holdout=holdout, store=run_store, trace=trace, explain=explain, progress=progress,
        )
    for w in wlist:
        if issubclass(w.category, (ConvergenceWarning, DataWarning)):
            caught.append(str(w.message))
        if not quiet or not issubclass(w.category, (ConvergenceWarning, DataWarning)):
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
    tol: float,
    max_iter: int | None,
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
            "offset": offset if kernel in ("poly", "sigmoid") else None, "C": C, "tol": tol,
            "max_iter": max_iter, "standardise": standardise}

    records: list[RunRecord] = []
    for method in methods:
        # with "both" the iteration limit is SMO's; the challenger keeps cvxopt's own
        limit = max_iter if (method == "smo" or solver == "qp") else None
        result = _solve(method, problem, tol=tol, max_iter=limit, trace=trace,
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
            **records[1].attachments, "comparison": _jsonable(comparison.to_dict())})

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


# --------------------------------------------------------------------------- wrappers


def compare(
    run_a: str | RunRecord,
    run_b: str | RunRecord,
    *,
    store: Any = None,
    holdout: Dataset | str | Path | None = None,
    tolerances: Mapping[str, float] | None = None,
    allow_mismatch: bool = False,
) -> Any:
    """Solver-agreement :class:`~solver.agreement.Comparison` of two runs.

    ``holdout`` (data file or Dataset, label column optional) adds decision-value agreement
    on held-out rows.  Runs of different problems raise
    :class:`~solver.errors.ProblemMismatchError` unless ``allow_mismatch``.
    """
    from .agreement import compare_runs

    a, b = load_run(run_a, store=store), load_run(run_b, store=store)
    hX = None
    if holdout is not None:
        hold = _load_data(holdout, a.data.get("label_name"), "held-out data")
        hX = _align(hold, a.data.get("feature_names") or [], "held-out data")
    return compare_runs(a, b, holdout_X=hX, tolerances=tolerances, allow_mismatch=allow_mismatch)


def _parse_point(point: Mapping[str, float] | Sequence[float] | np.ndarray,
                 names: Sequence[str]) -> np.ndarray:
    if isinstance(point, Mapping):
        unknown = [k for k in point if k not in names]
        if unknown:
            raise InvalidInputError(
                f"unknown feature(s) {', '.join(map(repr, unknown))}; the run's features are "
                f"{', '.join(names)}"
            )
        missing = [k for k in names if k not in point]
        if missing:
            raise InvalidInputError(f"the point lacks feature(s) {', '.join(missing)}")
        row = []
        for k in names:
            try:
                v = float(point[k])
            except (TypeError, ValueError):
                raise InvalidInputError(f"feature {k!r}: {point[k]!r} is not a number") from None
            if not math.isfinite(v):
                raise InvalidInputError(f"feature {k!r}: value {v!r} is not finite")
            row.append(v)
        return np.array([row])
    arr = np.asarray(point, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != len(names):
        raise InvalidInputError(
            f"query points must have {len(names)} features ({', '.join(names)}), got shape "
            f"{arr.shape}"
        )
    if not np.all(np.isfinite(arr)):
        raise InvalidInputError("query points contain non-finite values")
    return arr


def explain(
    run: str | RunRecord,
    *,
    store: Any = None,
    points: Mapping[str, float] | Sequence[float] | np.ndarray | Dataset | str | Path | None = None,
    top: int = 5,
) -> Any:
    """Explain a run.

    Without ``points``: the per-point :class:`~solver.explanation.PointTable` of the training
    data (category and reason for every point).  With ``points`` (a mapping feature →
    value, an (m, d) array in raw units, a Dataset or a data file): the decision
    :class:`~solver.explanation.Breakdown` of each query into its ``top`` contributing support
    vectors and the remainder.
    """
    from .explanation import breakdown, point_table

    rec = load_run(run, store=store)
    if points is None:
        return point_table(rec.problem, rec.result)
    names = list(rec.data.get("feature_names") or [])
    if isinstance(points, (str, Path)):
        lab = rec.data.get("label_name")
        q = _load_data(points, lab if _has_column(Path(points), lab) else None, "query data")
        X = _align(q, names, "query data")
    elif isinstance(points, Dataset):
        X = _align(points, names, "query data")
    else:
        X = _parse_point(points, names)
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    if isinstance(top, bool) or not isinstance(top, int) or top < 1:
        raise InvalidInputError(f"top must be a positive integer, got {top!r}")
    return breakdown(model, X, top=top)


def leave_one_out(
    run: str | RunRecord, *, store: Any = None, progress: ProgressFn | None = None
) -> Any:
    """Exact leave-one-out error (support-vector refits) with the Vapnik and Joachims bounds.

    Returns :class:`~solver.explanation.LeaveOneOut`; needs a converged run.
    """
    from .explanation import leave_one_out as _loo

    rec = load_run(run, store=store)
    if progress is None:
        return _loo(rec.problem, rec.result)

    def cb(done: int, total: int) -> None:
        progress("leave_one_out", {"done": done, "total": total})

    try:
        return _loo(rec.problem, rec.result, progress=cb)
    finally:
        progress("done", {"task": "leave_one_out"})


def replay(run: str | RunRecord, iteration: int, *, store: Any = None) -> Any:
    """State of a run at a recorded ``iteration`` (α, certificate figures, decision function)."""
    from .store import replay as _replay

    if isinstance(iteration, bool) or not isinstance(iteration, int) or iteration < 0:
        raise InvalidInputError(f"iteration must be a non-negative integer, got {iteration!r}")
    rec = load_run(run, store=store)
    return _replay(rec, iteration)


@dataclass(frozen=True, eq=False)
class VerifyOutcome:
    """Result of :func:`verify`: integrity of the stored files and, optionally, a re-run.

    ``integrity`` is the store's :class:`~solver.store.Verification` (``ok``, ``problems``);
    ``reproduction`` the re-run's :class:`~solver.store.Reproduction` (None without
    ``rerun``); ``rerun_run_id`` the id of the stored re-run (with ``keep_rerun``).
    ``ok`` is True only when the files are intact and any re-run reproduced α bitwise or
    within the reproduction tolerance.
    """

    run_id: str
    integrity: Any
    reproduction: Any | None
    rerun_run_id: str | None = None

    @property
    def ok(self) -> bool:
        """True only when every check passed."""
        ok = bool(self.integrity.ok)
        if self.reproduction is not None:
            ok = ok and bool(self.reproduction.within_tolerance)
        return ok


def verify(
    run: str, *, store: Any = None, rerun: Dataset | str | Path | None = None,
    keep_rerun: bool = False,
) -> VerifyOutcome:
    """Check a stored run's files (digests, chain to its parent) and optionally re-run it.

    ``rerun`` is the training data (file or Dataset); it must match the stored
    fingerprint.  With ``keep_rerun`` the re-run is saved as a new run whose parent is
    ``run``.
    """
    from .store import reproduce

    st = open_store(store)
    integrity = st.verify(run)
    reproduction = None
    new_id = None
    if rerun is not None:
        if not integrity.ok:
            return VerifyOutcome(run_id=run, integrity=integrity, reproduction=None)
        rec = st.load(run)
        ds = _load_data(rerun, rec.data.get("label_name"), "re-run data")
        reproduction = reproduce(rec, ds)
        if keep_rerun:
            new_id = st.save(reproduction.record, parent=run)
    return VerifyOutcome(run_id=run, integrity=integrity, reproduction=reproduction,
                         rerun_run_id=new_id)


@dataclass(frozen=True, eq=False)
class Scores:
    """Decision values and labels of a run's model on new data.

    values : (m,) decision values f(x); labels : (m,) predicted label values;
    truth : (m,) given labels or None; confusion : confusion matrix and accuracies when
    the data carried the label column, else None; fingerprint : of the scored data.
    """

    run_id: str | None
    values: np.ndarray
    labels: np.ndarray
    truth: np.ndarray | None
    confusion: Mapping[str, Any] | None
    fingerprint: str
    source: str | None

    def to_dict(self) -> dict[str, Any]:
        """Plain data (lists)."""
        return {
            "run_id": self.run_id,
            "n": int(self.values.shape[0]),
            "fingerprint": self.fingerprint,
            "source": self.source,
            "values": self.values.tolist(),
            "labels": [_plain(v) for v in self.labels.tolist()],
            "confusion": None if self.confusion is None else dict(self.confusion),
        }


def _has_column(path: Path, column: str | None) -> bool:
    """Whether a data file has a column ``column`` (header peek; no data parsed)."""
    if column is None or not path.is_file():
        return False
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            import csv

            with path.open(newline="", encoding="utf-8-sig") as fh:
                header = next(csv.reader(fh), [])
            return column in [h.strip() for h in header]
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            return column in pq.read_schema(path).names
        if suffix == ".npz":
            with np.load(path, allow_pickle=False) as z:
                return column in z.files
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise InvalidInputError(f"cannot read {str(path)!r}: {exc}") from None
    return False


def score(
    run: str | RunRecord, data: Dataset | str | Path, *, store: Any = None,
    label: str | None = None,
) -> Scores:
    """Decision values and predicted labels of a stored run's model on ``data``.

    When the data carry a label column (``label``, or the run's label column if the file
    has it) the confusion matrix, accuracy and balanced accuracy are included.
    """
    rec = load_run(run, store=store)
    names = list(rec.data.get("feature_names") or [])
    if isinstance(data, (str, Path)) and label is None:
        lab = rec.data.get("label_name")
        label = lab if _has_column(Path(data), lab) else None
    ds = _load_data(data, label, "data to score")
    X = _align(ds, names, "data to score")
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    values = model.values(X)
    pred = model.classify(X)
    conf = None if ds.labels is None else _confusion(ds.labels, pred, model.labels)
    return Scores(run_id=rec.run_id, values=values, labels=pred, truth=ds.labels,
                  confusion=conf, fingerprint=_fingerprint(ds), source=ds.source)


def _stored_comparison(second: RunRecord, first: RunRecord) -> Any | None:
    comp = second.attachments.get("comparison")
    if comp and second.parent_id == first.run_id:
        return comp
    return None


def report(
    run_ids: str | Sequence[str | RunRecord],
    *,
    store: Any = None,
    out_dir: str | Path | None = None,
    formats: Sequence[str] = ("html", "pdf", "json"),
    notes: str | None = None,
    stem: str = "report",
) -> dict[str, Path]:
    """Write the audit report for one run (or a run and its challenger) and return the paths.

    With two runs the comparison stored with the challenger is used when the second run
    derives from the first; otherwise the two runs are compared afresh.  ``out_dir``
    defaults to ``<store>/reports/<first run id>``.
    """
    from .reporting import write_report

    st = open_store(store)
    ids = [run_ids] if isinstance(run_ids, (str, RunRecord)) else list(run_ids)
    if not 1 <= len(ids) <= 2:
        raise InvalidInputError(f"a report covers one run or two runs, got {len(ids)}")
    recs = [load_run(r, store=st) for r in ids]
    comparison = None
    if len(recs) == 2:
        comparison = _stored_comparison(recs[1], recs[0])
        if comparison is None:
            from .agreement import compare_runs

            comparison = compare_runs(recs[0], recs[1])
    out = Path(out_dir) if out_dir is not None else Path(st.root) / "reports" / str(recs[0].run_id)
    return write_report(recs, out, formats=tuple(formats), comparison=comparison, notes=notes,
                        stem=stem)


def export_explanation(
    run: str | RunRecord, out_dir: str | Path, *, store: Any = None,
    formats: Sequence[str] = ("csv", "parquet"),
) -> dict[str, Path]:
    """Write a run's per-point table as ``points-<run id>.csv`` / ``.parquet`` in ``out_dir``."""
    for fmt in formats:
        if fmt not in ("csv", "parquet"):
            raise InvalidInputError(f"unknown table format {fmt!r}; choose csv or parquet")
    rec = load_run(run, store=store)
    table = explain(rec)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stem = f"points-{rec.run_id or 'unsaved'}"
    paths: dict[str, Path] = {}
    if "csv" in formats:
        paths["csv"] = table.write_csv(out / f"{stem}.csv")
    if "parquet" in formats:
        paths["parquet"] = table.write_parquet(out / f"{stem}.parquet")
    return paths
