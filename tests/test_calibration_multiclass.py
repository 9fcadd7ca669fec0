"""Multi-class probabilities: every pair's sigmoid, combined by pairwise coupling (Wu, Lin &
Weng 2004, method 2), and the multi-class calibration evidence."""

from __future__ import annotations

import os

import numpy as np
import pytest

import solver
from solver.calibration import (
    Calibration,
    couple_pairwise,
    multiclass_evidence,
    pair_calibration,
    parent_calibration,
)
from solver.data import from_arrays
from solver.errors import InvalidInputError
from solver.model import model_from_solution
from solver.tasks import get_task


def _iris_split():
    # Fisher's iris (scikit-learn's bundled copy; citation from memory), 3 classes
    from sklearn.datasets import load_iris

    X, y = load_iris(return_X_y=True)
    names = np.array(["setosa", "versicolor", "virginica"])[y]
    order = np.random.default_rng(0).permutation(len(y))
    tr, te = order[:110], order[110:]
    ds = from_arrays(X[tr], names[tr], feature_names=["sl", "sw", "pl", "pw"],
                     label_name="species")
    return ds, X, names, te


@pytest.fixture(scope="module")
def iris_fit(tmp_path_factory):
    ds, X, names, te = _iris_split()
    hold = from_arrays(X[te], names[te], feature_names=["sl", "sw", "pl", "pw"],
                       label_name="species")
    out = solver.train(ds, probabilities=True, calibration_seed=2, kkt_tol=1e-4, holdout=hold,
                       store=tmp_path_factory.mktemp("store"), trace="off", explain=False,
                       parallel="sequential")
    return out, X[te], names[te]


def _predict(out, X):
    models = [model_from_solution(r.problem, r.result, r.standardiser) for r in out.records]
    return get_task(out.parent.task).predict(models, X, out.parent.info)


def test_pair_sigmoids_are_coupled_with_the_right_orientation(iris_fit):
    out, X, truth = iris_fit
    pc = parent_calibration(out.parent, out.records)
    assert [str(c) for c in pc.classes] == ["setosa", "versicolor", "virginica"]
    assert pc.pairs == ((0, 1), (0, 2), (1, 2))
    pred = _predict(out, X)
    R = pc.pairwise(pred.values)
    for p, rec in enumerate(out.records):
        # each pair's positive label is the later class: r_ij = P(earlier class) = column 0
        cal = Calibration.from_attachment(rec.attachments["calibration"])
        assert cal.labels["positive"] == pc.classes[pc.pairs[p][1]]
        assert np.allclose(R[:, p], np.clip(cal.probabilities(pred.values[:, p])[:, 0],
                                            1e-7, 1 - 1e-7), rtol=0, atol=1e-15)
    P = pc.probabilities(pred.values)
    for r in range(P.shape[0]):  # row by row the same as the coupling of its own matrix
        M = np.zeros((3, 3))
        iu = np.triu_indices(3, 1)
        M[iu] = R[r]
        M[iu[1], iu[0]] = 1 - R[r]
        assert np.allclose(P[r], couple_pairwise(M), atol=1e-15)
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-12
    assert np.all((P > 0) & (P < 1))
    # iris is nearly separable: the most probable class is right on almost every row
    top = np.array(pc.classes)[np.argmax(P, axis=1)]
    assert np.mean(top == truth) >= 0.9
    table = pc.pair_table()
    assert [t["pair"] for t in table] == [["setosa", "versicolor"], ["setosa", "virginica"],
                                         ["versicolor", "virginica"]]
    assert all(t["A"] < 0 and t["seed"] == 2 and t["n_folds"] == 5 for t in table)


def test_pairs_without_a_sigmoid_are_named(iris_fit):
    out, _, _ = iris_fit
    atts = [r.attachments["calibration"] for r in out.records]
    keys = [m.key for m in out.parent.members]
    classes = out.parent.info["class_values"]
    with pytest.raises(InvalidInputError, match="pair 'setosa' vs 'virginica' has no fitted"):
        pair_calibration(classes, keys, [atts[0], None, atts[2]])
    failed = {**atts[2], "status": "degenerate_values", "message": "fit failed: test"}
    with pytest.raises(InvalidInputError,
                       match="pair 'versicolor' vs 'virginica' gives no probabilities"):
        pair_calibration(classes, keys, [atts[0], atts[1], failed])
    with pytest.raises(InvalidInputError, match="need the pairs"):
        pair_calibration(classes, keys[::-1], atts[::-1])


