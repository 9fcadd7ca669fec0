"""The block working set of the SMO solver (``working_set="block"``): rows computed together,
the same optimum as the two-variable working set and as scikit-learn's SVC, a trace that
replays bitwise, pause points that do not change the path, and the ``outer`` column."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numba import config
from sklearn.datasets import load_breast_cancer
from sklearn.svm import SVC

from solver import _block_kernels as B
from solver import _smo_kernels as K
from solver.kernels import make_kernel
from solver.model import model_from_solution
from solver.problem import binary_classification, regression
from solver.smo import replay_alpha, solve_smo

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
JIT = not config.DISABLE_JIT


def _problem(n: int = 120, d: int = 5, C: float = 10.0, seed: int = 3, kernel=None):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d))
    lab = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 + 0.4 * rng.normal(size=n) > 0.3, 1, -1)
    return binary_classification(X, lab, kernel=kernel or make_kernel("rbf", gamma=0.4), C=C)


def _dual(problem, alpha) -> float:
    return float(0.5 * alpha @ problem.q_times(alpha) + problem.p @ alpha)


@pytest.mark.parametrize("code,gamma,offset,degree", [
    (K.KERNEL_RBF, 0.3, 0.0, 1), (K.KERNEL_POLY, 0.2, 1.0, 3),
    (K.KERNEL_SIGMOID, 0.05, -0.5, 1), (K.KERNEL_LINEAR, 0.0, 0.0, 1)])
@pytest.mark.parametrize("d", [3, 8, 11])
def test_block_rows_equal_rows_computed_one_at_a_time(code, gamma, offset, degree, d):
    rng = np.random.default_rng(d)
    n = 1500  # more than one tile of ROW_CHUNK columns
    XK = np.ascontiguousarray(rng.normal(size=(d, n)))
    sq = np.zeros(n)
    K.self_dots(XK, sq)
    srcs = np.array([5, 0, 1499, 700, 3, 3, 42], dtype=np.int64)  # 7: a group of 4 and of 3
    cache = np.zeros(srcs.size * n)
    refs = np.arange(srcs.size, dtype=np.int64) * n
    acc4 = np.zeros((4, K.ROW_CHUNK))
    ibuf = np.zeros(K.ROW_CHUNK, dtype=np.int64)
    B.block_rows(XK, sq, srcs, refs, srcs.size, n, np.zeros((1, 1)), cache, code, gamma, offset,
                 degree, acc4, ibuf)
    one = np.zeros(n)
    for r, s in enumerate(srcs):
        K.kernel_row(XK, s, sq[s], XK, sq, n, one, code, gamma, offset, degree,
                     np.zeros(K.ROW_CHUNK), ibuf)
        assert np.array_equal(cache[r * n:(r + 1) * n], one), (r, s)


def test_same_optimum_as_pair_and_as_svc_on_breast_cancer():
    # scikit-learn's bundled breast-cancer data (Wisconsin diagnostic), standardised; the
    # reference is scikit-learn's SVC with the same C, gamma and tolerance.
    data = load_breast_cancer()
    X = (data.data - data.data.mean(axis=0)) / data.data.std(axis=0)
    y = np.where(data.target == 1, 1, -1)
    for C in (1.0, 100.0):
        prob = binary_classification(X, y, kernel=make_kernel("rbf", gamma=0.05), C=C)
        blk = solve_smo(prob, kkt_tol=1e-3, working_set="block")
        pair = solve_smo(prob, kkt_tol=1e-3, working_set="pair")
        assert blk.success and blk.certificate.max_violation <= 1e-3
        assert blk.options["working_set"] == "block"
        ref = SVC(C=C, kernel="rbf", gamma=0.05, tol=1e-3).fit(X, y)
        a_ref = np.zeros(len(y))
        a_ref[ref.support_] = np.abs(ref.dual_coef_[0])
        d_ref, d_blk, d_pair = _dual(prob, a_ref), _dual(prob, blk.alpha), _dual(prob, pair.alpha)
        assert abs(d_blk - d_ref) / abs(d_ref) <= 1e-6
        assert abs(d_blk - d_pair) / abs(d_pair) <= 1e-6
        f = model_from_solution(prob, blk).values(prob.X, standardised=True)
        f_ref = ref.decision_function(X)
        sure = (np.abs(f) >= 1e-3) & (np.abs(f_ref) >= 1e-3)
        assert np.array_equal(np.sign(f[sure]), np.sign(f_ref[sure]))


def test_regression_and_row_cache_mode_converge():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(150, 3))
    t = np.sin(X[:, 0]) + 0.1 * rng.normal(size=150)
    prob = regression(X, t, kernel=make_kernel("rbf", gamma=0.5), C=5.0, epsilon=0.05)
    pair = solve_smo(prob, kkt_tol=1e-6, working_set="pair")
    for kw in ({}, {"kernel_memory_mb": 1e-6, "row_cache_mb": 0.5}):
        r = solve_smo(prob, kkt_tol=1e-6, working_set="block", **kw)
        assert r.success and r.certificate.max_violation <= 1e-6
        assert abs(_dual(prob, r.alpha) - _dual(prob, pair.alpha)) <= 1e-8 * abs(
            _dual(prob, pair.alpha))


@pytest.mark.filterwarnings("ignore::solver.errors.ConvergenceWarning")
def test_trace_replays_bitwise_and_objective_never_rises():
    prob = _problem()
    r = solve_smo(prob, kkt_tol=1e-6, working_set="block", snapshot_every=50)
    cols = r.trace.columns
    assert r.iterations == cols["iteration"][-1] == len(cols["iteration"])
    obj = cols["objective"]
    assert np.all(np.diff(obj) <= 1e-12 * np.maximum(1.0, np.abs(obj[1:])))
    for k in (1, 37, 50, 51, r.iterations // 2, r.iterations):
        short = solve_smo(prob, kkt_tol=1e-6, working_set="block", iteration_limit=k,
                          snapshot_every=50) if k < r.iterations else r
        assert np.array_equal(replay_alpha(r.trace, k), short.alpha), k


def test_outer_column():
    prob = _problem()
    r = solve_smo(prob, kkt_tol=1e-6, working_set="block")
    outer = r.trace.columns["outer"]
    assert outer[0] == 1 and np.all(np.diff(outer) >= 0)
    assert outer[-1] == r.extra["outer_iterations"] < r.iterations  # several steps per set
    p = solve_smo(prob, kkt_tol=1e-6, working_set="pair")
    assert np.array_equal(p.trace.columns["outer"], p.trace.columns["iteration"])


@settings(max_examples=12, deadline=None, derandomize=True)
@given(seed=st.integers(0, 10_000), C=st.sampled_from([0.5, 5.0, 200.0]),
       pauses=st.sampled_from([(1, 7), (13, 3), (1000, 1)]))
def test_pause_points_do_not_change_the_path(seed, C, pauses):
    # a pause in the middle of an outer iteration resumes it where it was: snapshots and
    # callbacks at any period give the bits of an unpaused run
    prob = _problem(n=60, d=3, C=C, seed=seed)
    base = solve_smo(prob, kkt_tol=1e-5, working_set="block", snapshot_every=10_000)
    snap, every = pauses
    seen = []
    r = solve_smo(prob, kkt_tol=1e-5, working_set="block", snapshot_every=snap,
                  callback=lambda info: seen.append(info["iteration"]), callback_every=every)
    assert r.iterations == base.iterations and np.array_equal(r.alpha, base.alpha)
    assert np.array_equal(r.trace.columns["i"], base.trace.columns["i"])
    assert seen
    # feasible iterates: every recorded α within the box, the equality constraint held
    lo, hi = prob.lower, prob.upper
    for a in r.trace.snapshots:
        assert np.all(a >= lo - 1e-12) and np.all(a <= hi + 1e-12)
        assert abs(prob.y @ a - prob.delta) <= 1e-9 * max(1.0, np.abs(a).sum())


def test_runs_are_deterministic_and_keep_one_thread():
    prob = _problem(n=300, C=50.0)
    a = solve_smo(prob, kkt_tol=1e-4, working_set="block", threads=2)
    b = solve_smo(prob, kkt_tol=1e-4, working_set="block", threads=1)
    assert np.array_equal(a.alpha, b.alpha) and a.iterations == b.iterations
    assert a.extra["threads"] == 1


def test_warm_start_reaches_the_same_optimum():
    prob = _problem(C=1.0)
    cold = solve_smo(prob, kkt_tol=1e-6, working_set="block")
    prob2 = _problem(C=2.0)
    warm = solve_smo(prob2, kkt_tol=1e-6, working_set="block",
                     alpha0=np.minimum(cold.alpha * 2.0, prob2.upper))
    ref = solve_smo(prob2, kkt_tol=1e-6, working_set="pair")
    assert warm.success
    assert abs(_dual(prob2, warm.alpha) - _dual(prob2, ref.alpha)) <= 1e-8 * abs(
        _dual(prob2, ref.alpha))


def test_bad_working_set_is_a_clear_error():
    from solver.errors import InvalidInputError

    with pytest.raises(InvalidInputError, match="working_set must be one of block, pair"):
        solve_smo(_problem(n=10), working_set="triple")


_CHILD = """
import json, sys
sys.path.insert(0, {root!r})
from tests.test_smo_block import _problem
from solver.smo import solve_smo
r = solve_smo(_problem(n=40, d=3), kkt_tol=1e-8, working_set="block")
print(json.dumps({{"alpha": r.alpha.tolist(), "i": r.trace.columns["i"].tolist(),
                  "obj": r.trace.columns["objective"].tolist()}}))
