"""Facts about ε-regression and one-class solutions: held-out measures and the ν-property.

Pure functions on arrays (no I/O); every function returns plain data (floats, ints, lists)
ready for a manifest, a report or ``--json`` output.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .problem import ONE_CLASS_KIND, DualProblem

__all__ = ["regression_measures", "novelty_measures", "nu_property", "INLIER_RULE"]

#: how a signed one-class score becomes a flag (the sign convention of Schölkopf et al. 2001)
INLIER_RULE = "inlier where the score f(x) >= 0, outlier where f(x) < 0"


def _vector(a: Any, name: str) -> np.ndarray:
    v = np.asarray(a, dtype=np.float64).reshape(-1)
    if not np.all(np.isfinite(v)):
        raise InvalidInputError(f"{name} has a non-finite value")
    return v


def regression_measures(target: Any, prediction: Any, *, epsilon: float) -> dict[str, Any]:
    """RMSE, MAE, R² and ε-tube coverage of predictions (target units).

    RMSE = √(mean (t − f)²), MAE = mean |t − f|, R² = 1 − Σ(t − f)² / Σ(t − t̄)² (the
    coefficient of determination, common practice; ``None`` when the target is constant),
    coverage = share of rows with |t − f| ≤ ε.
    """
    t, f = _vector(target, "target"), _vector(prediction, "prediction")
    if t.shape != f.shape or t.size == 0:
        raise InvalidInputError(f"target and prediction must have the same non-zero length, "
                                f"got {t.size} and {f.size}")
    r = t - f
    ss_tot = float(np.sum((t - t.mean()) ** 2))
    return {
        "n": int(t.size),
        "rmse": float(math.sqrt(np.mean(r**2))),
        "mae": float(np.mean(np.abs(r))),
        "r2": (1.0 - float(np.sum(r**2)) / ss_tot) if ss_tot > 0 else None,
        "epsilon": float(epsilon),
        "tube_coverage": float(np.mean(np.abs(r) <= epsilon)),
        "max_abs_residual": float(np.max(np.abs(r))),
    }


def novelty_measures(score: Any, known_outlier: Any | None = None) -> dict[str, Any]:
    """Share flagged as outliers and, given a known-outlier column, the confusion against it.

    ``known_outlier`` (m,) holds True (or 1) for rows known to be unusual.  The confusion
    counts rows by (known, flagged): ``flagged_known`` (true positives), ``flagged_unknown``
    (false alarms), ``missed`` and ``passed``; detection rate = flagged_known / known.
    """
    s = _vector(score, "score")
    flagged = s < 0
    out: dict[str, Any] = {"n": int(s.size), "rule": INLIER_RULE,
                           "n_flagged": int(flagged.sum()),
                           "share_flagged": float(flagged.mean()) if s.size else 0.0}
    if known_outlier is not None:
        k = np.asarray(known_outlier).reshape(-1)
        if k.shape != s.shape:
            raise InvalidInputError(f"the known-outlier column has {k.size} rows, the scores "
                                    f"{s.size}")
        k = k.astype(bool)
        tp, fp = int(np.sum(flagged & k)), int(np.sum(flagged & ~k))
        fn, tn = int(np.sum(~flagged & k)), int(np.sum(~flagged & ~k))
        out["confusion"] = {"flagged_known": tp, "flagged_unknown": fp, "missed": fn,
                            "passed": tn}
        out["detection_rate"] = tp / (tp + fn) if tp + fn else None
        out["false_alarm_rate"] = fp / (fp + tn) if fp + tn else None
    return out


def nu_property(problem: DualProblem, alpha: Any, decision: Any, *,
                kkt_tol: float) -> dict[str, Any]:
    """Check outlier share ≤ ν ≤ support-vector share on a solved one-class problem.

    Schölkopf et al. (2001), Neural Computation 13, Proposition 4: ν is an upper bound on
    the fraction of outliers and a lower bound on the fraction of support vectors.  Here a
    training point is an outlier when its score f(xᵢ) < −kkt_tol (a point with
    −kkt_tol ≤ f < 0 may sit on the boundary within the stopping tolerance, since a
    run stopped at maximal violation ≤ kkt_tol leaves |f| ≤ kkt_tol on free points) and a
    support vector when αᵢ > 1e-8 (the certificate's bound tolerance times u = 1).  Shares
    are compared with a slack of 1e-9.
    """
    if problem.kind != ONE_CLASS_KIND:
        raise InvalidInputError(f"the ν-property applies to one-class problems, not "
                                f"{problem.kind!r}")
    a, f = _vector(alpha, "alpha"), _vector(decision, "decision")
    n = problem.n
    nu = float(problem.info["nu"])
    out_share = float(np.sum(f < -kkt_tol)) / n
    sv_share = float(np.sum(a > 1e-8 * (problem.upper - problem.lower))) / n
    holds = bool(out_share <= nu + 1e-9 and sv_share >= nu - 1e-9)
    return {
        "nu": nu, "outlier_share": out_share, "support_share": sv_share,
        "strict_outlier_share": float(np.sum(f < 0)) / n, "holds": holds,
        "outlier_rule": f"score < -{kkt_tol:g} (kkt_tol)",
        "statement": "outlier share <= nu <= support-vector share "
                     "(Schölkopf et al. 2001, Proposition 4)",
    }
