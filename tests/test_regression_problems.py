"""ε-regression and one-class problems: constructors, the index map, a hand-worked example."""

from __future__ import annotations

import numpy as np
import pytest

from solver import smo
from solver.certificate import certify
from solver.errors import InvalidInputError
from solver.kernels import LinearKernel, PolynomialKernel, RBFKernel
from solver.measures import novelty_measures, nu_property, regression_measures
from solver.model import model_from_solution
from solver.problem import DualProblem, one_class, regression
from solver.qp import solve_qp


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


# ----------------------------------------------------------------------- constructors


def test_regression_is_the_2n_form_without_a_second_copy_of_x(rng):
    X = rng.normal(size=(7, 3))
    t = rng.normal(size=7)
    P = regression(X, t, kernel=RBFKernel(gamma=0.5), C=2.0, epsilon=0.1)
    assert P.n == 14 and P.X.shape == (7, 3)  # data held once
    assert np.array_equal(P.data_rows, np.r_[np.arange(7), np.arange(7)])
    assert np.array_equal(P.y, np.r_[np.ones(7), -np.ones(7)])
    assert np.allclose(P.p, np.r_[0.1 - t, 0.1 + t])
    assert P.delta == 0.0 and np.all(P.upper == 2.0) and np.all(P.lower == 0.0)
    K = RBFKernel(gamma=0.5).block(X, X)
    Q = P.q_block(slice(None), slice(None))
    assert np.allclose(Q, np.block([[K, -K], [-K, K]]), rtol=0, atol=1e-15)
    assert np.allclose(P.kernel_diag(), np.r_[np.diag(K), np.diag(K)])


def test_regression_sample_weight_scales_both_variables(rng):
    X = rng.normal(size=(4, 2))
    w = np.array([1.0, 2.0, 0.5, 3.0])
    P = regression(X, [0.0, 1.0, 2.0, 3.0], kernel=LinearKernel(), C=2.0, epsilon=0.0,
                   sample_weight=w)
    assert np.allclose(P.upper, np.r_[2 * w, 2 * w])


def test_one_class_scaling_and_feasible_start(rng):
    X = rng.normal(size=(10, 2))
    P = one_class(X, kernel=RBFKernel(gamma=1.0), nu=0.25)
    assert P.n == 10 and P.delta == pytest.approx(2.5)
    assert np.all(P.y == 1) and np.all(P.p == 0) and np.all(P.upper == 1)
    a = P.feasible_start()
    assert a.sum() == pytest.approx(2.5) and np.all((a >= 0) & (a <= 1))


@pytest.mark.parametrize("bad,msg", [
    (dict(epsilon=-0.1), "epsilon"),
    (dict(C=0.0), "C must"),
    (dict(target=np.ones(5)), "constant"),
    (dict(target=np.array([1.0, np.nan, 2.0, 3.0, 4.0])), "non-finite"),
    (dict(target=np.array(["a", "b", "c", "d", "e"])), "numeric"),
    (dict(target=np.arange(4.0)), "5 entries"),
])
def test_regression_bad_input(bad, msg):
    args = dict(X=np.arange(10.0).reshape(5, 2), target=np.arange(5.0), C=1.0, epsilon=0.1)
    args.update(bad)
    X, t = args.pop("X"), args.pop("target")
    with pytest.raises(InvalidInputError, match=msg):
        regression(X, t, kernel=LinearKernel(), **args)


@pytest.mark.parametrize("nu", [0.0, -0.5, 1.5, float("nan"), True, "0.5"])
def test_one_class_nu_outside_zero_one(nu):
    with pytest.raises(InvalidInputError, match="nu must be a number in"):
        one_class(np.zeros((3, 1)), kernel=LinearKernel(), nu=nu)


def test_index_map_is_validated():
    base = dict(X=np.zeros((2, 1)), y=np.ones(3), p=np.zeros(3), lower=np.zeros(3),
                upper=np.ones(3), delta=0.0, kernel=LinearKernel(), kind="t", info={})
    assert DualProblem(**base, rows=np.array([0, 1, 1])).n == 3
    with pytest.raises(InvalidInputError, match="outside the 2 data rows"):
        DualProblem(**base, rows=np.array([0, 2, 1]))
    with pytest.raises(InvalidInputError, match="integer"):
        DualProblem(**base, rows=np.array([0.0, 1.0, 1.0]))


# ----------------------------------------------------------------- the index map is honoured


@pytest.mark.parametrize("kernel", [LinearKernel(), RBFKernel(gamma=0.7),
                                    PolynomialKernel(gamma=0.5, degree=2, offset=1.0)])
