"""Warm starts along C in a study (issue 20): each C of a fold and γ starts from the
previous C's α scaled by C_new / C_old into the new box (then made feasible); the same
cells started cold on fold 0 give the iteration ratio and must reach the same certificate."""

from __future__ import annotations

import numpy as np

import solver
from solver.studies import study

C_PATH = [1.0, 1.5, 2.2, 3.3, 5.0, 7.5]  # six values, about 1.5x apart


def _overlapping(n: int, seed: int = 0):
    """Two overlapping invented classes (a curved boundary plus label noise): many bounded
    support vectors, the regime where warm starts along C save the most."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 + rng.normal(scale=0.8, size=n) > 0.5,
                 "pass", "fail")
    return solver.from_arrays(X, y, label_name="qc", source="invented overlap")


def test_warm_starts_along_c_save_iterations_and_reach_the_same_certificates(tmp_path):
    ds = _overlapping(600)
    out = study(ds, C=C_PATH, gamma=[0.1], folds=3, seed=0, warm_start=True,
                scheduler="sequential", store=tmp_path)
    w = out.warm_check
    assert w is not None and len(w["cells"]) == 5  # fold 0, every C after the first
    assert [r["start"] for r in out.rows if r["fold"] == 0] == ["cold"] + ["warm"] * 5
    # same certificates within tolerance: both converged, dual objectives within 1e-3 rel.
    assert w["all_same_certificate"], w["cells"]
    for c in w["cells"]:
        assert c["both_converged"] and c["dual_objective_relative_difference"] <= 1e-3
    # the Must-show figure: total iterations along the path at least 1.5x lower warm
    assert w["path_ratio_cold_to_warm"] >= 1.5, w
    st = solver.RunStore(tmp_path)
    parent = st.load_parent(out.study_id)
    roles = [m.role for m in parent.members]
    assert roles.count("fit") == 18 and roles.count("cold_check") == 5
    assert parent.attachments["results"]["warm_start_check"]["cold_iterations"] == \
        w["cold_iterations"]
    # a warm-started member run records its start
    warm_rid = w["cells"][0]["warm_run_id"]
    assert st.load(warm_rid).result.options.get("warm_start") is True


def test_warm_and_cold_studies_choose_from_the_same_scores(tmp_path):
    ds = _overlapping(200, seed=3)
    a = study(ds, C=[0.5, 2.0, 8.0], gamma=[0.2], folds=3, scheduler="sequential",
              store=tmp_path / "a")
    b = study(ds, C=[0.5, 2.0, 8.0], gamma=[0.2], folds=3, scheduler="sequential",
              store=tmp_path / "b", warm_start=True)
    for ra, rb in zip(a.rows, b.rows, strict=True):
        small = max(ra["n_small_values"], rb["n_small_values"])
        assert abs(ra["accuracy"] - rb["accuracy"]) * ra["validation_rows"] <= small + 1e-9
