"""Probability outputs: Platt scaling (Lin, Lin & Weng 2007), folds, pairwise coupling
(Wu, Lin & Weng 2004, method 2), and the train / apply / verify workflow."""

from __future__ import annotations

import csv
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy.optimize import minimize

from solver.calibration import (
    FitStatus,
    calibrate,
    couple_pairwise,
    couple_pairwise_rows,
    fit_sigmoid,
    sigmoid_probability,
    stratified_folds,
)
from solver.calibration.evidence import calibration_evidence
from solver.errors import InvalidInputError
from solver.kernels import make_kernel
from solver.model import Standardiser
from solver.problem import binary_classification

DATA = os.path.join(os.path.dirname(__file__), "..", "solver", "data")


def _problem(X, labels, *, C=1.0, gamma=None, class_weight=None):
    Z = Standardiser.fit(X).transform(X)
    return binary_classification(Z, labels, kernel=make_kernel("rbf", gamma=gamma), C=C,
                                 class_weight=class_weight)


def _sklearn_sigmoid(values, positive):
    """scikit-learn's sigmoid calibration (reference library): the function its
    CalibratedClassifierCV(method="sigmoid") fits with, on our cross-validated values."""
    from sklearn.calibration import _sigmoid_calibration

    a, b = _sigmoid_calibration(values, positive.astype(int))
    return float(a), float(b)


def _cases():
    from sklearn.datasets import load_breast_cancer, load_iris, load_wine

    bc = load_breast_cancer()
    iris, wine = load_iris(), load_wine()
    out = [("breast_cancer", bc.data, bc.target)]
    m = iris.target != 0  # versicolor vs virginica (overlapping pair)
    out.append(("iris 1v2", iris.data[m], iris.target[m]))
    m = wine.target != 2
    out.append(("wine 0v1", wine.data[m], wine.target[m]))
    m = wine.target != 0
    out.append(("wine 1v2", wine.data[m], wine.target[m]))
    return out


@pytest.mark.parametrize("name,X,y", _cases(), ids=[c[0] for c in _cases()])
def test_sigmoid_matches_sklearn_on_the_same_cv_values(name, X, y):
    # reference: scikit-learn's CalibratedClassifierCV(method="sigmoid") on bundled datasets
    # (Wisconsin breast cancer, Fisher iris, Forina wine; citations from memory)
    cal = calibrate(_problem(X, y), n_folds=5, seed=0, kkt_tol=1e-5)
    assert cal.success, cal.message
    a, b = _sklearn_sigmoid(cal.cv_values, cal.positive)
    assert abs(cal.A - a) <= 1e-4 * abs(a)
    assert abs(cal.B - b) <= 1e-4 * max(abs(b), 1e-3 * abs(a))
    assert cal.fit.gradient_norm < 1e-5


def test_symmetric_values_give_B_zero():
    # closed form: with values symmetric about 0 (f and -f, opposite classes) and equal class
    # counts, the objective F(A, B) is unchanged under (f, class) -> (-f, other class), which
    # maps B to -B; the targets are symmetric too (t+ = 1 - t-), so the unique minimiser
    # (F strictly convex) has B = 0. The start B = log((N-+1)/(N++1)) is 0 as well.
    rng = np.random.default_rng(3)
    f = rng.normal(1.0, 1.0, 40)
    values = np.concatenate([f, -f])
    positive = np.concatenate([np.ones(40, bool), np.zeros(40, bool)])
    fit = fit_sigmoid(values, positive)
    assert fit.success
    assert abs(fit.B) < 1e-12
    assert fit.A < 0


def test_newton_matches_direct_minimisation_of_the_objective():
    # independent check: scipy's BFGS on the same regularised likelihood
    rng = np.random.default_rng(5)
    f = rng.normal(size=200) * 2
    pos = rng.random(200) < 1 / (1 + np.exp(-1.5 * f + 0.3))
    fit = fit_sigmoid(f, pos)
    npos, nneg = pos.sum(), (~pos).sum()
    t = np.where(pos, (npos + 1) / (npos + 2), 1 / (nneg + 2))

    def F(ab):
        z = ab[0] * f + ab[1]
        return np.sum(t * z + np.logaddexp(0, -z))

    ref = minimize(F, [0.0, 0.0], method="BFGS", options={"gtol": 1e-10}).x
    assert fit.success and np.allclose([fit.A, fit.B], ref, rtol=1e-5, atol=1e-7)


