"""Numba kernels of the block working-set SMO (numba code only; driver: :mod:`solver.smo`).

Decomposition with q > 2 variables (Joachims 1999, "Making large-scale SVM learning
practical"): each *outer* iteration chooses a working set B of up to q variables — the
q/2 largest F over I_up and the q/2 smallest F over I_low, the steepest feasible
direction of that paper's selection — fetches their kernel rows together (missing rows
computed in one tiled pass over the data, :func:`block_rows`), solves the subproblem on B
by two-variable SMO steps with the second-order rule of Fan, Chen & Lin (2005, WSS 2)
on the q × q block, and then updates the gradient of every active variable once with
the rows of the members that moved: F ← F − K[:, B] Δβ_B.

Same variables, positions, row cache and stopping test as :mod:`solver._smo_kernels`
(β = y∘α, F = −(Kβ + q), m(α) − M(α) ≤ kkt_tol checked on the full active gradient at
every outer iteration).  Inside an outer iteration only F on B is known; an inner step
therefore records the violation found at its outer iteration's selection.  The inner
state lives in ``bstate`` and the B arrays, so a pause (snapshot, callback, clock) in the
middle of an outer iteration resumes it exactly: the path does not depend on where the
driver paused.  Every function is typed by its arrays and runs under NUMBA_DISABLE_JIT=1.
"""

from __future__ import annotations

import numpy as np

from ._smo_kernels import (
    BLK,
    FS_GAMMA,
    FS_M_LOW,
    FS_M_UP,
    FS_OBJ,
    FS_OFFSET,
    FS_TAU,
    FS_TOL,
    FS_VIOL,
    IS_ACTIVE,
    IS_DEGREE,
    IS_EVENTS,
    IS_ITER,
    IS_KERNEL,
    IS_LEVEL,
    IS_MISSES,
    IS_MODE,
    IS_POOL_USED,
    IS_REMISSES,
    IS_ROW_EVALS,
    IS_ROWS,
    IS_SHRINK_AT,
    IS_SLOTS,
    IS_STALL_WINDOW,
    IS_STOP_AT,
    IS_STRIDE,
    IS_UNIT_DIAG,
    IS_VERSION,
    LOW,
    RUN_CONVERGED,
    RUN_PAUSE,
    RUN_SHRINK,
    RUN_TRACE_FULL,
    UP,
    _fetch,
    _fmax,
    _fmin,
    _jit,
    _lru_take,
    _row_of,
    _transform,
    pair_step,
    pass_low,
    pass_up,
    progress_code,
    record_step,
    tile_dots,
)

# slots of bstate (int64)
BS_PHASE = 0  # 0: select a working set next; 1: inner steps of the current one under way
BS_NB = 1  # members of the current working set
BS_INNER = 2  # inner steps taken in the current outer iteration
BS_OUTER = 3  # outer iterations begun so far
BS_Q = 4  # working-set size asked for (even, ≥ 2)
BS_MAX_INNER = 5  # most inner steps per outer iteration
BS_FRESH = 6  # percentage of the working set chosen afresh at each outer iteration
BS_RULE = 7  # 1: second-order gains against the WSS 2 pair (rank_block); 0: largest / smallest F
BS_SIZE = 8
# slots of bval (float64)
BV_EPS = 0  # inner stopping tolerance of the current outer iteration
BV_FACTOR = 1  # inner tolerance = max(kkt_tol, factor · outer violation)
BV_SIZE = 4


# ---------------------------------------------------------------- kernel rows --------


