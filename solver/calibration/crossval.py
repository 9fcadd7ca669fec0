"""Cross-validated decision values and the binary sigmoid fit on them.

:func:`calibrate` splits the training rows of a solved binary problem into stratified,
seeded folds, solves the dual once per fold on the other folds' rows, takes each held-out
row's decision value from the fit that did not see it, and fits Platt's sigmoid to those
values (:func:`~solver.calibration.platt.fit_sigmoid`).  Each fold's sub-problem keeps the
rows' own box bounds uᵢ = C × class weight × sample weight of the final problem, so the
cross-validation fits carry exactly the class and sample weights of the final model, and
it uses the final problem's kernel with its resolved parameters (gamma included) and
standardised rows.  The result is an immutable :class:`Calibration` that is stored as the
run attachment ``calibration`` and read back with :meth:`Calibration.from_attachment`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..problem import DualProblem
from .folds import stratified_folds
from .platt import FIT_MESSAGES, FitStatus, SigmoidFit, fit_sigmoid, sigmoid_probability

__all__ = ["Calibration", "calibrate", "DEFAULT_FOLDS", "DEFAULT_SEED", "ATTACHMENT",
           "PROBABILITY_CLIP"]

#: Defaults of ``train(probabilities=True)``: five folds, seed 0 (both recorded).
DEFAULT_FOLDS = 5
DEFAULT_SEED = 0
#: Binary probabilities are kept inside [PROBABILITY_CLIP, 1 − PROBABILITY_CLIP] (float64
#: cannot hold 1 − e^{−z} below 1 for z > 36.7; the clip keeps both in the open interval).
PROBABILITY_CLIP = 1e-15
#: Name of the run attachment (``calibration.json``).
ATTACHMENT = "calibration"
_METHOD = "platt_cross_validated"


@dataclass(frozen=True, eq=False)
class Calibration:
    """Platt scaling of a binary run, with everything needed to check and reproduce it.

    labels : ``{"negative": v, "positive": v}`` of the run.  n_folds, seed : the fold
    assignment rule's inputs.  folds : (n,) int64 fold of every training row.
    cv_values : (n,) float64 out-of-fold decision values.  positive : (n,) bool, the row is
    of the positive class.  fit : the :class:`SigmoidFit`, or None when no fit was tried.
    fold_fits : per fold ``{"fold", "n_train", "n_test", "status", "iterations",
    "max_violation"}``.  solver, solver_options : how each fold was solved.
    weights : the class weights and sample-weight flag the fold fits carried.
    holdout : optional ``{"values", "positive", "source", "fingerprint"}`` for the
    evidence on held-out rows.  status, message : overall outcome.
    """

    labels: Mapping[str, Any]
    n_folds: int
    seed: int
    folds: np.ndarray
    cv_values: np.ndarray
    positive: np.ndarray
    fit: SigmoidFit | None
    fold_fits: tuple[Mapping[str, Any], ...]
    solver: str
    solver_options: Mapping[str, Any]
    weights: Mapping[str, Any]
    status: FitStatus
    message: str
    holdout: Mapping[str, Any] | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def success(self) -> bool:
        """True only when a sigmoid was fitted and may give probabilities."""
        return self.status == FitStatus.FITTED and self.fit is not None

    @property
    def A(self) -> float:
        """Slope of the sigmoid (NaN without a fit)."""
        return math.nan if self.fit is None else self.fit.A

    @property
    def B(self) -> float:
        """Offset of the sigmoid (NaN without a fit)."""
        return math.nan if self.fit is None else self.fit.B

    def probabilities(self, values: np.ndarray) -> np.ndarray:
        """(m, 2) probabilities [P(negative), P(positive)] for decision values (m,).

        Both columns are kept inside [PROBABILITY_CLIP, 1 − PROBABILITY_CLIP], which acts
        only where |A f + B| > 34.5; without it the larger of the two would round to
        exactly 1.0 in float64 from |A f + B| > 36.7 on.  Rows sum to 1 within 2e−15.

        Raises :class:`InvalidInputError` when the fit failed (its reason in the message):
        probabilities are never made up."""
        if not self.success:
            raise InvalidInputError(f"no usable sigmoid: {self.message}")
        f = np.asarray(values, dtype=np.float64).reshape(-1)
        p_pos = sigmoid_probability(f, self.A, self.B)
        p_neg = sigmoid_probability(f, -self.A, -self.B)  # = 1 − p_pos without cancellation
        P = np.column_stack([p_neg, p_pos])
        return np.clip(P, PROBABILITY_CLIP, 1.0 - PROBABILITY_CLIP)

    @property
    def crossover(self) -> float:
        """Decision value −B/A where P(positive) = ½ (NaN without a fit)."""
        return -self.B / self.A if self.success else math.nan

    def to_attachment(self) -> dict[str, Any]:
        """Plain data for the run store (arrays become ``$array`` entries)."""
        return {
            "method": _METHOD,
            "labels": dict(self.labels),
            "n_folds": int(self.n_folds),
            "seed": int(self.seed),
            "status": self.status.label,
            "message": self.message,
            "A": float(self.A),
            "B": float(self.B),
            "sigmoid": None if self.fit is None else self.fit.to_dict(),
            "folds": np.asarray(self.folds, dtype=np.int64),
            "cv_values": np.asarray(self.cv_values, dtype=np.float64),
            "positive": np.asarray(self.positive, dtype=bool),
            "fold_fits": [dict(f) for f in self.fold_fits],
            "solver": self.solver,
            "solver_options": dict(self.solver_options),
            "weights": dict(self.weights),
            "holdout": None if self.holdout is None else dict(self.holdout),
            "formula": "P(positive | f) = 1 / (1 + exp(A f + B))",
        }

    @classmethod
    def from_attachment(cls, d: Mapping[str, Any]) -> Calibration:
        """Inverse of :meth:`to_attachment`, with type and shape checks."""
        try:
            if d.get("method") != _METHOD:
                raise ValueError(f"unknown method {d.get('method')!r}")
            folds = np.asarray(d["folds"])
            cv = np.asarray(d["cv_values"])
            pos = np.asarray(d["positive"])
            if (folds.dtype.kind != "i" or cv.dtype != np.float64 or pos.dtype != bool
                    or folds.ndim != 1 or folds.shape != cv.shape or cv.shape != pos.shape):
                raise ValueError("folds, cv_values and positive must be equal-length arrays "
                                 "of int, float64 and bool")
            status = FitStatus.from_label(d["status"])
            sig = d.get("sigmoid")
            fit = None
            if sig is not None:
                fit = SigmoidFit(
                    A=float(sig["A"]), B=float(sig["B"]),
                    status=FitStatus.from_label(sig["status"]), message=str(sig["message"]),
                    newton_steps=int(sig["newton_steps"]),
                    gradient_norm=float(sig["gradient_norm"]),
                    objective=float(sig["objective"]), n_positive=int(sig["n_positive"]),
                    n_negative=int(sig["n_negative"]),
                    target_positive=float(sig["target_positive"]),
                    target_negative=float(sig["target_negative"]))
            return cls(labels=dict(d["labels"]), n_folds=int(d["n_folds"]), seed=int(d["seed"]),
                       folds=folds.astype(np.int64), cv_values=cv, positive=pos, fit=fit,
                       fold_fits=tuple(dict(f) for f in d["fold_fits"]),
                       solver=str(d["solver"]), solver_options=dict(d["solver_options"]),
                       weights=dict(d["weights"]), status=status, message=str(d["message"]),
                       holdout=None if d.get("holdout") is None else dict(d["holdout"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise InvalidInputError(f"calibration attachment is malformed: {exc}") from None

    def with_holdout(self, values: np.ndarray, positive: np.ndarray, *,
                     source: str | None, fingerprint: str | None) -> Calibration:
        """A copy carrying held-out decision values and classes for the report's evidence."""
        from dataclasses import replace

        return replace(self, holdout={"values": np.asarray(values, dtype=np.float64),
                                      "positive": np.asarray(positive, dtype=bool),
                                      "source": source, "fingerprint": fingerprint})


