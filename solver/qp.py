"""Independent reference solver: cvxopt's interior-point QP with a structured KKT solver.

The dual (see :mod:`solver.problem`)

    minimise ½αᵀQα + pᵀα   subject to   yᵀα = Δ,   l ≤ α ≤ u

is handed to :func:`cvxopt.solvers.qp` as ``P = Q``, ``q = p``, ``A = yᵀ``, ``b = Δ``,
``G = [−I; I]``, ``h = [−l; u]``.  Each interior-point iteration solves Newton systems

    [ Q   a   Gᵀ   ] [ux]   [bx]
    [ aᵀ  0   0    ] [uy] = [by]        (a = y, W = diag(d) the Nesterov–Todd scaling)
    [ G   0  −WᵀW  ] [uz]   [bz]

Because G = [−I; I], eliminating uz gives  (Q + D) ux + a uy = bx − D₁bz₁ + D₂bz₂  with
D₁ = diag(d₁⁻²), D₂ = diag(d₂⁻²), D = D₁ + D₂, and the single equality row is removed with
a Schur complement:  uy = (aᵀH⁻¹r − by) / (aᵀH⁻¹a),  ux = H⁻¹(r − a uy),  H = Q + D.
So every iteration costs one dense n×n Cholesky factorisation of H (``kkt="structured"``)
instead of cvxopt's generic reduction, which also forms GᵀW⁻²G from a dense 2n×n G
(``kkt="generic"``, kept for the benchmark).  (Vandenberghe, "The CVXOPT linear and
quadratic cone program solvers", 2010, section on custom KKT solvers; the elimination is
block Gaussian elimination.)

Trace.  cvxopt calls the KKT-solver factory once per iteration, with the scaling W of the
current iterate, right after it computed its residuals.  The factory reads the current
iterate (x, y, s, z) from the calling cvxopt frame (names of cvxopt 1.3's ``coneqp``) and
recomputes every trace quantity itself, with cvxopt's own formulas, from that exact
iterate; the last row comes from the returned solution.  These figures are exact (they
equal cvxopt's printed progress figures up to rounding; a test checks the final row
against cvxopt's returned statistics).  If a future cvxopt renames those locals, the
trace keeps only the final iterate's row and α, and ``extra["trace_source"]`` says so.
"""

from __future__ import annotations

import math
import sys
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from .certificate import certify
from .errors import ConvergenceWarning, InvalidInputError
from .problem import DualProblem
from .result import TRACE_LEVELS, SolveResult, Trace
from .status import Status, settle

__all__ = ["solve_qp", "KKT_METHODS", "DEFAULT_INTERIOR_POINT_TOL", "DEFAULT_KKT_TOL",
           "DEFAULT_SIZE_LIMIT"]

#: cvxopt abstol = reltol = feastol.  Interior-point accuracy in α and in the gradient is
#: roughly the square root of the final gap, so cvxopt's default 1e-7 left maximal
#: violations up to 3e-3 on scikit-learn's breast cancer data (C = 100); 1e-9 costs one or
#: two more iterations and gave ≤ 5e-5 on every bundled dataset tried (measured).
DEFAULT_INTERIOR_POINT_TOL = 1e-9
#: Tolerance on the shared certificate's maximal violation m(α) − M(α) (gradient units);
#: the usual SMO stopping tolerance (common practice).
DEFAULT_KKT_TOL = 1e-3
#: Largest n solved without ``force=True`` (dense Q and H need about 16·n² bytes).
DEFAULT_SIZE_LIMIT = 5000
KKT_METHODS = ("structured", "generic")

TRACE_COLUMNS = (
    "primal_objective", "dual_objective", "gap", "relative_gap",
    "primal_residual", "dual_residual", "step",
)


class _Stop(Exception):
    """Raised inside the KKT factory to end the cvxopt run (callback or time limit)."""

    def __init__(self, status: Status, detail: str) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail


