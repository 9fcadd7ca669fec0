"""Tests of the compiled SMO kernels (solver/_smo_kernels.py).

Small inputs only, so that the whole file also runs with ``NUMBA_DISABLE_JIT=1`` (every
kernel stepped through as plain Python).  The compiled-vs-Python comparison runs the pure
Python side in a subprocess.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
from numba import config
from sklearn.metrics.pairwise import linear_kernel, polynomial_kernel, rbf_kernel, sigmoid_kernel

from solver import _smo_kernels as K
from solver.kernels import make_kernel
from solver.problem import binary_classification
from solver.smo import solve_smo

JIT = not config.DISABLE_JIT
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(7)


def test_exp_inplace_matches_libm(rng):
    x = np.concatenate([[0.0, -0.0, -1e-300, -708.0, 709.0, -745.0],
                        -rng.random(600) * 50, rng.uniform(-700, 700, 200)])
    y = x.copy()
    K.exp_inplace(y, np.zeros(x.size, dtype=np.int64))
    ref = np.exp(np.maximum(x, -708.0))
    ulps = np.abs(y - ref) / np.spacing(ref)
    assert np.max(ulps) <= 2.0
    assert y[0] == 1.0 and y[1] == 1.0  # K(x, x) = exp(0) = 1 exactly


KERNELS = [
    (K.KERNEL_RBF, 0.3, 0.0, 1, lambda A, B: rbf_kernel(A, B, gamma=0.3)),
    (K.KERNEL_POLY, 0.5, 1.0, 3, lambda A, B: polynomial_kernel(A, B, degree=3, gamma=0.5,
                                                                coef0=1.0)),
    (K.KERNEL_LINEAR, 0.0, 0.0, 1, linear_kernel),
    (K.KERNEL_SIGMOID, 0.2, -0.5, 1, lambda A, B: sigmoid_kernel(A, B, gamma=0.2, coef0=-0.5)),
]


@pytest.mark.parametrize("code,gamma,offset,degree,ref", KERNELS)
def test_kernel_rows_match_scikit_learn_pairwise(rng, code, gamma, offset, degree, ref):
    # reference: scikit-learn's pairwise kernels
    X = rng.normal(size=(37, 6))  # d = 6 exercises the 4-wide blocks and the remainder
    XK = np.ascontiguousarray(X.T)
    sq = np.zeros(37)
    K.self_dots(XK, sq)
    acc, ibuf = np.zeros(K.CHUNK), np.zeros(K.CHUNK, dtype=np.int64)
    G = ref(X, X)
    for i in (0, 5, 36):
        out = np.zeros(37)
        K.kernel_row(XK, i, sq[i], XK, sq, 37, out, code, gamma, offset, degree, acc, ibuf)
        np.testing.assert_allclose(out, G[i], rtol=1e-13, atol=1e-13)
    diag = np.zeros(37)
    K.kernel_diag(XK, sq, diag, code, gamma, offset, degree, acc, ibuf)
    np.testing.assert_allclose(diag, np.diagonal(G), rtol=1e-13, atol=1e-13)
    if code == K.KERNEL_RBF:
        assert np.all(diag == 1.0)
    # a row over permuted columns holds the same bits as the matching entries
    perm = rng.permutation(37)
    XP = np.ascontiguousarray(XK[:, perm])
    out, outp = np.zeros(37), np.zeros(37)
    K.kernel_row(XK, 3, sq[3], XK, sq, 37, out, code, gamma, offset, degree, acc, ibuf)
    K.kernel_row(XK, 3, sq[3], XP, sq[perm], 37, outp, code, gamma, offset, degree, acc, ibuf)
    assert np.array_equal(outp, out[perm])


def test_pass_up_and_low_match_direct_search(rng):
    a = 1300  # spans three blocks
    F = np.round(rng.normal(size=a), 1)  # many ties
    status = rng.integers(0, 4, size=a).astype(np.uint8)
    Ki = rng.random(a)
    Kj = rng.random(a)
    diag = rng.uniform(0.5, 1.5, a)
    bm = np.zeros(a // K.BLK + 2)
    G = F.copy()
    m, i = K.pass_up(F, Ki, Kj, 0.25, -0.5, status, a, bm, np.zeros(K.BLK), True)
    G -= Ki * 0.25 + Kj * -0.5
    assert np.array_equal(F, G)
    up = (status & K.UP) != 0
    assert m == G[up].max() and i == np.flatnonzero(up & (G == m))[0]
    low = (status & K.LOW) != 0
    for second, unit in ((True, False), (False, False), (True, True)):
        dd = np.ones(a) if unit else diag
        best, j, big_m = K.pass_low(F, Ki, dd, status, a, m, dd[i], 1e-12, second, unit, bm,
                                     np.zeros(K.BLK))
        assert big_m == G[low].min()
        b = np.maximum(m - G, 0.0)
        q = dd[i] + dd - 2.0 * Ki
        q = np.where(q > 0, q, 1e-12)
        val = -(b * b) / q if second else -b
        val = np.where(low, val, np.inf)
        assert best == val.min() and j == int(np.argmax(val == best))


def test_compact_cache_moves_rows_forward():
    stride, new = 6, 4
    cache = np.arange(4 * stride, dtype=np.float64)
    keep = np.array([0, 2, 3, 5])
    survivors = np.array([1, 3])
    K.compact_cache(cache, stride, new, survivors, keep, new)
    np.testing.assert_array_equal(cache[:4], [6, 8, 9, 11])
    np.testing.assert_array_equal(cache[4:8], [18, 20, 21, 23])


def test_reconstruct_matches_dense_product(rng):
    X = rng.normal(size=(23, 5))
    XK = np.ascontiguousarray(X.T)
    sq = np.zeros(23)
    K.self_dots(XK, sq)
    sv = np.array([1, 4, 7, 8, 20])
    coef = rng.normal(size=5)
    q = rng.normal(size=23)
    F = np.zeros(23)
    targets = np.arange(3, 23)
    K.reconstruct(XK, sq, targets, targets, np.ascontiguousarray(XK[:, sv]), sq[sv], coef, q, F,
                  K.KERNEL_RBF, 0.7, 0.0, 1, np.zeros((4, K.CHUNK)),
                  np.zeros(K.CHUNK, dtype=np.int64))
    expect = -q - rbf_kernel(X, X[sv], gamma=0.7) @ coef
    np.testing.assert_allclose(F[3:], expect[3:], rtol=1e-12, atol=1e-12)
    assert np.all(F[:3] == 0.0)


def _tiny_problem():
    rng = np.random.default_rng(3)
    X = rng.normal(size=(14, 2))
    lab = np.where(X[:, 0] + 0.3 * rng.normal(size=14) > 0, 1, -1)
    return binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.8), C=2.0)


def test_tiny_solve_runs(rng):
    # the full loop, also stepped through as Python under NUMBA_DISABLE_JIT=1
    r = solve_smo(_tiny_problem(), kkt_tol=1e-6, snapshot_every=3)
    assert r.success and r.certificate.max_violation <= 1e-6


_CHILD = """
import json, sys
sys.path.insert(0, {root!r})
from tests.test_smo_kernels import _tiny_problem
from solver.smo import solve_smo
r = solve_smo(_tiny_problem(), kkt_tol=1e-8, shrinking=True)
print(json.dumps({{"alpha": r.alpha.tolist(), "i": r.trace.columns["i"].tolist(),
                  "j": r.trace.columns["j"].tolist(), "it": r.iterations,
                  "obj": r.trace.columns["objective"].tolist()}}))
