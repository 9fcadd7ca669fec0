"""Unit tests of the solver-agreement measures and verdict (solver/compare.py)."""

from __future__ import annotations

import json
import warnings
from dataclasses import replace

import numpy as np
import pytest

from solver.agreement import VERDICTS, Comparison, Tolerances, compare_results, compare_runs
from solver.errors import ConvergenceWarning, InvalidInputError, ProblemMismatchError
from solver.kernels import LinearKernel, PrecomputedKernel, RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification, index_features
from solver.qp import solve_qp
from solver.run import RunRecord
from solver.status import Status


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(7)


@pytest.fixture
def raw(rng):
    n, d = 80, 3
    X = rng.normal(size=(n, d)) * [1.0, 3.0, 0.5] + [2.0, -1.0, 0.0]
    labels = np.where(X[:, 0] - 2.0 + 0.3 * rng.normal(size=n) > 0, "pass", "fail")
    return X, labels


def make_run(X, labels, *, kernel=None, C=1.0, fingerprint="sha256:abc", **solve_opts):
    std = Standardiser.fit(X)
    Z = std.transform(X)
    prob = binary_classification(Z, labels, kernel=kernel or RBFKernel(gamma=0.3), C=C)
    res = solve_qp(prob, **solve_opts)
    data = {"fingerprint": fingerprint, "feature_names": [f"x{i}" for i in range(X.shape[1])],
            "label_name": "outcome", "n_rows": X.shape[0]}
    return RunRecord(problem=prob, result=res, data=data, standardiser=std)


@pytest.fixture
def run(raw):
    return make_run(*raw)


def with_result(rec: RunRecord, **changes) -> RunRecord:
    return replace(rec, result=replace(rec.result, **changes))


# --------------------------------------------------------------------------- identical


def test_identical_runs_agree(run):
    c = compare_runs(run, run)
    assert isinstance(c, Comparison)
    assert c.verdict == "agree" and c.agree and c.failed == () and c.failures == ()
    m = c.measures
    assert m["objective_rel_diff"].value == 0.0
    assert m["alpha_max_diff"].value == 0.0 and m["support_jaccard"].value == 1.0
    assert m["bias_diff"].value == 0.0 and m["decision_max_diff"].value == 0.0
    assert m["prediction_agreement"].value == 1.0 and m["converged"].value == 1.0
    assert c.runs[0]["duality_gap"] == run.result.certificate.duality_gap
    assert c.runs[1]["max_violation"] == run.result.certificate.max_violation
    assert c.override is None and c.mismatches == ()


def test_to_dict_is_plain_json_and_carries_every_tolerance(run):
    d = compare_runs(run, run).to_dict()
    text = json.dumps(d)
    assert '"verdict": "agree"' in text
    assert set(d["tolerances"]) == set(d["measures"])
    assert d["settings"] == Tolerances().to_dict()
    for m in d["measures"].values():
        assert {"value", "tolerance", "loose_tolerance", "rule", "passed"} <= set(m)


# --------------------------------------------------------------------------- tampering


def test_perturbed_alpha_disagrees_and_names_measures(run):
    alpha = run.result.alpha.copy()
    free = np.flatnonzero((alpha > 0.05) & (alpha < 0.95))
    i = int(free[0])
    j = int(next(k for k in free if run.problem.y[k] == run.problem.y[i] and k != i))
    alpha[i] += 0.05  # keeps yᵀα = 0 and the bounds, but is no longer optimal
    alpha[j] -= 0.05
    c = compare_runs(run, with_result(run, alpha=alpha))
    assert c.verdict == "disagree"
    assert "alpha_max_diff" in c.failed and "decision_max_diff" in c.failed
    assert "objective_rel_diff" in c.failed
    assert any(f.startswith("alpha_max_diff = 0.05") for f in c.failures)
    assert "alpha_max_diff" in c.verdict_text


