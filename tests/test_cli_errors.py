"""Every user or data error reaches the terminal as exit status 1 and one line naming the
problem, never a traceback; nothing is written to the store when training fails."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

from solver.demo import DEMO_LABEL, shipped_data

HEADER = "thickness,dissolution,label\n"


def kk(*args: object, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=300)


def _write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def _data_cases(d: Path) -> list[tuple[str, list[object], list[str]]]:
    """(name, argv, words the one-line message must contain)."""
    good = "".join(f"{i},{i % 3},{'a' if i % 2 else 'b'}\n" for i in range(6))
    np.save(d / "three_d.npy", np.zeros((2, 2, 2)))
    np.savez(d / "mismatch.npz", X=np.zeros((5, 2)), y=np.array([0, 1, 0, 1]))
    np.savez(d / "objects.npz", X=np.array([[1, "a"], [2, "b"]], dtype=object),
             y=np.array([0, 1]))
    (d / "folder.csv").mkdir()
    cases = [
        ("missing file", [d / "absent.csv", "--label", "label"], ["absent.csv"]),
        ("a directory", [d / "folder.csv", "--label", "label"], ["folder.csv"]),
        ("empty file", [_write(d / "empty.csv", ""), "--label", "label"], ["empty.csv"]),
        ("header only", [_write(d / "header.csv", HEADER), "--label", "label"], ["header.csv"]),
        ("NaN value", [_write(d / "nan.csv", HEADER + good + "1,nan,a\n"), "--label", "label"],
         ["nan.csv", "dissolution", "row 7"]),
        ("infinite value", [_write(d / "inf.csv", HEADER + good + "inf,1,a\n"), "--label",
                            "label"], ["inf.csv", "thickness", "row 7"]),
        ("empty cell", [_write(d / "blank.csv", HEADER + good + "1,,a\n"), "--label", "label"],
         ["blank.csv", "dissolution"]),
        ("non-numeric", [_write(d / "text.csv", HEADER + good + "thick,1,a\n"), "--label",
                         "label"], ["text.csv", "thickness", "thick"]),
        ("one class", [_write(d / "oneclass.csv", HEADER + "1,2,a\n3,4,a\n5,6,a\n"), "--label",
                       "label"], ["oneclass.csv", "label"]),
        ("missing label column", [_write(d / "nolabel.csv", HEADER + good), "--label",
                                  "outcome"], ["outcome"]),
        ("empty label", [_write(d / "emptylabel.csv", HEADER + good + "1,2,\n"), "--label",
                         "label"], ["emptylabel.csv", "label"]),
        ("ragged row", [_write(d / "ragged.csv", HEADER + good + "1,2\n"), "--label", "label"],
         ["ragged.csv"]),
        ("mismatched lengths", [d / "mismatch.npz", "--label", "y"], ["mismatch.npz"]),
        ("object array", [d / "objects.npz", "--label", "y"], ["objects.npz"]),
        ("3-D array", [d / "three_d.npy", "--label", "col1"], ["three_d.npy"]),
        ("unknown suffix", [_write(d / "data.txt", HEADER + good), "--label", "label"],
         ["data.txt"]),
        ("C not positive", [_write(d / "ok.csv", HEADER + good), "--label", "label", "--C",
                            "-1"], ["C"]),
        ("gamma not positive", [d / "ok.csv", "--label", "label", "--gamma", "0"], ["gamma"]),
        ("kkt_tol not positive", [d / "ok.csv", "--label", "label", "--kkt-tol", "0"], ["kkt_tol"]),
        ("holdout missing", [d / "ok.csv", "--label", "label", "--holdout", d / "gone.csv"],
         ["gone.csv"]),
        ("holdout other columns", [d / "ok.csv", "--label", "label", "--holdout",
                                   _write(d / "other.csv", "a,b,label\n1,2,a\n3,4,b\n")],
         ["other.csv"]),
    ]
    return [(name, ["train", *argv, "--store", d / "store"], words) for name, argv, words in cases]


def _check_one_line_error(proc: subprocess.CompletedProcess, words: list[str]) -> None:
    assert proc.returncode == 1, (proc.returncode, proc.stdout, proc.stderr)
    assert "Traceback" not in proc.stderr and "Traceback" not in proc.stdout
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("kktrace: error: ")
    for w in words:
        assert w in lines[0], (w, lines[0])


def test_every_data_error_is_one_line_exit_1(tmp_path):
    cases = _data_cases(tmp_path)
    with ThreadPoolExecutor(max_workers=4) as pool:
        procs = list(pool.map(lambda c: kk(*c[1]), cases))
    failures = []
    for (name, _argv, words), proc in zip(cases, procs, strict=True):
        try:
            _check_one_line_error(proc, words)
        except AssertionError as exc:
            failures.append(f"{name}: {exc}")
    assert not failures, "\n".join(failures)
    # a failed training never leaves a run behind
    store = tmp_path / "store"
    assert not store.exists() or not any(p.is_dir() and not p.name.startswith(".")
                                         for p in store.iterdir())


@pytest.fixture(scope="module")
def small_store(tmp_path_factory):
    """Two quick linear-kernel runs on the demo data with different C (different problems)."""
    d = tmp_path_factory.mktemp("errs")
    train_csv = Path(shutil.copy(shipped_data()[0], d / "batches.csv"))
    ids = []
    for C in ("1", "2"):
        proc = kk("train", train_csv, "--label", DEMO_LABEL, "--kernel", "linear", "--C", C,
                  "--store", d / "store", "--json")
        assert proc.returncode == 0, proc.stderr
        import json

        ids.append(json.loads(proc.stdout)["run_id"])
    return d, d / "store", ids


def test_run_level_errors_are_one_line_exit_1(small_store):
    d, store, (a, b) = small_store
    bad_point = "coating_thickness_um=1,colour=2"
    cases = [
        (["report", "20260101T000000000000Z-000000000000", "--store", store],
         ["20260101T000000000000Z-000000000000"]),
        (["replay", "../../etc", "--iteration", 1, "--store", store], ["../../etc"]),
        (["replay", a, "--iteration", 10**9, "--store", store], ["iteration"]),
        (["compare", a, b, "--store", store], ["C"]),
        (["explain", a, "--store", store, "--point", bad_point], ["colour"]),
        (["explain", a, "--store", store, "--point", "nonsense"], ["--point"]),
        (["explain", a, "--store", store, "--query", d / "none.csv"], ["none.csv"]),
        (["apply", a, d / "none.csv", "--store", store], ["none.csv"]),
        (["apply", a, _write(d / "short.csv", "coating_thickness_um\n1\n"), "--store", store],
         ["dissolution_30min_pct"]),
        (["verify", a, "--store", store, "--rerun",
          _write(d / "changed.csv", (d / "batches.csv").read_text().replace("79.9", "80.0", 1))],
         ["fingerprint"]),
        (["report", a, b, a, "--store", store], ["3"]),
        (["report", a, "--store", store, "--format", "docx"], ["docx"]),
    ]
    with ThreadPoolExecutor(max_workers=4) as pool:
        procs = list(pool.map(lambda c: kk(*c[0]), cases))
    failures = []
    for (argv, words), proc in zip(cases, procs, strict=True):
        try:
            _check_one_line_error(proc, words)
        except AssertionError as exc:
            failures.append(f"{argv[:2]}: {exc}")
    assert not failures, "\n".join(failures)


def test_compare_different_problems_allowed_with_override(small_store):
    _d, store, (a, b) = small_store
    proc = kk("compare", a, b, "--store", store, "--allow-mismatch", "--json")
    assert proc.returncode == 0, proc.stderr
    import json

    d = json.loads(proc.stdout)
    assert d["verdict"] != "agree" and d["mismatches"]
