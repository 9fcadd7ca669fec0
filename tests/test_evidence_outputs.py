"""One story in every output (issue 13): solve and compile time apart (item 2), the caution
line in the terminal (item 11).

The runs are trained once, as the README's tour does, on the shipped demo CSVs (invented
data, used only to exercise the workflow).
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from solver.demo import DEMO_LABEL, shipped_data
from solver.vocabulary import CAUTION, timing_text

TIME_LINE = re.compile(r"^\s+time\s+solve (\d+\.\d{3}) s, compile (\d+\.\d{3}) s, set-up "
                       r"(\d+\.\d{3}) s \(whole call (\d+\.\d{3}) s\)$", re.M)


def kk(*args: object, cwd: Path | None = None, env: dict | None = None
       ) -> subprocess.CompletedProcess:
    e = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    e.update(env or {})
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=e, timeout=900)


@pytest.fixture(scope="module")
def tour(tmp_path_factory):
    work = tmp_path_factory.mktemp("tour")
    train_csv, hold_csv = shipped_data()
    store = work / "store"
    proc = kk("train", train_csv, "--label", DEMO_LABEL, "--kernel", "rbf", "--C", 10,
              "--kkt-tol", "1e-5", "--solver", "both", "--holdout", hold_csv,
              "--store", store, cwd=work)
    assert proc.returncode == 0, proc.stderr
    ids = re.findall(r"^(?:primary|challenger) run (\S+)", proc.stdout, re.M)
    assert len(ids) == 2
    return {"work": work, "store": store, "text": proc.stdout, "smo": ids[0], "qp": ids[1],
            "train": train_csv, "holdout": hold_csv}


# --------------------------------------------------------------------------- item 2


def test_every_solver_splits_its_time(rng):
    from solver.kernels import RBFKernel
    from solver.problem import binary_classification
    from solver.solvers import solve

    X = rng.normal(size=(40, 2))
    y = np.where(X[:, 0] + 0.3 * rng.normal(size=40) > 0, 1, 0)
    prob = binary_classification(X, y, kernel=RBFKernel(gamma=0.5), C=1.0)
    for method in ("smo", "qp"):
        t = solve(prob, method=method).timing
        assert set(t) == {"solve_seconds", "compile_seconds", "setup_seconds", "total_seconds"}
        parts = [t["solve_seconds"], t["compile_seconds"], t["setup_seconds"]]
        assert all(v is not None and v >= 0 for v in parts), (method, t)
        assert sum(parts) <= t["total_seconds"] + 1e-9, (method, t)
    assert solve(prob, method="qp").timing["compile_seconds"] == 0.0  # nothing compiled


def test_timing_text_names_each_part():
    t = {"solve_seconds": 0.005, "compile_seconds": 28.44, "setup_seconds": 0.001,
         "total_seconds": 28.45}
    assert timing_text(t) == ("solve 0.005 s, compile 28.440 s, set-up 0.001 s (whole call "
                              "28.450 s)")
    assert timing_text({"total_seconds": 1.0}).startswith("solve not recorded, compile not")


def test_train_prints_solve_and_compile_apart(tour):
    lines = TIME_LINE.findall(tour["text"])
    assert len(lines) == 2, tour["text"]  # one per run
    # before: "iterations 1280  in 28.45 s" (compile counted as solve time)
    assert not re.search(r"iterations\s+\d+\s+in ", tour["text"])


def test_train_and_compare_json_carry_the_parts(tour, tmp_path):
    proc = kk("train", tour["train"], "--label", DEMO_LABEL, "--C", 10, "--kkt-tol", "1e-5",
              "--store", tmp_path / "s", "--json", cwd=tmp_path)
    s = json.loads(proc.stdout)
    for key in ("solve_seconds", "compile_seconds", "setup_seconds", "total_seconds"):
        assert isinstance(s[key], float), key
    assert s["total_seconds"] == s["seconds"]
    comp = json.loads(kk("compare", tour["smo"], tour["qp"], "--store", tour["store"],
                         "--json").stdout)
    for run in comp["runs"]:
        assert run["solve_seconds"] is not None and run["compile_seconds"] is not None
    text = kk("compare", tour["smo"], tour["qp"], "--store", tour["store"]).stdout
    assert len(re.findall(r"^    time solve \d+\.\d{3} s, compile \d+\.\d{3} s", text, re.M)) == 2


def test_replay_prints_the_runs_time(tour):
    out = kk("replay", tour["smo"], "--iteration", 100, "--store", tour["store"]).stdout
    assert re.search(r"^  run time      solve \d+\.\d{3} s, compile \d+\.\d{3} s", out, re.M), out
    j = json.loads(kk("replay", tour["smo"], "--iteration", 100, "--store", tour["store"],
                      "--json").stdout)
    assert set(j["run_timing"]) == {"solve_seconds", "compile_seconds", "setup_seconds",
                                    "total_seconds"}


def test_report_html_pdf_json_show_solve_and_compile_apart(tour, tmp_path):
    import jsonschema

    from solver.reporting.summary import load_schema

    out = tmp_path / "rep"
    proc = kk("report", tour["smo"], tour["qp"], "--store", tour["store"], "--out", out)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads((out / "report.json").read_text())
    jsonschema.validate(doc, load_schema())
    for run in doc["runs"]:
        t = run["termination"]
        assert t["solve_seconds"] is not None and t["compile_seconds"] is not None
        assert t["total_seconds"] == t["seconds"]
        assert run["identity"]["solve_time_s"] == t["solve_seconds"]
        assert run["identity"]["compile_time_s"] == t["compile_seconds"]
    html = (out / "report.html").read_text()
    assert html.count("compile time (s)") >= 2 and html.count("solve time (s)") >= 2
    # "solve" is the iterations only; the fit phase of the whole solver call is named apart
    assert "solver call " in html and not re.search(r"(?:·|>) ?solve \d", html)
    from pypdf import PdfReader

    pdf = " ".join(p.extract_text() for p in PdfReader(str(out / "report.pdf")).pages)
    assert "compile time (s)" in pdf and "solve time (s)" in pdf
    # item 11: the caution is the last line the command prints
    assert proc.stdout.rstrip("\n").splitlines()[-1] == f"caution: {CAUTION}"


@pytest.mark.slow
def test_fresh_demo_prints_solve_and_compile_apart_and_the_caution(tmp_path):
    """A first demo in a fresh checkout: no numba cache yet, so compiling is paid here."""
    cache = tmp_path / "numba-cache"
    cache.mkdir()
    started = time.perf_counter()
    proc = kk("demo", "--store", tmp_path / "traces", cwd=tmp_path,
              env={"NUMBA_CACHE_DIR": str(cache)})
    wall = time.perf_counter() - started
    assert proc.returncode == 0, proc.stderr
    found, solver_now = [], None
    for line in proc.stdout.splitlines():
        m = re.search(r"\[(smo|qp)\]", line)
        solver_now = m.group(1) if m else solver_now
        t = TIME_LINE.match(line + "\n")
        if t:
            found.append((solver_now, *map(float, t.groups())))
    assert len(found) >= 2 and found[0][0] == "smo", proc.stdout
    smo_solve, smo_compile = found[0][1], found[0][2]
    # compiling (no cache) dwarfs the 360-point solve; before, the sum was shown as solve time
    assert smo_compile > smo_solve
    assert all(f[2] == 0.0 for f in found if f[0] == "qp")  # the QP challenger compiles nothing
    assert all(f[2] < smo_compile for f in found[1:])  # compiled once per process
    assert proc.stdout.rstrip("\n").splitlines()[-1] == f"caution: {CAUTION}"
    print(f"fresh demo: wall {wall:.1f} s; SMO solve {smo_solve} s, compile {smo_compile} s")


# --------------------------------------------------------------------------- item 4


def test_compare_reuses_the_stored_held_out_rows(tour):
    import solver

    comp = json.loads(kk("compare", tour["smo"], tour["qp"], "--store", tour["store"],
                         "--json").stdout)
    stored = solver.load_run(tour["qp"], store=tour["store"]).attachments["comparison"]
    # before: compare without --holdout dropped the two held-out measures train had
    assert list(comp["measures"]) == list(stored["measures"])
    assert {"decision_max_diff_holdout", "prediction_agreement_holdout"} <= set(comp["measures"])
    for name, m in stored["measures"].items():
        assert comp["measures"][name]["value"] == m["value"], name
    assert comp["verdict"] == stored["verdict"]
    assert comp["n_holdout"] == stored["n_holdout"] == 120
    assert any(n.startswith("held-out rows: the 120 stored with run A") for n in comp["notes"])


def test_compare_says_how_to_add_missing_held_out_rows(tour, tmp_path):
    proc = kk("train", tour["train"], "--label", DEMO_LABEL, "--C", 10, "--kkt-tol", "1e-5",
              "--solver", "both", "--store", tmp_path / "s", "--json", cwd=tmp_path)
    s = json.loads(proc.stdout)
    out = kk("compare", s["run_id"], s["challenger"]["run_id"], "--store", tmp_path / "s")
    assert out.returncode == 0, out.stderr
    assert ("note: held-out measures not computed: neither run was trained with held-out "
            "data; add them with 'kktrace compare RUN_A RUN_B --holdout FILE' (Python: "
            "solver.compare(a, b, holdout=FILE))") in out.stdout.splitlines()


# --------------------------------------------------------------------------- items 3 and 7


def _replay(tour, run, k):
    return json.loads(kk("replay", tour[run], "--iteration", k, "--store", tour["store"],
                         "--json").stdout)


def _labelled(text: str, heading: str) -> dict[str, str]:
    """label → value lines of the block under ``heading`` in replay's output."""
    if heading not in text:
        return {}
    out = {}
    for line in text.split(heading, 1)[1].splitlines()[1:]:
        if not line.startswith("    "):
            break
        m = re.match(r"^    (.+?)\s{2,}(\S+)", line) or re.match(r"^    (.+?) (\S+)", line)
        out[m.group(1)] = m.group(2)
    return out