def test_changed_bias_disagrees_and_names_bias(run):
    c = compare_runs(run, with_result(run, bias=run.result.bias + 0.1))
    assert c.verdict == "disagree"
    assert "bias_diff" in c.failed and "decision_max_diff" in c.failed
    assert "objective_rel_diff" not in c.failed  # the objective does not see b
    assert c.measures["bias_diff"].value == pytest.approx(0.1)
    assert "bias_diff = 0.1" in c.verdict_text


def test_small_bias_change_agrees_within_tolerances(run):
    c = compare_runs(run, with_result(run, bias=run.result.bias + 0.004))
    assert c.verdict == "agree_within_tolerances"
    assert set(c.failed) == {"bias_diff", "decision_max_diff"}
    assert "outside the strict tolerances" in c.verdict_text


def test_stale_certificate_is_not_trusted(run):
    # α changed but the certificate left untouched: the objective is recomputed from α.
    alpha = run.result.alpha.copy()
    alpha[np.argmax(alpha)] *= 0.5
    c = compare_runs(run, with_result(run, alpha=alpha))
    assert c.verdict == "disagree"
    assert "feasibility" in c.failed  # yᵀα ≠ 0 now
    assert c.runs[1]["dual_objective"] != c.runs[1]["certificate_dual_objective"]


def test_non_converged_run_cannot_agree(run):
    c = compare_runs(run, with_result(run, status=Status.ITERATION_LIMIT))
    assert c.verdict == "agree_within_tolerances"
    assert c.failed == ("converged",)
    assert any("did not converge" in n for n in c.notes)


def test_verdict_vocabulary(run):
    assert compare_runs(run, run).verdict in VERDICTS


# --------------------------------------------------------------------------- mismatch


@pytest.mark.parametrize("change, needle", [
    ({"C": 2.0}, "C: 1.0 vs 2.0"),
    ({"kernel": RBFKernel(gamma=0.5)}, "kernel:"),
    ({"kernel": LinearKernel()}, "kernel:"),
    ({"fingerprint": "sha256:other"}, "data fingerprint: 'sha256:abc' vs 'sha256:other'"),
])
def test_different_problems_are_refused(raw, run, change, needle):
    other = make_run(*raw, **change)
    with pytest.raises(ProblemMismatchError) as info:
        compare_runs(run, other)
    assert needle in str(info.value)
    assert "allow_mismatch" in str(info.value)


def test_different_labels_and_weights_are_refused(raw, run):
    X, labels = raw
    flipped = labels.copy()
    flipped[3] = "pass" if labels[3] == "fail" else "fail"
    with pytest.raises(ProblemMismatchError,
                       match=r"labels \(y\): differ in 1 row\(s\), first row 3"):
        compare_runs(run, make_run(X, flipped))
    std = Standardiser.fit(X)
    prob = binary_classification(std.transform(X), labels, kernel=RBFKernel(gamma=0.3), C=1.0,
                                 class_weight={"pass": 2.0})
    weighted = replace(run, problem=prob, result=solve_qp(prob))
    with pytest.raises(ProblemMismatchError, match="class weight.*upper bounds"):
        compare_runs(run, weighted)


def test_forced_comparison_says_the_problems_differ(raw, run):
    other = make_run(*raw, C=1.000001)
    c = compare_runs(run, other, allow_mismatch=True)
    assert c.verdict != "agree"
    assert c.override is not None and "C: 1.0 vs 1.000001" in c.override
    assert "NOTE: the problems differ" in c.verdict_text
    assert c.to_dict()["mismatches"]


def test_forced_comparison_of_different_sizes(raw, run):
    X, labels = raw
    small = make_run(X[:50], labels[:50])
    c = compare_runs(run, small, allow_mismatch=True)
    assert c.measures["alpha_max_diff"].value is None and "alpha_max_diff" in c.failed
    assert c.verdict == "disagree"
    assert any("per-row measures not computed" in n for n in c.notes)


# --------------------------------------------------------------------------- held-out rows


