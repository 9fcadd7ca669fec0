"""Calibration evidence for binary probabilities: reliability bins, Brier score, log-loss,
expected calibration error, and the rows where probability and decision value disagree."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import InvalidInputError

__all__ = ["calibration_evidence", "N_BINS", "LOG_CLIP"]

#: Reliability bins: equal width over [0, 1] of P(positive), ten bins (common practice).
N_BINS = 10
#: Probabilities are clipped to [LOG_CLIP, 1 − LOG_CLIP] inside the log-loss only (common
#: practice; a sigmoid value can round to exactly 0 or 1 in float64 for |A f + B| > 37).
LOG_CLIP = 1e-15

DISAGREEMENT_NOTE = (
    "The decision value picks the positive class where f > 0; the probability picks it "
    "where P(positive) > 1/2, i.e. where f > -B/A. The sigmoid was fitted on cross-validated "
    "values of fits that each saw only part of the data, and its offset B also absorbs the "
    "class balance, so its midpoint -B/A is in general not 0: rows with f between 0 and "
    "-B/A get one class from the decision value and the other from the probability.")


def calibration_evidence(p_positive: np.ndarray, positive: np.ndarray, values: np.ndarray,
                         *, n_bins: int = N_BINS) -> dict[str, Any]:
    """Evidence for probabilities ``p_positive`` (m,) of rows with true class ``positive``.

    Brier score = mean (p − y)², y ∈ {0, 1} (Brier 1950); log-loss = −mean[y log p +
    (1 − y) log(1 − p)]; ECE = Σ_b (n_b / m) |ȳ_b − p̄_b| over ``n_bins`` equal-width bins of
    p on [0, 1] (bin b holds b/n_bins ≤ p < (b+1)/n_bins, the last bin includes 1).
    ``disagreements`` counts rows where the most probable class (p > ½) differs from the
    decision-value class (f > 0).
    """
    p = np.asarray(p_positive, dtype=np.float64).reshape(-1)
    y = np.asarray(positive).reshape(-1)
    f = np.asarray(values, dtype=np.float64).reshape(-1)
    if y.dtype != bool or not (p.shape == y.shape == f.shape) or p.size == 0:
        raise InvalidInputError("calibration evidence needs equal-length, non-empty "
                                "probabilities, boolean classes and decision values")
    yf = y.astype(np.float64)
    pc = np.clip(p, LOG_CLIP, 1.0 - LOG_CLIP)
    brier = float(np.mean((p - yf) ** 2))
    log_loss = float(-np.mean(yf * np.log(pc) + (1.0 - yf) * np.log1p(-pc)))
    idx = np.minimum((p * n_bins).astype(np.int64), n_bins - 1)
    bins = []
    ece = 0.0
    for b in range(n_bins):
        sel = idx == b
        cnt = int(np.sum(sel))
        mean_p = float(np.mean(p[sel])) if cnt else math.nan
        freq = float(np.mean(yf[sel])) if cnt else math.nan
        if cnt:
            ece += cnt / p.size * abs(freq - mean_p)
        bins.append({"low": b / n_bins, "high": (b + 1) / n_bins, "rows": cnt,
                     "mean_probability": mean_p, "observed_frequency": freq})
    by_prob = p > 0.5
    by_value = f > 0
    disagree = by_prob != by_value
    return {
        "rows": int(p.size),
        "brier_score": brier,
        "log_loss": log_loss,
        "expected_calibration_error": float(ece),
        "binning": f"{n_bins} equal-width bins of P(positive) on [0, 1]; the last bin "
                   "includes 1; ECE weights each bin by its share of rows",
        "bins": bins,
        "disagreements": int(np.sum(disagree)),
        "disagreement_rows": np.flatnonzero(disagree).astype(np.int64),
        "disagreement_note": DISAGREEMENT_NOTE,
        "definitions": {
            "brier_score": "mean of (P(positive) - y)^2, y = 1 for the positive class else 0",
            "log_loss": f"-mean of y log p + (1 - y) log(1 - p), p clipped to "
                        f"[{LOG_CLIP:g}, 1 - {LOG_CLIP:g}]",
        },
    }
