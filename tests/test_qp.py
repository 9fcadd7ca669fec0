"""Unit tests of the cvxopt interior-point reference solver (solver/qp.py)."""

from __future__ import annotations

import warnings

import cvxopt
import numpy as np
import pytest

from solver import qp
from solver.errors import ConvergenceWarning, InvalidInputError
from solver.kernels import LinearKernel, PolynomialKernel, PrecomputedKernel, RBFKernel
from solver.problem import DualProblem, binary_classification, index_features
from solver.solvers import solve
from solver.status import Status


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240607)


def blobs(rng: np.random.Generator, n: int = 60, d: int = 3, shift: float = 1.0):
    X = rng.normal(size=(n, d))
    y = np.where(rng.random(n) < 0.5, 1, -1)
    X[y > 0] += shift
    return X, y


def quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return fn(*args, **kwargs)


# --------------------------------------------------------------------------- KKT solver


def _full_kkt_solution(Q, a, d, bx, by, bz):
    """Solve [[Q a Gᵀ]; [aᵀ 0 0]; [G 0 −WᵀW]] u = b densely (G = [−I; I], W = diag(d))."""
    n = Q.shape[0]
    G = np.vstack([-np.eye(n), np.eye(n)])
    K = np.zeros((3 * n + 1, 3 * n + 1))
    K[:n, :n] = Q
    K[:n, n] = a
    K[n, :n] = a
    K[:n, n + 1:] = G.T
    K[n + 1:, :n] = G
    K[n + 1:, n + 1:] = -np.diag(d**2)
    u = np.linalg.solve(K, np.concatenate([bx, [by], bz]))
    return u[:n], u[n], d * u[n + 1:]  # the solver returns W·uz


def test_structured_kkt_matches_dense_kkt_system(rng):
    n = 7
    B = rng.normal(size=(n, n))
    Q = B @ B.T  # PSD
    a = np.where(rng.random(n) < 0.5, 1.0, -1.0)
    d = np.exp(rng.normal(size=2 * n))
    bx, by, bz = rng.normal(size=n), float(rng.normal()), rng.normal(size=2 * n)
    prob = DualProblem(X=rng.normal(size=(n, 2)), y=a, p=-np.ones(n), lower=np.zeros(n),
                       upper=np.ones(n), delta=0.0, kernel=LinearKernel(), kind="test", info={})
    rec = qp._Recorder(prob, Q, level="off", sample_every=1, snapshot_every=0, callback=None,
                       time_limit=None, started=0.0)
    rec.frame_ok = False  # called outside cvxopt: no iterate to read
    factor = qp._structured_factory(Q, a, rec)
    solve_fn = factor({"d": cvxopt.matrix(d), "di": cvxopt.matrix(1 / d)})
    x, y, z = cvxopt.matrix(bx.copy()), cvxopt.matrix([by]), cvxopt.matrix(bz.copy())
    solve_fn(x, y, z)
    ux, uy, wuz = _full_kkt_solution(Q, a, d, bx, by, bz)
    np.testing.assert_allclose(np.array(x).ravel(), ux, rtol=1e-9, atol=1e-10)
    assert float(y[0]) == pytest.approx(uy, rel=1e-9, abs=1e-10)
    np.testing.assert_allclose(np.array(z).ravel(), wuz, rtol=1e-9, atol=1e-10)


def test_structured_and_generic_agree(rng):
    X, y = blobs(rng, n=50)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.5), C=2.0)
    rs = qp.solve_qp(prob, kkt="structured")
    rg = qp.solve_qp(prob, kkt="generic")
    assert rs.success and rg.success
    assert rs.certificate.dual_objective == pytest.approx(rg.certificate.dual_objective, rel=1e-9)
    np.testing.assert_allclose(rs.alpha, rg.alpha, atol=1e-6 * 2.0)
    assert rs.iterations == rg.iterations
    assert rg.trace.n_rows == rg.iterations


# --------------------------------------------------------------------------- closed forms


