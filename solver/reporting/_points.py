"""Report content on the points: categories, most influential points, leave-one-out,
held-out outcomes and the decision map."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..run import RunRecord
from ._records import FigureData, Table, _as_mapping, _plain

#: Points drawn on the decision map at most (a seeded sample beyond that; seed 0).
MAP_POINTS = 1500
#: Rows in the table of the most influential points.
N_INFLUENTIAL = 15


# --------------------------------------------------------------------------- support vectors


def _categories(rec: RunRecord) -> tuple[np.ndarray, str]:
    expl = rec.attachments.get("explanation") if rec.attachments else None
    if isinstance(expl, Mapping) and "category" in expl:
        cat = np.asarray(expl["category"]).astype(str)
        if cat.shape == (rec.problem.n,):
            return cat, "explanation attachment"
    c = rec.result.certificate
    cat = np.where(c.at_lower, "non-support", np.where(c.at_upper, "bounded", "free"))
    return cat.astype(str), "certificate (α against its bounds)"


#: Columns of the report's table of points carrying the solution, in order (keys of
#: :data:`solver.vocabulary.POINT_COLUMNS`; those a run lacks are left out).
INFLUENTIAL_COLUMNS = ("row_id", "label", "category", "alpha", "alpha_ratio", "margin",
                       "slack", "kkt_residual", "times_selected", "first_nonzero_iteration",
                       "last_change_iteration", "reason")


def _influential(rec: RunRecord, sel: np.ndarray | None) -> tuple[Table | None, str]:
    """The support vectors ranked by :data:`solver.vocabulary.RANKING_RULE` (top
    :data:`N_INFLUENTIAL`); trace columns the solver does not record say why."""
    from ..vocabulary import RANKING_RULE, TRACE_COLUMNS, not_traced, rank_points

    expl = rec.attachments.get("explanation") if rec.attachments else None
    p, res = rec.problem, rec.result
    if isinstance(expl, Mapping) and "row_id" in expl and "kkt_residual" in expl:
        cols = {str(k): np.asarray(v) for k, v in expl.items()}
        src, missing = "the explanation attachment", ""
    else:
        if p.n == 0:
            return None, "no training points"
        labels = p.labels
        cats, _ = _categories(rec)
        alpha = np.asarray(res.alpha, np.float64)
        cols = {"row_id": np.arange(p.n), "category": cats, "alpha": alpha,
                "alpha_ratio": np.divide(alpha, p.upper, out=np.full(p.n, np.nan),
                                         where=p.upper > 0),
                "kkt_residual": np.asarray(res.certificate.kkt_residual, np.float64),
                "times_selected": sel if sel is not None else np.full(p.n, -1)}
        if labels and p.kind == "binary_classification":
            cols["label"] = np.where(p.y > 0, str(labels[1]), str(labels[0]))
        src = "the solver result"
        missing = "Explanation attachment not available: reasons, margins and slacks are not shown."
    traced = sel is not None
    placeholder = None if traced else not_traced(
        res.solver, res.trace.level if res.trace is not None else None)
    order = rank_points(cols, N_INFLUENTIAL)
    keys = [c for c in INFLUENTIAL_COLUMNS if c in cols]
    rows = []
    for k in order:
        rows.append(tuple(None if (placeholder and c in TRACE_COLUMNS)
                          else _plain(cols[c][k]) for c in keys))
    return (Table(columns=tuple(keys), rows=tuple(rows),
                  note=f"{len(rows)} support vectors from {src}, ordered as follows: "
                       f"{RANKING_RULE}.", blank=placeholder or ""), missing)


def _loo(
    rec: RunRecord, label: str
) -> tuple[Table | None, FigureData | None, str, dict[str, Any]]:
    """Leave-one-out scalars as a table (label, value, meaning) and, with per-point
    values, a figure.  Reads the ``leave_one_out`` attachment: the run's own or, as
    :func:`solver.api.report` passes it, that of a child record (``kept_as``)."""
    from ..vocabulary import LEAVE_ONE_OUT, meaning
    from ..vocabulary import label as term_label

    raw = rec.attachments.get("leave_one_out") if rec.attachments else None
    if raw is None:
        return None, None, ("Leave-one-out figures not available for this run: run "
                            "kktrace explain RUN_ID --leave-one-out to compute and store "
                            "them."), {}
    loo: dict[str, Any] = dict(_as_mapping(raw) or {})
    to_columns = getattr(raw, "to_columns", None)
    if callable(to_columns):
        loo.update(to_columns())
    per_point = loo.pop("per_point", None)
    if isinstance(per_point, Mapping):
        loo.update(per_point)
    if not loo:
        return None, None, "Leave-one-out figures not available for this run.", {}
    arrays = {str(k): np.asarray(v) for k, v in loo.items()
              if isinstance(v, (np.ndarray, list, tuple)) and np.asarray(v).ndim == 1
              and np.asarray(v).size > 20}
    facts = {str(k): _plain(v) for k, v in loo.items()
             if str(k) not in arrays and not isinstance(v, Mapping) and v is not None}
    scalars = [(term_label(k, LEAVE_ONE_OUT), v, meaning(k, LEAVE_ONE_OUT))
               for k, v in facts.items() if k not in ("kept_as", "kept_digest")]
    kept = loo.get("kept_as")
    where = (f"Stored in child record {kept} (manifest SHA-256 {loo.get('kept_digest')}), "
             "verified when this report was written." if kept
             else "Attached to this run.")
    table = Table(columns=("measure", "value", "meaning"), rows=tuple(scalars),
                  note=f"Leave-one-out figures for this run. {where}") if scalars else None
    fig = None
    values = arrays.get("loo_value", arrays.get("loo_values"))
    if values is not None and values.dtype.kind in "fiu" and "loo_wrong" in arrays:
        p = rec.problem
        rows = arrays.get("row_id", np.arange(values.size)).astype(np.float64)
        wrong = arrays["loo_wrong"].astype(bool)
        y = p.y if p.n == values.size else np.ones(values.size)
        fig = FigureData(
            key="loo", kind="loo", title=f"{label}: leave-one-out decision values",
            caption=("Signed decision value y·f₋ᵢ(xᵢ) of each training point under the model "
                     "trained without it; points below zero (marked) are leave-one-out "
                     f"errors ({int(wrong.sum())} of {values.size})."),
            data={"x": rows, "y": y * values.astype(np.float64), "wrong": wrong,
                  "xlabel": "index (0-based training row)"},
        )
    return table, fig, "", facts


# --------------------------------------------------------------------------- held-out, map


def _confusion(hold: Mapping[str, Any], labels: tuple | None) -> Table | None:
    cm = None
    for k in ("confusion_matrix", "confusion", "matrix"):
        if k in hold:
            cm = hold[k]
            break
    if cm is None:
        return None
    lab = None
    if isinstance(cm, Mapping):
        lab = cm.get("labels")
        cm = cm.get("matrix", cm.get("counts"))
    try:
        arr = np.asarray(cm, dtype=np.int64)
    except (TypeError, ValueError):
        return None
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1]:
        return None
    lab = lab or hold.get("labels") or (list(labels) if labels else list(range(arr.shape[0])))
    lab = [str(v) for v in lab][: arr.shape[0]]
    if len(lab) != arr.shape[0]:
        lab = [str(i) for i in range(arr.shape[0])]
    rows = tuple((f"actual {lab[r]}", *[int(v) for v in arr[r]]) for r in range(arr.shape[0]))
    return Table(columns=("", *[f"classified {v}" for v in lab]), rows=rows)


def _decision_map(rec: RunRecord, label: str, cats: np.ndarray) -> tuple[FigureData | None, str]:
    from ..kernels import PrecomputedKernel
    from ..model import model_from_solution

    p = rec.problem
    if isinstance(p.kernel, PrecomputedKernel):
        return None, "Decision map not available: the kernel is precomputed (no feature space)."
    if p.labels is None:
        return None, f"Decision map not available for problem kind {p.kind!r}."
    d = int(p.X.shape[1])
    if d < 2 or p.n < 3:
        return None, "Decision map not available: fewer than two features or three points."
    model = model_from_solution(p, rec.result, None)
    names = [str(v) for v in (rec.data.get("feature_names") or [])]
    std = rec.standardiser
    standardised = not bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    unit = " (standardised)" if standardised else ""
    X = p.X
    if d == 2:
        Z = X
        basis = None
        centre = np.zeros(2)
        xlabel = (names[0] if len(names) == 2 else "feature 1") + unit
        ylabel = (names[1] if len(names) == 2 else "feature 2") + unit
        how = "the two features"
    else:
        centre = X.mean(axis=0)
        _, s, vt = np.linalg.svd(X - centre, full_matrices=False)
        basis = vt[:2]
        Z = (X - centre) @ basis.T
        share = (s[:2] ** 2).sum() / max((s**2).sum(), np.finfo(float).tiny)
        xlabel, ylabel = "principal component 1" + unit, "principal component 2" + unit
        kind = unit.strip(" ()") or "raw"
        how = (f"a 2-D projection: the first two principal components of the {kind} "
               f"training rows ({100 * share:.1f} % of the variance); regions are the "
               "classifier on the plane through the data mean spanned by these components")
    lo, hi = Z.min(axis=0), Z.max(axis=0)
    pad = 0.06 * np.maximum(hi - lo, 1e-9)
    lo, hi = lo - pad, hi + pad
    g = 90 if model.support_rows.size <= 4000 else 60
    gx = np.linspace(lo[0], hi[0], g)
    gy = np.linspace(lo[1], hi[1], g)
    GX, GY = np.meshgrid(gx, gy)
    plane = np.column_stack((GX.ravel(), GY.ravel()))
    pts = plane if basis is None else centre + plane @ basis
    vals = model.values(pts, standardised=True).reshape(g, g)
    idx = np.arange(p.n)
    sampled = ""
    if p.n > MAP_POINTS:
        idx = np.sort(np.random.default_rng(0).choice(p.n, size=MAP_POINTS, replace=False))
        sampled = f" {MAP_POINTS} of {p.n} points drawn (seeded sample, seed 0)."
    neg, pos = p.labels
    return FigureData(
        key="decision_map", kind="regions", title=f"{label}: decision regions",
        caption=(f"Classifier regions over {how}. Shaded: classified {pos} (f > 0) or {neg}; "
                 "solid line f = 0, dotted lines f = ±1. Points are marked by their final "
                 f"category and coloured by label.{sampled}"),
        data={"gx": gx, "gy": gy, "values": vals, "z": Z[idx], "y": p.y[idx],
              "category": cats[idx], "xlabel": xlabel, "ylabel": ylabel,
              "labels": (str(neg), str(pos))},
    ), ""
