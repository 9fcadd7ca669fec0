"""Per-point table, decision breakdown and feature-space view (solver.explanation)."""

from __future__ import annotations

import csv
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.svm import SVC

from solver.certificate import certify
from solver.errors import InvalidInputError
from solver.explanation import (
    CATEGORIES,
    COLUMNS,
    PointTable,
    breakdown,
    feature_space,
    point_table,
)
from solver.kernels import LinearKernel, PolynomialKernel, RBFKernel, SigmoidKernel
from solver.model import Standardiser, model_from_solution
from solver.problem import DualProblem, binary_classification
from solver.result import SolveResult
from solver.smo import solve_smo
from solver.status import Status


def _result(problem: DualProblem, alpha: np.ndarray, kkt_tol: float = 1e-3) -> SolveResult:
    """A SolveResult for a given α (closed form or reference solver), certified by kktrace."""
    cert = certify(problem, alpha, kkt_tol=kkt_tol)
    status = Status.CONVERGED if cert.meets_tol else Status.ITERATION_LIMIT
    return SolveResult(solver="reference", status=status, message="given", alpha=alpha,
                       bias=cert.bias, iterations=0, certificate=cert, seconds=0.0,
                       options={"kkt_tol": kkt_tol})


def _solve(problem: DualProblem, kkt_tol: float = 1e-6, trace: str = "off") -> SolveResult:
    res = solve_smo(problem, kkt_tol=kkt_tol, trace=trace)
    assert res.success, res.message
    return res


def _pair(loader, a: int, b: int, rows: slice | None = None):
    """Two classes of a scikit-learn bundled dataset, standardised."""
    X, t = loader(return_X_y=True)
    mask = (t == a) | (t == b)
    X, t = X[mask], t[mask]
    if rows is not None:
        X, t = X[rows], t[rows]
    sd = Standardiser.fit(X)
    return sd.transform(X), t, sd, X


# ---------------------------------------------------------------- closed forms

def _eight_points() -> tuple[DualProblem, np.ndarray]:
    """1-D linear problem, C = 2, with a hand-derived optimum w = 1, b = 0 (so f(x) = x).

    Rows: −2(−), −1(−), 1(+), 2(+), 0.5(−), −0.5(+), 0.5(+), −0.5(−).  Margins 2, 1, 1, 2,
    −0.5, −0.5, 0.5, 0.5; KKT forces α = C where the margin is < 1 and α = 0 where it is
    > 1; w = Σαᵢyᵢxᵢ = 1 and yᵀα = 0 give α = 1/2 for the two margin points.
    """
    X = np.array([[-2.0], [-1.0], [1.0], [2.0], [0.5], [-0.5], [0.5], [-0.5]])
    lab = np.array([-1, -1, 1, 1, -1, 1, 1, -1])
    prob = binary_classification(X, lab, kernel=LinearKernel(), C=2.0)
    alpha = np.array([0.0, 0.5, 0.5, 0.0, 2.0, 2.0, 2.0, 2.0])
    return prob, alpha


def test_closed_form_categories_margins_and_reasons():
    prob, alpha = _eight_points()
    res = _result(prob, alpha)
    assert res.certificate.max_violation < 1e-12  # the hand solution is optimal
    assert res.bias == pytest.approx(0.0, abs=1e-12)
    t = point_table(prob, res)
    cat = t.columns["category"].tolist()
    assert cat == ["non_support", "margin_support", "margin_support", "non_support",
                   "bounded_misclassified", "bounded_misclassified",
                   "bounded_inside_margin", "bounded_inside_margin"]
    np.testing.assert_allclose(t.columns["margin"], [2, 1, 1, 2, -0.5, -0.5, 0.5, 0.5],
                               atol=1e-12)
    np.testing.assert_allclose(t.columns["slack"], [0, 0, 0, 0, 1.5, 1.5, 0.5, 0.5], atol=1e-12)
    np.testing.assert_allclose(t.columns["alpha_ratio"], alpha / 2.0)
    np.testing.assert_allclose(t.columns["decision_value"], prob.X[:, 0], atol=1e-12)
    assert t.columns["label"].tolist() == [-1, -1, 1, 1, -1, 1, 1, -1]
    c = res.certificate
    counts = t.category_counts()
    assert counts["non_support"] == c.n_zero == 2
    assert counts["margin_support"] == c.n_free == 2
    bounded = sum(counts[k] for k in CATEGORIES if k.startswith("bounded"))
    assert bounded == c.n_bounded == 4
    assert "wrong side" in t.columns["reason"][4]
    assert "inside the margin" in t.columns["reason"][6]
    assert "on the margin" in t.columns["reason"][1]
    assert "would not change the model" in t.columns["reason"][0]


