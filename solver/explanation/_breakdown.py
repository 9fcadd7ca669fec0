"""Decision breakdown: f(x) = Σₛ cₛK(xₛ, x) + b split into its largest terms and a remainder."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InvalidInputError
from ..model import Model

__all__ = ["Breakdown", "breakdown"]

#: Kernel block size budget (entries) per batch of queries: 4M float64 = 32 MiB.
_BLOCK_ENTRIES = 1 << 22


@dataclass(frozen=True, eq=False)
class Breakdown:
    """Per query row q (m queries, t = min(top, number of support vectors)):

    ``values`` (m,) f(x_q) computed as one kernel block times the coefficients plus b;
    ``bias`` b; ``top_rows`` (m, t) int64 training row ids of the t support vectors with
    the largest |contribution| (ties: smaller row id first); ``top_contributions`` (m, t)
    their contributions αᵢyᵢK(xᵢ, x_q); ``top_shares`` (m, t) |contribution| / Σ|contribution|;
    ``remainder`` (m,) sum of all other contributions; ``remainder_share`` (m,) their
    share of Σ|contribution|; ``total_abs`` (m,) Σ|contribution| over all support vectors.
    Identity: ``top_contributions.sum(1) + remainder + bias == values`` up to rounding.
    ``labels`` (negative, positive): the label values of a classification model (f > 0
    gives the positive one, f <= 0 the negative one); None for other models.
    """

    values: np.ndarray
    bias: float
    top_rows: np.ndarray
    top_contributions: np.ndarray
    top_shares: np.ndarray
    remainder: np.ndarray
    remainder_share: np.ndarray
    total_abs: np.ndarray
    n_support: int
    labels: tuple | None = None

    @property
    def n_queries(self) -> int:
        """Number of query rows m."""
        return int(self.values.shape[0])

    def reconstruction_error(self) -> np.ndarray:
        """|Σ top + remainder + b − f| / (Σ|contribution| + |b|) per query, shape ``(m,)``."""
        parts = self.top_contributions.sum(axis=1) + self.remainder + self.bias
        scale = np.maximum(self.total_abs + abs(self.bias), np.finfo(float).tiny)
        return np.abs(parts - self.values) / scale

    def to_columns(self) -> dict[str, np.ndarray]:
        """Long format, one row per (query, rank) plus a rank-0 row for the remainder.

        Columns ``query`` (0-based), ``rank`` (1 = largest; 0 = remainder of the others),
        ``row_id`` (−1 for the remainder), ``contribution``, ``share``, ``value`` (f of the query).
        """
        m, t = self.top_rows.shape
        q = np.repeat(np.arange(m, dtype=np.int64), t + 1)
        rank = np.tile(np.arange(t + 1, dtype=np.int64), m)
        rows = np.hstack([self.top_rows, np.full((m, 1), -1, np.int64)])
        contrib = np.hstack([self.top_contributions, self.remainder[:, None]])
        share = np.hstack([self.top_shares, self.remainder_share[:, None]])
        # remainder row listed last per query but labelled rank 0
        rank = np.where(rank == t, 0, rank + 1)
        return {"query": q, "rank": rank, "row_id": rows.reshape(-1),
                "contribution": contrib.reshape(-1), "share": share.reshape(-1),
                "value": np.repeat(self.values, t + 1)}


def breakdown(
    model: Model, X_query: np.ndarray, *, top: int = 5, standardised: bool = False
) -> Breakdown:
    """Split f(x) for each row of ``X_query`` (m, d) into its top-``top`` support-vector terms.

    Parameters
    ----------
    model : the trained :class:`~solver.model.Model`.
    X_query : (m, d) query rows in raw units (or standardised units with ``standardised``).
    top : number of largest |contribution| terms listed per query (≥ 1).

    Notes
    -----
    Contribution of support vector s to query x: cₛ = αₛyₛK(xₛ, x); f(x) = Σₛ cₛ + b.
    Queries are processed in batches with one kernel block (BLAS) per batch.
    """
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 1:
        raise InvalidInputError(f"top must be an integer >= 1, got {top!r}")
    Xq = np.asarray(X_query, dtype=np.float64)
    if Xq.ndim == 1:
        Xq = Xq[None, :]
    if Xq.ndim != 2:
        raise InvalidInputError(f"query rows must be 2-D (rows, features), got shape {Xq.shape}")
    if not np.all(np.isfinite(Xq)):
        r, c = np.argwhere(~np.isfinite(Xq))[0]
        raise InvalidInputError(f"query row {r} (0-based), column {c} is not a finite number")
    Z = Xq if standardised else model.standardiser.transform(Xq)
    if Z.shape[1] != model.support_points.shape[1]:
        raise InvalidInputError(
            f"query rows have {Z.shape[1]} columns, the model expects "
            f"{model.support_points.shape[1]}"
        )
    coef = np.asarray(model.coefficients, dtype=np.float64)
    svrows = np.asarray(model.support_rows, dtype=np.int64)
    k, m = coef.shape[0], Z.shape[0]
    t = min(int(top), k)
    values = np.empty(m)
    top_rows = np.empty((m, t), np.int64)
    top_c = np.empty((m, t))
    rem = np.empty(m)
    total = np.empty(m)
    rest_abs = np.empty(m)
    step = max(1, _BLOCK_ENTRIES // max(k, 1))
    for s in range(0, m, step):
        e = min(m, s + step)
        K = model.kernel.block(Z[s:e], model.support_points) if k else np.zeros((e - s, 0))
        values[s:e] = K @ coef + model.bias  # BLAS matrix-vector product
        C = K * coef[None, :]
        A = np.abs(C)
        total[s:e] = A.sum(axis=1)
        idx = _top_indices(A, t)
        sel = np.take_along_axis(C, idx, axis=1)
        top_c[s:e] = sel
        top_rows[s:e] = svrows[idx]
        np.put_along_axis(C, idx, 0.0, axis=1)
        rem[s:e] = C.sum(axis=1)
        np.put_along_axis(A, idx, 0.0, axis=1)
        rest_abs[s:e] = A.sum(axis=1)
    denom = np.where(total > 0, total, 1.0)
    return Breakdown(
        values=values, bias=float(model.bias), top_rows=top_rows, top_contributions=top_c,
        top_shares=np.abs(top_c) / denom[:, None], remainder=rem,
        remainder_share=rest_abs / denom, total_abs=total, n_support=int(k),
        labels=None if model.labels is None else tuple(model.labels),
    )


def _top_indices(A: np.ndarray, t: int) -> np.ndarray:
    """Column indices (rows of A, t each) of the t largest entries, descending, ties by index."""
    r, k = A.shape
    if t == 0:
        return np.zeros((r, 0), np.intp)
    if k > 4 * t:
        cand = np.argpartition(-A, t - 1, axis=1)[:, :t]
        cand.sort(axis=1)  # stable tie order by column before the value sort
    else:
        cand = np.broadcast_to(np.arange(k), (r, k)).copy()
    vals = np.take_along_axis(A, cand, axis=1)
    order = np.argsort(-vals, axis=1, kind="stable")
    return np.take_along_axis(cand, order, axis=1)[:, :t]
