"""Kernel audit and the explicit polynomial feature map.

:func:`audit_kernel` checks a kernel on the training rows: symmetry of its Gram matrix,
the smallest and largest eigenvalue (on a seeded sample above a size threshold) with a
positive semi-definiteness (PSD) verdict and the tolerance used, the diagonal range, a
rough conditioning indicator and, for low-dimensional polynomial kernels with offset ≥ 0,
the explicit feature map with the check φ(x)·φ(z) = K(x, z).

:func:`polynomial_feature_map` expands (gamma x·z + offset)^degree into monomials.  With
p = degree, c = offset, γ = gamma and the binomial and multinomial theorems,

    (γ x·z + c)^p = Σ_{k=0..p} C(p, k) c^{p−k} γ^k (x·z)^k,
    (x·z)^k       = Σ_{|e|=k} k!/(e₁!⋯e_d!) Π_j (x_j z_j)^{e_j},

so K(x, z) = Σ_e w_e m_e(x) m_e(z) with monomials m_e(x) = Π_j x_j^{e_j} (|e| ≤ p) and
weights w_e = p! / ((p−|e|)! e₁!⋯e_d!) · c^{p−|e|} γ^{|e|}, all ≥ 0 when c ≥ 0; the feature
map is φ_e(x) = √w_e · m_e(x).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from itertools import combinations_with_replacement
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .kernels import Kernel, PolynomialKernel, PrecomputedKernel

__all__ = [
    "KernelAudit",
    "PolynomialFeatureMap",
    "audit_kernel",
    "polynomial_feature_map",
    "monomial_names",
    "monomial_count",
    "AUDIT_SAMPLE",
    "AUDIT_SAMPLE_KNOWN_PSD",
    "FEATURE_MAP_MAX_TERMS",
    "AUDIT_MAP_MAX_DEGREE",
    "AUDIT_MAP_MAX_DIM",
]

#: Rows used for the eigenvalue check when X has more rows (seeded sample), for kernels
#: whose Grams are not known to be PSD (sigmoid, polynomial with offset < 0, precomputed,
#: callable): there a negative eigenvalue is the finding, and a larger sample finds more.
AUDIT_SAMPLE = 2000
#: The same for kernels whose Grams are PSD by theorem (linear, RBF, polynomial with
#: offset ≥ 0): the eigenvalue check then only guards the implementation and measures the
#: spectrum's spread, for which a smaller sample suffices.  Cost: one eigh of this size,
#: O(sample³) — about 6 % of the 2000-row one — whatever n is.
AUDIT_SAMPLE_KNOWN_PSD = 800
#: polynomial_feature_map refuses more monomials than this by default.
FEATURE_MAP_MAX_TERMS = 5000
#: The audit builds the explicit map only up to this degree and dimension.
AUDIT_MAP_MAX_DEGREE = 3
AUDIT_MAP_MAX_DIM = 10
#: Relative tolerance for the feature-map check max|ΦΦᵀ − K| ≤ tol · max(1, max|K|).
FEATURE_MAP_RTOL = 1e-9

_EPS = float(np.finfo(np.float64).eps)


# ------------------------------------------------------------------- feature map


@dataclass(frozen=True, eq=False)
class PolynomialFeatureMap:
    """Explicit feature map of K(x, z) = (gamma x·z + offset)^degree.

    features : (n, m) float64, ``features[:, k] = sqrt(weights[k]) · Π_j X[:, j]**exponents[k, j]``,
        so ``features @ features.T`` is the Gram matrix.
    exponents : (m, d) int64 exponent of each feature in each monomial, ordered by total
        degree, then with earlier features first (1, x1, x2, x1², x1·x2, x2², …).
    weights : (m,) float64 multinomial coefficient × offset and gamma powers (≥ 0; the
        monomials of degree < degree, whose weight is exactly 0 when offset = 0, are left
        out then; a tiny positive offset may underflow some weights to 0).
    """

    features: np.ndarray
    exponents: np.ndarray
    weights: np.ndarray
    gamma: float
    offset: float
    degree: int

    @property
    def n_terms(self) -> int:
        """Number of monomials m."""
        return int(self.exponents.shape[0])

    def names(self, feature_names: Sequence[str] | None = None) -> list[str]:
        """Readable monomial names (see :func:`monomial_names`)."""
        return monomial_names(self.exponents, feature_names)


def monomial_count(n_features: int, degree: int, *, offset_positive: bool = True) -> int:
    """Number of monomials in the map: C(d + p, p) with a positive offset, else C(d + p − 1, p)."""
    if offset_positive:
        return math.comb(n_features + degree, degree)
    return math.comb(n_features + degree - 1, degree)


def _exponents(d: int, degree: int, offset_positive: bool) -> np.ndarray:
    rows = []
    for k in range(0 if offset_positive else degree, degree + 1):
        for combo in combinations_with_replacement(range(d), k):
            e = np.zeros(d, dtype=np.int64)
            for j in combo:
                e[j] += 1
            rows.append(e)
    return np.array(rows, dtype=np.int64).reshape(len(rows), d)


def polynomial_feature_map(
    X: np.ndarray,
    *,
    gamma: float,
    offset: float,
    degree: int,
    max_terms: int = FEATURE_MAP_MAX_TERMS,
) -> PolynomialFeatureMap:
    """Explicit features φ(x) of rows ``X`` (n, d) with φ(x)·φ(z) = (gamma x·z + offset)^degree.

    Needs ``offset ≥ 0``: with a negative offset some weights c^{p−k} are negative and no
    real feature map of this form exists (the kernel need not be PSD).  Refuses maps with
    more than ``max_terms`` monomials (C(d + p, p) of them).
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[None, :]
    if X.ndim != 2:
        raise InvalidInputError(f"feature map: X must be 2-D (rows, features), got {X.shape}")
    if not np.all(np.isfinite(X)):
        raise InvalidInputError("feature map: X has non-finite values")
    # the kernel class validates gamma, degree and offset with the usual messages
    k = PolynomialKernel(gamma=gamma, degree=degree, offset=offset)
    g, c, p = float(k.gamma), float(k.offset), int(k.degree)
    if c < 0.0:
        raise InvalidInputError(
            f"feature map needs offset >= 0, got {offset!r}: with a negative offset some "
            "monomial weights are negative and no real feature map of this form exists"
        )
    d = X.shape[1]
    m = monomial_count(d, p, offset_positive=c > 0.0)
    if m > max_terms:
        raise InvalidInputError(
            f"feature map would have {m} monomials for {d} features at degree {p}, "
            f"above the limit of {max_terms}; use fewer features or a lower degree"
        )
    E = _exponents(d, p, c > 0.0)
    tot = E.sum(axis=1)
    fact = np.array([math.factorial(int(v)) for v in range(p + 1)], dtype=np.float64)
    # w_e = p!/((p−|e|)! Π e_j!) · c^{p−|e|} γ^{|e|}   (module docstring)
    multinom = math.factorial(p) / (fact[p - tot] * np.prod(fact[E], axis=1))
    weights = multinom * np.power(c, p - tot) * np.power(g, tot)
    powers = [np.ones_like(X)] + [X**e for e in range(1, p + 1)]  # powers[e][:, j] = X_j^e
    F = np.empty((X.shape[0], E.shape[0]), dtype=np.float64)
    for t, e in enumerate(E):
        col = np.sqrt(weights[t]) * np.ones(X.shape[0])
        for j in np.flatnonzero(e):
            col = col * powers[e[j]][:, j]
        F[:, t] = col
    return PolynomialFeatureMap(
        features=F, exponents=E, weights=weights, gamma=g, offset=c, degree=p
    )


