"""The general SVM dual problem that every kktrace solver works on.

    minimise    ½ αᵀQα + pᵀα
    subject to  yᵀα = Δ,   lᵢ ≤ αᵢ ≤ uᵢ,      with  Q_ij = y_i y_j K(x_i, x_j),  y_i ∈ {−1, +1}.

Binary soft-margin classification is p = −1, Δ = 0, l = 0, uᵢ = C·(class weight)·(sample weight).
ε-regression and one-class problems fit the same form with other p, y, bounds and Δ,
so solvers never special-case the problem kind.  Q is never materialised here: the
problem exposes kernel blocks, Q blocks and diagonals.

Optimality (Keerthi et al. 2001; Fan, Chen & Lin 2005, eq. 5): with gradient G = Qα + p,
a feasible α is optimal iff there is a scalar b (the bias of f(x) = Σ αⱼyⱼK(xⱼ, x) + b) with

    Gᵢ + b yᵢ ≥ 0 where αᵢ = lᵢ,    = 0 where lᵢ < αᵢ < uᵢ,    ≤ 0 where αᵢ = uᵢ.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .kernels import Kernel, PrecomputedKernel

__all__ = ["DualProblem", "binary_classification", "regression", "one_class", "index_features",
           "serial_dot", "REGRESSION_KIND", "ONE_CLASS_KIND"]

#: ``DualProblem.kind`` of the problems built by :func:`regression` and :func:`one_class`.
REGRESSION_KIND = "epsilon_regression"
ONE_CLASS_KIND = "one_class"


def serial_dot(a: np.ndarray, b: np.ndarray) -> float:
    """aᵀb for two (n,) vectors, summed by numpy rather than BLAS.

    Used next to the SMO loop: a BLAS dot of n = 20000 entries started BLAS worker threads
    that then spun for ~0.1 s (measured) on the core the loop's helper thread needs.
    """
    return float(np.sum(a * b))


def _vec(a: Any, n: int, name: str) -> np.ndarray:
    try:
        # a private copy: freezing it must not make the caller's array read-only
        v = np.array(a, dtype=np.float64, order="C").reshape(-1)
    except (TypeError, ValueError):
        raise InvalidInputError(f"{name} must be numeric") from None
    if v.shape != (n,):
        raise InvalidInputError(f"{name} must have {n} entries, got {v.size}")
    if not np.all(np.isfinite(v)):
        bad = int(np.flatnonzero(~np.isfinite(v))[0])
        raise InvalidInputError(f"{name} has a non-finite entry at row index {bad} (0-based)")
    v.setflags(write=False)
    return v


@dataclass(frozen=True, eq=False)
class DualProblem:
    """One instance of the general dual.  Arrays are read-only float64 of shape ``(n,)``.

    Attributes
    ----------
    X : (n, d) rows the kernel is evaluated on (already standardised if the caller chose so).
    y : (n,) signs ±1 in the equality constraint and in Q.
    p : (n,) linear term.
    lower, upper : (n,) box bounds, lower ≤ upper.
    delta : right-hand side Δ of yᵀα = Δ.
    kernel : the kernel, with every default parameter already resolved.
    kind : problem type, e.g. ``"binary_classification"``.
    info : plain-data description of how the problem was built (C, weights, label mapping).
    rows : optional (n,) int64 index map: variable i is evaluated on data row ``X[rows[i]]``,
        so a problem with several variables per data row (ε-regression has two) holds its
        data once.  ``None`` means variable i reads row i; then ``X`` has n rows, otherwise
        ``X`` has any number m ≥ 1 of rows and every entry of ``rows`` is in [0, m).
        Every kernel access (kernel and Q blocks, the diagonal, :meth:`features`) honours it.
    """

    X: np.ndarray
    y: np.ndarray
    p: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    delta: float
    kernel: Kernel
    kind: str
    info: Mapping[str, Any]
    rows: np.ndarray | None = None

    def __post_init__(self) -> None:
        X = np.array(self.X, dtype=np.float64, order="C")  # private copy, frozen below
        if X.ndim != 2 or X.shape[0] < 1:
            raise InvalidInputError(f"X must be a non-empty 2-D array, got shape {X.shape}")
        X.setflags(write=False)
        object.__setattr__(self, "X", X)
        n = X.shape[0]
        if self.rows is not None:
            try:
                r = np.array(self.rows).reshape(-1)
            except (TypeError, ValueError):
                raise InvalidInputError("rows must be integer row indices") from None
            if r.size < 1 or r.dtype.kind not in "iu":
                raise InvalidInputError("rows must be a non-empty array of integer row indices")
            r = r.astype(np.int64)
            bad = np.flatnonzero((r < 0) | (r >= n))
            if bad.size:
                raise InvalidInputError(
                    f"rows entry {int(bad[0])} (0-based) is {int(r[bad[0]])}, outside the "
                    f"{n} data rows")
            r.setflags(write=False)
            object.__setattr__(self, "rows", r)
            n = int(r.size)
        for name in ("y", "p", "lower", "upper"):
            object.__setattr__(self, name, _vec(getattr(self, name), n, name))
        if not np.all(np.abs(self.y) == 1.0):
            raise InvalidInputError("y must hold only -1 and +1")
        bad = np.flatnonzero(self.lower > self.upper)
        if bad.size:
            raise InvalidInputError(
                f"lower bound exceeds upper bound at row index {int(bad[0])} (0-based)"
            )
        if not math.isfinite(float(self.delta)):
            raise InvalidInputError("delta must be finite")
        object.__setattr__(self, "delta", float(self.delta))

    @property
    def n(self) -> int:
        """Number of dual variables (training points for classification)."""
        return int(self.X.shape[0] if self.rows is None else self.rows.shape[0])

    @property
    def data_rows(self) -> np.ndarray:
        """(n,) data row of each variable (``arange(n)`` when there is no index map)."""
        return np.arange(self.n, dtype=np.int64) if self.rows is None else self.rows

    def features(self, idx: np.ndarray | slice | None = None) -> np.ndarray:
        """Feature rows of variables ``idx`` (all when None), through the index map."""
        if self.rows is None:
            return self.X if idx is None else self.X[idx]
        return self.X[self.rows if idx is None else self.rows[idx]]

    def kernel_block(self, rows: np.ndarray | slice, cols: np.ndarray | slice) -> np.ndarray:
        """K(x_rows, x_cols) for variables ``rows``, ``cols``; shape (len(rows), len(cols))."""
        return self.kernel.block(self.features(rows), self.features(cols))

    def q_block(self, rows: np.ndarray | slice, cols: np.ndarray | slice) -> np.ndarray:
        """Q[rows, cols] = y_r y_c K(x_r, x_c)."""
        K = self.kernel_block(rows, cols)
        K *= self.y[rows][:, None]
        K *= self.y[cols][None, :]
        return K

    def kernel_diag(self) -> np.ndarray:
        """K(x_i, x_i) for every variable, shape ``(n,)`` (equals diag Q)."""
        d = self.kernel.diag(self.X)
        return d if self.rows is None else d[self.rows]

    def q_times(self, v: np.ndarray, *, block_rows: int = 2048) -> np.ndarray:
        """Q v computed in row blocks of ``block_rows`` over the columns where v ≠ 0.

        (Q v)_i = y_i Σ_{j ∈ S} K(x_i, x_j) y_j v_j with S = {j : v_j ≠ 0}: for a dual
        solution v = α this is K[:, S]·(αy)_S, the support vectors only, so the cost is
        O(n·|S|·d) rather than O(n²·d); exact for any v and independent of a solver's
        own bookkeeping.  (The explanation of a fresh run reads Qα off the solver's kept
        gradient instead, after checking it against this product on a sample of rows:
        :mod:`solver.explanation._values`.)  Memory O(block_rows · |S|).
        Large products of the built-in kernels go to the compiled kernel of
        :mod:`solver._products` (same values within ~1e-13 relative, 2.7× faster).
        """
        v = np.asarray(v, dtype=np.float64)
        out = np.zeros(self.n)
        cols = np.flatnonzero(v)
        if cols.size == 0:
            return out
        from ._products import compiled_q_times, use_compiled

        if use_compiled(self.n, cols.size):
            fast = compiled_q_times(self, v)
            if fast is not None:
                return fast
        yv = (self.y * v)[cols]
        for s in range(0, self.n, block_rows):
            e = min(self.n, s + block_rows)
            out[s:e] = self.y[s:e] * (self.kernel_block(slice(s, e), cols) @ yv)
        return out

    def gradient(self, alpha: np.ndarray) -> np.ndarray:
        """G = Qα + p, shape ``(n,)``."""
        return self.q_times(alpha) + self.p

    def objective(self, alpha: np.ndarray) -> float:
        """Dual objective ½ αᵀQα + pᵀα (the quantity solvers minimise)."""
        alpha = np.asarray(alpha, dtype=np.float64)
        return float(0.5 * alpha @ self.q_times(alpha) + self.p @ alpha)

    def feasibility(self, alpha: np.ndarray) -> tuple[float, float]:
        """(largest bound violation, |yᵀα − Δ|) for ``alpha``; both 0 for a feasible point."""
        alpha = np.asarray(alpha, dtype=np.float64)
        bound = float(max(0.0, np.max(self.lower - alpha), np.max(alpha - self.upper)))
        return bound, abs(float(self.y @ alpha) - self.delta)

    def feasible_start(self) -> np.ndarray:
        """A feasible α: the lower bounds, then mass moved toward the upper bounds until yᵀα = Δ.

        For classification (l = 0, Δ = 0) this is α = 0.
        """
        alpha = self.lower.copy()
        need = self.delta - serial_dot(self.y, alpha)
        if need != 0.0:
            sign = 1.0 if need > 0 else -1.0
            for i in np.flatnonzero(self.y == sign):
                room = self.upper[i] - alpha[i]
                step = min(room, abs(need))
                alpha[i] += step
                need -= sign * step
                if abs(need) <= 1e-15 * max(1.0, abs(self.delta)):
                    break
            if abs(need) > 1e-12 * max(1.0, abs(self.delta)):
                raise InvalidInputError("the problem is infeasible: bounds cannot satisfy yᵀα = Δ")
        return alpha

    def describe(self) -> dict[str, Any]:
        """Plain-data description for manifests (no arrays)."""
        return {
            "kind": self.kind,
            "n": self.n,
            **({"n_data_rows": int(self.X.shape[0])} if self.rows is not None else {}),
            "n_features": int(self.X.shape[1]),
            "delta": self.delta,
            "kernel": self.kernel.describe(),
            **{k: v for k, v in self.info.items()},
        }

    @property
    def labels(self) -> tuple[Hashable, Hashable] | None:
        """(label mapped to −1, label mapped to +1) for classification, else None."""
        lab = self.info.get("labels")
        return (lab["negative"], lab["positive"]) if lab else None


def index_features(n: int) -> np.ndarray:
    """Row-index column (n, 1) used as ``X`` with a :class:`PrecomputedKernel`."""
    return np.arange(n, dtype=np.float64)[:, None]


def _is_number(v: Any) -> bool:
    return not isinstance(v, bool) and isinstance(v, (int, float, np.floating, np.integer))


def _plain(v: Hashable) -> Any:
    """Label as JSON-friendly plain data (numpy scalars → Python scalars)."""
    return v.item() if isinstance(v, np.generic) else v


def _sample_weights(sample_weight: Any, n: int) -> np.ndarray:
    """Validated (n,) positive finite sample weights."""
    try:
        sw = np.asarray(sample_weight, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InvalidInputError("sample weights must be numbers") from None
    if sw.shape != (n,):
        raise InvalidInputError(f"sample weights must have {n} entries, got {sw.size}")
    bad = np.flatnonzero(~(np.isfinite(sw) & (sw > 0)))
    if bad.size:
        raise InvalidInputError(
            f"sample weight at row index {int(bad[0])} (0-based) must be finite and > 0, "
            f"got {float(sw[bad[0]])!r}"
        )
    return sw


def _features(X: Any) -> np.ndarray:
    try:
        X = np.ascontiguousarray(X, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError("X must be numeric") from None
    if X.ndim != 2 or X.shape[0] < 1:
        raise InvalidInputError(f"X must be 2-D (rows, features), got shape {X.shape}")
    return X


def binary_classification(
    X: np.ndarray,
    labels: Sequence[Hashable] | np.ndarray,
    *,
    kernel: Kernel,
    C: float = 1.0,
    class_weight: Mapping[Hashable, float] | None = None,
    sample_weight: np.ndarray | None = None,
    positive_label: Hashable | None = None,
) -> DualProblem:
    """Soft-margin binary classification dual: p = −1, Δ = 0, 0 ≤ αᵢ ≤ C·wᵢ.

    Parameters
    ----------
    X : (n, d) feature rows (for a precomputed kernel, :func:`index_features`).
    labels : (n,) two distinct label values (numbers or strings).
    kernel : kernel; unset parameters (e.g. gamma) are resolved from ``X`` and recorded.
    C : penalty, > 0.
    class_weight : optional factor per label value scaling C for that class.
    sample_weight : optional (n,) positive factors scaling C per point.
    positive_label : label mapped to +1; default the larger of the two sorted labels.
    """
    X = np.ascontiguousarray(X, dtype=np.float64)
    labels = np.asarray(labels)
    if X.ndim != 2:
        raise InvalidInputError(f"X must be 2-D (rows, features), got shape {X.shape}")
    n = X.shape[0]
    if labels.shape != (n,):
        raise InvalidInputError(
            f"labels must have {n} entries (one per row of X), got shape {labels.shape}"
        )
    if not (_is_number(C) and math.isfinite(float(C)) and float(C) > 0):
        raise InvalidInputError(f"C must be a finite number > 0, got {C!r}")
    classes = sorted(set(labels.tolist()), key=lambda v: (str(type(v)), v))
    if len(classes) != 2:
        raise InvalidInputError(
            f"binary classification needs exactly two label values, found {len(classes)}: "
            f"{', '.join(map(repr, classes[:5]))}"
        )
    if positive_label is None:
        neg, pos = classes
    elif positive_label in classes:
        pos = positive_label
        neg = classes[0] if classes[1] == pos else classes[1]
    else:
        raise InvalidInputError(f"positive label {positive_label!r} is not one of {classes!r}")
    y = np.where(labels == pos, 1.0, -1.0)
    upper = np.full(n, float(C))
    if class_weight:
        unknown = [k for k in class_weight if k not in classes]
        if unknown:
            raise InvalidInputError(f"class weight given for unknown label(s) {unknown!r}")
        for lab, w in class_weight.items():
            if not (_is_number(w) and math.isfinite(float(w)) and float(w) > 0):
                raise InvalidInputError(
                    f"class weight for {lab!r} must be finite and > 0, got {w!r}"
                )
            upper[labels == lab] *= float(w)
    if sample_weight is not None:
        upper *= _sample_weights(sample_weight, n)
    if not isinstance(kernel, PrecomputedKernel):
        kernel = kernel.with_defaults(X)
    info = {
        "C": float(C),
        "labels": {"negative": _plain(neg), "positive": _plain(pos)},
        "class_weight": (
            {str(k): float(v) for k, v in class_weight.items()} if class_weight else None
        ),
        "sample_weight": sample_weight is not None,
        "class_counts": {"negative": int(np.sum(y < 0)), "positive": int(np.sum(y > 0))},
    }
    return DualProblem(
        X=X, y=y, p=-np.ones(n), lower=np.zeros(n), upper=upper, delta=0.0,
        kernel=kernel, kind="binary_classification", info=info,
    )


def _positive(value: Any, name: str, *, allow_zero: bool = False) -> float:
    ok = _is_number(value) and math.isfinite(float(value))
    if not ok or float(value) < 0 or (float(value) == 0 and not allow_zero):
        rel = ">= 0" if allow_zero else "> 0"
        raise InvalidInputError(f"{name} must be a finite number {rel}, got {value!r}")
    return float(value)


def regression(
    X: np.ndarray,
    target: Sequence[float] | np.ndarray,
    *,
    kernel: Kernel,
    C: float = 1.0,
    epsilon: float = 0.1,
    sample_weight: np.ndarray | None = None,
) -> DualProblem:
    """ε-support-vector regression dual in the 2n-variable form.

    Variables 0..n−1 are α⁺ (y = +1, p = ε − t), variables n..2n−1 are α⁻ (y = −1,
    p = ε + t); both read data row i mod n through the index map ``rows``, so ``X`` is held
    once.  Δ = 0 and 0 ≤ α ≤ C·wᵢ.  Then Q = [[K, −K], [−K, K]] and the model is
    f(x) = Σᵢ (α⁺ᵢ − α⁻ᵢ) K(xᵢ, x) + b.

    Parameters
    ----------
    X : (n, d) feature rows.
    target : (n,) finite numeric target t, not constant.
    kernel : kernel; unset parameters (e.g. gamma) are resolved from ``X`` and recorded.
    C : penalty, > 0.
    epsilon : half-width of the insensitive tube, ≥ 0 (target units).
    sample_weight : optional (n,) positive factors scaling C per point (both variables).

    Notes
    -----
    The dual (Vapnik 1995; Smola & Schölkopf 2004, Stat. Comput. 14, eq. 10; Schölkopf &
    Smola 2002, ch. 9) is

        min ½ (α⁺ − α⁻)ᵀK(α⁺ − α⁻) + ε eᵀ(α⁺ + α⁻) − tᵀ(α⁺ − α⁻)
        s.t. eᵀ(α⁺ − α⁻) = 0,  0 ≤ α⁺, α⁻ ≤ C·w.

    Its primal is min ½‖w‖² + Σ Cwᵢ (ξᵢ + ξᵢ*) subject to tᵢ − f(xᵢ) ≤ ε + ξᵢ,
    f(xᵢ) − tᵢ ≤ ε + ξᵢ*, ξ, ξ* ≥ 0; the certificate evaluates it from the gradient.
    ν-regression needs a second equality constraint (eᵀ(α⁺ + α⁻) = C·ν·n), which the
    general form here does not carry; it is not built.

    Examples
    --------
    >>> import numpy as np
    >>> from solver.kernels import LinearKernel
    >>> prob = regression(np.array([[0.0], [1.0], [2.0]]), [1.0, 3.0, 5.0],
    ...                   kernel=LinearKernel(), C=100.0, epsilon=0.0)
    >>> prob.n, prob.X.shape[0]
    (6, 3)
    """
    X = _features(X)
    n = X.shape[0]
    try:
        t = np.array(target, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InvalidInputError("the target must be numeric") from None
    if t.shape != (n,):
        raise InvalidInputError(f"the target must have {n} entries (one per row of X), "
                                f"got {t.size}")
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        raise InvalidInputError(f"the target has a non-finite value at row index {int(bad[0])} "
                                "(0-based)")
    if n > 1 and np.all(t == t[0]):
        raise InvalidInputError(f"the target is constant ({float(t[0])!r} on every row): "
                                "there is nothing to regress")
    C = _positive(C, "C")
    epsilon = _positive(epsilon, "epsilon", allow_zero=True)
    upper = np.full(n, C)
    if sample_weight is not None:
        upper *= _sample_weights(sample_weight, n)
    if not isinstance(kernel, PrecomputedKernel):
        kernel = kernel.with_defaults(X)
    info = {
        "C": C, "epsilon": epsilon, "sample_weight": sample_weight is not None,
        "variables": "alpha_plus (rows 0..n-1), alpha_minus (rows n..2n-1)",
        "target": {"mean": float(t.mean()), "std": float(t.std()), "min": float(t.min()),
                   "max": float(t.max())},
    }
    rows = np.concatenate([np.arange(n), np.arange(n)]).astype(np.int64)
    return DualProblem(
        X=X, y=np.concatenate([np.ones(n), -np.ones(n)]),
        p=np.concatenate([epsilon - t, epsilon + t]), lower=np.zeros(2 * n),
        upper=np.concatenate([upper, upper]), delta=0.0, kernel=kernel,
        kind=REGRESSION_KIND, info=info, rows=rows,
    )


def one_class(X: np.ndarray, *, kernel: Kernel, nu: float = 0.5) -> DualProblem:
    """One-class (novelty) dual of Schölkopf et al. (2001), scaled so that 0 ≤ α ≤ 1.

    Q = K, p = 0, y = e, Δ = ν·n, 0 ≤ αᵢ ≤ 1.  This is the paper's problem (Δ = 1,
    0 ≤ α ≤ 1/(νn)) multiplied through by νn: α = νn·α_paper, the objective by (νn)², and
    the decision value f(x) = Σ αᵢK(xᵢ, x) − ρ by νn, so ρ_paper = ρ/(νn) and the sign of
    f (inlier where f ≥ 0) is the same.  With bounds of 1 the stopping tolerance means
    what it means for classification with C = 1.  The bias b of the certificate is −ρ.

    Parameters
    ----------
    X : (n, d) feature rows of the reference (released) batches.
    kernel : kernel; unset parameters are resolved from ``X`` and recorded.
    nu : ν in (0, 1]: an upper bound on the share of training outliers and a lower bound
        on the share of support vectors (Schölkopf et al. 2001, Proposition 4).

    Notes
    -----
    Dual: min ½αᵀKα s.t. eᵀα = νn, 0 ≤ α ≤ 1.  Primal (same scaling):
    min ½‖w‖² + Σ ξᵢ − νn·ρ s.t. ⟨w, φ(xᵢ)⟩ ≥ ρ − ξᵢ, ξ ≥ 0 (Schölkopf, Platt, Shawe-Taylor,
    Smola & Williamson 2001, Neural Computation 13, eq. 3, times νn).

    Examples
    --------
    >>> import numpy as np
    >>> from solver.kernels import RBFKernel
    >>> prob = one_class(np.array([[0.0], [1.0], [2.0], [3.0]]), kernel=RBFKernel(gamma=1.0),
    ...                  nu=0.5)
    >>> prob.delta, float(prob.upper.max())
    (2.0, 1.0)
    """
    X = _features(X)
    n = X.shape[0]
    if not (_is_number(nu) and math.isfinite(float(nu)) and 0.0 < float(nu) <= 1.0):
        raise InvalidInputError(f"nu must be a number in (0, 1], got {nu!r}")
    nu = float(nu)
    if not isinstance(kernel, PrecomputedKernel):
        kernel = kernel.with_defaults(X)
    info = {"nu": nu, "scaling": "alpha = nu*n*alpha_paper, rho = nu*n*rho_paper",
            "scale": nu * n}
    return DualProblem(
        X=X, y=np.ones(n), p=np.zeros(n), lower=np.zeros(n), upper=np.ones(n),
        delta=nu * n, kernel=kernel, kind=ONE_CLASS_KIND, info=info,
    )
