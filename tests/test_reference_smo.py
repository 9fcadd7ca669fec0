"""Reference checks of the SMO solver: closed forms, worked examples, scikit-learn's SVC on
scikit-learn's bundled datasets, and published findings about the algorithm."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.datasets import (
    load_breast_cancer,
    load_digits,
    load_iris,
    load_wine,
    make_classification,
)
from sklearn.svm import SVC

from solver.kernels import make_kernel
from solver.model import model_from_solution
from solver.problem import binary_classification
from solver.smo import replay_alpha, solve_smo


def _values(problem, result) -> np.ndarray:
    return model_from_solution(problem, result).values(problem.X, standardised=True)


def test_two_points_hard_margin_closed_form():
    # Two points, hard margin: the maximal-margin hyperplane is the perpendicular bisector
    # of the segment and α₁ = α₂ = 2 / ‖x₁ − x₂‖² (margin 1/‖w‖ with ‖w‖ = 2/‖x₁ − x₂‖;
    # Burges 1998, "A tutorial on support vector machines for pattern recognition", sec. 3;
    # Schölkopf & Smola 2002, "Learning with Kernels", ch. 7).
    x1, x2 = np.array([1.0, 2.0]), np.array([3.0, -1.0])
    X = np.vstack([x1, x2])
    prob = binary_classification(X, [1, -1], kernel=make_kernel("linear"), C=1e6)
    r = solve_smo(prob, kkt_tol=1e-12)
    assert r.success
    expect = 2.0 / np.sum((x1 - x2) ** 2)
    np.testing.assert_allclose(r.alpha, [expect, expect], rtol=1e-12)
    w = (r.alpha * prob.y) @ X
    mid = 0.5 * (x1 + x2)
    assert w @ mid + r.bias == pytest.approx(0.0, abs=1e-12)  # the bisector passes the midpoint
    d = x1 - x2
    assert abs(w[0] * d[1] - w[1] * d[0]) <= 1e-12  # and is perpendicular to the segment
    assert w @ x1 + r.bias == pytest.approx(1.0, abs=1e-12)  # both points on the margin
    assert w @ x2 + r.bias == pytest.approx(-1.0, abs=1e-12)


def test_three_points_worked_example():
    # Worked by hand from the hard-margin KKT conditions (formulation of Burges 1998, sec. 3):
    # x₁ = (0, 0) with y = −1, x₂ = (2, 0) and x₃ = (0, 2) with y = +1.  By symmetry
    # w = (c, c); the constraints −b ≥ 1 and 2c + b ≥ 1 are tight at the optimum, so
    # w = (1, 1), b = −1, and w = Σ αᵢyᵢxᵢ with Σ αᵢyᵢ = 0 gives α = (1, 1/2, 1/2).
    X = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0]])
    prob = binary_classification(X, [-1, 1, 1], kernel=make_kernel("linear"), C=1e6)
    r = solve_smo(prob, kkt_tol=1e-12)
    assert r.success
    np.testing.assert_allclose(r.alpha, [1.0, 0.5, 0.5], atol=1e-12)
    assert r.bias == pytest.approx(-1.0, abs=1e-12)
    np.testing.assert_allclose((r.alpha * prob.y) @ X, [1.0, 1.0], atol=1e-12)
    assert r.certificate.dual_objective == pytest.approx(-1.0, abs=1e-12)  # −½‖w‖²
    assert abs(r.certificate.duality_gap) <= 1e-10


def test_xor_polynomial_degree_two():
    # The four-point XOR problem with K(x, z) = (x·z + 1)²: every point is a support vector
    # with α = 1/8 and f(x) = x₁x₂ (Haykin, "Neural Networks", 2nd ed. 1999, sec. 6.6; the
    # values from memory).  The linear kernel cannot separate XOR (common practice): by
    # symmetry its solution is w = 0, b = 0, which classifies no point correctly.
    X = np.array([[-1.0, -1.0], [-1.0, 1.0], [1.0, -1.0], [1.0, 1.0]])
    lab = np.array([1, -1, -1, 1])
    poly = binary_classification(X, lab, kernel=make_kernel("poly", gamma=1.0, offset=1.0,
                                                            degree=2), C=1e6)
    r = solve_smo(poly, kkt_tol=1e-12)
    assert r.success
    np.testing.assert_allclose(r.alpha, np.full(4, 0.125), atol=1e-12)
    assert r.bias == pytest.approx(0.0, abs=1e-12)
    f = _values(poly, r)
    np.testing.assert_allclose(f, X[:, 0] * X[:, 1], atol=1e-12)
    assert np.all(np.sign(f) == poly.y)
    lin = binary_classification(X, lab, kernel=make_kernel("linear"), C=1.0)
    rl = solve_smo(lin, kkt_tol=1e-12)
    assert rl.success
    assert np.sum(np.sign(_values(lin, rl)) == lin.y) < 4


def _standardise(X: np.ndarray) -> np.ndarray:
    sd = X.std(axis=0)
    return (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)


def _pair(loader, a, b):
    X, lab = loader(return_X_y=True)
    keep = (lab == a) | (lab == b)
    return _standardise(X[keep]), lab[keep]


# scikit-learn's bundled copies of the UCI Wisconsin breast cancer, iris and wine data and
# of the UCI optical digits data (no download).
DATASETS = {
    "breast_cancer": lambda: (_standardise(load_breast_cancer(return_X_y=True)[0]),
                              load_breast_cancer(return_X_y=True)[1]),
    "iris_0_1": lambda: _pair(load_iris, 0, 1),
    "iris_0_2": lambda: _pair(load_iris, 0, 2),
    "iris_1_2": lambda: _pair(load_iris, 1, 2),
    "wine_0_1": lambda: _pair(load_wine, 0, 1),
    "wine_0_2": lambda: _pair(load_wine, 0, 2),
    "wine_1_2": lambda: _pair(load_wine, 1, 2),
    "digits_3_8": lambda: _pair(load_digits, 3, 8),
}


def _kernels(d: int) -> dict[str, tuple[dict, dict]]:
    g = 1.0 / d  # gamma passed explicitly to both solvers
    return {
        "linear": ({"name": "linear"}, {"kernel": "linear"}),
        "poly": ({"name": "poly", "gamma": g, "offset": 1.0, "degree": 3},
                 {"kernel": "poly", "gamma": g, "coef0": 1.0, "degree": 3}),
        "rbf": ({"name": "rbf", "gamma": g}, {"kernel": "rbf", "gamma": g}),
    }


@pytest.mark.slow
@pytest.mark.parametrize("dataset", sorted(DATASETS))
def test_agreement_with_scikit_learn_svc(dataset):
    # scikit-learn's SVC (a reference implementation of the same dual) at kkt_tol 1e-5: equal
    # dual objective to 1e-6 relative and equal predictions except where |f| < 1e-3.
    X, lab = DATASETS[dataset]()
    for kname, (ours, theirs) in _kernels(X.shape[1]).items():
        for C in (1.0, 10.0):
            kern = make_kernel(ours["name"], **{k: v for k, v in ours.items() if k != "name"})
            prob = binary_classification(X, lab, kernel=kern, C=C)
            r = solve_smo(prob, kkt_tol=1e-5)
            assert r.success, (dataset, kname, C, r.message)
            svc = SVC(C=C, tol=1e-5, **theirs).fit(X, lab)
            a_svc = np.zeros(prob.n)
            a_svc[svc.support_] = np.abs(svc.dual_coef_[0])  # SVC stores α·y
            d_ours, d_svc = prob.objective(r.alpha), prob.objective(a_svc)
            assert abs(d_ours - d_svc) <= 1e-6 * abs(d_svc), (dataset, kname, C, d_ours, d_svc)
            f_ours = _values(prob, r)
            f_svc = svc.decision_function(X)
            if svc.classes_[1] != prob.labels[1]:
                f_svc = -f_svc
            differ = np.sign(f_ours) != np.sign(f_svc)
            near = np.minimum(np.abs(f_ours), np.abs(f_svc)) < 1e-3
            assert not np.any(differ & ~near), (dataset, kname, C)


def _benchmark_problem(n: int, C: float):
    # the benchmark's problem (issue 3): make_classification, standardised, RBF gamma 0.05
    X, lab = make_classification(n_samples=n, n_features=20, n_informative=10, flip_y=0.05,
                                 random_state=0)
    return binary_classification(_standardise(X), lab, kernel=make_kernel("rbf", gamma=0.05),
                                 C=C)


@pytest.mark.parametrize("C", [1.0, 100.0])
def test_second_order_needs_fewer_iterations(C):
    # Fan, Chen & Lin (2005, JMLR 6, sec. 6): second-order working-set selection needs fewer
    # iterations than the maximal violating pair.
    prob = _benchmark_problem(2000, C)
    r2 = solve_smo(prob, trace="off")
    r1 = solve_smo(prob, trace="off", selection="first_order")
    assert r1.success and r2.success
    assert r2.iterations < r1.iterations
    assert r1.certificate.max_violation <= 1e-3 and r2.certificate.max_violation <= 1e-3
    assert r1.certificate.dual_objective == pytest.approx(r2.certificate.dual_objective, rel=1e-4)


@pytest.mark.parametrize("C", [1.0, 100.0])
def test_shrinking_on_and_off_reach_the_same_certificate(C):
    prob = _benchmark_problem(1500, C)
    on = solve_smo(prob, shrinking=True, kkt_tol=1e-4)
    off = solve_smo(prob, shrinking=False, kkt_tol=1e-4)
    assert on.success and off.success
    assert on.extra["shrinks"] > 0 and on.extra["reconstructions"] > 0
    for r in (on, off):
        assert r.certificate.max_violation <= 1e-4
    c1, c2 = on.certificate, off.certificate
    assert c1.dual_objective == pytest.approx(c2.dual_objective, rel=1e-7)
    assert abs(c1.bias - c2.bias) <= 1e-3
    assert abs(c1.n_support - c2.n_support) <= 2
    assert np.array_equal(np.sign(_values(prob, on)), np.sign(_values(prob, off)))


def test_replay_is_bitwise_at_every_snapshot_with_shrinking_and_row_cache():
    prob = _benchmark_problem(1200, 10.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = solve_smo(prob, snapshot_every=250, kernel_memory_mb=1.0, row_cache_mb=2.0)
    assert r.success and r.extra["kernel_mode"] == "column_cache" and r.extra["shrinks"] > 0
    tr = r.trace
    assert tr.snapshots.shape[0] >= 4
    for k, it in enumerate(tr.snapshot_iterations):
        assert np.array_equal(replay_alpha(tr, int(it)), tr.snapshots[k])
    assert np.array_equal(tr.snapshots[-1], r.alpha)
