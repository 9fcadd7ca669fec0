"""Calibration evidence for binary probabilities: reliability bins, Brier score, log-loss,
expected calibration error, and the rows where probability and decision value disagree."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from ..errors import InvalidInputError

__all__ = ["calibration_evidence", "multiclass_evidence", "multiclass_report_part", "N_BINS",
           "LOG_CLIP"]

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


MULTICLASS_DISAGREEMENT_NOTE = (
    "The one-vs-one vote counts only the sign of each pair's decision value; the coupled "
    "probabilities weigh every pair's sigmoid, fitted on cross-validated values, so a class "
    "that wins fewer pairs narrowly can still be the most probable one (and a tie of votes, "
    "decided by the class order, is decided by the probabilities instead).")


def multiclass_evidence(P: np.ndarray, truth: np.ndarray, voted: np.ndarray, *,
                        n_bins: int = N_BINS) -> dict[str, Any]:
    """Evidence for class probabilities ``P`` (m, k) of rows with true class index ``truth``
    (m,) and voted class index ``voted`` (m,).

    Brier score = mean over rows of Σ_c (P_c − [y = c])² (Brier 1950, the multi-category
    form, range [0, 2]); log-loss = −mean log P_y (P clipped to [LOG_CLIP, 1]); the
    reliability bins are of the top probability max_c P_c against the share of rows whose
    most probable class is the true one (``n_bins`` equal-width bins on [0, 1], the last
    includes 1); ``disagreements`` counts rows whose most probable class differs from the
    voted class.
    """
    P = np.asarray(P, dtype=np.float64)
    t = np.asarray(truth).reshape(-1)
    v = np.asarray(voted).reshape(-1)
    if (P.ndim != 2 or P.shape[0] == 0 or t.shape != (P.shape[0],) or v.shape != t.shape
            or t.dtype.kind not in "iu" or v.dtype.kind not in "iu"
            or np.any((t < 0) | (t >= P.shape[1]))):
        raise InvalidInputError("multi-class evidence needs non-empty (m, k) probabilities and "
                                "m true and voted class indices in 0 … k−1")
    m = P.shape[0]
    onehot = np.zeros_like(P)
    onehot[np.arange(m), t] = 1.0
    brier = float(np.mean(np.sum((P - onehot) ** 2, axis=1)))
    log_loss = float(-np.mean(np.log(np.maximum(P[np.arange(m), t], LOG_CLIP))))
    top = np.argmax(P, axis=1)
    conf = P[np.arange(m), top]
    hit = (top == t).astype(np.float64)
    idx = np.minimum((conf * n_bins).astype(np.int64), n_bins - 1)
    bins, ece = [], 0.0
    for b in range(n_bins):
        sel = idx == b
        cnt = int(np.sum(sel))
        mean_p = float(np.mean(conf[sel])) if cnt else math.nan
        freq = float(np.mean(hit[sel])) if cnt else math.nan
        if cnt:
            ece += cnt / m * abs(freq - mean_p)
        bins.append({"low": b / n_bins, "high": (b + 1) / n_bins, "rows": cnt,
                     "mean_probability": mean_p, "observed_frequency": freq})
    disagree = top != v
    return {
        "rows": int(m),
        "classes": int(P.shape[1]),
        "brier_score": brier,
        "log_loss": log_loss,
        "expected_calibration_error": float(ece),
        "binning": f"{n_bins} equal-width bins of the top class probability on [0, 1]; the "
                   "last bin includes 1; observed frequency = share of rows whose most "
                   "probable class is the true class; ECE weights each bin by its share of rows",
        "bins": bins,
        "disagreements": int(np.sum(disagree)),
        "disagreement_rows": np.flatnonzero(disagree).astype(np.int64),
        "disagreement_note": MULTICLASS_DISAGREEMENT_NOTE,
        "definitions": {
            "brier_score": "mean over rows of sum over classes of (P(class) - [true class])^2",
            "log_loss": f"-mean of log P(true class), P clipped below at {LOG_CLIP:g}",
        },
    }


def multiclass_report_part(att: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """Plain-data facts, tables and figures about a multi-class model's probabilities, from
    its parent's ``calibration`` attachment (None without one), for the task's report
    section: the coupling method, every pair's sigmoid, and on held-out rows the Brier
    score, log-loss, ECE with its binning, the top-class reliability bins and figure, and
    the rows whose most probable class differs from the voted class."""
    if not att:
        return None
    facts: list[tuple[str, Any]] = [
        ("probabilities", att.get("status")), ("probability message", att.get("message")),
        ("probability method", att.get("coupling"))]
    pairs = att.get("pairs") or []
    tables = [{"columns": ["pair", "positive", "sigmoid status", "A", "B", "folds", "seed",
                           "Newton steps", "gradient norm"],
               "rows": [(" vs ".join(p["pair"]), p["positive"], p.get("status"), p.get("A"),
                         p.get("B"), p.get("n_folds"), p.get("seed"), p.get("newton_steps"),
                         p.get("gradient_norm")) for p in pairs],
               "note": "Every pair's Platt sigmoid P(positive | f) = 1 / (1 + exp(A f + B)), "
                       "fitted on that pair's cross-validated decision values."}]
    figures: list[dict[str, Any]] = []
    ev = att.get("holdout")
    if not ev:
        facts.append(("probability evidence", "not available: no held-out data were scored; "
                      "each pair's page gives its evidence on cross-validated values"))
        return {"facts": facts, "tables": tables, "figures": figures}
    facts += [("probability evidence on", f"held-out rows ({ev.get('source') or 'given data'})"),
              ("rows", ev["rows"]), ("Brier score (multi-class)", ev["brier_score"]),
              ("log-loss", ev["log_loss"]),
              ("expected calibration error (top class)", ev["expected_calibration_error"]),
              ("binning", ev["binning"]),
              ("rows where the most probable class differs from the voted class",
               ev["disagreements"]),
              ("why they can differ", ev["disagreement_note"])]
    bins = ev["bins"]
    tables.append({"columns": ["top-probability bin", "rows", "mean top probability",
                               "share most probable = true"],
                   "rows": [(f"{b['low']:.1f}–{b['high']:.1f}", b["rows"],
                             b["mean_probability"], b["observed_frequency"]) for b in bins],
                   "note": f"Reliability bins: {ev['binning']}."})
    occupied = [b for b in bins if b["rows"]]
    figures.append({
        "key": "probability_reliability", "kind": "reliability",
        "title": "Reliability of the top class probability",
        "caption": (f"Share of held-out rows whose most probable class is the true class "
                    f"against the mean top probability in each bin ({ev['binning']}); the "
                    "diagonal is perfect calibration; the bars give the rows in each bin."),
        "data": {"low": [b["low"] for b in bins], "high": [b["high"] for b in bins],
                 "rows": [b["rows"] for b in bins],
                 "mean": [b["mean_probability"] for b in occupied],
                 "observed": [b["observed_frequency"] for b in occupied],
                 "occupied_rows": [b["rows"] for b in occupied],
                 "ylabel": "share correct", "xlabel": "top class probability"}})
    return {"facts": facts, "tables": tables, "figures": figures}
