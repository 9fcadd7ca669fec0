"""Reference checks of the SMO solver against closed forms and published examples."""

from __future__ import annotations

import numpy as np
import pytest

from solver.kernels import make_kernel
from solver.problem import binary_classification
from solver.smo import solve_smo


def test_two_points_hard_margin_closed_form():
    # Two points, hard margin: the maximal-margin hyperplane is the perpendicular bisector
    # of the segment and α₁ = α₂ = 2 / ‖x₁ − x₂‖² (margin 1/‖w‖ with ‖w‖ = 2/‖x₁ − x₂‖;
    # Burges 1998, "A tutorial on support vector machines for pattern recognition", sec. 3;
    # Schölkopf & Smola 2002, "Learning with Kernels", ch. 7).
    x1, x2 = np.array([1.0, 2.0]), np.array([3.0, -1.0])
    X = np.vstack([x1, x2])
    prob = binary_classification(X, [1, -1], kernel=make_kernel("linear"), C=1e6)
    r = solve_smo(prob, tol=1e-12)
    assert r.success
    expect = 2.0 / np.sum((x1 - x2) ** 2)
    np.testing.assert_allclose(r.alpha, [expect, expect], rtol=1e-12)
    w = (r.alpha * prob.y) @ X
    mid = 0.5 * (x1 + x2)
    assert w @ mid + r.bias == pytest.approx(0.0, abs=1e-12)  # bisector passes the midpoint
    # w is parallel to x1 − x2
    d = x1 - x2
    assert abs(w[0] * d[1] - w[1] * d[0]) <= 1e-12
