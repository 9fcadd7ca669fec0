"""Kernel audit and the explicit polynomial feature map."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from sklearn.metrics import pairwise as skp

from solver.audit import (
    audit_kernel,
    monomial_count,
    monomial_names,
    polynomial_feature_map,
)
from solver.errors import InvalidInputError
from solver.kernels import (
    CallableKernel,
    LinearKernel,
    PolynomialKernel,
    PrecomputedKernel,
    RBFKernel,
    SigmoidKernel,
)
from solver.problem import index_features

# ------------------------------------------------------------------------ feature map


def test_degree2_map_is_the_textbook_six_features(rng):
    # Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., §12.3.1
    # (section number from memory): (1 + x·z)² in two inputs has the six features
    # 1, √2x₁, √2x₂, x₁², x₂², √2x₁x₂.  Our map orders them 1, x1, x2, x1², x1·x2, x2².
    X = rng.normal(size=(9, 2))
    fm = polynomial_feature_map(X, gamma=1.0, offset=1.0, degree=2)
    r2 = math.sqrt(2.0)
    x1, x2 = X[:, 0], X[:, 1]
    textbook = np.column_stack([np.ones(9), r2 * x1, r2 * x2, x1**2, r2 * x1 * x2, x2**2])
    np.testing.assert_allclose(fm.features, textbook, rtol=1e-15, atol=1e-15)
    np.testing.assert_array_equal(fm.weights, [1, 2, 2, 1, 2, 1])
    assert fm.names(["x1", "x2"]) == ["1", "x1", "x2", "x1^2", "x1·x2", "x2^2"]


@settings(derandomize=True, max_examples=60, deadline=None)
@given(
    shape=st.tuples(st.integers(1, 6), st.integers(1, 4)),
    degree=st.integers(1, 3),
    gamma=st.floats(0.05, 2.0),
    offset=st.floats(0.0, 3.0),
    data=st.data(),
)
def test_general_map_reproduces_kernel(shape, degree, gamma, offset, data):
    """φ(x)·φ(z) = (γ x·z + c)^p for degree ≤ 3, dimension ≤ 4 (binomial + multinomial
    theorem; checked against scikit-learn's polynomial_kernel as the reference)."""
    X = data.draw(arrays(np.float64, shape, elements=st.floats(-3, 3, width=64)))
    fm = polynomial_feature_map(X, gamma=gamma, offset=offset, degree=degree)
    K = skp.polynomial_kernel(X, X, degree=degree, gamma=gamma, coef0=offset)
    scale = max(1.0, float(np.max(np.abs(K))))
    assert np.max(np.abs(fm.features @ fm.features.T - K)) <= 1e-12 * scale
    assert np.all(fm.weights >= 0)  # > 0 mathematically; a tiny offset can underflow c^p to 0
    assert fm.n_terms == monomial_count(shape[1], degree, offset_positive=offset > 0)


def test_monomial_count_is_stars_and_bars():
    # number of monomials of degree ≤ p in d variables: C(d + p, p) (stars and bars,
    # common combinatorics); of degree exactly p: C(d + p − 1, p)
    for d in range(1, 5):
        for p in range(1, 4):
            E = polynomial_feature_map(np.ones((1, d)), gamma=1.0, offset=1.0, degree=p).exponents
            assert E.shape == (math.comb(d + p, p), d)
            assert len({tuple(e) for e in E}) == E.shape[0]  # no repeats
            H = polynomial_feature_map(np.ones((1, d)), gamma=1.0, offset=0.0, degree=p).exponents
            assert H.shape[0] == math.comb(d + p - 1, p) and np.all(H.sum(axis=1) == p)


def test_weights_hand_computed():
    # (γ x·z + c)³ in one variable: c³ + 3c²γ xz + 3cγ² x²z² + γ³ x³z³
    fm = polynomial_feature_map(np.array([[2.0]]), gamma=0.5, offset=2.0, degree=3)
    np.testing.assert_allclose(fm.weights, [8.0, 3 * 4 * 0.5, 3 * 2 * 0.25, 0.125])
    np.testing.assert_allclose(fm.features[0] ** 2, fm.weights * np.array([1, 2, 4, 8]) ** 2)
    assert fm.names(["t"]) == ["1", "t", "t^2", "t^3"]


def test_monomial_names():
    E = np.array([[0, 0, 0], [1, 0, 0], [2, 0, 0], [1, 1, 0], [0, 1, 2]])
    names = ["thickness", "moisture", "hardness"]
    assert monomial_names(E, names) == ["1", "thickness", "thickness^2", "thickness·moisture",
                                        "moisture·hardness^2"]
    assert monomial_names(E) == ["1", "col1", "col1^2", "col1·col2", "col2·col3^2"]
    with pytest.raises(InvalidInputError, match="2 feature names given for 3"):
        monomial_names(E, names[:2])
    with pytest.raises(InvalidInputError, match="non-negative integers"):
        monomial_names(np.array([[0.5]]))


def test_feature_map_errors():
    X = np.ones((2, 3))
    with pytest.raises(InvalidInputError, match="offset >= 0"):
        polynomial_feature_map(X, gamma=1.0, offset=-0.5, degree=2)
    with pytest.raises(InvalidInputError, match="gamma"):
        polynomial_feature_map(X, gamma=0.0, offset=1.0, degree=2)
    with pytest.raises(InvalidInputError, match="degree"):
        polynomial_feature_map(X, gamma=1.0, offset=1.0, degree=1.5)
    with pytest.raises(InvalidInputError, match="56 monomials.*limit of 50"):
        polynomial_feature_map(np.ones((2, 5)), gamma=1.0, offset=1.0, degree=3, max_terms=50)
    with pytest.raises(InvalidInputError, match="316251 monomials"):
        polynomial_feature_map(np.ones((1, 50)), gamma=1.0, offset=1.0, degree=4)
    with pytest.raises(InvalidInputError, match="non-finite"):
        polynomial_feature_map(np.array([[np.nan]]), gamma=1.0, offset=1.0, degree=2)


# ---------------------------------------------------------------------------- audit


def test_audit_rbf(rng):
    X = rng.normal(size=(60, 3))
    a = audit_kernel(RBFKernel(gamma=0.5), X)
    assert a.psd and a.declared_psd is True and a.psd_scope == "all_rows"
    assert a.symmetric and a.symmetry_error <= 1e-15
    assert (a.diag_min, a.diag_max) == (1.0, 1.0)
    assert a.diag_error <= 1e-15  # exp(−γ·d²) with d² of a row to itself rounded near 0
    assert a.sample_size == 60 and not a.sampled
    # eigenvalues agree with numpy on scikit-learn's reference Gram
    lam = np.linalg.eigvalsh(skp.rbf_kernel(X, gamma=0.5))
    assert a.min_eigenvalue == pytest.approx(lam[0], rel=1e-8, abs=1e-12)
    assert a.max_eigenvalue == pytest.approx(lam[-1], rel=1e-12)
    assert a.condition == pytest.approx(lam[-1] / lam[0], rel=1e-6)
    assert a.psd_tol == pytest.approx(60 * np.finfo(float).eps * lam[-1])
    assert a.feature_map_terms is None
    d = a.to_dict()
    assert json.loads(json.dumps(d)) == d


def test_audit_linear_low_rank_is_singular_not_indefinite(rng):
    X = rng.normal(size=(40, 3))  # rank-3 Gram of 40 points: 37 zero eigenvalues
    a = audit_kernel(LinearKernel(), X)
    assert a.psd and a.n_negative == 0
    assert math.isinf(a.condition) and a.to_dict()["condition"] is None
    assert a.to_dict()["numerically_singular"] is True


def test_audit_polynomial_feature_map(rng):
    X = rng.normal(size=(30, 2))
    a = audit_kernel(PolynomialKernel(gamma=0.5, degree=2, offset=1.0), X,
                     feature_names=["thickness", "moisture"])
    assert a.feature_map_matches is True and a.feature_map_error <= 1e-13
    assert a.feature_map_terms == ("1", "thickness", "moisture", "thickness^2",
                                   "thickness·moisture", "moisture^2")
    np.testing.assert_allclose(a.feature_map_weights, [1, 1, 1, 0.25, 0.5, 0.25])
    # skipped, with the reason, when the dimension or degree is too high or offset < 0
    hi = audit_kernel(PolynomialKernel(gamma=0.1, degree=2, offset=1.0), rng.normal(size=(5, 11)))
    assert hi.feature_map_terms is None and "11" in hi.notes[0]
    neg = audit_kernel(PolynomialKernel(gamma=0.1, degree=3, offset=-1.0), X)
    assert neg.feature_map_terms is None and "offset < 0" in neg.notes[0]


def test_audit_sampling_is_seeded(rng):
    X = rng.normal(size=(300, 2))
    a = audit_kernel(RBFKernel(gamma=1.0), X, sample=50, seed=3)
    b = audit_kernel(RBFKernel(gamma=1.0), X, sample=50, seed=3)
    c = audit_kernel(RBFKernel(gamma=1.0), X, sample=50, seed=4)
    assert a.sampled and a.sample_size == 50 and a.psd_scope == "sample" and a.n_rows == 300
    assert a.to_dict() == b.to_dict() and a.min_eigenvalue != c.min_eigenvalue
    assert "50 of 300 rows" in a.notes[0]


def test_audit_resolves_default_gamma(rng):
    X = rng.normal(size=(20, 2))
    a = audit_kernel(RBFKernel(), X)
    assert a.kernel["params"]["gamma_source"] == "median_heuristic"


def test_audit_flags_asymmetric_precomputed_gram():
    G = np.array([[2.0, 1.0, 0.0], [1.0, 2.0, 1.0], [0.0, 1.0 + 1e-6, 2.0]])
    a = audit_kernel(PrecomputedKernel(gram_matrix=G), index_features(3))
    assert a.symmetry_error == pytest.approx(1e-6) and not a.symmetric
    # eigenvalues of the symmetrised tridiagonal matrix 2 ± √2·(1 + 5e-7), 2 (closed form
    # for the tridiagonal Toeplitz [1, 2, 1] matrix: 2 + 2cos(kπ/4), k = 1, 2, 3)
    assert a.min_eigenvalue == pytest.approx(2 - math.sqrt(1 + (1 + 5e-7) ** 2), rel=1e-12)
    assert a.psd


def test_audit_flags_indefinite_sigmoid_two_points():
    """Constructed example (explained here, not taken from a source).

    1-D points x = 1 and z = 2, gamma = 1, offset = 0: K = [[tanh 1, tanh 2],
    [tanh 2, tanh 4]].  A PSD 2×2 matrix needs K₁₁K₂₂ ≥ K₁₂², but
    tanh(1)·tanh(4) ≈ 0.7611 < tanh(2)² ≈ 0.9293: tanh saturates, so the off-diagonal entry
    outgrows the geometric mean of the diagonal.  The determinant is negative, so one
    eigenvalue is negative: (a + c)/2 − √(((a − c)/2)² + b²).
    """
    a_, b_, c_ = math.tanh(1.0), math.tanh(2.0), math.tanh(4.0)
    assert a_ * c_ - b_**2 < -0.16
    lam_min = (a_ + c_) / 2 - math.sqrt(((a_ - c_) / 2) ** 2 + b_**2)
    au = audit_kernel(SigmoidKernel(gamma=1.0, offset=0.0), np.array([[1.0], [2.0]]))
    assert not au.psd and au.n_negative == 1 and au.declared_psd is False
    assert au.min_eigenvalue == pytest.approx(lam_min, rel=1e-12)
    assert au.min_eigenvalue < -0.08


@settings(derandomize=True, max_examples=40, deadline=None)
@given(gamma=st.floats(0.01, 5.0), offset=st.floats(-5.0, -0.05),
       X=arrays(np.float64, (4, 2), elements=st.floats(-2, 2, width=64)))
def test_audit_flags_sigmoid_with_negative_offset(gamma, offset, X):
    """With offset r < 0, K(0, 0) = tanh(r) < 0, but a PSD kernel has K(x, x) = ‖φ(x)‖² ≥ 0:
    adding the origin to any data set makes the sigmoid Gram indefinite (its smallest
    eigenvalue is ≤ the smallest diagonal entry, Rayleigh quotient)."""
    Xo = np.vstack([X, np.zeros((1, 2))])
    au = audit_kernel(SigmoidKernel(gamma=gamma, offset=offset), Xo)
    assert not au.psd
    assert au.min_eigenvalue <= math.tanh(offset) + 1e-12
    assert au.diag_min <= math.tanh(offset) + 1e-15


def test_audit_checks_diag_consistency_of_callable():
    # a user kernel whose diag from 1×1 blocks equals the Gram diagonal: error 0
    k = CallableKernel(func=lambda A, B: skp.laplacian_kernel(A, B, gamma=0.3))
    a = audit_kernel(k, np.arange(10.0).reshape(5, 2))
    assert a.diag_error == 0.0 and a.declared_psd is None and a.psd


def test_audit_input_errors():
    with pytest.raises(InvalidInputError, match="non-finite"):
        audit_kernel(LinearKernel(), np.array([[np.inf]]))
    with pytest.raises(InvalidInputError, match="non-empty"):
        audit_kernel(LinearKernel(), np.zeros((0, 2)))
    with pytest.raises(InvalidInputError, match="sample"):
        audit_kernel(LinearKernel(), np.ones((2, 2)), sample=0)
    with pytest.raises(InvalidInputError, match="psd_tol"):
        audit_kernel(LinearKernel(), np.ones((2, 2)), psd_tol=-1.0)


def test_explicit_psd_tol_used(rng):
    X = rng.normal(size=(10, 2))
    a = audit_kernel(SigmoidKernel(gamma=1.0, offset=0.0), np.array([[1.0], [2.0]]), psd_tol=1.0)
    assert a.psd_tol == 1.0 and a.psd  # the caller's (loose) tolerance is applied and reported
    assert audit_kernel(LinearKernel(), X, psd_tol=0.0).psd_tol == 0.0


def test_default_sample_is_smaller_for_kernels_psd_by_theorem():
    """The eigenvalue check's cost does not grow with n: 800 rows for kernels PSD by
    theorem (RBF: Schoenberg's theorem, common practice), 2000 rows otherwise (sigmoid)."""
    from solver.audit import AUDIT_SAMPLE, AUDIT_SAMPLE_KNOWN_PSD

    X = np.random.default_rng(3).standard_normal((1500, 3))
    rbf = audit_kernel(RBFKernel(gamma=0.5), X)
    assert rbf.sampled and rbf.sample_size == AUDIT_SAMPLE_KNOWN_PSD == 800
    sig = audit_kernel(SigmoidKernel(gamma=0.5, offset=-1.0), X)
    assert not sig.sampled and sig.sample_size == 1500 < AUDIT_SAMPLE
