"""Convergence of several runs of one problem, side by side (plot-ready plain data).

For each run: the best maximal violation so far (SMO; the interior-point relative gap for
QP runs, which have no violation column) and the objective gap D_k − D* relative to
max(1, |D*|), where D* is the lowest final dual objective among the runs rebuilt from
their α — against iterations and against seconds.  Traces record no per-iteration time,
so the seconds axis places iteration k at setup + k × (loop seconds / iterations): an
estimate at the run's average rate, said so in the caption.  No files are read here.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..run import RunRecord

__all__ = ["overlay_series", "OVERLAY_POINTS"]

#: points per curve (evenly spaced rows of the trace, the last row always kept)
OVERLAY_POINTS = 1500

SECONDS_NOTE = ("seconds are estimated: a trace records no per-iteration time, so iteration k "
                "is placed at setup + k × (loop seconds / iterations) of its run")


def _pick(rows: int) -> np.ndarray:
    return np.unique(np.linspace(0, rows - 1, min(rows, OVERLAY_POINTS)).astype(np.int64))


def overlay_series(records: Sequence[RunRecord], labels: Sequence[str] | None = None,
                   *, allow_mismatch: bool = False) -> dict[str, Any]:
    """Plot-ready data for the overlay of ``records`` (two or more runs of one problem).

    Runs of different problems are refused (InvalidInputError naming the differences)
    unless ``allow_mismatch``; runs without trace rows are listed in ``without_trace``.
    """
    from ..agreement import problem_differences

    recs = list(records)
    if len(recs) < 2:
        raise InvalidInputError("an overlay needs at least two runs")
    labels = list(labels) if labels is not None else [r.run_id or f"run {k + 1}"
                                                      for k, r in enumerate(recs)]
    diffs = [d for r in recs[1:] for d in problem_differences(recs[0].problem, r.problem,
                                                             recs[0].data, r.data)]
    if diffs and not allow_mismatch:
        raise InvalidInputError("the runs solve different problems, so their convergence "
                                "cannot be overlaid: " + "; ".join(sorted(set(diffs))))
    best = min(r.problem.objective(np.asarray(r.result.alpha)) for r in recs)
    scale = max(1.0, abs(best))
    runs, without = [], []
    for label, rec in zip(labels, recs, strict=True):
        res, tr = rec.result, rec.result.trace
        if tr is None or tr.n_rows == 0:
            without.append(label)
            continue
        cols = tr.columns
        k = _pick(tr.n_rows)
        it = np.asarray(cols["iteration"], dtype=np.float64)
        if "violation" in cols:
            v = np.minimum.accumulate(np.asarray(cols["violation"], dtype=np.float64))
            measure, values = "best maximal violation so far", np.asarray(cols["objective"])
        else:
            v = np.asarray(cols.get("relative_gap", np.full(it.size, np.nan)), np.float64)
            measure, values = "relative gap (interior point)", np.asarray(cols["primal_objective"])
        extra = res.extra or {}
        loop = float(extra.get("solve_seconds", res.seconds))
        setup = float(extra.get("setup_seconds", 0.0) or 0.0)
        rate = loop / max(int(res.iterations), 1)
        gap = (np.asarray(values, dtype=np.float64) - best) / scale
        runs.append({"label": label, "run_id": rec.run_id, "solver": res.solver,
                     "status": res.status.label, "measure": measure,
                     "iterations": it[k].tolist(), "seconds": (setup + it[k] * rate).tolist(),
                     "violation": v[k].tolist(), "objective_gap": gap[k].tolist(),
                     "kkt_tol": float(res.certificate.kkt_tol)})
    return {"runs": runs, "without_trace": without, "best_objective": float(best),
            "objective_scale": scale, "seconds_note": SECONDS_NOTE,
            "mismatch": sorted(set(diffs))}