def test_index_map_gives_the_bits_of_an_explicit_copy(rng, kernel):
    """SMO on the mapped problem equals SMO on the same problem with X written out twice."""
    X = rng.normal(size=(25, 3))
    t = np.sin(X[:, 0]) + 0.1 * rng.normal(size=25)
    P = regression(X, t, kernel=kernel, C=3.0, epsilon=0.05)
    explicit = DualProblem(X=P.features(), y=P.y, p=P.p, lower=P.lower, upper=P.upper,
                           delta=P.delta, kernel=P.kernel, kind=P.kind, info=P.info)
    a = smo.solve_smo(P, kkt_tol=1e-6, trace="off")
    b = smo.solve_smo(explicit, kkt_tol=1e-6, trace="off")
    assert a.iterations == b.iterations
    assert np.array_equal(a.alpha, b.alpha) and a.bias == b.bias
    ca, cb = certify(P, a.alpha, kkt_tol=1e-6), certify(explicit, b.alpha, kkt_tol=1e-6)
    assert ca.dual_objective == pytest.approx(cb.dual_objective, rel=1e-14)
    qa, qb = solve_qp(P, trace="off"), solve_qp(explicit, trace="off")
    assert np.allclose(qa.alpha, qb.alpha, rtol=0, atol=1e-10)
    # the model folds α⁺ − α⁻ per data row
    m = model_from_solution(P, a)
    assert m.support_points.shape[0] <= 25
    beta = a.alpha[:25] - a.alpha[25:]
    f_direct = kernel.with_defaults(X).block(X, X) @ beta + a.bias
    assert np.allclose(m.values(X, standardised=True), f_direct, rtol=0, atol=1e-12)


# -------------------------------------------------------------- hand-worked regression example


def _line_problem(t, epsilon):
    X = np.array([[0.0], [1.0], [2.0]])
    return X, regression(X, t, kernel=LinearKernel(), C=100.0, epsilon=epsilon)


@pytest.mark.parametrize("solve", [lambda P: smo.solve_smo(P, kkt_tol=1e-9, trace="off"),
                                   lambda P: solve_qp(P, kkt_tol=1e-6, trace="off")])
def test_three_collinear_points_recover_the_line(solve):
    """Derivation (ours).  Points (0, 1), (1, 3), (2, 5) lie on t = 2x + 1.  With ε = 0 the
    primal is min ½w² + C Σ|tᵢ − w xᵢ − b|; lowering w by δ (b kept so that the middle point
    stays exact) costs C·(1 + 0 + 1)·δ and saves about 2δ of ½w², so for C > 1 the exact
    line is optimal: w = 2, b = 1, every residual 0."""
    X, P = _line_problem([1.0, 3.0, 5.0], 0.0)
    r = solve(P)
    assert r.status.label == "converged"
    m = model_from_solution(P, r)
    f = m.values(np.array([[0.0], [1.0], [2.0], [3.0]]), standardised=True)
    assert np.allclose(f, [1.0, 3.0, 5.0, 7.0], rtol=0, atol=1e-5)
    assert r.bias == pytest.approx(1.0, abs=1e-5)


@pytest.mark.parametrize("middle", [3.0, 3.3, 2.6])
def test_a_point_inside_the_tube_gets_alpha_zero(middle):
    """Derivation (ours).  ε = 0.5, C = 100, points (0, 1), (1, middle), (2, 5).  With C large
    the tube is hard: min ½w² s.t. |tᵢ − w xᵢ − b| ≤ 0.5.  The end points force
    2w ≥ (5 − 0.5) − (1 + 0.5) = 3, so w = 1.5 and b = 1.5: f = (1.5, 3.0, 4.5).  The middle
    point (|middle − 3| < 0.5) is strictly inside the tube, so α⁺₁ = α⁻₁ = 0.  Stationarity
    w = Σ (α⁺ᵢ − α⁻ᵢ) xᵢ and Σ (α⁺ᵢ − α⁻ᵢ) = 0 give α⁺₂ = α⁻₀ = 0.75 (point 2 on the upper
    edge, point 0 on the lower edge).  Dual objective ½w² + ε Σ|β| − tᵀβ
    = 1.125 + 0.75 − 3 = −1.125, primal ½w² = 1.125: gap 0."""
    X, P = _line_problem([1.0, middle, 5.0], 0.5)
    r = smo.solve_smo(P, kkt_tol=1e-10, trace="off")
    a_plus, a_minus = r.alpha[:3], r.alpha[3:]
    assert np.allclose(a_plus, [0.0, 0.0, 0.75], atol=1e-9)
    assert np.allclose(a_minus, [0.75, 0.0, 0.0], atol=1e-9)
    assert r.bias == pytest.approx(1.5, abs=1e-9)
    c = r.certificate
    assert c.dual_objective == pytest.approx(-1.125, abs=1e-9)
    assert c.primal_objective == pytest.approx(1.125, abs=1e-9)
    assert abs(c.duality_gap) <= 1e-8