def _dense_q(problem: DualProblem, block_rows: int = 1024) -> tuple[Any, np.ndarray]:
    """Q (n, n) from kernel blocks, symmetrised (rounding in blocks can break symmetry).

    Returned as a cvxopt matrix and a NumPy view of the same memory, so that all dense
    linear algebra of the solve runs on cvxopt's own BLAS / LAPACK.
    """
    from cvxopt import matrix

    n = problem.n
    Qc = matrix(0.0, (n, n))
    Q = np.asarray(Qc)  # column-major view, writable
    for s in range(0, n, block_rows):
        e = min(n, s + block_rows)
        Q[s:e] = problem.q_block(slice(s, e), slice(None))
    for s in range(0, n, block_rows):  # average the upper and lower triangles block by block
        e = min(n, s + block_rows)
        for t in range(s, n, block_rows):
            f = min(n, t + block_rows)
            avg = 0.5 * (Q[s:e, t:f] + Q[t:f, s:e].T)
            Q[s:e, t:f] = avg
            Q[t:f, s:e] = avg.T
    return Qc, Q


def _qx(Qc: Any, x: np.ndarray) -> np.ndarray:
    """Q x with cvxopt's BLAS (symv, lower triangle), as a NumPy vector."""
    from cvxopt import blas, matrix

    out = matrix(0.0, (Qc.size[0], 1))
    blas.symv(Qc, matrix(np.ascontiguousarray(x, dtype=np.float64)), out)
    return np.array(out).ravel()


class _Recorder:
    """Collects one trace row per interior-point iterate; owns stop checks and the callback."""

    def __init__(self, problem: DualProblem, Q: Any, *, level: str, sample_every: int,
                 snapshot_every: int, callback: Callable[[Mapping[str, Any]], Any] | None,
                 time_limit: float | None, started: float) -> None:
        self.problem, self.Q = problem, Q
        self.level, self.sample_every, self.snapshot_every = level, sample_every, snapshot_every
        self.callback, self.time_limit, self.started = callback, time_limit, started
        n = problem.n
        self.q = problem.p
        self.h = np.concatenate([-problem.lower, problem.upper])
        self.resx0 = max(1.0, float(np.linalg.norm(self.q)))
        self.resy0 = max(1.0, abs(problem.delta))
        self.resz0 = max(1.0, float(np.linalg.norm(self.h)))
        self.n = n
        self.rows: dict[str, list[float]] = {c: [] for c in ("iteration", *TRACE_COLUMNS,
                                                              "n_at_lower", "n_at_upper")}
        self.snap_iters: list[int] = []
        self.snaps: list[np.ndarray] = []
        self.prev_x: np.ndarray | None = None
        self.direction: np.ndarray | None = None  # last Newton direction Δx from the KKT solver
        self.last: dict[str, Any] | None = None  # last iterate seen (x, y, s, z, iteration)
        self.frame_ok = True
        self.singular: str | None = None
        self.n_factor = 0

    def stats(self, x: np.ndarray, yv: float, s: np.ndarray, z: np.ndarray) -> dict[str, float]:
        """cvxopt's coneqp statistics recomputed from the iterate (same formulas)."""
        n, pr = self.n, self.problem
        Qx = _qx(self.Q, x)
        f0 = 0.5 * float(x @ Qx) + float(self.q @ x)
        rx = Qx + self.q + yv * pr.y - z[:n] + z[n:]
        ry = float(pr.y @ x) - pr.delta
        rz = s + np.concatenate([-x, x]) - self.h
        gap = float(s @ z)
        dcost = f0 + yv * ry + float(z @ rz) - gap
        if f0 < 0.0:
            relgap = gap / -f0
        elif dcost > 0.0:
            relgap = gap / dcost
        else:
            relgap = float("nan")
        pres = max(abs(ry) / self.resy0, float(np.linalg.norm(rz)) / self.resz0)
        dres = float(np.linalg.norm(rx)) / self.resx0
        return {"primal_objective": f0, "dual_objective": dcost, "gap": gap,
                "relative_gap": relgap, "primal_residual": pres, "dual_residual": dres}

    def observe(self, x: np.ndarray, yv: float, s: np.ndarray, z: np.ndarray, it: int) -> None:
        """Record iterate number ``it`` (0 = cvxopt's starting point)."""
        x = np.array(x, dtype=np.float64).ravel()
        s = np.array(s, dtype=np.float64).ravel()
        z = np.array(z, dtype=np.float64).ravel()
        step = float("nan")
        if self.prev_x is not None and self.direction is not None:
            dd = float(self.direction @ self.direction)
            if dd > 0.0:  # x_k = x_{k−1} + t·Δx exactly (cvxopt's axpy), so t is a projection
                step = float((x - self.prev_x) @ self.direction) / dd
        self.prev_x = x
        self.last = {"x": x, "y": yv, "s": s, "z": z, "iteration": it}
        if it == 0 or (self.snapshot_every > 0 and it % self.snapshot_every == 0):
            self.snap_iters.append(it)
            self.snaps.append(x.copy())
        if it == 0:
            self.start_stats = self.stats(x, yv, s, z)
            return
        keep = self.level == "full" or (self.level == "sampled" and it % self.sample_every == 0)
        row = None
        if keep or self.callback is not None:
            row = self.stats(x, yv, s, z)
            row["step"] = step
        if keep:
            self.append(it, row, s, z)
        if self.callback is not None:
            state = {"iteration": it, "alpha": x.copy(), "objective": row["primal_objective"],
                     **row}
            try:
                answer = self.callback(state)
            except StopIteration:
                answer = True
            if answer is True:
                raise _Stop(Status.STOPPED_BY_CALLBACK, f"callback asked to stop at iteration {it}")
        if self.time_limit is not None and time.perf_counter() - self.started > self.time_limit:
            raise _Stop(Status.TIME_LIMIT,
                        f"time limit {self.time_limit:g} s reached at iteration {it}")

    def append(self, it: int, row: Mapping[str, float], s: np.ndarray, z: np.ndarray) -> None:
        n = self.n
        self.rows["iteration"].append(it)
        for c in TRACE_COLUMNS:
            self.rows[c].append(row[c])
        self.rows["n_at_lower"].append(int(np.sum(s[:n] < z[:n])))
        self.rows["n_at_upper"].append(int(np.sum(s[n:] < z[n:])))

    def from_frame(self) -> None:
        """Read the current iterate from cvxopt's coneqp frame (two levels up)."""
        if not self.frame_ok:
            return
        loc = sys._getframe(2).f_locals
        if "iters" not in loc:  # the initial factorisation before the main loop
            return
        try:
            x, y, s, z, it = loc["x"], loc["y"], loc["s"], loc["z"], int(loc["iters"])
            yv = float(np.asarray(y).ravel()[0]) if len(y) else 0.0
        except (KeyError, TypeError, ValueError, IndexError):
            self.frame_ok = False
            return
        if len(x) != self.n or len(s) != 2 * self.n or len(z) != 2 * self.n:
            self.frame_ok = False
            return
        self.observe(np.asarray(x), yv, np.asarray(s), np.asarray(z), it)


