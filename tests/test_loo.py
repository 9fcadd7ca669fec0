"""Leave-one-out bounds, exact leave-one-out from support-vector refits, sensitivity.

Published facts used as checks (sources named; exact sections from memory):

* Removing a training point that is not a support vector and retraining leaves the
  solution unchanged (Vapnik, The Nature of Statistical Learning Theory, 1995, and
  Statistical Learning Theory, 1998; Schölkopf & Smola, Learning with Kernels, 2002,
  chapter on leave-one-out bounds — from memory).  Consequence: leave-one-out errors ≤ #SV.
* Joachims (2000), "Estimating the generalization performance of a SVM efficiently",
  ICML: the ξα-estimate |{i : 2αᵢR²_Δ + ξᵢ ≥ 1}| / n bounds the leave-one-out error rate
  of a stable solution (one with a free support vector) — form and condition from memory.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.model_selection import LeaveOneOut as SkLeaveOneOut
from sklearn.model_selection import cross_val_predict
from sklearn.svm import SVC

from solver.certificate import certify
from solver.errors import ConvergenceWarning, InvalidInputError
from solver.explanation import _refit as refit_mod
from solver.explanation import leave_one_out, sensitivity
from solver.explanation._decrement import decremental_path
from solver.explanation._refit import Refitter, drop_row, removal_start
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.smo import solve_smo

TOL = 1e-7  # tight solver tolerance so that tolerance-level differences stay far below signs


def _problem(loader, a, b, *, gamma=None, C=1.0, rows=None, kernel=None):
    """Classes a vs b of a scikit-learn bundled dataset, standardised."""
    X, t = loader(return_X_y=True)
    m = (t == a) | (t == b)
    X, t = X[m], t[m]
    if rows is not None:
        X, t = X[rows], t[rows]
    Z = Standardiser.fit(X).transform(X)
    kern = kernel if kernel is not None else RBFKernel(gamma=gamma)
    return binary_classification(Z, t, kernel=kern, C=C)


def _solve(prob, kkt_tol=TOL):
    res = solve_smo(prob, kkt_tol=kkt_tol, trace="off")
    assert res.success, res.message
    return res


def _decisions(prob, res):
    return prob.y * prob.q_times(res.alpha) + res.bias


DATASETS = {
    # name: (loader, class a, class b, gamma, C, rows)
    "iris_versicolor_virginica": (load_iris, 1, 2, 0.5, 1.0, None),
    "iris_setosa_versicolor": (load_iris, 0, 1, 0.2, 10.0, None),
    "wine_0_1": (load_wine, 0, 1, 0.1, 1.0, None),
    "wine_1_2": (load_wine, 1, 2, None, 3.0, None),
    "breast_cancer_subset": (load_breast_cancer, 0, 1, 0.05, 2.0, slice(0, 150)),
}


@pytest.fixture(scope="module", params=sorted(DATASETS))
def solved(request):
    loader, a, b, gamma, C, rows = DATASETS[request.param]
    prob = _problem(loader, a, b, gamma=gamma, C=C, rows=rows)
    return request.param, prob, _solve(prob)


def test_removing_a_non_support_vector_changes_nothing(solved):
    # published property (Vapnik 1995/1998; Schölkopf & Smola 2002): retraining without a
    # non-support vector reproduces every decision value — here with cold refits
    name, prob, res = solved
    f = _decisions(prob, res)
    non_sv = np.flatnonzero(res.certificate.at_lower)
    assert non_sv.size > 0
    pick = non_sv[np.linspace(0, non_sv.size - 1, min(6, non_sv.size)).astype(int)]
    for i in pick:
        sub, keep = drop_row(prob, int(i))
        r = _solve(sub)
        f_sub = prob.kernel.block(prob.X, sub.X) @ (r.alpha * sub.y) + r.bias
        np.testing.assert_allclose(f_sub, f, atol=1e-4, err_msg=f"{name}: row {i}")


def test_non_support_vector_property_with_reference_solver():
    # the same published property checked with an independent solver (scikit-learn SVC)
    prob = _problem(load_wine, 0, 1, gamma=0.1, C=1.0)
    svc = SVC(kernel="rbf", gamma=0.1, C=1.0, tol=1e-10).fit(prob.X, prob.y)
    f = svc.decision_function(prob.X)
    non_sv = np.setdiff1d(np.arange(prob.n), svc.support_)
    for i in non_sv[:: max(1, non_sv.size // 5)]:
        keep = np.delete(np.arange(prob.n), i)
        s2 = SVC(kernel="rbf", gamma=0.1, C=1.0, tol=1e-10).fit(prob.X[keep], prob.y[keep])
        np.testing.assert_allclose(s2.decision_function(prob.X), f, atol=1e-6)


def test_exact_loo_equals_brute_force_and_bounds_hold(solved):
    name, prob, res = solved
    fast = leave_one_out(prob, res)
    brute = leave_one_out(prob, res, method="brute_force")
    assert fast.all_converged and brute.all_converged
    assert fast.refits == fast.n_support < prob.n == brute.refits
    np.testing.assert_array_equal(fast.loo_wrong, brute.loo_wrong, err_msg=name)
    assert fast.errors == brute.errors
    np.testing.assert_allclose(fast.loo_values, brute.loo_values, atol=1e-4)
    # independent spot check: a plain cold refit without the row, evaluated at that row
    sv = np.flatnonzero(~res.certificate.at_lower)
    for i in sv[np.linspace(0, sv.size - 1, 3).astype(int)]:
        sub, _ = drop_row(prob, int(i))
        r = _solve(sub)
        f_i = prob.kernel.block(prob.X[i], sub.X)[0] @ (r.alpha * sub.y) + r.bias
        assert fast.loo_values[i] == pytest.approx(f_i, abs=1e-4)
    # both bounds are upper bounds of the exact leave-one-out error (Vapnik; Joachims 2000,
    # the ξα-estimate for stable solutions: at least one free support vector)
    assert fast.slack_bound_applies
    assert fast.support_vector_bound >= fast.error_rate
    assert fast.slack_bound_rate >= fast.error_rate
    assert fast.slack_bound_rate <= fast.support_vector_bound  # ξα only counts support vectors
    # sensitivity from either record agrees on the flips
    s_fast = sensitivity(prob, res, loo=fast)
    s_brute = sensitivity(prob, res, loo=brute)
    np.testing.assert_array_equal(s_fast.rows, s_brute.rows)
    np.testing.assert_allclose(s_fast.max_abs_change, s_brute.max_abs_change, atol=1e-4)


@pytest.mark.parametrize("name", ["wine_1_2", "breast_cancer_subset"])
def test_loose_tolerance_disagreements_are_flagged(name):
    # at kkt_tol = 1e-3 two valid solutions may differ by about kkt_tol in f: any row on which the
    # two methods disagree must be flagged as near the boundary by one of them
    loader, a, b, gamma, C, rows = DATASETS[name]
    prob = _problem(loader, a, b, gamma=gamma, C=C, rows=rows)
    res = _solve(prob, kkt_tol=1e-3)
    fast = leave_one_out(prob, res)
    brute = leave_one_out(prob, res, method="brute_force")
    differ = set(np.flatnonzero(fast.loo_wrong != brute.loo_wrong).tolist())
    assert differ <= set(fast.near_boundary_rows.tolist()) | set(brute.near_boundary_rows)
    np.testing.assert_array_equal(fast.near_boundary_rows,
                                  np.flatnonzero(np.abs(fast.loo_values) <= 1e-3))


def test_exact_loo_matches_reference_library():
    # external check: scikit-learn's leave-one-out predictions with SVC on the same problem
    prob = _problem(load_iris, 1, 2, gamma=0.5, C=1.0)
    loo = leave_one_out(prob, _solve(prob))
    pred = cross_val_predict(SVC(kernel="rbf", gamma=0.5, C=1.0, tol=1e-10), prob.X, prob.y,
                             cv=SkLeaveOneOut())
    np.testing.assert_array_equal(loo.loo_wrong, pred != prob.y)
    assert loo.errors == int(np.sum(pred != prob.y)) > 0


def test_xi_alpha_needs_a_free_support_vector():
    # all multipliers at the bound (RBF gamma = 3, C = 0.1 on iris versicolor/virginica):
    # every leave-one-out prediction flips to the other class (checked with scikit-learn's
    # SVC), and the ξα-estimate, whose stability condition fails, is not a bound here
    prob = _problem(load_iris, 1, 2, gamma=3.0, C=0.1)
    res = _solve(prob)
    assert res.certificate.n_free == 0
    loo = leave_one_out(prob, res)
    pred = cross_val_predict(SVC(kernel="rbf", gamma=3.0, C=0.1, tol=1e-10), prob.X, prob.y,
                             cv=SkLeaveOneOut())
    assert loo.errors == int(np.sum(pred != prob.y)) == prob.n
    assert not loo.slack_bound_applies and not loo.to_dict()["slack_bound_applies"]
    assert loo.slack_bound_rate < loo.error_rate <= loo.support_vector_bound


def test_non_support_vectors_are_never_loo_errors(solved):
    _, prob, res = solved
    loo = leave_one_out(prob, res)
    assert not np.any(loo.loo_wrong[res.certificate.at_lower])
    # a training error stays a leave-one-out error: comparing the two optimal objectives
    # gives hinge(yᵢf(xᵢ)) ≤ hinge(yᵢf₋ᵢ(xᵢ)), so yᵢf₋ᵢ(xᵢ) ≤ yᵢf(xᵢ) < 0 (common practice)
    f = _decisions(prob, res)
    train_wrong = (f > 0) != (prob.y > 0)
    assert np.all(loo.loo_wrong[train_wrong])


def test_removal_start_is_feasible_and_keeps_free_margins():
    # decremental step (Cauwenberghs & Poggio 2001): f is linear in (α, b), so when no
    # multiplier is clipped the free support vectors keep their margins exactly (the
    # common shift is absorbed by the bias)
    prob = _problem(load_wine, 0, 1, gamma=0.1, C=1.0)
    res = _solve(prob)
    c = res.certificate
    free = ~(c.at_lower | c.at_upper)
    K = prob.kernel.gram(prob.X)
    checked = 0
    for i in np.flatnonzero(~c.at_lower):
        sub, keep = drop_row(prob, int(i))
        a0 = removal_start(prob, res.alpha, int(i))
        bound, eq = sub.feasibility(a0)
        assert bound == 0.0 and eq < 1e-12
        S = np.flatnonzero(free[keep])
        if S.size < 2 or np.any((a0[S] <= 0.0) | (a0[S] >= sub.upper[S])):
            continue  # a multiplier hit its bound: only feasibility is promised
        F_old = K[keep] @ (res.alpha * prob.y)
        F_new = K[np.ix_(keep, keep)] @ (a0 * sub.y)
        assert np.ptp((F_new - F_old)[S]) < 1e-9  # every free margin moves by the same Δb
        checked += 1
    assert checked >= 3


def test_removal_start_falls_back_to_other_class():
    # three points of class +1 all at the bound C: the same class has no room, so the
    # multiplier of the removed point is taken from the other class, nearest point first
    X = np.array([[0.0], [0.1], [0.2], [1.0], [1.1], [3.0]])
    prob = binary_classification(X, np.array([1, 1, 1, -1, -1, -1]), kernel=RBFKernel(gamma=1.0),
                                 C=1.0)
    alpha = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 1.0])
    a0 = removal_start(prob, alpha, 0)
    sub, _ = drop_row(prob, 0)
    assert sub.feasibility(a0) == (0.0, 0.0)
    np.testing.assert_allclose(a0, [1.0, 1.0, 0.0, 1.0, 1.0])  # nearest other-class: x = 1.0


def test_decremental_path_matches_reference_refits():
    # the path alone (no solver call) must give the solution of the problem without the
    # row: checked with kktrace's certificate and against scikit-learn's SVC refitted
    # without that row (external reference)
    prob = _problem(load_wine, 0, 1, gamma=0.1, C=1.0)
    res = _solve(prob)
    ref = Refitter(prob, solve_smo, {"kkt_tol": TOL, "trace": "off"}, alpha=res.alpha,
                   bias=res.bias, shared_gram=True)
    used = 0
    for i in np.flatnonzero(~res.certificate.at_lower):
        path = decremental_path(prob, res.alpha, res.bias, ref.s, int(i), ref.rows,
                                work_factor=1e9)
        if path is None:
            continue
        a, b, events, complete = path
        assert complete
        sub, keep = drop_row(prob, int(i))
        assert sub.feasibility(a[keep])[0] == 0.0 and sub.feasibility(a[keep])[1] < 1e-10
        cert = certify(sub, a[keep], kkt_tol=TOL)
        assert cert.max_violation <= 10 * TOL
        svc = SVC(kernel="rbf", gamma=0.1, C=1.0, tol=1e-10).fit(sub.X, sub.y)
        f = prob.kernel.block(prob.X, sub.X) @ (a[keep] * sub.y) + cert.bias
        np.testing.assert_allclose(f, svc.decision_function(prob.X), atol=1e-5)
        used += events > 0
    assert used >= 3  # paths with set changes were exercised


@pytest.mark.parametrize("name", ["wine_0_1", "breast_cancer_subset"])
def test_compiled_path_equals_array_path(name):
    # the numba kernel (full Gram) and the array version (kernel rows) are one algorithm
    loader, a, b, gamma, C, rows = DATASETS[name]
    prob = _problem(loader, a, b, gamma=gamma, C=C, rows=rows)
    res = _solve(prob)
    ref = Refitter(prob, solve_smo, {"kkt_tol": TOL, "trace": "off"}, alpha=res.alpha,
                   bias=res.bias, shared_gram=True)
    events = 0
    for i in np.flatnonzero(~res.certificate.at_lower):
        fast = decremental_path(prob, res.alpha, res.bias, ref.s, int(i), ref.rows,
                                gram=ref.gram)
        slow = decremental_path(prob, res.alpha, res.bias, ref.s, int(i), ref.rows)
        assert (fast is None) == (slow is None)
        if fast is None:
            continue
        np.testing.assert_allclose(fast[0], slow[0], atol=1e-12)
        assert fast[1] == pytest.approx(slow[1], abs=1e-12)
        assert fast[2:] == slow[2:]
        events += fast[2]
    assert events > 0


def test_working_set_growth_and_fallback_stay_exact(monkeypatch):
    # without the decremental path, shrink the working set to the support vectors only,
    # so refits must add points that become support vectors; then forbid growth so the
    # whole-problem fallback runs
    prob = _problem(load_breast_cancer, 0, 1, gamma=0.05, C=10.0, rows=slice(0, 120))
    res = _solve(prob)
    f = _decisions(prob, res)
    sv = np.flatnonzero(~res.certificate.at_lower)
    ref = Refitter(prob, solve_smo, {"kkt_tol": TOL, "trace": "off"}, alpha=res.alpha,
                   bias=res.bias, shared_gram=True)
    monkeypatch.setattr(refit_mod, "decremental_path", lambda *args, **kw: None)
    monkeypatch.setattr(refit_mod, "WORKING_MARGIN", -1.0)
    grown = [ref.warm(int(i), prob.y * f) for i in sv[:12]]
    assert any(g.rounds > 1 for g in grown)
    monkeypatch.setattr(refit_mod, "MAX_ROUNDS", 1)
    fell_back = [ref.warm(int(i), prob.y * f) for i in sv[:12]]
    for g, h, i in zip(grown, fell_back, sv[:12], strict=True):
        cold = ref.cold(int(i))
        assert g.status == h.status == cold.status == "converged"
        sub, _ = drop_row(prob, int(i))
        for r in (g, h):
            assert certify(sub, r.alpha, kkt_tol=TOL).max_violation <= TOL
        np.testing.assert_allclose(g.alpha, cold.alpha, atol=1e-4)


def test_shared_gram_off_gives_same_answer():
    prob = _problem(load_iris, 1, 2, gamma=0.5, C=1.0)
    res = _solve(prob)
    a = leave_one_out(prob, res)
    b = leave_one_out(prob, res, shared_gram_mb=0.0)
    np.testing.assert_array_equal(a.loo_wrong, b.loo_wrong)
    np.testing.assert_allclose(a.loo_values, b.loo_values, atol=1e-5)


def test_non_converged_refits_are_reported():
    prob = _problem(load_iris, 1, 2, gamma=0.5, C=1.0)
    res = _solve(prob)
    with pytest.warns(ConvergenceWarning, match="did not converge"):
        loo = leave_one_out(prob, res, method="brute_force", solver_options={"iteration_limit": 2})
    assert not loo.all_converged
    assert loo.non_converged_rows.size == sum(s != "converged" for s in loo.refit_status) > 0
    assert "iteration_limit" in loo.refit_status
    assert loo.to_dict()["non_converged"] == loo.non_converged_rows.size
    sens = sensitivity(prob, res, loo=loo)
    assert not sens.converged.all()


def test_progress_summary_and_columns():
    prob = _problem(load_wine, 0, 1, gamma=0.1, C=1.0)
    res = _solve(prob)
    seen = []
    loo = leave_one_out(prob, res, progress=lambda d, t: seen.append((d, t)))
    assert seen == [(k + 1, loo.refits) for k in range(loo.refits)]
    d = loo.to_dict()
    assert d["refits"] == loo.n_support and d["estimated_brute_force_seconds"] > 0
    assert d["kernel_value_range"] == pytest.approx(1.0 - prob.kernel.gram(prob.X).min())
    cols = loo.to_columns()
    assert cols["refitted"].sum() == loo.refits
    assert loo.seconds > 0 and loo.refit_seconds.size == loo.refits


def test_sensitivity_matches_a_direct_refit():
    prob = _problem(load_wine, 0, 1, gamma=0.1, C=1.0)
    res = _solve(prob)
    f = _decisions(prob, res)
    sens = sensitivity(prob, res)
    assert sens.rows.size == res.certificate.n_support
    first = sens.top(3)
    assert [r["row_id"] for r in first] == sens.ranking[:3].tolist()
    keyed = [(-r["flips"], -r["max_abs_change"]) for r in sens.top(sens.rows.size)]
    assert keyed == sorted(keyed)
    i = int(sens.ranking[0])
    sub, keep = drop_row(prob, i)
    r = _solve(sub)
    f_sub = prob.kernel.block(prob.X, sub.X) @ (r.alpha * sub.y) + r.bias
    change = np.abs(f_sub - f)[keep]
    assert first[0]["max_abs_change"] == pytest.approx(change.max(), abs=1e-4)
    flips = int(np.sum(((f_sub > 0) != (prob.y > 0))[keep] != ((f > 0) != (prob.y > 0))[keep]))
    assert first[0]["flips"] == flips
    cols = sens.to_columns()
    assert sorted(cols["rank"].tolist()) == list(range(1, sens.rows.size + 1))


def test_bad_requests():
    prob = _problem(load_iris, 1, 2, gamma=0.5, C=1.0)
    res = _solve(prob)
    with pytest.raises(InvalidInputError, match="method"):
        leave_one_out(prob, res, method="fast")
    with pytest.raises(InvalidInputError, match="alpha0"):
        leave_one_out(prob, res, solver_options={"alpha0": res.alpha})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        stopped = solve_smo(prob, kkt_tol=TOL, iteration_limit=3, trace="off")
    with pytest.raises(InvalidInputError, match="converged solution"):
        leave_one_out(prob, stopped)
    with pytest.raises(InvalidInputError, match="not a training row"):
        drop_row(prob, prob.n)
    other = _problem(load_wine, 0, 1, gamma=0.1)
    with pytest.raises(InvalidInputError, match="rows"):
        sensitivity(other, _solve(other), loo=leave_one_out(prob, res))


@settings(derandomize=True, max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), C=st.floats(0.1, 10.0))
def test_removal_start_feasible_property(seed, C):
    # any feasible α and any removed row: the warm start is feasible for the smaller problem
    rng = np.random.default_rng(seed)
    n = int(rng.integers(3, 25))
    y = np.where(rng.random(n) < 0.5, -1, 1)
    y[:2] = [-1, 1]
    prob = binary_classification(rng.normal(size=(n, 2)), y, kernel=RBFKernel(gamma=1.0), C=C)
    a = rng.uniform(0, C, n)
    pos, neg = prob.y > 0, prob.y < 0  # scale the heavier class down so that yᵀα = 0
    s_pos, s_neg = a[pos].sum(), a[neg].sum()
    a[pos if s_pos > s_neg else neg] *= min(s_pos, s_neg) / max(s_pos, s_neg)
    i = int(rng.integers(0, n))
    sub, _ = drop_row(prob, i)
    bound, eq = sub.feasibility(removal_start(prob, a, i))
    assert bound == 0.0 and eq <= 1e-12 * max(1.0, a.sum())


@pytest.mark.parametrize("weights", ["class", "row"])
def test_exact_loo_is_correct_with_weights(weights):
    # Weighted bounds uᵢ = C·w_class·w_row: the support-vector refits must keep every other
    # row's bound.  Checked against an independent brute force that rebuilds each
    # leave-one-out problem from the data with the same weights (row i removed) and solves
    # it from scratch; for class weights also against scikit-learn's leave-one-out
    # predictions with SVC(class_weight=...) (same dual, bounds C·w_class).
    X, t = load_iris(return_X_y=True)
    m = (t == 1) | (t == 2)
    Z, t = Standardiser.fit(X[m]).transform(X[m]), t[m]
    kern = RBFKernel(gamma=0.5)
    rng = np.random.default_rng(2)
    cw = {1: 3.0, 2: 0.5} if weights == "class" else None
    sw = rng.uniform(0.3, 3.0, size=t.shape[0]) if weights == "row" else None
    prob = binary_classification(Z, t, kernel=kern, C=1.0, class_weight=cw, sample_weight=sw)
    res = _solve(prob)
    plain = _solve(binary_classification(Z, t, kernel=kern, C=1.0))
    assert not np.array_equal(prob.upper, np.full(prob.n, 1.0))  # the weights are in use
    loo = leave_one_out(prob, res)
    wrong = np.zeros(prob.n, dtype=bool)
    for i in range(prob.n):
        keep = np.arange(prob.n) != i
        p_i = binary_classification(Z[keep], t[keep], kernel=kern, C=1.0, class_weight=cw,
                                    sample_weight=None if sw is None else sw[keep])
        r_i = _solve(p_i)
        f = np.sum(r_i.alpha * p_i.y * kern.block(p_i.X, Z[i:i + 1])[:, 0]) + r_i.bias
        wrong[i] = np.sign(f) != prob.y[i]
    np.testing.assert_array_equal(loo.loo_wrong, wrong)
    if weights == "class":
        pred = cross_val_predict(SVC(kernel="rbf", gamma=0.5, C=1.0, tol=1e-10,
                                     class_weight={-1.0: 3.0, 1.0: 0.5}), Z, prob.y,
                                 cv=SkLeaveOneOut())
        np.testing.assert_array_equal(loo.loo_wrong, pred != prob.y)
    # and the weights matter for the answer (else the check could not fail)
    assert not np.array_equal(leave_one_out(prob, res).loo_values,
                              leave_one_out(binary_classification(Z, t, kernel=kern, C=1.0),
                                            plain).loo_values)