def test_holdout_measures_use_each_runs_standardiser(raw, run, rng):
    X, _ = raw
    H = rng.normal(size=(25, 3)) * [1.0, 3.0, 0.5] + [2.0, -1.0, 0.0]
    c = compare_runs(run, run, holdout_X=H)
    assert c.n_holdout == 25 and c.measures["decision_max_diff_holdout"].value == 0.0
    shifted = with_result(run, bias=run.result.bias + 0.02)
    c2 = compare_runs(run, shifted, holdout_X=H)
    assert c2.measures["decision_max_diff_holdout"].value == pytest.approx(0.02)
    # decision values computed by hand: standardise with the run's standardiser, f = Σ αyK + b
    Z = run.standardiser.transform(H)
    K = run.problem.kernel.block(Z, run.problem.X)
    f = K @ (run.result.alpha * run.problem.y) + run.result.bias
    Kt = run.problem.kernel.block(run.problem.X, run.problem.X)
    assert np.all(np.isfinite(f)) and Kt.shape == (80, 80)
    flipped = with_result(run, bias=run.result.bias - 2 * f.max() - 1.0)
    c3 = compare_runs(run, flipped, holdout_X=H)
    expected = float(np.mean(f <= 0))  # rows predicted negative by both
    assert c3.measures["prediction_agreement_holdout"].value == pytest.approx(expected)


def test_bad_holdout_rows(run):
    with pytest.raises(InvalidInputError, match="4 columns; run A was trained on 3"):
        compare_runs(run, run, holdout_X=np.zeros((5, 4)))
    bad = np.zeros((5, 3))
    bad[2, 1] = np.nan
    with pytest.raises(InvalidInputError, match="row 2, column 1"):
        compare_runs(run, run, holdout_X=bad)


def test_precomputed_kernel_holdout_refused():
    n = 8
    rng = np.random.default_rng(1)
    B = rng.normal(size=(n, 3))
    kern = PrecomputedKernel(gram_matrix=B @ B.T)
    prob = binary_classification(index_features(n), [0, 1] * 4, kernel=kern, C=1.0)
    rec = RunRecord(problem=prob, result=solve_qp(prob), data={"fingerprint": "f"},
                    standardiser=Standardiser.identity(1))
    assert compare_runs(rec, rec).verdict == "agree"
    with pytest.raises(InvalidInputError, match="precomputed kernel"):
        compare_runs(rec, rec, holdout_X=np.zeros((2, 1)))


# --------------------------------------------------------------------------- non-unique optimum


def test_non_unique_alpha_is_waived_not_hidden(rng):
    # Two identical rows with the same label: any split of their combined multiplier is
    # optimal, the model is the same.  α differs, the verdict still agrees, with a note.
    X = rng.normal(size=(30, 2))
    labels = np.where(X[:, 0] + 0.5 * rng.normal(size=30) > 0, 1, -1)
    first = solve_qp(binary_classification(X, labels, kernel=LinearKernel(), C=1.0))
    c0 = first.certificate
    i = int(np.flatnonzero(~c0.at_lower & ~c0.at_upper)[0])  # a free support vector
    j = int(np.flatnonzero(c0.at_lower & (labels == labels[i]))[0])  # a non-support point
    X[j] = X[i]
    prob = binary_classification(X, labels, kernel=LinearKernel(), C=1.0)
    res = solve_qp(prob)
    a = res.alpha.copy()
    total = a[i] + a[j]
    assert 0.0 < total < 1.0
    a[i], a[j] = total, 0.0
    if abs(res.alpha[i] - total) < 0.01:
        a[i], a[j] = 0.0, total
    rec = RunRecord(problem=prob, result=res, data={"fingerprint": "f"},
                    standardiser=Standardiser.identity(2))
    c = compare_runs(rec, with_result(rec, alpha=a))
    assert c.measures["alpha_max_diff"].value > 1e-3
    assert c.measures["alpha_max_diff"].waived and c.measures["alpha_max_diff"].passed
    assert c.verdict == "agree"
    assert any("not unique" in n for n in c.notes)
    # plus a small real change of the model (between the strict and loose decision
    # tolerances): α is then waived only at the loose level
    k = i if a[i] > 0 else j  # the duplicate now holding the multiplier
    p = int(np.flatnonzero(c0.at_lower & (labels != labels[i]))[0])  # a point off the margin
    direction = np.eye(prob.n)[p] + np.eye(prob.n)[k]  # keeps yᵀα = 0 (opposite labels)
    step = 5e-3 / np.max(np.abs(prob.q_times(direction)))
    a2 = a + step * direction
    c3 = compare_runs(rec, with_result(rec, alpha=a2))
    m = c3.measures["alpha_max_diff"]
    assert m.waived and not m.passed and m.passed_loose
    assert c3.verdict == "agree_within_tolerances"
    assert "decision_max_diff" in c3.failed and "alpha_max_diff" in c3.failed
    # the same move beyond the box is infeasible and is not waived away
    b = res.alpha.copy()
    b[i], b[j] = total + 0.5, -0.5
    c2 = compare_runs(rec, with_result(rec, alpha=b))
    assert c2.verdict == "disagree" and "feasibility" in c2.failed


