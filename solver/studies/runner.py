"""``study()``: a grid × stratified seeded k-fold cross-validation, every fit a stored
run, the study a parent record (``task = "study"``) with the results table.

Flow: data → folds → fit jobs (cells × folds) → Dask workers (:mod:`.execute`) → records
back to this process → store (one run per fit, as each arrives) → table, best cell and
one-standard-error choice → parent record.  A re-run with the same data, folds and options
finds the fits already stored (by their key, after verifying them) and fits only the rest.

Trace level: ``sampled`` by default — a study is hundreds of fits; every 100th iteration
plus every iteration with an event keeps each run's convergence shape and all its events
at a small fraction of a full trace's size (``full`` and ``off`` may be asked for).
"""

from __future__ import annotations

import hashlib
import math
import os
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..result import TRACE_LEVELS
from ..run import Member
from .execute import CONNECT_TIMEOUT_S, RETRIES, StudySession, connect
from .fits import FitJob, FitView, StudyData, fit_chain, fit_key
from .grid import Grid, make_grid
from .records import (
    compare_warm_cold,
    load_fit,
    save_fit,
    save_variant,
    stored_fits,
    study_command,
    study_record,
)
from .table import aggregate, choose, fit_row, write_parquet

__all__ = ["study", "StudyOutcome", "SCHEDULER_ENV", "study_folds"]

#: environment variable naming a Dask scheduler address (used when ``scheduler`` is None)
SCHEDULER_ENV = "KKTRACE_SCHEDULER"

#: progress callback: (cells done, total, failures, elapsed s, estimated s left or None)
StudyProgress = Callable[[int, int, int, float, float | None], None]


@dataclass(frozen=True, eq=False)
class StudyOutcome:
    """Result of :func:`study`.

    study_id : the stored parent record.  grid : the :class:`Grid`.
    rows : one plain-data row per fit (cell × fold); cells : per-cell aggregates;
    choice : best cell and the one-standard-error cell (with the rule, named).
    reused : fits found already stored and verified (not refitted).
    fitted : fits made by this call.  execution : where the fits ran.
    not_converged : rows of fits that did not converge.  table_path : Parquet file or None.
    stability : with ``stability=True``, the stability evidence of the chosen cell.
    warm_check : with warm starts, the iterations of warm fits against the same cells
        started cold (fold 0) and whether their certificates agree; else None.
    """

    study_id: str
    grid: Grid
    rows: tuple[dict[str, Any], ...]
    cells: tuple[dict[str, Any], ...]
    choice: dict[str, Any]
    reused: int
    fitted: int
    execution: dict[str, Any]
    store: Path
    table_path: Path | None = None
    warnings: tuple[str, ...] = field(default=())
    warm_check: dict[str, Any] | None = None
    stability: dict[str, Any] | None = None

    @property
    def not_converged(self) -> list[dict[str, Any]]:
        """Rows of the fits that did not converge."""
        return [r for r in self.rows if not r["converged"]]

    def summary(self) -> dict[str, Any]:
        """Plain data for ``--json``."""
        return {
            "study_id": self.study_id, "grid": self.grid.to_dict(), "choice": self.choice,
            "cells": list(self.cells), "fits": len(self.rows), "reused": self.reused,
            "fitted": self.fitted, "execution": self.execution,
            "not_converged": [{k: r[k] for k in ("cell", "fold", "run_id", "status")}
                              for r in self.not_converged],
            "store": str(self.store),
            "table": None if self.table_path is None else str(self.table_path),
            "warnings": list(self.warnings),
            "warm_start_check": self.warm_check,
            "stability": self.stability,
            "caution": CAUTION,
        }


CAUTION = ("kktrace gives evidence about the optimisation and the cross-validated scores of "
           "these fits; it is not a validation sign-off of a model")


