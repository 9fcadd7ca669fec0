"""The certificate at closed-form optima, at α = 0 and at hand-computed non-optimal points."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from solver.certificate import certify
from solver.errors import InvalidInputError
from solver.kernels import LinearKernel, RBFKernel
from solver.problem import DualProblem, binary_classification


def two_points(x1, x2, *, C: float, kernel=None) -> DualProblem:
    X = np.array([x1, x2], dtype=float)
    return binary_classification(X, [1, -1], kernel=kernel or LinearKernel(), C=C)


# Two-point hard margin, linear kernel (closed form derived here; the margin of the optimal
# hyperplane equals the distance between the points — the standard two-point case):
# minimise ½‖w‖² s.t. w·x₁ + b ≥ 1, −(w·x₂ + b) ≥ 1.  The optimum has w ∥ Δ = x₁ − x₂ with
# both constraints active, so w·Δ = 2, w = 2Δ/‖Δ‖², and since yᵀα = 0 forces α₁ = α₂ = α,
# w = αΔ gives α = 2/‖Δ‖².  Then b = 1 − w·x₁ = (‖x₂‖² − ‖x₁‖²)/‖Δ‖²; the dual objective
# ½αᵀQα − Σα = −2/‖Δ‖² and the primal ½‖w‖² = 2/‖Δ‖².  Any C > α gives the same solution.
X1, X2 = np.array([2.0, 1.0]), np.array([0.5, -1.0])
D2 = float(np.sum((X1 - X2) ** 2))  # ‖Δ‖² = 6.25


def test_two_point_hard_margin_optimum():
    P = two_points(X1, X2, C=10.0)
    a = 2.0 / D2
    c = certify(P, np.array([a, a]), kkt_tol=1e-9)
    assert c.max_violation <= 1e-14 and c.meets_tol
    assert c.bias == pytest.approx((X2 @ X2 - X1 @ X1) / D2, abs=1e-14)
    assert c.bias_from == "free_support_vectors"
    assert c.dual_objective == pytest.approx(-2.0 / D2, rel=1e-14)
    assert c.primal_objective == pytest.approx(2.0 / D2, rel=1e-14)
    assert abs(c.duality_gap) <= 1e-14 and abs(c.relative_gap) <= 1e-13
    assert (c.n_free, c.n_bounded, c.n_zero, c.n_support) == (2, 0, 0, 2)
    assert np.max(c.kkt_residual) <= 1e-14
    assert c.bound_violation == 0.0 and c.equality_residual == 0.0


def test_two_point_rbf_optimum():
    # RBF, two points: Q = [[1, −k], [−k, 1]] with k = exp(−γ‖Δ‖²); with α₁ = α₂ = α the dual
    # is α²(1 − k) − 2α, minimised at α = 1/(1 − k); b = 0 by symmetry (K₁₁ = K₂₂).
    gamma = 0.3
    P = two_points(X1, X2, C=100.0, kernel=RBFKernel(gamma=gamma))
    k = math.exp(-gamma * D2)
    a = 1.0 / (1.0 - k)
    c = certify(P, np.array([a, a]))
    assert c.max_violation <= 1e-13 and abs(c.bias) <= 1e-13
    assert c.dual_objective == pytest.approx(-1.0 / (1.0 - k), rel=1e-13)
    assert abs(c.duality_gap) <= 1e-12


def test_alpha_zero_hand_computed():
    # α = 0: G = −1, −yᵢGᵢ = yᵢ, I_up = {y = +1}, I_low = {y = −1} → m = 1, M = −1,
    # violation 2, no free point → bias = (m + M)/2 = 0, every slack 1 → primal Σuᵢ.
    X = np.array([[0.0, 1.0], [1.0, 0.0], [2.0, 2.0], [-1.0, 0.5]])
    sw = np.array([1.0, 2.0, 3.0, 4.0])
    P = binary_classification(X, ["a", "a", "b", "b"], kernel=LinearKernel(), C=1.0,
                              sample_weight=sw)
    c = certify(P, np.zeros(4), kkt_tol=1e-3)
    assert (c.m_up, c.M_low, c.max_violation) == (1.0, -1.0, 2.0)
    assert not c.meets_tol
    assert c.bias == 0.0 and c.bias_from == "interval_midpoint"
    assert c.dual_objective == 0.0
    assert c.primal_objective == 10.0 and c.duality_gap == 10.0 and c.relative_gap == 1.0
    np.testing.assert_array_equal(c.kkt_residual, 1.0)
    assert (c.n_free, c.n_bounded, c.n_zero, c.n_support) == (0, 0, 4, 0)
    assert c.at_lower.all() and not c.at_upper.any()


def test_both_at_upper_bound_is_optimal():
    # x₁ = (1, 0), x₂ = (−1, 0): ‖Δ‖² = 4, unconstrained α* = 0.5; with C = 0.1 < α* the
    # optimum is α = (C, C).  Q = [[1, 1], [1, 1]], G = Qα − 1 = (−0.8, −0.8), −yG = (0.8, −0.8);
    # I_up = {2}, I_low = {1} → m = −0.8, M = 0.8, violation 0, bias = midpoint 0.
    # Dual ½C²‖Δ‖² − 2C = −0.18; primal ½C²‖Δ‖² + C·Σ slack(0.8) = 0.02 + 0.16 = 0.18.
    P = two_points([1.0, 0.0], [-1.0, 0.0], C=0.1)
    c = certify(P, np.array([0.1, 0.1]))
    assert c.max_violation == 0.0 and c.meets_tol
    assert c.m_up == pytest.approx(-0.8) and c.M_low == pytest.approx(0.8)
    assert c.bias == pytest.approx(0.0, abs=1e-15) and c.bias_from == "interval_midpoint"
    assert c.dual_objective == pytest.approx(-0.18, rel=1e-14)
    assert c.primal_objective == pytest.approx(0.18, rel=1e-14)
    assert abs(c.duality_gap) <= 1e-15
    assert (c.n_free, c.n_bounded, c.n_zero, c.n_support) == (0, 2, 0, 2)
    np.testing.assert_allclose(c.kkt_residual, 0.0, atol=1e-15)


def test_non_optimal_point_hand_computed():
    # Same points, C = 10, α = (0.25, 0.25) = α*/2: G = (−0.5, −0.5), −yG = (0.5, −0.5),
    # both free → violation 1, bias 0, |G + b y| = 0.5 each; dual ½·0.25 − 0.5 = −0.375,
    # primal 0.125 + 10·(0.5 + 0.5) = 10.125, gap 9.75.
    P = two_points([1.0, 0.0], [-1.0, 0.0], C=10.0)
    c = certify(P, np.array([0.25, 0.25]), kkt_tol=0.5)
    assert c.max_violation == pytest.approx(1.0) and not c.meets_tol
    assert c.bias == pytest.approx(0.0, abs=1e-15)
    np.testing.assert_allclose(c.kkt_residual, 0.5)
    assert c.dual_objective == pytest.approx(-0.375)
    assert c.primal_objective == pytest.approx(10.125)
    assert c.duality_gap == pytest.approx(9.75)
    assert c.relative_gap == pytest.approx(9.75 / 10.125)


def test_supplied_gradient_used_and_checked():
    P = two_points(X1, X2, C=10.0)
    a = np.array([0.2, 0.2])
    c1 = certify(P, a)
    c2 = certify(P, a, gradient=P.gradient(a))
    assert c1.to_dict() == c2.to_dict()
    with pytest.raises(InvalidInputError, match="gradient must have shape"):
        certify(P, a, gradient=np.zeros(3))
    with pytest.raises(InvalidInputError, match="alpha must have shape"):
        certify(P, np.zeros(3))


def test_infeasible_alpha_reported():
    P = two_points(X1, X2, C=1.0)
    c = certify(P, np.array([1.5, 0.25]))
    assert c.bound_violation == pytest.approx(0.5)
    assert c.equality_residual == pytest.approx(1.25)


def test_nonzero_lower_bounds_leave_primal_undefined():
    P = DualProblem(X=np.array([[1.0], [-1.0]]), y=np.array([1.0, -1.0]), p=-np.ones(2),
                    lower=np.array([0.1, 0.1]), upper=np.ones(2), delta=0.0,
                    kernel=LinearKernel(), kind="test", info={})
    c = certify(P, np.array([0.2, 0.2]))
    assert math.isnan(c.primal_objective) and math.isnan(c.duality_gap)


def test_to_dict_is_plain_json():
    P = two_points(X1, X2, C=10.0)
    d = certify(P, np.array([0.1, 0.1])).to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["n_support"] == d["n_free"] + d["n_bounded"]
