"""Numba kernels of the SMO solver (numba code only; the driver is :mod:`solver.smo`).

The loop works in the signed variables βᵢ = yᵢαᵢ, in which the dual reads

    minimise ½ βᵀKβ + qᵀβ,   Σβᵢ = Δ,   loᵢ ≤ βᵢ ≤ hiᵢ,      q = y∘p,

and keeps F = −(Kβ + q) = −y∘G, so that m(α) = max F over I_up = {β < hi} and
M(α) = min F over I_low = {β > lo} (Keerthi et al. 2001; Fan, Chen & Lin 2005, eq. 9).
A step moves βᵢ += s, βⱼ −= s.  Membership of I_up / I_low is kept as additive offsets
(0 or ∓inf) so that both O(n) passes are branch-free and vectorise.

Variables live at *positions*: the active (not shrunk) ones occupy positions 0..a−1 in
increasing original index, so ties broken by lowest position are broken by lowest index.
``perm`` maps position → original index.  Kernel rows come from a lazily filled full
Gram matrix (rows in original order) or, when that does not fit, from an LRU cache of
rows over the active positions, computed from the data.  Every function is typed by its
arrays, cached on disk and also runs under NUMBA_DISABLE_JIT=1.
"""

from __future__ import annotations

import platform

import numpy as np

from ._numba_start import prepare_numba

prepare_numba()  # a kktrace command skips numba's BLAS probe (see solver._numba_start)
from numba import config, njit  # noqa: E402

# ---------------------------------------------------------------- constants ----------

# return codes of smo_run
RUN_CONVERGED = 0  # optimality test met on the active set
RUN_PAUSE = 1  # reached istate[IS_STOP_AT] iterations
RUN_TRACE_FULL = 2  # trace or event arrays need more room
RUN_NUMERICAL = 3
RUN_STALLED = 4
RUN_SHRINK = 5  # shrinking is due (the driver shrinks, then resumes)
RUN_NEED_ROW = 6  # a kernel row of an externally evaluated kernel is needed

# istate slots (int64)
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
IS_ACTIVE = 11
IS_SHRINK_AT = 12
IS_PHASE = 13
IS_SEL_I = 14
IS_SEL_J = 15
IS_NEED_ORIG = 16  # original index of the row an external kernel must supply
IS_EXT_ORIG = 17  # original index of the row waiting in ext_row (-1: none)
IS_MODE = 18  # 0 full Gram (lazy rows), 1 row cache
IS_KERNEL = 19  # kernel code (KERNEL_* below)
IS_DEGREE = 20
IS_SLOTS = 21  # number of cache slots
IS_USED = 22  # slots in use
IS_HEAD = 23  # most recently used slot
IS_TAIL = 24  # least recently used slot
IS_STRIDE = 25  # cache slot stride (elements)
IS_HITS = 26
IS_MISSES = 27
IS_ROW_EVALS = 28  # kernel rows computed from data
IS_POOL_USED = 29  # Gram rows stored so far (mode 0)
IS_REMISSES = 30  # misses on rows that had been cached before (evicted or dropped)
IS_UNIT_DIAG = 31  # 1 when every K(x, x) = 1
IS_VERSION = 32  # layout version of the active positions (raised at each lazy shrink)
IS_REMAPS = 33  # cached rows brought to the current layout when hit
IS_SIZE = 40

# fstate slots (float64)
FS_OBJ = 0
FS_TOL = 1
FS_TAU = 2
FS_BEST_OBJ = 3
FS_VIOL = 4
FS_M_UP = 5
FS_M_LOW = 6
FS_GAMMA = 7
FS_OFFSET = 8
FS_SIZE = 16

# helper-thread protocol (see :func:`helper_loop`): hctl (H_SIZE,) int64, hval (HV_SIZE,)
# float64.  The loop posts a job by raising hctl[H_POSTED]; whoever first raises
# hctl[H_CLAIM] to the job's number (compare-and-swap) does the helper's part: the helper,
# which then raises hctl[H_DONE] to that number, or the loop, once its own part is done
# and the helper has not started (see :func:`_take_back`).  The two counters POSTED and
# DONE sit on separate cache lines.
H_POSTED = 0
H_DONE = 8
H_ON = 16  # 1 while a helper thread serves the running loop
H_KIND = 17
H_LO = 18  # the helper's part: positions (or columns) H_LO..H_HI-1
H_HI = 19
H_REF_I = 20  # rows (of length H_HI), by reference (see :func:`_row_of`)
H_REF_J = 21
H_SRC = 22  # data column of a kernel row
H_FLAG = 23
H_RES = 24  # index found by the helper (−1: none)
H_CLAIM = 25  # number of the last job claimed, by the helper or taken back by the loop
H_TAKEN = 26  # jobs of this call the loop took back and did itself (helper not there yet)
H_AWAY = 27  # 1 when the loop sent the helper away in this call (see :func:`_take_back`)
H_SIZE = 32
HV_DI = 0
HV_DJ = 1
HV_M = 2
HV_KII = 3
HV_RES = 8  # value found by the helper
HV_RES2 = 9
HV_SIZE = 16
JOB_EXIT = 0
JOB_UP = 1
JOB_LOW = 2
JOB_ROW = 3
#: shortest pass / kernel row that is split between the loop and its helper thread
SPLIT_PASS = 4096
SPLIT_ROW = 2048
#: the loop sends the helper away for the rest of a call once it has taken back at least
#: TAKE_BACK_LIMIT parts and half of all posted (an idle machine: at most ~5 % per call)
TAKE_BACK_LIMIT = 256

# status bits of a variable (uint8): in I_up (β < hi), in I_low (β > lo)
UP = 1
LOW = 2

EV_SHRINK = 1
EV_RECONSTRUCT = 2
EV_CURVATURE = 3

KERNEL_LINEAR = 0
KERNEL_POLY = 1
KERNEL_RBF = 2
KERNEL_SIGMOID = 3
KERNEL_EXTERNAL = 9

#: block length of the two-level arg-max / arg-min searches
BLK = 512
#: chunk length of the gradient reconstruction (its sums run chunk by chunk)
CHUNK = 256
#: chunk length of kernel-row evaluation used by the driver (any length gives the same
#: bits; longer chunks run faster with rows of thousands of entries)
ROW_CHUNK = 1024

