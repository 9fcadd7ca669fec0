"""The trained model: support vectors, coefficients, bias, kernel, standardiser, labels."""

from __future__ import annotations

from collections.abc import Hashable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .kernels import Kernel
from .problem import DualProblem
from .result import SolveResult

__all__ = ["Standardiser", "Model", "model_from_solution"]


@dataclass(frozen=True, eq=False)
class Standardiser:
    """x ↦ (x − centre) / scale per feature; ``scale`` is 1 for constant features."""

    centre: np.ndarray
    scale: np.ndarray

    @classmethod
    def fit(cls, X: np.ndarray) -> Standardiser:
        """Fit to the columns of ``X`` (n, d): mean and population standard deviation."""
        X = np.asarray(X, dtype=np.float64)
        with np.errstate(over="ignore", invalid="ignore"):
            centre, sd = X.mean(axis=0), X.std(axis=0)
        bad = np.flatnonzero(~(np.isfinite(centre) & np.isfinite(sd)))
        if bad.size:  # dividing by an infinite scale would zero the column
            raise InvalidInputError(
                f"feature column {int(bad[0]) + 1} (1-based): its mean or standard deviation "
                "overflows 64-bit floating point; rescale the column before standardising")
        return cls(centre=centre, scale=np.where(sd > 0, sd, 1.0))

    @classmethod
    def identity(cls, d: int) -> Standardiser:
        """A standardiser that changes nothing (used when standardising is switched off)."""
        return cls(centre=np.zeros(d), scale=np.ones(d))

    def transform(self, X: np.ndarray) -> np.ndarray:
        """Standardised copy of ``X`` (m, d)."""
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != self.centre.shape[0]:
            raise InvalidInputError(
                f"expected {self.centre.shape[0]} feature columns, got shape {X.shape}"
            )
        return (X - self.centre) / self.scale

    def to_dict(self) -> dict[str, Any]:
        """Plain data (lists of floats)."""
        return {"centre": self.centre.tolist(), "scale": self.scale.tolist()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Standardiser:
        """Inverse of :meth:`to_dict`, with type checks."""
        try:
            c = np.asarray(d["centre"], dtype=np.float64)
            s = np.asarray(d["scale"], dtype=np.float64)
        except (KeyError, TypeError, ValueError) as exc:
            raise InvalidInputError(f"standardiser record is malformed: {exc}") from None
        if c.ndim != 1 or c.shape != s.shape or not np.all(s > 0):
            raise InvalidInputError(
                "standardiser record is malformed: centre/scale shapes or scale <= 0"
            )
        return cls(centre=c, scale=s)


@dataclass(frozen=True, eq=False)
class Model:
    """f(x) = Σ_s coef_s K(sv_s, standardise(x)) + bias.

    Classification: label = positive where f(x) > 0.  ε-regression: f(x) is the prediction.
    One-class: f(x) is the signed score, inlier where f(x) ≥ 0 (``labels`` is None for both).
    ``support_rows`` (k,) are training (data) row numbers of the support vectors,
    ``support_points`` (k, d) their standardised features, ``coefficients`` (k,) the sum of
    αᵢyᵢ over the variables reading that row (αᵢyᵢ for classification, α⁺ᵢ − α⁻ᵢ for
    ε-regression, αᵢ for one-class).
    """

    support_rows: np.ndarray
    support_points: np.ndarray
    coefficients: np.ndarray
    bias: float
    kernel: Kernel
    standardiser: Standardiser
    labels: tuple[Hashable, Hashable] | None

    def values(
        self, X: np.ndarray, *, standardised: bool = False, block_rows: int = 4096
    ) -> np.ndarray:
        """Decision values f(x) for rows of ``X`` (m, d) in raw units (unless ``standardised``)."""
        from ._products import compiled_values, use_compiled

        Z = np.asarray(X, dtype=np.float64) if standardised else self.standardiser.transform(X)
        if use_compiled(Z.shape[0], self.support_points.shape[0]):
            fast = compiled_values(self.kernel, Z, self.support_points, self.coefficients)
            if fast is not None:
                return fast + self.bias
        out = np.empty(Z.shape[0])
        for s in range(0, Z.shape[0], block_rows):
            e = min(Z.shape[0], s + block_rows)
            out[s:e] = self.kernel.block(Z[s:e], self.support_points) @ self.coefficients
        out += self.bias
        return out

    def classify(self, X: np.ndarray, *, standardised: bool = False) -> np.ndarray:
        """Label values for rows of ``X``: positive label where f(x) > 0, else negative."""
        return self.classify_values(self.values(X, standardised=standardised))

    def classify_values(self, f: np.ndarray) -> np.ndarray:
        """Label values for decision values ``f``: positive where f > 0, else negative."""
        if self.labels is None:
            raise InvalidInputError("this model has no class labels (regression or one-class)")
        neg, pos = self.labels
        return np.where(f > 0, np.asarray(pos, dtype=object), np.asarray(neg, dtype=object))


def model_from_solution(
    problem: DualProblem, result: SolveResult, standardiser: Standardiser | None = None
) -> Model:
    """Model from a solved problem (support vectors: α above its lower bound).

    Variables that read the same data row (ε-regression's α⁺ᵢ and α⁻ᵢ) are summed into one
    coefficient for that row.
    """
    c = result.certificate
    if problem.rows is None:
        rows = np.flatnonzero(~c.at_lower)
        coef = (result.alpha[rows] * problem.y[rows]).copy()
    else:
        m = problem.X.shape[0]
        sv = ~np.asarray(c.at_lower, dtype=bool)
        dr = problem.data_rows
        rows = np.flatnonzero(np.bincount(dr[sv], minlength=m) > 0)
        per_row = np.zeros(m)
        np.add.at(per_row, dr[sv], (result.alpha * problem.y)[sv])
        coef = per_row[rows]
    return Model(
        support_rows=rows,
        support_points=problem.X[rows].copy(),
        coefficients=coef,
        bias=float(result.bias),
        kernel=problem.kernel,
        standardiser=standardiser or Standardiser.identity(problem.X.shape[1]),
        labels=problem.labels,
    )
