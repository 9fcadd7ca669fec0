"""Diagnose a stored run, re-solve it with one change (what-if), or resume a stopped run.

``diagnose(run)`` loads the run (digests checked; JSON, Parquet and npz without pickle —
nothing stored is ever executed) and returns :func:`solver.diagnosis.diagnose`'s findings.
``what_if(run, change)`` re-solves the same data with one change and puts both runs side by
side; ``resume(run)`` continues a run stopped by its iteration or time limit (or by a
callback) from its stored final α as a child run.  Nothing here prints.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ._workflow import open_store
from .errors import ConvergenceWarning, InvalidInputError
from .kernels import PrecomputedKernel
from .model import Standardiser
from .problem import DualProblem
from .run import RunRecord
from .status import Status

__all__ = ["diagnose", "what_if", "resume", "overlay", "WhatIf", "ResumeOutcome", "CHANGES",
           "RESUMABLE", "parse_change", "OVERLAY_FORMATS"]

#: figure file formats of :func:`overlay` (by file suffix)
OVERLAY_FORMATS = ("png", "svg", "pdf")

#: what-if changes: name → value kind ("" for none)
CHANGES = {"standardise": "", "gamma": "number", "C": "number", "selection": "choice",
           "working_set": "choice", "shrinking": "on/off", "kkt_tol": "number"}
#: changes of how the same problem is solved (the others change the problem)
_SOLVER_CHANGES = ("selection", "working_set", "shrinking", "kkt_tol")
#: statuses a run can be resumed from
RESUMABLE = (Status.ITERATION_LIMIT, Status.TIME_LIMIT, Status.STOPPED_BY_CALLBACK)
#: stored SMO options carried over to a re-solve (the rest are recording or machine details)
_CARRIED = ("kkt_tol", "iteration_limit", "time_limit", "selection", "shrinking", "trace",
            "sample_every", "kernel_dtype", "stall_window", "working_set")


def _load(run: str | RunRecord, store: Any) -> RunRecord:
    if isinstance(run, RunRecord):
        return run
    if not isinstance(run, str) or not run:
        raise InvalidInputError(f"a run id must be a non-empty string, got {run!r}")
    return open_store(store).load(run)


def diagnose(run: str | RunRecord, *, store: Any = None) -> Any:
    """The :class:`~solver.diagnosis.Diagnosis` of a stored run (or of a record)."""
    from .diagnosis import diagnose as _diagnose

    return _diagnose(_load(run, store))


def parse_change(text: str) -> tuple[str, Any]:
    """``"standardise"``, ``"gamma=0.1"``, ``"C=10"``, ``"selection=first_order"``,
    ``"shrinking=off"`` or ``"kkt_tol=1e-5"`` → (name, value); InvalidInputError otherwise."""
    from .smo import SELECTIONS, WORKING_SETS

    name, _, raw = str(text).partition("=")
    name, raw = name.strip(), raw.strip()
    kind = CHANGES.get(name)
    if kind is None:
        raise InvalidInputError(f"unknown change {text!r}; use one of: standardise, gamma=V, "
                                "C=V, selection=first_order|second_order, "
                                "working_set=pair|block, shrinking=on|off, kkt_tol=V")
    if kind == "":
        if raw:
            raise InvalidInputError(f"change {name!r} takes no value, got {text!r}")
        return name, True
    if kind == "number":
        try:
            v = float(raw)
        except ValueError:
            v = math.nan
        if not (math.isfinite(v) and v > 0):
            raise InvalidInputError(f"change {name} needs a finite number > 0, got {raw!r}")
        return name, v
    if kind == "choice":
        allowed = SELECTIONS if name == "selection" else WORKING_SETS
        if raw not in allowed:
            raise InvalidInputError(f"change {name} must be one of {', '.join(allowed)}, "
                                    f"got {raw!r}")
        return name, raw
    if raw not in ("on", "off"):
        raise InvalidInputError(f"change shrinking must be on or off, got {raw!r}")
    return name, raw == "on"


def _options(record: RunRecord, **override: Any) -> dict[str, Any]:
    if record.result.solver != "smo":
        raise InvalidInputError(f"run {record.run_id} was solved by {record.result.solver!r}; "
                                "only SMO runs can be re-solved here")
    stored = record.result.options
    opts = {k: stored[k] for k in _CARRIED if stored.get(k) is not None}
    opts.update({k: v for k, v in override.items() if v is not None})
    return opts


def _changed_problem(record: RunRecord, name: str, value: Any) -> tuple[DualProblem, Any]:
    """The problem (and standardiser) with one problem-level change applied."""
    prob, std = record.problem, record.standardiser
    kern = prob.kernel
    if name == "C":
        C = prob.info.get("C")
        if C is None:
            raise InvalidInputError(f"run {record.run_id} has no C to change")
        info = {**prob.info, "C": float(value)}
        return replace(prob, upper=prob.lower + (prob.upper - prob.lower) * (value / C),
                       info=info), std
    if isinstance(kern, PrecomputedKernel):
        raise InvalidInputError(f"run {record.run_id} uses a precomputed kernel: it has no "
                                f"features or gamma to change ({name})")
    if name == "gamma":
        if not hasattr(kern, "gamma"):
            raise InvalidInputError(f"the {kern.name} kernel has no gamma")
        return replace(prob, kernel=replace(kern, gamma=float(value), gamma_source="given")), std
    # standardise
    if not (np.all(std.centre == 0) and np.all(std.scale == 1)):
        raise InvalidInputError(f"run {record.run_id} was already trained on standardised "
                                "features")
    new_std = Standardiser.fit(prob.X)
    X = new_std.transform(prob.X)
    if getattr(kern, "gamma_source", None) == "median_heuristic":
        kern = replace(kern, gamma=None, gamma_source="given").with_defaults(X)
    return replace(prob, X=X, kernel=kern), new_std


@dataclass(frozen=True, eq=False)
class WhatIf:
    """Two runs side by side: the stored one (``base``) and the re-solve with ``change``.

    base, changed : plain figures per run (iterations, seconds, status, max violation,
    relative gap, dual objective, support vectors).  same_problem : the change keeps the
    problem (selection, shrinking, kkt_tol), so ``comparison`` holds the agreement verdict;
    otherwise ``comparison`` is None and only the figures are compared.  record : the
    re-solve as a :class:`~solver.run.RunRecord` (parent: the base run); run_id : its id
    when saved.
    """

    change: str
    base: Mapping[str, Any]
    changed: Mapping[str, Any]
    same_problem: bool
    comparison: Any | None
    record: RunRecord
    run_id: str | None = None

    def to_dict(self) -> dict[str, Any]:
        comp = None
        if self.comparison is not None:
            comp = {"verdict": self.comparison.verdict, "text": self.comparison.verdict_text}
        return {"change": self.change, "base": dict(self.base), "changed": dict(self.changed),
                "same_problem": self.same_problem, "comparison": comp, "run_id": self.run_id}


def _figures(record: RunRecord, seconds: float | None = None) -> dict[str, Any]:
    r, c = record.result, record.result.certificate
    return {"run_id": record.run_id, "iterations": int(r.iterations),
            "seconds": float(r.seconds if seconds is None else seconds),
            "status": r.status.label, "max_violation": float(c.max_violation),
            "kkt_tol": float(c.kkt_tol), "relative_gap": float(c.relative_gap),
            "dual_objective": float(c.dual_objective), "n_support": int(c.n_support),
            "options": {k: r.options.get(k) for k in _SOLVER_CHANGES},
            "kernel": record.problem.kernel.describe(), "C": record.problem.info.get("C")}


def _solve(problem: DualProblem, **opts: Any):
    from .smo import solve_smo

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        t0 = time.perf_counter()
        res = solve_smo(problem, **opts)
    return res, time.perf_counter() - t0


def what_if(run: str | RunRecord, change: str, *, store: Any = None, save: bool = False,
            rerun_base: bool = False) -> WhatIf:
    """Re-solve ``run``'s data with one ``change`` (see :func:`parse_change`) and compare.

    ``rerun_base`` also re-solves the stored run unchanged, so both times are measured in
    this process (the stored seconds came from another time and load).  ``save`` stores the
    re-solve as a child run of ``run``.
    """
    from .agreement import compare_results

    base = _load(run, store)
    name, value = parse_change(change)
    prob, std = base.problem, base.standardiser
    over: dict[str, Any] = {}
    if name in _SOLVER_CHANGES:
        over[name] = value
    else:
        prob, std = _changed_problem(base, name, value)
    res, _ = _solve(prob, **_options(base, **over))
    rec = RunRecord(problem=prob, result=res, data=dict(base.data), standardiser=std,
                    parent_id=base.run_id,
                    attachments={"what_if": {"change": change, "base_run": base.run_id}})
    base_fig = _figures(base)
    if rerun_base:
        res0, _ = _solve(base.problem, **_options(base))
        base_fig.update(iterations=int(res0.iterations), seconds=float(res0.seconds),
                        status=res0.status.label, seconds_source="re-solved in this process")
    same = name in _SOLVER_CHANGES
    comp = compare_results(base.problem, base.result, prob, res, data_a=base.data,
                           data_b=rec.data, run_ids=(base.run_id, None)) if same else None
    run_id = open_store(store).save(rec) if save and base.run_id is not None else None
    return WhatIf(change, base_fig, {**_figures(rec), "run_id": run_id}, same, comp, rec,
                  run_id)


@dataclass(frozen=True, eq=False)
class ResumeOutcome:
    """A resumed run: ``run_id`` (the child, saved) continues ``parent_id`` from its α.

    iterations : (parent's, child's); status : (parent's, child's); record : the child.
    """

    run_id: str | None
    parent_id: str | None
    iterations: tuple[int, int]
    status: tuple[str, str]
    record: RunRecord

    @property
    def converged(self) -> bool:
        return self.record.result.status == Status.CONVERGED

    def to_dict(self) -> dict[str, Any]:
        c = self.record.result.certificate
        return {"run_id": self.run_id, "parent_id": self.parent_id,
                "iterations": {"parent": self.iterations[0], "resumed": self.iterations[1],
                               "total": sum(self.iterations)},
                "status": {"parent": self.status[0], "resumed": self.status[1]},
                "converged": self.converged, "max_violation": c.max_violation,
                "kkt_tol": c.kkt_tol, "relative_gap": c.relative_gap,
                "seconds": self.record.result.seconds}


def resume(run: str | RunRecord, *, iteration_limit: int | None = None,
           time_limit: float | None = None, store: Any = None, save: bool = True
           ) -> ResumeOutcome:
    """Continue a run that stopped at its iteration or time limit (or on a callback).

    The child is warm-started from the parent's final α (the shrinking state and kernel
    cache are not kept: the gradient is rebuilt from α); every other solver option is the
    parent's, except ``iteration_limit`` / ``time_limit`` when given (default: the parent's
    budget again).  With ``save`` (default) the child is stored with the parent as its
    parent run.  A converged run, or one of another solver, is refused.
    """
    from .smo import repair_start

    parent = _load(run, store)
    st = parent.result.status
    if st not in RESUMABLE:
        raise InvalidInputError(
            f"run {parent.run_id} has status {st.label}: only runs stopped by their iteration "
            "limit, time limit or a callback can be resumed")
    opts = _options(parent, iteration_limit=iteration_limit, time_limit=time_limit)
    alpha0 = repair_start(parent.problem, np.asarray(parent.result.alpha))
    res, _ = _solve(parent.problem, alpha0=alpha0, **opts)
    att: dict[str, Any] = {"resumed_from": {
        "run_id": parent.run_id, "iterations": int(parent.result.iterations),
        "status": st.label, "max_violation": float(parent.result.certificate.max_violation)}}
    for key in ("audit",):
        if parent.attachments and key in parent.attachments:
            att[key] = parent.attachments[key]
    child = RunRecord(problem=parent.problem, result=res, data=dict(parent.data),
                      standardiser=parent.standardiser, parent_id=parent.run_id,
                      attachments=att)
    run_id = open_store(store).save(child) if save and parent.run_id is not None else None
    return ResumeOutcome(run_id, parent.run_id, (int(parent.result.iterations),
                                                 int(res.iterations)),
                         (st.label, res.status.label), child)


def overlay(runs: list[str | RunRecord], *, out: str | Path | None = None, store: Any = None,
            allow_mismatch: bool = False) -> dict[str, Any]:
    """Convergence of two or more runs of one problem overlaid (violation and objective gap
    against iterations and estimated seconds; see :mod:`solver.diagnosis.overlay`).

    Returns the plot data; with ``out`` (a ``.png``, ``.svg`` or ``.pdf`` path outside the
    store's run folders) the figure is written there and ``"figure"`` holds the path.
    """
    from .diagnosis.overlay import overlay_series

    recs = [_load(r, store) for r in runs]
    data = overlay_series(recs, allow_mismatch=allow_mismatch)
    if out is not None:
        path = Path(out)
        fmt = path.suffix.lower().lstrip(".")
        if fmt not in OVERLAY_FORMATS:
            raise InvalidInputError(f"{path}: the figure file must end in "
                                    f"{', '.join('.' + f for f in OVERLAY_FORMATS)}")
        path = open_store(store).check_output_path(path, what="--out")
        if not data["runs"]:
            raise InvalidInputError("none of the runs has trace rows to plot")
        from .reporting.content import FigureData
        from .reporting.figures import render_figure, style

        fd = FigureData(key="overlay", kind="overlay", title="convergence side by side",
                        caption=data["seconds_note"], data=data)
        fig = render_figure(fd)
        with style():
            fig.savefig(path, format=fmt, metadata={"Date": None} if fmt == "svg" else None)
        data["figure"] = str(path)
    return data
