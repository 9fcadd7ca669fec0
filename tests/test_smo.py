"""Unit tests of the SMO driver: options, statuses, warm starts, callback, trace, replay."""

from __future__ import annotations

import numpy as np
import pytest

from solver.errors import ConvergenceWarning, InvalidInputError
from solver.kernels import make_kernel
from solver.problem import binary_classification
from solver.smo import EVENT_KINDS, replay_alpha, solve_smo
from solver.status import Status


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240601)


def _blobs(rng: np.random.Generator, n: int = 120, d: int = 3, shift: float = 1.0):
    X = rng.normal(size=(n, d))
    lab = np.where(rng.random(n) < 0.5, 1, -1)
    X[lab > 0, 0] += shift
    return X, lab


@pytest.fixture
def problem(rng):
    X, lab = _blobs(rng)
    return binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.5), C=2.0)


def test_converges_and_certificate_matches(problem):
    r = solve_smo(problem, kkt_tol=1e-4)
    assert r.status == Status.CONVERGED and r.success
    assert r.certificate.max_violation <= 1e-4
    assert r.bias == r.certificate.bias
    # the solver's incremental objective equals the one recomputed from α
    assert r.certificate.dual_objective == pytest.approx(problem.objective(r.alpha), rel=1e-10)
    assert r.extra["loop_objective"] == pytest.approx(problem.objective(r.alpha), rel=1e-9)
    assert r.certificate.duality_gap >= -1e-9
    assert r.certificate.bound_violation == 0.0
    assert r.certificate.equality_residual <= 1e-10 * max(1.0, np.sum(r.alpha))


def test_trace_columns_and_replay(problem):
    r = solve_smo(problem, kkt_tol=1e-4, snapshot_every=7)
    tr = r.trace
    assert tr.level == "full" and tr.n_rows == r.iterations
    assert np.array_equal(tr.columns["iteration"], np.arange(1, r.iterations + 1))
    assert tr.columns["i"].dtype == np.int32 and tr.columns["active"].dtype == np.int32
    assert tr.snapshot_iterations[0] == 0 and np.all(tr.snapshots[0] == 0.0)
    assert tr.snapshot_iterations[-1] == r.iterations
    assert np.array_equal(tr.snapshots[-1], r.alpha)
    for k, it in enumerate(tr.snapshot_iterations):
        assert np.array_equal(replay_alpha(tr, int(it)), tr.snapshots[k])
        if k:  # replay from the previous snapshot reaches this one bitwise
            a = tr.snapshots[k - 1].copy()
            rows = (tr.columns["iteration"] > tr.snapshot_iterations[k - 1]) & (
                tr.columns["iteration"] <= it)
            for i, j, ai, aj in zip(tr.columns["i"][rows], tr.columns["j"][rows],
                                    tr.columns["alpha_i"][rows], tr.columns["alpha_j"][rows],
                                    strict=True):
                a[i], a[j] = ai, aj
            assert np.array_equal(a, tr.snapshots[k])
    assert dict(tr.event_kinds) == EVENT_KINDS


def test_deterministic(problem):
    a = solve_smo(problem, kkt_tol=1e-5)
    b = solve_smo(problem, kkt_tol=1e-5)
    assert np.array_equal(a.alpha, b.alpha)
    for name in a.trace.columns:
        assert np.array_equal(a.trace.columns[name], b.trace.columns[name])


def test_iteration_limit_warns(problem):
    with pytest.warns(ConvergenceWarning, match="iteration limit"):
        r = solve_smo(problem, kkt_tol=1e-8, iteration_limit=5)
    assert r.status == Status.ITERATION_LIMIT and not r.success
    assert r.iterations == 5 and r.trace.n_rows == 5


def test_callback_stops(problem):
    seen = []

    def cb(info):
        seen.append(info)
        return True

    with pytest.warns(ConvergenceWarning):
        r = solve_smo(problem, kkt_tol=1e-9, callback=cb, callback_every=3)
    assert r.status == Status.STOPPED_BY_CALLBACK and r.iterations == 3
    assert set(seen[0]) == {"iteration", "violation", "kkt_tol", "active", "objective"}


def test_warm_start_from_solution(problem):
    r = solve_smo(problem, kkt_tol=1e-4)
    r2 = solve_smo(problem, kkt_tol=1e-4, alpha0=r.alpha)
    assert r2.success and r2.iterations <= 2


