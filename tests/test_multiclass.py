"""One-vs-one multi-class: the vote and tie rule, and pair runs equal to binary runs."""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import solver
from solver.data import from_arrays
from solver.store import RunStore
from solver.tasks.multiclass import vote

SETTINGS = settings(derandomize=True, max_examples=4, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])


def test_vote_counts_and_first_class_wins_a_tie() -> None:
    pairs = [(0, 1), (0, 2), (1, 2)]
    values = np.array([
        [-1.0, -1.0, -1.0],   # a, a, b → a (2 votes)
        [+1.0, +1.0, +1.0],   # b, c, c → c
        [-1.0, +1.0, -1.0],   # a, c, b → one vote each: the tie goes to a (first class)
        [+1.0, -1.0, +1.0],   # b, a, c → one each again: a
        [0.0, 0.0, 0.0],      # f = 0 votes for the first class of the pair: a, a, b → a
    ])
    win, votes, tie = vote(values, pairs, 3)
    assert win.tolist() == [0, 2, 0, 0, 0]
    assert votes.tolist() == [[2, 1, 0], [0, 1, 2], [1, 1, 1], [1, 1, 1], [2, 1, 0]]
    assert tie.tolist() == [False, False, True, True, False]
    # four classes, a tie between classes 1 and 3 only (class 0 has fewer votes)
    p4 = [(i, j) for i in range(4) for j in range(i + 1, 4)]
    v4 = np.array([[+1, -1, +1, +1, -1, +1]], dtype=float)  # winners 1, 0, 3, 2, 1, 3
    w4, c4, t4 = vote(v4, p4, 4)
    assert c4.tolist() == [[1, 2, 1, 2]] and w4.tolist() == [1] and t4.tolist() == [True]


def _fit_fields(rec):
    r = rec.result
    out = {"alpha": r.alpha.tobytes(), "bias": r.bias, "iterations": r.iterations,
           "X": rec.problem.X.tobytes(), "upper": rec.problem.upper.tobytes(),
           "y": rec.problem.y.tobytes(), "kernel": rec.problem.kernel.describe(),
           "labels": rec.problem.info.get("labels"),
           "standardiser": (rec.standardiser.centre.tobytes(), rec.standardiser.scale.tobytes())}
    if r.trace is not None:
        out["trace"] = {c: np.asarray(v).tobytes() for c, v in r.trace.columns.items()}
    return out


@SETTINGS
@given(seed=st.integers(0, 2**16), far=st.floats(20.0, 200.0))
def test_near_pair_of_a_three_class_fit_is_the_binary_fit_bitwise(tmp_path_factory, seed,
                                                                  far) -> None:
    # A third class far away from the other two must not change the pair run of the two
    # near classes: the pair trains on its two classes' rows only, with its own
    # standardiser and its own median-heuristic gamma, exactly like a binary fit.
    rng = np.random.default_rng(seed)
    n = 12
    Xa = rng.normal(size=(n, 2))
    Xb = rng.normal(size=(n, 2)) + [1.5, 0.5]
    Xc = rng.normal(size=(n, 2)) + [far, -far]
    X = np.vstack([Xa, Xb, Xc])
    lab = np.repeat(np.array(["near_a", "near_b", "far_c"]), n)
    order = rng.permutation(3 * n)  # interleave the classes' rows
    X, lab = X[order], lab[order]
    root = tmp_path_factory.mktemp("prop")
    three = solver.train(from_arrays(X, lab, feature_names=["u", "v"], label_name="k"),
                         kernel="rbf", C=3.0, kkt_tol=1e-6, store=RunStore(root / "three"),
                         parallel="sequential")
    keep = lab != "far_c"
    two = solver.train(from_arrays(X[keep], lab[keep], feature_names=["u", "v"],
                                   label_name="k"),
                       kernel="rbf", C=3.0, kkt_tol=1e-6, store=RunStore(root / "two"))
    # class order: far_c < near_a < near_b; the near pair is the last one
    pairs = [m for m in three.parent.members if m.role == "pair"]
    assert [m.key for m in pairs] == [("far_c", "near_a"), ("far_c", "near_b"),
                                      ("near_a", "near_b")]
    idx = [k for k, m in enumerate(three.parent.members) if m.key == ("near_a", "near_b")][0]
    assert _fit_fields(three.records[idx]) == _fit_fields(two.records[0])
