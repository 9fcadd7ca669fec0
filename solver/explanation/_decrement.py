"""Decremental unlearning: follow the solution while one multiplier is lowered to its bound.

Cauwenberghs & Poggio (2001), "Incremental and decremental support vector machine
learning", NIPS 13 (from memory; exact leave-one-out is their stated use).  With
sᵢ = Gᵢ + b yᵢ (for classification the margin yᵢf(xᵢ) − 1), the optimality conditions
(see :mod:`solver.problem`) keep sₛ = 0 on the free set S, s ≥ 0 at the lower and s ≤ 0
at the upper bound.  Lowering α_c by t while S stays on the margin and yᵀα = Δ holds is
linear in t:

    [0   y_Sᵀ ] [Δb  ]   [ y_c  ]
    [y_S Q_SS ] [Δα_S] = [ Q_Sc ]      per unit t,   Δs = Q_{·S}Δα_S − Q_{·c} + y Δb.

The step runs to the first event — a free multiplier reaching a bound (it leaves S) or a
bounded point's s reaching 0 (it joins S) — the sets are updated and the next segment
starts, until α_c reaches its lower bound.  The result is checked by the caller with the
certificate; on any difficulty (empty free set, singular system, too many events) the
path gives up and the caller falls back to the solver.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..certificate import DEFAULT_BOUND_TOL
from ..problem import DualProblem
from ._path_kernel import PATH_COMPLETE, PATH_FAILED, path_run

__all__ = ["WORK_FACTOR", "decremental_path"]

_EPS = 1e-12
#: Path work budget in units of n² operations (see :func:`decremental_path`).
WORK_FACTOR = 4.0
#: Smallest path work budget (operations): on small problems the fixed cost of a solver
#: call, not the linear algebra, dominates.
MIN_WORK = 5e6


def decremental_path(
    problem: DualProblem,
    alpha: np.ndarray,
    bias: float,
    s: np.ndarray,
    c: int,
    rows: Callable[[np.ndarray], np.ndarray],
    *,
    gram: np.ndarray | None = None,
    max_events: int | None = None,
    work_factor: float = WORK_FACTOR,
) -> tuple[np.ndarray, float, int, bool] | None:
    """Lower α_c to its lower bound along the solution path.

    Parameters
    ----------
    problem : the problem with row ``c`` still in it (n rows).
    alpha : (n,) optimal multipliers; bias : b; s : (n,) Gᵢ + b yᵢ at ``alpha``.
    rows : kernel rows K(x_rows, ·), shape ``(len(rows), n)``.
    gram : the whole (n, n) Gram matrix, when in memory: the path then runs in the
        compiled kernel :func:`solver.explanation._path_kernel.path_run` (same algorithm).
    max_events : stop after this many set changes (default 50 + n / 10).
    work_factor : stop once the linear algebra (≈ |S|³/3 + 2n|S| per segment) exceeds
        max(``work_factor`` · n², :data:`MIN_WORK`) operations, about the work of one
        cold solve.

    Returns
    -------
    (alpha (n,), bias, number of events, complete): when ``complete`` α_c is at its lower
    bound; otherwise the path stopped early (budget) at a feasible point with α_c still
    above it.  None when the path cannot start or continue (no free support vector,
    singular system).
    """
    y, lo, up = problem.y, problem.lower, problem.upper
    n = problem.n
    a = np.asarray(alpha, dtype=np.float64).copy()
    s = np.asarray(s, dtype=np.float64).copy()
    b = float(bias)
    width = np.maximum(up - lo, 0.0)
    at_lo = a <= lo + DEFAULT_BOUND_TOL * width
    at_up = (a >= up - DEFAULT_BOUND_TOL * width) & ~at_lo
    free = ~(at_lo | at_up)
    at_lo[c] = at_up[c] = free[c] = False
    remaining = float(a[c] - lo[c])
    k_c = np.asarray(rows(np.array([c])), dtype=np.float64)[0]
    limit = max_events if max_events is not None else 50 + n // 10
    budget, work = max(work_factor * float(n) ** 2, MIN_WORK), 0.0
    if gram is not None:
        state = np.where(free, 0, np.where(at_lo, 1, 2)).astype(np.int8)
        state[c] = 3
        info = np.zeros(2)
        code = path_run(np.ascontiguousarray(gram, dtype=np.float64), y, lo, up, a, s, state,
                        int(c), int(limit), float(budget), info)
        if code == PATH_FAILED:
            return None
        return a, b + float(info[0]), int(info[1]), code == PATH_COMPLETE
    events = 0
    while remaining > 0.0:
        S = np.flatnonzero(free)
        if S.size == 0:
            return None
        work += S.size**3 / 3.0 + 2.0 * n * S.size
        if events > limit or (events > 0 and work > budget):
            return a, b, events, False
        K_S = np.asarray(rows(S), dtype=np.float64)  # (|S|, n)
        yS = y[S]
        A = np.empty((S.size + 1, S.size + 1))
        A[0, 0] = 0.0
        A[0, 1:] = A[1:, 0] = yS
        A[1:, 1:] = K_S[:, S] * np.outer(yS, yS)
        rhs = np.concatenate([[y[c]], yS * y[c] * k_c[S]])
        try:
            sol = np.linalg.solve(A, rhs)
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(sol)):
            return None
        db = float(sol[0])
        dA = np.zeros(n)
        dA[S] = sol[1:]
        ds = y * ((yS * sol[1:]) @ K_S - y[c] * k_c + db)  # Δs per unit decrease of α_c
        # first event along t ∈ (0, remaining]: ratio of each point to its event
        r = np.full(n, np.inf)
        m = free & (dA > _EPS)  # free multiplier rising to its upper bound
        r[m] = (up[m] - a[m]) / dA[m]
        m = free & (dA < -_EPS)  # free multiplier falling to its lower bound
        r[m] = (a[m] - lo[m]) / -dA[m]
        m = at_lo & (ds < -_EPS)  # s ≥ 0 at the lower bound falling to 0
        r[m] = np.maximum(s[m], 0.0) / -ds[m]
        m = at_up & (ds > _EPS)  # s ≤ 0 at the upper bound rising to 0
        r[m] = np.maximum(-s[m], 0.0) / ds[m]
        who = int(np.argmin(r))
        t = max(min(float(r[who]), remaining), 0.0)
        a += t * dA
        a[c] -= t
        b += t * db
        s += t * ds
        remaining -= t
        if not r[who] < remaining + t:  # no event before α_c reaches its bound
            break
        events += 1
        if free[who]:
            free[who] = False
            if dA[who] > 0:
                a[who], at_up[who] = up[who], True
            else:
                a[who], at_lo[who] = lo[who], True
        else:
            free[who], at_lo[who], at_up[who] = True, False, False
    a[c] = lo[c]
    np.clip(a, lo, up, out=a)
    return a, b, events, True