_LN2_HI = 6.93147180369123816490e-01
_LN2_LO = 1.90821492927058770002e-10
_LOG2E = 1.44269504088896338700e00
_SHIFT = 6755399441055744.0  # 1.5·2^52: x + _SHIFT − _SHIFT rounds x to an integer

# ---------------------------------------------------------------- min / max ----------
# llvm.maxnum / llvm.minnum (flagged no-NaN, no-signed-zero) let LLVM vectorise the
# reductions; a compare-and-select written in Python does not vectorise here.  Membership
# of I_up / I_low is one status byte per variable, turned into ∓inf by a select, so the
# passes read as few bytes per variable as possible (they are limited by cache bandwidth).  The
# pure-Python versions agree for non-NaN arguments (a NaN objective stops the loop).
# error_model="numpy" drops Python's zero-division check, which blocks vectorisation;
# every divisor in this module is > 0 by construction.

if config.DISABLE_JIT:  # pragma: no cover - exercised in a subprocess test

    def _fmax(a: float, b: float) -> float:
        return a if a >= b else b

    def _fmin(a: float, b: float) -> float:
        return a if a <= b else b

    def _load_acquire(arr, k):
        return arr[k]

    def _store_release(arr, k, v):
        arr[k] = v

    def _claim(arr, k, old, new):
        if arr[k] == old:
            arr[k] = new
            return True
        return False

    def _spin_pause():
        return None

else:
    from llvmlite import ir
    from numba import types
    from numba.core import cgutils

    _X86 = platform.machine().lower() in ("x86_64", "amd64", "i686", "x86")
    from numba.extending import intrinsic

    def _llvm_binary(name: str):
        @intrinsic
        def _op(typingctx, a, b):
            sig = types.float64(types.float64, types.float64)

            def codegen(context, builder, signature, args):
                dbl = ir.DoubleType()
                fn = builder.module.declare_intrinsic(
                    name, [dbl], ir.FunctionType(dbl, [dbl, dbl]))
                return builder.call(fn, args, fastmath=("nnan", "nsz"))

            return sig, codegen

        return _op

    _fmax = _llvm_binary("llvm.maxnum")
    _fmin = _llvm_binary("llvm.minnum")

    # The loop and its helper thread meet through two counters: an acquire load / release
    # store on them orders every plain access to the shared arrays before and after.
    def _item_pointer(context, builder, aryty, ary_val, idx):
        ary = context.make_array(aryty)(context, builder, ary_val)
        return cgutils.get_item_pointer(context, builder, aryty, ary, [idx])

    @intrinsic
    def _load_acquire(typingctx, arr, k):
        sig = types.int64(arr, k)

        def codegen(context, builder, signature, args):
            ptr = _item_pointer(context, builder, signature.args[0], args[0], args[1])
            return builder.load_atomic(ptr, "acquire", 8)

        return sig, codegen

    @intrinsic
    def _store_release(typingctx, arr, k, v):
        sig = types.void(arr, k, types.int64)

        def codegen(context, builder, signature, args):
            ptr = _item_pointer(context, builder, signature.args[0], args[0], args[1])
            builder.store_atomic(args[2], ptr, "release", 8)
            return context.get_dummy_value()

        return sig, codegen

    @intrinsic
    def _claim(typingctx, arr, k, old, new):
        """Atomically arr[k] ← new if arr[k] == old; True when it did (compare-and-swap)."""
        sig = types.boolean(arr, k, types.int64, types.int64)

        def codegen(context, builder, signature, args):
            ptr = _item_pointer(context, builder, signature.args[0], args[0], args[1])
            res = builder.cmpxchg(ptr, args[2], args[3], "acq_rel", "acquire")
            return builder.extract_value(res, 1)

        return sig, codegen

    @intrinsic
    def _spin_pause(typingctx):
        sig = types.void()

        def codegen(context, builder, signature, args):
            if _X86:
                fn = builder.module.declare_intrinsic(
                    "llvm.x86.sse2.pause", fnty=ir.FunctionType(ir.VoidType(), []))
                builder.call(fn, [])
            return context.get_dummy_value()

        return sig, codegen


# No fast-math contraction anywhere: fused multiply-adds would make the compiled results
# differ in the last bit from the pure-Python run (NUMBA_DISABLE_JIT=1) and, depending on
# where a function is inlined, from each other; without them every run is bitwise equal.
_jit = njit(cache=True, error_model="numpy", nogil=True)

# ---------------------------------------------------------------- kernel rows --------


@_jit
def exp_inplace(x, ibuf):
    """x[t] ← exp(x[t]) for x (L,) float64, x ≤ 709; below −708 the result is exp(−708).

    Cody–Waite reduction x = k ln2 + r, |r| ≤ ln2/2; exp(r) = 1 + (r + r²·P(r)) with P the
    degree-11 Taylor polynomial of (eʳ − 1 − r)/r², evaluated by Estrin's scheme (pairs of
    terms, then powers r², r⁴: a dependency chain of five multiply-adds instead of Horner's
    thirteen, measured 1.4× faster per entry here); scaling by 2^k built from its bit
    pattern in ``ibuf`` (L,) int64; ≤ 1 ulp from libm in our checks
    (``tests/test_smo_kernels.py``).  Written as two flat loops so that it vectorises.
    """
    n = x.shape[0]
    fb = ibuf[:n].view(np.float64)
    for t in range(n):
        v = min(max(x[t], -708.0), 709.0)
        k = (v * _LOG2E + _SHIFT) - _SHIFT
        r = (v - k * _LN2_HI) - k * _LN2_LO
        r2 = r * r
        r4 = r2 * r2
        p0 = 0.5 + r * (1.0 / 6.0)
        p1 = 1.0 / 24.0 + r * (1.0 / 120.0)
        p2 = 1.0 / 720.0 + r * (1.0 / 5040.0)
        p3 = 1.0 / 40320.0 + r * (1.0 / 362880.0)
        p4 = 1.0 / 3628800.0 + r * (1.0 / 39916800.0)
        p5 = 1.0 / 479001600.0 + r * (1.0 / 6227020800.0)
        q0 = p0 + p1 * r2
        q1 = p2 + p3 * r2
        q2 = p4 + p5 * r2
        big = q0 + r4 * (q1 + q2 * r4)
        ibuf[t] = (np.int64(k) + 1023) << 52
        x[t] = 1.0 + (r + r2 * big)
    for t in range(n):
        x[t] = x[t] * fb[t]


