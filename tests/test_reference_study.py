"""Reference check of a study (issue 20): on scikit-learn's bundled breast-cancer data
(Wisconsin diagnostic breast cancer, Street, Wolberg & Mangasarian 1993, from memory) with
the folds the study stored, each cell's cross-validated accuracy equals scikit-learn's
``cross_val_score`` of ``SVC`` over the same folds (``PredefinedSplit``) and the same
settings — standardised on each training fold (``StandardScaler``, population standard
deviation like ours), RBF kernel, the same C and gamma — to within the validation rows
whose decision value is below 1e-3 in magnitude (their class may flip between two solvers
that both meet the tolerance); the count of those rows is checked and printed."""

from __future__ import annotations

import numpy as np
import pytest

import solver
from solver.studies import study

sklearn = pytest.importorskip("sklearn")


@pytest.mark.filterwarnings("ignore::solver.DataWarning")
def test_study_accuracy_equals_cross_val_score_with_the_same_folds(tmp_path, capsys):
    from sklearn.datasets import load_breast_cancer
    from sklearn.model_selection import PredefinedSplit, cross_val_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    d = load_breast_cancer()
    labels = np.where(d.target == 1, "benign", "malignant")
    ds = solver.from_arrays(d.data, labels, feature_names=[f"f{i}" for i in range(30)],
                            label_name="diagnosis", source="breast cancer")
    C_grid, g_grid = [0.3, 3.0, 30.0], [0.005, 0.05]
    out = study(ds, C=C_grid, gamma=g_grid, folds=5, seed=4, kkt_tol=1e-4,
                scheduler="sequential", store=tmp_path)
    parent = solver.RunStore(tmp_path).load_parent(out.study_id)
    folds = np.array(parent.attachments["folds"]["fold"])
    split = PredefinedSplit(folds)
    total_small = 0
    exact_cells = 0
    for c in out.cells:
        rows = [r for r in out.rows if r["cell"] == c["cell"]]
        ref = cross_val_score(
            make_pipeline(StandardScaler(), SVC(C=c["C"], kernel="rbf", gamma=c["gamma"],
                                                tol=1e-4)),
            d.data, labels, cv=split, scoring="accuracy")
        for r in sorted(rows, key=lambda r: r["fold"]):
            n_val = r["validation_rows"]
            assert n_val == int(np.sum(folds == r["fold"]))
            # difference in correctly classified rows ≤ rows with |f| < 1e-3
            diff = abs(round(r["accuracy"] * n_val) - round(ref[r["fold"]] * n_val))
            assert diff <= r["n_small_values"], (c["cell"], r["fold"], diff)
            total_small += r["n_small_values"]
        mine = np.array([r["accuracy"] for r in sorted(rows, key=lambda r: r["fold"])])
        exact_cells += int(np.array_equal(mine, ref))
        tolerance = sum(r["n_small_values"] / r["validation_rows"] for r in rows) / len(rows)
        assert abs(c["mean_score"] - ref.mean()) <= tolerance + 1e-12
    with capsys.disabled():
        print(f"\nstudy vs cross_val_score: {exact_cells}/{len(out.cells)} cells identical "
              f"fold by fold; validation rows with |f| < 1e-3 over all fits: {total_small}")
    assert exact_cells >= len(out.cells) - 1