def test_one_class_with_nu_one_puts_every_point_at_its_bound(rng):
    """ν = 1: eᵀα = n with α ≤ 1 leaves only α = e (every point a bounded support vector)."""
    X = rng.normal(size=(8, 2))
    P = one_class(X, kernel=RBFKernel(gamma=0.5), nu=1.0)
    r = smo.solve_smo(P, kkt_tol=1e-8, trace="off")
    assert np.allclose(r.alpha, 1.0)
    f = model_from_solution(P, r).values(X, standardised=True)
    assert nu_property(P, r.alpha, f, kkt_tol=1e-8)["holds"]


def test_certificate_primal_of_one_class_equals_the_paper_form(rng):
    """The certificate's primal ½‖w‖² + Σ uᵢξᵢ + Δb is, for one-class with b = −ρ,
    ½αᵀKα + Σ ξᵢ − νnρ (Schölkopf et al. 2001, eq. 3, times νn): recomputed here."""
    X = rng.normal(size=(30, 2))
    P = one_class(X, kernel=RBFKernel(gamma=0.5), nu=0.3)
    r = smo.solve_smo(P, kkt_tol=1e-3, trace="off")
    K = P.kernel_block(slice(None), slice(None))
    rho = -r.bias
    xi = np.maximum(0.0, rho - K @ r.alpha)
    primal = 0.5 * r.alpha @ K @ r.alpha + xi.sum() - 0.3 * 30 * rho
    assert r.certificate.primal_objective == pytest.approx(primal, rel=1e-12)
    assert r.certificate.duality_gap >= -1e-12


# ---------------------------------------------------------------------------- measures


def test_regression_measures_closed_form():
    t = np.array([1.0, 2.0, 3.0, 4.0])
    f = np.array([1.5, 2.0, 2.0, 4.0])
    m = regression_measures(t, f, epsilon=0.5)
    assert m["rmse"] == pytest.approx(np.sqrt((0.25 + 1.0) / 4))
    assert m["mae"] == pytest.approx(1.5 / 4)
    assert m["r2"] == pytest.approx(1 - 1.25 / 5.0)
    assert m["tube_coverage"] == pytest.approx(0.75)


def test_regression_measures_match_scikit_learn(rng):
    """Reference library: sklearn.metrics mean_squared_error, mean_absolute_error, r2_score."""
    from sklearn.metrics import mean_absolute_error, mean_squared_error, r2_score

    t, f = rng.normal(size=50), rng.normal(size=50)
    m = regression_measures(t, f, epsilon=0.3)
    assert m["rmse"] == pytest.approx(np.sqrt(mean_squared_error(t, f)), rel=1e-12)
    assert m["mae"] == pytest.approx(mean_absolute_error(t, f), rel=1e-12)
    assert m["r2"] == pytest.approx(r2_score(t, f), rel=1e-12)


def test_novelty_measures_confusion_matches_scikit_learn(rng):
    """Reference library: sklearn.metrics.confusion_matrix (outlier = positive class)."""
    from sklearn.metrics import confusion_matrix

    s = rng.normal(size=40)
    known = rng.random(40) < 0.3
    m = novelty_measures(s, known)
    (tn, fp), (fn, tp) = confusion_matrix(known, s < 0)
    assert m["confusion"] == {"flagged_known": tp, "flagged_unknown": fp, "missed": fn,
                              "passed": tn}
    assert m["share_flagged"] == pytest.approx(np.mean(s < 0))


def test_a_target_column_that_is_also_a_feature_is_refused():
    """Bad input (issue 17): a target that is also a feature is refused at intake, before
    any problem is built (a CSV cannot name a column twice; arrays are checked here)."""
    from solver.data import from_arrays

    X = np.random.default_rng(4).normal(size=(12, 2))
    with pytest.raises(InvalidInputError, match="'thickness' is also a feature name"):
        from_arrays(X, X[:, 1], feature_names=["speed", "thickness"], label_name="thickness",
                    min_classes=1)