@_jit
def block_rows(XK, sq, srcs, refs, nsrc, count, gram, cache, code, gamma, offset, degree,
               acc4, ibuf):
    """Kernel rows of nsrc data columns at once: for r < nsrc, row[t] = K(x_srcs[r], x_t)
    for t < count, row = ``_row_of(refs[r], count, gram, cache)``.

    XK (d, ·), sq its squared column norms; acc4 (4, L) and ibuf (≥ L,) work buffers.
    The columns are taken in tiles of L; four sources share each pass over a tile, so the
    data are read once per four rows.  Every entry is computed by the arithmetic of
    :func:`solver._smo_kernels.kernel_row_part`, so the rows are bitwise equal to rows
    computed one at a time.
    """
    step = acc4.shape[1]
    for s in range(0, count, step):
        e = min(count, s + step)
        L = e - s
        for r0 in range(0, nsrc, 4):
            rb = min(4, nsrc - r0)
            tile_dots(XK, srcs, r0, rb, XK, s, e, acc4)
            for u in range(rb):
                au = acc4[u, :L]
                _transform(au, sq[srcs[r0 + u]], sq[s:e], code, gamma, offset, degree, ibuf)
                row = _row_of(refs[r0 + u], count, gram, cache)
                o = row[s:e]
                for t in range(L):
                    o[t] = au[t]


@_jit
def fetch_members(nb, members, brefs, need, needref, a, perm, gram, rowslot, cache, slot_of,
                  slot_owner, lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row, XK, sq,
                  acc, ibuf, acc4, istate, fstate, it, hctl):
    """Rows over positions 0..a−1 of the members (positions) ``members[:nb]``; brefs[r] is
    the reference of member r's row (see ``_row_of``).  Rows not stored yet are computed
    together by :func:`block_rows`; hits are served first so that the slots taken for the
    new rows never evict a member's row (the caller keeps nb ≤ half the slots)."""
    n = perm.shape[0]
    code = istate[IS_KERNEL]
    gamma = fstate[FS_GAMMA]
    offset = fstate[FS_OFFSET]
    degree = istate[IS_DEGREE]
    k = 0
    if istate[IS_MODE] == 0:  # full Gram: new rows go to the pool, then served as hits
        for r in range(nb):
            o = perm[members[r]]
            if rowslot[o] < 0:
                slot = istate[IS_POOL_USED]
                rowslot[o] = slot
                istate[IS_POOL_USED] = slot + 1
                need[k] = o
                needref[k] = -1 - slot
                k += 1
        if k > 0:
            block_rows(XK, sq, need, needref, k, n, gram, cache, code, gamma, offset, degree,
                       acc4, ibuf)
            istate[IS_ROW_EVALS] += k
        for r in range(nb):
            ok, row, ref = _fetch(members[r], a, perm, gram, rowslot, cache, slot_of,
                                  slot_owner, lru_prev, lru_next, slot_stamp, slot_ver, vmaps,
                                  ext_row, XK, sq, acc, ibuf, istate, fstate, it, hctl)
            brefs[r] = ref
        return
    stride = istate[IS_STRIDE]
    for r in range(nb):  # hits (brought to the current layout by _fetch)
        if slot_of[perm[members[r]]] >= 0:
            ok, row, ref = _fetch(members[r], a, perm, gram, rowslot, cache, slot_of,
                                  slot_owner, lru_prev, lru_next, slot_stamp, slot_ver, vmaps,
                                  ext_row, XK, sq, acc, ibuf, istate, fstate, it, hctl)
            brefs[r] = ref
        else:
            brefs[r] = -1
    for r in range(nb):  # misses: take slots, then compute the rows together
        if brefs[r] == -1:
            o = perm[members[r]]
            istate[IS_MISSES] += 1
            if slot_of[o] == -2:
                istate[IS_REMISSES] += 1
            s = _lru_take(slot_of, slot_owner, lru_prev, lru_next, slot_stamp, istate, it)
            slot_of[o] = s
            slot_owner[s] = o
            slot_ver[s] = istate[IS_VERSION]
            brefs[r] = s * stride
            need[k] = members[r]
            needref[k] = s * stride
            k += 1
    if k > 0:
        block_rows(XK, sq, need, needref, k, a, gram, cache, code, gamma, offset, degree,
                   acc4, ibuf)
        istate[IS_ROW_EVALS] += k


# ---------------------------------------------------------------- selection ----------


