"""The general dual problem and the binary classification constructor."""

from __future__ import annotations

import json

import numpy as np
import pytest

from solver.errors import InvalidInputError
from solver.kernels import LinearKernel, PolynomialKernel, PrecomputedKernel, RBFKernel
from solver.problem import DualProblem, binary_classification, index_features


def explicit_rbf(X: np.ndarray, gamma: float) -> np.ndarray:
    """RBF Gram by the definition exp(−gamma ‖x − z‖²), pair by pair (independent of BLAS)."""
    n = X.shape[0]
    K = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            diff = X[i] - X[j]
            K[i, j] = np.exp(-gamma * float(np.sum(diff * diff)))
    return K


@pytest.fixture
def data(rng):
    X = rng.normal(size=(12, 3))
    labels = np.array(["ok", "defect", "ok", "ok", "defect", "ok",
                       "defect", "ok", "defect", "defect", "ok", "ok"])
    return X, labels


# ------------------------------------------------------------------- label mapping

def test_label_mapping_default_and_recorded(data):
    X, labels = data
    P = binary_classification(X, labels, kernel=LinearKernel(), C=2.0)
    # default: the larger of the two sorted labels is positive ("ok" > "defect")
    assert P.labels == ("defect", "ok")
    np.testing.assert_array_equal(P.y, np.where(labels == "ok", 1.0, -1.0))
    assert P.info["labels"] == {"negative": "defect", "positive": "ok"}
    assert P.info["class_counts"] == {"negative": 5, "positive": 7}
    np.testing.assert_array_equal(P.p, -1.0)
    np.testing.assert_array_equal(P.lower, 0.0)
    np.testing.assert_array_equal(P.upper, 2.0)
    assert P.delta == 0.0 and P.kind == "binary_classification"
    json.dumps(P.describe())  # plain data


def test_positive_label_choice_and_numeric_labels(data):
    X, labels = data
    P = binary_classification(X, labels, kernel=LinearKernel(), positive_label="defect")
    assert P.labels == ("ok", "defect")
    np.testing.assert_array_equal(P.y, np.where(labels == "defect", 1.0, -1.0))
    num = np.where(labels == "ok", 0, 1)
    Q = binary_classification(X, num, kernel=LinearKernel())
    assert Q.labels == (0, 1) and type(Q.info["labels"]["positive"]) is int
    np.testing.assert_array_equal(Q.y, np.where(num == 1, 1.0, -1.0))


# ------------------------------------------------------------------------ weights

def test_class_and_sample_weights_scale_upper_bounds(data):
    X, labels = data
    sw = np.linspace(0.5, 2.0, 12)
    P = binary_classification(X, labels, kernel=LinearKernel(), C=3.0,
                              class_weight={"defect": 4.0}, sample_weight=sw)
    expected = 3.0 * np.where(labels == "defect", 4.0, 1.0) * sw
    np.testing.assert_allclose(P.upper, expected, rtol=1e-15)
    assert P.info["class_weight"] == {"defect": 4.0} and P.info["sample_weight"] is True


def test_caller_arrays_stay_writable_and_problem_is_frozen(data):
    X, labels = data
    X = np.ascontiguousarray(X)
    sw = np.ones(12)
    P = binary_classification(X, labels, kernel=LinearKernel(), sample_weight=sw)
    assert X.flags.writeable and sw.flags.writeable
    X[0, 0] = 99.0  # changing the caller's array does not change the problem
    assert P.X[0, 0] != 99.0
    with pytest.raises(ValueError):
        P.upper[0] = 5.0


# ------------------------------------------------------------------------- errors

@pytest.mark.parametrize("labels,match", [
    (["a"] * 6, "exactly two label values, found 1"),
    (["a", "b", "c", "a", "b", "c"], "exactly two label values, found 3"),
    (["a", "b"] * 2, "labels must have 6 entries"),
])
def test_label_errors(rng, labels, match):
    with pytest.raises(InvalidInputError, match=match):
        binary_classification(rng.normal(size=(6, 2)), labels, kernel=LinearKernel())


@pytest.mark.parametrize("C", [0, -1.0, float("nan"), float("inf"), "1", True, None])
def test_bad_C(data, C):
    X, labels = data
    with pytest.raises(InvalidInputError, match="C must be a finite number > 0"):
        binary_classification(X, labels, kernel=LinearKernel(), C=C)


@pytest.mark.parametrize("cw,match", [
    ({"unknown": 2.0}, "unknown label"),
    ({"ok": 0.0}, "class weight for 'ok'"),
    ({"ok": -1.0}, "class weight for 'ok'"),
    ({"ok": float("nan")}, "class weight for 'ok'"),
    ({"ok": "heavy"}, "class weight for 'ok'"),
])
def test_bad_class_weights(data, cw, match):
    X, labels = data
    with pytest.raises(InvalidInputError, match=match):
        binary_classification(X, labels, kernel=LinearKernel(), class_weight=cw)


@pytest.mark.parametrize("sw,match", [
    (np.ones(11), "must have 12 entries"),
    (np.r_[np.ones(4), 0.0, np.ones(7)], r"row index 4 \(0-based\)"),
    (np.r_[np.ones(7), -2.0, np.ones(4)], r"row index 7 \(0-based\)"),
    (np.r_[np.nan, np.ones(11)], r"row index 0 \(0-based\)"),
    (["w"] * 12, "must be numbers"),
])
def test_bad_sample_weights(data, sw, match):
    X, labels = data
    with pytest.raises(InvalidInputError, match=match):
        binary_classification(X, labels, kernel=LinearKernel(), sample_weight=sw)