def test_two_point_hard_margin_closed_form():
    # Two points x = ±1 on a line, linear kernel: the maximum-margin separator is w = 1,
    # b = 0 with α = ½ each (w = Σ αᵢyᵢxᵢ = 2α); textbook closed form, common practice.
    X = np.array([[1.0], [-1.0]])
    prob = binary_classification(X, [1, -1], kernel=LinearKernel(), C=10.0)
    r = qp.solve_qp(prob)
    assert r.success
    np.testing.assert_allclose(r.alpha, [0.5, 0.5], atol=1e-8)
    assert r.bias == pytest.approx(0.0, abs=1e-8)
    assert r.certificate.dual_objective == pytest.approx(-0.5, abs=1e-9)


def test_two_point_box_bound_closed_form():
    # Same points with C = 0.2 < ½: both multipliers sit at C, objective ½(2C)²·... :
    # D = ½·αᵀQα − Σα with Q = [[1, 1], [1, 1]] → ½·(2C)² − 2C = 2C² − 2C.
    X = np.array([[1.0], [-1.0]])
    C = 0.2
    prob = binary_classification(X, [1, -1], kernel=LinearKernel(), C=C)
    r = qp.solve_qp(prob)
    assert r.success
    np.testing.assert_allclose(r.alpha, [C, C], atol=1e-9)
    assert r.certificate.n_bounded == 2
    assert r.certificate.dual_objective == pytest.approx(2 * C * C - 2 * C, abs=1e-9)


# --------------------------------------------------------------------------- certificate


@pytest.mark.parametrize("kernel", [LinearKernel(), RBFKernel(gamma=0.3),
                                    PolynomialKernel(gamma=0.5, degree=2, offset=1.0)])
@pytest.mark.parametrize("C", [0.1, 10.0])
def test_converged_solution_passes_shared_certificate(rng, kernel, C):
    X, y = blobs(rng, n=80, shift=0.8)
    prob = binary_classification(X, y, kernel=kernel, C=C)
    r = qp.solve_qp(prob)
    c = r.certificate
    assert r.status == Status.CONVERGED
    assert c.meets_tol and c.max_violation <= qp.DEFAULT_KKT_TOL
    assert c.bound_violation == 0.0
    assert c.equality_residual <= 1e-12 * C * prob.n
    assert r.extra["certificate_meets_tol"] is True
    assert r.bias == c.bias
    # α from the snap is exactly on a bound wherever the certificate says so
    assert np.all(r.alpha[c.at_lower] == 0.0) and np.all(r.alpha[c.at_upper] == C)


def test_kkt_tol_is_the_certificate_tolerance(rng):
    X, y = blobs(rng, n=40)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.5), C=1.0)
    r = qp.solve_qp(prob, kkt_tol=0.05)
    assert r.certificate.kkt_tol == 0.05
    assert r.options["kkt_tol"] == 0.05


# --------------------------------------------------------------------------- status mapping


def test_iteration_limit_maps_faithfully(rng):
    X, y = blobs(rng, n=60)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.5), C=1.0)
    with pytest.warns(ConvergenceWarning, match="iteration"):
        r = qp.solve_qp(prob, iteration_limit=2)
    assert r.status == Status.ITERATION_LIMIT and not r.success
    assert r.iterations == 2
    assert r.extra["backend_status"] == "unknown"
    assert "'unknown'" in r.message
    assert r.certificate.bound_violation == 0.0  # the returned α is still feasible


def test_singular_kkt_is_reported():
    # A strongly indefinite precomputed Gram (−10·I): Q + D is not positive definite at the
    # start, so the Newton system cannot be factorised.
    n = 6
    kern = PrecomputedKernel(gram_matrix=-10.0 * np.eye(n))
    prob = binary_classification(index_features(n), [0, 1] * 3, kernel=kern, C=1.0)
    with pytest.warns(ConvergenceWarning):
        r = qp.solve_qp(prob)
    assert r.status == Status.SINGULAR_KKT
    assert r.extra["backend_status"].startswith("error: Rank(A) < p")
    assert "Cholesky of Q + D failed" in r.message
    assert r.alpha.shape == (n,)


def _indefinite_problem(shift: float):
    n = 6
    B = np.random.default_rng(0).normal(size=(n, n))
    kern = PrecomputedKernel(gram_matrix=B @ B.T / n + shift * np.eye(n))
    return binary_classification(index_features(n), [0, 1] * 3, kernel=kern, C=1.0)