def test_degenerate_and_bad_inputs_fail_clearly():
    pos = np.array([True, False, True, False])
    fit = fit_sigmoid(np.array([0.5, 1.0, 2.0, 3.0]), pos)
    assert fit.status == FitStatus.DEGENERATE_VALUES and not fit.success
    assert np.isnan(fit.A) and "all >= 0" in fit.message
    fit = fit_sigmoid(np.zeros(4), pos)
    assert fit.status == FitStatus.DEGENERATE_VALUES
    # decision values that rank the classes the wrong way round: A >= 0, reported failed
    fit = fit_sigmoid(np.array([-2.0, -1.0, 1.0, 2.0]), np.array([True, True, False, False]))
    assert fit.status == FitStatus.NOT_INCREASING and not fit.success
    with pytest.raises(InvalidInputError, match="both classes"):
        fit_sigmoid(np.array([-1.0, 1.0]), np.array([True, True]))
    with pytest.raises(InvalidInputError, match="row index 1"):
        fit_sigmoid(np.array([-1.0, np.nan]), np.array([True, False]))


def test_probabilities_monotone_in_open_interval():
    f = np.linspace(-10, 10, 2001)
    p = sigmoid_probability(f, -1.3, 0.2)
    assert np.all(np.diff(p) > 0)
    assert np.all((p > 0) & (p < 1))
    q = sigmoid_probability(f, 1.3, -0.2)
    assert np.max(np.abs(p + q - 1)) < 1e-15


def test_folds_stratified_seeded_and_refusing_small_classes():
    labels = np.array([0] * 23 + [1] * 7)
    a = stratified_folds(labels, 5, 11)
    assert np.array_equal(a, stratified_folds(labels, 5, 11))
    assert not np.array_equal(a, stratified_folds(labels, 5, 12))
    for c, n in ((0, 23), (1, 7)):
        counts = np.bincount(a[labels == c], minlength=5)
        assert counts.min() >= n // 5 and counts.max() <= -(-n // 5)
    with pytest.raises(InvalidInputError, match="class 'rare' has 3 training rows"):
        stratified_folds(np.array([0] * 10 + [1] * 3), 5, 0, class_names=["common", "rare"])


def test_cv_fits_carry_the_class_weights():
    from sklearn.datasets import load_breast_cancer

    X, y = load_breast_cancer(return_X_y=True)
    X, y = X[:200], y[:200]
    plain = calibrate(_problem(X, y, gamma=0.05), seed=1, kkt_tol=1e-5)
    weighted = calibrate(_problem(X, y, gamma=0.05, class_weight={0: 5.0}), seed=1,
                         kkt_tol=1e-5)
    assert weighted.weights["class_weight"] == {"0": 5.0}
    assert not np.array_equal(plain.cv_values, weighted.cv_values)
    # the fold problem of weighted rows keeps bounds C * 5 (checked by re-solving one fold)
    from solver.calibration.crossval import _fold_problem

    pb = _problem(X, y, gamma=0.05, class_weight={0: 5.0})
    sub = _fold_problem(pb, np.flatnonzero(weighted.folds != 0), 0)
    assert set(np.unique(sub.upper).tolist()) == {1.0, 5.0}


def test_coupling_hand_worked_three_classes():
    # hand-worked: r01 = 0.6, r02 = 0.7, r12 = 0.6 (r_ji = 1 - r_ij).
    # Q = [[r10²+r20², -r10 r01, -r20 r02], [., r01²+r21², -r21 r12], [., ., r02²+r12²]]
    #   = [[0.25, -0.24, -0.21], [-0.24, 0.52, -0.24], [-0.21, -0.24, 0.85]].
    # Q p = b e with Σp = 1 gives p ∝ Q⁻¹e = adj(Q) e / det Q. Worked by hand in exact
    # fractions (units of 1/2500): adj(Q) = [[961, 636, 417], [636, 421, 276],
    # [417, 276, 181]], row sums (2014, 1333, 874), so p = (2014, 1333, 874) / 4221
    # = (0.477138..., 0.315802..., 0.207060...).
    R = np.array([[0.0, 0.6, 0.7], [0.4, 0.0, 0.6], [0.3, 0.4, 0.0]])
    Q = np.array([[0.25, -0.24, -0.21], [-0.24, 0.52, -0.24], [-0.21, -0.24, 0.85]])
    from solver.calibration import coupling_matrix

    assert np.allclose(coupling_matrix(R), Q, atol=1e-15)
    adj = np.linalg.inv(Q) @ np.ones(3)
    expected = adj / adj.sum()
    p = couple_pairwise(R)
    assert np.allclose(p, expected, atol=1e-12)
    assert np.allclose(p, np.array([2014, 1333, 874]) / 4221, atol=1e-12)
    assert p[0] > p[1] > p[2]


