"""Kernels: agreement with scikit-learn's pairwise kernels, the degree-2 feature-map identity,
symmetry / PSD properties, parameter validation, descriptions and the median heuristic."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from sklearn.metrics import pairwise as skp

from solver.errors import InvalidInputError
from solver.kernels import (
    KERNELS,
    CallableKernel,
    LinearKernel,
    PolynomialKernel,
    PrecomputedKernel,
    RBFKernel,
    SigmoidKernel,
    kernel_from_description,
    make_kernel,
    median_heuristic_gamma,
)
from solver.problem import index_features

EPS = np.finfo(np.float64).eps


def assert_rel_close(K: np.ndarray, ref: np.ndarray, rtol: float = 1e-12) -> None:
    """max |K − ref| ≤ rtol · max |ref|: relative to the block's scale (entries near a
    sign change of x·z have no meaningful elementwise relative error)."""
    assert K.shape == ref.shape
    assert np.max(np.abs(K - ref)) <= rtol * np.max(np.abs(ref))


# ------------------------------------------------------------ scikit-learn reference
# Reference: scikit-learn's sklearn.metrics.pairwise kernels (general-purpose library).
# Their polynomial/sigmoid constant term is their keyword coef0; our name is offset.

@pytest.fixture
def blocks(rng):
    A = rng.normal(size=(37, 6))
    B = rng.normal(size=(23, 6)) * 1.5
    return A, B


@pytest.mark.parametrize("gamma,degree,offset", [(0.3, 2, 1.0), (0.1, 3, 0.0), (1.0, 4, 2.5),
                                                 (0.05, 3, -0.7), (2.0, 1, 0.0)])
def test_poly_matches_sklearn(blocks, gamma, degree, offset):
    A, B = blocks
    K = PolynomialKernel(gamma=gamma, degree=degree, offset=offset).block(A, B)
    ref = skp.polynomial_kernel(A, B, degree=degree, gamma=gamma, coef0=offset)
    assert_rel_close(K, ref)


def test_linear_matches_sklearn(blocks):
    A, B = blocks
    assert_rel_close(LinearKernel().block(A, B), skp.linear_kernel(A, B))


@pytest.mark.parametrize("gamma", [1e-3, 0.17, 1.0, 4.0])
def test_rbf_matches_sklearn(blocks, gamma):
    A, B = blocks
    assert_rel_close(RBFKernel(gamma=gamma).block(A, B), skp.rbf_kernel(A, B, gamma=gamma))


@pytest.mark.parametrize("gamma,offset", [(0.1, 0.0), (0.5, -1.0), (0.02, 2.0)])
def test_sigmoid_matches_sklearn(blocks, gamma, offset):
    A, B = blocks
    K = SigmoidKernel(gamma=gamma, offset=offset).block(A, B)
    assert_rel_close(K, skp.sigmoid_kernel(A, B, gamma=gamma, coef0=offset))


def test_precomputed_matches_given_gram(rng):
    X = rng.normal(size=(30, 4))
    G = skp.rbf_kernel(X, gamma=0.4)  # reference Gram from scikit-learn
    k = PrecomputedKernel(gram_matrix=G)
    rows, cols = np.array([3, 0, 29, 7]), np.arange(10, 20)
    K = k.block(index_features(30)[rows], index_features(30)[cols])
    np.testing.assert_array_equal(K, G[np.ix_(rows, cols)])
    np.testing.assert_array_equal(k.diag(index_features(30)), np.diag(G))
    K[:] = -1.0  # a block is a copy: scaling it in place leaves the Gram intact
    assert np.array_equal(k.gram_matrix, G)


def test_callable_matches_its_function_and_sklearn(blocks):
    A, B = blocks

    def laplacian(P, R):  # reference: scikit-learn's laplacian_kernel
        return skp.laplacian_kernel(P, R, gamma=0.2)

    k = CallableKernel(func=laplacian)
    assert_rel_close(k.block(A, B), skp.laplacian_kernel(A, B, gamma=0.2))
    np.testing.assert_allclose(k.diag(A), 1.0)
    assert k.is_psd is None
    assert "laplacian" in k.describe()["params"]["function"]


def test_callable_block_is_a_copy():
    store = np.arange(9.0).reshape(3, 3)
    k = CallableKernel(func=lambda P, R: store)  # returns the same array every call
    K = k.block(np.zeros((3, 1)), np.zeros((3, 1)))
    K *= -1.0
    assert store[1, 1] == 4.0  # the user's array was not modified


def test_callable_shape_and_finiteness_checked():
    with pytest.raises(InvalidInputError, match="shape"):
        CallableKernel(func=lambda P, R: np.zeros((1, 1))).block(np.zeros((2, 1)), np.zeros((3, 1)))
    with pytest.raises(InvalidInputError, match="non-finite"):
        CallableKernel(func=lambda P, R: np.full((len(P), len(R)), np.nan)).block(
            np.zeros((2, 1)), np.zeros((2, 1)))
    with pytest.raises(InvalidInputError, match="callable"):
        CallableKernel(func=3)


@pytest.mark.parametrize("kernel", [LinearKernel(), PolynomialKernel(gamma=0.3, degree=3, offset=1),
                                    RBFKernel(gamma=0.5), SigmoidKernel(gamma=0.2, offset=-0.3)])
def test_diag_equals_gram_diagonal(rng, kernel):
    X = rng.normal(size=(15, 3))
    np.testing.assert_allclose(kernel.diag(X), np.diag(kernel.gram(X)), rtol=1e-13, atol=1e-15)


# --------------------------------------------------------- textbook feature-map identity

def test_degree2_poly_equals_six_feature_map(rng):
    """(1 + x·z)² = φ(x)·φ(z) with φ(x) = (1, √2x₁, √2x₂, x₁², x₂², √2x₁x₂).

    Source: Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed.
    (2009), §12.3.1 (section number from memory), which lists exactly these six functions;
    the homogeneous variant is in Burges (1998), "A Tutorial on Support Vector Machines for
    Pattern Recognition", §4 (from memory).
    """
    def phi(X):
        x1, x2 = X[:, 0], X[:, 1]
        r2 = math.sqrt(2.0)
        return np.column_stack([np.ones_like(x1), r2 * x1, r2 * x2, x1**2, x2**2, r2 * x1 * x2])

    A, B = rng.normal(size=(20, 2)), rng.normal(size=(11, 2))
    K = PolynomialKernel(gamma=1.0, degree=2, offset=1.0).block(A, B)
    assert_rel_close(K, phi(A) @ phi(B).T, rtol=1e-13)
    # a hand-computed case: x = (1, 2), z = (3, −1): x·z = 1, (1 + 1)² = 4
    assert PolynomialKernel(gamma=1.0, degree=2, offset=1.0).block(
        np.array([[1.0, 2.0]]), np.array([[3.0, -1.0]]))[0, 0] == 4.0
    x, z = np.array([[1.0, 2.0]]), np.array([[3.0, -1.0]])
    assert (phi(x) @ phi(z).T)[0, 0] == pytest.approx(4.0)


# ---------------------------------------------------------------- property tests

finite = st.floats(-5.0, 5.0, allow_nan=False, allow_infinity=False, width=64)
matrices = st.tuples(st.integers(1, 12), st.integers(1, 4)).flatmap(
    lambda s: arrays(np.float64, s, elements=finite))
gammas = st.floats(1e-3, 3.0)
offsets = st.floats(-3.0, 3.0)
psd_offsets = st.floats(0.0, 3.0)


@st.composite
def builtin_kernels(draw, psd_only: bool = False):
    name = draw(st.sampled_from(["linear", "poly", "rbf"] if psd_only else sorted(KERNELS)))
    if name == "linear":
        return LinearKernel()
    if name == "rbf":
        return RBFKernel(gamma=draw(gammas))
    if name == "poly":
        return PolynomialKernel(gamma=draw(gammas), degree=draw(st.integers(1, 4)),
                                offset=draw(psd_offsets if psd_only else offsets))
    return SigmoidKernel(gamma=draw(gammas), offset=draw(offsets))


def rounding_bound(kernel, X: np.ndarray) -> float:
    """Absolute error bound (loose) for one computed kernel entry.

    A d-term dot product has error ≤ d·eps·‖x‖‖z‖ (Higham, Accuracy and Stability of
    Numerical Algorithms, ch. 3, from memory); the polynomial power multiplies the relative
    error by the degree; for RBF the squared distance from the expansion ‖x‖² + ‖z‖² − 2x·z
    has absolute error ~ (d + 2)·eps·(‖x‖² + ‖z‖²), scaled by gamma·K after the exponential.
    """
    d = X.shape[1]
    r2 = float(np.max(np.einsum("ij,ij->i", X, X)))
    if isinstance(kernel, RBFKernel):
        return 4 * (d + 2) * EPS * kernel.gamma * 2 * r2 + 4 * EPS
    if isinstance(kernel, PolynomialKernel):
        base = kernel.gamma * r2 + abs(kernel.offset)
        return 4 * kernel.degree * (d + 2) * EPS * max(base, 1e-300) ** kernel.degree + 4 * EPS
    if isinstance(kernel, SigmoidKernel):
        return 4 * (d + 2) * EPS * (kernel.gamma * r2 + abs(kernel.offset)) + 4 * EPS
    return 4 * d * EPS * r2


@settings(derandomize=True, max_examples=150, deadline=None)
@given(X=matrices, kernel=builtin_kernels())
def test_every_builtin_gram_is_symmetric(X, kernel):
    K = kernel.gram(X)
    assert np.all(np.isfinite(K))
    assert np.max(np.abs(K - K.T)) <= rounding_bound(kernel, X)


@settings(derandomize=True, max_examples=150, deadline=None)
@given(X=matrices, kernel=builtin_kernels(psd_only=True))
def test_psd_kernels_give_psd_grams(X, kernel):
    """Linear, polynomial with offset ≥ 0 and RBF Grams are PSD (Mercer kernels, common
    practice) up to rounding: the computed Gram is within n·(entry error bound) in
    spectral norm of an exactly PSD one, and eigh adds O(n·eps·‖K‖₂)."""
    K = kernel.gram(X)
    lam = np.linalg.eigvalsh(0.5 * (K + K.T))
    n = X.shape[0]
    kkt_tol = n * rounding_bound(kernel, X) + 10 * n * EPS * np.max(np.abs(lam))
    assert lam[0] >= -kkt_tol


# ---------------------------------------------------------------- validation

@pytest.mark.parametrize("gamma", [0, 0.0, -1.0, float("nan"), float("inf"), "0.5", True, [1.0]])
@pytest.mark.parametrize("cls", [RBFKernel, SigmoidKernel, PolynomialKernel])
def test_bad_gamma_rejected(cls, gamma):
    with pytest.raises(InvalidInputError, match="gamma"):
        cls(gamma=gamma)


@pytest.mark.parametrize("degree,why", [(0, ">= 1"), (-2, ">= 1"), (2.5, "integer"),
                                        (float("inf"), "integer"), (float("nan"), "integer"),
                                        ("3", "integer"), (True, "integer")])
def test_bad_degree_rejected(degree, why):
    with pytest.raises(InvalidInputError, match=why):
        PolynomialKernel(gamma=1.0, degree=degree)


def test_integral_float_degree_accepted():
    k = PolynomialKernel(gamma=1.0, degree=2.0)
    assert k.degree == 2 and isinstance(k.degree, int)


@pytest.mark.parametrize("offset", [float("nan"), float("inf"), "1", None, False])
@pytest.mark.parametrize("cls", [SigmoidKernel, PolynomialKernel])
def test_bad_offset_rejected(cls, offset):
    with pytest.raises(InvalidInputError, match="offset"):
        cls(gamma=1.0, offset=offset)


def test_unknown_kernel_and_parameter():
    with pytest.raises(InvalidInputError, match="unknown kernel 'gaussian'.*linear, poly, rbf"):
        make_kernel("gaussian")
    with pytest.raises(InvalidInputError, match="does not take parameter.*sigma"):
        make_kernel("rbf", sigma=1.0)
    with pytest.raises(InvalidInputError, match="does not take parameter.*degree"):
        make_kernel("linear", degree=2)
    # class-level attributes are not parameters
    for bogus in ("name", "psd"):
        with pytest.raises(InvalidInputError, match="does not take parameter"):
            make_kernel("rbf", **{bogus: "x"})


def test_unset_gamma_must_be_resolved(rng):
    with pytest.raises(InvalidInputError, match="gamma is not set"):
        RBFKernel().block(np.zeros((2, 2)), np.zeros((2, 2)))


# ------------------------------------------------------------- descriptions

@pytest.mark.parametrize("kernel", [LinearKernel(),
                                    PolynomialKernel(gamma=0.5, degree=3, offset=1.0),
                                    RBFKernel(gamma=np.float32(0.25)),
                                    SigmoidKernel(gamma=np.int64(2), offset=-1.0)])
def test_description_round_trip_and_json(kernel):
    desc = kernel.describe()
    assert json.loads(json.dumps(desc)) == desc  # plain data, numpy scalars converted
    again = kernel_from_description(json.loads(json.dumps(desc)))
    assert again == kernel and again.describe() == desc


def test_precomputed_description_names_the_gram(rng):
    G = skp.linear_kernel(rng.normal(size=(5, 2)))
    p = PrecomputedKernel(gram_matrix=G).params()
    assert p["n"] == 5 and len(p["gram_sha256"]) == 64
    assert PrecomputedKernel(gram_matrix=G + 1e-9).params()["gram_sha256"] != p["gram_sha256"]


def test_precomputed_validation():
    with pytest.raises(InvalidInputError, match="square"):
        PrecomputedKernel(gram_matrix=np.zeros((2, 3)))
    with pytest.raises(InvalidInputError, match="row 1, column 0"):
        PrecomputedKernel(gram_matrix=np.array([[1.0, 0.0], [np.nan, 1.0]]))
    k = PrecomputedKernel(gram_matrix=np.eye(3))
    with pytest.raises(InvalidInputError, match="row indices"):
        k.block(np.array([[3.0]]), np.array([[0.0]]))
    with pytest.raises(InvalidInputError, match="row indices"):
        k.block(np.array([[0.5]]), np.array([[0.0]]))


# ------------------------------------------------------------- median heuristic

def test_median_heuristic_hand_computed():
    # points 0, 1, 3 on a line: squared distances 1, 9, 4 → median 4 → gamma 1/4
    assert median_heuristic_gamma(np.array([[0.0], [1.0], [3.0]])) == 0.25


def test_median_heuristic_recorded_and_seeded(rng):
    X = rng.normal(size=(1500, 3))
    k = RBFKernel().with_defaults(X)
    assert k.gamma_source == "median_heuristic" and k.describe()["params"]["gamma"] == k.gamma
    assert k.gamma == median_heuristic_gamma(X)  # fixed-seed sample → reproducible
    # for standard normal rows ‖x − z‖² ~ 2·χ²₃, median ≈ 2 · 2.366 (chi-square median,
    # from memory) → gamma ≈ 0.21
    assert 0.18 < k.gamma < 0.24
    assert RBFKernel(gamma=0.5).with_defaults(X).gamma == 0.5


def test_median_heuristic_errors():
    with pytest.raises(InvalidInputError, match="two rows"):
        median_heuristic_gamma(np.zeros((1, 2)))
    with pytest.raises(InvalidInputError, match="give gamma explicitly"):
        median_heuristic_gamma(np.zeros((5, 2)))
