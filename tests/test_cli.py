"""End-to-end tests of the ``kktrace`` command, run as a user would run it (subprocesses).

One module-scoped store is trained once on the shipped demo CSVs (invented data, used here
only to exercise the workflow); the tests then walk train → runs → report → compare →
explain → replay → verify → apply on it and check outputs and files.
"""

from __future__ import annotations

import csv
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from solver.demo import DEMO_COLUMNS, DEMO_LABEL, shipped_data

SUBCOMMANDS = ("train", "runs", "report", "compare", "explain", "replay", "verify", "apply",
               "demo")
TRAIN_KEYS = {"run_id", "solver", "status", "iterations", "dual_objective", "primal_objective",
              "duality_gap", "max_violation", "kkt_tol", "n_support", "n_bounded", "bias",
              "seconds", "run_dir"}


def kk(*args: object, cwd: Path | None = None, env: dict | None = None,
       timeout: float = 300) -> subprocess.CompletedProcess:
    """Run ``kktrace ARGS`` in a fresh interpreter; stdout/stderr captured as text."""
    e = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    e.update(env or {})
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=e, timeout=timeout)


def ok_json(proc: subprocess.CompletedProcess, code: int = 0):
    assert proc.returncode == code, proc.stderr
    assert "Traceback" not in proc.stderr
    return json.loads(proc.stdout)


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """Data files copied to a work folder; SMO + QP challenger trained into ``store``."""
    work = tmp_path_factory.mktemp("cli")
    train_src, hold_src = shipped_data()
    train_csv = Path(shutil.copy(train_src, work / "batches.csv"))
    hold_csv = Path(shutil.copy(hold_src, work / "batches_holdout.csv"))
    store = work / "store"
    proc = kk("train", train_csv.name, "--label", DEMO_LABEL, "--kernel", "rbf", "--C", 10,
              "--kkt-tol", "1e-5", "--solver", "both", "--holdout", hold_csv.name,
              "--store", store, "--json", cwd=work)
    summary = ok_json(proc)
    return {"work": work, "store": store, "train": train_csv, "holdout": hold_csv,
            "summary": summary, "smo": summary["run_id"],
            "qp": summary["challenger"]["run_id"]}


# --------------------------------------------------------------------------- train


def test_train_json_summary_has_every_field(trained):
    s = trained["summary"]
    assert TRAIN_KEYS <= set(s)
    assert TRAIN_KEYS <= set(s["challenger"])
    assert s["solver"] == "smo" and s["challenger"]["solver"] == "qp"
    assert s["status"] == "converged" and s["converged"] is True
    assert s["max_violation"] <= s["kkt_tol"] == 1e-5
    assert s["duality_gap"] >= 0
    assert s["verdict"] in ("agree", "agree_within_tolerances", "disagree")
    assert s["n_support"] == s["n_free"] + s["n_bounded"]
    # the figures are the stored run's, not a separate computation
    manifest = json.loads((Path(s["run_dir"]) / "manifest.json").read_text(encoding="utf-8"))
    assert s["run_id"] in json.dumps(manifest)
    assert Path(s["challenger"]["run_dir"]).is_dir()
    assert 0.5 <= s["holdout_accuracy"] <= 1.0


def test_train_human_output_and_no_progress_when_not_a_terminal(trained, tmp_path):
    proc = kk("train", trained["train"], "--label", DEMO_LABEL, "--kernel", "linear",
              "--store", tmp_path / "s")
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""  # progress bar only on a terminal
    out = proc.stdout
    assert "converged" in out and "stored in" in out and "duality gap" in out
    run_id = re.search(r"primary run (\S+)", out).group(1)
    assert (tmp_path / "s" / run_id / "manifest.json").is_file()


def test_train_command_attachment_reproduces_the_options(trained):
    run_dir = Path(trained["summary"]["run_dir"])
    text = json.dumps(json.loads((run_dir / "manifest.json").read_text(encoding="utf-8")))
    for piece in ("kktrace train", "--label lab_decision", "--C 10", "--solver both"):
        assert piece in text, piece