# --------------------------------------------------------------------------- tolerances


def test_tolerances_validation_and_mapping():
    t = Tolerances.from_mapping({"bias_diff": 1e-4})
    assert t.bias_diff == 1e-4 and t.bias_diff_loose == Tolerances().bias_diff_loose
    with pytest.raises(InvalidInputError, match="unknown tolerance"):
        Tolerances.from_mapping({"bias": 1.0})
    with pytest.raises(InvalidInputError, match="finite and >= 0"):
        Tolerances(objective_rel_diff=-1.0)
    with pytest.raises(InvalidInputError, match="must not exceed"):
        Tolerances(bias_diff=0.5)
    with pytest.raises(InvalidInputError, match="support_jaccard"):
        Tolerances(support_jaccard=0.5)
    with pytest.raises(InvalidInputError, match="must be a number"):
        Tolerances(bias_diff="0.1")  # type: ignore[arg-type]


def test_every_tolerance_is_documented():
    import importlib

    mod = importlib.import_module("solver.agreement")
    src = open(mod.__file__, encoding="utf-8").read()
    for name in Tolerances().to_dict():
        block = src.split(f"    {name}: float = ", 1)[1].split("\n", 2)[1]
        assert block.strip().startswith('"""'), name


def test_tolerances_change_the_verdict(run):
    shifted = with_result(run, bias=run.result.bias + 0.004)
    loose = Tolerances(bias_diff=0.01, decision_max_diff=0.01)
    assert compare_runs(run, shifted, tolerances=loose).verdict == "agree"
    c = compare_runs(run, shifted, tolerances={"bias_diff_loose": 0.002, "bias_diff": 0.001})
    assert c.verdict == "disagree"
    assert c.to_dict()["settings"]["bias_diff_loose"] == 0.002


def test_compare_results_lower_level(run):
    c = compare_results(run.problem, run.result, run.problem, run.result)
    assert c.verdict == "agree" and c.runs[0]["fingerprint"] is None


def test_non_run_input_refused(run):
    with pytest.raises(InvalidInputError, match="RunRecord"):
        compare_runs(run, run.result)  # type: ignore[arg-type]


def test_qp_iteration_limit_run_versus_converged(raw, run):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        early = make_run(*raw, iteration_limit=3)
    c = compare_runs(run, early)
    assert c.verdict == "disagree"
    assert "converged" in c.failed and "objective_rel_diff" in c.failed


def test_loosely_solved_run_gets_a_hint(raw):
    loose = make_run(*raw, kkt_tol=0.05)
    c = compare_runs(loose, with_result(loose, bias=loose.result.bias + 0.004))
    assert c.verdict == "agree_within_tolerances"
    assert any("tighter kkt_tol" in n for n in c.notes)
    assert not any("tighter kkt_tol" in n for n in compare_runs(loose, loose).notes)
