"""SMO decomposition solver for the general SVM dual, with per-iteration traces.

Working-set selection by maximal violating pair (first order; Keerthi et al. 2001) or by
second-order gain (Fan, Chen & Lin, JMLR 6, 2005, WSS 2, the default); non-positive
curvature aᵢⱼ ≤ 0 is replaced by τ = 1e-12 as in that paper (section 4) and recorded as an
event.  Stopping test: maximal violation m(α) − M(α) ≤ kkt_tol.  The numerical loop lives in
:mod:`solver._smo_kernels`; this module validates options, prepares kernel access, runs
the loop in pauses (snapshots, callback, time limit, shrinking), and builds the result.

Kernel access.  Kernel rows are computed from the data when first needed (compiled code
for the built-in kernels, the kernel's own ``block`` otherwise).  When the n×n Gram fits
the budget (``kernel_memory_mb``) each row is kept once computed ("full_gram"); otherwise
an LRU cache of rows over the active variables is used ("column_cache").  Both give the
same bits for the built-in kernels.  Memory is taken on ordinary pages and only touched
when used: on the shared virtual machines this was measured on, first-touching memory
cost 0.5 s/GB (ordinary pages) to 3 s/GB (huge pages), more than recomputing a kernel row
costs, which is why the default Gram budget is small and the cache grows only while
evicted rows keep being requested.  A process keeps the row-cache mapping of its last
solve (its first ``SPARE_KEEP_MB``) for the next one, so that many small solves in one
process (a study's worker) fault its pages in once.

Threads.  With ``threads=2`` (the default where two cores are available) a helper thread
computes the upper half of every long pass and kernel row (see ``_k.helper_loop``); the
run is bitwise the same as with one thread.  On a busy machine the helper waits for a
core: the loop then takes back each part the helper has not begun (``_k._take_back``),
sending it away for the rest of the call when it missed half of them.  After such a call,
or one in which the helper had a core for less than ``HELPER_MIN_SHARE`` of the time, no
helper is started for the next ``HELPER_PAUSE`` iterations, twice as many after each
further such call in a row (at most ``HELPER_PAUSE_MAX``).

Trace.  Row k of the trace describes the state after iteration k (1-based); α at any
recorded iteration of a full trace is rebuilt exactly from the nearest earlier snapshot by
:func:`replay_alpha` (values are copied, never recomputed).
"""

from __future__ import annotations

import math
import mmap
import os
import threading
import time
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np

from . import _block_kernels as _b
from . import _smo_kernels as _k
from ._products import compiled_q_times, kernel_code
from .certificate import certify
from .errors import ConvergenceWarning, InvalidInputError
from .kernels import (
    PrecomputedKernel,
    RBFKernel,
)
from .problem import DualProblem, serial_dot
from .result import TRACE_LEVELS, KeptGradient, SolveResult, Trace
from .status import Status, settle

__all__ = ["solve_smo", "EVENT_KINDS", "SELECTIONS", "replay_alpha", "repair_start"]

#: code → name of trace events (``result.trace.events["kind"]``).
EVENT_KINDS: dict[int, str] = {
    _k.EV_SHRINK: "shrink",
    _k.EV_RECONSTRUCT: "reconstruct",
    _k.EV_CURVATURE: "curvature_fix",
}
SELECTIONS = ("second_order", "first_order")
#: working-set shapes: ``"block"`` (q variables per outer iteration, solved by pair steps on
#: their kernel block; :mod:`solver._block_kernels`) or ``"pair"`` (two variables per
#: iteration, :func:`solver._smo_kernels.smo_run`)
WORKING_SETS = ("block", "pair")
#: block working set: variables per outer iteration, most inner steps per outer iteration,
#: and the inner tolerance as a share of the outer violation (chosen from measurements,
#: see DEVELOPERS.md, "Block working set")
BLOCK_SIZE = 128
BLOCK_INNER_STEPS = 300
BLOCK_INNER_FACTOR = 0.05
BLOCK_FRESH_PERCENT = 25
BLOCK_RULE = 1
#: a shrink is carried out only when it removes at least this fraction of the active set
SHRINK_MIN_FRACTION = 0.05
#: initial row-cache capacity (MB); it grows up to ``row_cache_mb`` while evicted rows recur
CACHE_START_MB = 64
#: default full-Gram budget (MB) when ``kernel_memory_mb`` is not given: the smaller of this
#: and half the available memory.  1 MB: the full Gram only for n ≤ 362, the LRU row cache
#: over the active variables above.  Measured (one thread, RBF, n = 1000 / 2400 / 5000,
#: d = 20, C = 1 and 100, same iterations): the row cache took 0.78–0.87× the solve time of
#: the full Gram, whose rows span every variable, also the shrunk ones.  A larger
#: ``kernel_memory_mb`` still asks for the full Gram.
DEFAULT_GRAM_MB = 1
#: pages of the spare row-cache mapping a process keeps between solves (MB; see _keep_spare)
SPARE_KEEP_MB = CACHE_START_MB
_SPARE: list[mmap.mmap] = []
_SPARE_LOCK = threading.Lock()
#: layouts a cached row may lag behind before all cached rows are moved (see _shrink_cache)
LAYOUT_VERSIONS = 16
#: a full row cache is re-laid out at a shrink only when that gives at least this factor
#: more slots (each relayout moves every cached row; see DEVELOPERS.md, SMO speed)
RELAYOUT_GAIN = 1.2
#: most threads the loop uses (itself and one helper that takes part of each long pass)
MAX_THREADS = 2
#: a helper that had a core (CPU seconds / wall seconds) for less than this share of a call
#: of at least HELPER_MIN_WALL seconds means a busy machine: no helper for HELPER_PAUSE
#: iterations, doubled after each such call in a row up to HELPER_PAUSE_MAX (see module
#: notes; a short first pause because a busy host shows the same sign now and then)
HELPER_MIN_SHARE = 0.8
HELPER_MIN_WALL = 0.002
HELPER_PAUSE = 1000
HELPER_PAUSE_MAX = 64_000
#: τ substituted for non-positive curvature (Fan, Chen & Lin 2005, section 4).
TAU = 1e-12

_TRACE_COLUMNS = (
    ("iteration", np.int64), ("i", np.int32), ("j", np.int32), ("alpha_i", np.float64),
    ("alpha_j", np.float64), ("step", np.float64), ("objective", np.float64),
    ("violation", np.float64), ("active", np.int32), ("outer", np.int64),
)


def _positive_int(value: Any, name: str, *, allow_none: bool = False) -> int | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or int(value) < 1:
        raise InvalidInputError(f"option {name} must be a positive integer, got {value!r}")
    return int(value)


