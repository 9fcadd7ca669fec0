"""Kernel functions for the dual problem, evaluated blockwise with BLAS-backed array code.

Every kernel maps two row blocks ``A`` (shape ``(na, d)``) and ``B`` (shape ``(nb, d)``)
to the block ``K[a, b]`` (shape ``(na, nb)``, float64), gives its diagonal, validates
its parameters on construction and describes itself as plain data for manifests.

Built-in kernels (``x``, ``z`` are rows):

=========== ===============================================  ======================
name        K(x, z)                                          PSD
=========== ===============================================  ======================
linear      x·z                                              yes
poly        (gamma x·z + offset)^degree                      yes when offset ≥ 0
rbf         exp(-gamma ‖x − z‖²)                             yes
sigmoid     tanh(gamma x·z + offset)                         not in general
callable    user function f(A, B) → block                    unknown
precomputed rows/columns of a given Gram matrix              checked by the audit
=========== ===============================================  ======================
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields, replace
from typing import Any, ClassVar

import numpy as np

from .errors import InvalidInputError

__all__ = [
    "Kernel",
    "LinearKernel",
    "PolynomialKernel",
    "RBFKernel",
    "SigmoidKernel",
    "CallableKernel",
    "PrecomputedKernel",
    "KERNELS",
    "make_kernel",
    "kernel_from_description",
    "median_heuristic_gamma",
]

#: Above this many rows the median heuristic uses a seeded sample of this size.
MEDIAN_SAMPLE = 1000
MEDIAN_SEED = 0


def _as_block(a: np.ndarray, name: str) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise InvalidInputError(
            f"kernel input {name} must be 2-D (rows, features), got shape {a.shape}"
        )
    return a


def _check_gamma(gamma: float | None, kernel: str) -> None:
    if gamma is None:
        return
    if isinstance(gamma, bool) or not isinstance(gamma, (int, float, np.floating, np.integer)):
        raise InvalidInputError(f"{kernel} kernel: gamma must be a number, got {gamma!r}")
    if not math.isfinite(float(gamma)) or float(gamma) <= 0.0:
        raise InvalidInputError(f"{kernel} kernel: gamma must be finite and > 0, got {gamma!r}")


def _check_offset(offset: float, kernel: str) -> None:
    if isinstance(offset, bool) or not isinstance(offset, (int, float, np.floating, np.integer)):
        raise InvalidInputError(f"{kernel} kernel: offset must be a number, got {offset!r}")
    if not math.isfinite(float(offset)):
        raise InvalidInputError(f"{kernel} kernel: offset must be finite, got {offset!r}")


def squared_distances(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Squared Euclidean distances between rows of ``A`` (na, d) and ``B`` (nb, d), clipped at 0."""
    aa = np.einsum("ij,ij->i", A, A)
    bb = np.einsum("ij,ij->i", B, B)
    d2 = A @ B.T
    d2 *= -2.0
    d2 += aa[:, None]
    d2 += bb[None, :]
    np.maximum(d2, 0.0, out=d2)
    return d2


def median_heuristic_gamma(
    X: np.ndarray, *, sample: int = MEDIAN_SAMPLE, seed: int = MEDIAN_SEED
) -> float:
    """Default gamma: 1 / median squared pairwise distance between distinct rows of ``X``.

    Above ``sample`` rows a sample drawn with ``numpy.random.default_rng(seed)`` is used,
    so the value is reproducible.  Common practice for RBF-type kernels.
    """
    X = _as_block(X, "X")
    n = X.shape[0]
    if n < 2:
        raise InvalidInputError("median heuristic for gamma needs at least two rows")
    if n > sample:
        idx = np.sort(np.random.default_rng(seed).choice(n, size=sample, replace=False))
        X = X[idx]
    d2 = squared_distances(X, X)
    iu = np.triu_indices(X.shape[0], k=1)
    med = float(np.median(d2[iu]))
    if not med > 0.0:
        raise InvalidInputError(
            "median heuristic for gamma failed: the median squared distance between rows is 0 "
            "(most rows are identical); give gamma explicitly"
        )
    return 1.0 / med


@dataclass(frozen=True)
class Kernel:
    """Base class: subclasses set ``name`` and implement :meth:`block` and :meth:`diag`."""

    name: ClassVar[str] = "abstract"
    #: True when every Gram is positive semi-definite for valid parameters; None if unknown.
    psd: ClassVar[bool | None] = None

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        """Kernel block K(A, B), shape ``(len(A), len(B))``, float64."""
        raise NotImplementedError

    def diag(self, A: np.ndarray) -> np.ndarray:
        """Diagonal K(a, a) for each row of ``A``, shape ``(len(A),)``."""
        raise NotImplementedError

    def gram(self, A: np.ndarray) -> np.ndarray:
        """Full Gram matrix K(A, A), shape ``(n, n)``."""
        A = _as_block(A, "A")
        return self.block(A, A)

    def params(self) -> dict[str, Any]:
        """Parameters as plain data (numbers, strings, None)."""
        return {}

    def describe(self) -> dict[str, Any]:
        """``{"name": ..., "params": {...}}``; rebuild with :func:`kernel_from_description`."""
        return {"name": self.name, "params": self.params()}

    def with_defaults(self, X: np.ndarray) -> Kernel:
        """A copy with every unset parameter resolved from the training rows ``X``."""
        return self

    @property
    def is_psd(self) -> bool | None:
        """Whether Grams of this kernel are PSD for its current parameters (None: unknown)."""
        return self.psd


