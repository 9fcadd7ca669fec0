"""Reference checks of ε-regression and one-class solutions against the outside world.

* scikit-learn's SVR and OneClassSVM (reference library; used in tests only) on the bundled
  diabetes data (Efron, Hastie, Johnstone & Tibshirani 2004, from memory), a seeded noisy
  sine, Wisconsin breast cancer (Street, Wolberg & Mangasarian 1993) and Fisher's iris
  (Fisher 1936) features, at tol 1e-5;
* the QP challenger (cvxopt) on 50 random problems of each kind: verdict "agree";
* the ν-property (Schölkopf et al. 2001, Proposition 4) on every one-class problem here.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from solver import smo
from solver.agreement import compare_runs
from solver.kernels import LinearKernel, PolynomialKernel, RBFKernel
from solver.measures import nu_property
from solver.model import Standardiser, model_from_solution
from solver.problem import one_class, regression
from solver.qp import solve_qp
from solver.run import RunRecord

sklearn = pytest.importorskip("sklearn")
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris  # noqa: E402
from sklearn.svm import SVR, OneClassSVM  # noqa: E402

TOL = 1e-5


def _standardised(X):
    X = np.asarray(X, dtype=np.float64)
    return (X - X.mean(0)) / X.std(0)


def _diabetes():
    X, t = load_diabetes(return_X_y=True)
    return _standardised(X), (t - t.mean()) / t.std()


def _noisy_sine():
    rng = np.random.default_rng(17)
    x = np.sort(rng.uniform(0.0, 2 * np.pi, size=200))
    return x[:, None], np.sin(x) + 0.2 * rng.normal(size=200)


REG_DATA = {"diabetes": _diabetes, "noisy_sine": _noisy_sine}
# (ours, scikit-learn keyword arguments)
REG_KERNELS = {
    "linear": (LinearKernel, dict(kernel="linear")),
    "poly": (lambda: PolynomialKernel(gamma=0.1, degree=3, offset=1.0),
             dict(kernel="poly", gamma=0.1, degree=3, coef0=1.0)),
    "rbf": (lambda: RBFKernel(gamma=0.5), dict(kernel="rbf", gamma=0.5)),
}


def _svr_dual(beta, K, t, eps):
    """SVR's dual objective from its dual_coef_ β = α − α*: ½βᵀKβ + ε‖β‖₁ − tᵀβ (at the
    optimum α·α* = 0 when ε > 0, so ‖β‖₁ = eᵀ(α + α*)); the minimised quantity."""
    return 0.5 * beta @ K @ beta + eps * np.abs(beta).sum() - t @ beta


@pytest.mark.parametrize("epsilon", [0.1, 0.5])
@pytest.mark.parametrize("C", [1.0, 10.0])
@pytest.mark.parametrize("kernel_name", list(REG_KERNELS))
@pytest.mark.parametrize("dataset", list(REG_DATA))
def test_regression_matches_scikit_learn_svr(dataset, kernel_name, C, epsilon):
    X, t = REG_DATA[dataset]()
    make, sk = REG_KERNELS[kernel_name]
    P = regression(X, t, kernel=make(), C=C, epsilon=epsilon)
    r = smo.solve_smo(P, kkt_tol=TOL, trace="off")
    assert r.status.label == "converged"
    ref = SVR(C=C, epsilon=epsilon, tol=TOL, **sk).fit(X, t)
    beta = np.zeros(t.size)
    beta[ref.support_] = ref.dual_coef_[0]
    K = P.kernel_block(slice(0, t.size), slice(0, t.size))
    d_ref = _svr_dual(beta, K, t, epsilon)
    assert abs(r.certificate.dual_objective - d_ref) <= 1e-6 * abs(d_ref)
    f = model_from_solution(P, r).values(X, standardised=True)
    assert np.max(np.abs(f - ref.predict(X))) <= 1e-3 * t.std()


OC_DATA = {"breast_cancer": lambda: _standardised(load_breast_cancer().data),
           "iris": lambda: _standardised(load_iris().data)}


@pytest.mark.parametrize("nu", [0.05, 0.2, 0.5])
@pytest.mark.parametrize("dataset", list(OC_DATA))
def test_one_class_matches_scikit_learn_one_class_svm(dataset, nu):
    """Our scaling (0 ≤ α ≤ 1, eᵀα = νn) is libsvm's, so objectives and scores compare
    directly; OneClassSVM's decision_function = Σ α K − ρ."""
    X = OC_DATA[dataset]()
    gamma = 1.0 / X.shape[1]
    P = one_class(X, kernel=RBFKernel(gamma=gamma), nu=nu)
    r = smo.solve_smo(P, kkt_tol=TOL, trace="off")
    assert r.status.label == "converged"
    ref = OneClassSVM(nu=nu, gamma=gamma, tol=TOL).fit(X)
    a = np.zeros(X.shape[0])
    a[ref.support_] = ref.dual_coef_[0]
    K = P.kernel_block(slice(None), slice(None))
    d_ref = 0.5 * a @ K @ a
    assert abs(r.certificate.dual_objective - d_ref) <= 1e-6 * abs(d_ref)
    f = model_from_solution(P, r).values(X, standardised=True)
    s = ref.decision_function(X)
    assert np.max(np.abs(f - s)) <= 1e-3
    clear = np.abs(s) >= 1e-3
    assert np.array_equal(f[clear] >= 0, s[clear] >= 0)
    nu_check = nu_property(P, r.alpha, f, kkt_tol=TOL)
    assert nu_check["holds"], nu_check


