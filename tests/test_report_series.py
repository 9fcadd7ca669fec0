"""Plot-series helpers of the report: min/max downsampling, event thinning, trace replay."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from solver.reporting._series import (
    bucket_envelope,
    minmax_downsample,
    replay_pairs,
    thin_events,
)


def test_short_series_is_returned_unchanged_as_a_copy(rng: np.random.Generator) -> None:
    x = np.arange(50.0)
    y = rng.normal(size=50)
    xs, ys = minmax_downsample(x, y, max_points=100)
    assert np.array_equal(xs, x) and np.array_equal(ys, y)
    ys[0] = 99.0
    assert y[0] != 99.0  # a copy, the input is untouched


def test_single_spike_survives_downsampling(rng: np.random.Generator) -> None:
    n = 200_000
    x = np.arange(1, n + 1, dtype=np.float64)
    y = np.exp(-x / 40_000) + 1e-3 * rng.random(n)
    y[123_457] = 50.0  # one iteration with a large violation
    y[7] = -3.0
    before = y.copy()
    xs, ys = minmax_downsample(x, y, max_points=1000)
    assert xs.size <= 1002
    assert 50.0 in ys and xs[np.argmax(ys)] == x[123_457]
    assert -3.0 in ys and xs[np.argmin(ys)] == x[7]
    assert np.array_equal(y, before)  # stored data never altered
    assert np.all(np.diff(xs) > 0)  # still in iteration order


@settings(derandomize=True, max_examples=60, deadline=None)
@given(
    values=st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=1, max_size=400),
    max_points=st.integers(2, 60),
)
def test_every_bucket_keeps_its_extremes(values: list[float], max_points: int) -> None:
    y = np.asarray(values)
    x = np.arange(y.size, dtype=np.float64)
    xs, ys = minmax_downsample(x, y, max_points=max_points)
    # every kept point is a real (x, y) pair of the input
    assert np.array_equal(y[xs.astype(np.int64)], ys)
    assert ys.max() == y.max() and ys.min() == y.min()
    if y.size > max_points:
        starts = np.unique(np.linspace(0, y.size, max_points // 2 + 1).astype(np.int64)[:-1])
        ends = np.append(starts[1:], y.size)
        for s, e in zip(starts, ends, strict=True):
            kept = ys[(xs >= s) & (xs < e)]
            assert kept.max() == y[s:e].max() and kept.min() == y[s:e].min()
        assert xs.size <= 2 * (max_points // 2) + 2


def test_non_finite_values_are_dropped_not_drawn() -> None:
    x = np.arange(6.0)
    y = np.array([1.0, np.nan, 3.0, np.inf, -np.inf, 2.0])
    xs, ys = minmax_downsample(x, y)
    assert np.array_equal(xs, [0.0, 2.0, 5.0]) and np.array_equal(ys, [1.0, 3.0, 2.0])


def test_bucket_envelope_bounds_the_series(rng: np.random.Generator) -> None:
    y = rng.normal(size=10_000)
    env = bucket_envelope(np.arange(y.size), y, buckets=200)
    assert len(env["iteration"]) == 200
    assert min(env["low"]) == y.min() and max(env["high"]) == y.max()
    assert all(lo <= hi for lo, hi in zip(env["low"], env["high"], strict=True))
    empty = bucket_envelope(np.arange(3), np.full(3, np.nan))
    assert empty == {"iteration": [], "low": [], "high": []}


def test_thin_events_keeps_one_mark_per_occupied_bucket() -> None:
    few = np.array([3, 10, 500])
    assert np.array_equal(thin_events(few, (0, 1000)), few)
    many = np.arange(0, 100_000, 7)
    marks = thin_events(many, (0, 100_000), max_marks=100)
    assert 90 <= marks.size <= 101
    assert marks[0] == 0 and np.all(np.diff(marks) > 0)
    assert set(marks.tolist()) <= set(many.tolist())


def _loop_replay(it, i, j, ai, aj, a0, lo, up, bound_tol):
    """Reference: apply the updates one at a time (plain Python)."""
    a = a0.copy()
    thr = lo + bound_tol * (up - lo)
    sizes = [int(np.sum(a > thr))]
    change = np.zeros_like(a)
    for k in range(len(it)):
        change[i[k]] += abs(ai[k] - a[i[k]])
        a[i[k]] = ai[k]
        change[j[k]] += abs(aj[k] - a[j[k]])
        a[j[k]] = aj[k]
        sizes.append(int(np.sum(a > thr)))
    return a, np.array(sizes), change


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_vectorised_replay_matches_a_plain_loop(seed: int) -> None:
    g = np.random.default_rng(seed)
    n, r = 30, 400
    i = g.integers(0, n, r)
    j = (i + g.integers(1, n, r)) % n  # j ≠ i, as in a working pair
    up = np.full(n, 2.0)
    lo = np.zeros(n)
    # values at 0, at the bound, or free
    pick = g.integers(0, 3, (2, r))
    vals = np.where(pick == 0, 0.0, np.where(pick == 1, 2.0, g.random((2, r)) * 2.0))
    a0 = np.where(g.random(n) < 0.3, 1.0, 0.0)
    it = np.arange(1, r + 1)
    rep = replay_pairs(it, i, j, vals[0], vals[1], a0, lo, up, bound_tol=1e-8)
    a, sizes, change = _loop_replay(it, i, j, vals[0], vals[1], a0, lo, up, 1e-8)
    assert np.array_equal(rep.final_alpha, a)
    assert np.array_equal(rep.support_size, sizes)
    assert np.allclose(rep.total_change, change)
    assert np.array_equal(rep.iterations, np.arange(r + 1))
    # one point's trajectory ends at its final value and starts at its start value
    p = int(i[0])
    tx, ty = rep.trajectory(p)
    assert tx[0] == 0 and ty[0] == a0[p] and ty[-1] == a[p]


def test_replay_rejects_indices_outside_the_problem() -> None:
    with pytest.raises(ValueError, match="outside"):
        replay_pairs(np.array([1]), np.array([0]), np.array([5]), np.array([1.0]),
                     np.array([1.0]), np.zeros(3), np.zeros(3), np.ones(3))