"""


@pytest.mark.skipif(not JIT, reason="compares against the compiled code")
def test_compiled_matches_pure_python():
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    out = subprocess.run([sys.executable, "-c", _CHILD.format(root=ROOT)], env=env,
                         capture_output=True, text=True, check=True, cwd=ROOT)
    py = json.loads(out.stdout.strip().splitlines()[-1])
    r = solve_smo(_tiny_problem(), kkt_tol=1e-8, shrinking=True)
    assert py["it"] == r.iterations
    assert py["i"] == r.trace.columns["i"].tolist() and py["j"] == r.trace.columns["j"].tolist()
    # bit for bit: the compiled code uses no fused multiply-adds or reassociation
    assert py["alpha"] == r.alpha.tolist()
    assert py["obj"] == r.trace.columns["objective"].tolist()


@pytest.mark.skipif(not JIT, reason="checks compiled signatures")
def test_repeated_calls_do_not_recompile():
    prob = _tiny_problem()
    solve_smo(prob)
    counts = {name: len(getattr(K, name).signatures)
              for name in ("smo_run", "pass_up", "pass_low", "kernel_row", "reconstruct")}
    assert counts["smo_run"] <= 2  # float64 and, if a float32 run happened, float32
    rng = np.random.default_rng(11)
    for n, kern in ((30, make_kernel("linear")), (55, make_kernel("poly", gamma=0.1, degree=2)),
                    (40, make_kernel("rbf", gamma=2.0))):
        X = rng.normal(size=(n, 3))
        lab = np.where(rng.random(n) < 0.5, 1, -1)
        p = binary_classification(X, lab, kernel=kern, C=3.0)
        solve_smo(p, trace="sampled")
        solve_smo(p, kernel_memory_mb=1e-6, row_cache_mb=1e-6, shrinking=False,
                  selection="first_order", trace="off")
    for name, c in counts.items():
        assert len(getattr(K, name).signatures) == c, name
