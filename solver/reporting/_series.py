"""Plot-ready series from stored traces: min/max downsampling and replay of SMO multipliers.

Nothing here modifies its inputs; every function returns new arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["minmax_downsample", "bucket_envelope", "Replay", "replay_pairs", "thin_events"]


def minmax_downsample(
    x: np.ndarray, y: np.ndarray, max_points: int = 2000
) -> tuple[np.ndarray, np.ndarray]:
    """At most ``max_points`` (x, y) points that keep every bucket's minimum and maximum.

    The series is cut into ``max_points // 2`` buckets of consecutive points; each bucket
    contributes its smallest and its largest y, in their original order, so single-iteration
    spikes stay visible when the line is drawn.  Non-finite y values are dropped first.
    ``x`` must be non-decreasing.  Inputs are not modified.
    """
    x = np.asarray(x)
    y = np.asarray(y, dtype=np.float64)
    keep = np.isfinite(y)
    if not np.all(keep):
        x, y = x[keep], y[keep]
    n = y.shape[0]
    if n <= max_points:
        return x.astype(np.float64, copy=True), y.copy()
    buckets = max(1, max_points // 2)
    starts = np.linspace(0, n, buckets + 1).astype(np.int64)[:-1]
    starts = np.unique(starts)
    lo = np.minimum.reduceat(y, starts)
    hi = np.maximum.reduceat(y, starts)
    # positions of the min and max inside each bucket: first index where y equals the extreme
    bucket_of = np.repeat(np.arange(starts.size), np.diff(np.append(starts, n)))
    pos = np.arange(n)
    big = n + 1
    at_lo = np.where(y == lo[bucket_of], pos, big)
    at_hi = np.where(y == hi[bucket_of], pos, big)
    i_lo = np.minimum.reduceat(at_lo, starts)
    i_hi = np.minimum.reduceat(at_hi, starts)
    first = np.minimum(i_lo, i_hi)
    second = np.maximum(i_lo, i_hi)
    idx = np.empty(2 * starts.size, dtype=np.int64)
    idx[0::2] = first
    idx[1::2] = second
    idx = np.unique(np.concatenate(([0], idx, [n - 1])))
    return x[idx].astype(np.float64), y[idx].copy()


def bucket_envelope(
    x: np.ndarray, y: np.ndarray, buckets: int = 200
) -> dict[str, list[float]]:
    """Per-bucket first x, minimum y and maximum y (plain lists) for JSON summaries."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    keep = np.isfinite(y)
    x, y = x[keep], y[keep]
    n = y.shape[0]
    if n == 0:
        return {"iteration": [], "low": [], "high": []}
    starts = np.unique(np.linspace(0, n, min(buckets, n) + 1).astype(np.int64)[:-1])
    return {
        "iteration": x[starts].tolist(),
        "low": np.minimum.reduceat(y, starts).tolist(),
        "high": np.maximum.reduceat(y, starts).tolist(),
    }


def thin_events(
    iterations: np.ndarray, span: tuple[float, float], max_marks: int = 400
) -> np.ndarray:
    """Event iterations to draw: all of them, or one per occupied bucket when there are many."""
    it = np.asarray(iterations, dtype=np.float64)
    if it.size <= max_marks:
        return it.copy()
    lo, hi = span
    width = (hi - lo) / max_marks if hi > lo else 1.0
    b = np.floor((it - lo) / width)
    _, first = np.unique(b, return_index=True)
    return it[np.sort(first)]


@dataclass(frozen=True, eq=False)
class Replay:
    """Multipliers rebuilt from a full SMO trace (every iteration recorded).

    iterations : (R + 1,) iteration numbers, starting with 0 for the start point.
    support_size : (R + 1,) number of αᵢ above their lower bound after each iteration.
    total_change : (n,) Σ |Δαᵢ| over the run.
    final_alpha : (n,) α after the last recorded iteration.
    order_idx, order_iter, order_val : every assignment sorted by point, then time.
    alpha0 : (n,) start point.
    """

    iterations: np.ndarray
    support_size: np.ndarray
    total_change: np.ndarray
    final_alpha: np.ndarray
    order_idx: np.ndarray
    order_iter: np.ndarray
    order_val: np.ndarray
    alpha0: np.ndarray

    def trajectory(self, point: int) -> tuple[np.ndarray, np.ndarray]:
        """(iterations, α values) of one point as a step series starting at iteration 0."""
        lo = np.searchsorted(self.order_idx, point, side="left")
        hi = np.searchsorted(self.order_idx, point, side="right")
        it = np.concatenate(([0.0], self.order_iter[lo:hi].astype(np.float64)))
        val = np.concatenate(([self.alpha0[point]], self.order_val[lo:hi]))
        return it, val


def replay_pairs(
    iteration: np.ndarray,
    i: np.ndarray,
    j: np.ndarray,
    alpha_i: np.ndarray,
    alpha_j: np.ndarray,
    alpha0: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    *,
    bound_tol: float = 1e-8,
) -> Replay:
    """Replay pair updates (row k sets α[i[k]] = alpha_i[k], α[j[k]] = alpha_j[k]).

    Vectorised: assignments are sorted by (point, time) so each one's previous value is the
    preceding assignment to the same point (or the start value).  Support membership uses
    the certificate's rule αᵢ > lᵢ + bound_tol·(uᵢ − lᵢ) (see :mod:`solver.certificate`).
    """
    r = int(np.asarray(iteration).shape[0])
    n = int(alpha0.shape[0])
    idx = np.concatenate((np.asarray(i, dtype=np.int64), np.asarray(j, dtype=np.int64)))
    val = np.concatenate((np.asarray(alpha_i, dtype=np.float64), np.asarray(alpha_j, np.float64)))
    seq = np.concatenate((2 * np.arange(r, dtype=np.int64), 2 * np.arange(r, dtype=np.int64) + 1))
    if idx.size and (idx.min() < 0 or idx.max() >= n):
        raise ValueError("trace working-set index outside 0..n-1")
    order = np.lexsort((seq, idx))
    s_idx, s_val, s_seq = idx[order], val[order], seq[order]
    prev = np.empty_like(s_val)
    if s_val.size:
        prev[0] = alpha0[s_idx[0]]
        same = s_idx[1:] == s_idx[:-1]
        prev[1:] = np.where(same, s_val[:-1], alpha0[s_idx[1:]])
    thresh = lower + bound_tol * np.maximum(upper - lower, 0.0)
    is_sv_new = s_val > thresh[s_idx]
    is_sv_old = prev > thresh[s_idx]
    delta_sorted = is_sv_new.astype(np.int64) - is_sv_old.astype(np.int64)
    per_row = np.zeros(r, dtype=np.int64)
    np.add.at(per_row, s_seq // 2, delta_sorted)
    start_count = int(np.sum(alpha0 > thresh))
    support = np.concatenate(([start_count], start_count + np.cumsum(per_row)))
    total_change = np.bincount(s_idx, weights=np.abs(s_val - prev), minlength=n)
    final = np.array(alpha0, dtype=np.float64, copy=True)
    if s_val.size:
        last = np.ones(s_idx.size, dtype=bool)
        last[:-1] = s_idx[1:] != s_idx[:-1]
        final[s_idx[last]] = s_val[last]
    its = np.asarray(iteration, dtype=np.int64)
    return Replay(
        iterations=np.concatenate(([0], its)),
        support_size=support,
        total_change=total_change,
        final_alpha=final,
        order_idx=s_idx,
        order_iter=its[s_seq // 2],
        order_val=s_val,
        alpha0=np.array(alpha0, dtype=np.float64, copy=True),
    )
