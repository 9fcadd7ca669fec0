"""Property tests (hypothesis, derandomised) of the probability outputs: binary probabilities
are monotone in the decision value and lie in (0, 1); coupled multi-class probabilities lie
in (0, 1), sum to 1 within 1e-12, satisfy the optimality conditions of method 2 of Wu, Lin &
Weng (2004) and recover the class probabilities exactly when the pairwise ones are
consistent."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from solver.calibration import (
    Calibration,
    FitStatus,
    SigmoidFit,
    couple_pairwise,
    couple_pairwise_rows,
    coupling_matrix,
    fit_sigmoid,
    sigmoid_probability,
)

SETTINGS = settings(derandomize=True, max_examples=60, deadline=None, database=None)

#: |A f + B| beyond which the larger of the two class probabilities rounds to exactly 1.0
#: in float64 (1 − e^{−36.8} < 1 − 2^{−53}); below it both lie strictly inside (0, 1).
SATURATION = 36.0

slopes = st.floats(-20.0, -1e-3)
offsets = st.floats(-10.0, 10.0)
value_arrays = st.lists(st.floats(-50.0, 50.0), min_size=2, max_size=60).map(np.array)


@SETTINGS
@given(A=slopes, B=offsets, f=value_arrays)
def test_binary_probability_monotone_and_inside_the_open_interval(A, B, f):
    f = np.sort(f)
    p = sigmoid_probability(f, A, B)
    q = sigmoid_probability(f, -A, -B)  # P(negative), as Calibration.probabilities builds it
    assert np.all(np.diff(p) >= 0)  # A < 0: non-decreasing in f (strict up to rounding)
    z = np.abs(A * f + B)
    inside = z <= SATURATION
    assert np.all((p[inside] > 0) & (p[inside] < 1))
    assert np.all((q[inside] > 0) & (q[inside] < 1))
    # beyond saturation the smaller probability still stays > 0 (no exp overflow)
    assert np.all(np.minimum(p, q)[z < 700] > 0)
    assert np.max(np.abs(p + q - 1)) <= 1e-15


@SETTINGS
@given(seed=st.integers(0, 2**31 - 1), n=st.integers(6, 80))
def test_fitted_calibration_gives_monotone_probabilities(seed, n):
    rng = np.random.default_rng(seed)
    f = rng.normal(0.0, 2.0, n)
    pos = rng.random(n) < 1 / (1 + np.exp(-1.2 * f))
    if pos.all() or (~pos).all():
        pos[0], pos[-1] = True, False
    fit = fit_sigmoid(f, pos)
    if fit.status != FitStatus.FITTED:  # failures are reported, never turned into numbers
        assert np.isnan(fit.A) or fit.A >= 0
        return
    cal = Calibration(labels={"negative": 0, "positive": 1}, n_folds=2, seed=0,
                      folds=np.zeros(n, np.int64), cv_values=f, positive=pos, fit=fit,
                      fold_fits=(), solver="smo", solver_options={}, weights={},
                      status=fit.status, message=fit.message)
    grid = np.linspace(-8, 8, 401)
    P = cal.probabilities(grid)
    assert np.all(np.diff(P[:, 1]) >= 0) and np.all(np.diff(P[:, 0]) <= 0)
    assert np.all((P > 0) & (P < 1))
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-15


def _pairwise(rng: np.random.Generator, k: int, lo: float) -> np.ndarray:
    U = rng.uniform(lo, 1 - lo, (k, k))
    return np.triu(U, 1) + np.tril(1 - U.T, -1)


@SETTINGS
@given(seed=st.integers(0, 2**31 - 1), k=st.integers(2, 10),
       lo=st.sampled_from([1e-6, 1e-3, 0.05]))
def test_coupling_sums_to_one_and_meets_its_optimality_conditions(seed, k, lo):
    R = _pairwise(np.random.default_rng(seed), k, lo)
    p = couple_pairwise(R)
    assert abs(p.sum() - 1) <= 1e-12
    assert np.all((p > 0) & (p < 1))
    # Wu, Lin & Weng (2004), eq. (21): Q p = b e for one scalar b (= pᵀQp ≥ 0)
    Qp = coupling_matrix(R) @ p
    b = float(p @ Qp)
    assert np.max(np.abs(Qp - b)) <= 1e-9 * max(1.0, np.max(np.abs(coupling_matrix(R))))
    # relabelling the classes relabels the probabilities
    perm = np.random.default_rng(seed + 1).permutation(k)
    assert np.allclose(couple_pairwise(R[np.ix_(perm, perm)]), p[perm], atol=1e-10)


@SETTINGS
@given(seed=st.integers(0, 2**31 - 1), k=st.integers(2, 10))
def test_coupling_recovers_consistent_pairwise_probabilities(seed, k):
    # closed form: when r_ij = p_i / (p_i + p_j) for some p on the simplex, every term
    # r_ji p_i − r_ij p_j vanishes, so that p is the minimiser (Wu, Lin & Weng 2004, sec. 4.2)
    rng = np.random.default_rng(seed)
    p = rng.dirichlet(np.ones(k)) * 0.98 + 0.02 / k
    R = p[:, None] / (p[:, None] + p[None, :])
    np.fill_diagonal(R, 0.0)
    assert np.allclose(couple_pairwise(R), p, atol=1e-12)


@SETTINGS
@given(seed=st.integers(0, 2**31 - 1), k=st.integers(3, 8), m=st.integers(1, 30))
def test_coupled_rows_sum_to_one(seed, k, m):
    rng = np.random.default_rng(seed)
    pairs = rng.uniform(1e-4, 1 - 1e-4, (m, k * (k - 1) // 2))
    P = couple_pairwise_rows(pairs, k)
    assert P.shape == (m, k)
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-12
    assert np.all((P > 0) & (P < 1))


@SETTINGS
@given(A=slopes, B=offsets, f=st.lists(st.floats(-1e6, 1e6), min_size=1, max_size=40))
def test_calibration_probabilities_stay_inside_the_open_interval(A, B, f):
    # the stored probabilities (Calibration.probabilities) stay inside (0, 1) even where the
    # sigmoid itself rounds to 0 or 1 (clipped at 1e-15; see PROBABILITY_CLIP)
    n = 4
    fit = SigmoidFit(A=A, B=B, status=FitStatus.FITTED, message="", newton_steps=0,
                     gradient_norm=0.0, objective=0.0, n_positive=2, n_negative=2,
                     target_positive=0.75, target_negative=0.25)
    cal = Calibration(labels={"negative": 0, "positive": 1}, n_folds=2, seed=0,
                      folds=np.zeros(n, np.int64), cv_values=np.zeros(n), positive=np.ones(n, bool),
                      fit=fit, fold_fits=(), solver="smo", solver_options={}, weights={},
                      status=FitStatus.FITTED, message="")
    values = np.sort(np.array(f))
    P = cal.probabilities(values)
    assert np.all((P > 0) & (P < 1))
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 2e-15
    assert np.all(np.diff(P[:, 1]) >= 0)
