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
    r = solve_smo(problem, tol=1e-4)
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
    r = solve_smo(problem, tol=1e-4, snapshot_every=7)
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
    a = solve_smo(problem, tol=1e-5)
    b = solve_smo(problem, tol=1e-5)
    assert np.array_equal(a.alpha, b.alpha)
    for name in a.trace.columns:
        assert np.array_equal(a.trace.columns[name], b.trace.columns[name])


def test_iteration_limit_warns(problem):
    with pytest.warns(ConvergenceWarning, match="iteration limit"):
        r = solve_smo(problem, tol=1e-8, max_iter=5)
    assert r.status == Status.ITERATION_LIMIT and not r.success
    assert r.iterations == 5 and r.trace.n_rows == 5


def test_callback_stops(problem):
    seen = []

    def cb(info):
        seen.append(info)
        return True

    with pytest.warns(ConvergenceWarning):
        r = solve_smo(problem, tol=1e-9, callback=cb, callback_every=3)
    assert r.status == Status.STOPPED_BY_CALLBACK and r.iterations == 3
    assert set(seen[0]) == {"iteration", "violation", "tol", "active", "objective"}


def test_warm_start_from_solution(problem):
    r = solve_smo(problem, tol=1e-4)
    r2 = solve_smo(problem, tol=1e-4, alpha0=r.alpha)
    assert r2.success and r2.iterations <= 2


@pytest.mark.parametrize(
    "kw",
    [dict(tol=0), dict(tol=float("nan")), dict(max_iter=0), dict(selection="third"),
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