def monomial_names(exponents: np.ndarray, feature_names: Sequence[str] | None = None) -> list[str]:
    """Readable names of monomials: ``"1"``, ``"thickness"``, ``"thickness^2"``,
    ``"thickness·moisture"``.

    exponents : (m, d) non-negative integers; feature_names : d names (default col1, …).
    """
    E = np.asarray(exponents)
    if E.ndim != 2 or (E.size and (E.dtype.kind not in "iu" or np.any(E < 0))):
        raise InvalidInputError("exponents must be a 2-D array of non-negative integers")
    d = E.shape[1]
    names = [f"col{j + 1}" for j in range(d)] if feature_names is None else list(feature_names)
    if len(names) != d:
        raise InvalidInputError(f"{len(names)} feature names given for {d} exponent columns")
    out = []
    for e in E:
        parts = [names[j] if e[j] == 1 else f"{names[j]}^{int(e[j])}" for j in np.flatnonzero(e)]
        out.append("·".join(parts) if parts else "1")
    return out


# ------------------------------------------------------------------------- audit


@dataclass(frozen=True, eq=False)
class KernelAudit:
    """Findings of :func:`audit_kernel`; values in kernel units unless stated.

    Attributes
    ----------
    kernel : the kernel's plain-data description (defaults resolved).
    n_rows : rows of X; sample_size : rows used for the Gram checks; sampled : whether
        that is a seeded sample (``seed``) rather than all rows.
    symmetry_error : max |K − Kᵀ| on the sample; symmetric : symmetry_error ≤ psd_tol.
    min_eigenvalue, max_eigenvalue : extreme eigenvalues of the symmetrised sample Gram
        (K + Kᵀ)/2 (numpy.linalg.eigvalsh, LAPACK's symmetric eigensolver; scipy is
        not imported, so a run does not pay for loading it).
    psd_tol : tolerance of the PSD verdict (default sample_size · eps · max|λ|).
    psd : min_eigenvalue ≥ −psd_tol.  On a sample, "not PSD" is conclusive for the full
        Gram (Cauchy interlacing: a principal submatrix's smallest eigenvalue is ≥ the full
        matrix's); "PSD" holds for the sample only (``psd_scope``).
    n_negative : eigenvalues below −psd_tol.
    declared_psd : what the kernel type promises (True, False or None for unknown).
    diag_min, diag_max : range of K(x, x) over all rows.
    diag_error : max |kernel.diag(x) − K(x, x) from blocks| on the sample.
    condition : λmax / λmin when λmin > psd_tol, else inf (numerically singular).
    feature_map_terms : monomial names of the explicit map, ``feature_map_weights`` their
        weights, ``feature_map_error`` max |φ(x)·φ(z) − K(x, z)| on the sample,
        ``feature_map_matches`` error ≤ 1e-9 · max(1, max|K|); all None when the map was
        not built (``notes`` says why).
    notes : plain-language remarks (sampling, skipped checks).
    """

    kernel: dict[str, Any]
    n_rows: int
    sample_size: int
    sampled: bool
    seed: int
    symmetry_error: float
    symmetric: bool
    min_eigenvalue: float
    max_eigenvalue: float
    psd_tol: float
    psd: bool
    psd_scope: str
    n_negative: int
    declared_psd: bool | None
    diag_min: float
    diag_max: float
    diag_error: float
    condition: float
    feature_map_terms: tuple[str, ...] | None = None
    feature_map_weights: tuple[float, ...] | None = None
    feature_map_error: float | None = None
    feature_map_matches: bool | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready data; a non-finite ``condition`` becomes None."""
        return {
            "kernel": self.kernel,
            "n_rows": self.n_rows,
            "sample_size": self.sample_size,
            "sampled": self.sampled,
            "seed": self.seed,
            "symmetry_error": self.symmetry_error,
            "symmetric": self.symmetric,
            "min_eigenvalue": self.min_eigenvalue,
            "max_eigenvalue": self.max_eigenvalue,
            "psd_tol": self.psd_tol,
            "psd": self.psd,
            "psd_scope": self.psd_scope,
            "n_negative": self.n_negative,
            "declared_psd": self.declared_psd,
            "diag_min": self.diag_min,
            "diag_max": self.diag_max,
            "diag_error": self.diag_error,
            "condition": self.condition if math.isfinite(self.condition) else None,
            "numerically_singular": not math.isfinite(self.condition),
            "feature_map_terms": (
                None if self.feature_map_terms is None else list(self.feature_map_terms)
            ),
            "feature_map_weights": (
                None if self.feature_map_weights is None else list(self.feature_map_weights)
            ),
            "feature_map_error": self.feature_map_error,
            "feature_map_matches": self.feature_map_matches,
            "notes": list(self.notes),
        }


def audit_kernel(
    kernel: Kernel,
    X: np.ndarray,
    *,
    sample: int | None = None,
    seed: int = 0,
    psd_tol: float | None = None,
    feature_names: Sequence[str] | None = None,
) -> KernelAudit:
    """Audit ``kernel`` on rows ``X`` (n, d) (for a precomputed kernel, row-index columns).

    Above ``sample`` rows the Gram checks use ``sample`` rows drawn without replacement with
    ``numpy.random.default_rng(seed)``; memory O(sample²), time O(sample³) for eigh.
    ``sample`` None: :data:`AUDIT_SAMPLE_KNOWN_PSD` for kernels PSD by theorem, else
    :data:`AUDIT_SAMPLE`.
    ``feature_names`` label the monomials of the polynomial feature map.
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2 or X.shape[0] < 1:
        raise InvalidInputError(f"audit: X must be a non-empty 2-D array, got shape {X.shape}")
    if not np.all(np.isfinite(X)):
        raise InvalidInputError("audit: X has non-finite values")
    if sample is None:
        sample = AUDIT_SAMPLE_KNOWN_PSD if kernel.is_psd is True else AUDIT_SAMPLE
    if isinstance(sample, bool) or not isinstance(sample, (int, np.integer)) or sample < 1:
        raise InvalidInputError(f"audit: sample must be a positive integer, got {sample!r}")
    if psd_tol is not None and not (math.isfinite(float(psd_tol)) and float(psd_tol) >= 0):
        raise InvalidInputError(f"audit: psd_tol must be finite and >= 0, got {psd_tol!r}")
    if not isinstance(kernel, PrecomputedKernel):
        kernel = kernel.with_defaults(X)
    n = X.shape[0]
    notes: list[str] = []
    if n > sample:
        idx = np.sort(np.random.default_rng(seed).choice(n, size=int(sample), replace=False))
        Xs = X[idx]
        notes.append(
            f"Gram checks on a seeded sample of {sample} of {n} rows (seed {seed}); a PSD "
            "verdict holds for the sample, a negative eigenvalue holds for all rows"
        )
    else:
        Xs = X
    K = kernel.block(Xs, Xs)
    m = Xs.shape[0]
    sym_err = float(np.max(np.abs(K - K.T)))
    lam = np.linalg.eigvalsh(0.5 * (K + K.T))
    lam_min, lam_max = float(lam[0]), float(lam[-1])
    scale = float(np.max(np.abs(lam)))
    # eigh is backward stable: computed eigenvalues are exact for a matrix within
    # O(m·eps·‖K‖₂) of K (e.g. Golub & Van Loan, Matrix Computations, ch. 8 — from memory)
    tol = m * _EPS * scale if psd_tol is None else float(psd_tol)
    diag_sample = np.diag(K)
    diag_kernel = kernel.diag(Xs)
    diag_err = float(np.max(np.abs(diag_kernel - diag_sample)))
    diag_all = kernel.diag(X) if n > m else diag_kernel
    condition = lam_max / lam_min if lam_min > tol else math.inf
    fm_terms = fm_weights = fm_err = fm_ok = None
    if isinstance(kernel, PolynomialKernel):
        d = X.shape[1]
        if kernel.offset < 0:
            notes.append("explicit feature map skipped: offset < 0 (no real map of this form)")
        elif kernel.degree > AUDIT_MAP_MAX_DEGREE or d > AUDIT_MAP_MAX_DIM:
            notes.append(
                f"explicit feature map skipped: built only for degree <= {AUDIT_MAP_MAX_DEGREE} "
                f"and at most {AUDIT_MAP_MAX_DIM} features (here degree {kernel.degree}, {d})"
            )
        else:
            fmap = polynomial_feature_map(
                Xs, gamma=float(kernel.gamma), offset=kernel.offset, degree=kernel.degree
            )
            fm_err = float(np.max(np.abs(fmap.features @ fmap.features.T - K)))
            fm_ok = fm_err <= FEATURE_MAP_RTOL * max(1.0, float(np.max(np.abs(K))))
            fm_terms = tuple(fmap.names(feature_names))
            fm_weights = tuple(float(w) for w in fmap.weights)
    return KernelAudit(
        kernel=kernel.describe(), n_rows=n, sample_size=m, sampled=n > m, seed=int(seed),
        symmetry_error=sym_err, symmetric=sym_err <= tol, min_eigenvalue=lam_min,
        max_eigenvalue=lam_max, psd_tol=tol, psd=lam_min >= -tol,
        psd_scope="sample" if n > m else "all_rows", n_negative=int(np.sum(lam < -tol)),
        declared_psd=kernel.is_psd, diag_min=float(np.min(diag_all)),
        diag_max=float(np.max(diag_all)), diag_error=diag_err, condition=condition,
        feature_map_terms=fm_terms, feature_map_weights=fm_weights,
        feature_map_error=fm_err, feature_map_matches=fm_ok, notes=tuple(notes),
    )