def test_smo_trace_violation_is_named_apart_and_is_the_state_before_the_step(tour):
    """Before: replay printed "violation 1.283" (certificate after iteration 100) beside a
    trace row "violation 1.23863" — one word, two definitions."""
    text = kk("replay", tour["smo"], "--iteration", 100, "--store", tour["store"]).stdout
    cert = _labelled(text, "  certificate of α after iteration 100")
    row = _labelled(text, "  trace row 100")
    assert "maximal violation" in cert and "violation" not in row
    assert "violation before the step" in row and "dual objective after the step" in row
    assert "trace row 100 (the SMO loop's own figures)" in text
    # the definitions: the row's figure is the certificate of the state after iteration 99
    r99, r100 = _replay(tour, "smo", 99), _replay(tour, "smo", 100)
    assert r100["recorded"]["violation"] == pytest.approx(
        r99["certificate"]["max_violation"], rel=1e-9)
    assert r100["recorded"]["objective"] == pytest.approx(
        r100["certificate"]["dual_objective"], rel=1e-12)


def test_free_is_the_one_word_for_the_count(tour):
    assert "on the margin" not in tour["text"]
    assert re.search(r"support\s+103 of 360 points \(34 free, 69 at the bound\)", tour["text"])
    last = re.search(r"iterations\s+(\d+)", tour["text"]).group(1)  # the run's last iteration
    text = kk("replay", tour["smo"], "--iteration", last, "--store", tour["store"]).stdout
    assert "(34 free, 69 at the bound)" in text