def test_closed_form_agrees_with_reference_solver():
    # external check: scikit-learn's SVC (tight tolerance) finds the same multipliers
    prob, alpha = _eight_points()
    svc = SVC(kernel="linear", C=2.0, tol=1e-12).fit(prob.X, prob.y)
    ref = np.zeros(prob.n)
    ref[svc.support_] = np.abs(svc.dual_coef_[0])
    np.testing.assert_allclose(ref, alpha, atol=1e-8)


def test_bounded_on_margin_edge_case():
    # two points ±1, C = 1/2: the hard-margin multipliers 1/2 sit exactly at the bound, and
    # both points lie on the margin (closed form: w = 1, b = 0)
    prob = binary_classification(np.array([[-1.0], [1.0]]), np.array(["bad", "good"]),
                                 kernel=LinearKernel(), C=0.5)
    res = _result(prob, np.array([0.5, 0.5]))
    assert res.certificate.max_violation < 1e-12
    t = point_table(prob, res)
    assert t.columns["category"].tolist() == ["bounded_on_margin"] * 2
    assert t.columns["label"].tolist() == ["bad", "good"]
    assert t.category_counts()["bounded_on_margin"] == res.certificate.n_bounded == 2
    assert "degenerate" in t.columns["reason"][0]
    np.testing.assert_allclose(t.columns["slack"], 0.0, atol=1e-12)


def test_unsettled_point_is_flagged_in_reason():
    prob, _ = _eight_points()
    res = _result(prob, np.zeros(prob.n))  # α = 0 is feasible but far from optimal
    t = point_table(prob, res)
    assert set(t.columns["category"]) == {"non_support"}
    assert all("below 1" in r for r in t.columns["reason"])
    assert all("exceeds the tolerance" in r for r in t.columns["reason"])


# ---------------------------------------------------------------- real data, SMO

@pytest.fixture(scope="module")
def cancer():
    """Breast-cancer subset (scikit-learn bundled, first 200 rows), standardised, RBF."""
    X, t = load_breast_cancer(return_X_y=True)
    X, t = X[:200], t[:200]
    Z = Standardiser.fit(X).transform(X)
    prob = binary_classification(Z, t, kernel=RBFKernel(gamma=0.05), C=2.0)
    return prob, solve_smo(prob, kkt_tol=1e-4, trace="full")


def test_categories_agree_with_certificate_and_reference(cancer):
    prob, res = cancer
    t = point_table(prob, res)
    c = res.certificate
    counts = t.category_counts()
    assert set(counts) == set(CATEGORIES)
    assert counts["non_support"] == c.n_zero
    assert counts["margin_support"] == c.n_free
    assert (counts["bounded_inside_margin"] + counts["bounded_misclassified"]
            + counts["bounded_on_margin"]) == c.n_bounded
    assert t.rows("non_support").size == c.n_zero
    # external check: scikit-learn SVC on the same kernel finds the same support set
    svc = SVC(kernel="rbf", gamma=0.05, C=2.0, tol=1e-8).fit(prob.X, prob.y)
    ours = set(np.flatnonzero(~c.at_lower).tolist())
    assert len(ours ^ set(svc.support_.tolist())) <= 2  # tolerance-level borderline points
    # bounded-misclassified rows are exactly the training errors among bounded points
    wrong = (t.columns["decision_value"] > 0) != (prob.y > 0)
    assert np.array_equal(t.columns["category"] == "bounded_misclassified", wrong & c.at_upper)


