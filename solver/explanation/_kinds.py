"""Per-point explanations and exact leave-one-out for ε-regression and one-class problems.

ε-regression (variables α⁺ᵢ, α⁻ᵢ reading data row i; residual rᵢ = tᵢ − f(xᵢ)): the KKT
conditions (Smola & Schölkopf 2004, section 1.4) give

    α⁺ᵢ = α⁻ᵢ = 0          ⇒ |rᵢ| ≤ ε   (inside the tube)
    0 < α⁺ᵢ < u or 0 < α⁻ᵢ < u ⇒ |rᵢ| = ε (on the tube edge; rᵢ = +ε for α⁺, −ε for α⁻)
    α⁺ᵢ = u or α⁻ᵢ = u       ⇒ |rᵢ| ≥ ε   (outside the tube, above for α⁺, below for α⁻)

One-class (score f(x) = Σ αⱼK(xⱼ, x) − ρ; Schölkopf et al. 2001):

    αᵢ = 0 ⇒ f(xᵢ) ≥ 0 (interior),  0 < αᵢ < 1 ⇒ f(xᵢ) = 0 (boundary),  αᵢ = 1 ⇒ f(xᵢ) ≤ 0
    (outside; an outlier where f(xᵢ) < 0).

The category comes from the certificate's bound masks, so the counts agree with it.

Exact leave-one-out (:func:`kind_leave_one_out`).  Leaving data row r out removes every
variable reading it.  If those variables are all 0 the remaining α stays feasible (yᵀα
and the bounds are unchanged) and every remaining KKT condition is unchanged (the row
adds nothing to Qα), so α restricted is optimal for the smaller problem and the
prediction at x_r is f(x_r) itself — the argument used for classification (Vapnik 1995;
Schölkopf & Smola 2002, section 12.2, from memory).  Only support-vector rows are refitted,
warm-started from α restricted and repaired to yᵀα = Δ.  The bias is then unchanged too
when a free support vector fixes it; with none (interval midpoint) it may move, which is
reported (``bias_from_free``).  For one-class the left-out problem keeps Δ = νn and the
bounds 1 (the same dual with one row fewer; feasible while νn ≤ n − 1).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..model import model_from_solution
from ..problem import ONE_CLASS_KIND, REGRESSION_KIND, DualProblem
from ..result import SolveResult
from ..status import Status
from ..vocabulary import figure_text
from ._values import q_alpha

__all__ = ["REGRESSION_CATEGORIES", "ONE_CLASS_CATEGORIES", "KindTable", "kind_point_table",
           "KindLeaveOneOut", "kind_leave_one_out", "training_values"]

REGRESSION_CATEGORIES: dict[str, str] = {
    "inside_tube": "α⁺ = α⁻ = 0: inside the ε-tube (|residual| ≤ ε); not a support vector",
    "on_tube_edge": "0 < α < u: support vector on the tube edge (|residual| = ε)",
    "outside_tube": "α = u: bounded support vector outside the tube (|residual| ≥ ε)",
}
ONE_CLASS_CATEGORIES: dict[str, str] = {
    "interior": "α = 0: inside the region (score ≥ 0); not a support vector",
    "boundary": "0 < α < 1: support vector on the boundary (score = 0)",
    "outside": "α = 1: bounded support vector on or outside the boundary (score ≤ 0); an "
               "outlier where the score is below 0",
}
_VOCABULARY = {REGRESSION_KIND: REGRESSION_CATEGORIES, ONE_CLASS_KIND: ONE_CLASS_CATEGORIES}


@dataclass(frozen=True, eq=False)
class KindTable:
    """One row per training (data) row; ``columns`` equal-length arrays, ``categories`` the
    task's vocabulary (code → definition), ``kind`` the problem kind."""

    columns: Mapping[str, np.ndarray]
    categories: Mapping[str, str]
    kind: str
    bias: float
    kkt_tol: float
    status: str

    @property
    def n(self) -> int:
        """Number of rows."""
        return int(np.asarray(self.columns["row_id"]).shape[0])

    def to_columns(self) -> dict[str, np.ndarray]:
        """The columns as arrays (the store attachment ``explanation``)."""
        return {k: np.asarray(v) for k, v in self.columns.items()}

    def category_counts(self) -> dict[str, int]:
        """Count per category code (zeros included)."""
        cat = np.asarray(self.columns["category"])
        return {c: int(np.sum(cat == c)) for c in self.categories}

    def rows(self, category: str) -> np.ndarray:
        """Row ids of the points in ``category``."""
        if category not in self.categories:
            raise InvalidInputError(f"unknown category {category!r}; choose one of "
                                    f"{', '.join(self.categories)}")
        return np.asarray(self.columns["row_id"])[np.asarray(self.columns["category"]) == category]