def test_qp_trace_row_is_labelled_as_cvxopts_own(tour):
    it = _replay(tour, "qp", 0)  # any QP replay names the row's owner
    assert it["run_status"] == "converged"
    n = json.loads(kk("runs", "--store", tour["store"], "--json").stdout)
    k = next(r["iterations"] for r in n if r["run_id"] == tour["qp"])
    text = kk("replay", tour["qp"], "--iteration", k, "--store", tour["store"]).stdout
    row = _labelled(text, f"  trace row {k}")
    # before: "primal_objective" in the row was what the summary calls the dual objective
    assert "cvxopt primal objective (= D at its interior iterate)" in row
    assert "cvxopt dual objective (lower bound on D)" in row
    assert "primal objective P" not in row and "cvxopt gap sᵀz" in row
    assert f"trace row {k} (cvxopt's own figures at its interior iterate" in text


def test_last_replayed_qp_state_is_the_certificate(tour):
    """Before: replay at the QP run's last iteration gave violation 1.598e-7 and gap
    6.525e-7 against the certificate's 1.582e-7 and 7.201e-7 (the unsnapped iterate)."""
    import solver

    rec = solver.load_run(tour["qp"], store=tour["store"])
    k = int(rec.result.iterations)
    r = _replay(tour, "qp", k)
    c, stored = r["certificate"], rec.result.certificate
    assert np.array_equal(np.asarray(r["alpha"]), rec.result.alpha)
    for key in ("max_violation", "duality_gap", "relative_gap", "dual_objective", "bias"):
        assert c[key] == pytest.approx(getattr(stored, key), rel=1e-9, abs=1e-12), key
    assert (c["n_free"], c["n_bounded"]) == (stored.n_free, stored.n_bounded)
    text = kk("replay", tour["qp"], "--iteration", k, "--store", tour["store"]).stdout
    assert "the returned answer: cvxopt's final iterate moved onto its active bounds" in text
    # the figures the train command printed for the run, to its printed precision
    block = tour["text"].split("challenger run", 1)[1]
    viol = re.search(r"violation\s+(\S+)", block).group(1)
    gap = re.search(r"duality gap\s+(\S+)", block).group(1)
    assert solver.figure_text(c['max_violation']) == viol
    assert solver.figure_text(c['duality_gap']) == gap
    # an earlier iterate is cvxopt's interior point, and says so
    text = kk("replay", tour["qp"], "--iteration", k - 1, "--store", tour["store"]).stdout
    assert f"cvxopt's interior iterate {k - 1} (strictly inside the box" in text


def test_report_says_whose_figure_is_whose_for_the_qp_run(tour, tmp_path):
    out = tmp_path / "rep"
    assert kk("report", tour["smo"], tour["qp"], "--store", tour["store"], "--out", out,
              "--format", "json").returncode == 0
    runs = {r["run_id"]: r for r in json.loads((out / "report.json").read_text())["runs"]}
    qp = runs[tour["qp"]]
    # before: run B had no "trace replay gives final α" row
    assert qp["replay"] == {"reproduced": True, "max_abs_difference": 0.0}
    caps = {f["key"]: f["caption"] for f in qp["figures"]}
    assert caps["gap"].startswith("cvxopt's own gap sᵀz")
    assert "not the certificate's" in caps["gap"] and "not a point of these curves" in caps["gap"]
    assert "cvxopt's own primal objective at its interior iterates" in caps["objective"]
    # two tolerances, two names
    assert {"interior_point_tol", "kkt_tol"} <= set(qp["options"])
    assert "tol" not in qp["options"]