@dataclass(frozen=True)
class LinearKernel(Kernel):
    """K(x, z) = x·z."""

    name: ClassVar[str] = "linear"
    psd: ClassVar[bool | None] = True

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        A, B = _as_block(A, "A"), _as_block(B, "B")
        return A @ B.T

    def diag(self, A: np.ndarray) -> np.ndarray:
        A = _as_block(A, "A")
        return np.einsum("ij,ij->i", A, A)


@dataclass(frozen=True)
class _GammaKernel(Kernel):
    """Kernels with a gamma parameter; ``gamma=None`` means the median heuristic at fit time."""

    gamma: float | None = None
    gamma_source: str = "given"

    def __post_init__(self) -> None:
        _check_gamma(self.gamma, self.name)
        if self.gamma is not None:  # plain float so describe() is JSON-ready
            object.__setattr__(self, "gamma", float(self.gamma))

    def _g(self) -> float:
        if self.gamma is None:
            raise InvalidInputError(
                f"{self.name} kernel: gamma is not set; call with_defaults(X) or give gamma"
            )
        return float(self.gamma)

    def with_defaults(self, X: np.ndarray) -> Kernel:
        if self.gamma is not None:
            return self
        return replace(self, gamma=median_heuristic_gamma(X), gamma_source="median_heuristic")


@dataclass(frozen=True)
class PolynomialKernel(_GammaKernel):
    """K(x, z) = (gamma x·z + offset)^degree, degree a positive integer."""

    name: ClassVar[str] = "poly"
    degree: int = 3
    offset: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        d = self.degree
        if isinstance(d, bool) or not isinstance(d, (int, np.integer, float, np.floating)):
            raise InvalidInputError(f"poly kernel: degree must be an integer, got {d!r}")
        # isfinite first: math.floor raises on inf / nan
        if not math.isfinite(float(d)) or float(d) != math.floor(float(d)):
            raise InvalidInputError(f"poly kernel: degree must be an integer, got {d!r}")
        if int(d) < 1:
            raise InvalidInputError(f"poly kernel: degree must be >= 1, got {d!r}")
        object.__setattr__(self, "degree", int(d))
        _check_offset(self.offset, self.name)
        object.__setattr__(self, "offset", float(self.offset))

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        A, B = _as_block(A, "A"), _as_block(B, "B")
        K = A @ B.T
        K *= self._g()
        K += self.offset
        return K**self.degree if self.degree > 1 else K

    def diag(self, A: np.ndarray) -> np.ndarray:
        A = _as_block(A, "A")
        return (self._g() * np.einsum("ij,ij->i", A, A) + self.offset) ** self.degree

    def params(self) -> dict[str, Any]:
        return {"gamma": self.gamma, "gamma_source": self.gamma_source,
                "degree": self.degree, "offset": self.offset}

    @property
    def is_psd(self) -> bool | None:
        return True if self.offset >= 0.0 else None


@dataclass(frozen=True)
class RBFKernel(_GammaKernel):
    """K(x, z) = exp(-gamma ‖x − z‖²)."""

    name: ClassVar[str] = "rbf"
    psd: ClassVar[bool | None] = True

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        A, B = _as_block(A, "A"), _as_block(B, "B")
        K = squared_distances(A, B)
        K *= -self._g()
        np.exp(K, out=K)
        return K

    def diag(self, A: np.ndarray) -> np.ndarray:
        A = _as_block(A, "A")
        return np.ones(A.shape[0])

    def params(self) -> dict[str, Any]:
        return {"gamma": self.gamma, "gamma_source": self.gamma_source}


@dataclass(frozen=True)
class SigmoidKernel(_GammaKernel):
    """K(x, z) = tanh(gamma x·z + offset).  Not positive semi-definite in general."""

    name: ClassVar[str] = "sigmoid"
    psd: ClassVar[bool | None] = False
    offset: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        _check_offset(self.offset, self.name)
        object.__setattr__(self, "offset", float(self.offset))

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        A, B = _as_block(A, "A"), _as_block(B, "B")
        K = A @ B.T
        K *= self._g()
        K += self.offset
        np.tanh(K, out=K)
        return K

    def diag(self, A: np.ndarray) -> np.ndarray:
        A = _as_block(A, "A")
        return np.tanh(self._g() * np.einsum("ij,ij->i", A, A) + self.offset)

    def params(self) -> dict[str, Any]:
        return {"gamma": self.gamma, "gamma_source": self.gamma_source, "offset": self.offset}