def training_values(problem: DualProblem, alpha: np.ndarray, bias: float) -> np.ndarray:
    """f at every data row (m,), from Qα: variable i gives yᵢ(Qα)ᵢ + b = f(x_rows[i])."""
    return _values_at_rows(problem, problem.q_times(alpha), bias)


def _values_at_rows(problem: DualProblem, qa: np.ndarray, bias: float) -> np.ndarray:
    """f at every data row (m,) from Qα (n,) (see :func:`training_values`)."""
    per_var = problem.y * qa + bias
    out = np.empty(problem.X.shape[0])
    out[problem.data_rows] = per_var  # variables of the same row carry the same value
    return out


def _check(problem: DualProblem, result: SolveResult) -> None:
    if problem.kind not in _VOCABULARY:
        raise InvalidInputError(f"this explanation is for ε-regression and one-class problems, "
                                f"got kind {problem.kind!r}")
    if np.asarray(result.alpha).shape != (problem.n,):
        raise InvalidInputError("the solution does not belong to this problem (length of α)")


def kind_point_table(problem: DualProblem, result: SolveResult,
                     target: np.ndarray | None = None) -> KindTable:
    """Per-point table for a solved ε-regression or one-class problem (module notes).

    Regression columns: ``row_id``, ``target``, ``prediction``, ``residual`` (t − f),
    ``side`` (``above``: target above the prediction, ``below``, or ``on``),
    ``alpha_plus``, ``alpha_minus``, ``coefficient`` (α⁺ − α⁻), ``kkt_residual`` (larger
    of the two variables'), ``category``, ``reason``.  ``target`` (m,) defaults to the
    target recovered from p (t = (p⁻ − p⁺)/2).  One-class columns: ``row_id``, ``score``,
    ``alpha``, ``kkt_residual``, ``category``, ``reason``.
    """
    _check(problem, result)
    alpha = np.asarray(result.alpha, dtype=np.float64)
    c = result.certificate
    tol = float(c.kkt_tol)
    f = _values_at_rows(problem, q_alpha(problem, result)[0], float(result.bias))
    m = problem.X.shape[0]
    lower = np.asarray(c.at_lower, bool)
    upper = np.asarray(c.at_upper, bool)
    resid = np.asarray(c.kkt_residual, np.float64)
    if problem.kind == REGRESSION_KIND:
        ap, am = alpha[:m], alpha[m:]
        eps = float(problem.info["epsilon"])
        t = 0.5 * (problem.p[m:] - problem.p[:m]) if target is None else np.asarray(target, float)
        r = t - f
        category = np.full(m, "on_tube_edge", dtype=object)
        category[lower[:m] & lower[m:]] = "inside_tube"
        category[upper[:m] | upper[m:]] = "outside_tube"
        side = np.where(r > 0, "above", np.where(r < 0, "below", "on"))
        kres = np.maximum(resid[:m], resid[m:])
        reasons = [_reg_reason(str(category[k]), r[k], eps, ap[k], am[k], problem.upper[k],
                               kres[k], tol) for k in range(m)]
        cols = {"row_id": np.arange(m, dtype=np.int64), "target": t, "prediction": f,
                "residual": r, "side": side.astype(str), "alpha_plus": ap.copy(),
                "alpha_minus": am.copy(), "coefficient": ap - am, "kkt_residual": kres,
                "category": category.astype(str), "reason": np.array(reasons, dtype=str)}
    else:
        category = np.full(m, "boundary", dtype=object)
        category[lower] = "interior"
        category[upper] = "outside"
        reasons = [_oc_reason(str(category[k]), f[k], alpha[k], resid[k], tol) for k in range(m)]
        cols = {"row_id": np.arange(m, dtype=np.int64), "score": f, "alpha": alpha.copy(),
                "kkt_residual": resid.copy(), "category": category.astype(str),
                "reason": np.array(reasons, dtype=str)}
    return KindTable(columns=cols, categories=_VOCABULARY[problem.kind], kind=problem.kind,
                     bias=float(result.bias), kkt_tol=tol, status=result.status.label)


