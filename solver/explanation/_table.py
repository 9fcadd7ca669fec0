"""Per-point table: why each training point is (or is not) a support vector.

For binary classification (p = −1, Δ = 0, l = 0) the KKT conditions of the dual
(see :mod:`solver.problem`) read, with margin mᵢ = yᵢ f(xᵢ):

    αᵢ = 0        ⇒ mᵢ ≥ 1     (outside or on the margin, correct side)
    0 < αᵢ < uᵢ   ⇒ mᵢ = 1     (exactly on the margin)
    αᵢ = uᵢ       ⇒ mᵢ ≤ 1     (on or inside the margin, possibly on the wrong side)

The category comes from the certificate's bound masks (so the counts agree with the
certificate by construction) and, for points at the upper bound, from the margin.
"""

from __future__ import annotations

import csv
import json
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..problem import DualProblem
from ..result import SolveResult
from ..vocabulary import figure_text
from ._values import q_alpha

__all__ = ["CATEGORIES", "COLUMNS", "PointTable", "point_table"]

#: Category code → definition (α is the multiplier, u its upper bound, m = y·f(x)).
CATEGORIES: dict[str, str] = {
    "non_support": "α at its lower bound 0: not a support vector (m ≥ 1 at the optimum)",
    "margin_support": "0 < α < u: support vector exactly on the margin (m = 1 at the optimum)",
    "bounded_inside_margin": "α = u and 0 ≤ m < 1, correctly classified: inside the margin",
    "bounded_misclassified": "α = u and the point is on the wrong side of the decision boundary",
    "bounded_on_margin": (
        "α = u and m ≥ 1: a degenerate bounded support vector lying on the margin "
        "(m = 1 at the optimum; m > 1 only within the solver's tolerance)"
    ),
}

#: Column names of the table, in export order.
COLUMNS: tuple[str, ...] = (
    "row_id", "label", "alpha", "alpha_ratio", "decision_value", "margin", "slack",
    "kkt_residual", "category", "reason", "first_nonzero_iteration", "last_change_iteration",
    "times_selected",
)

_INT_COLUMNS = ("row_id", "first_nonzero_iteration", "last_change_iteration", "times_selected")
_FLOAT_COLUMNS = ("alpha", "alpha_ratio", "decision_value", "margin", "slack", "kkt_residual")


