"""Numba kernel of the decremental path (see :mod:`solver.explanation._decrement`) on a full Gram.

Flat, module-level, typed by its arrays, ``cache=True``; runs unchanged (slowly) with
``NUMBA_DISABLE_JIT=1``.  Returns a status code; the Python layer decides what to do.
"""

from __future__ import annotations

import numpy as np

from .._numba_start import prepare_numba

prepare_numba()  # a kktrace command skips numba's BLAS probe (see solver._numba_start)
from numba import njit  # noqa: E402

#: status codes of :func:`path_run`
PATH_COMPLETE = 0
PATH_STOPPED = 1  # work or event budget reached; α_c not yet at its bound
PATH_FAILED = 2  # no free support vector, or a (near-)singular system


@njit(cache=True)
def _solve_dense(A: np.ndarray, rhs: np.ndarray, out: np.ndarray) -> bool:
    """Gaussian elimination with partial pivoting; A and rhs are overwritten.  False if a
    pivot is below 1e-13 times the largest entry (singular for our purposes)."""
    m = A.shape[0]
    scale = 0.0
    for i in range(m):
        for j in range(m):
            v = abs(A[i, j])
            if v > scale:
                scale = v
    if scale == 0.0:
        return False
    for k in range(m):
        p = k
        best = abs(A[k, k])
        for i in range(k + 1, m):
            v = abs(A[i, k])
            if v > best:
                best, p = v, i
        if best <= 1e-13 * scale:
            return False
        if p != k:
            for j in range(m):
                A[k, j], A[p, j] = A[p, j], A[k, j]
            rhs[k], rhs[p] = rhs[p], rhs[k]
        piv = A[k, k]
        for i in range(k + 1, m):
            f = A[i, k] / piv
            if f != 0.0:
                for j in range(k, m):
                    A[i, j] -= f * A[k, j]
                rhs[i] -= f * rhs[k]
    for i in range(m - 1, -1, -1):
        acc = rhs[i]
        for j in range(i + 1, m):
            acc -= A[i, j] * out[j]
        out[i] = acc / A[i, i]
    return True


@njit(cache=True)
def path_run(K: np.ndarray, y: np.ndarray, lo: np.ndarray, up: np.ndarray, a: np.ndarray,
             s: np.ndarray, state: np.ndarray, c: int, max_events: int, budget: float,
             info: np.ndarray) -> int:
    """Lower a[c] to lo[c] along the solution path; ``a``, ``s`` and ``state`` (int8:
    0 free, 1 at lower, 2 at upper, 3 the removed point) are updated in place.

    ``info`` receives [bias change, events].  Returns a PATH_* code.
    """
    n = a.shape[0]
    eps = 1e-12
    remaining = a[c] - lo[c]
    db_total = 0.0
    events = 0
    work = 0.0
    S = np.empty(n, dtype=np.int64)
    dA = np.zeros(n)
    ds = np.empty(n)
    code = PATH_COMPLETE
    while remaining > 0.0:
        m = 0
        for j in range(n):
            if state[j] == 0:
                S[m] = j
                m += 1
        if m == 0:
            code = PATH_FAILED
            break
        work += m * m * m / 3.0 + 2.0 * n * m
        if events > max_events or (events > 0 and work > budget):
            code = PATH_STOPPED
            break
        A = np.empty((m + 1, m + 1))
        rhs = np.empty(m + 1)
        sol = np.empty(m + 1)
        A[0, 0] = 0.0
        rhs[0] = y[c]
        for k in range(m):
            sk = S[k]
            A[0, k + 1] = y[sk]
            A[k + 1, 0] = y[sk]
            rhs[k + 1] = y[sk] * y[c] * K[sk, c]
            for q in range(m):
                sq = S[q]
                A[k + 1, q + 1] = y[sk] * y[sq] * K[sk, sq]
        if not _solve_dense(A, rhs, sol):
            code = PATH_FAILED
            break
        db = sol[0]
        for j in range(n):
            ds[j] = db - y[c] * K[c, j]
        for k in range(m):
            sk = S[k]
            dA[sk] = sol[k + 1]
            w = y[sk] * sol[k + 1]
            for j in range(n):
                ds[j] += w * K[sk, j]
        for j in range(n):
            ds[j] *= y[j]
        # first event along t ∈ (0, remaining]
        t = remaining
        who = -1
        for j in range(n):
            st = state[j]
            r = np.inf
            if st == 0:
                if dA[j] > eps:
                    r = (up[j] - a[j]) / dA[j]
                elif dA[j] < -eps:
                    r = (a[j] - lo[j]) / -dA[j]
            elif st == 1:
                if ds[j] < -eps:
                    r = max(s[j], 0.0) / -ds[j]
            elif st == 2:
                if ds[j] > eps:
                    r = max(-s[j], 0.0) / ds[j]
            if r < t:
                t, who = r, j
        if t < 0.0:
            t = 0.0
        for k in range(m):
            sk = S[k]
            a[sk] += t * dA[sk]
        a[c] -= t
        db_total += t * db
        for j in range(n):
            s[j] += t * ds[j]
        remaining -= t
        rising = who >= 0 and dA[who] > 0.0
        for k in range(m):
            dA[S[k]] = 0.0
        if who < 0:
            break
        events += 1
        if state[who] == 0:  # a free multiplier reached a bound
            if rising:
                a[who] = up[who]
                state[who] = 2
            else:
                a[who] = lo[who]
                state[who] = 1
        else:  # a bounded point reached the margin
            state[who] = 0
    if code == PATH_COMPLETE:
        a[c] = lo[c]
    for j in range(n):
        if a[j] < lo[j]:
            a[j] = lo[j]
        elif a[j] > up[j]:
            a[j] = up[j]
    info[0] = db_total
    info[1] = events
    return code
