"""Per-point explanations and exact leave-one-out for ε-regression and one-class fits."""

from __future__ import annotations

import numpy as np
import pytest

from solver import smo
from solver.explanation import kind_leave_one_out, kind_point_table
from solver.kernels import RBFKernel
from solver.problem import one_class, regression


@pytest.fixture
def sine():
    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(0, 6, size=40))
    return x[:, None], np.sin(x) + 0.15 * rng.normal(size=40)


def test_regression_table_categories_follow_the_tube(sine):
    X, t = sine
    P = regression(X, t, kernel=RBFKernel(gamma=0.5), C=2.0, epsilon=0.1)
    r = smo.solve_smo(P, kkt_tol=1e-6, trace="off")
    tab = kind_point_table(P, r)
    c = tab.to_columns()
    counts = tab.category_counts()
    assert sum(counts.values()) == 40 and min(counts.values()) > 0
    absr = np.abs(c["residual"])
    tol = 1e-5
    assert np.all(absr[c["category"] == "inside_tube"] <= 0.1 + tol)
    assert np.allclose(absr[c["category"] == "on_tube_edge"], 0.1, atol=tol)
    assert np.all(absr[c["category"] == "outside_tube"] >= 0.1 - tol)
    assert np.allclose(c["target"], t)
    above = c["side"] == "above"
    assert np.all(c["residual"][above] > 0)
    # α⁺ (target above the fit) and α⁻ never both positive when ε > 0
    assert np.all(np.minimum(c["alpha_plus"], c["alpha_minus"]) <= 1e-9)
    assert any("Outside the tube" in s for s in c["reason"])


def test_one_class_table_categories(sine):
    X, _ = sine
    P = one_class(X, kernel=RBFKernel(gamma=0.5), nu=0.2)
    r = smo.solve_smo(P, kkt_tol=1e-6, trace="off")
    c = kind_point_table(P, r).to_columns()
    cat, s = c["category"], c["score"]
    assert np.all(s[cat == "interior"] >= -1e-5)
    assert np.allclose(s[cat == "boundary"], 0.0, atol=1e-5)
    assert np.all(s[cat == "outside"] <= 1e-5)
    assert np.sum(cat == "outside") <= 0.2 * 40


def test_regression_leave_one_out_equals_brute_force(sine):
    """Removing a row inside the tube changes nothing (module notes): the support-vector
    shortcut equals refitting every row."""
    X, t = sine
    P = regression(X, t, kernel=RBFKernel(gamma=0.5), C=2.0, epsilon=0.1)
    r = smo.solve_smo(P, kkt_tol=1e-8, trace="off")
    fast = kind_leave_one_out(P, r)
    brute = kind_leave_one_out(P, r, brute_force=True)
    assert fast.refitted.sum() < 40 and brute.refitted.sum() == 40
    assert fast.all_converged and brute.all_converged
    assert np.allclose(fast.values, brute.values, rtol=0, atol=1e-6)
    assert fast.measures["mse"] == pytest.approx(brute.measures["mse"], rel=1e-6)


def test_regression_leave_one_out_matches_scikit_learn(sine):
    """Reference library: sklearn cross_val_predict(SVR, LeaveOneOut) at tol 1e-8."""
    from sklearn.model_selection import LeaveOneOut, cross_val_predict
    from sklearn.svm import SVR

    X, t = sine
    P = regression(X, t, kernel=RBFKernel(gamma=0.5), C=2.0, epsilon=0.1)
    r = smo.solve_smo(P, kkt_tol=1e-8, trace="off")
    loo = kind_leave_one_out(P, r)
    ref = cross_val_predict(SVR(C=2.0, epsilon=0.1, gamma=0.5, tol=1e-8), X, t,
                            cv=LeaveOneOut())
    assert np.max(np.abs(loo.values - ref)) <= 1e-3 * t.std()


def test_one_class_leave_one_out_outlier_share(sine):
    X, _ = sine
    P = one_class(X, kernel=RBFKernel(gamma=0.5), nu=0.2)
    r = smo.solve_smo(P, kkt_tol=1e-8, trace="off")
    fast = kind_leave_one_out(P, r)
    brute = kind_leave_one_out(P, r, brute_force=True)
    assert np.allclose(fast.values, brute.values, rtol=0, atol=1e-6)
    share = fast.measures["outlier_share"]
    assert share == pytest.approx(np.mean(brute.values < 0))
    # a left-out point counts as an outlier at least as often as in training
    assert share >= np.mean(kind_point_table(P, r).to_columns()["score"] < -1e-6)
