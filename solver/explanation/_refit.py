"""Refitting a solved problem without one training row (the engine behind leave-one-out).

Removal drops the row, giving a problem with n − 1 variables (an upper bound of 0 instead
would keep a variable with lᵢ = uᵢ that the certificate's index sets I_up / I_low still
count as movable).  Two refits are offered:

* :meth:`Refitter.cold` — the whole dropped problem from the solver's default start
  (brute force).
* :meth:`Refitter.warm` — warm start from the full solution: the decremental path of
  :mod:`solver.explanation._decrement` (the multiplier lowered to 0 while the free support
  vectors stay on the margin, sets updated at each event), or, if that path gives up, the
  single step of :func:`removal_start` with yᵀα = Δ restored within the bounds.  When
  that start already meets the solver's stopping test
  on the whole dropped problem (no point changed status) it is the answer, with no solver
  call.  Otherwise the solver runs from it on a working set: the remaining support
  vectors, every point whose training margin is below 1 + :data:`WORKING_MARGIN`, every
  point the warm start made non-zero and every point whose KKT condition it violates.
  Points outside it keep α = 0.  The answer is certified on the *whole* dropped problem
  with :func:`solver.certificate.certify` (maximal violation ≤ kkt_tol, the solver's own
  stopping test); points outside the working set that violate their KKT condition are
  added and the refit continues from where it stopped — the same idea as shrinking in
  decomposition methods (common practice), so the result is a converged
  solution of the dropped problem.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..certificate import certify
from ..errors import InvalidInputError
from ..kernels import KERNELS, PrecomputedKernel
from ..problem import DualProblem
from ..status import Status
from ._decrement import decremental_path

__all__ = ["WORKING_MARGIN", "Refit", "Refitter", "drop_row", "removal_start"]

#: Non-support vectors with training margin below 1 + this enter a warm refit's working set.
WORKING_MARGIN = 0.5
#: Working-set enlargements before a warm refit falls back to the whole dropped problem.
MAX_ROUNDS = 4
_BLOCK = 2048


@dataclass(frozen=True, eq=False)
class Refit:
    """Outcome of one refit: ``alpha`` (n − 1,) over ``keep`` (the kept row numbers),
    ``bias``, ``change`` (n,) Σⱼ(α'ⱼ − αⱼ)yⱼK(xⱼ, ·) on every training row (so the refit's
    f = full f + change + bias' − bias), ``status`` label, ``iterations`` summed over rounds,
    ``rounds`` solver calls (0: the decremental start was already converged), ``working_set``
    size of the last working set, ``max_violation`` on the dropped problem, ``path_events``
    set changes along the decremental path (−1: not used or gave up)."""

    keep: np.ndarray
    alpha: np.ndarray
    bias: float
    change: np.ndarray
    status: str
    iterations: int
    rounds: int
    working_set: int
    max_violation: float
    path_events: int = -1


def _rebalance(a: np.ndarray, y: np.ndarray, lo: np.ndarray, up: np.ndarray, need: float,
               order: np.ndarray) -> np.ndarray:
    """Change ``a`` in place so that yᵀa grows by ``need``: raise points with y = sign(need),
    then lower the others, each group in ``order``, within [lo, up]."""
    sign = 1.0 if need > 0 else -1.0
    scale = max(1.0, abs(need))
    # raising a point with y = sign, or lowering one with y = −sign, adds sign·step to yᵀa
    for same in (True, False):
        if abs(need) <= 1e-12 * scale:
            break
        cand = order[(y[order] == sign) == same]
        room = (up[cand] - a[cand]) if same else (a[cand] - lo[cand])
        take = np.minimum(room, np.maximum(abs(need) - (np.cumsum(room) - room), 0.0))
        a[cand] += take if same else -take
        need -= sign * float(take.sum())
    if abs(need) > 1e-12 * scale:
        raise InvalidInputError("the bounds of the remaining points cannot satisfy yᵀα = Δ")
    return np.clip(a, lo, up, out=a)


def removal_start(
    problem: DualProblem, alpha: np.ndarray, i: int, krow: np.ndarray | None = None,
    gram: np.ndarray | None = None,
) -> np.ndarray:
    """Feasible warm start (n − 1,) for the problem without row ``i``.

    Decremental step (Cauwenberghs & Poggio 2001, from memory): with αᵢ removed, the free
    support vectors S keep their margins (yₛf(xₛ) = 1) and yᵀα = Δ holds to first order when
    (Δb, Δα_S) solves  [0 y_Sᵀ; y_S Q_SS] [Δb; Δα_S] = [yᵢαᵢ; Q_Si αᵢ]  (least squares if
    singular); the new multipliers are clipped to their bounds.  The remaining gap in yᵀα = Δ
    goes to same-class points in order of decreasing K(xᵢ, xⱼ) within their bounds, then is
    taken from other-class points in the same order.  ``krow`` (n,) may supply K(xᵢ, ·) and
    ``gram`` (n, n) the whole Gram matrix.
    """
    n = problem.n
    keep = np.delete(np.arange(n), i)
    y, lo, up = problem.y, problem.lower, problem.upper
    a = np.asarray(alpha, dtype=np.float64).copy()
    ai = float(a[i] - lo[i])
    a[i] = lo[i]
    width = np.maximum(up - lo, 0.0)
    free = (a > lo + 1e-8 * width) & (a < up - 1e-8 * width)
    free[i] = False
    S = np.flatnonzero(free)
    if S.size and ai != 0.0:
        K_SS = gram[np.ix_(S, S)] if gram is not None else problem.kernel_block(S, S)
        K_Si = gram[S, i] if gram is not None else problem.kernel_block(S, np.array([i]))[:, 0]
        A = np.empty((S.size + 1, S.size + 1))
        A[0, 0] = 0.0
        A[0, 1:] = A[1:, 0] = y[S]
        A[1:, 1:] = K_SS * np.outer(y[S], y[S])
        rhs = np.concatenate([[y[i] * ai], y[S] * y[i] * K_Si * ai])
        try:
            step = np.linalg.solve(A, rhs)[1:]
        except np.linalg.LinAlgError:  # e.g. duplicated free points
            step = np.linalg.lstsq(A, rhs, rcond=None)[0][1:]
        if np.all(np.isfinite(step)):
            a[S] = np.clip(a[S] + step, lo[S], up[S])
    a = a[keep]
    need = problem.delta - float(y[keep] @ a)
    if need == 0.0:
        return a
    if krow is None:
        krow = gram[i] if gram is not None else problem.kernel_block(np.array([i]),
                                                                     slice(None))[0]
    order = np.argsort(-np.asarray(krow, dtype=np.float64)[keep], kind="stable")
    try:
        return _rebalance(a, y[keep], lo[keep], up[keep], need, order)
    except InvalidInputError:
        raise InvalidInputError(
            f"cannot restore feasibility after removing row {i}: the bounds of the remaining "
            "points cannot satisfy yᵀα = Δ") from None


class Refitter:
    """Refits of ``problem`` without one row, around the full solution ``alpha``, ``bias``.

    With ``shared_gram`` the n × n Gram matrix is computed once; the decremental path, the
    changes of f and the gradients then read it, and warm refits with a kernel the solver
    does not evaluate itself (callable, precomputed) get it as a precomputed kernel over
    row numbers (the same values).  Cold refits always hand the solver the problem without
    the row and its own kernel, as a user would.
    """

    def __init__(self, problem: DualProblem, solve: Callable[..., Any],
                 options: Mapping[str, Any], *, alpha: np.ndarray, bias: float,
                 shared_gram: bool) -> None:
        self.problem = problem
        self.solve = solve
        self.options = dict(options)
        self.kkt_tol = float(self.options["kkt_tol"])
        self.gram: np.ndarray | None = None
        self.shared: PrecomputedKernel | None = None
        n = problem.n
        if shared_gram:
            G = np.empty((n, n))
            for s in range(0, n, _BLOCK):
                e = min(n, s + _BLOCK)
                G[s:e] = problem.kernel_block(slice(s, e), slice(None))
            self.shared = PrecomputedKernel(gram_matrix=G)  # one object for every refit
            self.gram = self.shared.gram_matrix
        self.alpha = np.asarray(alpha, dtype=np.float64)
        self.bias = float(bias)
        #: Σⱼ αⱼyⱼK(xⱼ, xᵢ) for every training row (f without the bias), (n,)
        if self.gram is not None:
            self.base = self.gram @ (self.alpha * problem.y)
        else:
            self.base = problem.q_times(self.alpha) * problem.y
        #: sᵢ = Gᵢ + b yᵢ, the KKT quantity of the full solution, (n,)
        self.s = problem.y * self.base + problem.p + self.bias * problem.y

    def rows(self, rows: np.ndarray) -> np.ndarray:
        """Kernel rows K(x_rows, ·) of the original problem, shape ``(len(rows), n)``."""
        if self.gram is None:
            return self.problem.kernel_block(rows, slice(None))
        return self.gram[rows]

    def _change(self, keep: np.ndarray, a_keep: np.ndarray, i: int) -> np.ndarray:
        """Σⱼ (α'ⱼ − αⱼ)yⱼK(xⱼ, ·) over all training rows (n,), for α' over ``keep`` and αᵢ' = 0."""
        y = self.problem.y
        d = (a_keep - self.alpha[keep]) * y[keep]
        moved = np.flatnonzero(d != 0.0)
        src = np.concatenate([keep[moved], [i]])
        coef = np.concatenate([d[moved], [-self.alpha[i] * y[i]]])
        out = np.zeros(self.problem.n)
        for s in range(0, src.size, _BLOCK):
            e = min(src.size, s + _BLOCK)
            out += coef[s:e] @ self.rows(src[s:e])  # K symmetric: rows serve as columns
        return out

    def _subproblem(self, rows: np.ndarray) -> DualProblem:
        """The problem restricted to original rows ``rows`` (sorted).  Registered kernels
        (evaluated by the solver itself) are kept; others read the shared Gram matrix."""
        P = self.problem
        if self.shared is None or type(P.kernel) in KERNELS.values():
            X, kern = P.X[rows], P.kernel
        else:  # row numbers into the shared Gram matrix
            X, kern = rows.astype(np.float64)[:, None], self.shared
        return DualProblem(X=X, y=P.y[rows], p=P.p[rows], lower=P.lower[rows],
                           upper=P.upper[rows], delta=P.delta, kernel=kern, kind=P.kind,
                           info=P.info)

    def cold(self, i: int) -> Refit:
        """Whole problem without row ``i`` (own kernel) from the solver's default start."""
        sub, keep = drop_row(self.problem, i)
        res = self.solve(sub, **self.options)
        a = np.asarray(res.alpha, np.float64)
        return Refit(keep=keep, alpha=a, bias=float(res.bias), change=self._change(keep, a, i),
                     status=res.status.label, iterations=int(res.iterations), rounds=1,
                     working_set=keep.size, max_violation=float(res.certificate.max_violation))

    def warm(self, i: int, margin: np.ndarray) -> Refit:
        """Problem without row ``i``, from the decremental warm start: returned at once when
        that start already meets the stopping test on the whole dropped problem, else
        refitted on a working set and certified on the whole dropped problem (module
        docstring).  ``margin`` (n,) are the full solution's yᵢf(xᵢ)."""
        P, alpha = self.problem, self.alpha
        keep = np.delete(np.arange(P.n), i)
        a = np.zeros(P.n)
        path = decremental_path(P, alpha, self.bias, self.s, i, self.rows, gram=self.gram)
        events = -1
        if path is not None:
            # complete: α_i is at 0 and yᵀα = Δ up to rounding; stopped early: α_i's rest
            # is removed and yᵀα = Δ restored as in removal_start
            a[keep], events = path[0][keep], path[2]
            need = P.delta - float(P.y[keep] @ a[keep])
            if abs(need) > 1e-13 * max(1.0, float(np.abs(a).sum())):
                order = np.argsort(-self.rows(np.array([i]))[0][keep], kind="stable")
                a[keep] = _rebalance(a[keep], P.y[keep], P.lower[keep], P.upper[keep], need,
                                     order)
        else:  # single decremental step, then feasibility restored
            a[keep] = removal_start(P, alpha, i, gram=self.gram)
        # the dropped problem, for the certificate only (its kernel is never evaluated)
        whole = DualProblem(X=P.X[keep], y=P.y[keep], p=P.p[keep], lower=P.lower[keep],
                            upper=P.upper[keep], delta=P.delta, kernel=P.kernel, kind=P.kind,
                            info=P.info)
        change = self._change(keep, a[keep], i)
        cert = certify(whole, a[keep], kkt_tol=self.kkt_tol,
                       gradient=(P.y * (self.base + change) + P.p)[keep])
        if cert.meets_tol:  # the decremental start alone is a converged solution
            return Refit(keep=keep, alpha=a[keep], bias=float(cert.bias), change=change,
                         status=Status.CONVERGED.label, iterations=0, rounds=0, working_set=0,
                         max_violation=float(cert.max_violation), path_events=events)
        inside = (alpha > P.lower) | (a > P.lower) | (margin < 1.0 + WORKING_MARGIN)
        inside[i] = False
        inside[keep[(cert.kkt_residual > 0.5 * cert.kkt_tol)]] = True
        iterations, rounds, fallback = 0, 0, False
        while True:
            rounds += 1
            if fallback or rounds > MAX_ROUNDS:  # the whole dropped problem
                inside[keep] = True
            rows = np.flatnonzero(inside)
            res = self.solve(self._subproblem(rows), alpha0=a[rows], **self.options)
            iterations += int(res.iterations)
            a[rows] = res.alpha
            change = self._change(keep, a[keep], i)
            if res.status != Status.CONVERGED or rows.size == keep.size:
                # not converged, or solved on the whole dropped problem: the solver's own
                # certificate is the certificate of the dropped problem
                status, bias = res.status.label, float(res.bias)
                viol = float(res.certificate.max_violation)
                break
            cert = certify(whole, a[keep], kkt_tol=self.kkt_tol,
                           gradient=(P.y * (self.base + change) + P.p)[keep])
            viol, bias = float(cert.max_violation), float(cert.bias)
            if cert.meets_tol:
                status = Status.CONVERGED.label
                break
            # outside points whose KKT condition fails join the working set
            bad = keep[(cert.kkt_residual > 0.5 * cert.kkt_tol) & ~inside[keep]]
            inside[bad] = True
            fallback = bad.size == 0
        return Refit(keep=keep, alpha=a[keep], bias=bias, change=change, status=status,
                     iterations=iterations, rounds=rounds, working_set=int(inside.sum()),
                     max_violation=viol, path_events=events)


def drop_row(problem: DualProblem, i: int) -> tuple[DualProblem, np.ndarray]:
    """The problem without training row ``i`` (same kernel) and the kept row numbers (n − 1,)."""
    if not 0 <= int(i) < problem.n:
        raise InvalidInputError(f"row {i} is not a training row (0 … {problem.n - 1})")
    keep = np.delete(np.arange(problem.n), int(i))
    P = problem
    sub = DualProblem(X=P.X[keep], y=P.y[keep], p=P.p[keep], lower=P.lower[keep],
                      upper=P.upper[keep], delta=P.delta, kernel=P.kernel, kind=P.kind,
                      info={**P.info, "left_out_row": int(i)})
    return sub, keep