def _fold_problem(problem: DualProblem, rows: np.ndarray, fold: int) -> DualProblem:
    """The training rows ``rows`` as their own dual, bounds (weights) and kernel unchanged."""
    return DualProblem(
        X=problem.X[rows], y=problem.y[rows], p=problem.p[rows], lower=problem.lower[rows],
        upper=problem.upper[rows], delta=problem.delta, kernel=problem.kernel,
        kind=problem.kind, info={**problem.info, "calibration_fold": int(fold)})


def calibrate(
    problem: DualProblem,
    *,
    n_folds: int = DEFAULT_FOLDS,
    seed: int = DEFAULT_SEED,
    solver: str = "smo",
    kkt_tol: float = 1e-3,
    iteration_limit: int | None = None,
) -> Calibration:
    """Cross-validated Platt scaling of a binary classification ``problem``.

    Parameters
    ----------
    problem : the final model's dual (``kind == "binary_classification"``).
    n_folds, seed : stratified fold assignment (:func:`stratified_folds`); a class with
        fewer rows than folds is refused, naming the class.
    solver, kkt_tol, iteration_limit : how each fold's dual is solved (as the final model).

    Returns
    -------
    Calibration
        With status ``fitted`` only when every fold fit converged and the sigmoid fit
        succeeded; otherwise the status and message say what failed and no probabilities
        can be drawn from it.

    Notes
    -----
    Row i's value is f₋ₖ(xᵢ) = Σ_{j∉k} αⱼyⱼK(xⱼ, xᵢ) + b₋ₖ from the fit without its fold k.
    Platt (1999) and Lin, Lin & Weng (2007) fit the sigmoid on such out-of-fold values
    because the final model's own training values are biased towards the margin.
    """
    from ..solvers import get_solver

    if problem.kind != "binary_classification":
        raise InvalidInputError(
            f"Platt scaling needs a binary classification run, this one is {problem.kind!r}")
    labels = dict(problem.info.get("labels") or {"negative": -1, "positive": 1})
    names = [str(labels["negative"]), str(labels["positive"])]
    folds = stratified_folds(problem.y, n_folds, seed, class_names=names)
    solve = get_solver(solver)
    options: dict[str, Any] = {"kkt_tol": float(kkt_tol), "trace": "off"}
    if iteration_limit is not None:
        options["iteration_limit"] = int(iteration_limit)
    cv = np.empty(problem.n)
    fold_fits: list[dict[str, Any]] = []
    for k in range(n_folds):
        test = np.flatnonzero(folds == k)
        train = np.flatnonzero(folds != k)
        sub = _fold_problem(problem, train, k)
        res = solve(sub, **options)
        sv = np.flatnonzero(res.alpha > sub.lower)
        coef = res.alpha[sv] * sub.y[sv]
        cv[test] = problem.kernel.block(problem.X[test], sub.X[sv]) @ coef + float(res.bias)
        fold_fits.append({"fold": k, "n_train": int(train.size), "n_test": int(test.size),
                          "status": res.status.label, "iterations": int(res.iterations),
                          "max_violation": float(res.certificate.max_violation)})
    positive = problem.y > 0
    weights = {"class_weight": problem.info.get("class_weight"),
               "sample_weight": bool(problem.info.get("sample_weight")),
               "rule": "each fold keeps its rows' upper bounds C × class weight × sample "
                       "weight from the final problem"}
    common = dict(labels=labels, n_folds=int(n_folds), seed=int(seed), folds=folds,
                  cv_values=cv, positive=positive, fold_fits=tuple(fold_fits), solver=solver,
                  solver_options={k: v for k, v in options.items()}, weights=weights)
    bad = [f for f in fold_fits if f["status"] != "converged"]
    if bad:
        detail = "; ".join(f"fold {f['fold']}: {f['status']} after {f['iterations']} "
                           f"iterations" for f in bad)
        return Calibration(fit=None, status=FitStatus.FOLD_NOT_CONVERGED,
                           message=f"{FIT_MESSAGES[FitStatus.FOLD_NOT_CONVERGED]} ({detail})",
                           **common)
    fit = fit_sigmoid(cv, positive)
    return Calibration(fit=fit, status=fit.status, message=fit.message, **common)


def usable_calibration(attachment: Mapping[str, Any] | None, what: str) -> Calibration:
    """The :class:`Calibration` stored as ``attachment`` for ``what`` (e.g. ``run <id>``),
    or a one-line error saying why it gives no probabilities."""
    if attachment is None:
        raise InvalidInputError(
            f"{what} has no fitted sigmoid, so it gives no probabilities; train it with "
            "--probabilities (Python: solver.train(..., probabilities=True))")
    cal = Calibration.from_attachment(attachment)
    if not cal.success:
        raise InvalidInputError(f"{what} gives no probabilities: its sigmoid fit failed "
                                f"({cal.status.label}): {cal.message}")
    return cal