"""


@pytest.mark.skipif(not JIT, reason="compares against the compiled code")
def test_compiled_matches_pure_python():
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    out = subprocess.run([sys.executable, "-c", _CHILD.format(root=ROOT)], env=env,
                         capture_output=True, text=True, check=True, cwd=ROOT)
    py = json.loads(out.stdout.strip().splitlines()[-1])
    r = solve_smo(_problem(n=40, d=3), kkt_tol=1e-8, working_set="block")
    assert py["i"] == r.trace.columns["i"].tolist()
    assert py["alpha"] == r.alpha.tolist() and py["obj"] == r.trace.columns["objective"].tolist()


def test_precomputed_kernel_and_a_callable_one():
    from solver.errors import InvalidInputError
    from solver.kernels import CallableKernel, PrecomputedKernel
    from solver.problem import index_features

    rng = np.random.default_rng(8)
    X = rng.normal(size=(80, 3))
    lab = np.where(X[:, 0] - X[:, 2] > 0.1, 1, -1)
    G = np.exp(-0.5 * ((X[:, None, :] - X[None, :, :]) ** 2).sum(-1))
    prob = binary_classification(index_features(80), lab, kernel=PrecomputedKernel(gram_matrix=G),
                                 C=3.0)
    blk = solve_smo(prob, kkt_tol=1e-7, working_set="block")
    pair = solve_smo(prob, kkt_tol=1e-7, working_set="pair")
    assert blk.success
    assert abs(_dual(prob, blk.alpha) - _dual(prob, pair.alpha)) <= 1e-9 * abs(
        _dual(prob, pair.alpha))
    lap = CallableKernel(func=lambda A, B: np.exp(-np.abs(A[:, None] - B[None]).sum(-1)))
    with pytest.raises(InvalidInputError, match="working_set 'block' needs a kernel"):
        solve_smo(binary_classification(X, lab, kernel=lap, C=1.0), working_set="block")