def test_trace_history_columns(cancer):
    from solver.smo import replay_alpha

    prob, res = cancer
    t = point_table(prob, res)
    assert t.trace_level == "full"
    sel = t.columns["times_selected"]
    assert sel.sum() == 2 * res.trace.n_rows  # two working-set members per iteration
    first, last = t.columns["first_nonzero_iteration"], t.columns["last_change_iteration"]
    sv = ~res.certificate.at_lower
    assert np.all(first[sv] >= 1) and np.all(last[sv] >= first[sv])
    assert np.all(res.alpha[first == -1] == 0.0)  # never non-zero ⇒ zero at the end
    assert np.all(last[sel == 0] == 0)  # never selected ⇒ never changed
    # replaying the trace: α just before its last change differs, at it equals the final α
    for r in np.flatnonzero(last > 0)[:15]:
        assert replay_alpha(res.trace, int(last[r]))[r] == res.alpha[r]
        assert replay_alpha(res.trace, int(last[r]) - 1)[r] != res.alpha[r]
    for r in np.flatnonzero(first > 0)[:15]:
        assert replay_alpha(res.trace, int(first[r]) - 1)[r] == 0.0
        assert replay_alpha(res.trace, int(first[r]))[r] > 0.0


def test_trace_columns_unavailable_without_full_trace(cancer):
    prob, _ = cancer
    res = solve_smo(prob, kkt_tol=1e-3, trace="sampled")
    t = point_table(prob, res)
    assert t.trace_level is None
    for c in ("first_nonzero_iteration", "last_change_iteration", "times_selected"):
        assert np.all(t.columns[c] == -1)


def test_export_round_trip(cancer, tmp_path):
    prob, res = cancer
    t = point_table(prob, res)
    cols = t.to_columns()
    assert tuple(cols) == COLUMNS
    assert len({v.shape[0] for v in cols.values()}) == 1
    back = PointTable.from_columns(cols)
    assert back.category_counts() == t.category_counts()
    t.write_csv(tmp_path / "points.csv")
    with open(tmp_path / "points.csv", encoding="utf-8", newline="") as fh:
        rows = list(csv.reader(fh))
    assert tuple(rows[0]) == COLUMNS and len(rows) == prob.n + 1
    k = COLUMNS.index("alpha")
    np.testing.assert_array_equal([float(r[k]) for r in rows[1:]], t.columns["alpha"])
    t.write_parquet(tmp_path / "points.parquet")
    tab = pq.read_table(tmp_path / "points.parquet")
    assert tab.column_names == list(COLUMNS)
    np.testing.assert_array_equal(tab.column("margin").to_numpy(), t.columns["margin"])
    assert tab.column("reason").to_pylist() == t.columns["reason"].tolist()
    assert b"kktrace" in tab.schema.metadata
    assert not list(tmp_path.glob(".*tmp"))  # no temporary files left behind


def test_bad_inputs(cancer, tmp_path):
    prob, res = cancer
    other = binary_classification(prob.X[:50], np.arange(50) % 2, kernel=LinearKernel())
    with pytest.raises(InvalidInputError, match="do not belong together"):
        point_table(other, res)
    regression = DualProblem(X=prob.X, y=np.ones(prob.n), p=np.zeros(prob.n),
                             lower=np.zeros(prob.n), upper=np.ones(prob.n), delta=0.0,
                             kernel=prob.kernel, kind="regression", info={})
    with pytest.raises(InvalidInputError, match="binary classification"):
        point_table(regression, res)
    with pytest.raises(InvalidInputError, match="lacks column"):
        PointTable.from_columns({"row_id": np.arange(3)})
    with pytest.raises(InvalidInputError, match="does not exist"):
        point_table(prob, res).write_csv(tmp_path / "missing" / "x.csv")


# ---------------------------------------------------------------- breakdown

@pytest.fixture(scope="module")
def wine_model():
    """Wine classes 0 vs 1 (scikit-learn bundled), standardised, RBF."""
    Z, t, sd, X_raw = _pair(load_wine, 0, 1)
    prob = binary_classification(Z, t, kernel=RBFKernel(gamma=0.1), C=1.0)
    res = _solve(prob)
    return prob, res, model_from_solution(prob, res, sd), X_raw


