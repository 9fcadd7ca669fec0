"""End-to-end: a three-class model (a parent over one-vs-one pair runs) through every
command, weights on the command line, and one-line errors for bad multi-class input.

The data are invented here (three grades of a coating line: pass / rework / scrap)."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from tests.test_cli import kk, ok_json

FEATURES = ("thickness", "gloss")


def _write(path: Path, X: np.ndarray, lab: np.ndarray, weights: np.ndarray | None = None
           ) -> Path:
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([*FEATURES, "grade", *(["w"] if weights is not None else [])])
        for k, (row, g) in enumerate(zip(X.tolist(), lab.tolist(), strict=True)):
            w.writerow([f"{v:.4f}" for v in row] + [g]
                       + ([f"{weights[k]:.3f}"] if weights is not None else []))
    return path


def _grades(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    centres = np.array([[0.0, 0.0], [2.5, 0.5], [0.5, 2.5]])
    X = np.vstack([c + rng.normal(scale=0.9, size=(n, 2)) for c in centres])
    return X, np.repeat(np.array(["pass", "rework", "scrap"]), n)


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    work = tmp_path_factory.mktemp("mc")
    rng = np.random.default_rng(5)
    X, lab = _grades(rng, 20)
    order = rng.permutation(lab.shape[0])
    train = _write(work / "grades.csv", X[order], lab[order],
                   weights=rng.uniform(0.5, 2.0, size=lab.shape[0]))
    Xh, labh = _grades(rng, 8)
    hold = _write(work / "grades_holdout.csv", Xh, labh)
    store = work / "store"
    summary = ok_json(kk("train", train, "--label", "grade", "--weight-column", "w",
                         "--class-weight", "pass=1,rework=2,scrap=1.5", "--C", 2,
                         "--kkt-tol", "1e-5", "--solver", "both", "--holdout", hold,
                         "--store", store, "--json"))
    return {"work": work, "store": store, "train": train, "hold": hold, "summary": summary,
            "pid": summary["run_id"]}


def test_train_makes_a_parent_over_three_pairs_with_weights(model) -> None:
    s = model["summary"]
    assert s["record"] == "parent" and s["pairs"] == 3 and s["converged"]
    members = s["member_runs"]
    assert [m["role"] for m in members] == ["pair", "pair_challenger"] * 3
    assert s["verdict"] in ("agree", "agree_within_tolerances")
    m = json.loads((Path(model["store"]) / model["pid"] / "manifest.json").read_text())
    assert m["info"]["class_weight"] == {"pass": 1.0, "rework": 2.0, "scrap": 1.5}
    assert m["info"]["options"]["weight_column"] == "w"
    assert "first in the class order" in m["info"]["tie_rule"]


def test_runs_folds_the_pairs_under_their_parent(model) -> None:
    proc = kk("runs", "--store", model["store"])
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    top = [ln for ln in lines[1:] if not ln.startswith("  ")]
    assert len(top) == 1 and top[0].startswith(model["pid"]) and "3 pairs below" in top[0]
    assert sum("  pair " in ln for ln in lines) == 3
    assert sum("  challenger " in ln for ln in lines) == 3
    assert any("pair pass vs rework:" in ln for ln in lines)
    assert "incomplete" not in proc.stdout
    rows = ok_json(kk("runs", "--store", model["store"], "--json"))
    parent = [r for r in rows if r.get("record") == "parent"]
    assert len(parent) == 1 and len(parent[0]["members"]) == 6


def test_apply_gives_class_votes_ties_and_every_pair_value(model, tmp_path) -> None:
    d = ok_json(kk("apply", model["pid"], model["hold"], "--store", model["store"], "--json"))
    assert d["kind"] == "multiclass_one_vs_one"
    assert d["pairs"] == [["pass", "rework"], ["pass", "scrap"], ["rework", "scrap"]]
    votes, values = np.array(d["votes"]), np.array(d["values"])
    assert votes.shape == (24, 3) and values.shape == (24, 3)
    assert np.all(votes.sum(axis=1) == 3)
    # the class has the most votes; pair (i, j) votes j where its value is > 0
    classes = d["vote_classes"]
    for q in range(24):
        want = np.zeros(3, int)
        for p, (i, j) in enumerate([(0, 1), (0, 2), (1, 2)]):
            want[j if values[q, p] > 0 else i] += 1
        assert votes[q].tolist() == want.tolist()
        assert d["labels"][q] == classes[int(np.argmax(want))]
    c = d["confusion"]
    assert np.array(c["matrix"]).shape == (3, 3) and np.sum(c["matrix"]) == 24
    assert set(c["recall"]) == {"pass", "rework", "scrap"} and "balanced_accuracy" in c
    out = tmp_path / "applied.csv"
    proc = kk("apply", model["pid"], model["hold"], "--store", model["store"], "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert "ties:" in proc.stdout and "first in the class order" in proc.stdout
    head = out.read_text().splitlines()[0].split(",")
    assert head == ["row", "label", "votes_pass", "votes_rework", "votes_scrap", "tie",
                    "value_pass_vs_rework", "value_pass_vs_scrap", "value_rework_vs_scrap"]


def test_explain_gives_one_row_per_point_over_its_pairs(model) -> None:
    d = ok_json(kk("explain", model["pid"], "--store", model["store"], "--json"))
    n = len(d["row_id"])
    assert n == 60
    for k in range(n):
        cats = [d[f"category {a} vs {b}"][k] for a, b in
                [("pass", "rework"), ("pass", "scrap"), ("rework", "scrap")]]
        assert sum(c == "not_in_pair" for c in cats) == 1  # each point is in 2 of 3 pairs
        assert d["pairs_taken_part"][k] == 2
        sv = sum(c not in ("not_in_pair", "non_support") for c in cats)
        assert d["support_pairs"][k] == sv
        assert d["summary"][k] == f"support vector in {sv} of its 2 pairs"
    q = ok_json(kk("explain", model["pid"], "--store", model["store"], "--point",
                   "thickness=1.2,gloss=1.0", "--top", "2", "--json"))
    assert q["record"] == "parent" and len(q["pairs"]) == 3
    for p in q["pairs"]:
        v = p["values"][0]
        assert p["votes_for"][0] == (p["pair"][1] if v > 0 else p["pair"][0])
        # the breakdown adds up to the pair's decision value
        assert sum(p["top_contributions"][0]) + p["remainder"][0] + p["bias"] == \
            pytest.approx(v, abs=1e-9)
    text = kk("explain", model["pid"], "--store", model["store"], "--point",
              "thickness=1.2,gloss=1.0")
    assert "votes" in text.stdout and "pair pass vs scrap" in text.stdout


def test_compare_parents_pair_by_pair_and_the_mismatch_names_the_pair(model) -> None:
    d = ok_json(kk("compare", model["pid"], model["pid"], "--store", model["store"], "--json"))
    assert d["verdict"] == "agree" and len(d["pairs"]) == 3
    other = ok_json(kk("train", model["train"], "--label", "grade", "--weight-column", "w",
                       "--C", 2, "--kkt-tol", "1e-5", "--store", model["store"], "--json"))
    proc = kk("compare", model["pid"], other["run_id"], "--store", model["store"])
    assert proc.returncode == 1 and "Traceback" not in proc.stderr
    assert "pair 'pass' vs 'rework'" in proc.stderr  # class weights differ
    d2 = ok_json(kk("compare", model["pid"], other["run_id"], "--store", model["store"],
                    "--allow-mismatch", "--json"))
    assert d2["verdict"] != "agree" and d2["worst_pair"] is not None


def test_replay_names_the_pair_and_verify_reruns_every_pair(model) -> None:
    proc = kk("replay", model["pid"], "--iteration", 2, "--store", model["store"])
    assert proc.returncode == 1 and "--pair" in proc.stderr
    proc = kk("replay", model["pid"], "--iteration", 2, "--pair", "rework,scrap",
              "--store", model["store"])
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith("pair rework vs scrap (run ")
    proc = kk("explain", model["pid"], "--leave-one-out", "--no-keep", "--store",
              model["store"])
    assert proc.returncode == 1 and "--pair" in proc.stderr
    loo = ok_json(kk("explain", model["pid"], "--leave-one-out", "--no-keep", "--pair",
                     "pass,scrap", "--store", model["store"], "--json"))
    assert loo["n"] == 40  # the rows of pass and scrap
    d = ok_json(kk("verify", model["pid"], "--store", model["store"], "--rerun",
                   model["train"], "--json"))
    assert d["ok"] and d["reproduction"]["agreement"] == "bitwise"
    assert [p["pair"] for p in d["reproduction"]["pairs"]] == [
        ["pass", "rework"], ["pass", "scrap"], ["rework", "scrap"]]


@pytest.mark.parametrize("rows, extra, message", [
    # a class with one row
    ([("a", 1.0), ("a", 2.0), ("b", 3.0), ("b", 4.0), ("c", 5.0)], [],
     "class 'c' of label column 'grade' has 1 row; every class needs at least 2"),
    # more classes than the limit (a continuous column as the label)
    ([(f"{0.1 * k:.1f}", float(k)) for k in range(8)] * 2, ["--max-classes", "5"],
     "has 8 distinct values, more than the limit of 5 classes"),
    # an unknown label in --class-weight
    ([("a", 1.0), ("a", 2.0), ("b", 3.0), ("b", 4.0), ("c", 5.0), ("c", 6.0)],
     ["--class-weight", "a=1,zz=2"], "class weight given for unknown label 'zz'"),
])
def test_bad_multiclass_input_is_one_line_and_writes_nothing(tmp_path, rows, extra,
                                                             message) -> None:
    path = tmp_path / "bad.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["x", "grade"])
        for g, x in rows:
            w.writerow([x, g])
    store = tmp_path / "store"
    proc = kk("train", path, "--label", "grade", "--store", store, *extra)
    assert proc.returncode == 1, proc.stderr
    assert message in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    assert not store.exists() or not any(p.name[0].isdigit() for p in store.iterdir())


@pytest.mark.parametrize("weight, message", [
    ("0", "row 2, column 'w': weight 0.0 must be a finite number > 0"),
    ("-1", "row 2, column 'w': weight -1.0 must be a finite number > 0"),
    ("inf", "row 2 (line 3), column 'w'"),  # refused by the loader as non-finite
    ("heavy", "row 2 (line 3), column 'w'"),  # not a number
])
def test_bad_row_weight_names_the_row(tmp_path, weight, message) -> None:
    path = tmp_path / "w.csv"
    rows = [("a", 1.0, "1"), ("a", 2.0, weight), ("b", 3.0, "1"), ("b", 4.0, "1"),
            ("c", 5.0, "1"), ("c", 6.0, "1")]
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["x", "grade", "w"])
        for g, x, wt in rows:
            w.writerow([x, g, wt])
    proc = kk("train", path, "--label", "grade", "--weight-column", "w",
              "--store", tmp_path / "store")
    assert proc.returncode == 1 and message in proc.stderr, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
    store = tmp_path / "store"
    assert not store.exists() or not any(p.name[0].isdigit() for p in store.iterdir())


def test_weight_column_that_is_the_label_is_refused(tmp_path) -> None:
    path = tmp_path / "w.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["x", "grade"])
        for k in range(6):
            w.writerow([k, "abc"[k % 3]])
    proc = kk("train", path, "--label", "grade", "--weight-column", "grade",
              "--store", tmp_path / "store")
    assert proc.returncode == 1, proc.stderr
    assert "weight column 'grade' is also the label column" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_verify_of_the_parent_names_the_damaged_or_missing_pair(model, tmp_path) -> None:
    import shutil

    store = tmp_path / "copy"
    shutil.copytree(model["store"], store)
    members = model["summary"]["member_runs"]
    ok = ok_json(kk("verify", model["pid"], "--store", store, "--json"))
    assert ok["ok"]
    target = [m for m in members if m["key"] == ["pass", "scrap"] and m["role"] == "pair"][0]
    path = store / target["run_id"] / "solution.npz"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    gone = [m for m in members if m["key"] == ["rework", "scrap"] and m["role"] == "pair"][0]
    shutil.rmtree(store / gone["run_id"])
    proc = kk("verify", model["pid"], "--store", store)
    assert proc.returncode == 1 and "INTEGRITY CHECK FAILED" in proc.stdout
    assert f"member pair 'pass' vs 'scrap' (run {target['run_id']}): solution.npz" in proc.stdout
    assert (f"member pair 'rework' vs 'scrap' (run {gone['run_id']}): run folder is missing"
            in proc.stdout)


def test_compare_parents_reuses_each_pairs_stored_held_out_rows(model) -> None:
    """Issue 13 item 4: without --holdout every pair compares on the held-out rows stored
    with it, so compare shows the held-out measures the comparison stored at training has."""
    d = ok_json(kk("compare", model["pid"], model["pid"], "--store", model["store"], "--json"))
    for pair in d["pairs"]:
        measures = pair["comparison"]["measures"] if "comparison" in pair else pair["measures"]
        assert {"decision_max_diff_holdout", "prediction_agreement_holdout"} <= set(measures)
