"""A suite of seeded hard problems for the SMO solver, each with the diagnosis it should get.

Every generator takes a size ``n`` (training rows) and a ``seed`` and returns a
:class:`HardProblem`: the dual problem (binary classification), the standardiser that was
applied, plain data facts, and ``expected`` — the finding codes of
:func:`solver.diagnosis.diagnose` its run should trigger.  Data are invented (Gaussian
clouds); nothing here reads files.

==========================  ============================================  ========================
name                        what makes it hard                            expected finding
==========================  ============================================  ========================
``unscaled_features``       one column × 10⁴, not standardised, linear    unscaled_features
``overlap_large_c``         overlapping classes, C = 10⁶, RBF             penalty_large
``gamma_tiny``              γ = 10⁻⁶ on standardised data                 kernel_near_constant
``gamma_huge``              γ = 10³ on standardised data                  kernel_near_identity
``sigmoid_indefinite``      sigmoid kernel γ = 1, offset 1                indefinite_kernel
``conflicting_duplicates``  a quarter of the rows repeated, other label   conflicting_duplicates
``class_imbalance``         1 : 100 class ratio                           class_imbalance
``near_collinear``          two features, correlation ≈ 1 − 10⁻⁸          collinear_features
``rounded_gram``            precomputed linear Gram rounded to 6 places   indefinite_kernel
==========================  ============================================  ========================

The γ extremes, the overlap and the sigmoid kernel are the usual hard cases of kernel SVM
training (common practice); the rounding case arises when a Gram matrix is exported as text.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .kernels import Kernel, LinearKernel, PrecomputedKernel, RBFKernel, SigmoidKernel
from .model import Standardiser
from .problem import DualProblem, binary_classification, index_features

__all__ = ["HardProblem", "HARD_PROBLEMS", "hard_problem"]


@dataclass(frozen=True, eq=False)
class HardProblem:
    """One generated hard problem.

    name : generator name.  problem : the dual.  standardiser : what was applied to the raw
    rows (identity when not standardised).  data : plain data facts as stored with a run
    (``fingerprint`` is ``"hard:<name>:<n>:<seed>"``: invented data, not a file).
    expected : finding codes the diagnosis of its run should contain.
    description : what makes it hard.  solve_options : options the suite solves it with.
    """

    name: str
    problem: DualProblem
    standardiser: Standardiser
    data: dict[str, Any]
    expected: tuple[str, ...]
    description: str
    solve_options: dict[str, Any] = field(default_factory=dict)


def _two_clouds(g: np.random.Generator, n: int, d: int,
                sep: float) -> tuple[np.ndarray, np.ndarray]:
    """n rows of two Gaussian clouds (d features) whose means differ by ``sep`` along x₀."""
    y = np.where(np.arange(n) % 2 == 0, 1, -1)
    X = g.normal(size=(n, d))
    X[:, 0] += 0.5 * sep * y
    return X, y


def _make(name: str, n: int, seed: int, X: np.ndarray, y: np.ndarray, kernel: Kernel, C: float,
          expected: tuple[str, ...], description: str, *, standardise: bool = True,
          **solve_options: Any) -> HardProblem:
    std = Standardiser.fit(X) if standardise else Standardiser.identity(X.shape[1])
    Xs = std.transform(X)
    problem = binary_classification(Xs, y, kernel=kernel, C=C)
    data = {"fingerprint": f"hard:{name}:{n}:{seed}", "feature_names":
            [f"x{k}" for k in range(X.shape[1])], "label_name": "y", "source": None,
            "warnings": [], "n_rows": int(n), "n_features": int(X.shape[1])}
    return HardProblem(name, problem, std, data, expected, description, dict(solve_options))


def unscaled_features(n: int = 300, seed: int = 0) -> HardProblem:
    """Four features, both x₀ and x₃ informative, x₃ in units 10⁴ times larger; not
    standardised; linear kernel, C = 1 (Q's eigenvalues spread over ~10⁸)."""
    g = np.random.default_rng(seed)
    y = np.where(np.arange(n) % 2 == 0, 1, -1)
    X = g.normal(size=(n, 4))
    X[:, 0] += y
    X[:, 3] += y
    X[:, 3] *= 1e4
    return _make("unscaled_features", n, seed, X, y, LinearKernel(), 1.0, ("unscaled_features",),
                 "one column × 10⁴, features not standardised", standardise=False,
                 iteration_limit=20_000)


def overlap_large_c(n: int = 300, seed: int = 0) -> HardProblem:
    """Heavily overlapping classes (means 0.5 sd apart) at C = 10⁶, RBF γ = 0.5."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 2, 0.5)
    return _make("overlap_large_c", n, seed, X, y, RBFKernel(gamma=0.5), 1e6,
                 ("penalty_large",), "overlapping classes at C = 10⁶", iteration_limit=20_000)


def gamma_tiny(n: int = 300, seed: int = 0) -> HardProblem:
    """RBF γ = 10⁻⁶ on standardised rows: every kernel value ≈ 1."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 3, 2.0)
    return _make("gamma_tiny", n, seed, X, y, RBFKernel(gamma=1e-6), 1.0,
                 ("kernel_near_constant",), "RBF γ = 10⁻⁶ (kernel ≈ constant)")


def gamma_huge(n: int = 300, seed: int = 0) -> HardProblem:
    """RBF γ = 10³ on standardised rows: off-diagonal kernel values ≈ 0."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 3, 2.0)
    return _make("gamma_huge", n, seed, X, y, RBFKernel(gamma=1e3), 1.0,
                 ("kernel_near_identity",), "RBF γ = 10³ (kernel ≈ identity)")


def sigmoid_indefinite(n: int = 300, seed: int = 0) -> HardProblem:
    """Sigmoid kernel tanh(γ x·z + offset) with γ = 1, offset 1: not PSD on these rows."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 3, 2.0)
    return _make("sigmoid_indefinite", n, seed, X, y, SigmoidKernel(gamma=1.0, offset=1.0),
                 1.0, ("indefinite_kernel",), "sigmoid kernel with negative eigenvalues")


def conflicting_duplicates(n: int = 300, seed: int = 0) -> HardProblem:
    """Three quarters distinct rows; the last quarter repeats earlier rows with the other label."""
    g = np.random.default_rng(seed)
    m = n - n // 4
    X, y = _two_clouds(g, m, 3, 2.0)
    pick = g.choice(m, size=n - m, replace=False)
    X = np.vstack([X, X[pick]])
    y = np.concatenate([y, -y[pick]])
    return _make("conflicting_duplicates", n, seed, X, y, RBFKernel(), 10.0,
                 ("conflicting_duplicates",), "exact duplicate rows with opposite labels")


def class_imbalance(n: int = 1010, seed: int = 0) -> HardProblem:
    """One positive row for every 100 negative ones (n // 101 positives)."""
    g = np.random.default_rng(seed)
    n_pos = max(2, n // 101)
    y = np.concatenate([np.ones(n_pos, dtype=int), -np.ones(n - n_pos, dtype=int)])
    X = g.normal(size=(n, 3))
    X[:n_pos, 0] += 1.5
    return _make("class_imbalance", n, seed, X, y, RBFKernel(), 1.0, ("class_imbalance",),
                 "class ratio 1 : 100")


def near_collinear(n: int = 300, seed: int = 0) -> HardProblem:
    """Linear kernel on three features, the third = the first + 10⁻⁴ noise (correlation
    ≈ 1 − 10⁻⁸), C = 10."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 3, 1.0)
    X[:, 2] = X[:, 0] + 1e-4 * g.normal(size=n)
    return _make("near_collinear", n, seed, X, y, LinearKernel(), 10.0, ("collinear_features",),
                 "two nearly collinear features, linear kernel")


def rounded_gram(n: int = 300, seed: int = 0) -> HardProblem:
    """Precomputed linear Gram of 3 standardised features (rank 3), rounded to 6 decimals:
    rounding gives it small negative eigenvalues."""
    g = np.random.default_rng(seed)
    X, y = _two_clouds(g, n, 3, 2.0)
    Xs = Standardiser.fit(X).transform(X)
    gram = np.round(Xs @ Xs.T, 6)
    problem = binary_classification(index_features(n), y, kernel=PrecomputedKernel(gram), C=1.0)
    data = {"fingerprint": f"hard:rounded_gram:{n}:{seed}", "feature_names": ["row"],
            "label_name": "y", "source": None, "warnings": [], "n_rows": int(n),
            "n_features": 1}
    return HardProblem("rounded_gram", problem, Standardiser.identity(1), data,
                       ("indefinite_kernel",), "precomputed Gram with rounding negatives")


#: name → generator, in the order of the table above
HARD_PROBLEMS: dict[str, Callable[..., HardProblem]] = {
    f.__name__: f for f in (unscaled_features, overlap_large_c, gamma_tiny, gamma_huge,
                            sigmoid_indefinite, conflicting_duplicates, class_imbalance,
                            near_collinear, rounded_gram)
}



def hard_problem(name: str, n: int | None = None, seed: int = 0) -> HardProblem:
    """The generated problem ``name`` (see :data:`HARD_PROBLEMS`) with ``n`` rows."""
    gen = HARD_PROBLEMS.get(name)
    if gen is None:
        raise InvalidInputError(
            f"unknown hard problem {name!r}; choose one of {', '.join(HARD_PROBLEMS)}")
    if n is not None and (isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 8):
        raise InvalidInputError(f"n must be an integer >= 8, got {n!r}")
    return gen(seed=seed) if n is None else gen(n=int(n), seed=seed)