def _unsettled(resid: float, tol: float) -> str:
    if resid > tol:
        return (f" Its KKT residual {resid:.3g} exceeds the tolerance {figure_text(tol)}: the "
                "solver has not settled this point.")
    return ""


def _reg_reason(cat: str, r: float, eps: float, ap: float, am: float, u: float,
                resid: float, tol: float) -> str:
    side = "above" if r > 0 else "below"
    if cat == "inside_tube":
        text = (f"Inside the tube: the residual {r:.4g} is within ±ε = ±{eps:.4g}, both "
                "multipliers are 0, so the point does not enter the model and removing it "
                "would not change the model.")
    elif cat == "on_tube_edge":
        a = ap if ap > 0 else am
        text = (f"On the tube edge: its multiplier {a:.4g} is strictly between 0 and its bound "
                f"{u:.4g}, so the optimality conditions pin the residual to ±ε (here {r:.4g}, "
                f"target {side} the prediction); it fixes the position of the fit.")
    else:
        text = (f"Outside the tube: its multiplier is at its bound {u:.4g} because the target "
                f"lies {side} the prediction by {abs(r):.4g}, more than ε = {eps:.4g}; it pays "
                f"slack {max(0.0, abs(r) - eps):.4g}.")
    return text + _unsettled(resid, tol)


def _oc_reason(cat: str, f: float, a: float, resid: float, tol: float) -> str:
    if cat == "interior":
        text = (f"Interior: score {f:.4g} ≥ 0 and multiplier 0; the point lies inside the "
                "region of usual batches and does not enter the model.")
    elif cat == "boundary":
        text = (f"On the boundary: multiplier {a:.4g} strictly between 0 and 1, so the "
                f"optimality conditions pin the score to 0 (here {f:.4g}); it defines ρ.")
    else:
        what = "an outlier" if f < -tol else "on the boundary within the tolerance"
        text = (f"Outside: multiplier at its bound 1 with score {f:.4g}, {what}; it pays slack "
                f"{max(0.0, -f):.4g}.")
    return text + _unsettled(resid, tol)


# ------------------------------------------------------------------------- leave-one-out


@dataclass(frozen=True, eq=False)
class KindLeaveOneOut:
    """Exact leave-one-out of an ε-regression or one-class fit.

    ``values`` (m,) the left-out prediction (regression) or score (one-class) at each data
    row; ``refitted`` (m,) True where the row was a support vector and was refitted;
    ``statuses`` status label of each refit (non-refitted rows: ``"not_needed"``);
    ``measures`` plain data: regression ``mse`` (mean squared error) and ``mae``;
    one-class ``outlier_share`` (share of rows with left-out score < 0);
    ``bias_from_free`` whether the full fit's bias came from free support vectors.
    """

    kind: str
    values: np.ndarray
    refitted: np.ndarray
    statuses: tuple[str, ...]
    iterations: int
    measures: Mapping[str, Any]
    bias_from_free: bool
    #: run id of the child record that stores these figures (None when not stored)
    kept_as: str | None = None

    @property
    def all_converged(self) -> bool:
        """True when every refit converged."""
        return all(s in (Status.CONVERGED.label, "not_needed") for s in self.statuses)

    def summary(self) -> dict[str, Any]:
        """Plain data without the per-row lists (for printing)."""
        return {"kind": self.kind, "n_refits": int(self.refitted.sum()),
                "all_converged": self.all_converged, "iterations": self.iterations,
                **dict(self.measures), "bias_from_free": self.bias_from_free,
                "exactness": "non-support rows need no refit (removing them changes nothing); "
                             "support-vector rows refitted", "kept_as": self.kept_as}

    def to_dict(self) -> dict[str, Any]:
        """Plain data (the per-row values as lists)."""
        return {"kind": self.kind, "values": self.values.tolist(),
                "refitted": self.refitted.tolist(), "n_refits": int(self.refitted.sum()),
                "all_converged": self.all_converged, "iterations": self.iterations,
                "measures": dict(self.measures), "bias_from_free": self.bias_from_free,
                "kept_as": self.kept_as}