@_jit
def _insert(pos, val, cnt, h, p, v, descending):
    """Keep the h best (pos, val) pairs sorted (largest val first when ``descending``);
    equal values keep their arrival order, so lower positions rank first."""
    if cnt == h:
        if descending and not v > val[h - 1]:
            return cnt
        if not descending and not v < val[h - 1]:
            return cnt
        k = h - 1
    else:
        k = cnt
        cnt += 1
    while k > 0 and ((descending and v > val[k - 1]) or (not descending and v < val[k - 1])):
        val[k] = val[k - 1]
        pos[k] = pos[k - 1]
        k -= 1
    val[k] = v
    pos[k] = p
    return cnt


@_jit
def select_block(F, status, a, h, up_pos, up_val, low_pos, low_val):
    """(nu, nl, m, M): the h largest F over I_up (positions up_pos[:nu], values up_val)
    and the h smallest over I_low (low_pos[:nl]) among positions < a, with m = max F over
    I_up and M = min F over I_low (−inf / inf when empty)."""
    nu = 0
    nl = 0
    m = -np.inf
    big_m = np.inf
    for s in range(0, a, BLK):
        e = min(a, s + BLK)
        Fs = F[s:e]
        Ss = status[s:e]
        L = e - s
        mk = -np.inf
        lk = np.inf
        for t in range(L):
            mk = _fmax(mk, Fs[t] if (Ss[t] & UP) != 0 else -np.inf)
            lk = _fmin(lk, Fs[t] if (Ss[t] & LOW) != 0 else np.inf)
        m = _fmax(m, mk)
        big_m = _fmin(big_m, lk)
        if mk > -np.inf and (nu < h or mk > up_val[h - 1]):
            for t in range(L):
                if (Ss[t] & UP) != 0:
                    nu = _insert(up_pos, up_val, nu, h, s + t, Fs[t], True)
        if lk < np.inf and (nl < h or lk < low_val[h - 1]):
            for t in range(L):
                if (Ss[t] & LOW) != 0:
                    nl = _insert(low_pos, low_val, nl, h, s + t, Fs[t], False)
    return nu, nl, m, big_m


@_jit
def rank_block(F, Ki, Kj, diag, status, a, mi, mj, kii, kjj, tau, h, up_pos, up_val,
               low_pos, low_val, wbuf):
    """(nu, nl): the h variables of I_up with the largest second-order gain against j
    (F[t] − F_j)² / āⱼₜ over F[t] > F_j, and the h of I_low with the largest gain against
    i, (F_i − F[t])² / āᵢₜ over F[t] < F_i (āᵢₜ = Kᵢᵢ + Kₜₜ − 2Kᵢₜ, τ if ≤ 0), where
    (i, j) is the pair of Fan, Chen & Lin (2005, WSS 2) with rows Ki, Kj and F_i = mi,
    F_j = mj; the working-set rule of that paper extended to q variables."""
    nu = 0
    nl = 0
    for s in range(0, a, BLK):
        e = min(a, s + BLK)
        L = e - s
        Fs = F[s:e]
        Ss = status[s:e]
        Ds = diag[s:e]
        Is = Ki[s:e]
        Js = Kj[s:e]
        w = wbuf[:L]
        gk = 0.0
        for t in range(L):
            b = _fmax(Fs[t] - mj, 0.0) if (Ss[t] & UP) != 0 else 0.0
            qq = (kjj + Ds[t]) - 2.0 * Js[t]
            qq = qq if qq > 0.0 else tau
            w[t] = (b * b) / qq
            gk = _fmax(gk, w[t])
        if gk > 0.0 and (nu < h or gk > up_val[h - 1]):
            for t in range(L):
                if w[t] > 0.0:
                    nu = _insert(up_pos, up_val, nu, h, s + t, w[t], True)
        gk = 0.0
        for t in range(L):
            b = _fmax(mi - Fs[t], 0.0) if (Ss[t] & LOW) != 0 else 0.0
            qq = (kii + Ds[t]) - 2.0 * Is[t]
            qq = qq if qq > 0.0 else tau
            w[t] = (b * b) / qq
            gk = _fmax(gk, w[t])
        if gk > 0.0 and (nl < h or gk > low_val[h - 1]):
            for t in range(L):
                if w[t] > 0.0:
                    nl = _insert(low_pos, low_val, nl, h, s + t, w[t], True)
    return nu, nl