# --------------------------------------------------------------------------- runs


def test_runs_lists_and_filters(trained):
    rows = ok_json(kk("runs", "--store", trained["store"], "--json"))
    ids = {r["run_id"] for r in rows}
    assert {trained["smo"], trained["qp"]} <= ids
    qp_rows = ok_json(kk("runs", "--store", trained["store"], "--solver", "qp", "--json"))
    assert [r["run_id"] for r in qp_rows] == [trained["qp"]]
    assert qp_rows[0]["parent_id"] == trained["smo"]
    human = kk("runs", "--store", trained["store"])
    assert human.returncode == 0
    assert human.stdout.splitlines()[0].split()[:2] == ["run_id", "created"]
    assert trained["smo"] in human.stdout
    empty = kk("runs", "--store", trained["work"] / "nothing-here")
    assert empty.returncode == 0 and "no runs" in empty.stdout


# --------------------------------------------------------------------------- report


def test_report_writes_html_pdf_json(trained, tmp_path):
    paths = ok_json(kk("report", trained["smo"], trained["qp"], "--store", trained["store"],
                       "--out", tmp_path / "rep", "--json"))
    assert set(paths) == {"html", "pdf", "json"}
    for p in paths.values():
        assert Path(p).is_file() and Path(p).stat().st_size > 500
    assert Path(paths["pdf"]).read_bytes()[:5] == b"%PDF-"
    html = Path(paths["html"]).read_text(encoding="utf-8")
    assert trained["smo"] in html and trained["qp"] in html
    summary = json.loads(Path(paths["json"]).read_text(encoding="utf-8"))
    assert trained["smo"] in json.dumps(summary)


# --------------------------------------------------------------------------- compare


def test_compare_gives_the_stored_verdict(trained):
    d = ok_json(kk("compare", trained["smo"], trained["qp"], "--store", trained["store"],
                   "--holdout", trained["holdout"], "--json"))
    assert d["verdict"] == trained["summary"]["verdict"]
    assert {"objective_rel_diff", "support_jaccard", "decision_max_diff_holdout"} <= set(
        d["measures"])
    human = kk("compare", trained["smo"], trained["qp"], "--store", trained["store"])
    assert human.returncode == 0
    assert f"verdict: {d['verdict']}" in human.stdout
    assert "objective_rel_diff" in human.stdout


# --------------------------------------------------------------------------- explain


def test_explain_whole_table(trained, tmp_path):
    cols = ok_json(kk("explain", trained["smo"], "--store", trained["store"], "--json"))
    assert len(cols["row_id"]) == 360
    n_sv = sum(c != "non_support" for c in cols["category"])
    assert n_sv == trained["summary"]["n_support"]
    assert all(isinstance(r, str) and r for r in cols["reason"])
    out = kk("explain", trained["smo"], "--store", trained["store"], "--out", tmp_path)
    assert out.returncode == 0, out.stderr
    csv_file = tmp_path / f"points-{trained['smo']}.csv"
    assert (tmp_path / f"points-{trained['smo']}.parquet").is_file()
    with csv_file.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 360 and rows[0]["category"] == cols["category"][0]