def _structured_factory(Qc: Any, a: np.ndarray, rec: _Recorder) -> Callable:
    """KKT-solver factory exploiting G = [−I; I] and one equality row (see module notes).

    The factorisation and solves use cvxopt's LAPACK (``potrf`` / ``potrs``), the same
    library cvxopt's generic path uses, so the benchmark compares formulations, not BLAS.
    """
    from cvxopt import lapack, matrix

    n = a.shape[0]
    Q = np.asarray(Qc)
    Hc = matrix(0.0, (n, n))
    H = np.asarray(Hc)
    diag = np.arange(n)

    def chol_solve(rhs: np.ndarray) -> np.ndarray:
        B = matrix(np.ascontiguousarray(rhs, dtype=np.float64))
        lapack.potrs(Hc, B)
        return np.array(B).ravel()

    def factor(W: Mapping[str, Any]) -> Callable:
        rec.from_frame()
        d = np.array(W["d"]).ravel()
        w1, w2 = d[:n] ** -2, d[n:] ** -2
        np.copyto(H, Q)
        H[diag, diag] += w1 + w2
        try:
            lapack.potrf(Hc)  # lower Cholesky factor, in place
        except ArithmeticError as exc:
            rec.singular = f"Cholesky of Q + D failed: {exc}"
            raise ArithmeticError(rec.singular) from None
        Ha = chol_solve(a)
        schur = float(a @ Ha)
        if not (math.isfinite(schur) and schur > 0.0) or not np.all(np.isfinite(Ha)):
            rec.singular = f"Schur complement aᵀ(Q + D)⁻¹a = {schur!r} is not positive"
            raise ArithmeticError(rec.singular)
        rec.n_factor += 1

        def solve(x: Any, y: Any, z: Any) -> None:
            xv, zv = np.asarray(x).ravel(), np.asarray(z).ravel()
            by = float(np.asarray(y).ravel()[0])
            bz1, bz2 = zv[:n].copy(), zv[n:].copy()
            Hr = chol_solve(xv - w1 * bz1 + w2 * bz2)
            uy = (float(a @ Hr) - by) / schur
            ux = Hr - uy * Ha
            xv[:] = ux
            np.asarray(y).ravel()[0] = uy
            zv[:n] = -(bz1 + ux) * w1 * d[:n]  # W·uz with uz₁ = −(bz₁ + ux)/d₁²
            zv[n:] = (ux - bz2) * w2 * d[n:]  # W·uz with uz₂ = (ux − bz₂)/d₂²
            rec.direction = ux.copy()

        return solve

    return factor