def study_folds(labels: np.ndarray, k: int, seed: int, *,
                stratified: bool = True) -> np.ndarray:
    """Seeded fold numbers (n,) for a study.  ``stratified`` (labels are classes): every
    class spread over the folds, a class with fewer rows than ``k`` refused, naming the
    class.  Otherwise (regression targets, one-class rows) plain seeded k-fold: the rows
    in a seeded random order dealt out to folds 0 … k−1 in turn."""
    from ..calibration import stratified_folds

    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 2:
        raise InvalidInputError(f"--folds must be an integer >= 2, got {k!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InvalidInputError(f"--seed must be a non-negative integer, got {seed!r}")
    n = int(np.asarray(labels, dtype=object).shape[0])
    if not stratified:
        if n < 2 * k:
            raise InvalidInputError(f"{n} rows are too few for {k} folds: every fold needs "
                                    "at least 2 rows; use fewer folds or more data")
        order = np.random.default_rng(int(seed)).permutation(n)
        fold = np.empty(n, dtype=np.int64)
        fold[order] = np.arange(n) % int(k)
        return fold
    text = np.array([str(v) for v in np.asarray(labels, dtype=object).tolist()])
    names, counts = np.unique(text, return_counts=True)
    for name, cnt in zip(names.tolist(), counts.tolist(), strict=True):
        if cnt < k:
            raise InvalidInputError(
                f"class {name!r} has {cnt} rows, fewer than the {k} folds: some fold would "
                f"have no row of it; use at most {cnt} folds or more data")
    return stratified_folds(text, int(k), int(seed))


def _where(scheduler: str | None) -> str:
    if scheduler is None:
        scheduler = os.environ.get(SCHEDULER_ENV) or "local"
    if not isinstance(scheduler, str) or not scheduler.strip():
        raise InvalidInputError(f"scheduler must be 'local', 'sequential' or an address, "
                                f"got {scheduler!r}")
    return scheduler.strip()


#: grid axes a task may have beyond γ and degree, with the default used when not given
#: (the defaults of ``kktrace train``)
_AXIS_DEFAULTS = {"C": (0.1, 1.0, 10.0), "epsilon": (0.1,), "nu": (0.5,)}


def _load(data: Any, task: str, label: str | None, target: str | None,
          outlier_column: str | None, columns: Any) -> tuple[Any, Any]:
    """(dataset whose ``labels`` are the column the task's members are built from, task
    object): class labels, numeric targets, or known-outlier flags / None."""
    from dataclasses import replace

    from .._workflow import _load_data
    from ..tasks import classification_task
    from ..tasks._labels import class_order
    from ..training_kinds import KIND_TASKS, _load_training, known_outliers

    if task == "classification":
        if target is not None or outlier_column is not None:
            raise InvalidInputError("--target belongs to --task regression and "
                                    "--outlier-column to --task one-class")
        if isinstance(data, (str, Path)) and label is None:
            raise InvalidInputError("name the label column of the data file (--label COLUMN)")
        ds = _load_data(data, label, "study data", columns)
        if ds.labels is None:
            raise InvalidInputError("study data have no label column")
        return ds, classification_task(len(class_order(ds.labels)))
    if task not in KIND_TASKS:
        raise InvalidInputError(f"unknown task {task!r}; choose one of classification, "
                                f"{', '.join(KIND_TASKS)}")
    from ..tasks import get_task

    ds, t = _load_training(data, task, target, label, outlier_column, columns)
    if t is not None:
        ds = replace(ds, labels=t)
    elif ds.labels is not None:
        ds = replace(ds, labels=known_outliers(ds))
    return ds, get_task(task)


def _make_axes(task: Any, C: Any, epsilon: Any, nu: Any) -> dict[str, Any]:
    """The task's grid axes beyond γ and degree (``task.study_axes``), defaults filled in;
    an axis the task does not have is refused when given."""
    given = {"C": C, "epsilon": epsilon, "nu": nu}
    out: dict[str, Any] = {}
    for name, values in given.items():
        if name in task.study_axes:
            out[name] = _AXIS_DEFAULTS[name] if values is None else values
        elif values is not None:
            raise InvalidInputError(f"the {task.name} task has no {name} axis; drop "
                                    f"--{name}")
        else:
            out[name] = None
    return out


def _kept_warnings(fn: Callable[..., StudyOutcome]) -> Callable[..., StudyOutcome]:
    """Run ``fn`` with data, solver and store warnings kept out of the warnings machinery
    and recorded in ``outcome.warnings`` (as :func:`solver.train` does); others pass on."""
    import functools

    @functools.wraps(fn)
    def run(*args: Any, **kwargs: Any) -> StudyOutcome:
        import warnings
        from dataclasses import replace

        from ..errors import ConvergenceWarning, DataWarning, StoreWarning

        kinds = (ConvergenceWarning, DataWarning, StoreWarning)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            out = fn(*args, **kwargs)
        notes = list(out.warnings)
        for w in caught:
            if issubclass(w.category, kinds):
                if str(w.message) not in notes and f"data: {w.message}" not in notes:
                    notes.append(str(w.message))
            else:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        return replace(out, warnings=tuple(notes))

    return run


@_kept_warnings
def study(
    data: Any, *, label: str | None = None, task: str = "classification",
    target: str | None = None, outlier_column: str | None = None, kernel: str = "rbf",
    C: Sequence[float] | str | None = None, gamma: Sequence[float] | str | None = None,
    degree: Sequence[int] | str | None = None,
    epsilon: Sequence[float] | str | None = None, nu: Sequence[float] | str | None = None,
    offset: float = 0.0, folds: int = 5,
    seed: int = 0, kkt_tol: float = 1e-3, iteration_limit: int | None = None,
    trace: str = "sampled", standardise: bool = True, warm_start: bool = False,
    stability: bool = False, scheduler: str | None = None, workers: int | None = None,
    connect_timeout: float = CONNECT_TIMEOUT_S, store: Any = None,
    table: str | Path | None = None, progress: StudyProgress | None = None,
    feature_columns: Sequence[str] | None = None, ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
) -> StudyOutcome:
    """Cross-validate a grid of C × γ (× degree, × ε) or ν × γ and store every fit and
    the study.

    Data and solver warnings are kept out of the warnings machinery and recorded in
    ``outcome.warnings``, as :func:`solver.train` does.

    Parameters
    ----------
    data, label : a :class:`~solver.data.Dataset` or a data file and its label column
        (two classes, or three or more: each fit then one-vs-one, a parent over its pairs).
    task : ``"classification"`` (default; ``label``), ``"regression"`` (``target``, an
        ε axis) or ``"one-class"`` (features alone, a ν axis instead of C; optional
        ``outlier_column`` of known outliers, never used for fitting).
    kernel, C, gamma, degree, epsilon, nu, offset : the kernel and the grid axes (each
        non-empty, every value > 0, ν ≤ 1; ``gamma`` for rbf/poly/sigmoid, ``degree`` for
        poly, default 3; C default 0.1, 1, 10; ε default 0.1; ν default 0.5).
    folds, seed : seeded k-fold assignment, stratified by class for classification, plain
        for regression and one-class (the fold of every row is stored).
    kkt_tol, iteration_limit, trace, standardise : as for :func:`solver.train`; the
        trace level defaults to ``sampled`` (see :mod:`solver.studies.runner`).
    warm_start : within a fold, γ, degree and ε, start each C from the previous C's α
        scaled into the new box (:mod:`solver.studies.fits`; every pair of a one-vs-one
        fit from its own previous α).  Tasks without C (one-class) refuse it.
    stability : also refit the chosen cell under row-order permutations, bootstrap
        resamples and feature noise (:mod:`solver.studies.stability`), on the same Dask
        workers as the grid.
    scheduler : ``"local"`` (a LocalCluster, default), ``"sequential"`` (this process) or a
        Dask scheduler address; None reads ``$KKTRACE_SCHEDULER``, else ``"local"``.
    workers : worker processes of the LocalCluster (default: one per core).
    connect_timeout : seconds to wait for a scheduler address (default 10).
    store : store directory or RunStore.  table : also write the results table here
        (Parquet); it is stored with the study either way.
    progress : ``progress(done, total, failures, elapsed_s, left_s)`` after every fit.
    feature_columns, ignore_columns, delimiter : the data file's columns, as for
        :func:`solver.train`.

    Returns a :class:`StudyOutcome`.  A fit that does not converge is stored with its
    status, counted in the table and listed (``outcome.not_converged``).
    """
    from .._workflow import Columns, _fingerprint, open_store
    from ..training import _subset, _warm_up

    if trace not in TRACE_LEVELS:
        raise InvalidInputError(f"unknown trace level {trace!r}; choose one of "
                                f"{', '.join(TRACE_LEVELS)}")
    if not (isinstance(kkt_tol, (int, float)) and math.isfinite(kkt_tol) and kkt_tol > 0):
        raise InvalidInputError(f"kkt_tol must be a finite number > 0, got {kkt_tol!r}")
    where = _where(scheduler)
    if task not in ("classification", "regression", "one-class"):
        raise InvalidInputError(f"unknown task {task!r}; choose one of classification, "
                                "regression, one-class")
    ds, fit_task = _load(data, task, label, target, outlier_column,
                         Columns.of(feature_columns, ignore_columns, delimiter))
    axes = _make_axes(fit_task, C, epsilon, nu)
    grid = make_grid(kernel, axes["C"], gamma, degree, epsilon=axes["epsilon"], nu=axes["nu"])
    if warm_start and grid.C == (None,):
        raise InvalidInputError(f"warm starts walk the C axis; the {fit_task.name} task has "
                                "none: drop --warm-start")
    score_name, higher = fit_task.study_score
    fold_of = study_folds(ds.labels if ds.labels is not None else np.zeros(ds.X.shape[0]),
                          folds, seed, stratified=fit_task.class_labels)
    run_store = open_store(store)
    out_table = None
    if table is not None:
        out_table = run_store.check_output_path(table, "--table")
    opts = {"kernel": grid.kernel, "offset": float(offset), "kkt_tol": float(kkt_tol),
            "iteration_limit": iteration_limit, "trace": trace,
            "standardise": bool(standardise)}
    fold_digest = hashlib.sha256(np.ascontiguousarray(fold_of, dtype="<i8").tobytes()).hexdigest()
    base = {"data": _fingerprint(ds), "folds": fold_digest, "task": fit_task.name, **opts}
    listed = lambda axis: None if axis == (None,) else list(axis)  # noqa: E731
    command = study_command(data, label, {
        "task": None if task == "classification" else task, "target": target,
        "outlier_column": outlier_column, "kernel": grid.kernel, "C": listed(grid.C),
        "gamma": listed(grid.gamma), "degree": listed(grid.degree),
        "epsilon": listed(grid.epsilon), "nu": listed(grid.nu),
        "folds": int(folds), "seed": int(seed), "kkt_tol": kkt_tol,
        "iteration_limit": iteration_limit, "trace": trace, "warm_start": bool(warm_start),
        "no_standardise": not standardise, "features": feature_columns,
        "ignore": ignore_columns, "delimiter": delimiter})
    jobs: list[FitJob] = []
    chains: dict[tuple[int, Any, Any, Any], list[Any]] = {}
    for cell in grid.cells():
        for k in range(int(folds)):
            chains.setdefault((k, cell.gamma, cell.degree, cell.epsilon), []).append(cell)
    for (k, *_), cells in chains.items():
        groups = [cells] if warm_start else [[c] for c in cells]
        for g in groups:
            keys = tuple(fit_key(base, c, k, warm_start and i > 0) for i, c in enumerate(g))
            jobs.append(FitJob(task=fit_task.name, fold=k, cells=tuple(g), keys=keys,
                               warm=bool(warm_start), options=opts, command=command,
                               extra_data={"study_fold": k}))
    # warm starts: the same cells started cold on a sample (the first fold of every chain)
    checks: list[FitJob] = []
    if warm_start:
        for (k, *_), cells in chains.items():
            if k != 0:
                continue
            for c in cells[1:]:
                checks.append(FitJob(task=fit_task.name, fold=k, cells=(c,),
                                     keys=(fit_key(base, c, k, False),), warm=False,
                                     options=opts, command=command,
                                     extra_data={"study_fold": k}))
    train_fps = [_fingerprint(_subset(ds, np.flatnonzero(fold_of != k)))
                 for k in range(int(folds))]
    known = stored_fits(run_store, train_fps)
    notes: list[str] = [f"data: {w}" for w in ds.warnings]
    stored: dict[str, tuple[str, FitView]] = {}
    for key in {k for j in [*jobs, *checks] for k in j.keys}:
        if key in known:
            try:
                stored[key] = (known[key], load_fit(run_store, known[key]))
            except Exception as exc:  # noqa: BLE001 - a damaged earlier fit is fitted again
                notes.append(f"run {known[key]} was not reused ({exc}); fitted again")
    reused = len(stored)
    todo = [j for j in [*jobs, *checks] if not all(k in stored for k in j.keys)]
    total = len(grid.cells()) * int(folds) + len(checks)
    t0 = time.monotonic()
    state: dict[str, Any] = {"done": reused, "fitted": 0}

    def on_done(_: int, outputs: list[Any]) -> None:
        for o in outputs:
            if o.key in stored:
                continue  # a warm chain refits earlier cells to reach the missing ones
            rid = save_fit(run_store, o, fit_task.name, job_opts=opts)
            stored[o.key] = (rid, o.view)
            state["done"] += 1
            state["fitted"] += 1
        if progress is not None:
            now = time.monotonic()
            el = now - t0
            state.setdefault("first", now)  # the rate is measured after cluster start-up
            rate = ((now - state["first"]) / (state["fitted"] - 1)
                    if state["fitted"] > 1 else None)
            left = None if rate is None else rate * (total - state["done"])
            fails = sum(not all(r.converged for r in v.runs) for _, v in stored.values())
            progress(state["done"], total, fails, el, left)

    connected = None
    if (todo or stability) and where != "sequential":
        connected = connect(where, workers, connect_timeout)  # before anything is written
    # one catalog transaction for the whole study (the folders are written as fits arrive)
    with run_store.deferred_index():
        with StudySession(StudyData(ds, fold_of), where=where, workers=workers,
                          timeout=connect_timeout, warm_up=_warm_up,
                          connected=connected) as session:
            if todo:
                ex = session.run(fit_chain, todo, on_done)
                execution = {**ex.to_dict(), "retries_on_error": RETRIES,
                             "retries_on_worker_death": "Dask scheduler allowed-failures "
                             "(default 3)"}
            else:
                execution = {"mode": "none", "workers": 0, "reason": "every fit was already "
                             "stored and verified", "address": None}
            pairs = []
            for j in jobs:
                for cell, key in zip(j.cells, j.keys, strict=True):
                    rid, rec = stored[key]
                    pairs.append((fit_row(rec, rid, score_name, fit_task.study_measures),
                                  Member(run_id=rid, role="fit",
                                         key=(cell.label, f"fold={j.fold}"))))
            z = lambda v: 0.0 if v is None else v  # noqa: E731
            pairs.sort(key=lambda p: (z(p[0]["gamma"]), z(p[0]["degree"]), z(p[0]["epsilon"]),
                                      z(p[0]["C"]), z(p[0]["nu"]), p[0]["fold"]))
            rows = [p[0] for p in pairs]
            members = [p[1] for p in pairs]
            cells = aggregate(rows)
            choice = choose(cells, score_name, higher)
            warm_check = None
            if checks:
                warm_check, check_members = compare_warm_cold(checks, jobs, stored, opts)
                members += check_members
            stab = None
            if stability:
                stab, stab_members = _stability(session, choice, cells, fit_task.name, opts,
                                                seed, command, run_store)
                members += stab_members
                if session.execution is not None:
                    stab["execution"] = {**session.execution.to_dict(),
                                         "data_scattered": session.scatters}
                if not stab["permutations_same_optimum"]:
                    notes.append(stab["permutation_verdict"])
            session.close_later()  # the cluster stops while the study record is written
        if session.execution is not None and isinstance(execution, dict) and todo:
            execution["data_scattered"] = session.scatters
        for r in rows:
            if not r["converged"]:
                notes.append(f"fit {r['cell']} fold {r['fold']} (run {r['run_id']}) did not "
                             f"converge: {r['status']}")
        parent = study_record(fit_task, grid, ds, fold_of, folds, seed, opts, warm_start,
                              execution, rows, cells, choice, members, command, warm_check,
                              stab)
        sid = run_store.save_parent(parent)
    if out_table is not None:
        write_parquet(rows, cells, out_table)
    session.close()
    return StudyOutcome(study_id=sid, grid=grid, rows=tuple(rows), cells=tuple(cells),
                        choice=choice, reused=reused, fitted=state["fitted"],
                        execution=execution, store=Path(run_store.root),
                        table_path=out_table, warnings=tuple(notes), warm_check=warm_check,
                        stability=stab)


def _stability(session: StudySession, choice: Mapping[str, Any],
               cells: Sequence[Mapping[str, Any]], task: str, opts: Mapping[str, Any],
               seed: int, command: Any, store: Any) -> tuple[dict[str, Any], list[Member]]:
    """Refit the chosen cell's variants on the study's workers (the data scattered for
    the grid), store them, summarise."""
    from .grid import Cell
    from .stability import fit_variant, stability_jobs, summarise

    c = next(x for x in cells if x["cell"] == choice["one_se"])
    cell = Cell(c["C"], c["gamma"], c["degree"], c.get("epsilon"), c.get("nu"))
    jobs = stability_jobs(cell, task, opts, int(seed), command=command)
    results: dict[int, Any] = {}
    session.run(fit_variant, jobs, lambda i, f: results.__setitem__(i, f))
    fits, ids, members = [], [], []
    for i, job in enumerate(jobs):
        f = results[i]
        rid = save_variant(store, f)
        fits.append(f)
        ids.append(rid)
        members.append(Member(run_id=rid, role=f"stability_{job.kind}",
                              key=(cell.label, f"{job.kind}={job.index}")))
    return summarise(fits, ids), members