def test_explain_point_matches_score(trained, tmp_path):
    values = {"coating_thickness_um": 88.0, "dissolution_30min_pct": 90.0, "hardness_n": 120.0,
              "moisture_pct": 2.5}
    point = ",".join(f"{k}={v}" for k, v in values.items())
    d = ok_json(kk("explain", trained["smo"], "--store", trained["store"], "--point", point,
                   "--top", 3, "--json"))
    f = np.asarray(d["values"]).ravel()
    assert f.shape == (1,)
    assert np.asarray(d["top_rows"]).shape == (1, 3)
    # contributions + remainder + bias add up to f(x)
    total = np.sum(d["top_contributions"]) + np.sum(d["remainder"]) + d["bias"]
    assert total == pytest.approx(f[0], rel=1e-10, abs=1e-12)
    q = tmp_path / "one.csv"
    q.write_text(",".join(values) + "\n" + ",".join(str(v) for v in values.values()) + "\n")
    sc = ok_json(kk("apply", trained["smo"], q, "--store", trained["store"], "--json"))
    assert sc["values"][0] == pytest.approx(f[0], rel=1e-12)
    human = kk("explain", trained["smo"], "--store", trained["store"], "--point", point)
    assert human.returncode == 0 and "training row" in human.stdout


def test_explain_query_file_and_leave_one_out(trained):
    d = ok_json(kk("explain", trained["smo"], "--store", trained["store"], "--query",
                   trained["holdout"], "--top", 2, "--json"))
    assert np.asarray(d["top_rows"]).shape == (120, 2)
    loo = ok_json(kk("explain", trained["smo"], "--store", trained["store"],
                     "--leave-one-out", "--no-keep", "--json"))
    assert loo["refits"] <= trained["summary"]["n_support"]
    assert 0 <= loo["error_rate"] <= loo["support_vector_bound"] <= 1


# --------------------------------------------------------------------------- replay


def test_replay_start_and_end(trained):
    start = ok_json(kk("replay", trained["smo"], "--iteration", 0, "--store", trained["store"],
                       "--json"))
    assert start["certificate"]["n_support"] == 0 and not any(start["alpha"])
    it = trained["summary"]["iterations"]
    end = ok_json(kk("replay", trained["smo"], "--iteration", it, "--store", trained["store"],
                     "--json"))
    assert end["certificate"]["dual_objective"] == pytest.approx(
        trained["summary"]["dual_objective"], rel=1e-9)
    assert end["certificate"]["n_support"] == trained["summary"]["n_support"]
    human = kk("replay", trained["smo"], "--iteration", 10, "--store", trained["store"])
    assert human.returncode == 0 and "iteration 10" in human.stdout


# --------------------------------------------------------------------------- verify


def test_verify_intact_and_rerun(trained):
    proc = kk("verify", trained["qp"], "--store", trained["store"])
    assert proc.returncode == 0 and "files intact" in proc.stdout
    d = ok_json(kk("verify", trained["smo"], "--store", trained["store"], "--rerun",
                   trained["train"], "--json"))
    assert d["ok"] is True and d["integrity"]["ok"] is True
    assert d["reproduction"]["agreement"] == "bitwise"