def _generic_factory(G: Any, A: Any, P: Any, rec: _Recorder) -> Callable:
    """cvxopt's own dense reduction ('chol2', its default here), wrapped for the trace."""
    from cvxopt import misc

    base = misc.kkt_chol2(G, {"l": G.size[0], "q": [], "s": []}, A)

    def factor(W: Mapping[str, Any]) -> Callable:
        rec.from_frame()
        try:
            inner = base(W, P)
        except ArithmeticError as exc:
            rec.singular = f"cvxopt's Cholesky failed: {exc}"
            raise
        rec.n_factor += 1

        def solve(x: Any, y: Any, z: Any) -> None:
            inner(x, y, z)
            rec.direction = np.array(x).ravel()

        return solve

    return factor


def _snap(problem: DualProblem, x: np.ndarray, s: np.ndarray, z: np.ndarray,
          kappa: float) -> tuple[np.ndarray, dict]:
    """Put α on the bounds the interior-point iterate identifies as active, keep yᵀα = Δ.

    A bound is taken as active when its multiplier exceeds its slack in gradient units,
    zᵢ > κ·sᵢ with κ = max diag(Q) (the gradient change per unit of αᵢ): snapping then moves
    the gradient by less than the multiplier it discards (usual primal–dual indicator;
    common practice).  α is clipped to [l, u]; the equality residual left by the snap and
    by cvxopt's own residual is spread over the free points within their room.
    """
    n, lo, up, y = problem.n, problem.lower, problem.upper, problem.y
    at_lo = z[:n] > kappa * s[:n]
    at_up = (z[n:] > kappa * s[n:]) & ~at_lo
    alpha = np.clip(x, lo, up)
    alpha[at_lo] = lo[at_lo]
    alpha[at_up] = up[at_up]
    change = float(np.max(np.abs(alpha - x))) if n else 0.0
    free = ~(at_lo | at_up) & (up > lo)
    shift = problem.delta - float(y @ alpha)
    total = 0.0
    for _ in range(8):  # each pass exhausts the room of at least one point or finishes
        need = problem.delta - float(y @ alpha)
        if abs(need) <= 1e-15 * max(1.0, float(np.abs(alpha).sum())):
            break
        direction = np.sign(need) * y  # moving αᵢ along this raises yᵀα toward Δ
        room = np.where(direction > 0, up - alpha, alpha - lo)
        cand = free & (room > 0)
        if not np.any(cand):
            break
        per = min(abs(need) / int(cand.sum()), float(np.min(room[cand])))
        alpha[cand] += direction[cand] * per
        total += per * int(cand.sum())
    return alpha, {"n_lower": int(at_lo.sum()), "n_upper": int(at_up.sum()),
                   "max_change": change, "equality_shift": abs(shift), "restored": total}


def _check_options(problem: DualProblem, interior_point_tol: float, iteration_limit: int,
                   size_limit: int,
                   trace: str, kkt: str, kkt_tol: float, sample_every: int,
                   snapshot_every: int, time_limit: float | None, callback: Any,
                   alpha0: np.ndarray | None, force: bool) -> np.ndarray | None:
    def positive(name: str, v: Any) -> None:
        if isinstance(v, bool) or not isinstance(v, (int, float, np.number)) or not (
            math.isfinite(float(v)) and float(v) > 0
        ):
            raise InvalidInputError(f"qp solver: {name} must be a finite number > 0, got {v!r}")

    def count(name: str, v: Any, least: int) -> None:
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or int(v) < least:
            raise InvalidInputError(f"qp solver: {name} must be an integer >= {least}, got {v!r}")

    positive("interior_point_tol", interior_point_tol)
    positive("kkt_tol", kkt_tol)
    count("iteration_limit", iteration_limit, 1)
    count("size_limit", size_limit, 1)
    count("sample_every", sample_every, 1)
    count("snapshot_every", snapshot_every, 0)
    if time_limit is not None:
        positive("time_limit", time_limit)
    if trace not in TRACE_LEVELS:
        raise InvalidInputError(
            f"qp solver: trace must be one of {', '.join(TRACE_LEVELS)}, got {trace!r}")
    if kkt not in KKT_METHODS:
        raise InvalidInputError(
            f"qp solver: kkt must be one of {', '.join(KKT_METHODS)}, got {kkt!r}")
    if callback is not None and not callable(callback):
        raise InvalidInputError("qp solver: callback must be callable or None")
    if problem.n > size_limit and not force:
        gib = 16.0 * problem.n**2 / 2**30
        raise InvalidInputError(
            f"qp solver: the problem has {problem.n} points, above the size limit {size_limit}; "
            f"the dense interior-point solve needs about {gib:.1f} GiB and O(n³) time per "
            f"iteration. Pass force=True to solve anyway, or raise size_limit"
        )
    if alpha0 is None:
        return None
    a0 = np.asarray(alpha0, dtype=np.float64).ravel()
    if a0.shape != (problem.n,) or not np.all(np.isfinite(a0)):
        raise InvalidInputError(f"qp solver: alpha0 must be {problem.n} finite numbers")
    return a0