@dataclass(frozen=True)
class CallableKernel(Kernel):
    """A user function ``func(A, B) -> (len(A), len(B)) array``; PSD-ness unknown.

    Its description names the function but cannot rebuild it: runs using it are
    reproducible only by a caller that supplies the same function.
    """

    name: ClassVar[str] = "callable"
    func: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None

    def __post_init__(self) -> None:
        if not callable(self.func):
            raise InvalidInputError("callable kernel: func must be callable (A, B) -> array")

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        A, B = _as_block(A, "A"), _as_block(B, "B")
        # a copy: callers (e.g. DualProblem.q_block) scale the block in place
        K = np.array(self.func(A, B), dtype=np.float64)
        if K.shape != (A.shape[0], B.shape[0]):
            raise InvalidInputError(
                f"callable kernel returned shape {K.shape}, expected {(A.shape[0], B.shape[0])}"
            )
        if not np.all(np.isfinite(K)):
            raise InvalidInputError("callable kernel returned non-finite values")
        return K

    def diag(self, A: np.ndarray) -> np.ndarray:
        A = _as_block(A, "A")
        return np.array([self.block(a[None, :], a[None, :])[0, 0] for a in A])

    def params(self) -> dict[str, Any]:
        f = self.func
        qualname = getattr(f, "__qualname__", repr(f))
        return {"function": f"{getattr(f, '__module__', '?')}.{qualname}"}


@dataclass(frozen=True, eq=False)
class PrecomputedKernel(Kernel):
    """Rows and columns of a given symmetric Gram matrix ``gram`` (n, n).

    Inputs are row-index columns: ``A[:, 0]`` holds integer row numbers into ``gram``
    (see :func:`solver.problem.index_features`).  Scoring new points needs their own
    kernel rows and is not supported through this class.
    """

    name: ClassVar[str] = "precomputed"
    gram_matrix: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))

    def __post_init__(self) -> None:
        G = np.ascontiguousarray(self.gram_matrix, dtype=np.float64)
        if G.ndim != 2 or G.shape[0] != G.shape[1]:
            raise InvalidInputError(f"precomputed kernel: Gram must be square, got shape {G.shape}")
        if not np.all(np.isfinite(G)):
            bad = np.argwhere(~np.isfinite(G))[0]
            raise InvalidInputError(
                f"precomputed kernel: non-finite entry at row {bad[0]}, column {bad[1]}"
            )
        G.setflags(write=False)
        object.__setattr__(self, "gram_matrix", G)

    def _idx(self, A: np.ndarray, name: str) -> np.ndarray:
        A = _as_block(A, name)
        idx = A[:, 0].astype(np.int64)
        if np.any(idx != A[:, 0]) or np.any(idx < 0) or np.any(idx >= self.gram_matrix.shape[0]):
            raise InvalidInputError(
                f"precomputed kernel: {name} must hold row indices in "
                f"[0, {self.gram_matrix.shape[0]})"
            )
        return idx

    def block(self, A: np.ndarray, B: np.ndarray) -> np.ndarray:
        return self.gram_matrix[np.ix_(self._idx(A, "A"), self._idx(B, "B"))]

    def diag(self, A: np.ndarray) -> np.ndarray:
        i = self._idx(A, "A")
        return self.gram_matrix[i, i]

    def params(self) -> dict[str, Any]:
        digest = hashlib.sha256(self.gram_matrix.tobytes()).hexdigest()
        return {"n": int(self.gram_matrix.shape[0]), "gram_sha256": digest}


#: Registry of kernels that can be built from a name and plain parameters.
KERNELS: dict[str, type[Kernel]] = {
    k.name: k for k in (LinearKernel, PolynomialKernel, RBFKernel, SigmoidKernel)
}


def make_kernel(name: str, /, **params: Any) -> Kernel:
    """Build a registered kernel by name (``linear``, ``poly``, ``rbf``, ``sigmoid``).

    Unknown names or parameters raise :class:`InvalidInputError` naming the problem.
    """
    cls = KERNELS.get(name)
    if cls is None:
        raise InvalidInputError(
            f"unknown kernel {name!r}; choose one of {', '.join(sorted(KERNELS))}"
        )
    allowed = {f.name for f in fields(cls)}  # excludes the ClassVars name / psd
    unknown = sorted(set(params) - allowed)
    if unknown:
        raise InvalidInputError(
            f"{name} kernel does not take parameter(s) {', '.join(unknown)}; "
            f"it takes {', '.join(sorted(allowed)) or 'none'}"
        )
    return cls(**params)


def kernel_from_description(desc: Mapping[str, Any]) -> Kernel:
    """Rebuild a kernel from :meth:`Kernel.describe` output (registered kernels only)."""
    if not isinstance(desc, Mapping) or "name" not in desc:
        raise InvalidInputError(f"kernel description must be a mapping with a name, got {desc!r}")
    params = dict(desc.get("params") or {})
    return make_kernel(str(desc["name"]), **params)
