"""Real files from the command line: --features / --ignore / --delimiter, apply reading the
run's features by name, warnings once and in the tool's words (exact stderr), the label
mapping and --positive, and the reproduction record."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import solver


def kk(*args: object, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=300)


def _rows(n: int, seed: int) -> list[tuple[float, float, float, str]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3)) * np.array([1000.0, 1.0, 0.1])  # scales differ by > 1e3
    return [(float(a), float(b), float(c), "pass" if a / 1000 + b > 0 else "fail")
            for a, b, c in X.tolist()]


def _write(path: Path, rows, delim: str = ",", id_prefix: str = "B-",
           order=("batch_id", "a", "b", "c", "outcome")) -> Path:
    lines = [delim.join(order)]
    for i, (a, b, c, y) in enumerate(rows):
        cell = {"batch_id": f"{id_prefix}{i}", "a": repr(a), "b": repr(b), "c": repr(c),
                "outcome": y}
        lines.append(delim.join(cell[k] for k in order))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("intake")
    train = _write(d / "train.csv", _rows(60, 1))
    hold = _write(d / "hold.csv", _rows(20, 2), id_prefix="H-")
    # the same features in another order, an extra text column and no label
    query = _write(d / "query.csv", _rows(5, 3), order=("c", "batch_id", "b", "a"))
    semi = _write(d / "hold_semi.csv", _rows(20, 2), delim=";")
    store = d / "store"
    proc = kk("train", train, "--label", "outcome", "--ignore", "batch_id", "--holdout", hold,
              "--solver", "both", "--kernel", "linear", "--store", store, "--json")
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    return {"dir": d, "train": train, "hold": hold, "query": query, "semi": semi,
            "store": store, "ids": [out["run_id"], out["challenger"]["run_id"]],
            "train_proc": proc, "train_out": out}


def test_text_id_column_needs_ignore_and_the_error_says_so(files):
    # before: "... leave it out with feature_columns", which only the Python API had
    proc = kk("train", files["train"], "--label", "outcome", "--store", files["store"])
    assert proc.returncode == 1
    assert "column 'batch_id'" in proc.stderr and "--ignore COLUMN" in proc.stderr


def test_train_with_ignore_and_features(files):
    rec = solver.load_run(files["ids"][0], store=files["store"])
    assert rec.data["feature_names"] == ["a", "b", "c"]
    proc = kk("train", files["train"], "--label", "outcome", "--features", "a,b",
              "--kernel", "linear", "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    rid = json.loads(proc.stdout)["run_id"]
    assert solver.load_run(rid, store=files["store"]).data["feature_names"] == ["a", "b"]


def test_reproduction_record_has_holdout_and_the_column_choice(files):
    # before: the Python call omitted holdout=
    cmd = solver.load_run(files["ids"][0], store=files["store"]).attachments["command"]
    assert f"holdout={str(files['hold'])!r}" in cmd["python"]
    assert "ignore_columns=['batch_id']" in cmd["python"]
    assert cmd["argv"][-2:] == ["--ignore", "batch_id"] or "--ignore" in cmd["argv"]
    assert "--holdout" in cmd["argv"]


def test_apply_reads_the_run_features_by_name_and_names_the_ignored(files):
    # before: "has column(s) 'batch_id' that the run was not trained on"; a text ID column
    # failed as "not a number"
    a = files["ids"][0]
    proc = kk("apply", a, files["query"], "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == (f"kktrace: warning: {files['query']}: column(s) 'batch_id' are not "
                           "features of the run and were ignored\n")
    got = json.loads(proc.stdout)["values"]
    # the same rows given in training order through the Python API
    rows = _rows(5, 3)
    X = np.array([[r[0], r[1], r[2]] for r in rows])
    want = solver.apply(a, solver.from_arrays(X, feature_names=["a", "b", "c"]),
                        store=files["store"]).values
    np.testing.assert_allclose(got, want, rtol=0, atol=0)
    # with --ignore the column is left out silently
    proc = kk("apply", a, files["query"], "--store", files["store"], "--ignore", "batch_id")
    assert proc.returncode == 0 and proc.stderr == ""
    proc = kk("apply", a, files["query"], "--store", files["store"], "--ignore", "a")
    assert proc.returncode == 1
    assert "lacks the run's feature column(s) 'a'" in proc.stderr
    assert "left out by --features / --ignore" in proc.stderr


def test_compare_holdout_stderr_is_exact_and_delimiter_forced_or_detected(files):
    a, b = files["ids"]
    # before: raw Python warning lines (file, line number, source) about feature scales
    proc = kk("compare", a, b, "--store", files["store"], "--holdout", files["hold"],
              "--ignore", "batch_id")
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    proc = kk("compare", a, b, "--store", files["store"], "--holdout", files["semi"])
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == (f"kktrace: warning: {files['semi']}: column(s) 'batch_id' are not "
                           "features of the run and were ignored\n")
    proc = kk("compare", a, b, "--store", files["store"], "--holdout", files["semi"],
              "--delimiter", ",")
    assert proc.returncode == 1
    assert "this looks semicolon-separated: use --delimiter ';'" in proc.stderr


def test_explain_query_stderr_is_exact(files):
    a = files["ids"][0]
    proc = kk("explain", a, "--store", files["store"], "--query", files["query"], "--top", "2",
              "--ignore", "batch_id")
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    proc = kk("explain", a, "--store", files["store"], "--ignore", "batch_id")
    assert proc.returncode == 1 and "apply to the --query file" in proc.stderr


def test_train_scale_warning_follows_the_settings_and_is_printed_once(files):
    # before: "standardise the features" although standardising was on, printed twice,
    # and once more for the held-out file
    assert not [w for w in files["train_out"]["warnings"] if "feature scales" in w]
    assert files["train_proc"].stderr == ""
    proc = kk("train", files["train"], "--label", "outcome", "--ignore", "batch_id",
              "--holdout", files["hold"], "--no-standardise", "--kernel", "linear",
              "--store", files["store"])
    assert proc.returncode in (0, 3), proc.stderr
    lines = [ln for ln in proc.stdout.splitlines() if "feature scales" in ln]
    assert len(lines) == 1, proc.stdout
    assert "this run does not standardise them (--no-standardise)" in lines[0]
    assert "train.csv" in lines[0] and "hold.csv" not in proc.stdout.split("warning", 1)[-1]
    assert proc.stderr == ""


def test_semicolon_training_file_is_detected(files):
    d = files["dir"]
    semi = _write(d / "train_semi.csv", _rows(30, 4), delim=";")
    proc = kk("train", semi, "--label", "outcome", "--ignore", "batch_id", "--kernel",
              "linear", "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    rid = json.loads(proc.stdout)["run_id"]
    assert solver.load_run(rid, store=files["store"]).data["feature_names"] == ["a", "b", "c"]