@_jit
def self_dots(XK, out):
    """out[t] = Σₖ XK[k, t]² with the same summation order as :func:`kernel_row`."""
    d, n = XK.shape
    for t in range(n):
        acc = 0.0
        k = 0
        while k + 4 <= d:
            x0 = XK[k, t]
            x1 = XK[k + 1, t]
            x2 = XK[k + 2, t]
            x3 = XK[k + 3, t]
            acc += (x0 * x0 + x1 * x1) + (x2 * x2 + x3 * x3)
            k += 4
        while k < d:
            acc += XK[k, t] * XK[k, t]
            k += 1
        out[t] = acc


@_jit
def kernel_row(XS, src, sqi, XK, sq, count, out, code, gamma, offset, degree, acc, ibuf):
    """out[t] = K(x, x_t) for t < count with x = XS[:, src], x_t = XK[:, t] ((d, ·) float64).

    sqi = ‖x‖², sq squared norms of the XK columns (from :func:`self_dots`); acc (L,)
    float64 and ibuf (≥ L,) int64 work buffers, L the chunk length; out may be float32
    (values are rounded on store).  Every entry is computed by the same arithmetic
    wherever column t sits and whatever L is, so rows over permuted columns are bitwise
    equal to the matching entries of other rows.
    """
    kernel_row_part(XS, src, sqi, XK, sq, 0, count, out, code, gamma, offset, degree, acc,
                    ibuf)


@_jit
def kernel_row_part(XS, src, sqi, XK, sq, c0, count, out, code, gamma, offset, degree, acc,
                    ibuf):
    """Like :func:`kernel_row` for the columns c0..c0+count−1 of XK: out[t] = K(x, x_{c0+t})."""
    d = XK.shape[0]
    step = acc.shape[0]
    for s in range(0, count, step):
        e = min(count, s + step)
        L = e - s
        a = acc[:L]
        for t in range(L):
            a[t] = 0.0
        k = 0
        while k + 4 <= d:
            x0 = XS[k, src]
            x1 = XS[k + 1, src]
            x2 = XS[k + 2, src]
            x3 = XS[k + 3, src]
            r0 = XK[k, c0 + s:c0 + e]
            r1 = XK[k + 1, c0 + s:c0 + e]
            r2 = XK[k + 2, c0 + s:c0 + e]
            r3 = XK[k + 3, c0 + s:c0 + e]
            for t in range(L):
                a[t] += (x0 * r0[t] + x1 * r1[t]) + (x2 * r2[t] + x3 * r3[t])
            k += 4
        while k < d:
            xk = XS[k, src]
            rk = XK[k, c0 + s:c0 + e]
            for t in range(L):
                a[t] += xk * rk[t]
            k += 1
        _transform(a, sqi, sq[c0 + s:c0 + e], code, gamma, offset, degree, ibuf)
        o = out[s:e]
        for t in range(L):
            o[t] = a[t]


@_jit
def _transform(a, sqi, sqs, code, gamma, offset, degree, ibuf):
    """a[t] ← kernel value from the inner product a[t] = x·x_t (‖x‖² = sqi, ‖x_t‖² = sqs[t])."""
    L = a.shape[0]
    if code == KERNEL_RBF:
        for t in range(L):
            v = (sqi + sqs[t]) - 2.0 * a[t]
            a[t] = -gamma * max(v, 0.0)
        exp_inplace(a, ibuf)
    elif code == KERNEL_POLY:
        for t in range(L):
            v = gamma * a[t] + offset
            w = v
            for _ in range(degree - 1):
                w = w * v
            a[t] = w
    elif code == KERNEL_SIGMOID:
        for t in range(L):
            a[t] = np.tanh(gamma * a[t] + offset)


@_jit
def kernel_diag(XK, sq, out, code, gamma, offset, degree, acc, ibuf):
    """out[t] = K(x_t, x_t) (n,), by the same arithmetic as :func:`kernel_row`."""
    n = XK.shape[1]
    one = np.empty(1)
    for t in range(n):
        v = sq[t]
        if code == KERNEL_RBF:
            one[0] = -gamma * max((v + v) - 2.0 * v, 0.0)
            exp_inplace(one, ibuf)
            out[t] = one[0]
        elif code == KERNEL_POLY:
            b = gamma * v + offset
            w = b
            for _ in range(degree - 1):
                w = w * b
            out[t] = w
        elif code == KERNEL_SIGMOID:
            out[t] = np.tanh(gamma * v + offset)
        else:
            out[t] = v


@_jit
def fill_rows(XK, sq, rows, gram, rowslot, istate, code, gamma, offset, degree, acc, ibuf):
    """Compute the Gram rows ``rows`` (original indices) not stored yet.

    Rows are packed into ``gram`` (n, n) in the order they are first needed
    (``rowslot[o]`` is the storage row of index o, −1 if not computed), so that only
    the memory of computed rows is ever touched.
    """
    n = gram.shape[1]
    done = 0
    for r in range(rows.shape[0]):
        o = rows[r]
        if rowslot[o] < 0:
            k = istate[IS_POOL_USED]
            kernel_row(XK, o, sq[o], XK, sq, n, gram[k], code, gamma, offset, degree, acc,
                       ibuf)
            rowslot[o] = k
            istate[IS_POOL_USED] = k + 1
            done += 1
    return done


@_jit
def tile_dots(XS, cols, r0, rb, XT, s, e, acc4):
    """acc4[u, t] = Σ_k XS[k, cols[r0 + u]] · XT[k, s + t] for u < rb, t < e − s: the dot
    products of up to four source columns of XS with the columns s..e−1 of XT, four
    features per pass (the order of every sum is fixed, so callers get the same bits)."""
    d = XS.shape[0]
    L = e - s
    for u in range(rb):
        au = acc4[u, :L]
        for t in range(L):
            au[t] = 0.0
    k = 0
    while k + 4 <= d:
        v0 = XT[k, s:e]
        v1 = XT[k + 1, s:e]
        v2 = XT[k + 2, s:e]
        v3 = XT[k + 3, s:e]
        for u in range(rb):
            c = cols[r0 + u]
            x0 = XS[k, c]
            x1 = XS[k + 1, c]
            x2 = XS[k + 2, c]
            x3 = XS[k + 3, c]
            au = acc4[u, :L]
            for t in range(L):
                au[t] += (x0 * v0[t] + x1 * v1[t]) + (x2 * v2[t] + x3 * v3[t])
        k += 4
    while k < d:
        vk = XT[k, s:e]
        for u in range(rb):
            xk = XS[k, cols[r0 + u]]
            au = acc4[u, :L]
            for t in range(L):
                au[t] += xk * vk[t]
        k += 1


