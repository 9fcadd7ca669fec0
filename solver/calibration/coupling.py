"""Pairwise coupling: class probabilities from pairwise probabilities (Wu, Lin & Weng 2004).

Given r_ij ≈ P(y = i | y ∈ {i, j}, x) for every pair i ≠ j (r_ji = 1 − r_ij), method 2 of
Wu, Lin & Weng (2004) finds p on the simplex minimising

    Σ_i Σ_{j≠i} (r_ji p_i − r_ij p_j)²   subject to  Σ_i p_i = 1.

With Q_ii = Σ_{s≠i} r_si² and Q_ij = −r_ji r_ij (i ≠ j) the objective is 2 pᵀQp, and the
optimum solves the linear system [[Q, e], [eᵀ, 0]] [p; b] = [0; 1] (their equation (21)).
The paper shows the solution is non-negative when every r_ij lies in (0, 1); it is
unique because Q is positive semi-definite with a one-dimensional null space at most
when some r_ij are 0 or 1, which pairwise Platt probabilities never are.
"""

from __future__ import annotations

import numpy as np

from ..errors import InvalidInputError

__all__ = ["coupling_matrix", "couple_pairwise", "couple_pairwise_rows"]


def _check(R: np.ndarray) -> np.ndarray:
    R = np.asarray(R, dtype=np.float64)
    if R.ndim != 2 or R.shape[0] != R.shape[1] or R.shape[0] < 2:
        raise InvalidInputError(f"pairwise probabilities must be a k × k matrix, k ≥ 2; "
                                f"got shape {R.shape}")
    k = R.shape[0]
    off = ~np.eye(k, dtype=bool)
    if not np.all(np.isfinite(R[off])) or np.any(R[off] <= 0) or np.any(R[off] >= 1):
        raise InvalidInputError("pairwise probabilities must lie strictly between 0 and 1")
    if np.max(np.abs((R + R.T)[off] - 1.0)) > 1e-12:
        raise InvalidInputError("pairwise probabilities must satisfy r_ij + r_ji = 1")
    return R


def coupling_matrix(R: np.ndarray) -> np.ndarray:
    """Q of method 2: Q_ii = Σ_{s≠i} r_si², Q_ij = −r_ji r_ij; ``R`` (k, k), diagonal ignored."""
    R = np.asarray(R, dtype=np.float64)
    k = R.shape[0]
    off = ~np.eye(k, dtype=bool)
    Rz = np.where(off, R, 0.0)
    Q = -(Rz.T * Rz)
    Q[np.diag_indices(k)] = np.sum(Rz * Rz, axis=0)
    return Q


def couple_pairwise(R: np.ndarray) -> np.ndarray:
    """Class probabilities (k,) from pairwise probabilities ``R`` (k, k), ``R[i, j]`` = r_ij.

    Solves [[Q, e], [eᵀ, 0]] [p; b] = [0; 1] directly; the result sums to 1 up to
    rounding and is clipped at 0 from below only against rounding (never by more than
    1e−12 in the tests).

    References
    ----------
    T.-F. Wu, C.-J. Lin, R. C. Weng (2004). Probability estimates for multi-class
    classification by pairwise coupling. *Journal of Machine Learning Research* 5,
    975–1005, section 4.2 (method 2).

    Examples
    --------
    >>> R = np.array([[0.0, 0.5, 0.5], [0.5, 0.0, 0.5], [0.5, 0.5, 0.0]])
    >>> couple_pairwise(R).round(12).tolist()
    [0.333333333333, 0.333333333333, 0.333333333333]
    """
    R = _check(R)
    k = R.shape[0]
    M = np.zeros((k + 1, k + 1))
    M[:k, :k] = coupling_matrix(R)
    M[:k, k] = 1.0
    M[k, :k] = 1.0
    rhs = np.zeros(k + 1)
    rhs[k] = 1.0
    p = np.linalg.solve(M, rhs)[:k]
    p = np.maximum(p, 0.0)
    return p / np.sum(p)


def couple_pairwise_rows(pairs: np.ndarray, k: int) -> np.ndarray:
    """Class probabilities (m, k) for m rows of pairwise probabilities.

    ``pairs`` (m, k(k−1)/2) holds r_ij for the pairs (0,1), (0,2), …, (0,k−1), (1,2), …
    in that order (P(class i | class i or j))."""
    P = np.asarray(pairs, dtype=np.float64)
    n_pairs = k * (k - 1) // 2
    if P.ndim != 2 or P.shape[1] != n_pairs:
        raise InvalidInputError(f"expected {n_pairs} pairwise columns for {k} classes, "
                                f"got shape {P.shape}")
    iu = np.triu_indices(k, 1)
    out = np.empty((P.shape[0], k))
    R = np.zeros((k, k))
    for r in range(P.shape[0]):
        R[iu] = P[r]
        R[iu[1], iu[0]] = 1.0 - P[r]
        out[r] = couple_pairwise(R)
    return out