#: Re-solves allowed when cvxopt's own test is met but the certificate is not (each with
#: interior_point_tol / 100, not below TIGHTEST_INTERIOR_POINT_TOL).
DEFAULT_TIGHTEN = 2
TIGHTEST_INTERIOR_POINT_TOL = 1e-13


def solve_qp(
    problem: DualProblem,
    *,
    interior_point_tol: float = DEFAULT_INTERIOR_POINT_TOL,
    tighten: int = DEFAULT_TIGHTEN,
    iteration_limit: int = 100,
    size_limit: int = DEFAULT_SIZE_LIMIT,
    force: bool = False,
    trace: str = "full",
    kkt: str = "structured",
    kkt_tol: float = DEFAULT_KKT_TOL,
    sample_every: int = 1,
    snapshot_every: int = 1,
    time_limit: float | None = None,
    alpha0: np.ndarray | None = None,
    callback: Callable[[Mapping[str, Any]], Any] | None = None,
) -> SolveResult:
    """Solve the dual with cvxopt's interior-point QP method (:func:`_solve_once`), tightening
    cvxopt's own tolerance while it stops short of the shared certificate.

    When cvxopt reports ``optimal`` but the certificate's maximal violation exceeds
    ``kkt_tol`` (the status rule, :func:`solver.status.decide`, then says
    ``certificate_not_met``), the problem is solved again from scratch with
    ``interior_point_tol / 100`` (not below 1e-13), at most ``tighten`` times.  The last
    attempt is returned; ``extra["attempts"]`` lists every attempt (interior-point
    tolerance, iterations, maximal violation, status) and ``extra["interior_point_tol_used"]``
    the last tolerance; timing and ``seconds`` cover every attempt.  The other options are
    those of :func:`_solve_once`, documented there.

    Examples
    --------
    >>> from solver.kernels import RBFKernel
    >>> from solver.problem import binary_classification
    >>> import numpy as np
    >>> X = np.array([[0.0, 0.0], [1.0, 1.0], [0.0, 1.0], [1.0, 0.0]])
    >>> prob = binary_classification(X, [0, 0, 1, 1], kernel=RBFKernel(gamma=1.0), C=1.0)
    >>> solve_qp(prob).status.label
    'converged'
    """
    if isinstance(tighten, bool) or not isinstance(tighten, int) or tighten < 0:
        raise InvalidInputError(f"option tighten must be an integer >= 0, got {tighten!r}")
    started = time.perf_counter()
    options = dict(iteration_limit=iteration_limit, size_limit=size_limit, force=force,
                   trace=trace, kkt=kkt, kkt_tol=kkt_tol, sample_every=sample_every,
                   snapshot_every=snapshot_every, time_limit=time_limit, alpha0=alpha0,
                   callback=callback)
    tol, attempts, parts = float(interior_point_tol), [], [0.0, 0.0]
    while True:
        last = len(attempts) == tighten or tol / 100 < TIGHTEST_INTERIOR_POINT_TOL
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            r = _solve_once(problem, interior_point_tol=tol, **options)
        retry = (r.status == Status.CERTIFICATE_NOT_MET and not last)
        if not retry:
            for w in caught:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        parts[0] += r.extra["setup_seconds"]
        parts[1] += r.extra["solve_seconds"]
        attempts.append({"interior_point_tol": tol, "iterations": int(r.iterations),
                         "max_violation": float(r.certificate.max_violation),
                         "status": r.status.label})
        if not retry:
            break
        tol = float(f"{tol / 100:.3g}")
    extra = {**r.extra, "attempts": attempts, "interior_point_tol_used": tol,
             "setup_seconds": parts[0], "solve_seconds": parts[1]}
    opts = {**r.options, "interior_point_tol": float(interior_point_tol), "tighten": tighten}
    return replace(r, extra=extra, options=opts, seconds=time.perf_counter() - started)