def test_breakdown_sums_to_decision_value(wine_model):
    prob, res, model, X_raw = wine_model
    rng = np.random.default_rng(6)
    queries = np.vstack([X_raw, X_raw[:40] + rng.normal(0, 0.3, (40, X_raw.shape[1]))])
    bd = breakdown(model, queries, top=5)
    f = model.values(queries)
    np.testing.assert_allclose(bd.values, f, rtol=1e-12, atol=1e-12)
    parts = bd.top_contributions.sum(axis=1) + bd.remainder + bd.bias
    big = np.abs(f) > 1e-3
    assert np.max(np.abs(parts - f)[big] / np.abs(f)[big]) < 1e-10
    assert np.max(bd.reconstruction_error()) < 1e-10
    # ordering, shares, row ids
    a = np.abs(bd.top_contributions)
    assert np.all(np.diff(a, axis=1) <= 0)
    np.testing.assert_allclose(bd.top_shares.sum(1) + bd.remainder_share, 1.0, rtol=1e-12)
    assert set(bd.top_rows.ravel()) <= set(model.support_rows.tolist())
    # the top contributions are the k largest of an independent per-support-vector loop
    K = prob.kernel.block(model.standardiser.transform(queries[:3]), model.support_points)
    direct = K * model.coefficients
    for q in range(3):
        assert set(np.argsort(-np.abs(direct[q]))[:5]) == {
            int(np.flatnonzero(model.support_rows == r)[0]) for r in bd.top_rows[q]}


def test_breakdown_small_linear_by_hand():
    prob, alpha = _eight_points()
    model = model_from_solution(prob, _result(prob, alpha))
    bd = breakdown(model, np.array([[0.25]]), top=2, standardised=True)
    # contributions αᵢyᵢxᵢ·x: rows 4–7 give ∓0.25, rows 1, 2 give 0.125 each
    np.testing.assert_allclose(np.abs(bd.top_contributions[0]), [0.25, 0.25])
    assert bd.top_rows[0].tolist() == [4, 5]  # ties broken by the smaller row id
    np.testing.assert_allclose(bd.values, [0.25], atol=1e-12)
    np.testing.assert_allclose(bd.remainder, [0.25 - bd.top_contributions[0].sum()], atol=1e-12)
    cols = bd.to_columns()
    assert cols["rank"].tolist() == [1, 2, 0] and cols["row_id"].tolist() == [4, 5, -1]


def test_breakdown_top_larger_than_support_and_bad_input(wine_model):
    _, _, model, X_raw = wine_model
    bd = breakdown(model, X_raw[:2], top=10_000)
    assert bd.top_rows.shape == (2, model.coefficients.size)
    np.testing.assert_allclose(bd.remainder, 0.0)
    with pytest.raises(InvalidInputError, match="top"):
        breakdown(model, X_raw[:2], top=0)
    with pytest.raises(InvalidInputError):
        breakdown(model, X_raw[:2, :3])
    bad = X_raw[:2].copy()
    bad[1, 4] = np.nan
    with pytest.raises(InvalidInputError, match="row 1"):
        breakdown(model, bad)


# ---------------------------------------------------------------- feature space

