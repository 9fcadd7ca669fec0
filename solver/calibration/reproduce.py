"""Reading a run's calibration, and re-fitting it to check that it reproduces bitwise."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..problem import DualProblem
from .crossval import ATTACHMENT, Calibration, calibrate, usable_calibration

__all__ = ["run_calibration", "recalibrate", "recalibrate_pairs"]


def run_calibration(record: Any) -> Calibration:
    """The usable :class:`Calibration` of a stored run, or a clear error saying why not."""
    return usable_calibration((record.attachments or {}).get(ATTACHMENT),
                              f"run {record.run_id}")


def _same(a: Any, b: Any) -> bool:
    a, b = np.ascontiguousarray(a), np.ascontiguousarray(b)
    return a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == b.tobytes()


def recalibrate(stored: Mapping[str, Any], problem: DualProblem) -> dict[str, Any]:
    """Fit the calibration again on ``problem`` with the recorded folds, seed and solver
    options, and compare folds, cross-validated values, A and B bit for bit."""
    old = Calibration.from_attachment(stored)
    opts = dict(old.solver_options)
    new = calibrate(problem, n_folds=old.n_folds, seed=old.seed, solver=old.solver,
                    kkt_tol=float(opts.get("kkt_tol", 1e-3)),
                    iteration_limit=opts.get("iteration_limit"))
    same = {
        "folds": _same(new.folds, old.folds),
        "cv_values": _same(new.cv_values, old.cv_values),
        "A": _same(np.float64(new.A), np.float64(old.A)),
        "B": _same(np.float64(new.B), np.float64(old.B)),
        "status": new.status == old.status,
    }
    diff = (float(np.max(np.abs(new.cv_values - old.cv_values)))
            if new.cv_values.shape == old.cv_values.shape else float("inf"))
    return {"agreement": "bitwise" if all(same.values()) else "different",
            "identical": same, "max_cv_value_difference": diff,
            "A": [old.A, new.A], "B": [old.B, new.B], "status": [old.status.label,
                                                                 new.status.label],
            "n_folds": old.n_folds, "seed": old.seed}


def recalibrate_pairs(pairs: Sequence[tuple[Sequence[str], Mapping[str, Any] | None,
                                            DualProblem]]) -> dict[str, Any] | None:
    """:func:`recalibrate` for every pair of a multi-class model: ``pairs`` holds (key,
    stored calibration attachment or None, re-run problem) per pair.  None when no pair
    carries a calibration; ``agreement`` is ``bitwise`` only when every pair's is."""
    out = []
    for key, att, problem in pairs:
        if att is None:
            continue
        r = recalibrate(att, problem)
        out.append({"pair": [str(v) for v in key], **r})
    if not out:
        return None
    bitwise = len(out) == len(pairs) and all(r["agreement"] == "bitwise" for r in out)
    return {"agreement": "bitwise" if bitwise else "different", "pairs": out,
            "n_folds": out[0]["n_folds"], "seed": out[0]["seed"],
            "max_cv_value_difference": max(r["max_cv_value_difference"] for r in out)}