def _solve_once(
    problem: DualProblem,
    *,
    interior_point_tol: float = DEFAULT_INTERIOR_POINT_TOL,
    iteration_limit: int = 100,
    size_limit: int = DEFAULT_SIZE_LIMIT,
    force: bool = False,
    trace: str = "full",
    kkt: str = "structured",
    kkt_tol: float = DEFAULT_KKT_TOL,
    sample_every: int = 1,
    snapshot_every: int = 1,
    time_limit: float | None = None,
    alpha0: np.ndarray | None = None,
    callback: Callable[[Mapping[str, Any]], Any] | None = None,
) -> SolveResult:
    """Solve the dual with cvxopt's primal–dual interior-point QP method.

    Parameters
    ----------
    problem : the dual problem (n points; Q is formed densely, 8·n² bytes, plus the same again
        for the factorisation).
    interior_point_tol : cvxopt's ``abstol``, ``reltol`` and ``feastol`` all set to this value:
    cvxopt stops when
        the primal and dual residuals (relative,
                                       its definitions) are ≤ interior_point_tol and the duality gap
        sᵀz ≤ interior_point_tol or the relative gap ≤ interior_point_tol.
    iteration_limit : cvxopt ``maxiters``.
    size_limit, force : above ``size_limit`` points the call is refused unless ``force``.
    trace : ``"full"`` (a row per iteration), ``"sampled"`` (every ``sample_every``-th) or
        ``"off"``.  Columns: ``iteration``, ``primal_objective`` (½αᵀQα + pᵀα at the iterate,
        i.e. the SVM dual objective), ``dual_objective`` (the QP's Lagrange dual bound),
        ``gap`` (sᵀz), ``relative_gap``, ``primal_residual``, ``dual_residual`` (cvxopt's
        relative residual norms), ``step`` (interior-point step length, from consecutive
        iterates and the Newton direction), ``n_at_lower``, ``n_at_upper`` (bounds whose
        multiplier exceeds their slack).  No events are recorded.
    kkt : ``"structured"`` (one n×n Cholesky per iteration, see module notes) or ``"generic"``
        (cvxopt's dense reduction with G stored as a 2n×n matrix; for benchmarks).
    kkt_tol : tolerance of the shared certificate (maximal violation m − M, gradient units).
    snapshot_every : store α every this many iterations (0: only start and final).
    time_limit : seconds; checked once per iteration.
    alpha0 : optional primal starting point for cvxopt (slacks and multipliers start at 1;
        interior-point methods gain little from it).
    callback : called after every iteration with a dict (``iteration``, ``alpha``,
        ``objective`` and the trace quantities); returning True or raising ``StopIteration``
        stops the run (status ``stopped_by_callback``, α = that iterate).

    Returns
    -------
    SolveResult with ``solver="qp"``.  cvxopt's status maps as: ``optimal`` → CONVERGED;
    ``unknown`` at the iteration limit → ITERATION_LIMIT; a failed factorisation (cvxopt's
    "Rank(A) < p or Rank([P; A; G]) < n" or "singular KKT matrix") → SINGULAR_KKT; any other
    ``unknown`` or a non-finite iterate → NUMERICAL_ERROR.  The raw status is in the message
    and ``extra["backend_status"]`` (``"error: ..."`` when cvxopt raised), cvxopt's final
    statistics in ``extra["backend_stats"]``.  Interior-point iterates never sit exactly on a
    bound, so the returned α is the final iterate with the bounds it identifies as active
    set exactly (a bound is active when its multiplier exceeds κ times its slack,
    κ = max diag Q) and yᵀα = Δ restored over the free points (``extra["snap"]`` records
    counts, largest change and the equality correction).  The certificate is computed on
    that α with the default ``bound_tol``; ``bias`` is the certificate's.

    Notes
    -----
    If cvxopt reports ``optimal`` but the shared certificate's maximal violation exceeds
    ``kkt_tol``, the status is CERTIFICATE_NOT_MET (the one status rule,
    :func:`solver.status.decide`); the message keeps cvxopt's word and a
    :class:`ConvergenceWarning` is issued.

    """
    started = time.perf_counter()
    a0 = _check_options(problem, interior_point_tol, iteration_limit, size_limit, trace, kkt,
                        kkt_tol, sample_every,
                        snapshot_every, time_limit, callback, alpha0, force)
    from cvxopt import blas, matrix, solvers

    n = problem.n
    Qc, Q = _dense_q(problem)
    rec = _Recorder(problem, Qc, level=trace, sample_every=int(sample_every),
                    snapshot_every=int(snapshot_every), callback=callback,
                    time_limit=time_limit, started=started)
    q = matrix(problem.p.copy())
    h = matrix(rec.h.copy())
    A = matrix(problem.y.copy(), (1, n))
    b = matrix([problem.delta])
    cvx_options = {"show_progress": False, "maxiters": int(iteration_limit),
                   "abstol": float(interior_point_tol),
                   "reltol": float(interior_point_tol), "feastol": float(interior_point_tol),
                   "refinement": 0}
    if kkt == "structured":
        def P(u: Any, v: Any, alpha: float = 1.0, beta: float = 0.0) -> None:
            blas.symv(Qc, u, v, alpha=alpha, beta=beta)

        def G(u: Any, v: Any, alpha: float = 1.0, beta: float = 0.0, trans: str = "N") -> None:
            uu, vv = np.asarray(u).ravel(), np.asarray(v).ravel()
            vv *= beta
            if trans == "N":  # G u = [−u; u]
                vv[:n] -= alpha * uu
                vv[n:] += alpha * uu
            else:  # Gᵀ u = −u₁ + u₂
                vv += alpha * (uu[n:] - uu[:n])

        Pm, Gm = P, G
        factory = _structured_factory(Qc, problem.y, rec)
    else:
        Pm = Qc
        Gm = matrix(np.vstack([-np.eye(n), np.eye(n)]))
        factory = _generic_factory(Gm, A, Pm, rec)
    initvals = {"x": matrix(a0)} if a0 is not None else None

    raw_status, detail, sol, stop = "", "", None, None
    t_iterate = time.perf_counter()
    try:
        sol = solvers.qp(Pm, q, Gm, h, A, b, kktsolver=factory, initvals=initvals,
                         options=cvx_options)
        raw_status = str(sol["status"])
    except _Stop as exc:
        stop = exc
        raw_status = "stopped"
    except (ValueError, ArithmeticError) as exc:
        text = str(exc)
        if rec.singular is None and "Rank" not in text:
            raise
        raw_status, detail = f"error: {text}", rec.singular or ""

    solve_seconds = time.perf_counter() - t_iterate
    iterations = 0
    if sol is not None:
        x = np.array(sol["x"]).ravel()
        s, z = np.array(sol["s"]).ravel(), np.array(sol["z"]).ravel()
        yv = float(np.array(sol["y"]).ravel()[0])
        iterations = int(sol["iterations"])
        if rec.last is None or rec.last["iteration"] != iterations:
            before = rec.snapshot_every
            if rec.snapshot_every == 0:
                rec.snapshot_every = max(iterations, 1)  # keep the final α
            rec.callback, rec.time_limit = None, None
            rec.observe(x, yv, s, z, iterations)
            rec.snapshot_every = before
        elif iterations not in rec.snap_iters:
            rec.snap_iters.append(iterations)
            rec.snaps.append(x.copy())
    elif rec.last is not None:
        x, s, z = rec.last["x"], rec.last["s"], rec.last["z"]
        iterations = int(rec.last["iteration"])
        if iterations not in rec.snap_iters:
            rec.snap_iters.append(iterations)
            rec.snaps.append(x.copy())
    else:
        x = problem.feasible_start()
        s = np.concatenate([x - problem.lower, problem.upper - x])
        z = np.zeros(2 * n)

    if stop is not None:
        status, detail = stop.status, stop.detail
    elif raw_status.startswith("error") or (raw_status == "unknown" and rec.singular):
        status = Status.SINGULAR_KKT  # cvxopt ends a run with 'unknown' on a singular KKT matrix
        detail = detail or rec.singular or "singular KKT matrix"
    elif raw_status == "optimal":
        status = Status.CONVERGED
    elif raw_status == "unknown" and iterations >= iteration_limit:
        status = Status.ITERATION_LIMIT
    else:
        status = Status.NUMERICAL_ERROR
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(s)) and np.all(np.isfinite(z))):
        status, detail = Status.NUMERICAL_ERROR, "non-finite interior-point iterate"
        x = np.nan_to_num(np.clip(x, problem.lower, problem.upper), nan=0.0)
        s, z = np.ones(2 * n), np.zeros(2 * n)

    kappa = max(float(np.max(np.diag(Q))), np.finfo(float).tiny)
    alpha, snap = _snap(problem, x, s, z, kappa)
    cert = certify(problem, alpha, kkt_tol=kkt_tol, gradient=_qx(Qc, alpha) + problem.p)
    detail_text = f"cvxopt status {raw_status!r}" + (f": {detail}" if detail else "")
    status, message = settle(status, detail_text, cert.max_violation, cert.kkt_tol)
    if status != Status.CONVERGED:
        warnings.warn(f"qp solver: {message}", ConvergenceWarning, stacklevel=2)

    cols: dict[str, np.ndarray] = {"iteration": np.asarray(rec.rows["iteration"], dtype=np.int64)}
    for c in TRACE_COLUMNS:
        cols[c] = np.asarray(rec.rows[c], dtype=np.float64)
    for c in ("n_at_lower", "n_at_upper"):
        cols[c] = np.asarray(rec.rows[c], dtype=np.int32)
    order = np.argsort(np.asarray(rec.snap_iters, dtype=np.int64), kind="stable")
    snaps = np.asarray(rec.snaps, dtype=np.float64).reshape(len(rec.snaps), n)[order]
    snap_its = np.asarray(rec.snap_iters, dtype=np.int64)[order]
    final_is_answer = bool(snap_its.size and snap_its[-1] == iterations)
    if final_is_answer:
        # the last snapshot is the returned α (the final iterate moved onto its active
        # bounds), so a replay of the last iteration gives exactly the certificate's state;
        # the last trace row keeps cvxopt's own figures of the interior iterate
        snaps[-1] = alpha
    tr = Trace(
        solver="qp", level=trace, columns=cols,
        events={"iteration": np.zeros(0, np.int64), "kind": np.zeros(0, np.int8),
                "value": np.zeros(0, np.float64)},
        event_kinds={}, snapshot_iterations=snap_its,
        snapshots=snaps, sample_every=int(sample_every), snapshot_every=int(snapshot_every),
    )
    backend_stats = {}
    if sol is not None:
        for key in ("primal objective", "dual objective", "gap", "relative gap",
                    "primal infeasibility", "dual infeasibility", "primal slack", "dual slack"):
            v = sol.get(key)
            backend_stats[key.replace(" ", "_")] = None if v is None else float(v)
    options = {"interior_point_tol": float(interior_point_tol),
               "iteration_limit": int(iteration_limit), "size_limit": int(size_limit),
               "force": bool(force), "trace": trace, "kkt": kkt, "kkt_tol": float(kkt_tol),
               "sample_every": int(sample_every), "snapshot_every": int(snapshot_every),
               "time_limit": time_limit, "alpha0": a0 is not None,
               "callback": None if callback is None
               else getattr(callback, "__qualname__", "callback"),
               "cvxopt_options": dict(cvx_options)}
    import cvxopt

    extra = {
        "backend": f"cvxopt {cvxopt.__version__}",
        "backend_status": raw_status,
        "backend_stats": backend_stats,
        "equality_multiplier": float(np.array(sol["y"]).ravel()[0]) if sol is not None else None,
        "snap": snap,
        "factorisations": rec.n_factor,
        "trace_source": "iterate read from cvxopt frame" if rec.frame_ok
        else "cvxopt frame unavailable: start and final iterate only",
        "kernel_psd": problem.kernel.is_psd,
        "certificate_meets_tol": cert.meets_tol,
        "final_snapshot": "returned_alpha" if final_is_answer else "interior_iterate",
        # no compiled code; set-up is loading cvxopt and building the dense Q
        "compile_seconds": 0.0, "setup_seconds": t_iterate - started,
        "solve_seconds": solve_seconds,
    }
    if hasattr(rec, "start_stats"):
        extra["start"] = rec.start_stats
    return SolveResult(
        solver="qp", status=status, message=message, alpha=alpha, bias=float(cert.bias),
        iterations=iterations, certificate=cert, seconds=time.perf_counter() - started,
        options=options, trace=tr, extra=extra,
    )