def _default_solver() -> Callable[..., SolveResult]:
    from ..smo import solve_smo

    return solve_smo


def without_row(problem: DualProblem, r: int) -> tuple[DualProblem, np.ndarray]:
    """The problem without the variables reading data row ``r`` and their indices.

    ``X`` is shared, not copied: the kept variables simply never read row r.
    """
    dr = problem.data_rows
    keep = np.flatnonzero(dr != r)
    P = problem
    sub = DualProblem(X=P.X, y=P.y[keep], p=P.p[keep], lower=P.lower[keep],
                      upper=P.upper[keep], delta=P.delta, kernel=P.kernel, kind=P.kind,
                      info={**P.info, "left_out_row": int(r)}, rows=dr[keep])
    return sub, keep


def kind_leave_one_out(problem: DualProblem, result: SolveResult, *,
                       target: np.ndarray | None = None, kkt_tol: float | None = None,
                       brute_force: bool = False,
                       solve: Callable[..., SolveResult] | None = None) -> KindLeaveOneOut:
    """Exact leave-one-out by support-vector refits (module notes).

    ``brute_force`` refits every row (for checking the shortcut); ``kkt_tol`` defaults to
    the full fit's certificate tolerance.
    """
    import warnings

    from ..errors import ConvergenceWarning
    from ..smo import repair_start

    _check(problem, result)
    if problem.kind == ONE_CLASS_KIND and problem.delta > problem.X.shape[0] - 1 + 1e-12:
        raise InvalidInputError(
            f"one-class leave-one-out needs nu*n <= n - 1 (here nu*n = {problem.delta:g}, "
            f"n = {problem.X.shape[0]}): without a row the bounds cannot reach nu*n")
    solve = solve or _default_solver()
    tol = float(kkt_tol if kkt_tol is not None else result.certificate.kkt_tol)
    alpha = np.asarray(result.alpha, np.float64)
    m = problem.X.shape[0]
    f = training_values(problem, alpha, float(result.bias))
    sv_var = ~np.asarray(result.certificate.at_lower, bool)
    sv_row = np.zeros(m, dtype=bool)
    sv_row[problem.data_rows[sv_var]] = True
    todo = np.ones(m, bool) if brute_force else sv_row
    values = f.copy()
    statuses = ["not_needed"] * m
    iterations = 0
    model_of = model_from_solution
    for r in np.flatnonzero(todo):
        sub, keep = without_row(problem, int(r))
        a0 = repair_start(sub, alpha[keep])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            res = solve(sub, kkt_tol=tol, trace="off", alpha0=a0)
        statuses[r] = res.status.label
        iterations += int(res.iterations)
        values[r] = float(model_of(sub, res).values(problem.X[r:r + 1], standardised=True)[0])
    if problem.kind == REGRESSION_KIND:
        t = 0.5 * (problem.p[m:] - problem.p[:m]) if target is None else np.asarray(target, float)
        err = t - values
        measures = {"mse": float(np.mean(err**2)), "mae": float(np.mean(np.abs(err))),
                    "rmse": float(np.sqrt(np.mean(err**2)))}
    else:
        measures = {"outlier_share": float(np.mean(values < 0)),
                    "nu": float(problem.info["nu"])}
    measures["n_refits"] = int(todo.sum())
    return KindLeaveOneOut(kind=problem.kind, values=values, refitted=todo,
                           statuses=tuple(statuses), iterations=iterations, measures=measures,
                           bias_from_free=result.certificate.bias_from == "free_support_vectors")
