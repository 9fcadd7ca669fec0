"""SMO decomposition solver for the general SVM dual, with per-iteration traces.

Working-set selection by maximal violating pair (first order; Keerthi et al. 2001) or by
second-order gain (Fan, Chen & Lin, JMLR 6, 2005, WSS 2, the default); non-positive
curvature aᵢⱼ ≤ 0 is replaced by τ = 1e-12 as in that paper (section 4) and recorded as an
event.  Stopping test: maximal violation m(α) − M(α) ≤ tol.  The numerical loop lives in
:mod:`solver._smo_kernels`; this module validates options, prepares kernel access, runs
the loop in pauses (snapshots, callback, time limit), and builds the result.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np

from . import _smo_kernels as _k
from .certificate import certify
from .errors import ConvergenceWarning, InvalidInputError
from .kernels import PrecomputedKernel
from .problem import DualProblem
from .result import TRACE_LEVELS, SolveResult, Trace
from .status import Status, status_message

__all__ = ["solve_smo", "EVENT_KINDS", "SELECTIONS", "replay_alpha"]

#: code → name of trace events (``result.trace.events["kind"]``).
EVENT_KINDS: dict[int, str] = {
    _k.EV_SHRINK: "shrink",
    _k.EV_RECONSTRUCT: "reconstruct",
    _k.EV_CURVATURE: "curvature_fix",
}
SELECTIONS = ("second_order", "first_order")
#: τ substituted for non-positive curvature (Fan, Chen & Lin 2005, section 4).
TAU = 1e-12

_TRACE_COLUMNS = (
    ("iteration", np.int64), ("i", np.int32), ("j", np.int32), ("alpha_i", np.float64),
    ("alpha_j", np.float64), ("step", np.float64), ("objective", np.float64),
    ("violation", np.float64), ("active", np.int32),
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
    resid = abs(float(problem.y @ a) - problem.delta)
    scale = max(1.0, float(np.sum(np.abs(a))), abs(problem.delta))
    if resid > 1e-10 * scale:
        raise InvalidInputError(
            f"alpha0 is infeasible: |yᵀα − Δ| = {resid:.3g} exceeds 1e-10 relative; "
            "rebalance it (e.g. with solver.smo.repair_start)"
        )
    return a


def repair_start(problem: DualProblem, alpha: np.ndarray) -> np.ndarray:
    """A feasible α close to ``alpha`` (n,): clipped to the bounds, then yᵀα = Δ restored.

    The equality is restored by moving the residual over rows in index order (within
    their bounds), largest-room rows first is not attempted: the result is feasible, not
    a projection.  Useful for warm starts after bounds were changed (leave-one-out).
    """
    a = np.clip(np.asarray(alpha, dtype=np.float64).reshape(-1), problem.lower, problem.upper)
    if a.shape != (problem.n,):
        raise InvalidInputError(f"alpha must have {problem.n} entries, got {a.size}")
    need = problem.delta - float(problem.y @ a)
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


def _available_mb() -> float:
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return 4096.0


def _full_gram(problem: DualProblem, dtype: np.dtype, block: int = 1024) -> np.ndarray:
    """Gram matrix K (n, n) of the problem's rows, computed in symmetric row blocks."""
    if isinstance(problem.kernel, PrecomputedKernel):
        idx = problem.X[:, 0].astype(np.int64)
        K = problem.kernel.gram_matrix[np.ix_(idx, idx)]
        return np.ascontiguousarray(K, dtype=dtype)
    n = problem.n
    K = np.empty((n, n), dtype=dtype)
    X = problem.X
    for s in range(0, n, block):
        e = min(n, s + block)
        B = problem.kernel.block(X[s:e], X[s:])
        K[s:e, s:] = B
        K[s:, s:e] = B.T
    return K


def _new_trace_arrays(level: str, rows: int, events: int) -> dict[str, np.ndarray]:
    cap = 0 if level == "off" else rows
    arrs = {name: np.zeros(cap, dtype=dt) for name, dt in _TRACE_COLUMNS}
    arrs["ev_iteration"] = np.zeros(events, dtype=np.int64)
    arrs["ev_kind"] = np.zeros(events, dtype=np.int8)
    arrs["ev_value"] = np.zeros(events, dtype=np.float64)
    return arrs


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