def _positive_float(value: Any, name: str, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise InvalidInputError(f"option {name} must be a number > 0, got {value!r}")
    v = float(value)
    if not (math.isfinite(v) and v > 0.0):
        raise InvalidInputError(f"option {name} must be a finite number > 0, got {value!r}")
    return v


def _check_start(problem: DualProblem, alpha0: Any) -> np.ndarray:
    """Validated copy of a warm start; tiny bound excursions (≤ 1e-12 relative) are clipped."""
    n = problem.n
    try:
        a = np.array(alpha0, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InvalidInputError("alpha0 must be a numeric array") from None
    if a.shape != (n,):
        raise InvalidInputError(
            f"alpha0 must have {n} entries (one per training row), got {a.size}")
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise InvalidInputError(f"alpha0 has a non-finite entry at row {int(bad[0])}")
    lo, up = problem.lower, problem.upper
    slack = 1e-12 * np.maximum(1.0, np.maximum(np.abs(lo), np.abs(up)))
    bad = np.flatnonzero((a < lo - slack) | (a > up + slack))
    if bad.size:
        r = int(bad[0])
        raise InvalidInputError(
            f"alpha0 is infeasible: row {r} has alpha {a[r]!r} outside its bounds "
            f"[{lo[r]!r}, {up[r]!r}] ({bad.size} row(s) out of bounds)"
        )
    np.clip(a, lo, up, out=a)
    resid = abs(serial_dot(problem.y, a) - problem.delta)
    scale = max(1.0, float(np.sum(np.abs(a))), abs(problem.delta))
    if resid > 1e-10 * scale:
        raise InvalidInputError(
            f"alpha0 is infeasible: |yᵀα − Δ| = {resid:.3g} exceeds 1e-10 relative; "
            "rebalance it (e.g. with solver.smo.repair_start)"
        )
    return a


def repair_start(problem: DualProblem, alpha: np.ndarray) -> np.ndarray:
    """A feasible α near ``alpha`` (n,): clipped to the bounds, then yᵀα = Δ restored.

    The equality residual is moved onto rows in index order, each within its bounds; the
    result is feasible, not the nearest feasible point.  Meant for warm starts after
    bounds changed (e.g. leave-one-out refits with one upper bound set to 0).
    """
    a = np.clip(np.asarray(alpha, dtype=np.float64).reshape(-1), problem.lower, problem.upper)
    if a.shape != (problem.n,):
        raise InvalidInputError(f"alpha must have {problem.n} entries, got {a.size}")
    need = problem.delta - serial_dot(problem.y, a)
    for t in range(problem.n):
        if abs(need) <= 1e-14 * max(1.0, abs(problem.delta)):
            break
        # moving α_t by d changes yᵀα by y_t d
        d = need * problem.y[t]
        new = min(max(a[t] + d, problem.lower[t]), problem.upper[t])
        need -= problem.y[t] * (new - a[t])
        a[t] = new
    if abs(need) > 1e-10 * max(1.0, float(np.sum(np.abs(a)))):
        raise InvalidInputError("the problem is infeasible: bounds cannot satisfy yᵀα = Δ")
    return a


def available_cores() -> int:
    """Cores this process may run on (1 under NUMBA_DISABLE_JIT: plain Python holds the GIL)."""
    if _k.config.DISABLE_JIT:
        return 1
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - platforms without affinity masks
        return max(1, os.cpu_count() or 1)


def _threads_from_environment() -> int:
    """``KKTRACE_THREADS`` (a positive integer) if set, else ``MAX_THREADS``."""
    raw = os.environ.get("KKTRACE_THREADS", "").strip()
    if not raw:
        return MAX_THREADS
    try:
        value = int(raw)
    except ValueError:
        value = 0
    if value < 1:
        raise InvalidInputError(
            f"environment variable KKTRACE_THREADS must be a positive integer, got {raw!r}")
    return value


def _available_mb() -> float:
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return 4096.0


def _fresh_array(shape: tuple[int, ...], dtype: np.dtype, *,
                 reuse: bool = False) -> np.ndarray:
    """Uninitialised array on its own anonymous private mapping with ordinary pages.

    numpy asks for transparent huge pages on large arrays; on the virtual machines we
    measured, first-touching huge pages cost 2–3 s/GB against about 0.5 s/GB for ordinary
    pages, and kernel rows are touched a few at a time.  Pages are touched only when used.
    ``reuse``: take this process's spare mapping (see :func:`_keep_spare`) when it is large
    enough, so that its pages already touched are not faulted in again.
    """
    nbytes = int(np.prod(shape)) * np.dtype(dtype).itemsize
    flags = getattr(mmap, "MAP_PRIVATE", 0) | getattr(mmap, "MAP_ANONYMOUS", 0)
    if nbytes < 2**22 or not flags:
        return np.empty(shape, dtype=dtype)
    buf = None
    if reuse:
        with _SPARE_LOCK:
            if _SPARE and len(_SPARE[0]) >= nbytes:
                buf = _SPARE.pop()
    if buf is None:
        buf = mmap.mmap(-1, nbytes, flags=flags)
    return np.frombuffer(buf, dtype=dtype, count=int(np.prod(shape))).reshape(shape)


def _keep_spare(arr: np.ndarray) -> None:
    """Keep the mapping under ``arr`` (made by :func:`_fresh_array`) as this process's one
    spare, its pages beyond the first :data:`SPARE_KEEP_MB` returned to the system.  Many
    small solves in one process (a study's worker) then fault in their row cache once
    instead of once per solve (measured: 19 ms of system time per fit at n = 2400).  The
    caller must not use ``arr`` afterwards."""
    buf = arr.base
    while isinstance(buf, np.ndarray):
        buf = buf.base
    if isinstance(buf, memoryview):
        buf = buf.obj
    if not isinstance(buf, mmap.mmap):
        return
    keep = SPARE_KEEP_MB * 2**20
    if len(buf) > keep and hasattr(buf, "madvise") and hasattr(mmap, "MADV_DONTNEED"):
        buf.madvise(mmap.MADV_DONTNEED, keep, len(buf) - keep)
    with _SPARE_LOCK:
        _SPARE[:] = [buf]


def _grow(arr: np.ndarray, used: int, need: int) -> np.ndarray:
    new = np.zeros(max(2 * arr.shape[0], need, 16), dtype=arr.dtype)
    new[:used] = arr[:used]
    return new


def replay_alpha(trace: Trace, iteration: int) -> np.ndarray:
    """α after ``iteration``, rebuilt from the nearest snapshot at or before it.

    Needs a full trace (or a snapshot at ``iteration``); values are copied, so the
    rebuilt α is bitwise equal to the solver's.
    """
    snaps = np.asarray(trace.snapshot_iterations)
    k = int(np.searchsorted(snaps, iteration, side="right")) - 1
    if k < 0:
        raise InvalidInputError(f"no snapshot at or before iteration {iteration}")
    alpha = np.array(trace.snapshots[k], dtype=np.float64)
    start = int(snaps[k])
    if start == iteration:
        return alpha
    if trace.level != "full":
        raise InvalidInputError("replay between snapshots needs a full trace")
    it = np.asarray(trace.columns["iteration"])
    lo_row = int(np.searchsorted(it, start, side="right"))
    hi_row = int(np.searchsorted(it, iteration, side="right"))
    if hi_row == 0 or it[hi_row - 1] != iteration:
        raise InvalidInputError(f"iteration {iteration} is not in the trace")
    ii, jj = trace.columns["i"], trace.columns["j"]
    ai, aj = trace.columns["alpha_i"], trace.columns["alpha_j"]
    for r in range(lo_row, hi_row):
        alpha[ii[r]] = ai[r]
        alpha[jj[r]] = aj[r]
    return alpha


class _Engine:
    """State of one SMO run: position arrays, kernel access, trace buffers.

    Positions 0..a−1 hold the active variables in increasing original index;
    ``perm[pos]`` is the original index.  All arrays handed to the compiled loop are
    owned here and reused across pauses.
    """

    def __init__(self, problem: DualProblem, alpha: np.ndarray, *, dtype: np.dtype,
                 budget_mb: float, row_cache_mb: float, level: int, trace_rows: int,
                 threads: int = 1, working_set: str = "pair", block_size: int = BLOCK_SIZE,
                 inner_steps: int = BLOCK_INNER_STEPS,
                 inner_factor: float = BLOCK_INNER_FACTOR,
                 fresh_percent: int = BLOCK_FRESH_PERCENT) -> None:
        self.problem = problem
        self.block = working_set == "block"
        self.threads = 1 if self.block else threads
        self.hctl = np.zeros(_k.H_SIZE, dtype=np.int64)
        self.hval = np.zeros(_k.HV_SIZE)
        self.helper_jobs = 0
        self.helper_taken = 0  # jobs the loop took back from the helper
        self.helper_seconds = [0.0, 0.0]  # the last helper's life: wall, CPU seconds
        self.helper_totals = [0.0, 0.0]  # summed over the run
        self.helper_pauses = 0
        self.helper_resume_at = 0  # no helper before this iteration
        self.helper_busy_calls = 0  # calls in a row in which the helper lacked a core
        n = self.n = problem.n
        y = problem.y
        self.ysign = y.copy()
        self.lo = np.where(y > 0, problem.lower, -problem.upper)
        self.hi = np.where(y > 0, problem.upper, -problem.lower)
        self.beta = y * alpha
        self.q = y * problem.p
        self.perm = np.arange(n, dtype=np.int64)
        self.active = n
        self.dtype = dtype
        kern = problem.kernel
        code, gamma, offset, degree = kernel_code(kern)
        self.code = code
        self.precomputed = isinstance(kern, PrecomputedKernel)
        itemsize = dtype.itemsize
        gram_mb = n * n * itemsize / 2**20
        # data for kernel rows: features as (d, n) columns
        if code != _k.KERNEL_EXTERNAL:
            self.XK = np.array(problem.features().T, order="C")  # own copy, columns by variable
        else:
            self.XK = np.zeros((0, n))
        self.sq = np.zeros(n)
        _k.self_dots(self.XK, self.sq)
        self.acc = np.zeros(_k.ROW_CHUNK)
        self.ibuf = np.zeros(max(_k.ROW_CHUNK, _k.CHUNK), dtype=np.int64)
        if self.precomputed:
            idx = problem.features()[:, 0].astype(np.int64)
            self.mode = 0
            self.gram = np.array(kern.gram_matrix[np.ix_(idx, idx)], dtype=dtype, order="C")
            self.rowslot = np.arange(n, dtype=np.int64)
            cache_bytes = min(row_cache_mb * 2**20, 0.1 * n * n * itemsize + 64 * 2**20)
        elif gram_mb <= budget_mb:
            self.mode = 0
            # rows are computed when first needed and packed in that order, so that only
            # the memory of rows actually used is touched (fresh pages are costly)
            self.gram = _fresh_array((n, n), dtype)
            self.rowslot = np.full(n, -1, dtype=np.int64)
            cache_bytes = min(row_cache_mb * 2**20, 0.1 * n * n * itemsize + 64 * 2**20)
        else:
            self.mode = 1
            self.gram = np.empty((1, 1), dtype=dtype)
            self.rowslot = np.full(1, -1, dtype=np.int64)
            cache_bytes = row_cache_mb * 2**20
        # row cache over the active positions; slots are re-laid out at each shrink so
        # that shorter rows give more slots
        self.cache_elems = int(max(2 * n, cache_bytes // itemsize))
        # pages touched only when used
        self.cache = _fresh_array((self.cache_elems,), dtype, reuse=True)
        # capacity in use: starts small and doubles while evicted rows are needed again,
        # since first-touched memory costs more than recomputing a row (see module notes)
        start = max(2 * n, CACHE_START_MB * 2**20 // itemsize)
        self.cap_elems = int(min(self.cache_elems, start))
        self.remisses_seen = 0
        self.slot_of = np.full(n, -1, dtype=np.int64)
        self.slot_owner = np.full(n, -1, dtype=np.int64)
        self.lru_prev = np.full(n, -1, dtype=np.int64)
        self.lru_next = np.full(n, -1, dtype=np.int64)
        self.slot_stamp = np.zeros(n, dtype=np.int64)
        # lazy shrinking of cached rows: a row keeps the layout it was stored in until it
        # is hit again (then it is gathered in place); vmaps[v] maps current positions to
        # those of layout v
        self.slot_ver = np.zeros(n, dtype=np.int64)
        self.vmaps = np.zeros((LAYOUT_VERSIONS, n), dtype=np.int32)
        self.ext_row = np.zeros(n if code == _k.KERNEL_EXTERNAL else 1)
        self.bm = np.zeros(n // _k.BLK + 2)
        self.istate = np.zeros(_k.IS_SIZE, dtype=np.int64)
        self.fstate = np.zeros(_k.FS_SIZE, dtype=np.float64)
        ist, fst = self.istate, self.fstate
        ist[_k.IS_MODE] = self.mode
        ist[_k.IS_KERNEL] = code
        ist[_k.IS_DEGREE] = degree
        ist[_k.IS_LEVEL] = level
        ist[_k.IS_ACTIVE] = n
        ist[_k.IS_EXT_ORIG] = -1
        fst[_k.FS_GAMMA] = gamma
        fst[_k.FS_OFFSET] = offset
        self._flush_cache()
        # diagonal, rounded like the stored rows
        if code != _k.KERNEL_EXTERNAL:
            diag = np.zeros(n)
            _k.kernel_diag(self.XK, self.sq, diag, code, gamma, offset, degree, self.acc,
                           self.ibuf)
        elif self.precomputed:
            diag = np.diagonal(self.gram).astype(np.float64)
        else:
            diag = np.asarray(problem.kernel_diag(), dtype=np.float64)
        self.diag = diag.astype(dtype).astype(np.float64)
        # gradient in the form F = −(Kβ + q)
        self.F = -self.q.copy()
        self.rebuild_gradient(np.arange(n, dtype=np.int64))
        self.status = (np.where(self.beta < self.hi, _k.UP, 0)
                       | np.where(self.beta > self.lo, _k.LOW, 0)).astype(np.uint8)
        self.istate[_k.IS_UNIT_DIAG] = int(bool(np.all(self.diag == 1.0)))
        self.objective0 = (0.5 * serial_dot(self.beta, -self.F - self.q)
                           + serial_dot(self.q, self.beta))
        cap = 0 if level == 2 else trace_rows
        self.tr = {name: np.zeros(cap, dtype=dt) for name, dt in _TRACE_COLUMNS}
        self.ev = {"iteration": np.zeros(256, dtype=np.int64), "kind": np.zeros(256, dtype=np.int8),
                   "value": np.zeros(256)}
        q = max(2, int(block_size)) if self.block else 2
        self.bstate = np.zeros(_b.BS_SIZE, dtype=np.int64)
        self.bstate[_b.BS_Q] = q
        self.bstate[_b.BS_MAX_INNER] = int(inner_steps)
        self.bstate[_b.BS_FRESH] = int(fresh_percent)
        self.bstate[_b.BS_RULE] = BLOCK_RULE
        self.bval = np.zeros(_b.BV_SIZE)
        self.bval[_b.BV_FACTOR] = inner_factor
        self.bint = {k: np.zeros(q, dtype=np.int64) for k in
                     ("members", "brefs", "up_pos", "low_pos", "need", "needref")}
        self.bflt = {k: np.zeros(q) for k in ("bstart", "delta", "Fb", "up_val", "low_val")}
        self.Kbb = np.zeros(q * q)
        self.mark = np.zeros(n if self.block else 1, dtype=np.int8)
        self.acc4 = np.zeros((4, _k.ROW_CHUNK))
        self.last_shrink = 0
        self.shrinks = 0
        self.reconstructions = 0
        self.external_rows = 0

    # -- kernel access -------------------------------------------------------------
    def _flush_cache(self) -> None:
        """Empty the row cache and lay it out for rows of the current active length."""
        self.slot_of.fill(-1)
        self.slot_owner.fill(-1)
        ist = self.istate
        stride = max(1, self.active)
        ist[_k.IS_STRIDE] = stride
        ist[_k.IS_SLOTS] = min(self.n, self.cap_elems // stride)
        ist[_k.IS_USED] = 0
        ist[_k.IS_HEAD] = -1
        ist[_k.IS_TAIL] = -1
        ist[_k.IS_VERSION] = 0

    def adapt_cache(self, window: int) -> None:
        """Row-cache capacity: double it (up to ``row_cache_mb``) when the last ``window``
        iterations re-computed more evicted rows than the cache has slots, i.e. when
        re-computing cost more than first-touching the added memory would (the two cost
        about the same per row here, see module notes); when the cache is full and its
        slots are longer than the rows, move the rows to shorter slots first."""
        ist = self.istate
        rem = int(ist[_k.IS_REMISSES])
        recent = rem - self.remisses_seen
        self.remisses_seen = rem
        slots = int(ist[_k.IS_SLOTS])
        if (ist[_k.IS_USED] >= slots and 4 * int(ist[_k.IS_STRIDE]) >= 5 * self.active
                and slots < self.n):
            self._shrink_cache(np.arange(self.active, dtype=np.int64), eager=True)
        elif recent > slots and self.cap_elems < self.cache_elems:
            self.cap_elems = min(self.cache_elems, 2 * self.cap_elems)
            ist[_k.IS_SLOTS] = min(self.n, self.cap_elems // int(ist[_k.IS_STRIDE]))

    def _shrink_cache(self, keep: np.ndarray, *, eager: bool = False) -> None:
        """After a shrink to positions ``keep`` (of the current layout): cached rows are
        left in place and gathered when next hit (see ``_k._fetch``); only when the cache
        is full, the rows have become at most half the slot stride or the layout versions
        run out are all cached rows moved to slots of the new length (more slots fit)."""
        ist = self.istate
        new_a = int(keep.size)
        cur = int(ist[_k.IS_VERSION])
        stride = int(ist[_k.IS_STRIDE])
        # evicting, and shorter slots give enough more room
        full = ist[_k.IS_USED] >= ist[_k.IS_SLOTS] and RELAYOUT_GAIN * new_a <= stride
        if not (eager or full) and stride < 2 * new_a and cur + 1 < self.vmaps.shape[0]:
            vm = self.vmaps
            for v in range(cur):
                vm[v, :new_a] = vm[v, keep]
            vm[cur, :new_a] = keep
            ist[_k.IS_VERSION] = cur + 1
            return
        used = int(ist[_k.IS_USED])
        owners = self.slot_owner[:used]
        # rows of variables shrunk away are not requested again before the cache is
        # flushed (unshrink), so they are dropped rather than moved
        live = np.zeros(self.n, dtype=bool)
        live[self.perm[:new_a]] = True
        held = owners >= 0
        alive = held & live[np.maximum(owners, 0)]
        self.slot_of[owners[held & ~alive]] = -1
        survivors = np.flatnonzero(alive)
        _k.relayout_cache(self.cache, stride, new_a, survivors, self.slot_ver, self.vmaps,
                          cur, np.ascontiguousarray(keep, dtype=np.int64), new_a)
        owners = owners[survivors].copy()
        st = self.slot_stamp[survivors].copy()
        self.slot_owner[:used] = -1
        k = survivors.size
        self.slot_owner[:k] = owners
        self.slot_of[owners] = np.arange(k)
        self.slot_stamp[:k] = st
        self.slot_ver[:k] = 0
        # LRU list: most recent first, ties by slot
        order = np.lexsort((np.arange(k), -st))
        self.lru_prev[:k] = -1
        self.lru_next[:k] = -1
        if k:
            self.lru_next[order[:-1]] = order[1:]
            self.lru_prev[order[1:]] = order[:-1]
        ist[_k.IS_HEAD] = order[0] if k else -1
        ist[_k.IS_TAIL] = order[-1] if k else -1
        ist[_k.IS_USED] = k
        ist[_k.IS_STRIDE] = new_a
        ist[_k.IS_SLOTS] = min(self.n, self.cap_elems // new_a)
        ist[_k.IS_VERSION] = 0

    def _ensure_rows(self, rows: np.ndarray) -> None:
        """Gram rows ``rows`` (original indices) computed (full-Gram mode)."""
        if self.code != _k.KERNEL_EXTERNAL:
            self.istate[_k.IS_ROW_EVALS] += _k.fill_rows(
                self.XK, self.sq, rows, self.gram, self.rowslot, self.istate, self.code,
                self.fstate[_k.FS_GAMMA], self.fstate[_k.FS_OFFSET],
                int(self.istate[_k.IS_DEGREE]), self.acc, self.ibuf)
            return
        P = self.problem
        for o in rows[self.rowslot[rows] < 0]:
            k = int(self.istate[_k.IS_POOL_USED])
            self.gram[k] = P.kernel_block(slice(o, o + 1), slice(None))[0]
            self.rowslot[o] = k
            self.istate[_k.IS_POOL_USED] = k + 1
            self.external_rows += 1

    def k_times(self, src: np.ndarray, coef: np.ndarray, targets: np.ndarray) -> np.ndarray:
        """Σ_s coef[s] K(x_src[s], x_t) for t in ``targets`` (original indices)."""
        out = np.zeros(targets.shape[0])
        if src.size == 0 or targets.size == 0:
            return out
        src = np.ascontiguousarray(src, dtype=np.int64)
        targets = np.ascontiguousarray(targets, dtype=np.int64)
        if self.mode == 0:
            self._ensure_rows(src)
            _k.gram_times(self.gram, self.rowslot, src,
                          np.ascontiguousarray(coef, dtype=np.float64), targets, out)
            return out
        for s in range(0, targets.size, 1024):
            t = targets[s:s + 1024]
            out[s:s + 1024] = self.problem.kernel_block(t, src) @ coef
        return out

    def supply_row(self) -> None:
        """Evaluate the row an external (Python) kernel was asked for."""
        o = int(self.istate[_k.IS_NEED_ORIG])
        if self.mode == 0:
            self._ensure_rows(np.array([o], dtype=np.int64))
        else:
            a = self.active
            self.ext_row[:a] = self.problem.kernel_block(slice(o, o + 1), self.perm[:a])[0]
            self.istate[_k.IS_EXT_ORIG] = o
            self.external_rows += 1

    # -- positions ------------------------------------------------------------------
    _POS_ARRAYS = ("F", "beta", "lo", "hi", "diag", "ysign", "status", "perm", "q")

    def _reorder(self, order: np.ndarray) -> None:
        self.bstate[_b.BS_NB] = 0  # positions change: the next working set starts afresh
        for name in self._POS_ARRAYS:
            setattr(self, name, np.ascontiguousarray(getattr(self, name)[order]))
        if self.mode == 1:  # row-cache mode evaluates kernels over positions
            self.XK = np.ascontiguousarray(self.XK[:, order])
            self.sq = np.ascontiguousarray(self.sq[order])

    def alpha(self) -> np.ndarray:
        out = np.empty(self.n)
        out[self.perm] = self.ysign * self.beta
        return out

    def gradient(self) -> np.ndarray:
        """G = Qα + p in original order (needs a full gradient: call after unshrink)."""
        out = np.empty(self.n)
        out[self.perm] = -self.ysign * self.F
        return out

    def extremes(self, a: int) -> tuple[float, float]:
        """(m, M) over positions < a."""
        if a == 0:
            return -np.inf, np.inf
        F, st = self.F[:a], self.status[:a]
        up, low = (st & _k.UP) != 0, (st & _k.LOW) != 0
        return (float(np.max(F[up])) if up.any() else -np.inf,
                float(np.min(F[low])) if low.any() else np.inf)

    def rebuild_gradient(self, pos: np.ndarray) -> None:
        """F at positions ``pos`` recomputed as −q − Σ_s β_s K(x_s, ·) over β_s ≠ 0."""
        sv = np.flatnonzero(self.beta)
        if sv.size == 0 or pos.size == 0:
            self.F[pos] = -self.q[pos]
            return
        if self.code == _k.KERNEL_EXTERNAL or self.precomputed:
            self.F[pos] = -self.q[pos] - self.k_times(self.perm[sv], self.beta[sv],
                                                      self.perm[pos])
            return
        # XK columns are original indices in full-Gram mode and positions in row-cache mode
        cols = self.perm if self.mode == 0 else np.arange(self.n, dtype=np.int64)
        XV = np.ascontiguousarray(self.XK[:, cols[sv]])
        sqv = np.ascontiguousarray(self.sq[cols[sv]])
        coef = np.ascontiguousarray(self.beta[sv])
        targets = np.ascontiguousarray(cols[pos])

        def part(lo: int, hi: int) -> None:
            _k.reconstruct(self.XK, self.sq, targets[lo:hi], pos[lo:hi], XV, sqv, coef, self.q,
                           self.F, self.code, self.fstate[_k.FS_GAMMA],
                           self.fstate[_k.FS_OFFSET], int(self.istate[_k.IS_DEGREE]),
                           np.zeros((4, _k.CHUNK)), np.zeros(_k.CHUNK, dtype=np.int64))

        if self.threads > 1 and pos.size * sv.size >= 1 << 20:
            # each position is computed alone, so two threads give the bits of one
            h = pos.size // 2
            helper = threading.Thread(target=part, args=(h, pos.size))
            helper.start()
            part(0, h)
            helper.join()
        else:
            part(0, pos.size)

    def unshrink(self, it: int) -> None:
        """Reconstruct F of the shrunk variables and make every variable active again."""
        a, n = self.active, self.n
        if a < n:
            self.rebuild_gradient(np.arange(a, n, dtype=np.int64))
            self._reorder(np.argsort(self.perm, kind="stable"))
            self.active = n
            self.istate[_k.IS_ACTIVE] = n
            self._flush_cache()
            self.reconstructions += 1
            m, big_m = self.extremes(n)
            self.add_event(it, _k.EV_RECONSTRUCT, m - big_m)

    def shrink(self, it: int) -> None:
        """Shrinking as in Fan, Chen & Lin (2005, section 5): drop bound variables whose
        gradient says they will stay at the bound.  The dropped variables come back only
        when the active set meets the stopping test (:meth:`unshrink`, then the test is
        repeated on all variables).  The paper also unshrinks once when the violation first
        falls below 10·kkt_tol; on the benchmark problems that extra reconstruction never paid
        off (n = 20000: 0.98–1.03 s against 1.22–1.29 s at C = 1, 4.67–4.92 s against
        5.03–5.19 s at C = 100; equal at n = 2000), so it is not done."""
        a = self.active
        m, big_m = self.extremes(a)
        Fa = self.F[:a]
        in_up = (self.status[:a] & _k.UP) != 0
        in_low = (self.status[:a] & _k.LOW) != 0
        remove = (~in_up & (~in_low | (Fa > m))) | (~in_low & (Fa < big_m))
        k = int(np.count_nonzero(remove))
        # compaction costs about (cached rows) × a copies, so small removals wait
        if k == a or k < max(1, int(SHRINK_MIN_FRACTION * a)):
            return
        keep = np.flatnonzero(~remove)
        order = np.concatenate([keep, np.flatnonzero(remove), np.arange(a, self.n)])
        self._reorder(order)
        ist = self.istate
        new_a = int(keep.size)
        self._shrink_cache(keep)
        self.active = new_a
        ist[_k.IS_ACTIVE] = self.active
        self.shrinks += 1
        self.last_shrink = it
        self.add_event(it, _k.EV_SHRINK, float(self.active))

    # -- trace ----------------------------------------------------------------------
    def add_event(self, it: int, kind: int, value: float) -> None:
        k = int(self.istate[_k.IS_EVENTS])
        if k >= self.ev["iteration"].shape[0]:
            for name in self.ev:
                self.ev[name] = _grow(self.ev[name], k, k + 1)
        self.ev["iteration"][k] = it
        self.ev["kind"][k] = kind
        self.ev["value"][k] = value
        self.istate[_k.IS_EVENTS] = k + 1
        self.istate[_k.IS_FORCE_ROW] = 1

    def grow_trace(self) -> None:
        rows, evs = int(self.istate[_k.IS_ROWS]), int(self.istate[_k.IS_EVENTS])
        if self.istate[_k.IS_LEVEL] != 2 and rows >= self.tr["iteration"].shape[0]:
            for name in self.tr:
                self.tr[name] = _grow(self.tr[name], rows, rows + 1)
        if evs >= self.ev["iteration"].shape[0]:
            for name in self.ev:
                self.ev[name] = _grow(self.ev[name], evs, evs + 1)

    def _start_helper(self) -> threading.Thread | None:
        """A helper thread serving the next :meth:`run` (see ``_k.helper_loop``), when two
        threads are allowed and the active set is long enough to share."""
        hc = self.hctl
        hc[:] = 0
        if (self.threads < 2 or self.active < _k.SPLIT_ROW or self.code == _k.KERNEL_EXTERNAL
                or self.istate[_k.IS_ITER] < self.helper_resume_at):
            return None
        th = threading.Thread(target=self._serve, name="kktrace-smo-helper", daemon=True)
        th.start()
        hc[_k.H_ON] = 1  # the loop shares work only with a thread that exists
        return th

    def _serve(self) -> None:
        """Body of the helper thread: ``_k.helper_loop``, timed in wall and CPU seconds."""
        w0, c0 = time.perf_counter(), time.thread_time()
        _k.helper_loop(self.hctl, self.hval, self.F, self.diag, self.status, self.gram,
                       self.cache, self.XK, self.sq, self.istate, self.fstate)
        self.helper_seconds = [time.perf_counter() - w0, time.thread_time() - c0]

    def flush(self) -> None:
        """Bring F up to date with β (block working set: apply an open outer iteration)."""
        if self.block:
            b = self.bint
            _b.block_flush(self.F, self.beta, self.active, self.bstate, b["brefs"],
                           b["members"], self.bflt["bstart"], self.bflt["delta"], self.gram,
                           self.cache)

    def run(self) -> int:
        if self.block:
            return self._run_block()
        helper = self._start_helper()
        try:
            return self._run_loop()
        finally:
            if helper is not None:
                if self.hctl[_k.H_ON] == 1:  # the loop did not reach its exit: stop the helper
                    _k.helper_stop(self.hctl)
                helper.join()
                self._account_helper()

    def _account_helper(self) -> None:
        """After a call served by a helper: count its jobs and time, and pause it when the
        machine was busy (see module notes)."""
        hc = self.hctl
        # every posted job but the exit was done by the helper or taken back
        self.helper_jobs += int(hc[_k.H_POSTED] - 1 - hc[_k.H_TAKEN])
        self.helper_taken += int(hc[_k.H_TAKEN])
        wall, cpu = self.helper_seconds
        self.helper_totals = [self.helper_totals[0] + wall, self.helper_totals[1] + cpu]
        # the helper spins whenever it runs, so CPU / wall is the share of the call for
        # which it had a core; less means other work wants the cores
        if hc[_k.H_AWAY] or (wall >= HELPER_MIN_WALL and cpu < HELPER_MIN_SHARE * wall):
            pause = min(HELPER_PAUSE_MAX, HELPER_PAUSE << self.helper_busy_calls)
            self.helper_busy_calls += 1
            self.helper_pauses += 1
            self.helper_resume_at = int(self.istate[_k.IS_ITER]) + pause
        else:
            self.helper_busy_calls = 0

    def _run_block(self) -> int:
        tr, ev, b, f = self.tr, self.ev, self.bint, self.bflt
        return int(_b.block_run(
            self.F, self.beta, self.lo, self.hi, self.diag, self.ysign, self.status,
            self.perm, self.gram, self.rowslot, self.cache, self.slot_of, self.slot_owner,
            self.lru_prev, self.lru_next, self.slot_stamp, self.slot_ver, self.vmaps,
            self.ext_row, self.XK, self.sq, self.acc, self.ibuf, self.istate, self.fstate,
            tr["iteration"], tr["i"], tr["j"], tr["alpha_i"], tr["alpha_j"], tr["step"],
            tr["objective"], tr["violation"], tr["active"], tr["outer"],
            ev["iteration"], ev["kind"], ev["value"], self.hctl,
            self.bstate, self.bval, b["members"], b["brefs"], f["bstart"], f["delta"], f["Fb"],
            self.Kbb, b["up_pos"], f["up_val"], b["low_pos"], f["low_val"], b["need"],
            b["needref"], self.mark, self.acc4, self.bm))

    def _run_loop(self) -> int:
        tr, ev = self.tr, self.ev
        return int(_k.smo_run(
            self.F, self.beta, self.lo, self.hi, self.diag, self.ysign, self.status,
            self.perm, self.gram, self.rowslot, self.cache, self.slot_of, self.slot_owner,
            self.lru_prev, self.lru_next, self.slot_stamp, self.slot_ver, self.vmaps,
            self.ext_row, self.XK, self.sq,
            self.acc, self.ibuf, self.bm, self.istate, self.fstate,
            tr["iteration"], tr["i"], tr["j"], tr["alpha_i"], tr["alpha_j"], tr["step"],
            tr["objective"], tr["violation"], tr["active"], tr["outer"],
            ev["iteration"], ev["kind"], ev["value"], self.hctl, self.hval))


_compiled: set[str] = set()
#: loop returns after which the run ends whatever the clock says
_FINAL_CODES = (_k.RUN_CONVERGED, _k.RUN_NUMERICAL, _k.RUN_STALLED)


def _warm_up(dtype: np.dtype, working_set: str = "pair") -> float:
    """Compile (or load from the on-disk cache) the loop of ``working_set`` for ``dtype``;
    seconds spent."""
    key = f"{dtype.name}-{working_set}"
    if key in _compiled:
        return 0.0
    t0 = time.perf_counter()
    X = np.array([[0.0, 1.0], [1.0, 0.0], [1.0, 1.0]])
    prob = DualProblem(X=X, y=np.array([1.0, -1.0, 1.0]), p=-np.ones(3), lower=np.zeros(3),
                       upper=np.ones(3), delta=0.0, kernel=RBFKernel(gamma=1.0),
                       kind="warm_up", info={})
    eng = _Engine(prob, np.zeros(3), dtype=dtype, budget_mb=1.0, row_cache_mb=1.0, level=0,
                  trace_rows=16, working_set=working_set)
    eng.istate[_k.IS_STOP_AT] = 10
    eng.istate[_k.IS_SHRINK_AT] = 2
    eng.istate[_k.IS_STALL_WINDOW] = 100
    eng.istate[_k.IS_SAMPLE] = 1
    eng.istate[_k.IS_SECOND_ORDER] = 1
    eng.fstate[_k.FS_TOL] = 1e-3
    eng.fstate[_k.FS_TAU] = TAU
    eng.run()
    eng.shrink(1)
    eng.unshrink(1)
    _k.compact_cache(eng.cache, 3, 3, np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64), 0)
    _k.relayout_cache(eng.cache, 3, 3, np.zeros(0, dtype=np.int64), eng.slot_ver, eng.vmaps, 0,
                      np.zeros(0, dtype=np.int64), 0)
    eng.rebuild_gradient(np.arange(3, dtype=np.int64))
    if eng.block:
        eng.flush()
        _compiled.add(key)
        return time.perf_counter() - t0
    hc = np.zeros(_k.H_SIZE, dtype=np.int64)
    hc[_k.H_POSTED] = 1  # a helper told to return at once: compiles (or loads) it
    hc[_k.H_KIND] = _k.JOB_EXIT
    _k.helper_loop(hc, eng.hval, eng.F, eng.diag, eng.status, eng.gram, eng.cache, eng.XK,
                   eng.sq, eng.istate, eng.fstate)
    _compiled.add(key)
    return time.perf_counter() - t0


def solve_smo(
    problem: DualProblem,
    *,
    kkt_tol: float = 1e-3,
    iteration_limit: int | None = None,
    time_limit: float | None = None,
    selection: str = "second_order",
    shrinking: bool = True,
    trace: str = "full",
    sample_every: int = 100,
    snapshot_every: int | None = None,
    kernel_memory_mb: float | None = None,
    kernel_dtype: str = "float64",
    row_cache_mb: float = 1024.0,
    alpha0: np.ndarray | None = None,
    callback: Callable[[dict], bool | None] | None = None,
    callback_every: int = 1000,
    stall_window: int | None = None,
    threads: int | None = None,
    working_set: str = "pair",
) -> SolveResult:
    """Solve ``problem`` by SMO and return α, bias, status, certificate and trace.

    Parameters
    ----------
    problem : the dual problem (n variables).
    kkt_tol : stopping tolerance on the maximal violation m(α) − M(α) (gradient units).
    iteration_limit : iteration limit; default max(10⁷, 100 n).
    time_limit : wall-clock budget in seconds (checked between pauses of the loop).
    selection : ``"second_order"`` (Fan, Chen & Lin 2005, WSS 2) or ``"first_order"``
        (maximal violating pair, Keerthi et al. 2001).
    shrinking : drop bound variables that are unlikely to move; the gradient is
        reconstructed and the optimality test repeated on all variables before stopping.
    trace : ``"full"`` (every iteration), ``"sampled"`` (every ``sample_every``-th
        iteration plus every iteration with an event) or ``"off"``.
    snapshot_every : store α every this many iterations (and at the end); default
        max(1000, n).
    kernel_memory_mb : budget for the full Gram matrix (MB); default the smaller of
        ``DEFAULT_GRAM_MB`` and half the available memory.  Within
        budget the Gram is stored, each row computed when first needed; beyond it, an LRU
        cache of rows over the active variables (at most ``row_cache_mb``) is used.
    kernel_dtype : ``"float64"`` or ``"float32"`` kernel storage (arithmetic in float64).
    row_cache_mb : largest row-cache size in MB (the cache starts at ``CACHE_START_MB`` and
        doubles while evicted rows are requested again).
    alpha0 : feasible warm start (n,) (see :func:`repair_start`); default the problem's
        feasible start (α = 0 for classification).
    callback : called every ``callback_every`` iterations with a dict of ``iteration``,
        ``violation``, ``kkt_tol``, ``active``, ``objective``; returning True or raising
        ``StopIteration`` stops the run (status ``stopped_by_callback``).
    stall_window : stop as stalled after this many iterations without objective
        decrease; default max(10⁶, 10 n).
    threads : threads the loop may use: 1 or 2 (``MAX_THREADS``), never more than the
        cores this process may run on; default the environment variable
        ``KKTRACE_THREADS``, else 2.  With two, a helper thread computes the upper
        half of every long pass and kernel row; α, trace and certificate are bitwise the
        same as with one.
    working_set : ``"block"`` (default): each outer iteration picks ``BLOCK_SIZE``
        variables, computes their kernel rows together and solves their subproblem by
        two-variable steps on the kernel block, then updates the gradient once
        (Joachims 1999; :mod:`solver._block_kernels`); ``"pair"``: two variables per
        iteration, the gradient updated after each.  Both stop on the same test and
        record every two-variable step; the block form runs on one thread and needs a
        kernel the compiled code evaluates (linear, poly, rbf, sigmoid, precomputed).

    Returns
    -------
    SolveResult with ``solver="smo"``; its certificate is computed from the final full
    gradient (after gradient reconstruction).  ``extra`` holds timings in seconds
    (``compile_seconds``, ``setup_seconds``, ``solve_seconds``), ``kernel_mode``
    (``"full_gram"`` or ``"column_cache"``), ``kernel_source``, kernel-row and cache
    counts, ``shrinks``, ``reconstructions``, ``curvature_fixes``, ``threads``,
    ``helper_jobs`` (passes and kernel rows shared with the helper thread),
    ``helper_taken`` (jobs the loop took back because the helper had not begun them),
    ``helper_pauses`` (times no helper was started for a while because the machine was
    busy; see the module notes), ``helper_seconds`` and ``helper_cpu_seconds`` (the
    helper's lifetime and CPU time) and
    ``polish_iterations`` (float64 iterations after a float32 phase).  The trace has the
    SMO columns of :class:`solver.result.Trace`, events coded by :data:`EVENT_KINDS`
    (value: active-set size after a shrink, violation after a reconstruction, the
    curvature aᵢⱼ ≤ 0 that was replaced by τ) and α snapshots at iteration 0, every
    ``snapshot_every`` iterations and at the end.

    Raises
    ------
    InvalidInputError for a bad option or an infeasible ``alpha0``.  Not converging is
    not an error: the status says why the run stopped and a ConvergenceWarning is issued.

    Notes
    -----
    The dual is  min ½αᵀQα + pᵀα  s.t. yᵀα = Δ, l ≤ α ≤ u  (see :mod:`solver.problem`).
    The loop is deterministic: ties in the working-set selection go to the lowest index,
    and the compiled code gives the same bits as the pure-Python run
    (``NUMBA_DISABLE_JIT=1``).  With ``kernel_dtype="float32"`` the loop works on rounded
    kernel values; optimality is then checked with the exact float64 gradient and, when
    that test fails, the run continues from the same α with float64 kernel values.

    Examples
    --------
    >>> import numpy as np
    >>> from solver.kernels import make_kernel
    >>> from solver.problem import binary_classification
    >>> X = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0]])
    >>> prob = binary_classification(X, [-1, 1, 1], kernel=make_kernel("linear"), C=1e6)
    >>> res = solve_smo(prob, kkt_tol=1e-12)
    >>> res.status.label, np.round(res.alpha, 6).tolist(), round(res.bias, 6)
    ('converged', [1.0, 0.5, 0.5], -1.0)

    References
    ----------
    Platt (1998) Sequential minimal optimization; Keerthi, Shevade, Bhattacharyya &
    Murthy (2001) Neural Computation 13:637–649; Fan, Chen & Lin (2005) JMLR 6:1889–1918.
    """
    t_start = time.perf_counter()
    if not isinstance(problem, DualProblem):
        raise InvalidInputError(f"problem must be a DualProblem, got {type(problem).__name__}")
    n = problem.n
    kkt_tol = _positive_float(kkt_tol, "kkt_tol")
    iteration_limit = _positive_int(iteration_limit, "iteration_limit", allow_none=True)
    if iteration_limit is None:
        iteration_limit = max(10_000_000, 100 * n)
    time_limit = _positive_float(time_limit, "time_limit", allow_none=True)
    if selection not in SELECTIONS:
        raise InvalidInputError(
            f"option selection must be one of {', '.join(SELECTIONS)}, got {selection!r}")
    if not isinstance(shrinking, (bool, np.bool_)):
        raise InvalidInputError(f"option shrinking must be True or False, got {shrinking!r}")
    if trace not in TRACE_LEVELS:
        raise InvalidInputError(
            f"option trace must be one of {', '.join(TRACE_LEVELS)}, got {trace!r}")
    sample_every = _positive_int(sample_every, "sample_every")
    snapshot_every = _positive_int(snapshot_every, "snapshot_every", allow_none=True)
    if snapshot_every is None:
        snapshot_every = max(1000, n)
    kernel_memory_mb = _positive_float(kernel_memory_mb, "kernel_memory_mb", allow_none=True)
    budget_mb = (kernel_memory_mb if kernel_memory_mb is not None
                 else min(DEFAULT_GRAM_MB, 0.5 * _available_mb()))
    if kernel_dtype not in ("float64", "float32"):
        raise InvalidInputError(
            f"option kernel_dtype must be 'float64' or 'float32', got {kernel_dtype!r}")
    row_cache_mb = _positive_float(row_cache_mb, "row_cache_mb")
    if callback is not None and not callable(callback):
        raise InvalidInputError("option callback must be callable or None")
    callback_every = _positive_int(callback_every, "callback_every")
    stall_window = _positive_int(stall_window, "stall_window", allow_none=True)
    threads = _positive_int(threads, "threads", allow_none=True)
    if threads is None:
        threads = _threads_from_environment()
    threads = min(threads, available_cores(), MAX_THREADS)
    if working_set not in WORKING_SETS:
        raise InvalidInputError(
            f"option working_set must be one of {', '.join(WORKING_SETS)}, got {working_set!r}")
    if (working_set == "block" and kernel_code(problem.kernel)[0] == _k.KERNEL_EXTERNAL
            and not isinstance(problem.kernel, PrecomputedKernel)):
        raise InvalidInputError(
            f"working_set 'block' needs a kernel the compiled code evaluates (linear, poly, "
            f"rbf, sigmoid or precomputed), got {problem.kernel.name!r}; use working_set "
            f"'pair'")
    if stall_window is None:
        stall_window = max(1_000_000, 10 * n)
    alpha = problem.feasible_start() if alpha0 is None else _check_start(problem, alpha0)
    dtype = np.dtype(kernel_dtype)
    cfg = dict(kkt_tol=kkt_tol, iteration_limit=iteration_limit, time_limit=time_limit,
               selection=selection,
               shrinking=bool(shrinking), trace=trace, sample_every=sample_every,
               snapshot_every=snapshot_every, budget_mb=budget_mb, row_cache_mb=row_cache_mb,
               callback=callback, callback_every=callback_every, stall_window=stall_window,
               threads=threads, working_set=working_set)
    ph = _run_phase(problem, alpha, dtype, cfg, t_start)
    polish_iterations = 0
    if dtype != np.float64 and ph["status"] == Status.CONVERGED:
        # float32 kernel storage: the loop's gradient carries rounding of the stored kernel
        # values, so optimality is checked with the exact float64 gradient and, if needed,
        # the run continues from the same α with float64 kernel values
        G = _exact_gradient(problem, ph["alpha"])
        if certify(problem, ph["alpha"], kkt_tol=kkt_tol, gradient=G).max_violation > kkt_tol:
            cfg2 = dict(cfg, iteration_limit=max(1, iteration_limit - ph["iterations"]))
            ph2 = _run_phase(problem, ph["alpha"], np.dtype(np.float64), cfg2, t_start,
                             first_iteration=ph["iterations"])
            polish_iterations = ph2["iterations"] - ph["iterations"]
            ph = _merge_phases(ph, ph2)
        else:
            ph["G"] = G
    elif dtype != np.float64:
        ph["G"] = _exact_gradient(problem, ph["alpha"])
    status, detail, alpha, it = ph["status"], ph["detail"], ph["alpha"], ph["iterations"]
    cert = certify(problem, alpha, kkt_tol=kkt_tol, gradient=ph["G"])
    tr = Trace(
        solver="smo", level=trace, columns=ph["columns"], events=ph["events"],
        event_kinds=dict(EVENT_KINDS),
        snapshot_iterations=np.asarray(ph["snap_its"], dtype=np.int64),
        snapshots=np.vstack(ph["snaps"]), sample_every=sample_every if trace == "sampled" else 1,
        snapshot_every=snapshot_every,
    )
    options = {
        "kkt_tol": kkt_tol, "iteration_limit": iteration_limit, "time_limit": time_limit,
        "selection": selection,
        "shrinking": bool(shrinking), "trace": trace, "sample_every": sample_every,
        "snapshot_every": snapshot_every, "kernel_memory_mb": float(budget_mb),
        "kernel_dtype": kernel_dtype, "row_cache_mb": row_cache_mb, "warm_start": alpha0 is not
        None,
        "callback_every": callback_every, "stall_window": stall_window, "curvature_floor": TAU,
        "threads": threads, "working_set": working_set,
    }
    extra = dict(ph["extra"])
    extra["polish_iterations"] = polish_iterations
    status, message = settle(status, detail, cert.max_violation, cert.kkt_tol)
    if status != Status.CONVERGED:
        warnings.warn(f"SMO did not converge: {message}", ConvergenceWarning, stacklevel=2)
    return SolveResult(
        solver="smo", status=status, message=message, alpha=alpha, bias=cert.bias,
        iterations=it, certificate=cert, seconds=time.perf_counter() - t_start,
        options=options, trace=tr, extra=extra,
        kept_gradient=KeptGradient(alpha=alpha, values=np.asarray(ph["G"], dtype=np.float64)),
    )


def _exact_gradient(problem: DualProblem, alpha: np.ndarray) -> np.ndarray:
    """G = Qα + p in float64 from the support vectors only (rows of the data)."""
    qa = compiled_q_times(problem, alpha)
    if qa is None:  # a kernel the compiled code does not evaluate: numpy blocks
        sv = np.flatnonzero(alpha != 0.0)
        yb = problem.y * alpha
        out = np.zeros(problem.n)
        for s in range(0, problem.n, 1024):
            if sv.size:
                out[s:s + 1024] = problem.kernel_block(slice(s, s + 1024), sv) @ yb[sv]
        qa = problem.y * out
    return qa + problem.p


def _merge_phases(a: dict[str, Any], b: dict[str, Any]) -> dict[str, Any]:
    """Trace of a float32 phase followed by its float64 continuation (iterations continue)."""
    out = dict(b)
    out["columns"] = {k: np.concatenate([a["columns"][k], b["columns"][k]]) for k in a["columns"]}
    out["events"] = {k: np.concatenate([a["events"][k], b["events"][k]]) for k in a["events"]}
    out["snap_its"] = list(a["snap_its"]) + list(b["snap_its"][1:])
    out["snaps"] = list(a["snaps"]) + list(b["snaps"][1:])
    extra = dict(b["extra"])
    for key in ("compile_seconds", "setup_seconds", "solve_seconds", "kernel_rows_computed",
                "cache_hits", "cache_misses", "cache_remisses", "cache_remaps", "curvature_fixes",
                "shrinks", "reconstructions", "helper_jobs", "helper_taken", "helper_pauses",
                "helper_seconds", "helper_cpu_seconds"):
        extra[key] = a["extra"][key] + b["extra"][key]
    extra["kernel_mode"] = a["extra"]["kernel_mode"]
    extra["outer_iterations"] = a["extra"]["outer_iterations"] + b["extra"]["outer_iterations"]
    out["columns"]["outer"] = np.concatenate(
        [a["columns"]["outer"], b["columns"]["outer"] + a["extra"]["outer_iterations"]])
    out["extra"] = extra
    return out


def _run_phase(problem: DualProblem, alpha: np.ndarray, dtype: np.dtype, cfg: dict[str, Any],
               t_start: float, first_iteration: int = 0) -> dict[str, Any]:
    """Run the loop from ``alpha``; iteration numbers in the trace start after
    ``first_iteration``.  Returns status, α, full gradient and trace pieces."""
    n = problem.n
    kkt_tol, iteration_limit, time_limit = cfg["kkt_tol"], cfg["iteration_limit"], cfg["time_limit"]
    snapshot_every, callback = cfg["snapshot_every"], cfg["callback"]
    callback_every, stall_window = cfg["callback_every"], cfg["stall_window"]
    working_set = cfg["working_set"]
    compile_seconds = _warm_up(dtype, working_set)
    t_setup = time.perf_counter()
    level = {"full": 0, "sampled": 1, "off": 2}[cfg["trace"]]
    eng = _Engine(problem, alpha, dtype=dtype, budget_mb=cfg["budget_mb"],
                  row_cache_mb=cfg["row_cache_mb"], level=level,
                  trace_rows=min(iteration_limit, max(4096, 4 * n)), threads=cfg["threads"],
                  working_set=working_set, block_size=BLOCK_SIZE, inner_steps=BLOCK_INNER_STEPS,
                  inner_factor=BLOCK_INNER_FACTOR, fresh_percent=BLOCK_FRESH_PERCENT)
    ist, fst = eng.istate, eng.fstate
    ist[_k.IS_SAMPLE] = cfg["sample_every"]
    ist[_k.IS_SECOND_ORDER] = 1 if cfg["selection"] == "second_order" else 0
    ist[_k.IS_STALL_WINDOW] = stall_window
    shrink_every = min(n, 1000)  # also the period of cache adaptation
    ist[_k.IS_SHRINK_AT] = shrink_every
    fst[_k.FS_OBJ] = eng.objective0
    fst[_k.FS_BEST_OBJ] = eng.objective0
    fst[_k.FS_TOL] = kkt_tol
    fst[_k.FS_TAU] = TAU
    snap_its = [0]
    snaps = [eng.alpha()]
    setup_seconds = time.perf_counter() - t_setup

    t_solve = time.perf_counter()
    status: Status | None = None
    detail = ""
    next_cb = callback_every if callback is not None else None
    # the clock is read at least every ``clock_at`` iterations (an absolute count: the
    # loop also returns for shrinking, which must not push the next reading further)
    clock_at = int(ist[_k.IS_ITER]) + 1000
    t_clock, it_clock = time.perf_counter(), int(ist[_k.IS_ITER])
    while status is None:
        it = int(ist[_k.IS_ITER])
        stop = min(iteration_limit, (it // snapshot_every + 1) * snapshot_every)
        if next_cb is not None:
            stop = min(stop, next_cb)
        if time_limit is not None:
            stop = min(stop, clock_at)
        ist[_k.IS_STOP_AT] = stop
        code = eng.run()
        it = int(ist[_k.IS_ITER])
        if (time_limit is not None and code not in _FINAL_CODES
                and time.perf_counter() - t_start > time_limit):
            status, detail = Status.TIME_LIMIT, f"{time_limit:g} s"
            break
        if code == _k.RUN_TRACE_FULL:
            eng.grow_trace()
            continue
        if code == _k.RUN_NEED_ROW:
            eng.supply_row()
            continue
        if code == _k.RUN_SHRINK:
            eng.adapt_cache(shrink_every)
            if cfg["shrinking"]:
                eng.shrink(it)
            ist[_k.IS_SHRINK_AT] = it + shrink_every
            continue
        if code == _k.RUN_CONVERGED:
            if eng.active < n:  # final test on all variables (Fan, Chen & Lin 2005, sec. 5)
                eng.unshrink(it)
                ist[_k.IS_SHRINK_AT] = it + shrink_every
                continue
            status = Status.CONVERGED
            break
        if code == _k.RUN_NUMERICAL:
            status = Status.NUMERICAL_ERROR
            detail = f"non-finite objective at iteration {it + first_iteration}"
            break
        if code == _k.RUN_STALLED:
            status = Status.STALLED
            detail = f"no objective decrease in {stall_window} iterations"
            break
        # pause
        if time_limit is not None and it >= clock_at:  # about 20 clock readings a second
            now = time.perf_counter()
            per_it = (now - t_clock) / max(1, it - it_clock)
            clock_at = it + int(min(100_000, max(100, 0.05 / max(per_it, 1e-9))))
            t_clock, it_clock = now, it
        if it % snapshot_every == 0 and it > snap_its[-1]:
            snap_its.append(it)
            snaps.append(eng.alpha())
        if it >= iteration_limit:
            status = Status.ITERATION_LIMIT
            detail = f"{iteration_limit + first_iteration} iterations"
            break
        if next_cb is not None and it >= next_cb:
            next_cb += callback_every
            info = {"iteration": it + first_iteration, "violation": float(fst[_k.FS_VIOL]),
                    "kkt_tol": kkt_tol, "active": eng.active, "objective": float(fst[_k.FS_OBJ])}
            try:
                stop_now = callback(info)
            except StopIteration:
                stop_now = True
            if stop_now is True:
                status = Status.STOPPED_BY_CALLBACK
                detail = f"at iteration {it + first_iteration}"
                break
    it = int(ist[_k.IS_ITER])
    eng.flush()
    if eng.active < n:
        eng.unshrink(it)
    solve_seconds = time.perf_counter() - t_solve
    alpha = eng.alpha()
    if snap_its[-1] != it:
        snap_its.append(it)
        snaps.append(alpha.copy())
    rows, evs = int(ist[_k.IS_ROWS]), int(ist[_k.IS_EVENTS])
    columns = {name: eng.tr[name][:rows].copy() for name, _ in _TRACE_COLUMNS}
    events = {name: eng.ev[name][:evs].copy() for name in ("iteration", "kind", "value")}
    columns["iteration"] += first_iteration
    events["iteration"] += first_iteration
    extra = {
        "kernel_mode": "full_gram" if eng.mode == 0 else "column_cache",
        "kernel_source": "precomputed" if eng.precomputed else (
            "python" if eng.code == _k.KERNEL_EXTERNAL else "compiled"),
        "compile_seconds": compile_seconds, "setup_seconds": setup_seconds,
        "solve_seconds": solve_seconds,
        "kernel_rows_computed": int(ist[_k.IS_ROW_EVALS]) + eng.external_rows,
        "cache_hits": int(ist[_k.IS_HITS]), "cache_misses": int(ist[_k.IS_MISSES]),
        "cache_remisses": int(ist[_k.IS_REMISSES]), "cache_remaps": int(ist[_k.IS_REMAPS]),
        "cache_capacity_mb": eng.cap_elems * dtype.itemsize / 2**20,
        "curvature_fixes": int(ist[_k.IS_CURV_FIXES]), "shrinks": eng.shrinks,
        "reconstructions": eng.reconstructions, "threads": eng.threads,
        "helper_jobs": eng.helper_jobs, "helper_taken": eng.helper_taken,
        "helper_pauses": eng.helper_pauses, "helper_seconds": eng.helper_totals[0],
        "helper_cpu_seconds": eng.helper_totals[1],
        "loop_violation": float(fst[_k.FS_VIOL]), "loop_objective": float(fst[_k.FS_OBJ]),
        "outer_iterations": int(eng.bstate[_b.BS_OUTER]) if eng.block else it,
    }
    G = eng.gradient()
    _keep_spare(eng.cache)  # the loop and its helper are done with the row cache
    eng.cache = np.empty(0, dtype=dtype)
    return {"status": status, "detail": detail, "alpha": alpha, "G": G,
            "iterations": it + first_iteration, "columns": columns, "events": events,
            "snap_its": [v + first_iteration for v in snap_its], "snaps": snaps, "extra": extra}