def test_coupling_equals_brute_force_constrained_least_squares():
    # brute force: scipy SLSQP on the stated objective with Σp = 1, p >= 0
    rng = np.random.default_rng(7)
    for k in (3, 4, 5, 6):
        for _ in range(5):
            U = rng.uniform(0.02, 0.98, (k, k))
            R = np.triu(U, 1) + np.tril(1 - U.T, -1)

            def obj(p, R=R, k=k):
                return sum((R[j, i] * p[i] - R[i, j] * p[j]) ** 2
                           for i in range(k) for j in range(k) if i != j)

            res = minimize(obj, np.full(k, 1 / k), method="SLSQP",
                           constraints=[{"type": "eq", "fun": lambda p: p.sum() - 1}],
                           bounds=[(0, 1)] * k, options={"ftol": 1e-15, "maxiter": 500})
            p = couple_pairwise(R)
            assert abs(p.sum() - 1) <= 1e-12
            assert np.all(p > 0)
            assert obj(p) <= obj(res.x) + 1e-12
            assert np.allclose(p, res.x, atol=1e-6)


def test_coupling_rows_sum_to_one():
    rng = np.random.default_rng(9)
    P = couple_pairwise_rows(rng.uniform(0.01, 0.99, (50, 6)), 4)
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-12 and np.all((P > 0) & (P < 1))
    with pytest.raises(InvalidInputError, match="strictly between"):
        couple_pairwise(np.array([[0, 1.0], [0.0, 0]]))


def test_evidence_figures():
    p = np.array([0.1, 0.4, 0.6, 0.9])
    y = np.array([False, True, False, True])
    f = np.array([-1.0, 0.2, -0.1, 2.0])
    ev = calibration_evidence(p, y, f)
    assert ev["brier_score"] == pytest.approx((0.01 + 0.36 + 0.36 + 0.01) / 4)
    from sklearn.metrics import brier_score_loss, log_loss  # reference library

    assert ev["brier_score"] == pytest.approx(brier_score_loss(y, p))
    assert ev["log_loss"] == pytest.approx(log_loss(y, p))
    assert sum(b["rows"] for b in ev["bins"]) == 4
    assert ev["disagreements"] == 2  # rows 1 and 2: f and P(positive) on opposite sides
    assert ev["expected_calibration_error"] == pytest.approx(0.25 * (0.1 + 0.6 + 0.6 + 0.1))


def _cli(*args, store):
    env = {**os.environ, "PYTHONPATH": os.getcwd(), "KKTRACE_THREADS": "1"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *args, "--store", str(store)],
                          capture_output=True, text=True, env=env, timeout=600)


def test_cli_train_apply_verify_with_probabilities(tmp_path):
    train = os.path.join(DATA, "tablet_coating.csv")
    hold = os.path.join(DATA, "tablet_coating_holdout.csv")
    r = _cli("train", train, "--label", "lab_decision", "--kkt-tol", "1e-5", "--probabilities",
             "--calibration-seed", "4", "--json", store=tmp_path)
    assert r.returncode == 0, r.stderr
    import json

    s = json.loads(r.stdout)
    rid = s["run_id"]
    assert s["calibration"]["status"] == "fitted" and s["calibration"]["seed"] == 4
    out = tmp_path / "out.csv"
    r = _cli("apply", rid, hold, "--probabilities", "--out", str(out), store=tmp_path)
    assert r.returncode == 0, r.stderr
    rows = list(csv.DictReader(out.open()))
    assert set(rows[0]) == {"row", "decision_value", "label", "probability_reject",
                            "probability_release"}
    f = np.array([float(x["decision_value"]) for x in rows])
    pr = np.array([float(x["probability_release"]) for x in rows])
    tot = pr + np.array([float(x["probability_reject"]) for x in rows])
    assert np.max(np.abs(tot - 1)) <= 1e-12
    order = np.argsort(f)
    assert np.all(np.diff(pr[order]) >= 0)
    r = _cli("verify", rid, "--rerun", train, store=tmp_path)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "probability calibration bitwise" in r.stdout
    # a run without a fitted sigmoid: one clear line, exit 1
    r = _cli("train", train, "--label", "lab_decision", "--trace", "off", "--json",
             store=tmp_path)
    rid2 = json.loads(r.stdout)["run_id"]
    r = _cli("apply", rid2, hold, "--probabilities", store=tmp_path)
    assert r.returncode == 1 and "has no fitted sigmoid" in r.stderr
    assert "Traceback" not in r.stderr
    r = _cli("train", train, "--label", "lab_decision", "--probabilities",
             "--calibration-folds", "400", store=tmp_path)
    assert r.returncode == 1 and "class 'reject' has 186 training rows" in r.stderr