@pytest.mark.parametrize(
    "kw",
    [dict(kkt_tol=0), dict(kkt_tol=float("nan")), dict(iteration_limit=0), dict(selection="third"),
     dict(trace="some"), dict(sample_every=0), dict(kernel_dtype="float16"),
     dict(callback=3), dict(time_limit=-1.0), dict(shrinking="yes")],
)
def test_bad_options(problem, kw):
    with pytest.raises(InvalidInputError):
        solve_smo(problem, **kw)


def test_infeasible_warm_start(problem):
    a = np.zeros(problem.n)
    a[0] = 1.0  # breaks yᵀα = 0
    with pytest.raises(InvalidInputError, match="infeasible"):
        solve_smo(problem, alpha0=a)
    a[0] = -1.0
    with pytest.raises(InvalidInputError, match="row 0"):
        solve_smo(problem, alpha0=a)
    with pytest.raises(InvalidInputError, match="entries"):
        solve_smo(problem, alpha0=np.zeros(3))


def test_sampled_and_off_trace_levels(problem):
    full = solve_smo(problem, kkt_tol=1e-5)
    samp = solve_smo(problem, kkt_tol=1e-5, trace="sampled", sample_every=10)
    off = solve_smo(problem, kkt_tol=1e-5, trace="off")
    assert np.array_equal(full.alpha, samp.alpha) and np.array_equal(full.alpha, off.alpha)
    it = samp.trace.columns["iteration"]
    ev_its = set(samp.trace.events["iteration"].tolist())
    assert samp.trace.level == "sampled" and samp.trace.sample_every == 10
    for k in it:  # every recorded row is a multiple of 10 or follows an event
        assert k % 10 == 0 or k in ev_its or (k - 1) in ev_its
    assert set(range(10, full.iterations + 1, 10)) <= set(it.tolist())
    rows = {int(k): r for r, k in enumerate(full.trace.columns["iteration"])}
    for name in ("i", "j", "alpha_i", "objective", "violation"):
        assert np.array_equal(samp.trace.columns[name],
                              full.trace.columns[name][[rows[int(k)] for k in it]])
    assert off.trace.n_rows == 0 and off.trace.snapshots.shape[0] >= 2
    assert np.array_equal(off.trace.snapshots[-1], off.alpha)


def test_time_limit(rng):
    X, lab = _blobs(rng, n=1500, d=5, shift=0.3)
    prob = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.5), C=100.0)
    with pytest.warns(ConvergenceWarning, match="iteration limit"):
        solve_smo(prob, iteration_limit=1, trace="off")  # compiles first: the budget is the solve's
    with pytest.warns(ConvergenceWarning, match="wall-clock"):
        r = solve_smo(prob, kkt_tol=1e-12, time_limit=0.05, trace="off")
    assert r.status == Status.TIME_LIMIT and r.seconds < 5.0
    assert r.certificate.max_violation > 1e-12


class _JumpingClock:
    """Stand-in for ``solver.smo.time``: every reading is one second after the last."""

    def __init__(self) -> None:
        self.now = 0.0

    def perf_counter(self) -> float:
        self.now += 1.0
        return self.now


def test_time_limit_is_kept_while_shrinking_returns_every_1000_iterations(rng, monkeypatch):
    # the loop returns to the driver for shrinking every 1000 iterations; those returns
    # must not postpone the clock reading (they once did, and the limit was never applied).
    # A virtual clock makes this independent of the machine's speed: the budget is spent
    # before the loop first returns, so the run must stop at that first return.
    import solver.smo as smo_module

    X, lab = _blobs(rng, n=4000, d=5, shift=0.3)
    prob = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.5), C=100.0)
    with pytest.warns(ConvergenceWarning, match="iteration limit"):
        free = solve_smo(prob, kkt_tol=1e-12, iteration_limit=3000, threads=1, trace="off")
    assert free.iterations == 3000  # without a budget the run goes on past 1000
    monkeypatch.setattr(smo_module, "time", _JumpingClock())
    with pytest.warns(ConvergenceWarning, match="wall-clock"):
        r = solve_smo(prob, kkt_tol=1e-12, time_limit=2.5, threads=1, trace="off")
    assert r.status == Status.TIME_LIMIT
    assert r.iterations == 1000  # the first return of the loop


