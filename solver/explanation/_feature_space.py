"""Explicit feature-space view of the decision function where it is exact.

For a kernel K(x, z) = φ(x)·φ(z) the solution is w = Σᵢ αᵢyᵢφ(xᵢ) and f(x) = w·φ(x) + b,
with ‖w‖² = αᵀQα and margin width 2/‖w‖ (the distance between the planes f = ±1).
φ is explicit for the linear kernel (φ(x) = x) and for polynomial kernels with offset ≥ 0
(φ = scaled monomials, :func:`solver.audit.polynomial_feature_map`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from ..audit import monomial_count, monomial_names, polynomial_feature_map
from ..errors import InvalidInputError
from ..kernels import LinearKernel, PolynomialKernel
from ..model import Standardiser
from ..problem import DualProblem
from ..result import SolveResult
from ._table import _check_classification

__all__ = ["MAX_MONOMIALS", "MAX_POLY_DEGREE", "FeatureSpaceView", "feature_space"]

#: Largest number of monomials for which polynomial weights are made explicit.
MAX_MONOMIALS = 5000
#: Largest polynomial degree for which weights are made explicit.
MAX_POLY_DEGREE = 3
_BLOCK = 2048


@dataclass(frozen=True, eq=False)
class FeatureSpaceView:
    """The weight vector of f(x) = w·φ(x) + b where φ is explicit, and ‖w‖ for any kernel.

    ``kernel`` kernel name; ``exact`` True when explicit weights are given;
    ``squared_norm`` αᵀQα = ‖w‖² (may be < 0 for an indefinite kernel);
    ``norm`` ‖w‖ (nan when αᵀQα < 0); ``margin_width`` 2/‖w‖ (inf when w = 0, nan when
    undefined), in the units of the (standardised) training rows for the linear kernel;
    ``bias`` b; ``names`` (m,) feature names (linear) or monomial names (polynomial);
    ``weights`` (m,) coefficient of each feature / monomial in f (standardised units),
    or None; ``exponents`` (m, d) int monomial exponents (polynomial) or None;
    ``reproduction_error`` max over training rows of |explicit f − kernel f| divided by
    max |kernel f| (nan when not exact); ``raw_weights``, ``raw_bias`` linear kernel
    in raw input units when a standardiser was given, else None / nan; ``note`` why the
    view is not exact, or empty.
    """

    kernel: str
    exact: bool
    squared_norm: float
    norm: float
    margin_width: float
    bias: float
    names: tuple[str, ...] = ()
    weights: np.ndarray | None = None
    exponents: np.ndarray | None = None
    reproduction_error: float = float("nan")
    raw_weights: np.ndarray | None = None
    raw_bias: float = float("nan")
    note: str = ""

    def values(self, Z: np.ndarray) -> np.ndarray:
        """f from the explicit weights for standardised rows ``Z`` (m, d); needs ``exact``."""
        if not self.exact or self.weights is None:
            raise InvalidInputError(f"no explicit weights for this model: {self.note}")
        Z = np.asarray(Z, dtype=np.float64)
        if self.exponents is None:
            return Z @ self.weights + self.bias
        return _monomials(Z, self.exponents) @ self.weights + self.bias

    def to_columns(self) -> dict[str, np.ndarray]:
        """Equal-length arrays ``name``, ``weight`` (and ``raw_weight`` when known); empty if
        not exact."""
        if not self.exact or self.weights is None:
            return {"name": np.array([], dtype=str), "weight": np.array([])}
        cols = {"name": np.array(self.names, dtype=str), "weight": self.weights.copy()}
        if self.raw_weights is not None:
            cols["raw_weight"] = self.raw_weights.copy()
        return cols

    def to_dict(self) -> dict[str, object]:
        """Scalars as plain data."""
        return {"kernel": self.kernel, "exact": self.exact, "squared_norm": self.squared_norm,
                "norm": self.norm, "margin_width": self.margin_width, "bias": self.bias,
                "n_weights": 0 if self.weights is None else int(self.weights.size),
                "reproduction_error": self.reproduction_error, "raw_bias": self.raw_bias,
                "note": self.note}


def _monomials(Z: np.ndarray, E: np.ndarray) -> np.ndarray:
    """Π_k Z[:, k]^E[m, k] for every monomial m, shape ``(len(Z), len(E))``."""
    out = np.ones((Z.shape[0], E.shape[0]))
    for k in range(E.shape[1]):
        for p in range(1, int(E[:, k].max(initial=0)) + 1):
            cols = E[:, k] >= p
            out[:, cols] *= Z[:, k : k + 1]
    return out


def _squared_norm(problem: DualProblem, alpha: np.ndarray) -> float:
    """αᵀQα using kernel blocks of the support vectors only (O(k²d) work)."""
    sv = np.flatnonzero(alpha != 0.0)
    ay = alpha[sv] * problem.y[sv]
    total = 0.0
    for s in range(0, sv.size, _BLOCK):
        e = min(sv.size, s + _BLOCK)
        total += float(ay[s:e] @ (problem.kernel_block(sv[s:e], sv) @ ay))
    return total


def _margin(q: float) -> tuple[float, float]:
    if not math.isfinite(q) or q < 0.0:
        return float("nan"), float("nan")
    norm = math.sqrt(q)
    return norm, (2.0 / norm if norm > 0 else float("inf"))


def feature_space(
    problem: DualProblem,
    result: SolveResult,
    *,
    feature_names: Sequence[str] | None = None,
    standardiser: Standardiser | None = None,
) -> FeatureSpaceView:
    """Explicit weights of f where the feature map is explicit; ‖w‖ and margin for any kernel.

    Parameters
    ----------
    problem, result : a solved binary classification problem.
    feature_names : d input feature names (default ``col1`` … ``cold``).
    standardiser : the run's standardiser; for the linear kernel the weights are then
        also given in raw input units (``raw_weights``, ``raw_bias``).

    Notes
    -----
    Linear: w = Σᵢ αᵢyᵢxᵢ (standardised rows), geometric margin 2/‖w‖.
    Polynomial (degree ≤ :data:`MAX_POLY_DEGREE`, offset ≥ 0, at most
    :data:`MAX_MONOMIALS` monomials): K(x, z) = Φ(x)·Φ(z) with Φ_m(x) = c_m·x^{e_m}, so
    f(x) = Σ_m (c_m Σᵢ αᵢyᵢΦ_m(xᵢ)) x^{e_m} + b (c_m = sqrt of the map's weight); the
    monomial weights are checked to reproduce the kernel decision values on every
    training row.
    """
    _check_classification(problem, result, "the feature-space view")
    alpha = np.asarray(result.alpha, dtype=np.float64)
    b = float(result.bias)
    kern = problem.kernel
    d = problem.X.shape[1]
    names = _feature_names(feature_names, d)
    q = _squared_norm(problem, alpha)
    norm, width = _margin(q)
    base = dict(kernel=kern.name, squared_norm=q, norm=norm, margin_width=width, bias=b)
    if isinstance(kern, LinearKernel):
        w = problem.X.T @ (alpha * problem.y)
        nw, wd = _margin(float(w @ w))
        f_ker = problem.y * problem.q_times(alpha) + b
        err = _rel_err(problem.X @ w + b, f_ker)
        raw_w, raw_b = None, float("nan")
        if standardiser is not None:
            raw_w = w / standardiser.scale
            raw_b = b - float(raw_w @ standardiser.centre)
        return FeatureSpaceView(**{**base, "norm": nw, "margin_width": wd}, exact=True,
                                names=tuple(names), weights=w, reproduction_error=err,
                                raw_weights=raw_w, raw_bias=raw_b)
    if isinstance(kern, PolynomialKernel):
        why = _poly_limits(kern, d)
        if why:
            return FeatureSpaceView(**base, exact=False, note=why)
        return _poly_view(problem, alpha, b, kern, names, base)
    return FeatureSpaceView(
        **base, exact=False,
        note=(f"the {kern.name} kernel has no finite explicit feature map here; "
              "only ‖w‖ = sqrt(αᵀQα) and the margin width are given"),
    )


def _feature_names(feature_names: Sequence[str] | None, d: int) -> list[str]:
    if feature_names is None:
        return [f"col{k + 1}" for k in range(d)]  # as solver.audit.monomial_names
    names = [str(v) for v in feature_names]
    if len(names) != d:
        raise InvalidInputError(
            f"feature_names has {len(names)} entries, the data have {d} columns")
    return names


def _poly_limits(kern: PolynomialKernel, d: int) -> str:
    if kern.degree > MAX_POLY_DEGREE:
        return (f"polynomial degree {kern.degree} exceeds {MAX_POLY_DEGREE}: "
                "monomial weights are not made explicit")
    if kern.gamma is None:
        return "polynomial gamma is not set"
    if kern.offset < 0:
        return "polynomial offset < 0: the kernel has no real explicit feature map"
    count = monomial_count(d, kern.degree, offset_positive=kern.offset > 0)
    if count > MAX_MONOMIALS:
        return (f"{count} monomials exceed the limit of {MAX_MONOMIALS} "
                f"({d} features, degree {kern.degree})")
    return ""


def _rel_err(f_exp: np.ndarray, f_ker: np.ndarray) -> float:
    if f_ker.size == 0:
        return 0.0
    scale = max(float(np.max(np.abs(f_ker))), np.finfo(float).tiny)
    return float(np.max(np.abs(f_exp - f_ker))) / scale


def _poly_view(problem: DualProblem, alpha: np.ndarray, b: float, kern: PolynomialKernel,
               names: list[str], base: dict) -> FeatureSpaceView:
    gamma = float(kern.gamma)  # resolved when the problem was built
    sv = np.flatnonzero(alpha != 0.0)
    ay = alpha[sv] * problem.y[sv]
    fmap = polynomial_feature_map(problem.X[sv], gamma=gamma, offset=kern.offset,
                                  degree=kern.degree, max_terms=MAX_MONOMIALS)
    E = np.asarray(fmap.exponents, dtype=np.int64)
    # Φ_e(x) = sqrt(w_e)·x^e, so f(x) − b = Σ_e (sqrt(w_e) Σᵢ αᵢyᵢΦ_e(xᵢ)) x^e
    w_feat = np.asarray(fmap.features).T @ ay  # w in feature space, (m,)
    coef = w_feat * np.sqrt(np.asarray(fmap.weights, dtype=np.float64))
    # independent check: monomials evaluated from the exponents, against kernel f
    f_ker = problem.y * problem.q_times(alpha) + b
    f_exp = np.empty(problem.n)
    for s in range(0, problem.n, _BLOCK):
        e = min(problem.n, s + _BLOCK)
        f_exp[s:e] = _monomials(problem.X[s:e], E) @ coef + b
    mnames = tuple(str(v) for v in monomial_names(E, names))
    return FeatureSpaceView(**base, exact=True, names=mnames, weights=coef, exponents=E,
                            reproduction_error=_rel_err(f_exp, f_ker))