@dataclass(frozen=True, eq=False)
class PointTable:
    """One row per training point; build with :func:`point_table`.

    Columns (all length n):

    ``row_id`` int64, 0-based training row; ``label`` original label value;
    ``alpha`` multiplier αᵢ; ``alpha_ratio`` αᵢ/uᵢ (0 when uᵢ = 0);
    ``decision_value`` f(xᵢ) = Σⱼ αⱼyⱼK(xⱼ, xᵢ) + b; ``margin`` yᵢ·f(xᵢ);
    ``slack`` max(0, 1 − margin); ``kkt_residual`` the certificate's per-point residual
    (gradient units); ``category`` one of :data:`CATEGORIES`; ``reason`` a sentence;
    ``first_nonzero_iteration`` first iteration after which αᵢ > 0 (0: non-zero at the
    start, −1: never); ``last_change_iteration`` last iteration that changed αᵢ (0: kept
    its starting value); ``times_selected`` how often αᵢ was in the working set.
    The three trace columns need a trace at level ``"full"`` with working-set columns
    (SMO); otherwise all three are −1 and :attr:`trace_level` is None.

    Attributes besides ``columns``: ``bias`` b, ``kkt_tol`` the certificate tolerance,
    ``status`` the solver status label, ``trace_level`` ``"full"`` or None, ``solver``
    the solver's registry name, ``values_note`` how the decision values were obtained
    (:func:`solver.explanation._values.q_alpha`; empty for a table rebuilt from columns).
    """

    columns: Mapping[str, np.ndarray]
    bias: float = float("nan")
    kkt_tol: float = float("nan")
    status: str = ""
    trace_level: str | None = None
    solver: str = ""
    values_note: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        missing = [c for c in COLUMNS if c not in self.columns]
        if missing:
            raise InvalidInputError(f"explanation table lacks column(s) {', '.join(missing)}")
        lengths = {name: int(np.asarray(v).shape[0]) for name, v in self.columns.items()}
        if len(set(lengths.values())) > 1:
            raise InvalidInputError(f"explanation table columns differ in length: {lengths}")
        bad = sorted(set(np.asarray(self.columns["category"]).tolist()) - set(CATEGORIES))
        if bad:
            raise InvalidInputError(f"explanation table has unknown category code(s) {bad}")

    @property
    def n(self) -> int:
        """Number of rows (training points)."""
        return int(np.asarray(self.columns["row_id"]).shape[0])

    def to_columns(self) -> dict[str, np.ndarray]:
        """Equal-length arrays in :data:`COLUMNS` order (the store attachment ``explanation``)."""
        return {c: np.asarray(self.columns[c]) for c in COLUMNS}

    @classmethod
    def from_columns(cls, columns: Mapping[str, Any], **meta: Any) -> PointTable:
        """Rebuild from :meth:`to_columns` output (e.g. a stored attachment), with checks."""
        if not isinstance(columns, Mapping):
            raise InvalidInputError("explanation table must be a mapping of column arrays")
        cols: dict[str, np.ndarray] = {}
        for c in COLUMNS:
            if c not in columns:
                raise InvalidInputError(f"explanation table lacks column {c!r}")
            v = np.asarray(columns[c])
            try:
                if c in _INT_COLUMNS:
                    v = v.astype(np.int64)
                elif c in _FLOAT_COLUMNS:
                    v = v.astype(np.float64)
                elif c in ("category", "reason"):
                    v = v.astype(str)
            except (TypeError, ValueError):
                raise InvalidInputError(f"explanation table column {c!r} has wrong type") from None
            cols[c] = v
        return cls(columns=cols, **meta)

    def category_counts(self) -> dict[str, int]:
        """Count per category code (every code present, zeros included)."""
        cat = np.asarray(self.columns["category"])
        return {c: int(np.sum(cat == c)) for c in CATEGORIES}

    def rows(self, category: str) -> np.ndarray:
        """Row ids (int64) of the points in ``category``."""
        if category not in CATEGORIES:
            raise InvalidInputError(
                f"unknown category {category!r}; choose one of {', '.join(CATEGORIES)}"
            )
        mask = np.asarray(self.columns["category"]) == category
        return np.asarray(self.columns["row_id"])[mask]

    def write_csv(self, path: str | os.PathLike[str]) -> Path:
        """Write a UTF-8 CSV with a header row (floats in shortest round-trip form); atomic."""
        cols = self.to_columns()
        target = Path(path)

        def fmt(v: Any) -> str:
            if isinstance(v, (float, np.floating)):
                return repr(float(v))
            if isinstance(v, np.generic):
                return str(v.item())
            return str(v)

        def write(tmp: Path) -> None:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(COLUMNS)
                for k in range(self.n):
                    w.writerow([fmt(cols[c][k]) for c in COLUMNS])

        _atomic(target, write)
        return target

    def write_parquet(self, path: str | os.PathLike[str]) -> Path:
        """Write a Parquet file (one column per table column, metadata key ``kktrace``); atomic."""
        import pyarrow.parquet as pq

        from ..store.format import arrow_table

        cols = self.to_columns()
        arrays = {c: cols[c].tolist() if cols[c].dtype.kind in "OU" else cols[c]
                  for c in COLUMNS}
        meta = {"bias": self.bias, "kkt_tol": self.kkt_tol, "status": self.status,
                "trace_level": self.trace_level, "categories": CATEGORIES}
        table = arrow_table(arrays).replace_schema_metadata(
            {"kktrace": json.dumps(meta, ensure_ascii=False)}
        )
        target = Path(path)
        _atomic(target, lambda tmp: pq.write_table(table, tmp))
        return target


def _atomic(target: Path, write: Any) -> None:
    if not target.parent.is_dir():
        raise InvalidInputError(f"cannot write {target}: folder {target.parent} does not exist")
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    try:
        write(tmp)
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()


def _check_classification(problem: DualProblem, result: SolveResult, what: str) -> None:
    if problem.labels is None or problem.kind != "binary_classification":
        raise InvalidInputError(
            f"{what} needs a binary classification problem, got kind {problem.kind!r}"
        )
    if np.asarray(result.alpha).shape != (problem.n,):
        raise InvalidInputError(
            f"{what}: the solution has {np.asarray(result.alpha).size} multipliers but the "
            f"problem has {problem.n} rows; they do not belong together"
        )


