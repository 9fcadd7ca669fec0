"""The one status rule (solver.status.decide) and its use by every command (issue 13, item 1).

A run is ``converged`` only when the backend's own stopping test was met *and* the shared
certificate meets kkt_tol.  The end-to-end case is the QP challenger at a kkt_tol tighter
than its interior-point accuracy: cvxopt says ``optimal`` (also after the challenger's two
re-solves with a tighter interior-point tolerance), the certificate's maximal violation
(about 1.6e-9 on the demo data, measured) exceeds kkt_tol 1e-10, and train, compare,
replay, runs and the report's JSON must all say ``certificate_not_met``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from solver.demo import DEMO_LABEL, shipped_data
from solver.status import MESSAGES, Status, decide, settle


def kk(*args: object, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=600)


# --------------------------------------------------------------------------- the rule


@pytest.mark.parametrize("backend", list(Status))
def test_rule_keeps_the_backend_status_when_the_certificate_meets_tol(backend):
    assert decide(backend, 1e-6, 1e-5) == backend


def test_rule_demotes_only_a_converged_backend():
    assert decide(Status.CONVERGED, 2.07e-5, 1e-5) == Status.CERTIFICATE_NOT_MET
    assert decide(Status.CONVERGED, float("nan"), 1e-5) == Status.CERTIFICATE_NOT_MET
    assert decide(Status.CONVERGED, 1e-5, 1e-5) == Status.CONVERGED  # "within" includes equal
    assert decide(Status.ITERATION_LIMIT, 1.0, 1e-5) == Status.ITERATION_LIMIT


def test_settle_keeps_the_backends_own_word_and_both_figures():
    status, message = settle(Status.CONVERGED, "cvxopt status 'optimal'", 2.072e-5, 1e-5)
    assert status == Status.CERTIFICATE_NOT_MET
    assert message == (MESSAGES[Status.CERTIFICATE_NOT_MET] + " (cvxopt status 'optimal'; "
                       "shared certificate maximal violation 2.072×10⁻⁵ > kkt_tol 1×10⁻⁵)")
    assert settle(Status.CONVERGED, "", 1e-6, 1e-5) == (Status.CONVERGED,
                                                        MESSAGES[Status.CONVERGED])


def test_every_status_has_a_message_and_a_label():
    for st in Status:
        assert MESSAGES[st] and Status.from_label(st.label) == st


# --------------------------------------------------------------------------- every command


@pytest.fixture(scope="module")
def tight(tmp_path_factory):
    """SMO + QP at kkt_tol 1e-10 on the shipped (invented) demo data: SMO meets it, the
    QP challenger's certificate does not although cvxopt reports 'optimal'."""
    work = tmp_path_factory.mktemp("rule")
    train_csv, hold_csv = shipped_data()
    store = work / "store"
    proc = kk("train", train_csv, "--label", DEMO_LABEL, "--kernel", "rbf", "--C", 10,
              "--kkt-tol", "1e-10", "--solver", "both", "--holdout", hold_csv,
              "--store", store, "--json", cwd=work)
    return {"work": work, "store": store, "proc": proc, "train": train_csv}


def test_train_says_not_converged_and_exits_3(tight):
    proc = tight["proc"]
    assert proc.returncode == 3, proc.stderr
    s = json.loads(proc.stdout)
    qp = s["challenger"]
    assert s["status"] == "converged" and s["converged"] is False  # the outcome as a whole
    assert qp["status"] == "certificate_not_met" and qp["converged"] is False
    assert qp["max_violation"] > qp["kkt_tol"] == 1e-10
    assert "cvxopt status 'optimal'" in qp["message"]
    assert s["verdict"] != "agree"  # "agree" needs both runs converged
    # the warning is said once (before: once as the run's note, once as the solver's own)
    notes = [w for w in s["warnings"] if "certificate" in w]
    assert notes == [f"qp run {qp['run_id']} did not converge: {qp['message']}"]


def test_train_text_output_names_the_status(tight, tmp_path):
    proc = kk("train", tight["train"], "--label", DEMO_LABEL, "--C", 10, "--kkt-tol", "1e-10",
              "--solver", "qp", "--store", tmp_path / "s", cwd=tmp_path)
    assert proc.returncode == 3
    assert "[qp]  NOT CONVERGED (certificate_not_met)" in proc.stdout
    warns = [ln for ln in proc.stdout.splitlines() if ln.startswith("warning:")]
    assert len(warns) == 1 and "cvxopt status 'optimal'" in warns[0]
    assert proc.stderr == ""


def test_compare_replay_runs_and_report_give_the_same_status(tight, tmp_path):
    s = json.loads(tight["proc"].stdout)
    smo, qp, store = s["run_id"], s["challenger"]["run_id"], tight["store"]
    comp = kk("compare", smo, qp, "--store", store, "--json")
    assert comp.returncode == 0, comp.stderr
    c = json.loads(comp.stdout)
    assert [r["status"] for r in c["runs"]] == ["converged", "certificate_not_met"]
    assert c["measures"]["converged"]["value"] == 0
    text = kk("compare", smo, qp, "--store", store).stdout
    assert "status certificate_not_met" in text

    rep = kk("replay", qp, "--iteration", s["challenger"]["iterations"], "--store", store,
             "--json")
    assert rep.returncode == 0, rep.stderr
    r = json.loads(rep.stdout)
    assert r["run_status"] == "certificate_not_met" and r["run_converged"] is False
    assert "run status    certificate_not_met" in kk(
        "replay", qp, "--iteration", 0, "--store", store).stdout

    runs = json.loads(kk("runs", "--store", store, "--json").stdout)
    assert {x["run_id"]: x["status"] for x in runs} == {smo: "converged",
                                                        qp: "certificate_not_met"}

    out = tmp_path / "rep"
    assert kk("report", smo, qp, "--store", store, "--out", out, "--format", "json,html"
              ).returncode == 0
    j = json.loads((out / "report.json").read_text())
    assert j["all_converged"] is False
    terms = {run["run_id"]: run["termination"] for run in j["runs"]}
    assert terms[qp]["status"] == "certificate_not_met" and terms[qp]["converged"] is False
    assert terms[smo]["status"] == "converged" and terms[smo]["converged"] is True
    html = (out / "report.html").read_text()
    assert html.count("NOT CONVERGED") == 1  # run B only


