"""What-if re-solves, resuming a stopped run, and ``kktrace diagnose`` / ``kktrace resume``."""

from __future__ import annotations

import builtins
import json
import math
import pickle
import warnings

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer

import solver
from solver.agreement import compare_runs
from solver.cli import main
from solver.hard import hard_problem
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.resolve import parse_change, resume, what_if
from solver.run import RunRecord
from solver.smo import solve_smo
from solver.store import RunStore


def _solve(problem, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return solve_smo(problem, **options)


def _breast_cancer(C=10.0):
    # scikit-learn's bundled copy of the UCI Wisconsin breast cancer data
    X, y = load_breast_cancer(return_X_y=True)
    std = Standardiser.fit(X)
    return binary_classification(std.transform(X), y, kernel=RBFKernel(), C=C), std


def _saved(store, problem, std, data=None, **options):
    rec = RunRecord(problem=problem, result=_solve(problem, **options),
                    data=data or {"fingerprint": "test", "feature_names": None}, standardiser=std)
    return store.save(rec)


def test_parse_change_accepts_the_documented_changes_and_refuses_others():
    assert parse_change("standardise") == ("standardise", True)
    assert parse_change("gamma=0.5") == ("gamma", 0.5)
    assert parse_change("selection=first_order") == ("selection", "first_order")
    assert parse_change("shrinking=off") == ("shrinking", False)
    for bad in ("standardize", "C=-1", "C=abc", "gamma=inf", "selection=third", "shrinking=no",
                "standardise=1"):
        with pytest.raises(solver.InvalidInputError):
            parse_change(bad)


def test_what_if_standardising_the_unscaled_problem_needs_fewer_iterations(tmp_path):
    hp = hard_problem("unscaled_features", 200)
    store = RunStore(tmp_path / "s")
    run = _saved(store, hp.problem, hp.standardiser, hp.data, **hp.solve_options)
    w = what_if(run, "standardise", store=store)
    print(f"unscaled run: {w.base['iterations']} iterations, status {w.base['status']}; "
          f"standardised: {w.changed['iterations']} iterations, status {w.changed['status']}")
    assert w.changed["status"] == "converged"
    assert w.changed["iterations"] < w.base["iterations"]
    assert not w.same_problem and w.comparison is None
    assert w.record.parent_id == run
    assert not np.allclose(w.record.standardiser.scale, 1.0)


def test_what_if_same_problem_gives_an_agreement_verdict():
    problem, std = _breast_cancer(C=1.0)
    rec = RunRecord(problem=problem, result=_solve(problem, kkt_tol=1e-6), data={},
                    standardiser=std)
    w = what_if(rec, "selection=first_order")
    assert w.same_problem and w.comparison.verdict == "agree"
    assert w.changed["options"]["selection"] == "first_order"
    w2 = what_if(rec, "C=0.5")
    assert w2.record.problem.info["C"] == 0.5
    assert np.all(w2.record.problem.upper == 0.5)


def test_resume_from_30_percent_reaches_the_cold_optimum(tmp_path):
    problem, std = _breast_cancer(C=10.0)
    store = RunStore(tmp_path / "s")
    kkt_tol = 1e-5
    cold = _solve(problem, kkt_tol=kkt_tol)
    n_cold = cold.iterations
    stopped = _saved(store, problem, std, kkt_tol=kkt_tol, iteration_limit=int(0.3 * n_cold))
    out = resume(stopped, store=store, iteration_limit=10 * n_cold)
    child = store.load(out.run_id)
    assert child.parent_id == stopped
    assert out.status == ("iteration_limit", "converged")
    assert child.result.certificate.max_violation <= kkt_tol
    verdict = compare_runs(RunRecord(problem=problem, result=cold, data={"fingerprint": "test",
                                                                        "feature_names": None},
                                     standardiser=std), child).verdict
    # the warm start rebuilds the gradient from α: one kernel row per support vector,
    # the rows of about n_support / 2 SMO iterations (two rows each)
    rebuild = math.ceil(cold.certificate.n_support / 2)
    total = sum(out.iterations)
    print(f"cold {n_cold} iterations; stopped at {out.iterations[0]}, resumed "
          f"{out.iterations[1]}: total {total} (allowance {n_cold} + {rebuild}); "
          f"verdict {verdict}")
    assert verdict == "agree"
    assert total <= n_cold + rebuild


def test_resume_refuses_a_converged_run(tmp_path):
    problem, std = _breast_cancer(C=1.0)
    store = RunStore(tmp_path / "s")
    run = _saved(store, problem, std)
    with pytest.raises(solver.InvalidInputError, match="converged"):
        resume(run, store=store)


def test_diagnose_cli_text_json_and_what_if(tmp_path, capsys):
    hp = hard_problem("overlap_large_c", 150)
    store = tmp_path / "s"
    run = _saved(RunStore(store), hp.problem, hp.standardiser, hp.data,
                 iteration_limit=5000)
    assert main(["diagnose", run, "--store", str(store)]) == 0
    text = capsys.readouterr().out
    assert "STOP" in text and "not_converged" in text and "penalty_large" in text
    assert "not a validation sign-off" in text
    assert main(["diagnose", run, "--store", str(store), "--json", "--try", "C=1"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert "penalty_large" in [f["code"] for f in d["findings"]]
    assert d["what_if"][0]["changed"]["status"] == "converged"
    assert main(["diagnose", run, "--store", str(store), "--try", "C=zero"]) == 1
    assert "change C needs" in capsys.readouterr().err


def test_diagnose_cli_trace_off_names_what_needs_the_trace(tmp_path, capsys):
    hp = hard_problem("overlap_large_c", 150)
    store = tmp_path / "s"
    run = _saved(RunStore(store), hp.problem, hp.standardiser, hp.data,
                 iteration_limit=5000, trace="off")
    assert main(["diagnose", run, "--store", str(store)]) == 0
    text = capsys.readouterr().out
    for code in ("stall", "cycling", "long_plateau", "objective_increase"):
        assert f"not checked: {code} — needs the trace" in text
    assert "penalty_large" in text


def test_resume_cli_exit_status_and_child(tmp_path, capsys):
    problem, std = _breast_cancer(C=10.0)
    store = tmp_path / "s"
    run = _saved(RunStore(store), problem, std, iteration_limit=50)
    assert main(["resume", run, "--store", str(store), "--iteration-limit", "10"]) == 3
    capsys.readouterr()
    # without --iteration-limit the continuation gets the stopped run's budget again (50)
    assert main(["resume", run, "--store", str(store), "--json"]) == 3
    assert json.loads(capsys.readouterr().out)["iterations"]["resumed"] == 50
    assert main(["resume", run, "--store", str(store), "--json", "--iteration-limit",
                 "100000"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["parent_id"] == run and d["converged"] and d["iterations"]["parent"] == 50
    assert main(["resume", "20990101T000000000000Z-000000000000", "--store", str(store)]) == 1


def test_diagnosing_never_executes_stored_content(tmp_path, monkeypatch):
    hp = hard_problem("conflicting_duplicates", 120)
    store = RunStore(tmp_path / "s")
    marker = tmp_path / "executed"
    hostile = f"__import__('os').system('touch {marker}')"
    rec = RunRecord(problem=hp.problem, result=_solve(hp.problem),
                    data={**hp.data, "source": f"$(touch {marker})", "label_name": hostile},
                    standardiser=hp.standardiser, attachments={"command": {"python": hostile,
                                                                           "text": hostile}})
    run = store.save(rec)

    def refuse(*a, **k):
        raise AssertionError("stored content was evaluated or unpickled")

    for mod, name in ((builtins, "eval"), (builtins, "exec"), (pickle, "loads"),
                      (pickle, "load")):
        monkeypatch.setattr(mod, name, refuse)
    d = solver.diagnose(run, store=store)
    assert "conflicting_duplicates" in d.codes
    assert not marker.exists()


def test_report_has_a_diagnosis_section_in_every_format():
    import jsonschema

    from solver.reporting import build_report_content, render_report
    from solver.reporting.summary import load_schema, summary_dict

    hp = hard_problem("overlap_large_c", 150)
    rec = RunRecord(problem=hp.problem, result=_solve(hp.problem, iteration_limit=5000,
                                                      trace="off"),
                    data=hp.data, standardiser=hp.standardiser)
    content = build_report_content([rec])
    doc = summary_dict(content)
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)
    diag = doc["runs"][0]["diagnosis"]
    assert "penalty_large" in [f["code"] for f in diag["findings"]]
    assert "stall" in diag["skipped"]
    html = render_report(content, "html").decode()
    assert "Diagnosis" in html and "penalty_large" in html and "Not checked: stall" in html
    assert render_report(content, "pdf").startswith(b"%PDF")


def test_overlay_of_smo_runs_and_figure_file(tmp_path, capsys):
    problem, std = _breast_cancer(C=1.0)
    store = tmp_path / "s"
    st = RunStore(store)
    a = _saved(st, problem, std, kkt_tol=1e-5)
    b = _saved(st, problem, std, kkt_tol=1e-5, selection="first_order")
    d = solver.overlay([a, b], store=st, out=tmp_path / "conv.svg")
    assert [r["run_id"] for r in d["runs"]] == [a, b]
    for r in d["runs"]:
        assert r["iterations"][-1] == st.load(r["run_id"]).result.iterations
        v = np.asarray(r["violation"])
        assert np.all(np.diff(v) <= 0)  # best-so-far never rises
        assert r["objective_gap"][-1] <= 1e-6
        assert r["seconds"] == sorted(r["seconds"])
    # D* is the best rebuilt objective; the trace holds the incremental one (rounding apart)
    assert min(r["objective_gap"][-1] for r in d["runs"]) == pytest.approx(0.0, abs=1e-12)
    assert (tmp_path / "conv.svg").read_text().lstrip().startswith("<?xml")
    assert "estimated" in d["seconds_note"]
    assert main(["overlay", a, b, "--store", str(store), "--out", str(tmp_path / "c.png")]) == 0
    assert (tmp_path / "c.png").read_bytes()[:4] == b"\x89PNG"
    assert "seconds are estimated" in capsys.readouterr().out
    assert main(["overlay", a, b, "--store", str(store), "--out", str(tmp_path / "c.gif")]) == 1
    assert ".png" in capsys.readouterr().err
    assert main(["overlay", a, "--store", str(store)]) == 1
    other, std2 = _breast_cancer(C=2.0)
    c = _saved(st, other, std2)
    assert main(["overlay", a, c, "--store", str(store)]) == 1
    assert "different problems" in capsys.readouterr().err


def test_report_of_two_runs_shows_them_side_by_side():
    import jsonschema

    from solver.reporting import build_report_content, render_report
    from solver.reporting.summary import load_schema, summary_dict

    problem, std = _breast_cancer(C=1.0)
    recs = [RunRecord(problem=problem, result=_solve(problem, selection=sel), data={},
                      standardiser=std) for sel in ("second_order", "first_order")]
    content = build_report_content(recs)
    assert content.overlay is not None and len(content.overlay.data["runs"]) == 2
    doc = summary_dict(content)
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)
    assert [r["label"] for r in doc["overlay"]["runs"]] == ["run A", "run B"]
    assert "estimated" in doc["overlay"]["seconds_note"]
    assert "Convergence of the runs side by side" in render_report(content, "html").decode()
    other, _ = _breast_cancer(C=3.0)
    mixed = build_report_content([recs[0], RunRecord(problem=other, result=_solve(other),
                                                     data={}, standardiser=std)])
    assert mixed.overlay is None and "different problems" in mixed.overlay_note
    assert build_report_content(recs[:1]).overlay is None