def decision_on_training(problem: DualProblem, alpha: np.ndarray, bias: float) -> np.ndarray:
    """f(xᵢ) = yᵢ(Qα)ᵢ + b for every training row, shape ``(n,)``."""
    return problem.y * problem.q_times(alpha) + bias


def misclassified(decision: np.ndarray, y: np.ndarray) -> np.ndarray:
    """True where the predicted sign differs from y (prediction positive iff f > 0,
    as in :meth:`solver.model.Model.classify`; f = 0 counts as the negative label)."""
    return (decision > 0) != (y > 0)


def point_table(problem: DualProblem, result: SolveResult) -> PointTable:
    """Per-point explanation table for a solved binary classification problem.

    Parameters
    ----------
    problem : the solved :class:`~solver.problem.DualProblem` (n rows).
    result : its :class:`~solver.result.SolveResult`; ``result.bias`` defines f and
        ``result.certificate`` supplies the bound masks and KKT residuals.

    Notes
    -----
    Categories: ``non_support`` where the certificate has α at the lower bound,
    ``margin_support`` where α is free, and for α at the upper bound
    ``bounded_misclassified`` (wrong predicted sign), else ``bounded_inside_margin``
    (margin < 1), else ``bounded_on_margin`` (margin ≥ 1: the degenerate case of a
    multiplier at its bound on the margin).  So the counts equal the certificate's
    ``n_zero``, ``n_free`` and ``n_bounded`` (the three bounded codes together).
    """
    _check_classification(problem, result, "the point table")
    alpha = np.asarray(result.alpha, dtype=np.float64)
    cert = result.certificate
    y, up = problem.y, problem.upper
    qa, values_note = q_alpha(problem, result)
    f = y * qa + float(result.bias)
    margin = y * f
    slack = np.maximum(0.0, 1.0 - margin)
    ratio = np.divide(alpha, up, out=np.zeros_like(alpha), where=up > 0)
    at_lower = np.asarray(cert.at_lower, dtype=bool)
    at_upper = np.asarray(cert.at_upper, dtype=bool)
    wrong = misclassified(f, y)
    category = np.full(problem.n, "margin_support", dtype=object)
    category[at_lower] = "non_support"
    category[at_upper & wrong] = "bounded_misclassified"
    category[at_upper & ~wrong & (margin < 1.0)] = "bounded_inside_margin"
    category[at_upper & ~wrong & (margin >= 1.0)] = "bounded_on_margin"
    resid = np.asarray(cert.kkt_residual, dtype=np.float64)
    first_nz, last_change, selected, level = _trace_history(problem, result)
    neg, pos = problem.labels  # type: ignore[misc]
    label = np.array([neg, pos])[(y > 0).astype(np.intp)]
    reasons = np.array(
        [_reason(str(category[k]), alpha[k], up[k], margin[k], resid[k], cert.kkt_tol)
         for k in range(problem.n)],
        dtype=str,
    )
    cols = {
        "row_id": np.arange(problem.n, dtype=np.int64),
        "label": label,
        "alpha": alpha.copy(),
        "alpha_ratio": ratio,
        "decision_value": f,
        "margin": margin,
        "slack": slack,
        "kkt_residual": resid.copy(),
        "category": category.astype(str),
        "reason": reasons,
        "first_nonzero_iteration": first_nz,
        "last_change_iteration": last_change,
        "times_selected": selected,
    }
    return PointTable(columns=cols, bias=float(result.bias), kkt_tol=float(cert.kkt_tol),
                      status=result.status.label, trace_level=level,
                      solver=str(result.solver), values_note=values_note)


