"""The invented tablet-coating demo data: reproducible from its seed and shipped as CSV.

The demo data are invented and used only for the demo; these tests check that the
generator is deterministic, that the shipped files are exactly its output, and that the
demo writes what it promises.  They are not checks of kktrace's numerical correctness.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from solver import demo


def test_shipped_csvs_are_the_generator_output(tmp_path):
    train_csv, holdout_csv = demo.write_demo_data(tmp_path)
    shipped_train, shipped_holdout = demo.shipped_data()
    assert train_csv.read_bytes() == shipped_train.read_bytes()
    assert holdout_csv.read_bytes() == shipped_holdout.read_bytes()


def test_same_seed_same_tables_other_seed_other_tables():
    a_train, a_hold = demo.tablet_coating_tables()
    b_train, b_hold = demo.tablet_coating_tables()
    c_train, _ = demo.tablet_coating_tables(seed=demo.DEMO_SEED + 1)
    for k in a_train:
        np.testing.assert_array_equal(a_train[k], b_train[k])
        np.testing.assert_array_equal(a_hold[k], b_hold[k])
    assert not np.array_equal(a_train["coating_thickness_um"], c_train["coating_thickness_um"])


def test_tables_have_the_documented_shape_and_units():
    train, hold = demo.tablet_coating_tables()
    assert list(train) == [*demo.DEMO_COLUMNS, demo.DEMO_LABEL]
    assert len(train[demo.DEMO_LABEL]) == demo.N_TRAIN
    assert len(hold[demo.DEMO_LABEL]) == demo.N_HOLDOUT
    for table in (train, hold):
        labels = set(table[demo.DEMO_LABEL].tolist())
        assert labels == {"release", "reject"}
        share = float(np.mean(table[demo.DEMO_LABEL] == "release"))
        assert 0.25 < share < 0.75
        diss = table["dissolution_30min_pct"]
        assert np.all((diss > 0) & (diss <= 100))
        assert np.all(table["moisture_pct"] > 0)
        assert np.all(table["coating_thickness_um"] > 0) and np.all(table["hardness_n"] > 0)


def test_shipped_csv_reads_back_with_the_loader():
    from solver import load_table

    path, _ = demo.shipped_data()
    ds = load_table(path, label=demo.DEMO_LABEL)
    assert ds.feature_names == demo.DEMO_COLUMNS
    assert ds.X.shape == (demo.N_TRAIN, 4)
    with path.open(newline="") as fh:
        first = next(csv.DictReader(fh))
    assert ds.X[0, 0] == float(first["coating_thickness_um"])


def test_acceptance_window_is_not_linear():
    """Releases sit inside a window: both very thin and very thick coats are rejected."""
    train, _ = demo.tablet_coating_tables(n_train=4000, n_holdout=0)
    t = train["coating_thickness_um"]
    rel = train[demo.DEMO_LABEL] == "release"
    mid = rel[(t > 80) & (t < 92)].mean()
    assert mid > rel[t < 60].mean() + 0.3
    assert mid > rel[t > 115].mean() + 0.3


@pytest.mark.slow
def test_demo_command_json_lists_runs_explanations_and_reports(tmp_path, capsys):
    """``kktrace demo --json`` (in-process): every promised file exists and verifies."""
    from solver import RunStore
    from solver.cli import main

    assert main(["demo", "--store", str(tmp_path / "traces"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["invented_data"] is True
    runs = out["runs"]
    ids = [runs["run_id"], runs["challenger"]["run_id"]]
    assert runs["converged"] and runs["verdict"] in ("agree", "agree_within_tolerances")
    store = RunStore(tmp_path / "traces")
    assert {r["run_id"] for r in store.runs()} >= set(ids)
    for rid in ids:
        assert store.verify(rid).ok
    for fmt in ("html", "pdf", "json"):
        p = Path(out["reports"][fmt])
        assert p.is_file() and p.stat().st_size > 0
    summary = json.loads(Path(out["reports"]["json"]).read_text(encoding="utf-8"))
    assert ids[0] in json.dumps(summary)
    assert "invented" in json.dumps(summary).lower()
    for fmt in ("csv", "parquet"):
        assert Path(out["explanations"][fmt]).is_file()
    for f in out["data_files"]:
        assert Path(f).is_file()

    # the further parts: ε-regression of the coating thickness and the one-class model of
    # released batches, each with its challenger, stored, verified and reported
    parts = out["parts"]
    assert set(parts) == {"multiclass", "regression", "one-class"}
    # the multi-class part: the same batches graded release / rework / reject, one-vs-one
    mc = parts.pop("multiclass")
    model = mc["runs"]
    assert model["record"] == "parent" and model["pairs"] == 3 and model["converged"]
    assert model["verdict"] in ("agree", "agree_within_tolerances")
    assert store.verify(model["run_id"]).ok
    mc_summary = json.loads(Path(mc["reports"]["json"]).read_text(encoding="utf-8"))
    sections = [r["task_section"] for r in mc_summary["runs"] if r.get("task_section")]
    assert sections and sections[0]["task"] == "multiclass"
    assert len(sections[0]["tables"][0]["rows"]) == 3  # one row per pair
    assert Path(mc["reports"]["html"]).is_file() and Path(mc["reports"]["pdf"]).is_file()
    for name, part in parts.items():
        runs = part["runs"]
        assert runs["converged"], (name, runs)
        assert runs["verdict"] in ("agree", "agree_within_tolerances"), (name, runs)
        ids = [runs["run_id"], runs["challenger"]["run_id"]]
        for rid in ids:
            assert store.verify(rid).ok
        assert runs["holdout"]["n"] == (demo.N_PROCESS_HOLDOUT if name == "regression"
                                        else demo.N_HOLDOUT)
        for fmt in ("html", "pdf", "json"):
            assert Path(part["reports"][fmt]).stat().st_size > 0
        summary = json.loads(Path(part["reports"]["json"]).read_text(encoding="utf-8"))
        sec = summary["runs"][0]["task_section"]
        assert sec["task"] == name
    reg = parts["regression"]["runs"]
    # the gauge noise is 2 µm (invented); the fit should be near that, not far off it
    assert 1.5 < reg["holdout"]["rmse"] < 3.5 and reg["holdout"]["r2"] > 0.95
    oc = parts["one-class"]["runs"]
    assert oc["nu_property"]["holds"]
    conf = oc["holdout"]["confusion"]
    assert sum(conf.values()) == demo.N_HOLDOUT
    # most rejected batches are unlike the released ones (detection well above chance)
    assert conf["flagged_known"] > 2 * conf["missed"]


def test_task_tables_are_seeded_and_written_as_documented(tmp_path):
    a_train, a_hold = demo.coating_process_tables()
    b_train, _ = demo.coating_process_tables()
    c_train, _ = demo.coating_process_tables(seed=demo.PROCESS_SEED + 1)
    assert list(a_train) == [*demo.PROCESS_COLUMNS, demo.PROCESS_TARGET]
    assert len(a_train[demo.PROCESS_TARGET]) == demo.N_PROCESS_TRAIN
    assert len(a_hold[demo.PROCESS_TARGET]) == demo.N_PROCESS_HOLDOUT
    for k in a_train:
        np.testing.assert_array_equal(a_train[k], b_train[k])
    assert not np.array_equal(a_train[demo.PROCESS_TARGET], c_train[demo.PROCESS_TARGET])
    assert np.all(a_train[demo.PROCESS_TARGET] > 0)
    files = demo.write_task_data(tmp_path)
    from solver import load_table

    reg = load_table(files["regression"][0], label=demo.PROCESS_TARGET)
    assert reg.feature_names == demo.PROCESS_COLUMNS and reg.X.shape == (demo.N_PROCESS_TRAIN, 4)
    released = load_table(files["one-class"][0], label=None)
    train, hold = demo.tablet_coating_tables()
    n_rel = int(np.sum(train[demo.DEMO_LABEL] == "release"))
    assert released.feature_names == demo.DEMO_COLUMNS and released.X.shape == (n_rel, 4)
    new = load_table(files["one-class"][1], label=demo.UNUSUAL_COLUMN)
    assert new.X.shape == (demo.N_HOLDOUT, 4)
    np.testing.assert_array_equal(np.asarray(new.labels) == "yes",
                                  hold[demo.DEMO_LABEL] == "reject")


def test_grade_tables_share_the_batches_and_have_three_grades():
    """The multi-class demo file: the same feature values and releases, three grades."""
    a, a_hold = demo.tablet_coating_tables()
    g, g_hold = demo.tablet_coating_grade_tables()
    for c in demo.DEMO_COLUMNS:
        assert np.array_equal(a[c], g[c]) and np.array_equal(a_hold[c], g_hold[c])
    assert np.array_equal(a[demo.DEMO_LABEL] == "release", g[demo.GRADE_LABEL] == "release")
    values, counts = np.unique(g[demo.GRADE_LABEL], return_counts=True)
    assert values.tolist() == ["reject", "release", "rework"] and counts.min() >= 50
