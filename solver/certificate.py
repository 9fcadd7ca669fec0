"""Convergence certificate: one implementation used for every solver's answer.

Given a feasible α and its gradient G = Qα + p (see :mod:`solver.problem`):

* maximal violation  m(α) − M(α)  with  m = max_{i∈I_up} −yᵢGᵢ,  M = min_{i∈I_low} −yᵢGᵢ,
  I_up = {αᵢ<uᵢ, yᵢ=+1} ∪ {αᵢ>lᵢ, yᵢ=−1},  I_low = {αᵢ<uᵢ, yᵢ=−1} ∪ {αᵢ>lᵢ, yᵢ=+1}
  (Keerthi et al. 2001; Fan, Chen & Lin 2005, eqs. 5–9);
* bias b: mean of −yᵢGᵢ over free points, or the midpoint (m + M)/2 when none is free;
* per-point KKT residual for that b (units of the gradient);
* dual objective D = ½αᵀQα + pᵀα, primal objective
  P = ½αᵀQα + Σᵢ uᵢ·max(0, −(Gᵢ + b yᵢ)) + Δ·b  (for l = 0; the hinge term is the slack),
  and duality gap P + D ≥ 0, which bounds the suboptimality of both.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .problem import DualProblem

__all__ = ["Certificate", "certify", "DEFAULT_BOUND_TOL"]

#: α within this fraction of (u − l) of a bound counts as at the bound.
DEFAULT_BOUND_TOL = 1e-8


@dataclass(frozen=True, eq=False)
class Certificate:
    """Optimality evidence for one α.  Objectives in the units of the dual objective."""

    kkt_tol: float
    max_violation: float
    m_up: float
    M_low: float
    bias: float
    bias_from: str
    dual_objective: float
    primal_objective: float
    duality_gap: float
    relative_gap: float
    bound_violation: float
    equality_residual: float
    n_free: int
    n_bounded: int
    n_zero: int
    bound_tol: float
    kkt_residual: np.ndarray
    at_lower: np.ndarray
    at_upper: np.ndarray

    @property
    def n_support(self) -> int:
        """Number of support vectors (α above its lower bound)."""
        return self.n_free + self.n_bounded

    @property
    def meets_tol(self) -> bool:
        """True when the maximal violation is within ``kkt_tol``.

        Feasibility is not part of this test; read :attr:`bound_violation` and
        :attr:`equality_residual` for it.
        """
        return bool(self.max_violation <= self.kkt_tol)

    def to_dict(self) -> dict[str, Any]:
        """Scalars only, as plain data for manifests and JSON."""
        return {
            "kkt_tol": self.kkt_tol,
            "max_violation": self.max_violation,
            "m_up": self.m_up,
            "M_low": self.M_low,
            "meets_tol": self.meets_tol,
            "bias": self.bias,
            "bias_from": self.bias_from,
            "dual_objective": self.dual_objective,
            "primal_objective": self.primal_objective,
            "duality_gap": self.duality_gap,
            "relative_gap": self.relative_gap,
            "bound_violation": self.bound_violation,
            "equality_residual": self.equality_residual,
            "n_support": self.n_support,
            "n_free": self.n_free,
            "n_bounded": self.n_bounded,
            "n_zero": self.n_zero,
            "bound_tol": self.bound_tol,
            "max_kkt_residual": float(np.max(self.kkt_residual)) if self.kkt_residual.size else 0.0,
        }


def certify(
    problem: DualProblem,
    alpha: np.ndarray,
    *,
    kkt_tol: float = 1e-3,
    gradient: np.ndarray | None = None,
    bound_tol: float = DEFAULT_BOUND_TOL,
) -> Certificate:
    """Certificate for ``alpha`` (n,) on ``problem``.

    ``gradient`` (n,) may be supplied by a solver that maintains it; otherwise it is
    recomputed from kernel blocks (O(n²d) work, O(n·2048) memory).
    """
    alpha = np.asarray(alpha, dtype=np.float64)
    if alpha.shape != (problem.n,):
        raise InvalidInputError(f"alpha must have shape ({problem.n},), got {alpha.shape}")
    G = problem.gradient(alpha) if gradient is None else np.asarray(gradient, dtype=np.float64)
    if G.shape != (problem.n,):
        raise InvalidInputError(f"gradient must have shape ({problem.n},), got {G.shape}")
    y, lo, up = problem.y, problem.lower, problem.upper
    width = np.maximum(up - lo, 0.0)
    at_lower = alpha <= lo + bound_tol * width
    at_upper = (alpha >= up - bound_tol * width) & ~at_lower
    free = ~(at_lower | at_upper)
    minus_yg = -y * G
    pos = y > 0
    movable = width > 0.0  # a variable with l = u (e.g. a left-out point) cannot move
    in_up = ((~at_upper & pos) | (~at_lower & ~pos)) & movable
    in_low = ((~at_upper & ~pos) | (~at_lower & pos)) & movable
    m_up = float(np.max(minus_yg[in_up])) if np.any(in_up) else -np.inf
    M_low = float(np.min(minus_yg[in_low])) if np.any(in_low) else np.inf
    if np.isfinite(m_up) and np.isfinite(M_low):
        max_violation = max(0.0, m_up - M_low)
    else:
        max_violation = 0.0
    if np.any(free):
        bias, bias_from = float(np.mean(minus_yg[free])), "free_support_vectors"
    else:
        ends = [v for v in (m_up, M_low) if np.isfinite(v)]
        bias, bias_from = (float(np.mean(ends)) if ends else 0.0), "interval_midpoint"
    s = G + bias * y
    resid = np.where(
        at_lower, np.maximum(0.0, -s), np.where(at_upper, np.maximum(0.0, s), np.abs(s))
    )
    resid[~movable] = 0.0
    quad = float(alpha @ (G - problem.p))  # αᵀQα
    dual = 0.5 * quad + float(problem.p @ alpha)
    if np.all(lo == 0.0):
        primal = 0.5 * quad + float(up @ np.maximum(0.0, -s)) + problem.delta * bias
    else:
        primal = float("nan")
    gap = primal + dual
    scale = max(abs(primal), abs(dual), np.finfo(float).tiny)
    bound_violation, eq_resid = problem.feasibility(alpha)
    return Certificate(
        kkt_tol=float(kkt_tol), max_violation=float(max_violation), m_up=m_up, M_low=M_low,
        bias=bias, bias_from=bias_from, dual_objective=dual, primal_objective=primal,
        duality_gap=gap, relative_gap=gap / scale, bound_violation=bound_violation,
        equality_residual=eq_resid, n_free=int(free.sum()), n_bounded=int(at_upper.sum()),
        n_zero=int(at_lower.sum()), bound_tol=float(bound_tol), kkt_residual=resid,
        at_lower=at_lower, at_upper=at_upper,
    )
