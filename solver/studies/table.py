"""The results table of a study: one row per cell × fold, per-cell aggregates, the best
cell and the cell chosen by the one-standard-error rule.

One-standard-error rule (Hastie, Tibshirani & Friedman, *The Elements of Statistical
Learning*, 2nd ed., §7.10): take the best cell's mean score m* and its standard error
s* = sd / √k over the k folds; among the cells whose mean is at least m* − s*, choose the
most parsimonious.  Here the most parsimonious is the smallest C (widest margin) or, for
one-class, the smallest ν (fewest support vectors), then the smallest γ (smoothest
RBF/poly/sigmoid kernel), then the smallest degree, then the largest ε (widest tube, fewest
support vectors) — our reading of "simplest" for a kernel SVM, stated with every choice.
A score where lower is better (regression RMSE, one-class ``nu_gap``) is read the other way
round: the cells whose mean is at most m* + s*.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["fit_row", "aggregate", "choose", "ONE_SE_RULE", "ROW_COLUMNS", "write_parquet"]

ONE_SE_RULE = ("one-standard-error rule (Hastie, Tibshirani & Friedman, The Elements of "
               "Statistical Learning, 2nd ed., section 7.10): the most parsimonious cell "
               "(smallest C or nu, then smallest gamma, then smallest degree, then largest "
               "epsilon) whose mean score is within one standard error of the best cell's "
               "mean")

#: columns of the per-fit rows, in order
ROW_COLUMNS = ("cell", "C", "gamma", "degree", "epsilon", "nu", "fold", "run_id", "start", "score",
               "accuracy", "balanced_accuracy", "validation_rows", "n_small_values",
               "iterations", "seconds", "status", "converged", "max_violation",
               "duality_gap", "support_share", "bounded_share", "curvature_fixes",
               "shrink_events")


def fit_row(fit: Any, run_id: str, score_name: str,
            measures: Sequence[str] = ("accuracy", "balanced_accuracy")) -> dict[str, Any]:
    """One row of the table from a fit's :class:`~.fits.FitView` (its attachments and its
    runs' facts: one, or every pair of a one-vs-one fit — iterations, seconds and events summed,
    the worst status, the largest violation and gap, shares over all pair variables);
    one column per held-out measure in ``measures`` (None where the fit has none)."""
    from ..training import _STATUS_ORDER, worst
    from .grid import Cell

    sf = fit.attachments["study_fit"]
    h = fit.attachments["holdout"]
    cell = sf["cell"]
    rs = list(fit.runs)
    n = max(1, sum(r.n for r in rs))
    row: dict[str, Any] = {
        "cell": Cell.of(cell).label,
        "C": None if cell["C"] is None else float(cell["C"]), "gamma": cell["gamma"],
        "degree": cell["degree"], "epsilon": cell.get("epsilon"), "nu": cell.get("nu"),
        "fold": int(sf["fold"]), "run_id": run_id, "start": sf["start"],
        "score": float(h[score_name]),
    }
    for m in dict.fromkeys(("accuracy", "balanced_accuracy", *measures)):
        v = h.get(m)
        row[m] = float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None
    return {
        **row,
        "validation_rows": int(sf["validation_rows"]),
        "n_small_values": int(h.get("n_small_values", 0)),
        "iterations": int(sum(r.iterations for r in rs)),
        "seconds": float(sum(r.seconds for r in rs)),
        "status": worst([r.status for r in rs], _STATUS_ORDER) or "converged",
        "converged": all(r.converged for r in rs),
        "max_violation": max(r.max_violation for r in rs),
        "duality_gap": max(r.duality_gap for r in rs),
        "support_share": sum(r.n_support for r in rs) / n,
        "bounded_share": sum(r.n_bounded for r in rs) / n,
        "curvature_fixes": int(sum(r.curvature_fixes for r in rs)),
        "shrink_events": int(sum(r.shrinks for r in rs)),
    }


def aggregate(rows: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Per-cell aggregates over folds: mean and standard error of the score, mean
    accuracy and balanced accuracy, total and mean iterations, solve seconds, share of
    folds not converged, worst violation and gap, mean support and bounded shares, events."""
    cells: dict[str, list[Mapping[str, Any]]] = {}
    for row in rows:
        cells.setdefault(row["cell"], []).append(row)
    out = []
    for label, rs in cells.items():
        s = np.array([r["score"] for r in rs], dtype=np.float64)
        k = s.size
        sd = float(np.std(s, ddof=1)) if k > 1 else float("nan")
        out.append({
            "cell": label, "C": rs[0]["C"], "gamma": rs[0]["gamma"], "degree": rs[0]["degree"],
            "epsilon": rs[0].get("epsilon"), "nu": rs[0].get("nu"), "folds": k,
            "mean_score": float(np.mean(s)), "sd_score": sd,
            "se_score": sd / math.sqrt(k) if k > 1 else float("nan"),
            "mean_accuracy": _mean(rs, "accuracy"),
            "mean_balanced_accuracy": _mean(rs, "balanced_accuracy"),
            **{f"mean_{m}": _mean(rs, m) for m in rs[0]
               if m not in _NOT_MEASURES and m not in ("accuracy", "balanced_accuracy")},
            "iterations": int(sum(r["iterations"] for r in rs)),
            "mean_iterations": float(np.mean([r["iterations"] for r in rs])),
            "seconds": float(sum(r["seconds"] for r in rs)),
            "not_converged_share": float(np.mean([not r["converged"] for r in rs])),
            "iteration_limit_hits": int(sum(r["status"] == "iteration_limit" for r in rs)),
            "max_violation": float(max(r["max_violation"] for r in rs)),
            "duality_gap": float(max(r["duality_gap"] for r in rs)),
            "support_share": float(np.mean([r["support_share"] for r in rs])),
            "bounded_share": float(np.mean([r["bounded_share"] for r in rs])),
            "curvature_fixes": int(sum(r["curvature_fixes"] for r in rs)),
            "shrink_events": int(sum(r["shrink_events"] for r in rs)),
            "n_small_values": int(sum(r["n_small_values"] for r in rs)),
        })
    return out