def test_singular_kkt_after_the_start_is_reported():
    # Mildly indefinite Gram: Q + D is positive definite at the start (D = 2I) but not once
    # the scaling D shrinks; cvxopt then ends with status 'unknown' ("singular KKT matrix").
    with pytest.warns(ConvergenceWarning):
        r = qp.solve_qp(_indefinite_problem(-1.8))
    assert r.status == Status.SINGULAR_KKT and r.iterations >= 1
    assert r.extra["backend_status"] == "unknown"
    assert "Cholesky of Q + D failed" in r.message


def test_optimal_backend_status_but_certificate_failure_is_not_converged():
    # Indefinite but factorisable: cvxopt reports 'optimal' at a stationary point of a
    # non-convex problem; the shared certificate exposes it, and the status rule
    # (solver.status.decide) makes the run not converged, keeping cvxopt's word.
    with pytest.warns(ConvergenceWarning, match="exceeds kkt_tol"):
        r = qp.solve_qp(_indefinite_problem(-1.5))
    assert r.status == Status.CERTIFICATE_NOT_MET and not r.success
    assert r.extra["backend_status"] == "optimal"
    assert not r.certificate.meets_tol and r.extra["certificate_meets_tol"] is False
    assert "exceeds kkt_tol" in r.message and "cvxopt status 'optimal'" in r.message


def test_success_is_converged_only(rng):
    X, y = blobs(rng, n=30)
    prob = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    r = qp.solve_qp(prob)
    assert r.success and r.extra["backend_status"] == "optimal"
    assert r.solver == "qp"


# --------------------------------------------------------------------------- trace


def test_trace_rows_are_the_exact_iterates(rng):
    X, y = blobs(rng, n=70)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.4), C=3.0)
    r = qp.solve_qp(prob)
    t = r.trace
    cols = t.columns
    k = r.iterations
    assert t.solver == "qp" and t.level == "full"
    assert list(cols["iteration"]) == list(range(1, k + 1))
    for name in qp.TRACE_COLUMNS + ("n_at_lower", "n_at_upper"):
        assert cols[name].shape == (k,)
    # a snapshot per iteration, starting with cvxopt's initial point
    assert list(t.snapshot_iterations) == list(range(0, k + 1))
    assert t.snapshots.shape == (k + 1, prob.n)
    # the primal objective column is ½αᵀQα + pᵀα of the stored iterate (exact bookkeeping);
    # the last snapshot is the returned α (the final iterate moved onto its active bounds),
    # while the last row keeps cvxopt's own figures of the interior iterate
    for row in range(k - 1):
        assert cols["primal_objective"][row] == pytest.approx(
            prob.objective(t.snapshots[row + 1]), rel=1e-10, abs=1e-10)
    assert np.array_equal(t.snapshots[-1], r.alpha)
    assert r.extra["final_snapshot"] == "returned_alpha"
    # the final row equals cvxopt's own returned statistics
    stats = r.extra["backend_stats"]
    for col, key in (("primal_objective", "primal_objective"), ("dual_objective",
                     "dual_objective"), ("gap", "gap"), ("primal_residual",
                     "primal_infeasibility"), ("dual_residual", "dual_infeasibility")):
        assert cols[col][-1] == pytest.approx(stats[key], rel=1e-6, abs=1e-12), col
    assert cols["relative_gap"][-1] == pytest.approx(stats["relative_gap"], rel=1e-6)
    # steps are interior-point step lengths in (0, 1]
    assert np.all((cols["step"] > 0) & (cols["step"] <= 1 + 1e-9))
    assert cols["gap"][-1] < cols["gap"][0]
    assert r.extra["trace_source"].startswith("iterate read")


def test_trace_levels_and_snapshot_period(rng):
    X, y = blobs(rng, n=40)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.4), C=1.0)
    full = qp.solve_qp(prob)
    k = full.iterations
    sampled = qp.solve_qp(prob, trace="sampled", sample_every=3, snapshot_every=0)
    assert list(sampled.trace.columns["iteration"]) == [i for i in range(1, k + 1) if i % 3 == 0]
    assert list(sampled.trace.snapshot_iterations) == [0, k]
    off = qp.solve_qp(prob, trace="off")
    assert off.trace.n_rows == 0 and off.trace.snapshots.shape[0] == k + 1
    np.testing.assert_allclose(off.alpha, full.alpha, rtol=0, atol=0)