@_jit
def _merge(up_pos, nu, low_pos, nl, q, fresh, members, nprev, mark, scratch, fi, fj):
    """New working set in ``members`` (newest first): the maximal violating pair fi, fj
    (always members, so that every outer iteration takes a step), up to ``fresh``
    candidates not in the previous set, up and low taken in turn (best first), then the
    previous members
    ``members[:nprev]`` (newest first) until q; returns its size.  Keeping half of the
    set from one outer iteration to the next reuses its cached rows and lets its
    variables keep moving (the rule of keeping older members follows common practice
    for large working sets).  ``mark`` (n,) int8 is all zero on entry and on exit."""
    for r in range(nprev):
        scratch[r] = members[r]
        mark[members[r]] = 1
    members[0] = fi
    members[1] = fj
    nb = 2
    for f in (fi, fj):
        if mark[f] == 1:  # already a member: do not repeat it below
            for r in range(nprev):
                if scratch[r] == f:
                    scratch[r] = -1
        mark[f] = 2
    k = 0
    while nb < fresh and (k < nu or k < nl):
        if k < nu and mark[up_pos[k]] == 0 and nb < fresh:
            mark[up_pos[k]] = 2
            members[nb] = up_pos[k]
            nb += 1
        if k < nl and mark[low_pos[k]] == 0 and nb < fresh:
            mark[low_pos[k]] = 2
            members[nb] = low_pos[k]
            nb += 1
        k += 1
    r = 0
    while nb < q and r < nprev:
        if scratch[r] >= 0:
            members[nb] = scratch[r]
            nb += 1
        r += 1
    for r in range(nprev):
        if scratch[r] >= 0:
            mark[scratch[r]] = 0
    for r in range(nb):
        mark[members[r]] = 0
    return nb


# ---------------------------------------------------------------- gradient -----------


@_jit
def apply_block(F, a, nb, brefs, delta, gram, cache):
    """F[t] −= Σ_r K_r[t] Δ_r for t < a over the members r with Δ_r ≠ 0 (rows by brefs),
    in blocks of positions so that F stays in the first-level cache; rows two at a time."""
    for s in range(0, a, BLK):
        e = min(a, s + BLK)
        L = e - s
        Fs = F[s:e]
        r = 0
        while r < nb:
            if delta[r] == 0.0:
                r += 1
                continue
            r2 = r + 1
            while r2 < nb and delta[r2] == 0.0:
                r2 += 1
            Ri = _row_of(brefs[r], e, gram, cache)[s:e]
            di = delta[r]
            if r2 < nb:
                Rj = _row_of(brefs[r2], e, gram, cache)[s:e]
                dj = delta[r2]
                for t in range(L):
                    Fs[t] = Fs[t] - (Ri[t] * di + Rj[t] * dj)
            else:
                for t in range(L):
                    Fs[t] = Fs[t] - Ri[t] * di
            r = r2 + 1


# ---------------------------------------------------------------- the loop -----------


@_jit
def block_flush(F, beta, a, bstate, brefs, members, bstart, delta, gram, cache):
    """End the current outer iteration: apply its steps to F (no-op when none is open)."""
    if bstate[BS_PHASE] != 1:
        return
    nb = bstate[BS_NB]
    for r in range(nb):
        delta[r] = beta[members[r]] - bstart[r]
    apply_block(F, a, nb, brefs, delta, gram, cache)
    bstate[BS_PHASE] = 0