def test_linear_weights_equal_primal_computation():
    Z, t, sd, X_raw = _pair(load_iris, 1, 2)
    prob = binary_classification(Z, t, kernel=LinearKernel(), C=1.0)
    res = _solve(prob, kkt_tol=1e-8)
    names = ["sepal length", "sepal width", "petal length", "petal width"]
    v = feature_space(prob, res, feature_names=names, standardiser=sd)
    assert v.exact and v.names == tuple(names)
    w = np.zeros(4)
    for a, yi, xi in zip(res.alpha, prob.y, prob.X, strict=True):  # w = Σ αᵢyᵢxᵢ
        w += a * yi * xi
    np.testing.assert_allclose(v.weights, w, rtol=1e-12, atol=1e-14)
    assert v.margin_width == pytest.approx(2.0 / np.linalg.norm(w), rel=1e-12)
    assert v.squared_norm == pytest.approx(float(w @ w), rel=1e-9)
    assert v.reproduction_error < 1e-12
    # raw units: f(x) = raw_w·x + raw_b on the unstandardised rows
    model = model_from_solution(prob, res, sd)
    np.testing.assert_allclose(X_raw @ v.raw_weights + v.raw_bias, model.values(X_raw),
                               rtol=1e-9, atol=1e-9)
    # external check: scikit-learn SVC's primal weights for the same linear problem
    svc = SVC(kernel="linear", C=1.0, tol=1e-10).fit(prob.X, prob.y)
    np.testing.assert_allclose(v.weights, svc.coef_[0], rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("degree,offset", [(2, 1.0), (3, 0.5), (2, 0.0), (3, 0.0)])
def test_polynomial_monomial_weights_reproduce_f(degree, offset):
    Z, t, _, _ = _pair(load_iris, 1, 2)
    kern = PolynomialKernel(gamma=0.5, degree=degree, offset=offset)
    prob = binary_classification(Z, t, kernel=kern, C=1.0)
    res = _solve(prob, kkt_tol=1e-6)
    v = feature_space(prob, res, feature_names=["sl", "sw", "pl", "pw"])
    assert v.exact, v.note
    assert v.reproduction_error < 1e-10
    assert v.weights.size == math.comb(4 + degree - (0 if offset > 0 else 1), degree)
    model = model_from_solution(prob, res)
    rng = np.random.default_rng(3)
    Zq = rng.normal(size=(25, 4))
    f = model.values(Zq, standardised=True)
    assert np.max(np.abs(v.values(Zq) - f)) <= 1e-10 * np.max(np.abs(f))
    assert v.squared_norm == pytest.approx(float(res.alpha @ prob.q_times(res.alpha)), rel=1e-10)


def test_polynomial_closed_form_one_feature():
    # K(x, z) = (γxz + c)², d = 1: f(x) = γ²S₂x² + 2γcS₁x + c²S₀ + b with Sₖ = Σαᵢyᵢxᵢᵏ
    prob, alpha = _eight_points()
    g, c = 0.7, 1.3
    p2 = binary_classification(prob.X, prob.y, kernel=PolynomialKernel(gamma=g, degree=2,
                                                                        offset=c), C=2.0)
    res = _result(p2, alpha)  # any feasible α defines an f; optimality is not needed here
    v = feature_space(p2, res, feature_names=["x"])
    ay, x = alpha * p2.y, p2.X[:, 0]
    expected = {"1": c * c * ay.sum(), "x": 2 * g * c * (ay @ x), "x^2": g * g * (ay @ x**2)}
    got = dict(zip(v.names, v.weights, strict=True))
    assert set(got) == set(expected)
    for k, val in expected.items():
        assert got[k] == pytest.approx(val, abs=1e-12)


def test_non_explicit_kernels_give_norm_only():
    Z, t, _, _ = _pair(load_wine, 0, 1)
    prob = binary_classification(Z, t, kernel=RBFKernel(gamma=0.1), C=1.0)
    res = _solve(prob)
    v = feature_space(prob, res)
    assert not v.exact and "rbf" in v.note and v.weights is None
    K = prob.kernel.gram(prob.X)
    ay = res.alpha * prob.y
    assert v.squared_norm == pytest.approx(float(ay @ K @ ay), rel=1e-10)
    assert v.margin_width == pytest.approx(2 / math.sqrt(float(ay @ K @ ay)), rel=1e-10)
    with pytest.raises(InvalidInputError):
        v.values(Z)
    hi = binary_classification(Z, t, kernel=PolynomialKernel(gamma=0.1, degree=4, offset=1.0))
    v4 = feature_space(hi, _result(hi, res.alpha))
    assert not v4.exact and "degree 4" in v4.note
    big = binary_classification(Z, t, kernel=PolynomialKernel(gamma=0.1, degree=3, offset=1.0))
    assert feature_space(big, _result(big, res.alpha)).exact  # 13 features, 560 monomials
    sig = binary_classification(Z, t, kernel=SigmoidKernel(gamma=0.5, offset=-2.0))
    vs = feature_space(sig, _result(sig, res.alpha))
    assert not vs.exact
    assert math.isnan(vs.norm) == (vs.squared_norm < 0)


# ---------------------------------------------------------------- properties

@settings(derandomize=True, max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), top=st.integers(1, 8), gamma=st.floats(0.05, 5.0))
def test_breakdown_identity_property(seed, top, gamma):
    # any coefficients and bias: top terms + remainder + bias reproduce f to rounding
    rng = np.random.default_rng(seed)
    k, d = int(rng.integers(1, 30)), int(rng.integers(1, 5))
    from solver.model import Model

    model = Model(support_rows=np.sort(rng.choice(500, k, replace=False)),
                  support_points=rng.normal(size=(k, d)), coefficients=rng.normal(size=k),
                  bias=float(rng.normal()), kernel=RBFKernel(gamma=gamma),
                  standardiser=Standardiser.identity(d), labels=(0, 1))
    bd = breakdown(model, rng.normal(size=(7, d)), top=top)
    assert np.max(bd.reconstruction_error()) < 1e-12
    assert np.all(np.diff(np.abs(bd.top_contributions), axis=1) <= 0)
    assert np.all((bd.top_shares >= 0) & (bd.top_shares <= 1))