# ------------------------------------------------------------------- SMO vs QP challenger


def _record(prob, method):
    res = (smo.solve_smo(prob, kkt_tol=1e-8, trace="off") if method == "smo"
           else solve_qp(prob, trace="off"))
    d = prob.X.shape[1]
    data = {"fingerprint": f"test:{prob.X.shape}:{float(prob.X.sum()):.17g}",
            "feature_names": [f"f{i}" for i in range(d)], "n_rows": prob.X.shape[0]}
    return RunRecord(problem=prob, result=res, data=data, standardiser=Standardiser.identity(d))


def _kernels():
    return st.one_of(
        st.just(LinearKernel()),
        st.builds(RBFKernel, gamma=st.floats(0.05, 2.0)),
        st.builds(PolynomialKernel, gamma=st.floats(0.1, 1.0), degree=st.integers(1, 3),
                  offset=st.floats(0.0, 2.0)),
    )


@settings(derandomize=True, max_examples=50, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(4, 30), d=st.integers(1, 4),
       kernel=_kernels(), logC=st.floats(-1.0, 2.0), epsilon=st.floats(0.0, 0.5))
def test_smo_and_qp_agree_on_random_regression_problems(seed, n, d, kernel, logC, epsilon):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    t = X[:, 0] - 0.5 * X[:, -1] ** 2 + 0.3 * rng.normal(size=n)
    prob = regression(X, t, kernel=kernel, C=float(10.0**logC), epsilon=epsilon)
    a, b = _record(prob, "smo"), _record(prob, "qp")
    assert a.result.success and b.result.success
    comp = compare_runs(a, b)
    assert comp.verdict == "agree", comp.verdict_text


@settings(derandomize=True, max_examples=50, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(4, 40), d=st.integers(1, 4),
       gamma=st.floats(0.05, 2.0), nu=st.floats(0.05, 1.0))
def test_smo_and_qp_agree_on_random_one_class_problems(seed, n, d, gamma, nu):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    prob = one_class(X, kernel=RBFKernel(gamma=gamma), nu=nu)
    a, b = _record(prob, "smo"), _record(prob, "qp")
    assert a.result.success and b.result.success
    comp = compare_runs(a, b)
    assert comp.verdict == "agree", comp.verdict_text
    for rec in (a, b):
        f = model_from_solution(prob, rec.result).values(X, standardised=True)
        check = nu_property(prob, rec.result.alpha, f, kkt_tol=rec.result.certificate.kkt_tol)
        assert check["holds"], check