def test_multiclass_evidence_against_reference_metrics():
    from sklearn.metrics import brier_score_loss, log_loss  # reference library

    rng = np.random.default_rng(4)
    P = rng.dirichlet(np.ones(4), 300)
    truth = rng.integers(0, 4, 300)
    voted = np.argmax(P + rng.normal(0, 0.05, P.shape), axis=1)
    ev = multiclass_evidence(P, truth, voted)
    # scikit-learn's multi-class Brier score is the sum-over-classes form (Brier 1950)
    assert ev["brier_score"] == pytest.approx(brier_score_loss(truth, P, labels=range(4)))
    assert ev["log_loss"] == pytest.approx(log_loss(truth, P, labels=range(4)))
    assert sum(b["rows"] for b in ev["bins"]) == 300
    assert ev["disagreements"] == int(np.sum(np.argmax(P, axis=1) != voted)) > 0
    top = P.max(axis=1)
    hit = np.argmax(P, axis=1) == truth
    ece = sum(np.sum(s) / 300 * abs(hit[s].mean() - top[s].mean())
              for s in (np.minimum((top * 10).astype(int), 9) == b for b in range(10)) if s.any())
    assert ev["expected_calibration_error"] == pytest.approx(ece)
    with pytest.raises(InvalidInputError):
        multiclass_evidence(P, truth + 4, voted)


def test_parent_record_stores_every_pair_sigmoid_and_held_out_evidence(iris_fit):
    out, X, truth = iris_fit
    att = out.parent.attachments["calibration"]
    assert att["status"] == "fitted" and "method 2 of Wu, Lin & Weng" in att["coupling"]
    for row, rec in zip(att["pairs"], out.records, strict=True):
        own = rec.attachments["calibration"]
        assert (row["A"], row["B"], row["seed"]) == (own["A"], own["B"], 2)
        assert row["pair"] == [str(v) for v in rec.problem.info["labels"].values()]
    pc = parent_calibration(out.parent, out.records)
    pred = _predict(out, X)
    classes = [str(c) for c in pc.classes]
    ev = multiclass_evidence(pc.probabilities(pred.values),
                             np.array([classes.index(v) for v in truth]),
                             np.array([classes.index(str(v)) for v in pred.labels]))
    held = att["holdout"]
    assert held["rows"] == len(truth) == 40
    assert held["brier_score"] == pytest.approx(ev["brier_score"], rel=1e-12)
    assert held["log_loss"] == pytest.approx(ev["log_loss"], rel=1e-12)
    assert held["disagreements"] == ev["disagreements"]


def test_apply_on_the_parent_gives_the_coupled_probabilities(iris_fit):
    out, X, _ = iris_fit
    hold = from_arrays(X, None, feature_names=["sl", "sw", "pl", "pw"])
    res = solver.apply(out.parent.run_id, hold, store=out.store, probabilities=True)
    pc = parent_calibration(out.parent, out.records)
    assert np.array_equal(res.probabilities, pc.probabilities(_predict(out, X).values))
    assert [str(v) for v in res.probability_labels] == [str(c) for c in pc.classes]


def test_saturated_pair_values_still_give_probabilities(iris_fit):
    # far from a pair's boundary the sigmoid rounds to exactly 0 or 1 (|A f + B| > 37);
    # clipped at 1e-7 the coupling system keeps full rank (a linear kernel reaches such
    # values on out-of-range rows; found with kktrace apply on iris)
    out, _, _ = iris_fit
    pc = parent_calibration(out.parent, out.records)
    V = np.array([[95.0, 46.0, 193.0], [-300.0, -300.0, 0.0], [1e4, -1e4, 1e4]])
    assert np.all(np.isin(pc.pairwise(V), [1e-7, 1 - 1e-7]) | (np.abs(V) < 1))
    P = pc.probabilities(V)
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-12 and np.all((P > 0) & (P < 1))
    assert np.argmax(P[0]) == 2 and np.argmax(P[1]) == 0