def test_verify_refuses_a_converged_label_over_a_failing_certificate(tight, tmp_path):
    """A manifest claiming ``converged`` for a run whose recomputed certificate misses
    kkt_tol breaks the rule; verify names it for every solver (before: SMO runs only)."""
    from dataclasses import replace

    from solver.store import RunStore

    early = tmp_path / "early"
    proc = kk("train", tight["train"], "--label", DEMO_LABEL, "--C", 10, "--solver", "qp",
              "--iteration-limit", 3, "--store", early, "--json", cwd=tmp_path)
    assert proc.returncode == 3, proc.stderr
    rec = RunStore(early).load(json.loads(proc.stdout)["run_id"])
    assert rec.result.status == Status.ITERATION_LIMIT
    assert rec.result.certificate.max_violation > 100 * rec.result.certificate.kkt_tol
    forged = replace(rec, result=replace(rec.result, status=Status.CONVERGED), run_id=None,
                     created=None, parent_id=None, parent_digest=None, manifest=None)
    other = RunStore(tmp_path / "forged")
    v = other.verify(other.save(forged))
    assert not v.ok
    assert any("solver.status says converged" in p for p in v.problems), v.problems


def test_qp_tightens_its_own_tolerance_before_giving_up():
    """ε-regression where cvxopt's default tolerance stops short of kkt_tol 1e-5 (maximal
    violation 5.1e-5, measured); one re-solve at interior_point_tol 1e-11 meets it."""
    import warnings

    from solver.kernels import RBFKernel
    from solver.problem import regression
    from solver.qp import solve_qp

    rng = np.random.default_rng(3)
    X = rng.normal(size=(80, 2))
    t = 1.5 * X[:, 0] - X[:, 1] ** 2 + 0.1 * rng.normal(size=80)
    X = (X - X.mean(0)) / X.std(0)
    sq = ((X[:, None, :] - X[None, :, :]) ** 2).sum(-1)
    gamma = 1.0 / np.median(sq[np.triu_indices(80, 1)])  # the median heuristic
    prob = regression(X, t, kernel=RBFKernel(gamma=gamma), C=1.0, epsilon=0.1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        first = solve_qp(prob, kkt_tol=1e-5, tighten=0)
    assert first.status == Status.CERTIFICATE_NOT_MET and len(caught) == 1
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        r = solve_qp(prob, kkt_tol=1e-5)
    assert caught == [] and r.status == Status.CONVERGED and r.certificate.meets_tol
    tols = [a["interior_point_tol"] for a in r.extra["attempts"]]
    assert tols[0] == 1e-9 and tols[-1] == r.extra["interior_point_tol_used"] < 1e-9
    assert [a["status"] for a in r.extra["attempts"]][:-1] == ["certificate_not_met"] * (
        len(tols) - 1)
    assert r.options["interior_point_tol"] == 1e-9 and r.options["tighten"] == 2


def test_a_qp_run_stored_before_the_rule_is_read_under_it(tight, tmp_path):
    """QP runs written before the rule (no ``extra.attempts``) kept cvxopt's "converged";
    they still load and verify, and every reader applies the rule to them."""
    from dataclasses import replace

    import solver
    from solver.store import RunStore

    s = json.loads(tight["proc"].stdout)
    rec = RunStore(tight["store"]).load(s["challenger"]["run_id"])
    extra = {k: v for k, v in rec.result.extra.items() if k != "attempts"}
    old = replace(rec, result=replace(rec.result, status=Status.CONVERGED, extra=extra,
                                      message="optimality test met (cvxopt status 'optimal')"),
                  run_id=None, created=None, parent_id=None, parent_digest=None, manifest=None)
    st = RunStore(tmp_path / "old")
    rid = st.save(old)
    assert st.verify(rid).ok
    r = json.loads(kk("replay", rid, "--iteration", 0, "--store", st.root, "--json").stdout)
    assert r["run_status"] == "certificate_not_met"
    out = tmp_path / "rep"
    assert kk("report", rid, "--store", st.root, "--out", out, "--format", "json"
              ).returncode == 0
    term = json.loads((out / "report.json").read_text())["runs"][0]["termination"]
    assert term["status"] == "certificate_not_met" and term["converged"] is False
    assert term["message"].endswith("(stored status 'converged': optimality test met (cvxopt "
                                    "status 'optimal'); shared certificate maximal violation "
                                    f"{solver.figure_text(rec.result.certificate.max_violation)}"
                                    " > kkt_tol 1×10⁻¹⁰)")
    comp = solver.compare(s["run_id"], solver.load_run(rid, store=st.root), store=tight["store"])
    assert comp.measures["converged"].value == 0.0
    assert comp.runs[1]["status"] == "certificate_not_met"
