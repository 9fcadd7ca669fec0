"""Studies of every task (issue 20 item 1): regression and one-class studies through the
task objects, multi-class warm starts and stability, stability refits on Dask workers, and
the new bad inputs.  The regression reference: each cell's cross-validated RMSE equals that
of scikit-learn's ``SVR`` (reference library) fitted on the same stored folds with the same
settings, on scikit-learn's bundled diabetes data (Efron, Hastie, Johnstone & Tibshirani
2004, from memory)."""

from __future__ import annotations

import numpy as np
import pytest

import solver
from solver.errors import InvalidInputError
from solver.studies import study

pytestmark = pytest.mark.filterwarnings("ignore::solver.DataWarning")


def _diabetes(n: int = 300) -> solver.Dataset:
    from sklearn.datasets import load_diabetes

    d = load_diabetes()
    t = (d.target - d.target.mean()) / d.target.std()
    return solver.from_arrays(d.data[:n], t[:n], feature_names=list(d.feature_names),
                              label_name="progression", source="diabetes", min_classes=0)


def test_regression_study_rmse_equals_svr_on_the_same_folds(tmp_path):
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVR

    ds = _diabetes()
    out = study(ds, task="regression", C=[1.0, 10.0], gamma=[0.05], epsilon=[0.1, 0.3],
                folds=3, seed=5, kkt_tol=1e-6, scheduler="sequential", store=tmp_path)
    assert out.choice["score"] == "rmse" and out.choice["higher_is_better"] is False
    parent = solver.RunStore(tmp_path).load_parent(out.study_id)  # verifies every member
    folds = np.array(parent.attachments["folds"]["fold"])
    assert sorted(np.bincount(folds).tolist()) == [100, 100, 100]  # plain k-fold, all rows
    X, t = ds.X, np.asarray(ds.labels, dtype=np.float64)
    worst = 0.0
    for r in out.rows:
        tr, va = folds != r["fold"], folds == r["fold"]
        sc = StandardScaler().fit(X[tr])
        ref = SVR(kernel="rbf", C=r["C"], gamma=r["gamma"], epsilon=r["epsilon"], tol=1e-8,
                  shrinking=True).fit(sc.transform(X[tr]), t[tr])
        pred = ref.predict(sc.transform(X[va]))
        rmse = float(np.sqrt(np.mean((pred - t[va]) ** 2)))
        worst = max(worst, abs(rmse - r["rmse"]) / rmse)
        assert r["rmse"] == pytest.approx(rmse, rel=1e-4), (r["cell"], r["fold"])
    print(f"regression study: {len(out.rows)} fits, worst relative RMSE difference to SVR "
          f"{worst:.2e}")
    # the chosen cell is within one standard error of the best (lower is better)
    cells = {c["cell"]: c for c in out.cells}
    best = min(out.cells, key=lambda c: c["mean_score"])
    assert out.choice["best"] == best["cell"]
    assert cells[out.choice["one_se"]]["mean_score"] <= best["mean_score"] + best["se_score"]


def test_one_class_study_walks_nu_and_gamma_and_verifies(tmp_path):
    rng = np.random.default_rng(7)
    ds = solver.from_arrays(rng.normal(size=(150, 2)), feature_names=["speed", "temp"],
                            source="invented", min_classes=0)
    out = study(ds, task="one-class", nu=[0.1, 0.3], gamma=[0.5], folds=3,
                scheduler="sequential", store=tmp_path)
    assert len(out.rows) == 2 * 3
    assert out.choice["score"] == "nu_gap" and out.choice["higher_is_better"] is False
    for r in out.rows:
        assert r["C"] is None and r["nu"] in (0.1, 0.3)
        assert 0.0 <= r["score"] <= 1.0 and r["status"] == "converged"
    solver.RunStore(tmp_path).load_parent(out.study_id)
    with pytest.raises(InvalidInputError, match="(?i)warm"):
        study(ds, task="one-class", nu=[0.1, 0.3], gamma=[0.5], folds=3, warm_start=True,
              scheduler="sequential", store=tmp_path / "w")
    with pytest.raises(InvalidInputError, match="ν|nu"):
        study(ds, task="one-class", nu=[0.1, 1.5], gamma=[0.5], folds=3,
              scheduler="sequential", store=tmp_path / "n")


def test_multiclass_study_warm_starts_and_stability_per_pair(tmp_path):
    rng = np.random.default_rng(2)
    X = rng.normal(size=(150, 2))
    y = np.array(["low", "mid", "high"])[np.digitize(X[:, 0] + 0.3 * X[:, 1], [-0.5, 0.5])]
    ds = solver.from_arrays(X, y, feature_names=["a", "b"], label_name="grade",
                            source="invented")
    out = study(ds, C=[1.0, 1.5, 2.25], gamma=[0.5], folds=3, warm_start=True, stability=True,
                scheduler="sequential", store=tmp_path)
    wc = out.warm_check
    # every pair of every warm one-vs-one fit is compared with its cold twin
    assert wc["all_same_certificate"] and all(c["members"] == 3 for c in wc["cells"])
    assert wc["warm_iterations"] < wc["cold_iterations"]
    s = out.stability
    assert s["members"] == 3 and s["permutations_same_optimum"]
    assert [len(v["biases"]) for v in s["variants"]] == [3] * len(s["variants"])
    assert s["by_kind"]["bootstrap"]["lowest_sv_jaccard"] < 1.0
    solver.RunStore(tmp_path).load_parent(out.study_id)


@pytest.mark.skipif(not __import__("os").environ.get("KKTRACE_TEST_SCHEDULER"),
                    reason="needs the Dask scheduler .ci/run starts (KKTRACE_TEST_SCHEDULER)")
def test_stability_refits_run_on_the_cluster_with_the_data_scattered_once(tmp_path):
    import os

    rng = np.random.default_rng(4)
    X = rng.normal(size=(120, 2))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 > 0.3, "pass", "fail")
    ds = solver.from_arrays(X, y, feature_names=["a", "b"], label_name="qc",
                            source="invented")
    out = study(ds, C=[1.0], gamma=[0.5], folds=3, stability=True,
                scheduler=os.environ["KKTRACE_TEST_SCHEDULER"], store=tmp_path)
    ex = out.stability["execution"]
    assert ex["mode"] != "sequential" and ex["data_scattered"] == 1, ex
    assert out.stability["permutations_same_optimum"]
