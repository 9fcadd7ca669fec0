"""Real files from the command line: --features / --ignore / --delimiter, apply reading the
run's features by name, warnings once and in the tool's words (exact stderr), the label
mapping and --positive, and the reproduction record."""

from __future__ import annotations

import html
import json
import os
import re
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


def test_train_prints_the_label_mapping_and_positive_chooses_it(files):
    # before: no mapping printed; pass/fail mapped alphabetically with no way to choose
    proc = kk("train", files["train"], "--label", "outcome", "--ignore", "batch_id",
              "--kernel", "linear", "--store", files["store"])
    assert proc.returncode == 0, proc.stderr
    assert ("  labels        f(x) > 0 predicts 'pass' (positive), f(x) <= 0 predicts 'fail' "
            "(negative)") in proc.stdout.splitlines()
    proc = kk("train", files["train"], "--label", "outcome", "--ignore", "batch_id",
              "--kernel", "linear", "--positive", "fail", "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["labels"] == {"negative": "pass", "positive": "fail"}
    rec = solver.load_run(out["run_id"], store=files["store"])
    assert rec.problem.info["labels"] == {"negative": "pass", "positive": "fail"}
    assert "--positive" in rec.attachments["command"]["argv"]
    assert "positive_label='fail'" in rec.attachments["command"]["python"]
    # the same data with the other positive label: every decision value changes sign
    # (up to the two SMO runs' stopping tolerance, kkt_tol 1e-3: paths may differ on ties)
    base = solver.apply(files["ids"][0], files["hold"], store=files["store"],
                        ignore_columns=["batch_id"])
    flipped = solver.apply(out["run_id"], files["hold"], store=files["store"],
                           ignore_columns=["batch_id"])
    np.testing.assert_allclose(flipped.values, -base.values, rtol=0, atol=1e-2)
    assert flipped.labels.tolist() == base.labels.tolist()
    proc = kk("train", files["train"], "--label", "outcome", "--ignore", "batch_id",
              "--positive", "maybe", "--store", files["store"])
    assert proc.returncode == 1
    assert "train.csv: label column 'outcome' has no value 'maybe' for --positive" in proc.stderr


def test_explain_point_prints_the_label_of_the_side(files):
    # before: "f(x) = +3.05 (positive side)" without the label; rows 0-based without a word
    proc = kk("explain", files["ids"][0], "--store", files["store"], "--point",
              "a=2000,b=1,c=0", "--top", "1")
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.splitlines()
    assert lines[1].startswith("query 1: f(x) = +") and lines[1].endswith(
        "(label 'pass': positive side)"), lines[1]
    assert " (index " in lines[2] and lines[2].lstrip().startswith("training row")
    row, index = re.match(r"\s*training row\s+(\d+) \(index (\d+)\)", lines[2]).groups()
    assert int(row) == int(index) + 1


def test_unseen_labels_name_the_file_and_column(files):
    d = files["dir"]
    odd = d / "odd_labels.csv"
    odd.write_text("a,b,c,outcome\n1,2,3,pass\n1,2,3,maybe\n4,5,6,unknown\n")
    # before: "held-out labels 'maybe' were not seen in training", no file, no column
    proc = kk("apply", files["ids"][0], odd, "--store", files["store"])
    assert proc.returncode == 1
    assert proc.stderr.startswith(f"kktrace: error: {odd}: label column 'outcome'")
    assert "'maybe', 'unknown'" in proc.stderr and "first at row 2" in proc.stderr
    before = {p.name for p in files["store"].iterdir()}
    proc = kk("train", files["train"], "--label", "outcome", "--ignore", "batch_id",
              "--holdout", odd, "--store", files["store"])
    assert proc.returncode == 1 and f"{odd}: label column 'outcome'" in proc.stderr
    assert {p.name for p in files["store"].iterdir()} == before  # refused before solving


def test_apply_refuses_non_finite_decision_values(files):
    # before: a row at ±1e308 printed nan and was given a label
    d = files["dir"]
    far = d / "far.csv"
    far.write_text("a,b,c\n1,0,0.5\n1,0,1e308\n")
    proc = kk("apply", files["ids"][0], far, "--store", files["store"])
    assert proc.returncode == 1
    assert proc.stderr.startswith(f"kktrace: error: {far}: row 2, column 'c': the decision "
                                  "value is not finite")
    assert len(proc.stderr.splitlines()) == 1
    proc = kk("explain", files["ids"][0], "--store", files["store"], "--query", far)
    assert proc.returncode == 1 and "row 2, column 'c'" in proc.stderr


def test_report_states_the_label_mapping(files, tmp_path):
    # before: only the raw problem-info mapping {'negative': ..., 'positive': ...}
    paths = solver.report(files["ids"][0], store=files["store"], out_dir=tmp_path / "rep",
                          formats=("json", "html"))
    text = Path(paths["json"]).read_text(encoding="utf-8")
    want = "f(x) > 0 predicts 'pass' (positive), f(x) <= 0 predicts 'fail' (negative)"
    assert want in text
    assert want in html.unescape(Path(paths["html"]).read_text(encoding="utf-8"))


def test_apply_rows_follow_the_one_row_convention(files, tmp_path):
    # before: apply counted rows from 0 while errors count data rows from 1
    out = tmp_path / "outputs.csv"
    proc = kk("apply", files["ids"][0], files["query"], "--store", files["store"], "--ignore",
              "batch_id", "--out", out)
    assert proc.returncode == 0, proc.stderr
    rows = out.read_text().splitlines()
    assert rows[0].startswith("row,") and [r.split(",")[0] for r in rows[1:]] == \
        ["1", "2", "3", "4", "5"]
    proc = kk("apply", files["ids"][0], files["query"], "--store", files["store"], "--ignore",
              "batch_id")
    table = proc.stdout.splitlines()
    head = table.index("row  decision_value  label")
    assert table[head + 1].split()[0] == "1" and len(table) == head + 6


def _npy_bytes(arr: np.ndarray) -> bytes:
    import io

    buf = io.BytesIO()
    np.save(buf, arr)
    return buf.getvalue()


def _hostile_files(d: Path) -> list[tuple[Path, list[str], list[str]]]:
    """(file, extra train options, words of the one-line error)."""
    import io
    import zipfile

    out = []
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": "<f8", "fortran_order": False, "shape": (10**10, 2)})
    (d / "huge.npy").write_bytes(buf.getvalue() + b"\0" * 64)
    out.append((d / "huge.npy", ["--label", "col2"], ["huge.npy", "declares shape"]))
    rows = 2**15 + 1  # 2**15 + 1 rows of 1024 float64: just over the 256 MiB floor
    with zipfile.ZipFile(d / "bomb.npz", "w", compression=zipfile.ZIP_DEFLATED) as zf:
        with zf.open("X.npy", "w", force_zip64=True) as fh:  # streamed: never in memory
            np.lib.format.write_array_header_1_0(
                fh, {"descr": "<f8", "fortran_order": False, "shape": (rows, 1024)})
            block = bytes(1024 * 8 * 256)
            for _ in range(rows // 256):
                fh.write(block)
            fh.write(bytes(1024 * 8 * (rows % 256)))
        zf.writestr("y.npy", _npy_bytes(np.zeros(rows)))
    out.append((d / "bomb.npz", ["--label", "y"], ["bomb.npz", "would inflate to"]))
    with zipfile.ZipFile(d / "odd.npz", "w") as zf:
        zf.writestr("X.npy", b"not an array")
    out.append((d / "odd.npz", ["--label", "y"], ["odd.npz", "not in .npy format"]))
    for name, cell, words in [("big", "1e400", "beyond the range"), ("hex", "0x1A", "hexa"),
                              ("group", "1_000", "digit-group"), ("arabic", "\u0663", "ASCII"),
                              ("nanword", "NaN", "NaN")]:
        p = d / f"{name}.csv"
        p.write_text(f"a,b,y\n1,2,x\n3,{cell},z\n5,6,x\n4,4,z\n", encoding="utf-8")
        out.append((p, ["--label", "y"], [f"{name}.csv", "row 2 (line 3), column 'b'", words]))
    p = d / "overflow.csv"
    p.write_text("a,b,y\n1e300,2,x\n-1e300,3,z\n5,6,x\n4,4,z\n", encoding="utf-8")
    out.append((p, ["--label", "y"], ["overflow.csv", "column 'a'", "overflows"]))
    p = d / "dc.csv"
    p.write_text("a;b;y\n1,5;2;x\n3;4;z\n5;6;x\n4;4;z\n", encoding="utf-8")
    out.append((p, ["--label", "y"], ["dc.csv", "row 1 (line 2), column 'a'", "decimal comma"]))
    return out


def test_hostile_files_are_one_line_errors_from_the_command_line(tmp_path):
    # before: MemoryError / AttributeError (exit 4), or numbers read without a word
    failures = []
    for path, opts, words in _hostile_files(tmp_path):
        proc = kk("train", path, *opts, "--store", tmp_path / "store")
        lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
        ok = (proc.returncode == 1 and len(lines) == 1 and lines[0].startswith(
            "kktrace: error: ") and all(w in lines[0] for w in words))
        if not ok:
            failures.append(f"{path.name}: exit {proc.returncode}: {proc.stderr!r}")
    assert not failures, "\n".join(failures)
    assert not (tmp_path / "store").exists() or not any(
        p.is_dir() and not p.name.startswith(".") for p in (tmp_path / "store").iterdir())


def test_verify_rerun_reads_the_run_features_from_a_file_with_an_id_column(files):
    # before: --rerun read every column, so the text ID column failed the re-run
    a = files["ids"][0]
    proc = kk("verify", a, "--rerun", files["train"], "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["reproduction"]["agreement"] == "bitwise"
    assert "column(s) 'batch_id' are not features of the run" in proc.stderr
    proc = kk("verify", a, "--rerun", files["train"], "--ignore", "batch_id",
              "--store", files["store"], "--json")
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    proc = kk("verify", a, "--rerun", files["train"], "--ignore", "b", "--store", files["store"])
    assert proc.returncode == 1 and "Traceback" not in proc.stderr
    assert "lacks the run's feature column(s) 'b'" in proc.stderr


def test_export_holdout_and_challenge_choose_columns(files, tmp_path):
    a = files["ids"][0]
    onnx_file = tmp_path / "m.onnx"
    proc = kk("export", a, "--to", onnx_file, "--holdout", files["hold"], "--ignore",
              "batch_id", "--store", files["store"], "--json")
    assert proc.returncode == 0, proc.stderr
    assert "batch_id" not in proc.stderr
    assert json.loads(proc.stdout)["check"]["rows"]["holdout"] == 20
    C = 1.0  # the C train used (its default; the runs table shows C 1)
    base = ("challenge", onnx_file, "--data", files["train"], "--label", "outcome", "--C", C,
            "--no-challenger", "--store", tmp_path / "s", "--json")
    # before: no way to leave the text ID column out of the challenge's training data
    proc = kk(*base)
    assert proc.returncode == 1 and "column 'batch_id'" in proc.stderr
    proc = kk(*base, "--ignore", "batch_id")
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["optimal"] is True


def test_study_leaves_columns_out(files, tmp_path):
    proc = kk("study", files["train"], "--label", "outcome", "--kernel", "linear", "--C", "1",
              "--folds", "2", "--scheduler", "sequential", "--store", tmp_path / "s",
              "--ignore", "batch_id", "--json")
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    assert summary["fits"] == 2
    listed = json.loads(kk("runs", "--store", tmp_path / "s", "--json").stdout)
    rows = [r for r in (listed["runs"] if isinstance(listed, dict) else listed)
            if r["run_id"] != summary["study_id"]]
    assert len(rows) == 2
    for row in rows:
        rec = solver.load_run(row["run_id"], store=tmp_path / "s")
        assert rec.data["feature_names"] == ["a", "b", "c"]
        assert rec.attachments["command"]["argv"][-2:] == ["--ignore", "batch_id"]
    # before: no --ignore, and the text ID column stopped the study
    proc = kk("study", files["train"], "--label", "outcome", "--kernel", "linear", "--C", "1",
              "--folds", "2", "--scheduler", "sequential", "--store", tmp_path / "t")
    assert proc.returncode == 1 and "column 'batch_id'" in proc.stderr