@_jit
def block_run(F, beta, lo, hi, diag, ysign, status, perm,
              gram, rowslot, cache, slot_of, slot_owner, lru_prev, lru_next, slot_stamp,
              slot_ver, vmaps, ext_row, XK, sq, acc, ibuf, istate, fstate,
              tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj, tr_viol, tr_act, tr_outer,
              ev_it, ev_kind, ev_val, hctl,
              bstate, bval, members, brefs, bstart, delta, Fb, Kbb, up_pos, up_val, low_pos,
              low_val, need, needref, mark, acc4, bm):
    """Run outer iterations of the block working-set SMO until a stop or pause condition.

    Arrays as for :func:`solver._smo_kernels.smo_run`, plus: tr_outer (trace column:
    outer iteration of each step); bstate / bval (BS_* / BV_* slots); members, brefs,
    bstart, delta, Fb (q,) and Kbb (q·q,) the working set (positions, row references,
    β at the outer iteration's start, its change, local gradient, kernel block);
    up_pos, up_val, low_pos, low_val (q,) selection buffers; need, needref (q,) rows to
    compute; mark (n,) int8 zeros; acc4 (4, L) work buffer.  Returns a RUN_* code.  F is
    up to date with β on every return except RUN_PAUSE and RUN_TRACE_FULL inside an
    outer iteration (then :func:`block_flush` brings it up to date).
    """
    a = istate[IS_ACTIVE]
    it = istate[IS_ITER]
    stop_at = istate[IS_STOP_AT]
    shrink_at = istate[IS_SHRINK_AT]
    level = istate[IS_LEVEL]
    stall_window = istate[IS_STALL_WINDOW]
    kkt_tol = fstate[FS_TOL]
    tau = fstate[FS_TAU]
    dual_value = fstate[FS_OBJ]
    viol = fstate[FS_VIOL]
    cap_rows = tr_it.shape[0]
    cap_ev = ev_it.shape[0]
    q = bstate[BS_Q]
    unit_diag = istate[IS_UNIT_DIAG] == 1
    wbuf = np.empty(BLK)
    ret = -1
    while True:
        if bstate[BS_PHASE] == 0:  # outer boundary: F is up to date
            if it >= shrink_at:
                ret = RUN_SHRINK
                break
            if it >= stop_at:
                ret = RUN_PAUSE
                break
            # at most half the cache slots, so a member's row is never evicted by another's
            qe = q
            if istate[IS_MODE] == 1 or a < perm.shape[0]:
                qe = min(q, max(2, istate[IS_SLOTS] // 2))
            nprev = min(bstate[BS_NB], qe)
            fresh = qe if nprev == 0 else max(2, (qe * bstate[BS_FRESH]) // 100)
            if bstate[BS_RULE] == 1:
                m, i1 = pass_up(F, F, F, 0.0, 0.0, status, a, bm, wbuf, False)
                if i1 < 0:
                    viol = 0.0
                    ret = RUN_CONVERGED
                    break
                ok, Ki, ref = _fetch(i1, a, perm, gram, rowslot, cache, slot_of, slot_owner,
                                     lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row,
                                     XK, sq, acc, ibuf, istate, fstate, it, hctl)
                best, j1, big_m = pass_low(F, Ki, diag, status, a, m, diag[i1], tau, True,
                                           unit_diag, bm, wbuf)
                viol = m - big_m
                fstate[FS_M_UP] = m
                fstate[FS_M_LOW] = big_m
                if j1 < 0 or viol <= kkt_tol:
                    ret = RUN_CONVERGED
                    break
                ok, Kj, ref = _fetch(j1, a, perm, gram, rowslot, cache, slot_of, slot_owner,
                                     lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row,
                                     XK, sq, acc, ibuf, istate, fstate, it, hctl)
                nu, nl = rank_block(F, Ki, Kj, diag, status, a, m, F[j1], diag[i1], diag[j1],
                                    tau, qe, up_pos, up_val, low_pos, low_val, wbuf)
                fi = i1
                fj = j1
            else:
                nu, nl, m, big_m = select_block(F, status, a, qe, up_pos, up_val, low_pos,
                                                low_val)
                viol = m - big_m
                fstate[FS_M_UP] = m
                fstate[FS_M_LOW] = big_m
                if nu == 0 or nl == 0 or viol <= kkt_tol:
                    if nu == 0 or nl == 0:
                        viol = 0.0
                    ret = RUN_CONVERGED
                    break
                fi = up_pos[0]
                fj = low_pos[0]
            nb = _merge(up_pos, nu, low_pos, nl, qe, fresh, members, nprev, mark, need, fi, fj)
            fetch_members(nb, members, brefs, need, needref, a, perm, gram, rowslot, cache,
                          slot_of, slot_owner, lru_prev, lru_next, slot_stamp, slot_ver, vmaps,
                          ext_row, XK, sq, acc, ibuf, acc4, istate, fstate, it, hctl)
            for r in range(nb):
                row = _row_of(brefs[r], a, gram, cache)
                pr = members[r]
                Fb[r] = F[pr]
                bstart[r] = beta[pr]
                for c in range(nb):
                    Kbb[r * q + c] = row[members[c]]
            bstate[BS_NB] = nb
            bstate[BS_INNER] = 0
            bstate[BS_OUTER] += 1
            bstate[BS_PHASE] = 1
            bval[BV_EPS] = max(kkt_tol, bval[BV_FACTOR] * viol)
        # inner steps on the working set
        nb = bstate[BS_NB]
        eps = bval[BV_EPS]
        max_inner = bstate[BS_MAX_INNER]
        outer = bstate[BS_OUTER]
        done = False
        while True:
            if (level != 2 and istate[IS_ROWS] >= cap_rows) or istate[IS_EVENTS] >= cap_ev:
                ret = RUN_TRACE_FULL
                break
            if it >= stop_at:
                ret = RUN_PAUSE
                break
            if bstate[BS_INNER] >= max_inner:
                done = True
                break
            # second-order pair within B (Fan, Chen & Lin 2005, WSS 2)
            ii = -1
            mi = -np.inf
            for r in range(nb):
                if (status[members[r]] & UP) != 0 and Fb[r] > mi:
                    mi = Fb[r]
                    ii = r
            if ii < 0:
                done = True
                break
            jj = -1
            best = np.inf
            mb = np.inf
            pi = members[ii]
            kii = diag[pi]
            for r in range(nb):
                pr = members[r]
                if (status[pr] & LOW) != 0:
                    fr = Fb[r]
                    mb = min(mb, fr)
                    if fr < mi:
                        b = mi - fr
                        qq = (kii + diag[pr]) - 2.0 * Kbb[ii * q + r]
                        qq = qq if qq > 0.0 else tau
                        v = -(b * b) / qq
                        if v < best:
                            best = v
                            jj = r
            # the first step is always taken: the set holds the WSS 2 pair, whose own gap
            # may be below eps while the set's is not
            if jj < 0 or (mi - mb <= eps and bstate[BS_INNER] > 0):
                done = True
                break
            i = pi
            j = members[jj]
            kij = Kbb[ii * q + jj]
            di, dj, bi_new, bj_new, change, event = pair_step(
                i, j, mi - Fb[jj], kij, Fb[ii], Fb[jj], beta, lo, hi, diag, status, tau, it,
                istate, ev_it, ev_kind, ev_val)
            dual_value += change
            ri = ii * q
            rj = jj * q
            for c in range(nb):
                Fb[c] = Fb[c] - (Kbb[ri + c] * di + Kbb[rj + c] * dj)
            bstate[BS_INNER] += 1
            it += 1
            record_step(it, i, j, bi_new, bj_new, di, dual_value, viol, a, outer, event, perm,
                        ysign, istate, tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj,
                        tr_viol, tr_act, tr_outer)
            ret = progress_code(dual_value, it, stall_window, istate, fstate)
            if ret >= 0:
                done = True
                break
        if done:
            block_flush(F, beta, a, bstate, brefs, members, bstart, delta, gram, cache)
        if ret >= 0:
            break
    istate[IS_ITER] = it
    fstate[FS_OBJ] = dual_value
    fstate[FS_VIOL] = viol
    return ret
