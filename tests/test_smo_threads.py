"""The SMO loop with a helper thread (solver/_smo_kernels.py: helper_loop, up_split,
low_split, row_split): two threads must give bitwise the run of one thread, and the helper
must be stopped on every way out of the loop.

Problems of 5000 points, so that passes (≥ SPLIT_PASS) and kernel rows (≥ SPLIT_ROW) are
really shared; the data are seeded random draws (an invariance check, not a reference).
Under NUMBA_DISABLE_JIT=1 the solver uses one thread, so the thread tests are skipped there.
"""

from __future__ import annotations

import threading
from contextlib import nullcontext

import numpy as np
import pytest
from numba import config

from solver import _smo_kernels as K
from solver.errors import ConvergenceWarning, InvalidInputError
from solver.kernels import make_kernel
from solver.problem import binary_classification
from solver.smo import available_cores, solve_smo

JIT = not config.DISABLE_JIT
needs_two = pytest.mark.skipif(not JIT or available_cores() < 2,
                               reason="needs compiled code and two cores")


def _problem(n: int, kernel: str, C: float, seed: int = 7, **kw):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 12))
    w = rng.standard_normal(12)
    y = np.where(X @ w + 0.8 * rng.standard_normal(n) > 0, 1.0, -1.0)
    return binary_classification(X, y, kernel=make_kernel(kernel, **kw), C=C)


def _assert_same_run(r1, r2) -> None:
    assert r1.status == r2.status
    assert r1.iterations == r2.iterations
    assert np.array_equal(r1.alpha, r2.alpha)
    assert r1.bias == r2.bias
    for name, col in r1.trace.columns.items():
        assert np.array_equal(col, r2.trace.columns[name]), name
    for name, col in r1.trace.events.items():
        assert np.array_equal(col, r2.trace.events[name]), name
    assert np.array_equal(r1.trace.snapshots, r2.trace.snapshots)
    c1, c2 = r1.certificate, r2.certificate
    assert (c1.dual_objective, c1.max_violation, c1.duality_gap) == \
        (c2.dual_objective, c2.max_violation, c2.duality_gap)


CASES = {
    "rbf, row cache": (dict(kernel="rbf", C=10.0, gamma=0.1), dict(kernel_memory_mb=1.0)),
    "rbf, full Gram": (dict(kernel="rbf", C=10.0, gamma=0.1), dict(kernel_memory_mb=1000.0)),
    "linear, first order": (dict(kernel="linear", C=0.5), dict(selection="first_order",
                                                                 kernel_memory_mb=1.0)),
    "poly, float32 rows": (dict(kernel="poly", C=1.0, gamma=0.1, degree=2, offset=1.0),
                           dict(kernel_dtype="float32", kernel_memory_mb=1.0)),
    "rbf, no shrinking": (dict(kernel="rbf", C=1.0, gamma=0.05), dict(shrinking=False,
                                                                       kernel_memory_mb=1.0)),
}


@needs_two
@pytest.mark.parametrize("case", list(CASES))
def test_two_threads_give_bitwise_the_run_of_one(case) -> None:
    pkw, skw = CASES[case]
    prob = _problem(5000, **pkw)
    one = solve_smo(prob, tol=1e-3, threads=1, **skw)
    two = solve_smo(prob, tol=1e-3, threads=2, **skw)
    assert one.options["threads"] == 1 and two.options["threads"] == 2
    assert one.extra["helper_jobs"] == 0
    assert two.extra["helper_jobs"] > 1000  # passes and rows were really shared
    _assert_same_run(one, two)


@needs_two
def test_warm_start_with_two_threads_matches_one() -> None:
    prob = _problem(5000, kernel="rbf", C=5.0, gamma=0.1)
    start = solve_smo(prob, tol=1e-1, threads=1).alpha
    one = solve_smo(prob, tol=1e-3, threads=1, alpha0=start)
    two = solve_smo(prob, tol=1e-3, threads=2, alpha0=start)
    _assert_same_run(one, two)


def _helpers() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "kktrace-smo-helper"]