def test_verify_rerun_reproduces_every_pair_calibration_bitwise(iris_fit):
    out, _, _ = iris_fit
    res = solver.verify(out.parent.run_id, store=out.store, rerun=_iris_split()[0])
    cal = res.calibration
    assert cal["agreement"] == "bitwise" and res.ok
    assert [r["pair"] for r in cal["pairs"]] == [list(m.key) for m in out.parent.members]
    assert all(r["identical"]["cv_values"] and r["identical"]["A"] for r in cal["pairs"])
    assert cal["seed"] == 2 and cal["max_cv_value_difference"] == 0.0


def test_parent_report_shows_the_multiclass_probability_evidence(iris_fit, tmp_path):
    import json

    out, _, _ = iris_fit
    paths = solver.report(out.parent.run_id, store=out.store, out_dir=tmp_path / "r",
                          formats=("json", "html", "pdf"))
    d = json.loads(paths["json"].read_text())
    (sec,) = [r["task_section"] for r in d["runs"] if r.get("task_section")]
    held = out.parent.attachments["calibration"]["holdout"]
    facts = sec["facts"]
    assert facts["Brier score (multi-class)"] == held["brier_score"]
    assert facts["log-loss"] == held["log_loss"]
    assert facts["rows where the most probable class differs from the voted class"] == \
        held["disagreements"]
    assert "method 2 of Wu, Lin & Weng" in facts["probability method"]
    pair_table = next(t for t in sec["tables"] if t["columns"][:2] == ["pair", "positive"])
    assert [r[3] for r in pair_table["rows"]] == [p["A"] for p in
                                                  out.parent.attachments["calibration"]["pairs"]]
    bins = next(t for t in sec["tables"] if t["columns"][0] == "top-probability bin")
    assert sum(r[1] for r in bins["rows"]) == 40
    assert any("Reliability of the top class probability" in f["title"]
               for f in d["runs"][0]["figures"])
    # the pair shown in full keeps its own binary calibration section
    assert d["runs"][0]["calibration"]["facts"]["fold seed"] == 2
    assert "Reliability of the top class probability" in paths["html"].read_text()


def test_cli_multiclass_probabilities_end_to_end(tmp_path):
    import csv
    import json
    import subprocess
    import sys

    ds, X, names, te = _iris_split()
    train, hold = tmp_path / "train.csv", tmp_path / "hold.csv"
    for path, rows in ((train, np.setdiff1d(np.arange(150), te)), (hold, te)):
        with path.open("w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(["sl", "sw", "pl", "pw", "species"])
            w.writerows([*map(repr, X[i].tolist()), names[i]] for i in rows)
    env = {**os.environ, "PYTHONPATH": os.getcwd(), "KKTRACE_THREADS": "1"}

    def cli(*args):
        return subprocess.run([sys.executable, "-m", "solver.cli", *args, "--store",
                               str(tmp_path / "st")], capture_output=True, text=True, env=env,
                              timeout=600)

    r = cli("train", str(train), "--label", "species", "--probabilities", "--holdout",
            str(hold), "--calibration-seed", "7", "--parallel", "sequential", "--json")
    assert r.returncode == 0, r.stderr
    rid = json.loads(r.stdout)["run_id"]
    out = tmp_path / "out.csv"
    r = cli("apply", rid, str(hold), "--probabilities", "--out", str(out))
    assert r.returncode == 0, r.stderr
    rows = list(csv.DictReader(out.open()))
    cols = ["probability_setosa", "probability_versicolor", "probability_virginica"]
    assert set(cols) <= set(rows[0]) and len(rows) == 40
    P = np.array([[float(row[c]) for c in cols] for row in rows])
    assert np.max(np.abs(P.sum(axis=1) - 1)) <= 1e-12 and np.all((P > 0) & (P < 1))
    r = cli("verify", rid, "--rerun", str(train))
    assert r.returncode == 0, r.stdout + r.stderr
    assert "probability calibration of every pair bitwise (5 folds, seed 7)" in r.stdout
    r = cli("train", str(train), "--label", "species", "--parallel", "sequential", "--json")
    plain = json.loads(r.stdout)["run_id"]
    r = cli("apply", plain, str(hold), "--probabilities")
    assert r.returncode == 1 and "Traceback" not in r.stderr
    assert "pair 'setosa' vs 'versicolor' has no fitted sigmoid" in r.stderr
    r = cli("train", str(train), "--label", "species", "--probabilities",
            "--calibration-folds", "40")
    assert r.returncode == 1 and "calibration folds" in r.stderr and "class '" in r.stderr
