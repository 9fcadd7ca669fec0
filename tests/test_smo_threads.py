"""The SMO loop with a helper thread (solver/_smo_kernels.py: helper_loop, up_split,
low_split, row_split): two threads must give bitwise the run of one thread, and the helper
must be stopped on every way out of the loop.  On a busy machine the loop takes back the
parts a late helper has not begun and pauses the helper; the run stays the same.

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
from solver import smo
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
    one = solve_smo(prob, kkt_tol=1e-3, threads=1, **skw)
    two = solve_smo(prob, kkt_tol=1e-3, threads=2, **skw)
    assert one.options["threads"] == 1 and two.options["threads"] == 2
    assert one.extra["helper_jobs"] == 0
    # passes and rows were really split; the helper did > 1000 parts, unless the machine was
    # busy (then the loop took parts back and paused the helper: the run is the same)
    assert two.extra["helper_jobs"] + two.extra["helper_taken"] >= 256
    assert two.extra["helper_jobs"] > 1000 or two.extra["helper_pauses"] > 0
    _assert_same_run(one, two)


@needs_two
def test_warm_start_with_two_threads_matches_one() -> None:
    prob = _problem(5000, kernel="rbf", C=5.0, gamma=0.1)
    start = solve_smo(prob, kkt_tol=1e-1, threads=1).alpha
    one = solve_smo(prob, kkt_tol=1e-3, threads=1, alpha0=start)
    two = solve_smo(prob, kkt_tol=1e-3, threads=2, alpha0=start)
    _assert_same_run(one, two)


def _helpers() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "kktrace-smo-helper"]


@needs_two
@pytest.mark.parametrize("how", ["iteration_limit", "callback", "time_limit", "converged"])
def test_helper_thread_ends_with_every_run(how) -> None:
    prob = _problem(5000, kernel="rbf", C=10.0, gamma=0.1)
    kw = {"iteration_limit": dict(iteration_limit=700),
          "callback": dict(callback=lambda info: True, callback_every=300),
          "time_limit": dict(time_limit=1e-3),
          "converged": {}}[how]
    with pytest.warns(ConvergenceWarning) if how != "converged" else nullcontext():
        res = solve_smo(prob, kkt_tol=1e-3, threads=2, kernel_memory_mb=1.0, **kw)
    assert res.extra["helper_jobs"] + res.extra["helper_taken"] > 0  # a helper served
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


def test_parts_the_helper_has_not_begun_are_taken_back() -> None:
    """A helper that never comes (a busy machine): the loop takes each posted part back and
    computes it itself, with the same results as the unsplit pass and kernel row."""
    a = 2 * K.SPLIT_PASS
    h = (a // 2) & ~63
    rng = np.random.default_rng(3)
    F = rng.standard_normal(a)
    status = rng.choice(np.array([K.UP, K.LOW, K.UP | K.LOW], dtype=np.uint8), size=a)
    Ki, Kj = rng.uniform(0.0, 1.0, a), rng.uniform(0.0, 1.0, a)
    diag = np.ones(a)
    bm = np.zeros(a // K.BLK + 2)
    wbuf = np.zeros(K.BLK)
    hctl = np.zeros(K.H_SIZE, dtype=np.int64)
    hctl[K.H_ON] = 1  # the loop believes a helper serves it; none runs
    hval = np.zeros(K.HV_SIZE)
    F_one = F.copy()
    expect_up = K.pass_up(F_one, Ki, Kj, 0.5, -0.25, status, a, bm, wbuf, True)
    got_up = K.up_split(F, Ki, Kj, 0, 1, 0.5, -0.25, status, a, bm, wbuf, True, hctl, hval)
    assert got_up == expect_up and np.array_equal(F, F_one)  # the update was applied once
    expect_low = K.pass_low(F, Ki, diag, status, a, got_up[0], 1.0, 1e-12, True, True, bm, wbuf)
    got_low = K.low_split(F, Ki, 0, diag, status, a, got_up[0], 1.0, 1e-12, True, True, bm,
                          wbuf, hctl, hval)
    assert got_low == expect_low
    XK = rng.standard_normal((3, a))
    sq = np.zeros(a)
    K.self_dots(XK, sq)
    acc, ibuf = np.zeros(K.ROW_CHUNK), np.zeros(K.ROW_CHUNK, dtype=np.int64)
    row_one, row_split = np.zeros(a), np.zeros(a)
    K.kernel_row(XK, 5, sq[5], XK, sq, a, row_one, K.KERNEL_RBF, 0.3, 0.0, 3, acc, ibuf)
    K.row_split(XK, 5, sq, a, row_split, 0, K.KERNEL_RBF, 0.3, 0.0, 3, acc, ibuf, hctl)
    assert np.array_equal(row_one, row_split)
    assert hctl[K.H_TAKEN] == 3 and hctl[K.H_CLAIM] == 3 and hctl[K.H_POSTED] == 3
    assert h < a  # each part really was split


@pytest.mark.skipif(not JIT, reason="the split loop runs compiled code only")
def test_run_without_a_helper_thread_is_bitwise_the_same(monkeypatch) -> None:
    """Every part of every split job taken back by the loop, which after TAKE_BACK_LIMIT of
    them in a call sends the (absent) helper away for the rest of it: still the one-thread
    run."""
    prob = _problem(5000, kernel="rbf", C=10.0, gamma=0.1)
    one = solve_smo(prob, kkt_tol=1e-3, threads=1, kernel_memory_mb=1.0)
    calls: list[tuple[int, int, int]] = []

    def absent(self):
        self.hctl[:] = 0
        self.hctl[K.H_ON] = 1
        return None

    run_loop = smo._Engine._run_loop

    def counted(self):
        code = run_loop(self)
        hc = self.hctl
        calls.append((int(hc[K.H_POSTED]), int(hc[K.H_TAKEN]), int(hc[K.H_AWAY])))
        return code

    monkeypatch.setattr(smo._Engine, "_start_helper", absent)
    monkeypatch.setattr(smo._Engine, "_run_loop", counted)
    alone = solve_smo(prob, kkt_tol=1e-3, threads=1, kernel_memory_mb=1.0)
    _assert_same_run(one, alone)
    assert any(away for _, _, away in calls)
    assert all(t == posted - 1 for posted, t, _ in calls if posted)  # all but the exit
    assert all(away == (t >= K.TAKE_BACK_LIMIT) for _, t, away in calls)


class _BusyClock:
    """``solver.smo.time`` on a machine where the helper never gets a core: its CPU clock
    stands still, while each wall-clock reading is 10 ms after the last (so every call of
    the loop lasts longer than HELPER_MIN_WALL, however fast the machine)."""

    def __init__(self) -> None:
        self.now = 0.0

    def perf_counter(self) -> float:
        self.now += 0.01
        return self.now

    def thread_time(self) -> float:
        return 0.0


@needs_two
def test_a_helper_without_a_core_is_paused_for_doubling_spans(monkeypatch) -> None:
    prob = _problem(5000, kernel="rbf", C=100.0, gamma=0.1)
    one = solve_smo(prob, kkt_tol=1e-3, threads=1, kernel_memory_mb=1.0)
    started: list[int] = []
    start = smo._Engine._start_helper

    def logged(self):
        th = start(self)
        if th is not None:
            started.append(int(self.istate[K.IS_ITER]))
        return th

    monkeypatch.setattr(smo._Engine, "_start_helper", logged)
    monkeypatch.setattr(smo, "time", _BusyClock())
    busy = solve_smo(prob, kkt_tol=1e-3, threads=2, kernel_memory_mb=1.0)
    _assert_same_run(one, busy)
    assert busy.extra["helper_pauses"] == len(started) >= 3
    gaps = np.diff(started)
    pauses = np.minimum(smo.HELPER_PAUSE_MAX, smo.HELPER_PAUSE * 2 ** np.arange(gaps.size))
    assert np.all(gaps >= pauses)  # each pause twice the last
    assert busy.extra["helper_cpu_seconds"] == 0.0 and busy.extra["helper_seconds"] > 0.0