#: per-fit columns that are not held-out measures (no mean_<column> aggregate)
_NOT_MEASURES = set(ROW_COLUMNS) - {"accuracy", "balanced_accuracy"}


def _mean(rs: Sequence[Mapping[str, Any]], key: str) -> float | None:
    v = [r[key] for r in rs if r.get(key) is not None]
    return float(np.mean(v)) if v else None


def _parsimony(c: Mapping[str, Any]) -> tuple[float, float, float, int, float]:
    z = lambda v: 0.0 if v is None else float(v)  # noqa: E731
    return (z(c["C"]), z(c.get("nu")), z(c["gamma"]), int(c["degree"] or 0),
            -z(c.get("epsilon")))


def choose(cells: Sequence[Mapping[str, Any]], score_name: str,
           higher_better: bool = True) -> dict[str, Any]:
    """The best cell (best mean score; ties to the more parsimonious) and the cell the
    one-standard-error rule chooses (see the module docstring)."""
    sign = 1.0 if higher_better else -1.0
    best = max(cells, key=lambda c: (sign * c["mean_score"],
                                     tuple(-v for v in _parsimony(c))))
    se = best["se_score"] if math.isfinite(best["se_score"]) else 0.0
    threshold = best["mean_score"] - sign * se
    within = [c for c in cells if sign * (c["mean_score"] - threshold) >= 0]
    chosen = min(within, key=_parsimony)
    return {"score": score_name, "higher_is_better": bool(higher_better),
            "best": best["cell"], "best_mean": best["mean_score"],
            "best_se": best["se_score"], "threshold": threshold,
            "one_se": chosen["cell"], "one_se_mean": chosen["mean_score"],
            "within_one_se": [c["cell"] for c in within], "rule": ONE_SE_RULE}


def write_parquet(rows: Sequence[Mapping[str, Any]], cells: Sequence[Mapping[str, Any]],
                  path: Any) -> None:
    """Write the table to ``path`` (Parquet): the per-fit rows with ``level = "fit"``, then
    one row per cell with ``level = "cell"`` (fold = −1, aggregate columns filled)."""
    import pyarrow.parquet as pq

    from ..store.format import arrow_table

    keys: list[str] = ["level"]
    for r in [*rows, *cells]:
        for k in r:
            if k not in keys:
                keys.append(k)
    data = [{"level": "fit", **r} for r in rows] + [{"level": "cell", "fold": -1, **c}
                                                    for c in cells]
    cols = {k: [d.get(k) for d in data] for k in keys}
    pq.write_table(arrow_table(cols), str(path) if isinstance(path, (str, Path)) else path)
