"""Reproduce: re-run a stored run from its manifest and the data, and compare α.

The problem is rebuilt from the data file exactly as recorded (standardiser refitted,
kernel with its recorded parameters, C, class weights, positive label), checked
against the stored problem arrays, and solved with the recorded solver and every
recorded option the solver still accepts.  Agreement of α is reported as bitwise or
within a tolerance.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from ..data import Dataset, fingerprint
from ..errors import InvalidInputError
from ..model import Standardiser
from ..problem import DualProblem, binary_classification
from ..result import SolveResult
from ..run import RunRecord
from ..solvers import get_solver

__all__ = ["Reproduction", "reproduce", "DEFAULT_ALPHA_RTOL"]

#: Default α tolerance, relative to the largest upper bound (α is in units of C).
DEFAULT_ALPHA_RTOL = 1e-6
#: Recorded figures that are results, not options (never passed back to a solver).
_NOT_OPTIONS = {"warm_start", "curvature_floor"}


@dataclass(frozen=True, eq=False)
class Reproduction:
    """Outcome of re-running a stored run.

    run_id : the stored run.  agreement : ``"bitwise"``, ``"within_tolerance"`` or
    ``"different"`` for α.  max_abs_difference : max |α_new − α_stored|.  tolerance :
    the absolute α tolerance used.  problem_identical : the rebuilt problem arrays (X,
    y, p, bounds) equal the stored ones bit for bit.  iterations, status : (stored, new).
    options : the options passed to the solver; dropped_options : recorded options the
    solver no longer accepts.  result : the new :class:`SolveResult`; record : a new
    :class:`RunRecord` with ``parent_id`` = the stored run, ready for ``RunStore.save``.
    """

    run_id: str | None
    agreement: str
    max_abs_difference: float
    tolerance: float
    problem_identical: bool
    iterations: tuple[int, int]
    status: tuple[str, str]
    fingerprint: str
    options: Mapping[str, Any]
    dropped_options: tuple[str, ...]
    result: SolveResult
    record: RunRecord
    notes: list[str] = field(default_factory=list)

    @property
    def bitwise(self) -> bool:
        """α identical bit for bit."""
        return self.agreement == "bitwise"

    @property
    def within_tolerance(self) -> bool:
        """α identical or within :attr:`tolerance`."""
        return self.agreement in ("bitwise", "within_tolerance")

    def summary(self) -> dict[str, Any]:
        """Plain data for reports."""
        return {
            "run_id": self.run_id, "agreement": self.agreement,
            "max_abs_difference": self.max_abs_difference, "tolerance": self.tolerance,
            "problem_identical": self.problem_identical,
            "iterations": list(self.iterations), "status": list(self.status),
            "fingerprint": self.fingerprint, "dropped_options": list(self.dropped_options),
            "notes": list(self.notes),
        }


def _same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    a, b = np.ascontiguousarray(a), np.ascontiguousarray(b)
    return a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == b.tobytes()


def _rebuild_problem(record: RunRecord, dataset: Dataset, notes: list[str]) -> tuple[DualProblem,
                                                                                      Standardiser]:
    stored = record.problem
    if stored.kind in ("epsilon_regression", "one_class"):
        return _rebuild_kind(record, dataset, notes)
    if stored.kind != "binary_classification":
        raise InvalidInputError(
            f"reproduce rebuilds binary classification runs from data; this run is {stored.kind!r}")
    if dataset.labels is None:
        raise InvalidInputError(f"data {dataset.source or '(arrays)'} have no label column")
    std0 = record.standardiser
    identity = bool(np.all(std0.centre == 0.0) and np.all(std0.scale == 1.0))
    std = Standardiser.identity(dataset.n_features) if identity else Standardiser.fit(dataset.X)
    if not (_same_bits(std.centre, std0.centre) and _same_bits(std.scale, std0.scale)):
        notes.append("the refitted standardiser differs from the stored one")
    info = stored.info
    C = float(info["C"])
    labels = info["labels"]
    class_weight = info.get("class_weight")
    cw = None
    if class_weight:
        lookup = {str(v): v for v in np.unique(dataset.labels).tolist()}
        cw = {lookup.get(k, k): float(w) for k, w in class_weight.items()}
    problem = binary_classification(std.transform(dataset.X), dataset.labels, kernel=stored.kernel,
                                    C=C, class_weight=cw, positive_label=labels["positive"])
    if info.get("sample_weight"):
        # per-point weights are not part of the data file: take the bounds they produced
        ratio = stored.upper / problem.upper
        if not np.all(np.isfinite(ratio) & (ratio > 0)):
            raise InvalidInputError("the stored upper bounds do not fit this data's C and weights")
        problem = replace(problem, upper=stored.upper.copy(),
                          info={**problem.info, "sample_weight": True})
        notes.append("sample weights taken from the stored upper bounds")
    return problem, std


def _rebuild_kind(record: RunRecord, dataset: Dataset,
                  notes: list[str]) -> tuple[DualProblem, Standardiser]:
    """ε-regression (target from the split-off column) or one-class problem from data."""
    from ..problem import one_class, regression

    stored = record.problem
    std0 = record.standardiser
    identity = bool(np.all(std0.centre == 0.0) and np.all(std0.scale == 1.0))
    std = Standardiser.identity(dataset.n_features) if identity else Standardiser.fit(dataset.X)
    if not (_same_bits(std.centre, std0.centre) and _same_bits(std.scale, std0.scale)):
        notes.append("the refitted standardiser differs from the stored one")
    Z = std.transform(dataset.X)
    info = stored.info
    if stored.kind == "one_class":
        return one_class(Z, kernel=stored.kernel, nu=float(info["nu"])), std
    if dataset.labels is None:
        raise InvalidInputError(f"data {dataset.source or '(arrays)'} have no target column")
    from ..training_kinds import numeric_column

    problem = regression(Z, numeric_column(dataset, "target"), kernel=stored.kernel,
                         C=float(info["C"]), epsilon=float(info["epsilon"]))
    if info.get("sample_weight"):
        problem = replace(problem, upper=stored.upper.copy(),
                          info={**problem.info, "sample_weight": True})
        notes.append("sample weights taken from the stored upper bounds")
    return problem, std


def reproduce(
    record: RunRecord,
    dataset: Dataset,
    *,
    tolerance: float | None = None,
    options: Mapping[str, Any] | None = None,
) -> Reproduction:
    """Re-run ``record`` on ``dataset`` and compare α with the stored α.

    Parameters
    ----------
    record : a stored run (``RunStore.load``) of a binary classification problem.
    dataset : the training data; its fingerprint must equal the recorded one, else
        :class:`InvalidInputError` naming both fingerprints and the data source.
    tolerance : absolute α tolerance for ``"within_tolerance"``; default
        ``DEFAULT_ALPHA_RTOL × max(upper bound)``.
    options : solver options overriding the recorded ones (e.g. a different
        ``time_limit``); the comparison is then no longer a strict reproduction.
    """
    if not isinstance(dataset, Dataset):
        raise InvalidInputError(f"reproduce needs a Dataset, got {type(dataset).__name__}")
    recorded_fp = record.data.get("fingerprint")
    fp = fingerprint(dataset)
    if recorded_fp != fp:
        raise InvalidInputError(
            f"data {dataset.source or '(arrays)'} do not match run {record.run_id}: fingerprint "
            f"{fp} differs from the recorded data fingerprint {recorded_fp}")
    notes: list[str] = []
    problem, std = _rebuild_problem(record, dataset, notes)
    stored = record.problem
    identical = all(_same_bits(getattr(problem, a), getattr(stored, a))
                    for a in ("X", "y", "p", "lower", "upper")) and problem.delta == stored.delta
    if not identical:
        notes.append("the rebuilt problem arrays differ from the stored ones")

    res0 = record.result
    solve = get_solver(res0.solver)
    accepted = {name for name, p in inspect.signature(solve).parameters.items()
                if p.kind is inspect.Parameter.KEYWORD_ONLY}
    opts: dict[str, Any] = {}
    dropped = []
    warm = bool(res0.options.get("warm_start"))
    for key, value in res0.options.items():
        if key in _NOT_OPTIONS:
            continue
        if key == "alpha0":  # recorded as the start itself, or as a flag "a start was given"
            if isinstance(value, np.ndarray):
                opts[key] = value
            else:
                warm = warm or value is True
            continue
        if key == "callback":  # recorded by name only; progress reporting is not replayed
            if value is not None:
                notes.append("the recorded callback was not re-attached")
            continue
        if key in accepted and not (isinstance(value, dict) and "$callable" in value):
            opts[key] = value
        else:
            dropped.append(key)
    if warm and "alpha0" in accepted and "alpha0" not in opts:
        tr = res0.trace
        if tr is not None and tr.snapshot_iterations.size and tr.snapshot_iterations[0] == 0:
            opts["alpha0"] = np.array(tr.snapshots[0])
            notes.append("warm start taken from the snapshot at iteration 0")
        else:
            notes.append("the run was warm-started but its start is not recorded")
    if options:
        opts.update(options)
        notes.append(f"options overridden: {', '.join(sorted(options))}")
    result = solve(problem, **opts)

    a_new, a_old = np.asarray(result.alpha), np.asarray(res0.alpha)
    kkt_tol = (DEFAULT_ALPHA_RTOL * float(np.max(stored.upper)) if tolerance is None
           else float(tolerance))
    if a_new.shape != a_old.shape:
        diff = float("inf")
    else:
        diff = float(np.max(np.abs(a_new - a_old))) if a_new.size else 0.0
    if _same_bits(a_new, a_old):
        agreement = "bitwise"
    elif diff <= kkt_tol:
        agreement = "within_tolerance"
    else:
        agreement = "different"
    new_record = RunRecord(problem=problem, result=result, data=dict(record.data),
                           standardiser=std, parent_id=record.run_id,
                           attachments={"reproduction_of": {"run_id": record.run_id,
                                                            "agreement": agreement,
                                                            "max_abs_difference": diff}})
    return Reproduction(
        run_id=record.run_id, agreement=agreement, max_abs_difference=diff, tolerance=kkt_tol,
        problem_identical=identical, iterations=(int(res0.iterations), int(result.iterations)),
        status=(res0.status.label, result.status.label), fingerprint=fp, options=opts,
        dropped_options=tuple(dropped), result=result, record=new_record, notes=notes,
    )