def test_stall_window(rng):
    # near the optimum with a tolerance below rounding, steps stop decreasing the objective
    X, lab = _blobs(rng, n=60, d=2, shift=0.5)
    prob = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=1.0), C=10.0)
    with pytest.warns(ConvergenceWarning, match="did not decrease"):
        r = solve_smo(prob, kkt_tol=1e-300, stall_window=50, trace="off")
    assert r.status == Status.STALLED
    assert r.certificate.max_violation <= 1e-6  # it got as close as rounding allows


def test_curvature_fix_recorded_for_duplicate_points(rng):
    # identical rows with opposite labels give aᵢⱼ = Kᵢᵢ + Kⱼⱼ − 2Kᵢⱼ = 0 (Fan, Chen & Lin
    # 2005, sec. 4: τ replaces a non-positive curvature)
    X, lab = _blobs(rng, n=40, d=2)
    X = np.vstack([X, X[:5]])
    lab = np.concatenate([lab, -lab[:5]])
    prob = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.5), C=1.0)
    r = solve_smo(prob, kkt_tol=1e-6)
    assert r.success and r.certificate.max_violation <= 1e-6
    kinds = r.trace.events["kind"]
    assert r.extra["curvature_fixes"] >= 1
    assert np.sum(kinds == 3) == r.extra["curvature_fixes"] and EVENT_KINDS[3] == "curvature_fix"
    assert np.all(r.trace.events["value"][kinds == 3] <= 0.0)


def test_indefinite_sigmoid_kernel_converges(rng):
    X, lab = _blobs(rng, n=80, d=3)
    prob = binary_classification(X, lab, kernel=make_kernel("sigmoid", gamma=0.5, offset=-1.0),
                                 C=1.0)
    r = solve_smo(prob, kkt_tol=1e-4)
    assert r.status in (Status.CONVERGED, Status.STALLED)
    if r.success:
        assert r.certificate.max_violation <= 1e-4


def test_numerical_error_status(rng):
    from solver.kernels import CallableKernel

    X, lab = _blobs(rng, n=20, d=2)
    huge = CallableKernel(func=lambda A, B: np.full((A.shape[0], B.shape[0]), 1e308)
                          + np.eye(A.shape[0], B.shape[0]) * 1e307)
    prob = binary_classification(X, lab, kernel=huge, C=1e300)
    with pytest.warns(ConvergenceWarning, match="non-finite"):
        r = solve_smo(prob)
    assert r.status == Status.NUMERICAL_ERROR


def test_kernel_modes_give_identical_runs(problem):
    full = solve_smo(problem, kkt_tol=1e-5, kernel_memory_mb=1e4)
    cached = solve_smo(problem, kkt_tol=1e-5, kernel_memory_mb=0.01, row_cache_mb=0.02)
    assert full.extra["kernel_mode"] == "full_gram"
    assert cached.extra["kernel_mode"] == "column_cache"
    assert cached.extra["cache_misses"] > 0
    assert np.array_equal(full.alpha, cached.alpha)
    assert np.array_equal(full.trace.columns["i"], cached.trace.columns["i"])


@pytest.mark.parametrize("memory", [None, 0.01])
def test_python_and_precomputed_kernels(problem, memory):
    from solver.kernels import CallableKernel, PrecomputedKernel
    from solver.problem import DualProblem, index_features

    ref = solve_smo(problem, kkt_tol=1e-6)
    func = CallableKernel(func=lambda A, B: make_kernel("rbf", gamma=0.5).block(A, B))
    gram = make_kernel("rbf", gamma=0.5).block(problem.X, problem.X)
    pre = PrecomputedKernel(gram_matrix=gram)
    for kern, X in ((func, problem.X), (pre, index_features(problem.n))):
        prob = DualProblem(X=X, y=problem.y, p=problem.p, lower=problem.lower,
                           upper=problem.upper, delta=0.0, kernel=kern, kind="t", info={})
        r = solve_smo(prob, kkt_tol=1e-6, kernel_memory_mb=memory, row_cache_mb=0.02)
        assert r.success
        assert r.certificate.dual_objective == pytest.approx(ref.certificate.dual_objective,
                                                            rel=1e-9)
        assert np.max(np.abs(r.alpha - ref.alpha)) <= 1e-4