@_jit
def reconstruct(XK, sq, targets, out_pos, XV, sqv, coef, q, F, code, gamma, offset, degree,
                acc4, ibuf):
    """F[p] = −q[p] − Σ_s coef[s] K(x_t, v_s) for the columns t = targets[r] of XK and
    positions p = out_pos[r], with the support points v_s the columns of XV (d, m);
    acc4 (4, CHUNK) work buffer.  Rebuilds the gradient from the data (kernel values by
    the arithmetic of :func:`kernel_row`, so every kernel mode gets the same bits); four
    targets share each pass over XV."""
    m = XV.shape[1]
    nt = targets.shape[0]
    sums = np.zeros(4)
    for r0 in range(0, nt, 4):
        rb = min(4, nt - r0)
        for u in range(4):
            sums[u] = 0.0
        for s in range(0, m, CHUNK):
            e = min(m, s + CHUNK)
            L = e - s
            tile_dots(XK, targets, r0, rb, XV, s, e, acc4)
            cs = coef[s:e]
            for u in range(rb):
                au = acc4[u, :L]
                _transform(au, sq[targets[r0 + u]], sqv[s:e], code, gamma, offset, degree, ibuf)
                tot = 0.0
                for t in range(L):
                    tot += cs[t] * au[t]
                sums[u] += tot
        for u in range(rb):
            c = out_pos[r0 + u]
            F[c] = -q[c] - sums[u]


@_jit
def gram_times(gram, rowslot, src, coef, targets, out):
    """out[k] = Σ_s coef[s] · K[src[s], targets[k]] from stored rows of the symmetric Gram."""
    for k in range(targets.shape[0]):
        out[k] = 0.0
    for s in range(src.shape[0]):
        row = gram[rowslot[src[s]]]
        c = coef[s]
        for k in range(targets.shape[0]):
            out[k] += c * row[targets[k]]


@_jit
def compact_cache(cache, old_stride, new_stride, survivors, keep, new_a):
    """Move the cached rows of slots ``survivors`` (increasing) to slots 0, 1, … of length
    ``new_stride`` ≤ old_stride, keeping only the positions ``keep`` (increasing, new_a of
    them).  In place: every copy goes forward, so nothing is overwritten before it is read."""
    for r in range(survivors.shape[0]):
        src = survivors[r] * old_stride
        dst = r * new_stride
        for k in range(new_a):
            cache[dst + k] = cache[src + keep[k]]


@_jit
def relayout_cache(cache, old_stride, new_stride, survivors, slot_ver, vmaps, cur, keep, new_a):
    """Like :func:`compact_cache`, for rows cached in older layouts: the row of slot s is
    in layout ``slot_ver[s]``; the entry of old-layout position keep[k] is, for a row of
    an older version v < cur, at position vmaps[v, keep[k]] ≥ keep[k] ≥ k, so every copy
    still goes forward."""
    for r in range(survivors.shape[0]):
        s = survivors[r]
        src = s * old_stride
        dst = r * new_stride
        v = slot_ver[s]
        if v == cur:
            for k in range(new_a):
                cache[dst + k] = cache[src + keep[k]]
        else:
            mv = vmaps[v]
            for k in range(new_a):
                cache[dst + k] = cache[src + mv[keep[k]]]


# ---------------------------------------------------------------- row cache ----------


@_jit
def _lru_touch(s, lru_prev, lru_next, slot_stamp, istate, it):
    """Move slot s to the head (most recently used) of the LRU list; stamp it with ``it``."""
    slot_stamp[s] = it
    head = istate[IS_HEAD]
    if head == s:
        return
    p = lru_prev[s]
    q = lru_next[s]
    if p >= 0:
        lru_next[p] = q
    if q >= 0:
        lru_prev[q] = p
    if istate[IS_TAIL] == s:
        istate[IS_TAIL] = p
    lru_prev[s] = -1
    lru_next[s] = head
    if head >= 0:
        lru_prev[head] = s
    istate[IS_HEAD] = s
    if istate[IS_TAIL] < 0:
        istate[IS_TAIL] = s


@_jit
def _lru_take(slot_of, slot_owner, lru_prev, lru_next, slot_stamp, istate, it):
    """A slot for a new row: a free one, else the least recently used (evicted)."""
    used = istate[IS_USED]
    if used < istate[IS_SLOTS]:
        s = used
        istate[IS_USED] = used + 1
        lru_prev[s] = -1
        lru_next[s] = -1
    else:
        s = istate[IS_TAIL]
        slot_of[slot_owner[s]] = -2  # evicted: a later miss on it counts as a re-miss
    _lru_touch(s, lru_prev, lru_next, slot_stamp, istate, it)
    return s