def test_verify_detects_a_changed_byte(trained, tmp_path):
    copy = tmp_path / "store"
    shutil.copytree(trained["store"], copy)
    victim = next(p for p in sorted((copy / trained["smo"]).iterdir())
                  if p.is_file() and p.name != "manifest.json")
    data = bytearray(victim.read_bytes())
    data[len(data) // 2] ^= 0x01
    victim.write_bytes(bytes(data))
    proc = kk("verify", trained["smo"], "--store", copy)
    assert proc.returncode == 1
    assert victim.name in proc.stdout
    assert proc.stderr.strip().startswith("kktrace: error:")
    assert "Traceback" not in proc.stderr


# --------------------------------------------------------------------------- score


def test_score_labelled_and_unlabelled(trained, tmp_path):
    d = ok_json(kk("apply", trained["smo"], trained["holdout"], "--store", trained["store"],
                   "--out", tmp_path / "scores.csv", "--json"))
    assert d["n"] == 120 and len(d["values"]) == 120
    assert d["confusion"]["accuracy"] == pytest.approx(trained["summary"]["holdout_accuracy"])
    assert np.all((np.asarray(d["values"]) > 0) == (np.asarray(d["labels"]) == "release"))
    with (tmp_path / "scores.csv").open(newline="") as fh:
        assert len(list(csv.DictReader(fh))) == 120
    # features only: predictions without a confusion matrix
    src = list(csv.DictReader(trained["holdout"].open(newline="")))
    q = tmp_path / "new.csv"
    with q.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(DEMO_COLUMNS)
        for r in src[:7]:
            w.writerow([r[c] for c in DEMO_COLUMNS])
    d2 = ok_json(kk("apply", trained["smo"], q, "--store", trained["store"], "--json"))
    assert d2["n"] == 7 and d2["confusion"] is None
    assert d2["values"] == pytest.approx(d["values"][:7], rel=1e-12)


# --------------------------------------------------------------------------- not converged


def test_iteration_limit_exits_3_and_run_is_stored_marked(trained, tmp_path):
    store = tmp_path / "s"
    d = ok_json(kk("train", trained["train"], "--label", DEMO_LABEL, "--iteration-limit", 5,
                   "--store", store, "--json"), code=3)
    assert d["status"] == "iteration_limit" and d["converged"] is False
    assert d["iterations"] == 5 and d["max_violation"] > d["kkt_tol"]
    assert any("did not converge" in w for w in d["warnings"])
    rows = ok_json(kk("runs", "--store", store, "--status", "iteration_limit", "--json"))
    assert [r["run_id"] for r in rows] == [d["run_id"]]
    assert rows[0]["converged"] in (0, False)
    human = kk("train", trained["train"], "--label", DEMO_LABEL, "--iteration-limit", 5,
               "--store", store)
    assert human.returncode == 3 and "NOT CONVERGED" in human.stdout


# --------------------------------------------------------------------------- usage


@pytest.mark.parametrize("command", SUBCOMMANDS)
def test_help_has_examples_and_only_long_options(command):
    proc = kk(command, "--help")
    assert proc.returncode == 0
    assert "examples:" in proc.stdout and "exit status:" in proc.stdout
    assert not re.search(r"(?<![\w-])-[A-Za-z](?![\w-])", proc.stdout), proc.stdout


def test_top_level_help_and_version():
    proc = kk("--help")
    assert proc.returncode == 0
    for c in SUBCOMMANDS:
        assert c in proc.stdout
    assert not re.search(r"(?<![\w-])-[A-Za-z](?![\w-])", proc.stdout)
    v = kk("--version")
    assert v.returncode == 0 and v.stdout.startswith("kktrace ")


@pytest.mark.parametrize("argv", [
    ["train", "x.csv", "--label", "y", "--bogus"],
    ["train", "x.csv", "--label", "y", "-h"],
    ["train", "x.csv", "--lab", "y"],              # no abbreviations
    ["train", "x.csv"],                            # --label is required
    ["train", "x.csv", "--label", "y", "--kernel", "cubic"],
    ["train", "x.csv", "--label", "y", "--iteration-limit", "0"],
    ["replay", "RUN"],                             # --iteration is required
    ["frobnicate"],
    [],
])
def test_usage_errors_exit_2(argv):
    proc = kk(*argv)
    assert proc.returncode == 2, (argv, proc.stderr)
    assert "Traceback" not in proc.stderr
    assert "usage:" in proc.stderr


def test_default_store_from_environment_and_cwd(trained, tmp_path):
    env_store = tmp_path / "env-store"
    d = ok_json(kk("train", trained["train"], "--label", DEMO_LABEL, "--kernel", "linear",
                   "--json", env={"KKTRACE_STORE": str(env_store)}, cwd=tmp_path))
    assert Path(d["run_dir"]).parent == env_store.resolve()
    d2 = ok_json(kk("train", trained["train"], "--label", DEMO_LABEL, "--kernel", "linear",
                    "--json", cwd=tmp_path))
    assert Path(d2["run_dir"]).parent == (tmp_path / "traces").resolve()


def test_console_script_is_installed():
    script = Path(sys.executable).with_name("kktrace")
    found = script if script.exists() else shutil.which("kktrace")
    if not found:
        pytest.skip("kktrace console script not installed next to this interpreter")
    proc = subprocess.run([str(found), "--version"], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0 and proc.stdout.startswith("kktrace ")


# --------------------------------------------------------------------------- demo


@pytest.mark.slow
def test_demo_writes_everything_and_says_the_data_are_invented(tmp_path):
    proc = kk("demo", "--store", tmp_path / "traces", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout
    assert "INVENTED" in out
    for word in ("primary run", "challenger run", "solver agreement", "audit report"):
        assert word in out, word
    manifests = list((tmp_path / "traces").glob("*/manifest.json"))
    # classification, ε-regression and one-class, each with its QP challenger; the
    # multi-class model: 3 pairs + 3 challengers + the parent
    assert len(manifests) == 6 + 7
    for word in ("ε-regression: coating thickness", "one-class: new batches",
                 "multi-class parent"):
        assert word in out, word
    for suffix in (".html", ".pdf", ".json"):
        assert list((tmp_path / "traces" / "reports").rglob(f"*{suffix}")), suffix
    assert list((tmp_path / "traces" / "reports").rglob("points-*.csv"))
    # every path the demo prints exists
    for line in out.splitlines():
        m = re.match(r"\s+(html|pdf|json|csv|parquet)\s+(\S+)$", line)
        if m:
            assert Path(m.group(2)).is_file(), line


# --------------------------------------------------------------------------- progress


def _stderr_on_a_terminal(*args: object) -> tuple[int, bytes]:
    """Run kktrace with stderr on a pseudo-terminal; return (exit status, terminal bytes)."""
    pty = pytest.importorskip("pty")
    master, slave = pty.openpty()
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    try:
        proc = subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                              stdout=subprocess.PIPE, stderr=slave, env=env, timeout=300)
    finally:
        os.close(slave)
    chunks = []
    while True:
        try:
            chunk = os.read(master, 4096)
        except OSError:
            break
        if not chunk:
            break
        chunks.append(chunk)
    os.close(master)
    return proc.returncode, b"".join(chunks)


def test_progress_bar_on_a_terminal_and_off_with_quiet(trained, tmp_path):
    args = ("train", trained["train"], "--label", DEMO_LABEL, "--C", 10, "--kkt-tol", "1e-5",
            "--store", tmp_path / "s")
    code, shown = _stderr_on_a_terminal(*args)
    assert code == 0
    assert b"smo iteration" in shown and b"violation" in shown
    assert "kkt_tol 1×10⁻⁵".encode() in shown
    assert b"\r" in shown  # redrawn in place
    code, quiet = _stderr_on_a_terminal(*args, "--quiet")
    assert code == 0 and quiet == b""


def test_parquet_and_npz_inputs_give_the_same_fingerprint(trained, tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    with trained["train"].open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    X = np.array([[float(r[c]) for c in DEMO_COLUMNS] for r in rows])
    y = np.array([r[DEMO_LABEL] for r in rows])
    table = {c: X[:, k] for k, c in enumerate(DEMO_COLUMNS)}
    table[DEMO_LABEL] = y
    pq.write_table(pa.table(table), tmp_path / "batches.parquet")
    np.savez(tmp_path / "batches.npz", X=X, y=y, feature_names=np.array(DEMO_COLUMNS),
             label_name=np.array(DEMO_LABEL))
    store = tmp_path / "s"
    for name in ("batches.parquet", "batches.npz"):
        d = ok_json(kk("train", tmp_path / name, "--label", DEMO_LABEL, "--kernel", "linear",
                       "--store", store, "--json"))
        assert d["status"] == "converged"
    rows = ok_json(kk("runs", "--store", store, "--json"))
    csv_rows = ok_json(kk("runs", "--store", trained["store"], "--json"))
    prints = {r["data_fingerprint"] for r in rows} | {csv_rows[0]["data_fingerprint"]}
    assert len(rows) == 2 and len(prints) == 1