def test_general_dual_with_lower_bounds_and_delta(rng):
    # a general instance of the dual: l > 0, Δ ≠ 0, random p (e.g. the ε-regression form)
    from solver.problem import DualProblem

    n = 50
    X = rng.normal(size=(n, 3))
    y = np.where(rng.random(n) < 0.5, 1.0, -1.0)
    lo = rng.uniform(0.0, 0.2, n)
    up = lo + rng.uniform(0.5, 2.0, n)
    prob = DualProblem(X=X, y=y, p=rng.normal(size=n), lower=lo, upper=up, delta=0.7,
                       kernel=make_kernel("rbf", gamma=0.3), kind="general", info={})
    r = solve_smo(prob, kkt_tol=1e-8)
    assert r.success and r.certificate.max_violation <= 1e-8
    assert np.all(r.alpha >= lo) and np.all(r.alpha <= up)
    assert abs(y @ r.alpha - 0.7) <= 1e-10
    # no feasible direction decreases the objective: compare with a projected-gradient check
    assert r.certificate.dual_objective == pytest.approx(prob.objective(r.alpha), rel=1e-10)


def test_leave_one_out_warm_start(problem):
    # the pattern used for leave-one-out refits: bound of one row set to 0, warm start
    from solver.problem import DualProblem
    from solver.smo import repair_start

    full = solve_smo(problem, kkt_tol=1e-6)
    k = int(np.flatnonzero(full.alpha > 0)[0])
    up = problem.upper.copy()
    up[k] = 0.0
    loo = DualProblem(X=problem.X, y=problem.y, p=problem.p, lower=problem.lower, upper=up,
                      delta=0.0, kernel=problem.kernel, kind=problem.kind, info=problem.info)
    with pytest.raises(InvalidInputError, match="infeasible"):
        solve_smo(loo, alpha0=full.alpha)
    start = repair_start(loo, full.alpha)
    assert start[k] == 0.0 and abs(loo.y @ start) <= 1e-12
    warm = solve_smo(loo, kkt_tol=1e-6, alpha0=start)
    cold = solve_smo(loo, kkt_tol=1e-6)
    assert warm.success and warm.alpha[k] == 0.0
    assert warm.options["warm_start"] is True
    assert warm.iterations < cold.iterations
    assert warm.certificate.dual_objective == pytest.approx(cold.certificate.dual_objective,
                                                           rel=1e-6)


def test_float32_kernel_storage_keeps_certificate(rng):
    X, lab = _blobs(rng, n=400, d=4, shift=0.5)
    for C in (1.0, 1000.0):
        prob = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.2), C=C)
        r32 = solve_smo(prob, kkt_tol=1e-4, kernel_dtype="float32")
        r64 = solve_smo(prob, kkt_tol=1e-4)
        assert r32.success and r32.options["kernel_dtype"] == "float32"
        # certificate computed from the exact float64 gradient
        exact = problem_violation(prob, r32.alpha)
        assert exact == pytest.approx(r32.certificate.max_violation, rel=1e-6, abs=1e-10)
        assert r32.certificate.max_violation <= 1e-4
        assert r32.certificate.dual_objective == pytest.approx(r64.certificate.dual_objective,
                                                              rel=1e-6)
        for k, it in enumerate(r32.trace.snapshot_iterations):
            assert np.array_equal(replay_alpha(r32.trace, int(it)), r32.trace.snapshots[k])


def problem_violation(prob, alpha) -> float:
    from solver.certificate import certify

    return certify(prob, alpha, kkt_tol=1.0).max_violation


def test_options_resolved_as_plain_data(problem):
    import json

    r = solve_smo(problem)
    expected = {"kkt_tol", "iteration_limit", "time_limit", "selection", "shrinking", "trace",
                "sample_every", "snapshot_every", "kernel_memory_mb", "kernel_dtype",
                "row_cache_mb", "warm_start", "callback_every", "stall_window", "curvature_floor",
                "threads"}
    assert expected <= set(r.options)
    json.dumps(dict(r.options))
    json.dumps({k: v for k, v in r.extra.items()})
    assert r.options["iteration_limit"] == max(10_000_000, 100 * problem.n)
    assert r.solver == "smo" and r.message.startswith("optimality test met")


def test_callback_stop_iteration(problem):
    def cb(info):
        raise StopIteration

    with pytest.warns(ConvergenceWarning, match="callback"):
        r = solve_smo(problem, kkt_tol=1e-12, callback=cb, callback_every=2)
    assert r.status == Status.STOPPED_BY_CALLBACK and r.iterations == 2
    # the certificate is still that of the returned α
    assert r.certificate.max_violation > 1e-12


def test_registry_dispatch(problem):
    from solver.solvers import solve

    r = solve(problem, method="smo", kkt_tol=1e-4)
    assert r.solver == "smo" and r.success