def solve_smo(
    problem: DualProblem,
    *,
    tol: float = 1e-3,
    max_iter: int | None = None,
    time_limit: float | None = None,
    selection: str = "second_order",
    shrinking: bool = True,
    trace: str = "full",
    sample_every: int = 100,
    snapshot_every: int | None = None,
    kernel_memory_mb: float | None = None,
    kernel_dtype: str = "float64",
    cache_mb: float = 1024.0,
    alpha0: np.ndarray | None = None,
    callback: Callable[[dict], bool | None] | None = None,
    callback_every: int = 1000,
    stall_window: int | None = None,
) -> SolveResult:
    """Solve ``problem`` by SMO and return α, bias, status, certificate and trace.

    Parameters
    ----------
    problem : the dual problem (n variables).
    tol : stopping tolerance on the maximal violation m(α) − M(α) (gradient units).
    max_iter : iteration limit; default max(10⁷, 100 n).
    time_limit : wall-clock budget in seconds (checked between pauses of the loop).
    selection : ``"second_order"`` (Fan, Chen & Lin 2005) or ``"first_order"``
        (maximal violating pair, Keerthi et al. 2001).
    shrinking : drop variables at bounds that are unlikely to move (gradient
        reconstructed before the final test, so the answer does not depend on it).
    trace : ``"full"``, ``"sampled"`` (every ``sample_every``-th iteration plus every
        iteration with an event) or ``"off"``.
    snapshot_every : store α every this many iterations; default max(1000, n).
    kernel_memory_mb : budget for the full Gram matrix; default half the available memory.
    kernel_dtype : ``"float64"`` or ``"float32"`` kernel storage (arithmetic is float64).
    cache_mb : kernel column cache size when the Gram does not fit the budget.
    alpha0 : feasible warm start (n,); default the problem's feasible start.
    callback : called every ``callback_every`` iterations with a dict of ``iteration``,
        ``violation``, ``tol``, ``active``, ``objective``; returning True or raising
        ``StopIteration`` stops the run (status ``stopped_by_callback``).
    stall_window : stop as stalled after this many iterations without objective decrease;
        default max(10⁶, 10 n).

    References
    ----------
    Platt (1998) Sequential minimal optimization; Keerthi, Shevade, Bhattacharyya &
    Murthy (2001) Neural Computation 13; Fan, Chen & Lin (2005) JMLR 6:1889–1918.
    """
    t_start = time.perf_counter()
    if not isinstance(problem, DualProblem):
        raise InvalidInputError(f"problem must be a DualProblem, got {type(problem).__name__}")
    n = problem.n
    tol = _positive_float(tol, "tol")
    max_iter = _positive_int(max_iter, "max_iter", allow_none=True)
    if max_iter is None:
        max_iter = max(10_000_000, 100 * n)
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
    budget_mb = kernel_memory_mb if kernel_memory_mb is not None else 0.5 * _available_mb()
    if kernel_dtype not in ("float64", "float32"):
        raise InvalidInputError(
            f"option kernel_dtype must be 'float64' or 'float32', got {kernel_dtype!r}")
    cache_mb = _positive_float(cache_mb, "cache_mb")
    if callback is not None and not callable(callback):
        raise InvalidInputError("option callback must be callable or None")
    callback_every = _positive_int(callback_every, "callback_every")
    stall_window = _positive_int(stall_window, "stall_window", allow_none=True)
    if stall_window is None:
        stall_window = max(1_000_000, 10 * n)
    alpha = problem.feasible_start() if alpha0 is None else _check_start(problem, alpha0)

    y = np.ascontiguousarray(problem.y)
    lo = np.where(y > 0, problem.lower, -problem.upper)
    hi = np.where(y > 0, problem.upper, -problem.lower)
    beta = y * alpha
    q = y * problem.p

    # kernel access
    t0 = time.perf_counter()
    dtype = np.dtype(kernel_dtype)
    itemsize = dtype.itemsize
    gram_mb = n * n * itemsize / 2**20
    if gram_mb > budget_mb:
        raise InvalidInputError(
            f"the Gram matrix needs {gram_mb:.0f} MB, above the kernel memory budget "
            f"{budget_mb:.0f} MB (column cache mode is not available yet)"
        )
    K = _full_gram(problem, np.dtype(np.float64))
    diag = np.ascontiguousarray(np.diagonal(K)).copy()
    kernel_seconds = time.perf_counter() - t0
    kernel_mode = "full_gram"

    nz = np.flatnonzero(beta)
    F = -(K[:, nz] @ beta[nz] + q) if nz.size else -q.copy()
    obj0 = 0.5 * float(beta @ (-F - q)) + float(q @ beta)

    level = {"full": 0, "sampled": 1, "off": 2}[trace]
    istate = np.zeros(_k.IS_SIZE, dtype=np.int64)
    fstate = np.zeros(_k.FS_SIZE, dtype=np.float64)
    istate[_k.IS_LEVEL] = level
    istate[_k.IS_SAMPLE] = sample_every
    istate[_k.IS_SECOND_ORDER] = 1 if selection == "second_order" else 0
    istate[_k.IS_STALL_WINDOW] = stall_window
    fstate[_k.FS_OBJ] = obj0
    fstate[_k.FS_BEST_OBJ] = obj0
    fstate[_k.FS_TOL] = tol
    fstate[_k.FS_TAU] = TAU
    arrs = _new_trace_arrays(trace, 4096, 256)
    snap_its = [0]
    snaps = [y * beta]

    t_solve = time.perf_counter()
    status: Status | None = None
    detail = ""
    next_cb = callback_every if callback is not None else None
    while status is None:
        it = int(istate[_k.IS_ITER])
        stops = [max_iter, (it // snapshot_every + 1) * snapshot_every]
        if next_cb is not None:
            stops.append(next_cb)
        if time_limit is not None:
            stops.append(it + 2000)
        istate[_k.IS_STOP_AT] = min(stops)
        code = _k.smo_run(
            K, diag, F, beta, lo, hi, y, istate, fstate,
            arrs["iteration"], arrs["i"], arrs["j"], arrs["alpha_i"], arrs["alpha_j"],
            arrs["step"], arrs["objective"], arrs["violation"], arrs["active"],
            arrs["ev_iteration"], arrs["ev_kind"], arrs["ev_value"],
        )
        it = int(istate[_k.IS_ITER])
        if code == _k.RUN_TRACE_FULL:
            rows, evs = int(istate[_k.IS_ROWS]), int(istate[_k.IS_EVENTS])
            if level != 2 and rows >= arrs["iteration"].shape[0]:
                for name, _ in _TRACE_COLUMNS:
                    arrs[name] = _grow(arrs[name], rows, rows + 1)
            if evs + 1 > arrs["ev_iteration"].shape[0]:
                for name in ("ev_iteration", "ev_kind", "ev_value"):
                    arrs[name] = _grow(arrs[name], evs, evs + 1)
            continue
        if code == _k.RUN_CONVERGED:
            status = Status.CONVERGED
            break
        if code == _k.RUN_NUMERICAL:
            status, detail = Status.NUMERICAL_ERROR, f"non-finite objective at iteration {it}"
            break
        if code == _k.RUN_STALLED:
            status = Status.STALLED
            detail = f"no objective decrease in {stall_window} iterations"
            break
        # pause
        if it % snapshot_every == 0 and it > snap_its[-1]:
            snap_its.append(it)
            snaps.append(y * beta)
        if it >= max_iter:
            status, detail = Status.ITERATION_LIMIT, f"{max_iter} iterations"
            break
        if next_cb is not None and it >= next_cb:
            next_cb += callback_every
            info = {"iteration": it, "violation": float(fstate[_k.FS_VIOL]), "tol": tol,
                    "active": n, "objective": float(fstate[_k.FS_OBJ])}
            try:
                stop = callback(info)
            except StopIteration:
                stop = True
            if stop is True:
                status, detail = Status.STOPPED_BY_CALLBACK, f"at iteration {it}"
                break
        if time_limit is not None and time.perf_counter() - t_start > time_limit:
            status, detail = Status.TIME_LIMIT, f"{time_limit:g} s"
            break
    solve_seconds = time.perf_counter() - t_solve
    it = int(istate[_k.IS_ITER])
    alpha = y * beta
    if snap_its[-1] != it:
        snap_its.append(it)
        snaps.append(alpha.copy())
    G = -y * F
    cert = certify(problem, alpha, tol=tol, gradient=G)
    rows, evs = int(istate[_k.IS_ROWS]), int(istate[_k.IS_EVENTS])
    columns = {name: arrs[name][:rows].copy() for name, _ in _TRACE_COLUMNS} if level != 2 else {
        name: np.zeros(0, dtype=dt) for name, dt in _TRACE_COLUMNS}
    tr = Trace(
        solver="smo", level=trace, columns=columns,
        events={"iteration": arrs["ev_iteration"][:evs].copy(),
                "kind": arrs["ev_kind"][:evs].copy(), "value": arrs["ev_value"][:evs].copy()},
        event_kinds=dict(EVENT_KINDS), snapshot_iterations=np.asarray(snap_its, dtype=np.int64),
        snapshots=np.vstack(snaps), sample_every=sample_every if trace == "sampled" else 1,
        snapshot_every=snapshot_every,
    )
    options = {
        "tol": tol, "max_iter": max_iter, "time_limit": time_limit, "selection": selection,
        "shrinking": bool(shrinking), "trace": trace, "sample_every": sample_every,
        "snapshot_every": snapshot_every, "kernel_memory_mb": budget_mb,
        "kernel_dtype": kernel_dtype, "cache_mb": cache_mb, "warm_start": alpha0 is not None,
        "callback_every": callback_every, "stall_window": stall_window, "tau": TAU,
    }
    extra = {
        "kernel_mode": kernel_mode, "kernel_seconds": kernel_seconds,
        "solve_seconds": solve_seconds, "curvature_fixes": int(istate[_k.IS_CURV_FIXES]),
        "loop_violation": float(fstate[_k.FS_VIOL]), "loop_objective": float(fstate[_k.FS_OBJ]),
    }
    message = status_message(status, detail)
    if status != Status.CONVERGED:
        warnings.warn(f"SMO did not converge: {message}", ConvergenceWarning, stacklevel=2)
    return SolveResult(
        solver="smo", status=status, message=message, alpha=alpha, bias=cert.bias,
        iterations=it, certificate=cert, seconds=time.perf_counter() - t_start,
        options=options, trace=tr, extra=extra,
    )