@_jit
def _fetch(p, a, perm, gram, rowslot, cache, slot_of, slot_owner, lru_prev, lru_next,
           slot_stamp, slot_ver, vmaps, ext_row, XK, sq, acc, ibuf, istate, fstate, it, hctl):
    """(ok, row, ref): kernel row of position p over positions 0..a−1 (a view) and its
    reference for the helper thread (:func:`_row_of`); ok=False if an external kernel
    must supply it first (istate[IS_NEED_ORIG] says which).  A cached row stored
    in an older layout v (before shrinks) is first moved to the current one in place:
    entry k comes from position vmaps[v, k] ≥ k (copies go forward)."""
    o = perm[p]
    n = perm.shape[0]
    mode = istate[IS_MODE]
    code = istate[IS_KERNEL]
    if mode == 0:
        k = rowslot[o]
        if k < 0:
            if code == KERNEL_EXTERNAL:
                istate[IS_NEED_ORIG] = o
                return False, cache[0:0], 0
            k = istate[IS_POOL_USED]
            row_split(XK, o, sq, n, gram[k], -1 - k, code, fstate[FS_GAMMA],
                      fstate[FS_OFFSET], istate[IS_DEGREE], acc, ibuf, hctl)
            rowslot[o] = k
            istate[IS_POOL_USED] = k + 1
            istate[IS_ROW_EVALS] += 1
        if a == n:
            return True, gram[k], -1 - k
    stride = istate[IS_STRIDE]
    s = slot_of[o]
    if s >= 0:
        istate[IS_HITS] += 1
        _lru_touch(s, lru_prev, lru_next, slot_stamp, istate, it)
        base = s * stride
        v = slot_ver[s]
        cur = istate[IS_VERSION]
        if v != cur:
            mv = vmaps[v]
            for k in range(a):
                cache[base + k] = cache[base + mv[k]]
            slot_ver[s] = cur
            istate[IS_REMAPS] += 1
        return True, cache[base:base + a], base
    if mode == 1 and code == KERNEL_EXTERNAL and istate[IS_EXT_ORIG] != o:
        istate[IS_NEED_ORIG] = o
        return False, cache[0:0], 0
    istate[IS_MISSES] += 1
    if s == -2:
        istate[IS_REMISSES] += 1
    s = _lru_take(slot_of, slot_owner, lru_prev, lru_next, slot_stamp, istate, it)
    slot_of[o] = s
    slot_owner[s] = o
    slot_ver[s] = istate[IS_VERSION]
    row = cache[s * stride:s * stride + a]
    if mode == 0:
        g = gram[rowslot[o]]
        for t in range(a):
            row[t] = g[perm[t]]
    elif code == KERNEL_EXTERNAL:
        for t in range(a):
            row[t] = ext_row[t]
        istate[IS_EXT_ORIG] = -1
    else:
        row_split(XK, p, sq, a, row, s * stride, code, fstate[FS_GAMMA], fstate[FS_OFFSET],
                  istate[IS_DEGREE], acc, ibuf, hctl)
        istate[IS_ROW_EVALS] += 1
    return True, row, s * stride


# ---------------------------------------------------------------- the two passes -----


@_jit
def pass_up(F, Ki, Kj, di, dj, status, a, bm, wbuf, update):
    """Optionally F[t] −= Ki[t]·di + Kj[t]·dj, then (m, i): m = max F[t] over t < a in
    I_up (status bit 1) and i its lowest position (−1 if I_up is empty).  bm holds
    per-block maxima, wbuf (BLK,) is work space."""
    nb = (a + BLK - 1) // BLK
    m = -np.inf
    for k in range(nb):
        s = k * BLK
        e = min(a, s + BLK)
        L = e - s
        Fs = F[s:e]
        Ss = status[s:e]
        mk = -np.inf
        if update:  # a separate loop: a store in the reduction loop stops vectorisation
            Is = Ki[s:e]
            Js = Kj[s:e]
            for t in range(L):
                Fs[t] = Fs[t] - (Is[t] * di + Js[t] * dj)
        for t in range(L):
            mk = _fmax(mk, Fs[t] if (Ss[t] & UP) != 0 else -np.inf)
        bm[k] = mk
        m = _fmax(m, mk)
    if not m > -np.inf:
        return m, -1
    for k in range(nb):
        if bm[k] == m:  # first block holding the maximum: locate it there
            s = k * BLK
            e = min(a, s + BLK)
            L = e - s
            Fs = F[s:e]
            Ss = status[s:e]
            w = wbuf[:L]
            for t in range(L):
                w[t] = Fs[t] if (Ss[t] & UP) != 0 else -np.inf
            for t in range(L):
                if w[t] == m:
                    return m, s + t
    return m, -1


@_jit
def pass_low(F, Ki, diag, status, a, m, kii, tau, second, unit_diag, bm, wbuf):
    """(best, j, M) over positions t < a in I_low (status bit 2): M = min F[t];
    j = lowest position minimising the selection value −(m − F[t])²/āᵢₜ (second order;
    āᵢₜ = Kᵢᵢ + Kₜₜ − 2Kᵢₜ, τ if ≤ 0; Fan, Chen & Lin 2005, WSS 2) or −(m − F[t]) (first
    order) among F[t] < m; j = −1 if there is none (best ≥ 0).  ``unit_diag``: every
    Kₜₜ = 1 (RBF), so ``diag`` is not read."""
    nb = (a + BLK - 1) // BLK
    best = np.inf
    big_m = np.inf

    for k in range(nb):
        s = k * BLK
        e = min(a, s + BLK)
        L = e - s
        Fs = F[s:e]
        Ss = status[s:e]
        bk = np.inf
        mk = np.inf
        if second and unit_diag:
            Is = Ki[s:e]
            for t in range(L):
                ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                mk = _fmin(mk, ft)
                b = _fmax(m - ft, 0.0)
                q = (kii + 1.0) - 2.0 * Is[t]
                q = q if q > 0.0 else tau
                bk = _fmin(bk, -(b * b) / q)
        elif second:
            Is = Ki[s:e]
            Ds = diag[s:e]
            for t in range(L):
                ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                mk = _fmin(mk, ft)
                b = _fmax(m - ft, 0.0)
                q = (kii + Ds[t]) - 2.0 * Is[t]
                q = q if q > 0.0 else tau
                bk = _fmin(bk, -(b * b) / q)
        else:
            for t in range(L):
                ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                mk = _fmin(mk, ft)
                bk = _fmin(bk, -_fmax(m - ft, 0.0))
        bm[k] = bk
        best = _fmin(best, bk)
        big_m = _fmin(big_m, mk)
    if not best < 0.0:
        return best, -1, big_m
    for k in range(nb):
        if bm[k] == best:  # first block holding the minimum: recompute its values, locate
            s = k * BLK
            e = min(a, s + BLK)
            L = e - s
            Fs = F[s:e]
            Ss = status[s:e]
            w = wbuf[:L]
            if second and unit_diag:
                Is = Ki[s:e]
                for t in range(L):
                    ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                    b = _fmax(m - ft, 0.0)
                    q = (kii + 1.0) - 2.0 * Is[t]
                    q = q if q > 0.0 else tau
                    w[t] = -(b * b) / q
            elif second:
                Is = Ki[s:e]
                Ds = diag[s:e]
                for t in range(L):
                    ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                    b = _fmax(m - ft, 0.0)
                    q = (kii + Ds[t]) - 2.0 * Is[t]
                    q = q if q > 0.0 else tau
                    w[t] = -(b * b) / q
            else:
                for t in range(L):
                    ft = Fs[t] if (Ss[t] & LOW) != 0 else np.inf
                    w[t] = -_fmax(m - ft, 0.0)
            for t in range(L):
                if w[t] == best:
                    return best, s + t, big_m
    return best, -1, big_m


