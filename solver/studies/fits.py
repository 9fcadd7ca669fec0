"""The fits of a study: pure functions run on Dask workers (nothing here writes).

A *job* is a chain of cells that share a fold, γ and degree, in ascending C.  Cold jobs
hold one cell; with warm starts a job walks the whole C axis, each fit starting from the
previous C's α scaled by C_new / C_old into the new box and then made feasible
(:func:`solver.smo.repair_start`).  Every fit is returned with the scores of its
validation fold, already serialised (:func:`solver.store.store.encode_run`: the worker
spends the encoding time, in parallel) for the client to check and write, beside the
scalars the results table reads (:class:`RunFacts`).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..data import Dataset
from ..model import Standardiser, model_from_solution
from ..run import RunRecord
from .grid import Cell

__all__ = ["StudyData", "FitJob", "FitOutput", "FitView", "RunFacts", "fit_chain", "fit_key",
           "SMALL_VALUE"]

#: validation rows with |f(x)| below this are counted: their predicted class may flip
#: between two solvers that meet the same tolerance (the reference check allows them)
SMALL_VALUE = 1e-3


@dataclass(frozen=True, eq=False)
class StudyData:
    """What every fit reads: the dataset and the fold number (0 … k−1) of every row.
    Scattered to the workers once."""

    dataset: Dataset
    folds: np.ndarray


@dataclass(frozen=True)
class FitJob:
    """One chain of fits (see the module docstring).

    task : registry name of the task (``"binary"``).
    fold : validation fold; the fit trains on every other fold.
    cells : the cells, ascending C.  keys : the idempotency key of each cell's fit.
    warm : start each fit after the first from the previous one's scaled α.
    options : kernel name and offset, kkt_tol, iteration_limit, trace, standardise.
    command : the reproducing command stored with every member run.
    """

    task: str
    fold: int
    cells: tuple[Cell, ...]
    keys: tuple[str, ...]
    warm: bool
    options: Mapping[str, Any]
    command: Any = None
    extra_data: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class RunFacts:
    """The scalars of one solved run that the results table and the study record read
    (a worker sends these back beside the encoded run, not the arrays).

    n, n_features : training rows and features.  kernel : ``kernel.describe()``.
    iterations, seconds : of the solve.  status : its label; converged : it converged.
    max_violation, duality_gap, dual_objective, n_support, n_bounded : of its certificate.
    curvature_fixes, shrinks : event counts of the solve (0 when not recorded)."""

    n: int
    n_features: int
    kernel: Mapping[str, Any]
    iterations: int
    seconds: float
    status: str
    converged: bool
    max_violation: float
    duality_gap: float
    dual_objective: float
    n_support: int
    n_bounded: int
    curvature_fixes: int
    shrinks: int

    @classmethod
    def of(cls, problem: Any, result: Any) -> RunFacts:
        """The facts of a (problem, result) pair."""
        c = result.certificate
        return cls(
            n=int(problem.n), n_features=int(problem.X.shape[1]),
            kernel=problem.kernel.describe(), iterations=int(result.iterations),
            seconds=float(result.seconds), status=result.status.label,
            converged=bool(result.success), max_violation=float(c.max_violation),
            duality_gap=float(c.duality_gap), dual_objective=float(c.dual_objective),
            n_support=int(c.n_support), n_bounded=int(c.n_bounded),
            curvature_fixes=int(result.extra.get("curvature_fixes", 0) or 0),
            shrinks=int(result.extra.get("shrinks", 0) or 0))


@dataclass(frozen=True, eq=False)
class FitView:
    """What the table reads of a fit: its attachments (the validation scores) and the
    :class:`RunFacts` of its runs (one run, or every pair of a one-vs-one fit)."""

    attachments: Mapping[str, Any]
    runs: tuple[RunFacts, ...]

    @classmethod
    def of_records(cls, attachments: Mapping[str, Any], records: Any) -> FitView:
        """The view of stored or fresh :class:`~solver.run.RunRecord` s."""
        return cls(attachments, tuple(RunFacts.of(r.problem, r.result) for r in records))


@dataclass(frozen=True, eq=False)
class FitOutput:
    """One fit (not yet stored): its view (scores and run facts) and its runs serialised
    on the worker (:func:`solver.store.store.encode_run`; the worker spends the encoding
    time, in parallel) for the client to check and write.  A single-run task gives one
    encoded run; a task with a parent record (one-vs-one) gives every member's, with
    ``roles`` ``(role, key)`` in the same order, the parent's ``info`` and ``data``, and
    the client stores the members and a parent per fit."""

    key: str
    cell: Cell
    view: FitView
    encoded: tuple[Any, ...]
    roles: tuple[tuple[str, Any], ...] = ()
    info: Mapping[str, Any] | None = None
    data: Mapping[str, Any] = field(default_factory=dict)


def fit_key(base: Mapping[str, Any], cell: Cell, fold: int, warm: bool) -> str:
    """SHA-256 naming one fit: the study's data, folds and options plus cell, fold and
    start mode.  The same inputs give the same key, so a re-run finds fits already
    stored."""
    doc = {**base, "cell": cell.to_dict(), "fold": int(fold), "start": "warm" if warm
           else "cold"}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def _kernel(options: Mapping[str, Any], cell: Cell):
    from ..training import _make_kernel

    return _make_kernel(options["kernel"], cell.gamma, cell.degree or 3,
                        float(options.get("offset", 0.0)))


def fit_chain(data: StudyData, job: FitJob) -> list[FitOutput]:
    """Fit every cell of ``job`` on the rows outside ``job.fold`` and score the rows in
    it.  Pure: the records are returned, not stored."""
    from ..smo import repair_start
    from ..store.store import encode_run
    from ..tasks import get_task
    from ..training import _solve

    task = get_task(job.task)
    opts = job.options
    val, val_rows, parts, info, fit_data, classes = _fold_prep(data, job, task)
    out: list[FitOutput] = []
    prev: list[Any] = [None] * len(parts)
    for cell, key in zip(job.cells, job.keys, strict=True):
        runs, models, warm = [], [], False
        for i, (m, std, Z, facts) in enumerate(parts):
            problem = task.cell_problem(Z, m, kernel=_kernel(opts, cell), cell=cell)
            start = None
            if job.warm and prev[i] is not None:
                p_prob, p_res = prev[i]
                # α scaled into the new box (bounds are C times fixed weights), then feasible
                start = repair_start(problem, p_res.alpha * (cell.C / p_prob.info["C"]))
                warm = True
            result = _solve_from(problem, opts, start, _solve)
            models.append(model_from_solution(problem, result, std))
            runs.append((m, problem, result, std, facts))
            prev[i] = (problem, result)
        pred = task.predict(models, val.X, info)
        scores = task.study_scores(pred, val.labels, classes, cell)
        vals = np.abs(np.asarray(pred.values, dtype=np.float64).reshape(val_rows.size, -1))
        small = (vals.min(axis=1) < SMALL_VALUE if vals.size and task.decides_by_sign
                 else np.zeros(0, bool))
        scores.update(source="validation fold", fold=int(job.fold),
                      n_small_values=int(np.sum(small)), small_value_threshold=SMALL_VALUE)
        att = {
            "command": job.command,
            "holdout": scores,
            "study_fit": {"key": key, "cell": cell.to_dict(), "fold": int(job.fold),
                          "start": "warm" if warm else "cold",
                          "validation_rows": int(val_rows.size)},
        }
        if not task.parent_record:
            m, problem, result, std, facts = runs[0]
            rec = RunRecord(problem=problem, result=result,
                            data={**facts, "study_fit_key": key}, standardiser=std,
                            attachments=att)
            out.append(FitOutput(key=key, cell=cell,
                                 view=FitView.of_records(att, [rec]),
                                 encoded=(encode_run(rec),)))
            continue
        recs = [RunRecord(problem=problem, result=result, data=dict(facts), standardiser=std,
                          attachments={"command": job.command})
                for m, problem, result, std, facts in runs]
        out.append(FitOutput(key=key, cell=cell,
                             view=FitView.of_records(att, recs),
                             encoded=tuple(encode_run(r) for r in recs),
                             roles=tuple((m.role, m.key) for m, *_ in runs), info=info,
                             data={**fit_data, "study_fit_key": key}))
    return out


#: per-fold preparations kept by :func:`_fold_prep` (the cells of one fold share them)
_PREP_KEEP = 2
_prep: dict[tuple[Any, ...], tuple[Any, tuple[Any, ...]]] = {}


def _fold_prep(data: StudyData, job: FitJob, task: Any) -> tuple[Any, ...]:
    """What every cell of a fold shares: (validation rows as a dataset, their indices,
    per member its spec, standardiser, standardised rows and data facts, the parent's
    info, the fit's data facts, the class order).  The last :data:`_PREP_KEEP` are kept
    in this process (a worker fits many cells of a fold one after the other), keyed by
    the data object itself (held weakly: its entries go with it), the fold, the task and
    the options used."""
    import weakref

    from ..tasks._labels import class_order
    from ..training import _fingerprint, _subset

    stdise = bool(job.options.get("standardise", True))
    key = (id(data), int(job.fold), job.task, stdise,
           tuple(sorted((k, repr(v)) for k, v in job.extra_data.items())))
    hit = _prep.get(key)
    if hit is not None and hit[0]() is data:
        return hit[1]
    ds = data.dataset
    train_rows = np.flatnonzero(data.folds != job.fold)
    val_rows = np.flatnonzero(data.folds == job.fold)
    sub = _subset(ds, train_rows)
    members = task.members(_column(sub), options={"label_name": ds.label_name})
    parts = []  # per member: its spec, standardiser, standardised rows, data facts
    for m in members:
        mds = _subset(sub, m.rows)
        std = Standardiser.fit(mds.X) if stdise else Standardiser.identity(mds.X.shape[1])
        parts.append((m, std, std.transform(mds.X), {
            "fingerprint": _fingerprint(mds), "feature_names": list(ds.feature_names),
            "label_name": ds.label_name, "source": ds.source, "warnings": list(mds.warnings),
            "n_rows": int(mds.X.shape[0]), **job.extra_data}))
    info = task.describe(members, sub.labels, None) if task.parent_record else None
    fit_data = {"fingerprint": _fingerprint(sub), "feature_names": list(ds.feature_names),
                "label_name": ds.label_name, "source": ds.source, "warnings": [],
                "n_rows": int(sub.X.shape[0]), **job.extra_data}
    classes = class_order(ds.labels) if task.class_labels else ()
    prep = (_subset(ds, val_rows), val_rows, tuple(parts), info, fit_data, classes)
    while len(_prep) >= _PREP_KEEP:
        _prep.pop(next(iter(_prep)))
    # dropped with the data object, so a finished study leaves nothing behind
    _prep[key] = (weakref.ref(data, lambda _: _prep.pop(key, None)), prep)
    return prep


def _column(ds: Dataset) -> np.ndarray:
    """The split-off column a task's members are built from (classes, numeric targets or
    known-outlier flags); a dataset without one gives (n,) Nones."""
    if ds.labels is not None:
        return ds.labels
    return np.full(ds.X.shape[0], None, dtype=object)


def _solve_from(problem: Any, opts: Mapping[str, Any], start: np.ndarray | None,
                solve: Any) -> Any:
    if start is None:
        return solve("smo", problem, kkt_tol=float(opts["kkt_tol"]),
                     iteration_limit=opts.get("iteration_limit"), trace=opts["trace"],
                     progress=None)
    from ..smo import solve_smo

    kw: dict[str, Any] = {"kkt_tol": float(opts["kkt_tol"]), "trace": opts["trace"],
                          "alpha0": start}
    if opts.get("iteration_limit") is not None:
        kw["iteration_limit"] = opts["iteration_limit"]
    return solve_smo(problem, **kw)