@needs_two
@pytest.mark.parametrize("how", ["iteration_limit", "callback", "time_limit", "converged"])
def test_helper_thread_ends_with_every_run(how) -> None:
    prob = _problem(5000, kernel="rbf", C=10.0, gamma=0.1)
    kw = {"iteration_limit": dict(max_iter=700),
          "callback": dict(callback=lambda info: True, callback_every=300),
          "time_limit": dict(time_limit=1e-3),
          "converged": {}}[how]
    with pytest.warns(ConvergenceWarning) if how != "converged" else nullcontext():
        res = solve_smo(prob, tol=1e-3, threads=2, kernel_memory_mb=1.0, **kw)
    assert res.extra["helper_jobs"] > 0
    assert _helpers() == []
    assert res.status.label == {"iteration_limit": "iteration_limit",
                                "callback": "stopped_by_callback",
                                "time_limit": "time_limit", "converged": "converged"}[how]


def test_threads_option_and_environment(monkeypatch) -> None:
    prob = _problem(300, kernel="rbf", C=1.0, gamma=0.1)
    with pytest.raises(InvalidInputError, match="threads"):
        solve_smo(prob, threads=0)
    monkeypatch.setenv("KKTRACE_THREADS", "two")
    with pytest.raises(InvalidInputError, match="KKTRACE_THREADS.*'two'"):
        solve_smo(prob)
    monkeypatch.setenv("KKTRACE_THREADS", "1")
    res = solve_smo(prob)
    assert res.options["threads"] == 1 and res.extra["helper_jobs"] == 0
    monkeypatch.delenv("KKTRACE_THREADS")
    res = solve_smo(prob, threads=64)  # never more than the loop can use or the cores allow
    assert res.options["threads"] == min(2, available_cores())


@pytest.mark.skipif(not JIT, reason="the helper runs compiled code only")
def test_split_passes_send_ties_to_the_lower_part() -> None:
    """Equal maxima / selection values in both parts: the lower position wins, as in the
    unsplit pass; a part with no candidate contributes nothing."""
    a = 2 * K.SPLIT_PASS
    h = (a // 2) & ~63
    F = np.zeros(a)
    status = np.full(a, K.UP | K.LOW, dtype=np.uint8)
    F[[h - 5, h + 3]] = 2.0  # tie across the split point
    F[[h - 9, h + 11]] = -3.0
    Ki = np.full(a, 0.25)
    diag = np.ones(a)
    cache = np.ascontiguousarray(np.concatenate([Ki, Ki]))
    gram = np.zeros((1, 1))
    bm = np.zeros(a // K.BLK + 2)
    wbuf = np.zeros(K.BLK)
    hctl = np.zeros(K.H_SIZE, dtype=np.int64)
    hval = np.zeros(K.HV_SIZE)
    istate = np.zeros(K.IS_SIZE, dtype=np.int64)
    fstate = np.zeros(K.FS_SIZE)
    fstate[K.FS_TAU] = 1e-12
    XK = np.zeros((1, a))
    sq = np.zeros(a)

    def serve():
        hctl[:] = 0
        hctl[K.H_ON] = 1
        th = threading.Thread(target=K.helper_loop, args=(hctl, hval, F, diag, status, gram,
                                                          cache, XK, sq, istate, fstate))
        th.start()
        return th

    expect_up = K.pass_up(F, Ki, Ki, 0.0, 0.0, status, a, bm, wbuf, False)
    expect_low = K.pass_low(F, Ki, diag, status, a, 2.0, 1.0, 1e-12, True, True, bm, wbuf)
    th = serve()
    got_up = K.up_split(F, Ki, Ki, 0, 0, 0.0, 0.0, status, a, bm, wbuf, False, hctl, hval)
    got_low = K.low_split(F, Ki, 0, diag, status, a, 2.0, 1.0, 1e-12, True, True, bm, wbuf,
                          hctl, hval)
    K.helper_stop(hctl)
    th.join()
    assert got_up == expect_up and got_up[1] == h - 5
    assert got_low == expect_low and got_low[1] == h - 9
    # the only candidates in the helper's part: its index comes back shifted by h
    F[[h - 5, h - 9]] = 0.0
    status[:h] = K.LOW  # nothing of the loop's part is in I_up
    expect_up = K.pass_up(F, Ki, Ki, 0.0, 0.0, status, a, bm, wbuf, False)
    th = serve()
    got_up = K.up_split(F, Ki, Ki, 0, 0, 0.0, 0.0, status, a, bm, wbuf, False, hctl, hval)
    K.helper_stop(hctl)
    th.join()
    assert got_up == expect_up and got_up[1] == h + 3
    assert not _helpers()