# ---------------------------------------------------------------- helper thread ------
# On a machine with a second core the loop hands the upper part of each long pass, and of
# each long kernel row, to a helper thread (:func:`helper_loop`) and does the lower part
# itself.  Every entry is computed by the same arithmetic either way, and the two partial
# results combine with ties going to the lower part, so the run is bitwise the same as
# with one thread.  Measured gains per phase are in DEVELOPERS.md ("SMO speed").


@_jit
def _row_of(ref, length, gram, cache):
    """The stored row ``ref``: Gram row −1−ref when ref < 0, else cache[ref:ref+length]."""
    if ref < 0:
        return gram[-1 - ref]
    return cache[ref:ref + length]


@_jit
def _split_point(count):
    """Where the loop's part ends and the helper's begins (a multiple of 64)."""
    return (count // 2) & ~63


@_jit
def _post(hctl, kind, lo, hi, src, ref_i, ref_j, flag):
    """Post a job of ``kind`` over positions (or columns) lo..hi−1, with its fields (the
    values it needs, if any, already in hval); returns its number."""
    hctl[H_KIND] = kind
    hctl[H_LO] = lo
    hctl[H_HI] = hi
    hctl[H_SRC] = src
    hctl[H_REF_I] = ref_i
    hctl[H_REF_J] = ref_j
    hctl[H_FLAG] = flag
    seq = hctl[H_POSTED] + 1
    _store_release(hctl, H_POSTED, seq)
    return seq


@_jit
def _take_back(hctl, seq):
    """After the loop has done its part of job ``seq``: True when the helper had not
    claimed the job yet and the loop has taken it back (the loop then does the helper's
    part itself), False once the helper has finished it.  So a helper that is slow to
    start, or waits for a core on a busy machine, never holds the loop up before it has
    begun a job; one that missed half of the jobs is sent away for the rest of the call."""
    if _load_acquire(hctl, H_DONE) >= seq:
        return False
    if _claim(hctl, H_CLAIM, seq - 1, seq):
        hctl[H_TAKEN] += 1
        if hctl[H_TAKEN] >= TAKE_BACK_LIMIT and 2 * hctl[H_TAKEN] >= seq:
            hctl[H_AWAY] = 1
            helper_stop(hctl)
        return True
    while _load_acquire(hctl, H_DONE) < seq:
        _spin_pause()
    return False


@_jit
def row_split(XK, src, sq, count, out, ref, code, gamma, offset, degree, acc, ibuf, hctl):
    """out[t] = K(x_src, x_t) for t < count (:func:`kernel_row`), the columns from the
    split point on computed by the helper when one serves the loop; ``ref`` names ``out``
    for the helper (see :func:`_row_of`)."""
    if hctl[H_ON] == 1 and count >= SPLIT_ROW:
        h = _split_point(count)
        seq = _post(hctl, JOB_ROW, h, count, src, ref, 0, 0)
        kernel_row_part(XK, src, sq[src], XK, sq, 0, h, out, code, gamma, offset, degree,
                        acc, ibuf)
        if _take_back(hctl, seq):
            kernel_row_part(XK, src, sq[src], XK, sq, h, count - h, out[h:count], code,
                            gamma, offset, degree, acc, ibuf)
    else:
        kernel_row(XK, src, sq[src], XK, sq, count, out, code, gamma, offset, degree, acc,
                   ibuf)


@_jit
def up_split(F, Ki, Kj, ref_i, ref_j, di, dj, status, a, bm, wbuf, update, hctl, hval):
    """:func:`pass_up` over positions < a, shared with the helper when one serves the loop."""
    if hctl[H_ON] == 1 and a >= SPLIT_PASS:
        h = _split_point(a)
        hval[HV_DI] = di
        hval[HV_DJ] = dj
        seq = _post(hctl, JOB_UP, h, a, 0, ref_i, ref_j, 1 if update else 0)
        m, i = pass_up(F, Ki, Kj, di, dj, status, h, bm, wbuf, update)
        if _take_back(hctl, seq):
            m2, i2 = pass_up(F[h:a], Ki[h:a], Kj[h:a], di, dj, status[h:a], a - h, bm, wbuf,
                             update)
        else:
            m2, i2 = hval[HV_RES], hctl[H_RES]
        if m2 > m:  # ties go to the lower positions
            return m2, h + i2
        return m, i
    return pass_up(F, Ki, Kj, di, dj, status, a, bm, wbuf, update)


@_jit
def low_split(F, Ki, ref_i, diag, status, a, m, kii, tau, second, unit_diag, bm, wbuf, hctl,
              hval):
    """:func:`pass_low` over positions < a, shared with the helper when one serves the loop."""
    if hctl[H_ON] == 1 and a >= SPLIT_PASS:
        h = _split_point(a)
        hval[HV_M] = m
        hval[HV_KII] = kii
        flag = (1 if second else 0) + (2 if unit_diag else 0)
        seq = _post(hctl, JOB_LOW, h, a, 0, ref_i, 0, flag)
        best, j, big_m = pass_low(F, Ki, diag, status, h, m, kii, tau, second, unit_diag, bm,
                                  wbuf)
        if _take_back(hctl, seq):
            best2, j2, big_m2 = pass_low(F[h:a], Ki[h:a], diag[h:a], status[h:a], a - h, m,
                                         kii, tau, second, unit_diag, bm, wbuf)
        else:
            best2, j2, big_m2 = hval[HV_RES], hctl[H_RES], hval[HV_RES2]
        big_m = _fmin(big_m, big_m2)
        if best2 < best:  # ties go to the lower positions
            return best2, (h + j2 if j2 >= 0 else -1), big_m
        return best, j, big_m
    return pass_low(F, Ki, diag, status, a, m, kii, tau, second, unit_diag, bm, wbuf)


@_jit
def helper_loop(hctl, hval, F, diag, status, gram, cache, XK, sq, istate, fstate):
    """The helper thread: serve the jobs posted by :func:`smo_run` (its arrays, shared)
    until JOB_EXIT.  Each job covers positions (or columns) hctl[H_LO]..hctl[H_HI]−1."""
    bm = np.empty(F.shape[0] // BLK + 2)
    wbuf = np.empty(BLK)
    acc = np.empty(ROW_CHUNK)
    ibuf = np.empty(ROW_CHUNK, dtype=np.int64)
    seen = hctl[H_CLAIM]
    tau = fstate[FS_TAU]
    while True:
        seen += 1
        while _load_acquire(hctl, H_POSTED) < seen:
            _spin_pause()
        if not _claim(hctl, H_CLAIM, seen - 1, seen):
            continue  # the loop took this job back (it never takes JOB_EXIT)
        # claimed: the loop posts no other job before this one is done, so its fields hold
        kind = hctl[H_KIND]
        if kind == JOB_EXIT:
            _store_release(hctl, H_DONE, seen)
            return
        lo = hctl[H_LO]
        hi = hctl[H_HI]
        if kind == JOB_ROW:
            out = _row_of(hctl[H_REF_I], hi, gram, cache)
            kernel_row_part(XK, hctl[H_SRC], sq[hctl[H_SRC]], XK, sq, lo, hi - lo, out[lo:hi],
                            istate[IS_KERNEL], fstate[FS_GAMMA], fstate[FS_OFFSET],
                            istate[IS_DEGREE], acc, ibuf)
        elif kind == JOB_UP:
            up = hctl[H_FLAG] == 1  # without an update the rows are not read
            Ki = _row_of(hctl[H_REF_I], hi, gram, cache)
            Kj = _row_of(hctl[H_REF_J], hi, gram, cache)
            m, i = pass_up(F[lo:hi], Ki[lo:hi], Kj[lo:hi], hval[HV_DI], hval[HV_DJ],
                           status[lo:hi], hi - lo, bm, wbuf, up)
            hval[HV_RES] = m
            hctl[H_RES] = i
        else:
            Ki = _row_of(hctl[H_REF_I], hi, gram, cache)
            flag = hctl[H_FLAG]
            best, j, big_m = pass_low(F[lo:hi], Ki[lo:hi], diag[lo:hi], status[lo:hi],
                                      hi - lo, hval[HV_M], hval[HV_KII], tau,
                                      (flag & 1) != 0, (flag & 2) != 0, bm, wbuf)
            hval[HV_RES] = best
            hval[HV_RES2] = big_m
            hctl[H_RES] = j
        _store_release(hctl, H_DONE, seen)


@_jit
def helper_stop(hctl):
    """Tell a helper serving the loop to return (the loop calls this on every exit)."""
    if hctl[H_ON] == 1:
        _post(hctl, JOB_EXIT, 0, 0, 0, 0, 0, 0)
        hctl[H_ON] = 0


# ---------------------------------------------------------------- one step ----------


@_jit
def pair_step(i, j, b, kij, gi, gj, beta, lo, hi, diag, status, tau, it, istate, ev_it,
              ev_kind, ev_val):
    """The two-variable step along βᵢ += s, βⱼ −= s (Platt 1998; Fan, Chen & Lin 2005,
    eq. 15): unconstrained minimiser s = b/aᵢⱼ with b = Fᵢ − Fⱼ > 0 and aᵢⱼ = Kᵢᵢ + Kⱼⱼ −
    2Kᵢⱼ (τ when aᵢⱼ ≤ 0, recorded as a curvature event at iteration it + 1), clipped to
    the box; β and status updated in place.  gi, gj: the gradient values Fᵢ, Fⱼ used.
    Returns (Δβᵢ, Δβⱼ, new βᵢ, new βⱼ, exact change of ½βᵀKβ + qᵀβ, event)."""
    aij = (diag[i] + diag[j]) - 2.0 * kij
    event = False
    if aij <= 0.0:
        ev = istate[IS_EVENTS]
        ev_it[ev] = it + 1
        ev_kind[ev] = EV_CURVATURE
        ev_val[ev] = aij
        istate[IS_EVENTS] = ev + 1
        istate[IS_CURV_FIXES] += 1
        event = True
        s = b / tau
    else:
        s = b / aij
    bi_old = beta[i]
    bj_old = beta[j]
    cap_i = hi[i] - bi_old
    cap_j = bj_old - lo[j]
    if s >= cap_i or s >= cap_j:
        if cap_i <= cap_j:
            s = cap_i
            bi_new = hi[i]
            bj_new = lo[j] if cap_i == cap_j else bj_old - s
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
    status[i] = (UP if bi_new < hi[i] else 0) | (LOW if bi_new > lo[i] else 0)
    status[j] = (UP if bj_new < hi[j] else 0) | (LOW if bj_new > lo[j] else 0)
    # exact change of ½βᵀKβ + qᵀβ for the two-variable step: gᵀd + ½dᵀKd, g = −F
    change = -(gi * di + gj * dj) + 0.5 * (diag[i] * di * di + diag[j] * dj * dj
                                           + 2.0 * kij * di * dj)
    return di, dj, bi_new, bj_new, change, event


@_jit
def record_step(it, i, j, bi_new, bj_new, di, dual_value, viol, a, outer, event, perm, ysign,
                istate, tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj, tr_viol, tr_act,
                tr_outer):
    """Write iteration ``it`` to the trace when the level and sampling ask for it (level 0
    full, 1 every IS_SAMPLE-th and every event or forced row, 2 off)."""
    level = istate[IS_LEVEL]
    if level == 2:
        return
    if level == 0 or it % istate[IS_SAMPLE] == 0 or event or istate[IS_FORCE_ROW] == 1:
        r = istate[IS_ROWS]
        tr_it[r] = it
        tr_i[r] = perm[i]
        tr_j[r] = perm[j]
        tr_ai[r] = ysign[i] * bi_new
        tr_aj[r] = ysign[j] * bj_new
        tr_step[r] = ysign[i] * di
        tr_obj[r] = dual_value
        tr_viol[r] = viol
        tr_act[r] = a
        tr_outer[r] = outer
        istate[IS_ROWS] = r + 1
        istate[IS_FORCE_ROW] = 0


@_jit
def progress_code(dual_value, it, stall_window, istate, fstate):
    """RUN_NUMERICAL for a non-finite objective, RUN_STALLED after ``stall_window``
    iterations without a decrease (the best objective and its iteration kept in
    fstate / istate), else −1."""
    if not (abs(dual_value) < np.inf):
        return RUN_NUMERICAL
    if dual_value < fstate[FS_BEST_OBJ] - 1e-15 * max(1.0, abs(fstate[FS_BEST_OBJ])):
        fstate[FS_BEST_OBJ] = dual_value
        istate[IS_LAST_IMPROVE] = it
    elif it - istate[IS_LAST_IMPROVE] >= stall_window:
        return RUN_STALLED
    return -1


# ---------------------------------------------------------------- the loop -----------


@_jit
def smo_run(F, beta, lo, hi, diag, ysign, status, perm,
            gram, rowslot, cache, slot_of, slot_owner, lru_prev, lru_next, slot_stamp, slot_ver,
            vmaps, ext_row, XK, sq, acc, ibuf, bm, istate, fstate,
            tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj, tr_viol, tr_act, tr_outer,
            ev_it, ev_kind, ev_val, hctl, hval):
    """Run SMO iterations on the active positions until a stop or pause condition.

    Position arrays (n,): F, beta (updated in place), lo, hi, diag, ysign, status (uint8
    bits UP / LOW, kept in step with beta), perm (int64).
    Kernel access: Gram rows packed in gram (n, n) with rowslot (n,) (mode 0; see
    :func:`fill_rows`), and, when a < n or in mode 1, the slot cache;
    cache, slot_of, slot_owner, lru_prev, lru_next, slot_stamp: LRU cache of rows over
    the active positions (slot_stamp: iteration of last use); slot_ver (n,), vmaps (V, n):
    layout version of each cached row and the maps from current positions to those of
    older layouts (see :func:`_fetch`); ext_row: a row supplied by the driver for an
    external kernel.  XK (d, n),
    sq (n,): data for kernel rows.  acc, ibuf, bm: work buffers.  istate / fstate: counters
    and scalars (IS_* / FS_* slots).  tr_*: trace columns (tr_outer: each iteration is its
    own outer iteration), ev_*: event columns.
    Returns a RUN_* code; on every return F is up to date with beta.
    """
    a = istate[IS_ACTIVE]
    it = istate[IS_ITER]
    stop_at = istate[IS_STOP_AT]
    shrink_at = istate[IS_SHRINK_AT]
    level = istate[IS_LEVEL]
    second = istate[IS_SECOND_ORDER] == 1
    unit_diag = istate[IS_UNIT_DIAG] == 1
    stall_window = istate[IS_STALL_WINDOW]
    kkt_tol = fstate[FS_TOL]
    tau = fstate[FS_TAU]
    dual_value = fstate[FS_OBJ]
    cap_rows = tr_it.shape[0]
    cap_ev = ev_it.shape[0]
    phase = istate[IS_PHASE]
    i = istate[IS_SEL_I]
    j = istate[IS_SEL_J]
    m = fstate[FS_M_UP]
    big_m = fstate[FS_M_LOW]
    viol = fstate[FS_VIOL]
    pending = False
    di = 0.0
    dj = 0.0
    Ki = cache[0:0]
    Kj = cache[0:0]
    ref_i = 0
    ref_j = 0
    wbuf = np.empty(BLK)
    ret = -1
    while True:
        if phase == 0:
            m, i = up_split(F, Ki, Kj, ref_i, ref_j, di, dj, status, a, bm, wbuf, pending,
                            hctl, hval)
            pending = False
            if ret >= 0:
                break
            if it >= shrink_at:
                ret = RUN_SHRINK
                break
            if (level != 2 and istate[IS_ROWS] >= cap_rows) or istate[IS_EVENTS] >= cap_ev:
                ret = RUN_TRACE_FULL
                break
            if i < 0:
                viol = 0.0
                ret = RUN_CONVERGED
                break
            phase = 1
        if phase == 1:
            ok, Ki, ref_i = _fetch(i, a, perm, gram, rowslot, cache, slot_of, slot_owner,
                                   lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row, XK,
                                   sq, acc, ibuf, istate, fstate, it, hctl)
            if not ok:
                ret = RUN_NEED_ROW
                break
            best, j, big_m = low_split(F, Ki, ref_i, diag, status, a, m, diag[i], tau, second,
                                       unit_diag, bm, wbuf, hctl, hval)
            viol = m - big_m
            if j < 0 or viol <= kkt_tol:
                ret = RUN_CONVERGED
                break
            if it >= stop_at:
                ret = RUN_PAUSE
                break
            phase = 2
        # phase 2: the step
        ok, Kj, ref_j = _fetch(j, a, perm, gram, rowslot, cache, slot_of, slot_owner,
                               lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row, XK, sq,
                               acc, ibuf, istate, fstate, it, hctl)
        if not ok:
            ret = RUN_NEED_ROW
            break
        if Ki.shape[0] == 0:  # resumed after an external row: fetch row i again (a hit)
            ok, Ki, ref_i = _fetch(i, a, perm, gram, rowslot, cache, slot_of, slot_owner,
                                   lru_prev, lru_next, slot_stamp, slot_ver, vmaps, ext_row, XK,
                                   sq, acc, ibuf, istate, fstate, it, hctl)
        di, dj, bi_new, bj_new, change, event = pair_step(
            i, j, m - F[j], Ki[j], F[i], F[j], beta, lo, hi, diag, status, tau, it, istate,
            ev_it, ev_kind, ev_val)
        dual_value += change
        pending = True
        it += 1
        record_step(it, i, j, bi_new, bj_new, di, dual_value, viol, a, it, event, perm, ysign,
                    istate, tr_it, tr_i, tr_j, tr_ai, tr_aj, tr_step, tr_obj, tr_viol, tr_act,
                    tr_outer)
        ret = progress_code(dual_value, it, stall_window, istate, fstate)
        phase = 0
    # on every exit F matches beta (a pending update was applied by pass_up)
    helper_stop(hctl)
    istate[IS_ITER] = it
    istate[IS_PHASE] = phase if ret == RUN_NEED_ROW else 0
    istate[IS_SEL_I] = i
    istate[IS_SEL_J] = j
    fstate[FS_OBJ] = dual_value
    fstate[FS_M_UP] = m
    fstate[FS_M_LOW] = big_m
    fstate[FS_VIOL] = viol
    return ret
