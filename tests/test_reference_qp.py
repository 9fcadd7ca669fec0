"""Reference checks of the QP reference solver and of SMO–QP agreement.

Sources: scikit-learn's bundled copies of Fisher's iris (Fisher 1936, Annals of Eugenics
7:179–188), the Wisconsin diagnostic breast cancer data (Street, Wolberg & Mangasarian
1993), the UCI wine recognition data (Forina et al.) and the UCI optical digits (Alpaydin &
Kaynak); scikit-learn's SVC as an independent third solver (test reference only).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.optimize
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer, load_digits, load_iris, load_wine
from sklearn.svm import SVC

from solver.agreement import compare_runs
from solver.errors import ConvergenceWarning, ProblemMismatchError
from solver.kernels import LinearKernel, PolynomialKernel, RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.qp import DEFAULT_INTERIOR_POINT_TOL, DEFAULT_KKT_TOL, solve_qp
from solver.run import RunRecord

smo = pytest.importorskip("solver.smo")


@pytest.fixture(autouse=True, scope="module")
def _one_blas_thread():
    # The CI box and this shared machine have 2 cores; OpenBLAS threads spinning against
    # other processes slow the dense factorisations tenfold.  Results do not depend on it.
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield

#: SMO stopping tolerance for "tightly solved" runs (maximal violation, gradient units).
SMO_TIGHT = 1e-8


def _pair(loader, a: int, b: int):
    X, y = loader(return_X_y=True)
    keep = (y == a) | (y == b)
    return X[keep], y[keep]


DATASETS = {
    # scikit-learn's bundled copies; class pairs as named
    "breast_cancer": lambda: load_breast_cancer(return_X_y=True),
    "iris_setosa_versicolor": lambda: _pair(load_iris, 0, 1),
    "iris_versicolor_virginica": lambda: _pair(load_iris, 1, 2),
    "iris_setosa_virginica": lambda: _pair(load_iris, 0, 2),
    "wine_0_1": lambda: _pair(load_wine, 0, 1),
    "wine_0_2": lambda: _pair(load_wine, 0, 2),
    "wine_1_2": lambda: _pair(load_wine, 1, 2),
    "digits_3_8": lambda: _pair(load_digits, 3, 8),
}

KERNELS = {
    "linear": LinearKernel,
    "rbf": RBFKernel,  # gamma from the median heuristic, resolved on the standardised rows
    "poly": lambda: PolynomialKernel(degree=2, offset=1.0),
}


def _record(X, labels, kernel, C, method, **opts) -> RunRecord:
    std = Standardiser.fit(X)
    prob = binary_classification(std.transform(X), labels, kernel=kernel, C=C)
    res = smo.solve_smo(prob, **opts) if method == "smo" else solve_qp(prob, **opts)
    data = {"fingerprint": f"test:{X.shape}:{float(X.sum()):.17g}",
            "feature_names": [f"f{i}" for i in range(X.shape[1])], "n_rows": X.shape[0]}
    return RunRecord(problem=prob, result=res, data=data, standardiser=std)


# --------------------------------------------------------------------------- SMO vs QP


@pytest.mark.parametrize("kernel_name", list(KERNELS))
@pytest.mark.parametrize("dataset", list(DATASETS))
def test_smo_and_qp_agree_on_bundled_datasets(dataset, kernel_name):
    X, labels = DATASETS[dataset]()
    for C in (0.1, 10.0):
        a = _record(X, labels, KERNELS[kernel_name](), C, "smo", kkt_tol=SMO_TIGHT)
        b = _record(X, labels, KERNELS[kernel_name](), C, "qp")
        assert a.result.success and b.result.success
        comp = compare_runs(a, b)
        assert comp.measures["objective_rel_diff"].value <= 1e-6
        assert comp.verdict == "agree", comp.verdict_text


def _kernels():
    return st.one_of(
        st.just(LinearKernel()),
        st.builds(RBFKernel, gamma=st.floats(0.05, 2.0)),
        st.builds(PolynomialKernel, gamma=st.floats(0.1, 1.0), degree=st.integers(1, 3),
                  offset=st.floats(0.0, 2.0)),
    )


@settings(derandomize=True, max_examples=100, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(4, 40), d=st.integers(1, 5),
       kernel=_kernels(), logC=st.floats(-2.0, 2.0))
def test_smo_and_qp_agree_on_random_problems(seed, n, d, kernel, logC):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    labels = np.where(X[:, 0] + rng.normal(size=n) > 0, 1, -1)
    labels[:2] = [1, -1]  # both classes present
    C = float(10.0**logC)
    a = _record(X, labels, kernel, C, "smo", kkt_tol=SMO_TIGHT)
    b = _record(X, labels, kernel, C, "qp")
    assert a.result.success and b.result.success
    comp = compare_runs(a, b)
    assert comp.measures["objective_rel_diff"].value <= 1e-6
    assert comp.verdict == "agree", comp.verdict_text


# --------------------------------------------------------------------------- QP vs outside world


@pytest.mark.parametrize("kernel,gamma", [("linear", None), ("rbf", 0.02)])
@pytest.mark.parametrize("C", [1.0, 10.0])
def test_qp_matches_scikit_learn_svc_on_breast_cancer(kernel, gamma, C):
    # Wisconsin diagnostic breast cancer data (scikit-learn bundled copy), standardised;
    # scikit-learn's SVC with a tight tolerance as an independent solver.
    X, labels = load_breast_cancer(return_X_y=True)
    Z = Standardiser.fit(X).transform(X)
    kern = LinearKernel() if kernel == "linear" else RBFKernel(gamma=gamma)
    prob = binary_classification(Z, labels, kernel=kern, C=C)
    r = solve_qp(prob)
    assert r.success
    ref = SVC(C=C, kernel=kernel, gamma=gamma if gamma else "auto", tol=1e-9).fit(Z, labels)
    ref_alpha = np.zeros(prob.n)
    ref_alpha[ref.support_] = np.abs(ref.dual_coef_[0])
    d_ref, d_qp = prob.objective(ref_alpha), r.certificate.dual_objective
    assert abs(d_qp - d_ref) <= 1e-7 * abs(d_ref)
    assert d_qp <= d_ref + 1e-9 * abs(d_ref)  # the reference is not better than our optimum
    f_ref = ref.decision_function(Z)  # SVC's sign convention: positive for labels == 1
    f_qp = prob.y * prob.q_times(r.alpha) + r.bias
    assert np.max(np.abs(f_qp - f_ref)) <= 1e-3
    assert r.bias == pytest.approx(float(ref.intercept_[0]), abs=1e-3)


@pytest.mark.parametrize("dataset", ["breast_cancer", "wine_1_2", "digits_3_8"])
@pytest.mark.parametrize("kernel_name", ["linear", "rbf", "poly"])
def test_qp_meets_kkt_to_cvxopt_tolerance(dataset, kernel_name):
    # cvxopt's own stopping test (residuals ≤ feastol, gap ≤ abstol or relative gap ≤ reltol,
    # all = kkt_tol) holds at the returned iterate, and the shared certificate confirms KKT.
    X, labels = DATASETS[dataset]()
    rec = _record(X, labels, KERNELS[kernel_name](), 1.0, "qp")
    r = rec.result
    assert r.success
    stats = r.extra["backend_stats"]
    assert stats["primal_infeasibility"] <= DEFAULT_INTERIOR_POINT_TOL
    assert stats["dual_infeasibility"] <= DEFAULT_INTERIOR_POINT_TOL
    assert (stats["gap"] <= DEFAULT_INTERIOR_POINT_TOL
            or stats["relative_gap"] <= DEFAULT_INTERIOR_POINT_TOL)
    c = r.certificate
    assert c.meets_tol and c.max_violation <= DEFAULT_KKT_TOL
    assert c.bound_violation == 0.0 and c.equality_residual <= 1e-10


# --------------------------------------------------------------------------- separable case


def _hull_distance(A: np.ndarray, B: np.ndarray, penalty: float = 1e5) -> float:
    """Distance between the convex hulls of the rows of A and B, computed independently.

    min ‖Aᵀλ − Bᵀμ‖ over λ, μ ≥ 0 with Σλ = Σμ = 1, solved by SciPy's non-negative least
    squares (Lawson & Hanson 1974) with the two sums as heavily weighted rows, then
    renormalised.  For separable classes the hard-margin SVM's margin width 2/‖w‖ equals
    this distance (Bennett & Bredensteiner 2000, "Duality and geometry in SVM classifiers").
    """
    na, nb = len(A), len(B)
    rows = np.vstack([np.hstack([A.T, -B.T]),
                      penalty * np.r_[np.ones(na), np.zeros(nb)],
                      penalty * np.r_[np.zeros(na), np.ones(nb)]])
    rhs = np.r_[np.zeros(A.shape[1]), penalty, penalty]
    v, _ = scipy.optimize.nnls(rows, rhs, maxiter=100 * (na + nb))
    lam, mu = v[:na] / v[:na].sum(), v[na:] / v[na:].sum()
    return float(np.linalg.norm(A.T @ lam - B.T @ mu))


def test_fisher_iris_setosa_versicolor_maximum_margin_hyperplane():
    # Fisher's iris (Fisher 1936; scikit-learn's bundled copy), raw measurements in cm.
    # Setosa is linearly separable from the other species (stated with the UCI copy of
    # the data; from memory), so with a linear kernel and very large C the soft-margin dual
    # gives the hard-margin, maximum-margin hyperplane; both solvers must find the same one.
    X, labels = _pair(load_iris, 0, 1)
    C = 1e6
    recs = {}
    for method, opts in (("smo", {"kkt_tol": 1e-10}), ("qp", {})):
        prob = binary_classification(X, labels, kernel=LinearKernel(), C=C)
        res = smo.solve_smo(prob, **opts) if method == "smo" else solve_qp(prob, **opts)
        assert res.success
        recs[method] = RunRecord(problem=prob, result=res, data={"fingerprint": "iris"},
                                 standardiser=Standardiser.identity(4))
    w = {m: (r.result.alpha * r.problem.y) @ X for m, r in recs.items()}
    b = {m: r.result.bias for m, r in recs.items()}
    np.testing.assert_allclose(w["smo"], w["qp"], rtol=1e-6, atol=1e-7)
    assert b["smo"] == pytest.approx(b["qp"], rel=1e-6)
    assert compare_runs(recs["smo"], recs["qp"]).verdict == "agree"
    y = recs["qp"].problem.y
    for m in w:
        f = X @ w[m] + b[m]
        assert np.min(y * f) == pytest.approx(1.0, abs=1e-6)  # hard margin: min yf = 1
        assert recs[m].result.certificate.n_bounded == 0  # no slack: no α at C
    # margin width equals the distance between the two classes' convex hulls
    hull = _hull_distance(X[y > 0], X[y < 0])
    assert 2.0 / np.linalg.norm(w["qp"]) == pytest.approx(hull, rel=1e-6)
    # and scikit-learn's SVC finds the same hyperplane
    ref = SVC(C=C, kernel="linear", tol=1e-10).fit(X, labels)
    np.testing.assert_allclose(ref.coef_[0], w["qp"], rtol=1e-4, atol=1e-5)
    assert float(ref.intercept_[0]) == pytest.approx(b["qp"], rel=1e-4)


# --------------------------------------------------------------------------- tampering, mismatch


@pytest.fixture(scope="module")
def cancer_runs():
    X, labels = load_breast_cancer(return_X_y=True)
    a = _record(X, labels, RBFKernel(), 1.0, "smo", kkt_tol=SMO_TIGHT)
    b = _record(X, labels, RBFKernel(), 1.0, "qp")
    return X, labels, a, b


def test_tampered_smo_run_disagrees_with_qp(cancer_runs):
    from dataclasses import replace

    _, _, a, b = cancer_runs
    assert compare_runs(a, b).verdict == "agree"
    biased = replace(a, result=replace(a.result, bias=a.result.bias + 0.05))
    c = compare_runs(biased, b)
    assert c.verdict == "disagree" and "bias_diff" in c.failed
    assert "bias_diff = 0.05" in c.verdict_text
    alpha = a.result.alpha.copy()
    sv = np.flatnonzero(alpha > 0)
    pos, neg = sv[a.problem.y[sv] > 0][0], sv[a.problem.y[sv] < 0][0]
    alpha[pos] += 0.2  # feasible (yᵀα still 0, within [0, C]) but not optimal
    alpha[neg] += 0.2
    alpha = np.minimum(alpha, 1.0)
    c2 = compare_runs(replace(a, result=replace(a.result, alpha=alpha)), b)
    assert c2.verdict == "disagree"
    assert {"alpha_max_diff", "objective_rel_diff", "decision_max_diff"} <= set(c2.failed)


def test_runs_of_different_problems_are_refused(cancer_runs):
    X, labels, a, _ = cancer_runs
    other_c = _record(X, labels, RBFKernel(), 2.0, "qp")
    with pytest.raises(ProblemMismatchError, match=r"C: 1\.0 vs 2\.0"):
        compare_runs(a, other_c)
    other_k = _record(X, labels, LinearKernel(), 1.0, "qp")
    with pytest.raises(ProblemMismatchError, match="kernel: .*'rbf'.*'linear'"):
        compare_runs(a, other_k)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        forced = compare_runs(a, other_c, allow_mismatch=True)
    assert forced.verdict != "agree" and "C: 1.0 vs 2.0" in forced.verdict_text
