"""Numba kernels of the SMO solver (numba code only; the driver is :mod:`solver.smo`).

The loop works in the signed variables βᵢ = yᵢαᵢ, in which the dual reads

    minimise ½ βᵀKβ + qᵀβ,   Σβᵢ = Δ,   loᵢ ≤ βᵢ ≤ hiᵢ,      q = y∘p,

and keeps F = −(Kβ + q) = −y∘G, so that m(α) = max F over I_up = {β < hi} and
M(α) = min F over I_low = {β > lo} (Keerthi et al. 2001; Fan, Chen & Lin 2005, eq. 9).
Every function is typed by its arrays, cached on disk and runs under NUMBA_DISABLE_JIT=1.
"""

from __future__ import annotations

import numpy as np
from numba import njit

# return codes of smo_run
RUN_CONVERGED = 0
RUN_PAUSE = 1  # reached the requested iteration (snapshot / callback / time check)
RUN_TRACE_FULL = 2  # trace arrays need more room
RUN_NUMERICAL = 3
RUN_STALLED = 4

# istate slots
IS_ITER = 0
IS_STOP_AT = 1
IS_ROWS = 2
IS_EVENTS = 3
IS_LEVEL = 4  # 0 full, 1 sampled, 2 off
IS_SAMPLE = 5
IS_SECOND_ORDER = 6
IS_LAST_IMPROVE = 7
IS_STALL_WINDOW = 8
IS_FORCE_ROW = 9
IS_CURV_FIXES = 10
IS_SIZE = 16

# fstate slots
FS_OBJ = 0
FS_TOL = 1
FS_TAU = 2
FS_BEST_OBJ = 3
FS_VIOL = 4
FS_SIZE = 8

EV_SHRINK = 1
EV_RECONSTRUCT = 2
EV_CURVATURE = 3


@njit(cache=True)
def smo_run(K, diag, F, beta, lo, hi, y, istate, fstate,
            tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj, tr_viol, tr_act,
            ev_it, ev_kind, ev_val):  # pragma: no cover - compiled
    """Run SMO iterations on the full variable set until a stop or pause condition.

    K (n, n) Gram, diag (n,) its diagonal; F, beta (n,) updated in place; lo, hi (n,)
    bounds of β; y (n,) signs.  istate/fstate hold counters and scalars (slots above);
    tr_* are trace columns, ev_* event columns, written from row istate[IS_ROWS] /
    istate[IS_EVENTS].  Returns one of the RUN_* codes.
    """
    n = F.shape[0]
    it = istate[IS_ITER]
    stop_at = istate[IS_STOP_AT]
    level = istate[IS_LEVEL]
    sample = istate[IS_SAMPLE]
    second = istate[IS_SECOND_ORDER]
    stall_window = istate[IS_STALL_WINDOW]
    tol = fstate[FS_TOL]
    tau = fstate[FS_TAU]
    obj = fstate[FS_OBJ]
    cap_rows = tr_it.shape[0]
    cap_ev = ev_it.shape[0]
    while True:
        if (level != 2 and istate[IS_ROWS] >= cap_rows) or istate[IS_EVENTS] + 1 > cap_ev:
            istate[IS_ITER] = it
            fstate[FS_OBJ] = obj
            return RUN_TRACE_FULL
        # first index: i = argmax_{t in I_up} F_t (lowest index on ties)
        m = -np.inf
        i = -1
        for t in range(n):
            if beta[t] < hi[t] and F[t] > m:
                m = F[t]
                i = t
        # second index and M = min_{t in I_low} F_t
        big_m = np.inf
        j = -1
        best = np.inf
        if i >= 0:
            kii = diag[i]
            for t in range(n):
                if beta[t] > lo[t]:
                    ft = F[t]
                    if ft < big_m:
                        big_m = ft
                    b = m - ft
                    if b > 0.0:
                        if second == 1:
                            a = kii + diag[t] - 2.0 * K[i, t]
                            if a <= 0.0:
                                a = tau
                            val = -(b * b) / a
                        else:
                            val = -b
                        if val < best:
                            best = val
                            j = t
        viol = m - big_m
        fstate[FS_VIOL] = viol
        if j < 0 or viol <= tol:
            istate[IS_ITER] = it
            fstate[FS_OBJ] = obj
            return RUN_CONVERGED
        if it >= stop_at:
            istate[IS_ITER] = it
            fstate[FS_OBJ] = obj
            return RUN_PAUSE
        # two-variable step along β_i += s, β_j -= s (Platt 1998; Fan, Chen & Lin 2005, eq. 15)
        b = m - F[j]
        kij = K[i, j]
        a = diag[i] + diag[j] - 2.0 * kij
        event = False
        if a <= 0.0:
            ev = istate[IS_EVENTS]
            ev_it[ev] = it + 1
            ev_kind[ev] = EV_CURVATURE
            ev_val[ev] = a
            istate[IS_EVENTS] = ev + 1
            istate[IS_CURV_FIXES] += 1
            event = True
            a_use = tau
        else:
            a_use = a
        s = b / a_use
        bi_old = beta[i]
        bj_old = beta[j]
        cap_i = hi[i] - bi_old
        cap_j = bj_old - lo[j]
        if s >= cap_i or s >= cap_j:
            if cap_i <= cap_j:
                s = cap_i
                bi_new = hi[i]
                bj_new = bj_old - s
                if cap_i == cap_j:
                    bj_new = lo[j]
            else:
                s = cap_j
                bj_new = lo[j]
                bi_new = bi_old + s
        else:
            bi_new = bi_old + s
            bj_new = bj_old - s
        di = bi_new - bi_old
        dj = bj_new - bj_old
        beta[i] = bi_new
        beta[j] = bj_new
        # objective change of the two-variable step (exact for the quadratic): gᵀd + ½dᵀKd
        obj += -(F[i] * di + F[j] * dj) + 0.5 * (diag[i] * di * di + diag[j] * dj * dj
                                                 + 2.0 * kij * di * dj)
        for t in range(n):
            F[t] -= K[i, t] * di + K[j, t] * dj
        it += 1
        if not np.isfinite(obj):
            istate[IS_ITER] = it
            fstate[FS_OBJ] = obj
            return RUN_NUMERICAL
        if obj < fstate[FS_BEST_OBJ] - 1e-15 * max(1.0, abs(fstate[FS_BEST_OBJ])):
            fstate[FS_BEST_OBJ] = obj
            istate[IS_LAST_IMPROVE] = it
        if level != 2:
            if level == 0 or it % sample == 0 or event or istate[IS_FORCE_ROW] == 1:
                r = istate[IS_ROWS]
                tr_it[r] = it
                tr_i[r] = i
                tr_j[r] = j
                tr_ai[r] = y[i] * bi_new
                tr_aj[r] = y[j] * bj_new
                tr_step[r] = y[i] * di
                tr_obj[r] = obj
                tr_viol[r] = viol
                tr_act[r] = n
                istate[IS_ROWS] = r + 1
                istate[IS_FORCE_ROW] = 0
        if it - istate[IS_LAST_IMPROVE] >= stall_window:
            istate[IS_ITER] = it
            fstate[FS_OBJ] = obj
            return RUN_STALLED