def test_other_constructor_errors(data):
    X, labels = data
    with pytest.raises(InvalidInputError, match="2-D"):
        binary_classification(X[:, 0], labels, kernel=LinearKernel())
    with pytest.raises(InvalidInputError, match="positive label 'good'"):
        binary_classification(X, labels, kernel=LinearKernel(), positive_label="good")


def test_dual_problem_validation():
    base = dict(X=np.zeros((3, 1)), y=np.array([1.0, -1.0, 1.0]), p=-np.ones(3),
                lower=np.zeros(3), upper=np.ones(3), delta=0.0, kernel=LinearKernel(),
                kind="test", info={})
    DualProblem(**base)
    with pytest.raises(InvalidInputError, match="-1 and \\+1"):
        DualProblem(**{**base, "y": np.array([1.0, 0.0, 1.0])})
    with pytest.raises(InvalidInputError, match="lower bound exceeds upper bound at row index 2"):
        DualProblem(**{**base, "lower": np.array([0.0, 0.0, 2.0])})
    with pytest.raises(InvalidInputError, match="p has a non-finite entry at row index 1"):
        DualProblem(**{**base, "p": np.array([-1.0, np.inf, -1.0])})
    with pytest.raises(InvalidInputError, match="upper must have 3 entries"):
        DualProblem(**{**base, "upper": np.ones(2)})
    with pytest.raises(InvalidInputError, match="delta must be finite"):
        DualProblem(**{**base, "delta": np.nan})
    with pytest.raises(InvalidInputError, match="non-empty 2-D"):
        DualProblem(**{**base, "X": np.zeros((0, 1))})


# ----------------------------------------------------------------- Q and gradient

def test_q_block_diag_and_products_match_explicit_Q(data, rng):
    X, labels = data
    gamma = 0.4
    P = binary_classification(X, labels, kernel=RBFKernel(gamma=gamma), C=1.0)
    Q = np.outer(P.y, P.y) * explicit_rbf(X, gamma)  # Q_ij = y_i y_j K(x_i, x_j)
    rows = np.array([5, 0, 11, 3])
    np.testing.assert_allclose(P.q_block(rows, slice(2, 9)), Q[rows][:, 2:9], rtol=1e-13)
    np.testing.assert_allclose(P.q_block(slice(None), slice(None)), Q, rtol=1e-13)
    np.testing.assert_allclose(P.kernel_diag(), np.diag(Q), rtol=1e-15)
    alpha = rng.uniform(0.0, 1.0, size=12)
    np.testing.assert_allclose(P.q_times(alpha, block_rows=5), Q @ alpha, rtol=1e-12)
    np.testing.assert_allclose(P.gradient(alpha), Q @ alpha - 1.0, rtol=1e-12, atol=1e-14)
    assert P.objective(alpha) == pytest.approx(0.5 * alpha @ Q @ alpha - alpha.sum(), rel=1e-12)


def test_precomputed_and_poly_problems(data):
    X, labels = data
    G = (0.5 * X @ X.T + 1.0) ** 2
    Pg = binary_classification(index_features(12), labels,
                               kernel=PrecomputedKernel(gram_matrix=G))
    Pp = binary_classification(X, labels, kernel=PolynomialKernel(gamma=0.5, degree=2, offset=1))
    np.testing.assert_allclose(Pg.q_block(slice(None), slice(None)),
                               Pp.q_block(slice(None), slice(None)), rtol=1e-12)
    np.testing.assert_array_equal(Pg.kernel.gram_matrix, G)  # q_block did not scale G in place


def test_unset_gamma_resolved_and_recorded(data):
    X, labels = data
    P = binary_classification(X, labels, kernel=RBFKernel())
    params = P.describe()["kernel"]["params"]
    assert params["gamma_source"] == "median_heuristic" and params["gamma"] > 0


# --------------------------------------------------------------- feasible start

def test_feasible_start_classification_is_zero(data):
    X, labels = data
    P = binary_classification(X, labels, kernel=LinearKernel())
    a = P.feasible_start()
    np.testing.assert_array_equal(a, 0.0)
    assert P.feasibility(a) == (0.0, 0.0)


def _general(delta: float) -> DualProblem:
    return DualProblem(X=np.zeros((3, 1)), y=np.array([1.0, 1.0, -1.0]), p=np.zeros(3),
                       lower=np.zeros(3), upper=np.ones(3), delta=delta,
                       kernel=LinearKernel(), kind="test", info={})


@pytest.mark.parametrize("delta,expected", [(1.5, [1.0, 0.5, 0.0]), (-0.5, [0.0, 0.0, 0.5]),
                                            (2.0, [1.0, 1.0, 0.0])])
def test_feasible_start_general(delta, expected):
    # mass is moved to y = sign(Δ) points in order until yᵀα = Δ (hand-computed)
    P = _general(delta)
    a = P.feasible_start()
    np.testing.assert_allclose(a, expected)
    bound, eq = P.feasibility(a)
    assert bound == 0.0 and eq <= 1e-15


def test_feasible_start_infeasible():
    with pytest.raises(InvalidInputError, match="infeasible"):
        _general(3.0).feasible_start()  # at most 2 units on the y = +1 side


def test_feasibility_measures():
    P = _general(0.0)
    bound, eq = P.feasibility(np.array([1.5, -0.25, 0.0]))
    assert bound == 0.5 and eq == 1.25
