"""End to end: ``train --task regression`` / ``--task one-class`` and every command after it;
bad input gives one line, exit 1 and nothing stored."""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest


def kk(*args: object) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, env=env, timeout=300)


def _table(path: Path, header: list[str], rows: np.ndarray | list) -> Path:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        for r in rows:
            w.writerow(list(r))
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("kinds")
    rng = np.random.default_rng(3)
    X = rng.normal(size=(80, 2))
    t = 1.5 * X[:, 0] - X[:, 1] ** 2 + 0.1 * rng.normal(size=80)
    Xh = rng.normal(size=(30, 2))
    th = 1.5 * Xh[:, 0] - Xh[:, 1] ** 2
    known = (np.abs(Xh).max(axis=1) > 2.0).astype(int)
    Xh[:3] += 6.0
    known[:3] = 1
    return {
        "dir": d,
        "reg": _table(d / "reg.csv", ["speed", "temp", "thickness"], np.c_[X, t]),
        "reg_hold": _table(d / "reg_hold.csv", ["speed", "temp", "thickness"], np.c_[Xh, th]),
        "oc": _table(d / "oc.csv", ["speed", "temp"], X),
        "oc_hold": _table(d / "oc_hold.csv", ["speed", "temp", "unusual"], np.c_[Xh, known]),
    }


def _train(files, store, *extra):
    r = kk("train", *extra, "--kkt-tol", "1e-5", "--solver", "both", "--store", store, "--json")
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def test_regression_workflow(files, tmp_path):
    store = tmp_path / "st"
    s = _train(files, store, files["reg"], "--task", "regression", "--target", "thickness",
               "--epsilon", "0.1", "--C", "10", "--holdout", files["reg_hold"])
    assert s["task"] == "regression" and s["verdict"] == "agree"
    h = s["holdout"]
    assert h["r2"] > 0.4 and 0 <= h["tube_coverage"] <= 1 and h["rmse"] >= h["mae"] > 0
    smo_id, qp_id = s["run_id"], s["challenger"]["run_id"]
    out = tmp_path / "pred.csv"
    r = kk("apply", smo_id, files["reg_hold"], "--store", store, "--out", out)
    assert r.returncode == 0, r.stderr and "RMSE" in r.stdout
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["row", "prediction"] and len(rows) == 30
    for cmd in (["compare", smo_id, qp_id], ["replay", smo_id, "--iteration", "5"],
                ["verify", smo_id, "--rerun", files["reg"]], ["explain", smo_id],
                ["explain", smo_id, "--leave-one-out"], ["report", smo_id, qp_id]):
        r = kk(*cmd, "--store", store)
        assert r.returncode == 0, (cmd, r.stderr)
    r = kk("explain", smo_id, "--store", store, "--json")
    cats = set(json.loads(r.stdout)["category"])
    assert cats <= {"inside_tube", "on_tube_edge", "outside_tube"} and "on_tube_edge" in cats
    r = kk("verify", smo_id, "--rerun", files["reg"], "--store", store)
    assert "bitwise" in r.stdout


def test_one_class_workflow(files, tmp_path):
    store = tmp_path / "st"
    s = _train(files, store, files["oc"], "--task", "one-class", "--nu", "0.1", "--holdout",
               files["oc_hold"], "--outlier-column", "unusual")
    assert s["verdict"] == "agree" and s["nu_property"]["holds"]
    nuc = s["nu_property"]
    assert nuc["outlier_share"] <= 0.1 <= nuc["support_share"]
    conf = s["holdout"]["confusion"]
    assert conf["flagged_known"] >= 3  # the three shifted batches are flagged
    smo_id, qp_id = s["run_id"], s["challenger"]["run_id"]
    out = tmp_path / "flags.csv"
    r = kk("apply", smo_id, files["oc_hold"], "--store", store, "--out", out)
    assert r.returncode == 0, r.stderr
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["row", "score", "inlier"]
    assert all((float(x["score"]) >= 0) == (x["inlier"] == "1") for x in rows)
    for cmd in (["compare", smo_id, qp_id], ["verify", smo_id, "--rerun", files["oc"]],
                ["explain", smo_id, "--leave-one-out"], ["report", smo_id]):
        r = kk(*cmd, "--store", store)
        assert r.returncode == 0, (cmd, r.stderr)


@pytest.mark.parametrize("case,argv,words", [
    ("epsilon < 0", ["reg", "--task", "regression", "--target", "thickness", "--epsilon",
                     "-1"], ["epsilon"]),
    ("nu > 1", ["oc", "--task", "one-class", "--nu", "1.5"], ["nu", "(0, 1]"]),
    ("nu = 0", ["oc", "--task", "one-class", "--nu", "0"], ["nu"]),
    ("label for one-class", ["reg", "--task", "one-class", "--label", "thickness"],
     ["one-class", "--outlier-column"]),
    ("no target", ["reg", "--task", "regression"], ["--target"]),
    ("target also label", ["reg", "--task", "regression", "--target", "thickness",
                           "--label", "thickness"], ["--target"]),
    ("non-numeric target", ["text", "--task", "regression", "--target", "grade"],
     ["text.csv", "row 1", "grade"]),
    ("constant target", ["const", "--task", "regression", "--target", "thickness"],
     ["const.csv", "thickness", "1 distinct value"]),  # the loader refuses it first
    ("bad known-outlier value", ["oc", "--task", "one-class", "--holdout", "badflag",
                                 "--outlier-column", "unusual"], ["badflag.csv", "unusual"]),
])
def test_bad_input_is_one_line_and_stores_nothing(files, tmp_path, case, argv, words):
    d = files["dir"]
    _table(d / "text.csv", ["speed", "grade"], [[1, "a"], [2, "b"], [3, "c"]])
    _table(d / "const.csv", ["speed", "thickness"], [[1, 5], [2, 5], [3, 5]])
    _table(d / "badflag.csv", ["speed", "temp", "unusual"], [[1, 2, "maybe"]])
    named = {"reg": files["reg"], "oc": files["oc"], "text": d / "text.csv",
             "const": d / "const.csv", "badflag": d / "badflag.csv"}
    args = [named.get(a, a) for a in argv]
    store = tmp_path / "st"
    r = kk("train", *args, "--store", store)
    assert r.returncode == 1, (case, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    for w in words:
        assert w in lines[0], (case, lines[0])
    assert not store.exists() or not any(p.name.startswith("2") for p in store.iterdir())