def _our_folds_through_calibrated_classifier_cv(problem, folds, kkt_tol):
    """scikit-learn's public CalibratedClassifierCV(method="sigmoid", ensemble=False) with our
    folds (PredefinedSplit) around an estimator that solves our fold duals: it takes the
    cross-validated decision values itself (cross_val_predict) and fits one sigmoid."""
    from sklearn.base import BaseEstimator, ClassifierMixin
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.model_selection import PredefinedSplit

    from solver.calibration.crossval import _fold_problem
    from solver.smo import solve_smo

    class FoldDual(ClassifierMixin, BaseEstimator):
        def __init__(self, tol=1e-3):
            self.tol = tol

        def fit(self, rows, y):
            rows = rows[:, 0].astype(np.int64)
            sub = _fold_problem(problem, rows, -1)
            res = solve_smo(sub, kkt_tol=self.tol, trace="off")
            sv = np.flatnonzero(res.alpha > sub.lower)
            self.sv, self.coef = sub.X[sv], res.alpha[sv] * sub.y[sv]
            self.bias, self.classes_ = float(res.bias), np.array([0, 1])
            return self

        def decision_function(self, rows):
            X = problem.X[rows[:, 0].astype(np.int64)]
            return problem.kernel.block(X, self.sv) @ self.coef + self.bias

        def predict(self, rows):
            return (self.decision_function(rows) > 0).astype(int)

    cal = CalibratedClassifierCV(FoldDual(kkt_tol), method="sigmoid",
                                 cv=PredefinedSplit(folds), ensemble=False)
    cal.fit(np.arange(problem.n, dtype=np.float64)[:, None], (problem.y > 0).astype(int))
    sig = cal.calibrated_classifiers_[0].calibrators[0]
    return float(sig.a_), float(sig.b_)


@pytest.mark.parametrize("name,X,y", _cases()[:2], ids=[c[0] for c in _cases()[:2]])
def test_sigmoid_matches_calibrated_classifier_cv_with_our_folds(name, X, y):
    # reference: scikit-learn's CalibratedClassifierCV(method="sigmoid") through its public
    # interface, given our folds; it computes the out-of-fold values itself
    pb = _problem(X, y)
    cal = calibrate(pb, n_folds=5, seed=0, kkt_tol=1e-5)
    a, b = _our_folds_through_calibrated_classifier_cv(pb, cal.folds, 1e-5)
    assert cal.success
    assert abs(cal.A - a) <= 1e-4 * abs(a)
    assert abs(cal.B - b) <= 1e-4 * max(abs(b), 1e-3 * abs(a))


def test_cv_fits_carry_the_sample_weights():
    # a known slip elsewhere: calibration folds that drop the weights. Every fold problem
    # keeps its rows' bounds C × class weight × sample weight of the final problem.
    from sklearn.datasets import load_breast_cancer

    from solver.calibration.crossval import _fold_problem

    X, y = load_breast_cancer(return_X_y=True)
    X, y = X[:150], y[:150]
    w = np.random.default_rng(2).uniform(0.2, 3.0, y.size)
    Z = Standardiser.fit(X).transform(X)
    kernel = make_kernel("rbf", gamma=0.05)
    pb = binary_classification(Z, y, kernel=kernel, C=1.0, sample_weight=w,
                               class_weight={0: 2.0})
    cal = calibrate(pb, seed=4, kkt_tol=1e-5)
    assert cal.weights["sample_weight"] is True and cal.weights["class_weight"] == {"0": 2.0}
    for k in range(cal.n_folds):
        rows = np.flatnonzero(cal.folds != k)
        sub = _fold_problem(pb, rows, k)
        assert np.array_equal(sub.upper, np.where(y[rows] == 0, 2.0, 1.0) * w[rows])
    plain = calibrate(binary_classification(Z, y, kernel=kernel, C=1.0), seed=4, kkt_tol=1e-5)
    assert np.array_equal(plain.folds, cal.folds)  # same folds, so only the weights differ
    assert not np.allclose(plain.cv_values, cal.cv_values)


def test_degenerate_fit_end_to_end_is_reported_not_made_up(tmp_path):
    # 50 vs 10 rows of pure noise with a tiny C: every cross-validated value has the
    # majority's sign, so there is nothing to fit a sigmoid to
    import solver
    from solver.data import from_arrays
    from solver.reporting import build_report_content

    rng = np.random.default_rng(0)
    ds = from_arrays(rng.normal(size=(60, 3)), np.array(["ok"] * 50 + ["bad"] * 10),
                     feature_names=["a", "b", "c"], label_name="q")
    out = solver.train(ds, C=0.01, probabilities=True, store=tmp_path, trace="off",
                       explain=False)
    att = out.records[0].attachments["calibration"]
    assert att["status"] == "degenerate_values"
    assert att["A"] is None or np.isnan(att["A"])
    assert any("this run gives no probabilities" in w for w in out.warnings)
    with pytest.raises(InvalidInputError, match="gives no probabilities: its sigmoid fit "
                                                "failed \\(degenerate_values\\)"):
        solver.apply(out.run_ids[0], ds, store=tmp_path, probabilities=True)
    cal = build_report_content([out.records[0]]).runs[0].calibration
    assert cal.evidence is None and any("No probabilities" in n for n in cal.notes)