def _reason(category: str, a: float, u: float, m: float, resid: float, kkt_tol: float) -> str:
    mtxt = f"{m:.4g}"
    if category == "non_support":
        where = "exactly on the margin" if abs(m - 1.0) <= kkt_tol else "outside the margin"
        text = (f"Not a support vector: its multiplier is 0 and its margin y·f(x) = {mtxt} "
                f"is at least 1 ({where}, correct side), so it does not enter the model "
                f"and removing it would not change the model.")
        if m < 1.0 - kkt_tol:
            text = (f"Not a support vector: its multiplier is 0, but its margin y·f(x) = {mtxt} "
                    f"is below 1, so it would need a positive multiplier at the optimum.")
    elif category == "margin_support":
        text = (f"Support vector on the margin: its multiplier {a:.4g} is strictly between 0 "
                f"and its bound {u:.4g}, so the optimality conditions pin it to y·f(x) = 1 "
                f"(here {mtxt}); it defines the position of the decision boundary.")
    elif category == "bounded_inside_margin":
        text = (f"Bounded support vector inside the margin: its multiplier is at its bound "
                f"{u:.4g} because y·f(x) = {mtxt} is below 1; it is classified correctly but "
                f"pays slack {1.0 - m:.4g}.")
    elif category == "bounded_misclassified":
        text = (f"Bounded support vector on the wrong side: its multiplier is at its bound "
                f"{u:.4g} and y·f(x) = {mtxt}, so the model assigns it the other label "
                f"(slack {1.0 - m:.4g}).")
    else:
        text = (f"Bounded support vector on the margin: its multiplier is at its bound {u:.4g} "
                f"while y·f(x) = {mtxt} is not below 1; at the optimum this means it sits "
                f"exactly on the margin with zero slack (a degenerate case).")
    if resid > kkt_tol:
        text += (f" Its KKT residual {resid:.3g} exceeds the tolerance {figure_text(kkt_tol)}: "
                 f"the solver has not settled this point.")
    return text


def _trace_history(
    problem: DualProblem, result: SolveResult
) -> tuple[np.ndarray, np.ndarray, np.ndarray, str | None]:
    """(first_nonzero_iteration, last_change_iteration, times_selected, level) from the trace."""
    n = problem.n
    missing = np.full(n, -1, dtype=np.int64)
    tr = result.trace
    need = ("iteration", "i", "j", "alpha_i", "alpha_j")
    if tr is None or tr.level != "full" or any(c not in tr.columns for c in need):
        return missing, missing.copy(), missing.copy(), None
    start = _start_alpha(problem, result)
    if start is None:
        return missing, missing.copy(), missing.copy(), None
    it = np.asarray(tr.columns["iteration"], dtype=np.int64)
    pts = np.concatenate([np.asarray(tr.columns["i"], np.int64),
                          np.asarray(tr.columns["j"], np.int64)])
    vals = np.concatenate([np.asarray(tr.columns["alpha_i"], np.float64),
                           np.asarray(tr.columns["alpha_j"], np.float64)])
    iters = np.concatenate([it, it])
    if pts.size and (pts.min() < 0 or pts.max() >= n):
        return missing, missing.copy(), missing.copy(), None
    order = np.lexsort((iters, pts))  # by point, then iteration
    pts, vals, iters = pts[order], vals[order], iters[order]
    prev = np.empty_like(vals)
    if vals.size:
        prev[1:] = vals[:-1]
        first_of_point = np.ones(vals.size, dtype=bool)
        first_of_point[1:] = pts[1:] != pts[:-1]
        prev[first_of_point] = start[pts[first_of_point]]
    changed = vals != prev
    selected = np.bincount(pts, minlength=n).astype(np.int64)
    last_change = np.zeros(n, dtype=np.int64)
    np.maximum.at(last_change, pts[changed], iters[changed])
    lo, up = problem.lower, problem.upper
    tol_nz = 1e-8 * np.maximum(up - lo, 0.0)  # same bound tolerance as the certificate default
    first_nz = np.full(n, -1, dtype=np.int64)
    first_nz[start > lo + tol_nz] = 0
    nz = vals > lo[pts] + tol_nz[pts]
    big = np.iinfo(np.int64).max
    cand = np.full(n, big, dtype=np.int64)
    np.minimum.at(cand, pts[nz], iters[nz])
    fill = (first_nz < 0) & (cand < big)
    first_nz[fill] = cand[fill]
    return first_nz, last_change, selected, "full"


def _start_alpha(problem: DualProblem, result: SolveResult) -> np.ndarray | None:
    """α at iteration 0: the trace snapshot at 0 if any, else the solver's default start."""
    tr = result.trace
    if tr is not None:
        its = np.asarray(tr.snapshot_iterations)
        snaps = np.asarray(tr.snapshots)
        hit = np.flatnonzero(its == 0)
        if hit.size and snaps.ndim == 2 and snaps.shape[1] == problem.n:
            return np.asarray(snaps[hit[0]], dtype=np.float64)
    opts = result.options or {}
    warm = opts.get("warm_start", False) or opts.get("alpha0") is not None
    return None if warm else problem.feasible_start()
