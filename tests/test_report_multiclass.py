"""The report of a multi-class model: the task's section (every pair's convergence, the
slowest pair, the worst verdict, the held-out confusion matrix) beside one pair in full."""

from __future__ import annotations

import json

import numpy as np
import pytest

import solver
from solver.data import from_arrays
from solver.store import RunStore


def _grades(rng: np.random.Generator, n: int):
    centres = np.array([[0.0, 0.0], [2.5, 0.5], [0.5, 2.5]])
    X = np.vstack([c + rng.normal(scale=0.9, size=(n, 2)) for c in centres])
    lab = np.repeat(np.array(["pass", "rework", "scrap"]), n)
    return from_arrays(X, lab, feature_names=["thickness", "gloss"], label_name="grade")


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    rng = np.random.default_rng(3)
    store = RunStore(tmp_path_factory.mktemp("rep") / "store")
    out = solver.train(_grades(rng, 15), C=2.0, kkt_tol=1e-5, solver="both",
                       holdout=_grades(rng, 6), store=store, parallel="sequential")
    return store, out


def _section(path):
    d = json.loads(path.read_text())
    (sec,) = [r["task_section"] for r in d["runs"] if r.get("task_section")]
    return d, sec


def test_parent_report_has_the_multiclass_section(fitted, tmp_path) -> None:
    store, out = fitted
    paths = solver.report(out.run_id, store=store, out_dir=tmp_path / "r",
                          formats=("json", "html"))
    d, sec = _section(paths["json"])
    assert sec["task"] == "multiclass" and "3 classes" in sec["title"]
    assert out.run_id in d["title"]
    conv, confusion, recall = sec["tables"]
    assert conv["columns"][:7] == ["pair", "run", "iterations", "violation", "duality gap",
                                   "status", "verdict"]
    assert [r[0] for r in conv["rows"]] == ["pass vs rework", "pass vs scrap",
                                            "rework vs scrap"]
    pairs = [m for m in out.members if m["role"] == "pair"]
    assert [r[2] for r in conv["rows"]] == [m["iterations"] for m in pairs]
    slow = max(pairs, key=lambda m: m["iterations"])
    assert sec["facts"]["slowest pair"].startswith(" vs ".join(slow["key"]))
    assert sec["facts"]["worst verdict"].split()[0] == out.summary()["verdict"]
    hold = out.parent.attachments["holdout"]
    assert [list(r[1:]) for r in confusion["rows"]] == hold["matrix"]
    assert {r[0]: r[1] for r in recall["rows"]} == hold["recall"]
    assert "kktrace report" in conv["note"] and "--pair" in conv["note"]
    html = paths["html"].read_text()
    assert "One-vs-one model over 3 classes" in html and "rework vs scrap" in html
    # the default pair shown in full is the worst one: here (all converged, same verdict)
    # the one with the most iterations
    assert d["runs"][0]["run_id"] == slow["run_id"]


def test_pair_option_shows_that_pair_in_full(fitted, tmp_path) -> None:
    store, out = fitted
    paths = solver.report(out.run_id, store=store, out_dir=tmp_path / "p", formats=("json",),
                          pair="pass,scrap")
    d = json.loads(paths["json"].read_text())
    want = [m for m in out.members if m["key"] == ["pass", "scrap"]]
    assert [r["run_id"] for r in d["runs"]] == [m["run_id"] for m in want]
    with pytest.raises(solver.InvalidInputError, match="has no pair 'pass' vs 'nope'"):
        solver.report(out.run_id, store=store, out_dir=tmp_path / "x", pair="pass,nope")


def test_a_pair_that_did_not_converge_is_flagged_stop(tmp_path) -> None:
    rng = np.random.default_rng(4)
    store = RunStore(tmp_path / "store")
    out = solver.train(_grades(rng, 15), C=50.0, kkt_tol=1e-8, iteration_limit=3,
                       store=store, parallel="sequential")
    assert not out.converged
    paths = solver.report(out.run_id, store=store, out_dir=tmp_path / "r", formats=("json",))
    d, sec = _section(paths["json"])
    stops = [f for f in d["flags"] if f["code"] == "pair_not_converged"]
    assert stops and all(f["severity"] == "stop" for f in stops)
    assert sec["facts"]["worst status"] == "iteration_limit"
