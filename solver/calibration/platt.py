"""Platt scaling: P(positive | f) = 1 / (1 + exp(A f + B)), fitted by Newton's method.

The fit follows Lin, Lin & Weng (2007), *A note on Platt's probabilistic outputs for
support vector machines*, Machine Learning 68: regularised targets, a numerically stable
objective, Newton steps with a slightly regularised Hessian and a backtracking line
search, and their stopping rule.  The decision values given must be out-of-fold values
(see :mod:`solver.calibration.crossval`), never the final model's training values.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InvalidInputError

__all__ = ["FitStatus", "FIT_MESSAGES", "SigmoidFit", "fit_sigmoid", "sigmoid_probability"]

#: Lin, Lin & Weng (2007), algorithm in their appendix: iteration limit, smallest step,
#: Hessian regulariser σ, gradient tolerance and the Armijo constant.
ITERATION_LIMIT = 100
MIN_STEP = 1e-10
HESSIAN_SIGMA = 1e-12
GRADIENT_TOL = 1e-5
ARMIJO = 1e-4


class FitStatus(enum.IntEnum):
    """Outcome of a sigmoid fit.  Only ``FITTED`` gives usable probabilities."""

    FITTED = 0
    DEGENERATE_VALUES = 1
    NOT_INCREASING = 2
    ITERATION_LIMIT = 3
    LINE_SEARCH_FAILED = 4
    FOLD_NOT_CONVERGED = 5

    @property
    def label(self) -> str:
        """Lower-case name used in attachments, JSON and the CLI."""
        return self.name.lower()

    @classmethod
    def from_label(cls, label: str) -> FitStatus:
        """Inverse of :attr:`label`; ``ValueError`` for an unknown label."""
        try:
            return cls[str(label).upper()]
        except KeyError:
            raise ValueError(f"unknown sigmoid fit status {label!r}") from None


FIT_MESSAGES: dict[FitStatus, str] = {
    FitStatus.FITTED: "sigmoid fitted: both gradient components below the tolerance",
    FitStatus.DEGENERATE_VALUES: "fit failed: the cross-validated decision values do not "
    "separate the classes at all (all on one side of 0, or all equal)",
    FitStatus.NOT_INCREASING: "fit failed: the fitted sigmoid does not increase with the "
    "decision value (A >= 0)",
    FitStatus.ITERATION_LIMIT: "fit failed: Newton's method stopped at its iteration limit",
    FitStatus.LINE_SEARCH_FAILED: "fit failed: the line search found no decrease above the "
    "smallest step",
    FitStatus.FOLD_NOT_CONVERGED: "fit not attempted: a cross-validation fit stopped before "
    "its optimality test was met",
}


@dataclass(frozen=True)
class SigmoidFit:
    """Result of :func:`fit_sigmoid`.

    A, B : parameters of P = 1 / (1 + exp(A f + B)) (NaN when the fit failed).
    status, message : outcome (:class:`FitStatus`) and its text with detail.
    newton_steps : Newton iterations taken.  gradient_norm : max |∂F/∂A|, |∂F/∂B| at
    the end.  objective : the regularised negative log-likelihood F(A, B) there.
    n_positive, n_negative : class counts.  target_positive, target_negative : the
    regularised targets (N₊+1)/(N₊+2) and 1/(N₋+2).
    """

    A: float
    B: float
    status: FitStatus
    message: str
    newton_steps: int
    gradient_norm: float
    objective: float
    n_positive: int
    n_negative: int
    target_positive: float
    target_negative: float

    @property
    def success(self) -> bool:
        """True only when the fit may be used for probabilities."""
        return self.status == FitStatus.FITTED

    def to_dict(self) -> dict[str, object]:
        """Plain data (status as its label)."""
        return {"A": self.A, "B": self.B, "status": self.status.label, "message": self.message,
                "newton_steps": self.newton_steps, "gradient_norm": self.gradient_norm,
                "objective": self.objective, "n_positive": self.n_positive,
                "n_negative": self.n_negative, "target_positive": self.target_positive,
                "target_negative": self.target_negative}


def _objective(values: np.ndarray, t: np.ndarray, A: float, B: float) -> float:
    """F(A, B) = Σ t z + log(1 + e^{−z}) (z ≥ 0), else (t − 1) z + log(1 + e^{z}); z = A f + B.

    Both branches equal −t log p − (1 − t) log(1 − p) with p = 1 / (1 + e^{z}); the split
    keeps every exponential ≤ 1 (Lin, Lin & Weng 2007, section 3)."""
    z = A * values + B
    pos = z >= 0
    out = np.where(pos, t * z + np.log1p(np.exp(-np.abs(z))),
                   (t - 1.0) * z + np.log1p(np.exp(-np.abs(z))))
    return float(np.sum(out))


def sigmoid_probability(values: np.ndarray, A: float, B: float) -> np.ndarray:
    """P(positive | f) = 1 / (1 + exp(A f + B)) for decision values ``values`` (any shape).

    Evaluated as e^{−z} / (1 + e^{−z}) for z ≥ 0 and 1 / (1 + e^{z}) otherwise, so no
    exponential overflows."""
    z = A * np.asarray(values, dtype=np.float64) + B
    e = np.exp(-np.abs(z))
    return np.where(z >= 0, e / (1.0 + e), 1.0 / (1.0 + e))


def _failed(status: FitStatus, detail: str, n_pos: int, n_neg: int, t_pos: float, t_neg: float,
            steps: int = 0, grad: float = math.nan, obj: float = math.nan,
            A: float = math.nan, B: float = math.nan) -> SigmoidFit:
    msg = FIT_MESSAGES[status] + (f" ({detail})" if detail else "")
    return SigmoidFit(A=A, B=B, status=status, message=msg, newton_steps=steps,
                      gradient_norm=grad, objective=obj, n_positive=n_pos, n_negative=n_neg,
                      target_positive=t_pos, target_negative=t_neg)


def fit_sigmoid(values: np.ndarray, positive: np.ndarray) -> SigmoidFit:
    """Fit Platt's sigmoid to decision values ``values`` (n,) and class flags ``positive`` (n,).

    Notes
    -----
    Minimises F(A, B) = −Σᵢ [tᵢ log pᵢ + (1 − tᵢ) log(1 − pᵢ)], pᵢ = 1 / (1 + exp(A fᵢ + B)),
    with tᵢ = (N₊+1)/(N₊+2) for positive rows and 1/(N₋+2) for negative rows.  Start
    A = 0, B = log((N₋+1)/(N₊+1)); Newton direction from the Hessian plus σ = 1e−12 on its
    diagonal; step halved from 1 until F decreases by at least 1e−4 × step × (gᵀd),
    smallest step 1e−10; at most 100 iterations; stop when |∂F/∂A| and |∂F/∂B| are both
    below 1e−5.

    A fit is reported as failed, never returned with made-up parameters, when all values
    lie on one side of 0 or are all equal (degenerate), when A ≥ 0 (the probability would
    not increase with f), or when Newton's method hits its limits.

    References
    ----------
    J. C. Platt (1999). Probabilistic outputs for support vector machines and comparisons
    to regularized likelihood methods. In *Advances in Large Margin Classifiers*, MIT Press.
    H.-T. Lin, C.-J. Lin, R. C. Weng (2007). A note on Platt's probabilistic outputs for
    support vector machines. *Machine Learning* 68, 267–276.

    Examples
    --------
    >>> fit = fit_sigmoid(np.array([-2.0, -1.0, 1.0, 2.0]), np.array([0, 0, 1, 1], bool))
    >>> fit.success, fit.A < 0
    (True, True)
    """
    f = np.asarray(values, dtype=np.float64).reshape(-1)
    pos = np.asarray(positive).reshape(-1)
    if pos.dtype != bool:
        raise InvalidInputError("class flags for the sigmoid fit must be booleans")
    if f.shape != pos.shape:
        raise InvalidInputError(
            f"{f.size} decision values but {pos.size} class flags for the sigmoid fit")
    if not np.all(np.isfinite(f)):
        bad = int(np.flatnonzero(~np.isfinite(f))[0])
        raise InvalidInputError(f"decision value at row index {bad} (0-based) is not finite")
    n_pos, n_neg = int(np.sum(pos)), int(np.sum(~pos))
    if n_pos == 0 or n_neg == 0:
        raise InvalidInputError(
            f"the sigmoid fit needs rows of both classes, got {n_pos} positive and "
            f"{n_neg} negative")
    t_pos, t_neg = (n_pos + 1.0) / (n_pos + 2.0), 1.0 / (n_neg + 2.0)
    if np.all(f >= 0) or np.all(f <= 0) or np.all(f == f[0]):
        side = ("all equal" if np.all(f == f[0]) else
                "all >= 0" if np.all(f >= 0) else "all <= 0")
        return _failed(FitStatus.DEGENERATE_VALUES, f"{f.size} values {side}", n_pos, n_neg,
                       t_pos, t_neg)
    t = np.where(pos, t_pos, t_neg)
    A, B = 0.0, math.log((n_neg + 1.0) / (n_pos + 1.0))
    fval = _objective(f, t, A, B)
    steps = 0
    grad = math.inf
    status: FitStatus | None = None
    while True:
        z = A * f + B
        e = np.exp(-np.abs(z))
        p = np.where(z >= 0, e / (1.0 + e), 1.0 / (1.0 + e))  # P(positive)
        q = np.where(z >= 0, 1.0 / (1.0 + e), e / (1.0 + e))  # P(negative), no cancellation
        d2 = p * q
        h11 = HESSIAN_SIGMA + float(np.sum(f * f * d2))
        h22 = HESSIAN_SIGMA + float(np.sum(d2))
        h21 = float(np.sum(f * d2))
        d1 = t - p
        g1, g2 = float(np.sum(f * d1)), float(np.sum(d1))
        grad = max(abs(g1), abs(g2))
        if abs(g1) < GRADIENT_TOL and abs(g2) < GRADIENT_TOL:
            status = FitStatus.FITTED
            break
        if steps >= ITERATION_LIMIT:
            status = FitStatus.ITERATION_LIMIT
            break
        det = h11 * h22 - h21 * h21
        dA = -(h22 * g1 - h21 * g2) / det
        dB = -(-h21 * g1 + h11 * g2) / det
        gd = g1 * dA + g2 * dB
        step = 1.0
        while step >= MIN_STEP:
            nA, nB = A + step * dA, B + step * dB
            nf = _objective(f, t, nA, nB)
            if nf < fval + ARMIJO * step * gd:
                A, B, fval = nA, nB, nf
                break
            step /= 2.0
        steps += 1
        if step < MIN_STEP:
            status = FitStatus.LINE_SEARCH_FAILED
            break
    if status != FitStatus.FITTED:
        return _failed(status, f"after {steps} Newton steps, gradient {grad:.3g}", n_pos,
                       n_neg, t_pos, t_neg, steps, grad, fval)
    if not A < 0:
        return _failed(FitStatus.NOT_INCREASING, f"A = {A:.6g}", n_pos, n_neg, t_pos, t_neg,
                       steps, grad, fval, A, B)
    return SigmoidFit(A=float(A), B=float(B), status=status, message=FIT_MESSAGES[status],
                      newton_steps=steps, gradient_norm=grad, objective=fval,
                      n_positive=n_pos, n_negative=n_neg, target_positive=t_pos,
                      target_negative=t_neg)
