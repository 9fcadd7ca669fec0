"""Diagnosis of runs: the hard-problem suite, a well-posed problem, series checks, trace off."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.datasets import load_breast_cancer

from solver.audit import audit_kernel
from solver.diagnosis import FINDING_CODES, NO_FINDING, _series, diagnose
from solver.hard import HARD_PROBLEMS, hard_problem
from solver.kernels import LinearKernel, RBFKernel
from solver.model import Standardiser
from solver.plaindata import to_plain
from solver.problem import binary_classification
from solver.run import RunRecord
from solver.smo import solve_smo

#: sizes at which the suite finishes quickly (class_imbalance needs ~100 rows per positive)
SIZES = {"class_imbalance": 505}


def _record(problem, std, data, *, audit=True, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve_smo(problem, **options)
    att = {"audit": to_plain(audit_kernel(problem.kernel, problem.X).to_dict())} if audit else {}
    return RunRecord(problem=problem, result=result, data=data, standardiser=std,
                     attachments=att)


def _hard_record(name, **options):
    hp = hard_problem(name, SIZES.get(name, 200))
    return hp, _record(hp.problem, hp.standardiser, hp.data, **{**hp.solve_options, **options})


@pytest.mark.parametrize("name", list(HARD_PROBLEMS))
def test_every_generator_triggers_its_expected_finding(name):
    hp, rec = _hard_record(name)
    d = diagnose(rec)
    print(name, rec.result.iterations, rec.result.status.label, d.codes)
    assert set(hp.expected) <= set(d.codes), (name, d.codes)
    for f in d.findings:
        assert f.code in FINDING_CODES and f.summary and f.action


def _breast_cancer_record(**options):
    # scikit-learn's bundled copy of the UCI Wisconsin breast cancer data (569 rows)
    X, y = load_breast_cancer(return_X_y=True)
    std = Standardiser.fit(X)
    problem = binary_classification(std.transform(X), y, kernel=RBFKernel(), C=1.0)
    data = {"fingerprint": "breast_cancer", "feature_names": [f"f{k}" for k in range(30)],
            "label_name": "y", "source": None, "warnings": [], "n_rows": 569}
    return _record(problem, std, data, **options)


def test_well_posed_problem_has_no_stop_finding():
    d = diagnose(_breast_cancer_record())
    print(d.codes, d.statement())
    assert d.status == "converged"
    assert d.worst() != "stop"
    assert not {"not_converged", "numerical_drift", "stall", "cycling"} & set(d.codes)


def test_no_finding_is_said_plainly():
    g = np.random.default_rng(3)
    X = g.normal(size=(120, 2))
    y = np.where(X[:, 0] > 0, 1, -1)
    problem = binary_classification(X, y, kernel=LinearKernel(), C=1.0)
    d = diagnose(_record(problem, Standardiser.identity(2), {"feature_names": ["a", "b"]}))
    assert d.findings == () and d.statement() == NO_FINDING
    assert d.to_dict()["statement"].startswith("no finding")


def test_trace_off_names_the_checks_that_need_the_trace():
    hp, rec = _hard_record("overlap_large_c", trace="off")
    d = diagnose(rec)
    needs = {c for c, (_, part) in FINDING_CODES.items() if part in ("trace", "full")}
    assert set(d.skipped) == needs
    assert all("needs the trace" in why for why in d.skipped.values())
    assert "penalty_large" in d.codes and "not_converged" in d.codes
    assert d.phases == ()


def test_sampled_trace_skips_cycling_only():
    hp, rec = _hard_record("unscaled_features", trace="sampled")
    d = diagnose(rec)
    assert set(d.skipped) == {"cycling"}
    assert "stall" in d.codes


def test_phases_split_a_made_up_series():
    # hand-made series: objective falls 90 % within 100 iterations, then a long flat
    # violation, then a last decade in the final 50 iterations
    it = np.arange(1, 1201)
    obj = np.concatenate([np.linspace(0, -90, 100), np.linspace(-90, -99, 1000),
                          np.linspace(-99, -100, 100)])
    viol = np.concatenate([np.geomspace(10, 1.0, 100), np.full(1050, 0.9),
                           np.geomspace(0.9, 0.01, 50)])
    ph, finding, _ = _series.phases(it, viol, obj, kkt_tol=0.01)
    names = [p.name for p in ph]
    assert names == ["fast_decrease", "plateau", "final_tail"]
    fast, plateau, tail = ph
    assert fast.last == 100 and plateau.first == 101
    assert tail.last == 1200 and tail.first > 1150
    assert sum(p.iterations for p in ph) == 1200
    assert finding is not None and finding.code == "long_plateau"


def test_stall_window_and_dominant_rows():
    n = 6000
    it = np.arange(1, n + 1)
    viol = np.concatenate([np.geomspace(10, 1, 1000), np.full(n - 1000, 0.95)])
    wi = np.where(it > 1000, 7, it % 50).astype(np.int32)
    wj = np.where(it > 1000, 9, 50 + it % 50).astype(np.int32)
    f, stretch, checks = _series.stall(it, viol, wi, wj, kkt_tol=1e-3)
    assert checks["window"] == 1000 and checks["factor"] == 2.0
    assert f is not None and f.evidence["last"] == n
    assert f.evidence["first"] <= 1001
    assert [r["row"] for r in f.evidence["dominant_rows"][:2]] == [7, 9]
    # the same series falling steadily by 10× every 1000 iterations does not stall
    f2, _, _ = _series.stall(it, np.geomspace(10, 1e-5, n), wi, wj, kkt_tol=1e-9)
    assert f2 is None


def test_cycling_names_pairs_and_their_relation():
    it = np.arange(1, 1001)
    wi = np.where(it % 2 == 0, 3, 5).astype(np.int32)
    wj = np.where(it % 2 == 0, 4, 1).astype(np.int32)
    # a converged run without a stall is not checked; a stopped one is (its last tenth is
    # below the window minimum here, so the whole series is taken as the stall stretch)

    def facts(i, j):
        return {"relation": "exact duplicate, opposite labels" if (i, j) == (3, 4) else
                "distinct"}

    assert _series.cycling(it, wi, wj, None, facts, converged=True)[0] is None
    f, _ = _series.cycling(it, wi, wj, (0, 999), facts, converged=True)
    assert f is not None
    assert [(p["i"], p["j"]) for p in f.evidence["pairs"]] == [(1, 5), (3, 4)]
    assert f.evidence["pairs"][1]["relation"].startswith("exact duplicate")


def test_objective_rise_found():
    it = np.arange(1, 6)
    f, checks = _series.objective_increase(it, np.array([0.0, -1.0, -2.0, -1.5, -3.0]))
    assert f is not None and f.evidence["at_iteration"] == 4 and checks["rises"] == 1
    assert _series.objective_increase(it, -np.arange(5.0))[0] is None


def test_drift_is_found_when_the_stored_certificate_is_stale():
    from dataclasses import replace

    rec = _breast_cancer_record()
    cert = rec.result.certificate
    stale = replace(cert, m_up=cert.m_up + 0.5, max_violation=cert.max_violation)
    bad = RunRecord(problem=rec.problem, result=replace(rec.result, certificate=stale),
                    data=rec.data, standardiser=rec.standardiser)
    d = diagnose(bad)
    assert "numerical_drift" in d.codes
    f = next(f for f in d.findings if f.code == "numerical_drift")
    assert f.evidence["gradient_difference_lower_bound"] == pytest.approx(0.5, rel=1e-6)
    assert "numerical_drift" not in diagnose(rec).codes


@settings(derandomize=True, max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(3, 400), st.integers(1, 5), st.integers(0, 2**31 - 1))
def test_phases_partition_the_run_for_any_series(rows, step, seed):
    """Property: the phases are contiguous, in order, and cover iterations 1..last exactly
    (sampled traces too: rows every ``step`` iterations)."""
    g = np.random.default_rng(seed)
    it = np.arange(1, rows + 1) * step
    viol = np.exp(g.normal(size=rows).cumsum() * 0.3)
    obj = -np.abs(g.normal(size=rows)).cumsum()
    ph, _, _ = _series.phases(it, viol, obj, kkt_tol=1e-3)
    assert ph and ph[0].first == 1 and ph[-1].last == it[-1]
    assert [p.name for p in ph] == sorted((p.name for p in ph),
                                         key=["fast_decrease", "plateau", "final_tail"].index)
    for a, b in zip(ph, ph[1:], strict=False):
        assert b.first == a.last + 1
    assert sum(p.iterations for p in ph) == it[-1]


def test_cli_diagnose_of_a_trained_trace_off_run(tmp_path, capsys):
    from solver.cli import main

    store = tmp_path / "s"
    data = Path(__file__).resolve().parents[1] / "solver" / "data" / "tablet_coating.csv"
    assert main(["train", str(data), "--label", "lab_decision",
                 "--C", "1000", "--iteration-limit", "200", "--trace", "off", "--store",
                 str(store), "--quiet", "--json"]) == 3
    import json

    run = json.loads(capsys.readouterr().out)["run_id"]
    assert main(["diagnose", run, "--store", str(store), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["trace_level"] == "off" and d["phases"] == []
    assert {"stall", "cycling", "long_plateau", "objective_increase"} == set(d["skipped"])
    assert d["findings"][0]["code"] == "not_converged"
    assert "not a validation sign-off" in d["caution"]


def test_suggested_changes_run_as_what_ifs():
    """Each finding's ``try`` is a change the what-if accepts, and re-solving with the
    suggestion for γ = 10³ removes the near-identity finding."""
    from solver.resolve import parse_change, what_if

    hp, rec = _hard_record("gamma_huge")
    d = diagnose(rec)
    f = next(f for f in d.findings if f.code == "kernel_near_identity")
    assert f.try_change == "gamma=1"
    parse_change(f.try_change)
    w = what_if(rec, f.try_change)
    assert "kernel_near_identity" not in diagnose(w.record).codes
    _, rec1 = _hard_record("overlap_large_c", selection="first_order")
    stall = next(f for f in diagnose(rec1).findings if f.code == "stall")
    assert stall.try_change == "selection=second_order"