def test_trace_without_frame_access_keeps_final_row(rng, monkeypatch):
    X, y = blobs(rng, n=30)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.4), C=1.0)
    monkeypatch.setattr(qp._Recorder, "from_frame", lambda self: setattr(self, "frame_ok", False))
    r = qp.solve_qp(prob)
    assert r.success
    assert r.trace.n_rows == 1 and r.trace.columns["iteration"][0] == r.iterations
    assert list(r.trace.snapshot_iterations) == [r.iterations]
    assert r.extra["trace_source"].startswith("cvxopt frame unavailable")


def test_callback_can_stop_and_sees_iterates(rng):
    X, y = blobs(rng, n=40)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.4), C=1.0)
    seen = []

    def cb(state):
        seen.append((state["iteration"], state["objective"], state["alpha"].shape))
        return state["iteration"] >= 3

    with pytest.warns(ConvergenceWarning):
        r = qp.solve_qp(prob, callback=cb)
    assert r.status == Status.STOPPED_BY_CALLBACK
    assert r.iterations == 3 and [s[0] for s in seen] == [1, 2, 3]
    assert seen[0][2] == (prob.n,)

    def raiser(state):
        raise StopIteration

    r2 = quiet(qp.solve_qp, prob, callback=raiser)
    assert r2.status == Status.STOPPED_BY_CALLBACK and r2.iterations == 1


def test_time_limit(rng, monkeypatch):
    X, y = blobs(rng, n=40)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.4), C=1.0)
    r = quiet(qp.solve_qp, prob, time_limit=1e-9)
    assert r.status == Status.TIME_LIMIT and r.iterations == 1


# --------------------------------------------------------------------------- options


def test_size_limit_refuses_unless_forced(rng):
    X, y = blobs(rng, n=12)
    prob = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    with pytest.raises(InvalidInputError, match="12 points, above the size limit 10.*force"):
        qp.solve_qp(prob, size_limit=10)
    r = qp.solve_qp(prob, size_limit=10, force=True)
    assert r.success and r.options["force"] is True


@pytest.mark.parametrize("bad", [
    {"kkt_tol": 0.0}, {"kkt_tol": float("nan")}, {"kkt_tol": "1e-6"}, {"iteration_limit": 0},
    {"iteration_limit": 2.5},
    {"trace": "all"}, {"kkt": "sparse"}, {"kkt_tol": -1.0}, {"sample_every": 0},
    {"snapshot_every": -1}, {"time_limit": 0}, {"callback": 3}, {"size_limit": True},
    {"alpha0": np.zeros(3)},
])
def test_bad_options_raise_invalid_input(rng, bad):
    X, y = blobs(rng, n=10)
    prob = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    with pytest.raises(InvalidInputError, match="qp solver"):
        qp.solve_qp(prob, **bad)


def test_options_are_keyword_only(rng):
    X, y = blobs(rng, n=10)
    prob = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    with pytest.raises(TypeError):
        qp.solve_qp(prob, 1e-6)  # type: ignore[misc]
    with pytest.raises(TypeError):
        qp.solve_qp(prob, tolerance=1e-6)  # type: ignore[call-arg]


def test_options_recorded_and_global_cvxopt_options_untouched(rng):
    X, y = blobs(rng, n=20)
    prob = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    before = dict(cvxopt.solvers.options)
    r = qp.solve_qp(prob, interior_point_tol=1e-8)
    assert dict(cvxopt.solvers.options) == before
    for key in ("kkt_tol", "iteration_limit", "size_limit", "force", "trace", "kkt", "kkt_tol",
                "sample_every", "snapshot_every", "time_limit", "alpha0", "callback"):
        assert key in r.options
    cvx = r.options["cvxopt_options"]
    assert cvx["abstol"] == cvx["reltol"] == cvx["feastol"] == 1e-8
    assert cvx["show_progress"] is False


def test_registry_and_warm_start(rng):
    X, y = blobs(rng, n=30)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.3), C=1.0)
    r = solve(prob, method="qp")
    assert r.success and r.solver == "qp"
    r2 = qp.solve_qp(prob, alpha0=r.alpha)
    assert r2.success and r2.options["alpha0"] is True
    assert r2.certificate.dual_objective == pytest.approx(r.certificate.dual_objective, rel=1e-8)
