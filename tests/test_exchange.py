"""Model exchange: ONNX export checked by two evaluators nobody here wrote, and the challenge
of models trained elsewhere.

Outside references: onnxruntime and the ``onnx`` package's reference evaluator (two
independent evaluators of the ONNX ``ai.onnx.ml`` SVM operators); ``onnx.checker``;
scikit-learn's SVC fitted on bundled breast cancer (Street, Wolberg & Mangasarian 1993) and
wine (Forina et al.) and converted by skl2onnx (a general-purpose converter) — test
dependencies only.
"""

from __future__ import annotations

import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

onnx = pytest.importorskip("onnx")
pytest.importorskip("onnx.reference")
ort = pytest.importorskip("onnxruntime")

from solver.errors import InvalidInputError  # noqa: E402
from solver.exchange.challenge import challenge  # noqa: E402
from solver.exchange.export import NEAR_ZERO, build_onnx, check_onnx  # noqa: E402
from solver.kernels import PrecomputedKernel, make_kernel  # noqa: E402
from solver.model import Standardiser, model_from_solution  # noqa: E402
from solver.problem import binary_classification  # noqa: E402
from solver.run import RunRecord  # noqa: E402
from solver.solvers import solve  # noqa: E402


def _bc():
    from sklearn.datasets import load_breast_cancer

    return load_breast_cancer(return_X_y=True)


def _record(X, labels, kernel, C=1.0, positive=None) -> RunRecord:
    std = Standardiser.fit(X)
    prob = binary_classification(std.transform(X), labels, kernel=kernel, C=C,
                                 positive_label=positive)
    res = solve(prob, method="smo", kkt_tol=1e-5)
    return RunRecord(problem=prob, result=res, data={"fingerprint": "x" * 64},
                     standardiser=std)


KERNELS = [("linear", {}), ("poly", {"gamma": 0.05, "degree": 2, "offset": 1.0}),
           ("rbf", {"gamma": 0.03}), ("sigmoid", {"gamma": 0.01, "offset": -0.5})]


@pytest.mark.parametrize("name,params", KERNELS)
@pytest.mark.parametrize("positive", ["malignant", "benign"])
def test_binary_export_matches_both_evaluators(name, params, positive):
    """Both label orders: the runtime votes for the first listed class when its pair value
    is > 0 (ONNX Operators-ml.md, SVMClassifier), so the exported signs must follow ours."""
    X, y = _bc()
    labels = np.where(y == 1, "benign", "malignant")
    rec = _record(X, labels, make_kernel(name, **params), positive=positive)
    data = build_onnx(rec)
    onnx.checker.check_model(onnx.load_from_string(data), full_check=True)
    check = check_onnx(rec, data)
    assert check.passed
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    raw = rec.problem.X * rec.standardiser.scale + rec.standardiser.centre
    ours = model.values(raw)
    sess = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    label, scores = sess.run(None, {"features": raw.astype(np.float32)})
    theirs = scores[:, 0].astype(np.float64)
    assert np.max(np.abs(theirs - ours)) <= 1e-4 * max(1.0, np.max(np.abs(ours)))
    away = np.abs(ours) >= NEAR_ZERO
    assert np.array_equal(np.asarray(label)[away], model.classify(raw)[away].astype(str))
    assert check.evaluators["onnx_reference"]["training"]["max_rel_diff"] <= 1e-4


def test_integer_labels_are_written_as_integers():
    X, y = _bc()
    rec = _record(X, y, make_kernel("rbf", gamma=0.03))
    m = onnx.load_from_string(build_onnx(rec))
    node = next(n for n in m.graph.node if n.op_type == "SVMClassifier")
    names = {a.name for a in node.attribute}
    assert "classlabels_ints" in names and "classlabels_strings" not in names
    assert check_onnx(rec, build_onnx(rec)).passed


def test_export_refuses_what_the_standard_cannot_express(rng):
    X = rng.normal(size=(20, 2))
    labels = np.where(X[:, 0] > 0, 1, -1)
    gram = X @ X.T
    from solver.problem import index_features

    prob = binary_classification(index_features(20), labels, kernel=PrecomputedKernel(gram))
    rec = RunRecord(problem=prob, result=solve(prob, method="smo"), data={},
                    standardiser=Standardiser.identity(1))
    with pytest.raises(InvalidInputError, match="precomputed kernel cannot be expressed"):
        build_onnx(rec)


# --------------------------------------------------------------------------- challenge


def _fit_and_convert(X, labels, tmp: Path, *, C=1.0, gamma=0.03, kernel="rbf") -> Path:
    from skl2onnx import to_onnx
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
    from sklearn.svm import SVC

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pipe = make_pipeline(StandardScaler(), SVC(C=C, kernel=kernel, gamma=gamma, tol=1e-3,
                                                   decision_function_shape="ovo"))
        pipe.fit(X, labels)
        onx = to_onnx(pipe, X[:1].astype(np.float32),
                      target_opset={"": 17, "ai.onnx.ml": 1},
                      options={id(pipe[-1]): {"zipmap": False}})
    path = tmp / "external.onnx"
    path.write_bytes(onx.SerializeToString())
    return path


def _csv(X, labels, path: Path) -> Path:
    cols = [f"f{j}" for j in range(X.shape[1])]
    lines = [",".join(cols + ["label"])]
    lines += [",".join([repr(float(v)) for v in row] + [str(lab)])
              for row, lab in zip(X, labels, strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_challenge_of_a_model_trained_elsewhere_binary(tmp_path):
    X, y = _bc()
    labels = np.where(y == 1, "benign", "malignant")
    model = _fit_and_convert(X, labels, tmp_path)
    data = _csv(X, labels, tmp_path / "bc.csv")
    out = challenge(model, data, label="label", C=1.0, store=tmp_path / "store")
    assert len(out.pairs) == 1
    p = out.pairs[0]
    # scikit-learn's SVC stops at its own tol 1e-3 on the same maximal-violation test
    assert p.optimal and p.certificate["max_violation"] <= p.kkt_tol
    assert p.float32_allowance > 0 and p.kkt_tol > 1e-3
    assert set(p.verdicts) == {"smo", "qp"}
    assert all(v in ("agree", "agree_within_tolerances") for v in p.verdicts.values())
    assert p.matched > 0 and not p.findings
    # the external run is a run like any other: it verifies against itself and reports
    from solver.api import report
    from solver.store import RunStore

    store = RunStore(tmp_path / "store")
    v = store.verify(p.external_run)
    assert v.ok, v.problems
    rec = store.load(p.external_run)
    assert rec.result.solver == "external"
    written = report([p.external_run, p.fresh_runs["smo"]], store=store,
                     out_dir=tmp_path / "report", formats=("json",))
    assert Path(written["json"]).exists()


def test_challenge_of_a_three_class_model(tmp_path):
    from sklearn.datasets import load_wine

    X, y = load_wine(return_X_y=True)
    labels = np.array([f"c{v}" for v in y])
    model = _fit_and_convert(X, labels, tmp_path, gamma=0.05)
    out = challenge(model, _csv(X, labels, tmp_path / "w.csv"), label="label", C=1.0,
                    store=tmp_path / "store")
    assert [(p.positive, p.negative) for p in out.pairs] == [("c0", "c1"), ("c0", "c2"),
                                                             ("c1", "c2")]
    assert out.optimal
    assert out.verdict in ("agree", "agree_within_tolerances")


def _perturb_one_free_coefficient(path: Path, factor: float) -> int:
    """Move one free multiplier (0 < |coef| < C) by ``factor``; return its position."""
    m = onnx.load(str(path))
    node = next(n for n in m.graph.node if n.op_type == "SVMClassifier")
    attr = next(a for a in node.attribute if a.name == "coefficients")
    coef = np.array(attr.floats)
    free = np.flatnonzero((np.abs(coef) > 1e-3) & (np.abs(coef) < 0.999))
    k = int(free[0])
    attr.floats[k] = float(coef[k] * factor)
    path.write_bytes(m.SerializeToString())
    return k


def test_a_perturbed_coefficient_is_caught_naming_its_row(tmp_path):
    X, y = _bc()
    labels = np.where(y == 1, "benign", "malignant")
    model = _fit_and_convert(X, labels, tmp_path)
    k = _perturb_one_free_coefficient(model, 1.10)
    m = onnx.load(str(model))
    node = next(n for n in m.graph.node if n.op_type == "SVMClassifier")
    sv = np.array(next(a for a in node.attribute if a.name == "support_vectors").floats)
    sv = sv.reshape(-1, X.shape[1])[k]
    sc = next(n for n in m.graph.node if n.op_type == "Scaler")
    off = np.array(next(a for a in sc.attribute if a.name == "offset").floats)
    mul = np.array(next(a for a in sc.attribute if a.name == "scale").floats)
    row = int(np.argmin(np.max(np.abs((X - off) * mul - sv), axis=1)))
    out = challenge(model, _csv(X, labels, tmp_path / "bc.csv"), label="label", C=1.0,
                    store=tmp_path / "store")
    p = out.pairs[0]
    assert not p.optimal and not out.optimal
    kkt = [f for f in p.findings if f.startswith("KKT conditions fail")]
    assert kkt, p.findings
    assert f"index(es) {row} (" in kkt[0]  # the moved row has the largest KKT residual
    assert any(v != "agree" for v in p.verdicts.values())


def test_coefficients_outside_the_box_are_a_finding_not_a_crash(tmp_path):
    X, y = _bc()
    labels = np.where(y == 1, "benign", "malignant")
    model = _fit_and_convert(X, labels, tmp_path, C=10.0)
    out = challenge(model, _csv(X, labels, tmp_path / "bc.csv"), label="label", C=1.0,
                    store=tmp_path / "store")
    p = out.pairs[0]
    assert not p.optimal
    assert any("exceed C = 1" in f for f in p.findings), p.findings


def test_open_table_round_trip_and_bad_tables(tmp_path, rng):
    X = rng.normal(size=(60, 2))
    labels = np.where(X[:, 0] + 0.3 * X[:, 1] > 0, "pass", "fail")
    rec = _record(X, labels, make_kernel("rbf", gamma=0.5), C=2.0)
    m = model_from_solution(rec.problem, rec.result, rec.standardiser)
    doc = {"format": "kktrace-external-svm", "format_version": 1,
           "kernel": {"name": "rbf", "params": {"gamma": 0.5}},
           "labels": {"positive": "pass", "negative": "fail"},
           "support_vectors": m.support_points.tolist(),
           "coefficients": m.coefficients.tolist(), "bias": m.bias,
           "input_scaling": {"centre": m.standardiser.centre.tolist(),
                             "scale": m.standardiser.scale.tolist()}}
    path = tmp_path / "m.json"
    path.write_text(json.dumps(doc))
    data = _csv(X, labels, tmp_path / "d.csv")
    out = challenge(path, data, label="label", C=2.0, kkt_tol=1e-5, store=tmp_path / "s")
    assert out.optimal and out.pairs[0].float32_allowance == 0.0
    assert out.verdict == "agree"
    for change, message in [
        ({"kernel": {"name": "laplacian", "params": {}}}, "unknown kernel"),
        ({"support_vectors": [[0.0, 0.0, 0.0]], "coefficients": [1.0], "input_scaling": None},
         "3 features"),
        ({"labels": {"positive": "maybe", "negative": "fail"}}, "'maybe' does not occur"),
        ({"bias": "high"}, "'bias' must be a finite number"),
    ]:
        bad = tmp_path / "bad.json"
        bad.write_text(json.dumps({**doc, **change}))
        with pytest.raises(InvalidInputError, match=message):
            challenge(bad, data, label="label", C=2.0, store=tmp_path / "s")
    with pytest.raises(InvalidInputError, match=r"give the model's C \(--C\).*C >= "):
        challenge(path, data, label="label", C=None, store=tmp_path / "s")


def _kk(*args, cwd):
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=600, cwd=cwd)


def test_cli_export_and_challenge_errors(tmp_path):
    X, y = _bc()
    labels = np.where(y == 1, "benign", "malignant")
    data = _csv(X[:200], labels[:200], tmp_path / "bc.csv")
    store = tmp_path / "store"
    proc = _kk("train", data, "--label", "label", "--C", 1, "--kkt-tol", "1e-4", "--store",
               store, "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    run = json.loads(proc.stdout)["run_id"]
    proc = _kk("export", run, "--to", tmp_path / "m.onnx", "--store", store, "--json",
               cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["check"]["passed"] and (tmp_path / "m.onnx").is_file()
    assert out["check"]["rows"] == {"training": 200}
    from solver.store import RunStore

    child = RunStore(store).load(out["checked_run_id"])
    assert child.parent_id == run and child.attachments["onnx_export"]["passed"]
    # the exported file challenged on its own training data: optimal, and it agrees
    proc = _kk("challenge", tmp_path / "m.onnx", "--data", data, "--label", "label", "--C", 1,
               "--store", store, "--json", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    ch = json.loads(proc.stdout)
    assert ch["optimal"] and ch["verdict"] in ("agree", "agree_within_tolerances")
    # bad input: one line on stderr, exit 1, nothing written
    (tmp_path / "junk.onnx").write_bytes(b"\x08\x07 not a model")
    good = (tmp_path / "m.onnx").read_bytes()
    (tmp_path / "cut.onnx").write_bytes(good[: len(good) // 2])
    before = sorted(p.name for p in store.iterdir())
    for args, needle in [
        (["challenge", tmp_path / "junk.onnx"], "not a valid ONNX model"),
        (["challenge", tmp_path / "cut.onnx"], "not a valid ONNX model"),
    ]:
        proc = _kk(*args, "--data", data, "--label", "label", "--store", store, "--C", "1",
                   cwd=tmp_path)
        assert proc.returncode == 1, (args, proc.returncode, proc.stderr)
        assert needle in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
        assert "Traceback" not in proc.stderr
    proc = _kk("challenge", tmp_path / "m.onnx", "--data", data, "--label", "label",
               "--store", store, cwd=tmp_path)
    assert proc.returncode == 1 and "C >= " in proc.stderr
    assert sorted(p.name for p in store.iterdir()) == before


def test_unsupported_operators_are_named(tmp_path):
    from onnx import TensorProto, helper

    node = helper.make_node("Relu", ["features"], ["y"])
    g = helper.make_graph([node], "g", [helper.make_tensor_value_info(
        "features", TensorProto.FLOAT, [None, 2])], [helper.make_tensor_value_info(
            "y", TensorProto.FLOAT, [None, 2])])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    path = tmp_path / "relu.onnx"
    path.write_bytes(m.SerializeToString())
    data = _csv(np.zeros((4, 2)) + np.arange(4)[:, None], ["a", "b", "a", "b"],
                tmp_path / "d.csv")
    with pytest.raises(InvalidInputError, match="unsupported operator.*ai.onnx:Relu"):
        challenge(path, data, label="label", C=1.0, store=tmp_path / "s")


# --------------------------------------------------------------------------- other kinds


def test_regression_and_one_class_exports_match_both_evaluators():
    """ε-regression on bundled diabetes (standardised target) and one-class on bundled
    breast-cancer features: the ``SVMRegressor`` output equals kktrace's f within float32
    drift (ONNX Operators-ml.md; onnxruntime and onnx.reference)."""
    from sklearn.datasets import load_diabetes

    from solver.problem import one_class, regression

    X, t = load_diabetes(return_X_y=True)
    std = Standardiser.fit(X)
    for name, params in KERNELS[:3]:
        prob = regression(std.transform(X), (t - t.mean()) / t.std(),
                          kernel=make_kernel(name, **params), C=1.0, epsilon=0.1)
        rec = RunRecord(problem=prob, result=solve(prob, method="smo", kkt_tol=1e-4),
                        data={}, standardiser=std)
        check = check_onnx(rec, build_onnx(rec))
        assert check.passed, (name, check.evaluators)
        for ev in ("onnxruntime", "onnx_reference"):
            assert check.evaluators[ev]["training"]["max_rel_diff"] <= 1e-4
    Xb, _ = _bc()
    std = Standardiser.fit(Xb)
    for nu in (0.05, 0.5):
        prob = one_class(std.transform(Xb), kernel=make_kernel("rbf", gamma=0.03), nu=nu)
        rec = RunRecord(problem=prob, result=solve(prob, method="smo", kkt_tol=1e-4),
                        data={}, standardiser=std)
        data = build_onnx(rec)
        check = check_onnx(rec, data)
        assert check.passed
        assert check.evaluators["onnxruntime"]["training"]["label_changes_away_from_boundary"] \
            == 0
        names = [n.op_type for n in onnx.load_from_string(data).graph.node]
        assert names == ["Scaler", "SVMRegressor", "Sign"]


def test_one_vs_one_layout_reproduces_every_pair_and_the_vote():
    """Three wine classes (bundled wine, Forina et al.): pairs solved separately, laid out as
    the standard's one-vs-one coefficients; onnxruntime's pairwise scores equal each pair's
    f and its label equals the first-maximum vote (ONNX Operators-ml.md, SVMClassifier)."""
    from sklearn.datasets import load_wine

    from solver.exchange.onnx_codec import classifier_graph
    from solver.exchange.subjects import pairwise_expansion
    from solver.tasks.multiclass import vote

    X, y = load_wine(return_X_y=True)
    std = Standardiser.fit(X)
    Z = std.transform(X)
    labels = ("barolo", "grignolino", "barbera")
    kern = make_kernel("rbf", gamma=0.05)
    pairs, values = [], []
    for i in range(3):
        for j in range(i + 1, 3):
            rows = np.flatnonzero((y == i) | (y == j))
            lab = np.where(y[rows] == i, labels[i], labels[j])
            prob = binary_classification(Z[rows], lab, kernel=kern, C=1.0,
                                         positive_label=labels[i])
            m = model_from_solution(prob, solve(prob, method="smo", kkt_tol=1e-5), std)
            pairs.append((i, j, rows[m.support_rows], m.coefficients, m.bias))
            values.append(m.values(X))
    F = np.column_stack(values)
    model = classifier_graph(pairwise_expansion(labels, y, Z, pairs, kern, std.centre,
                                                std.scale))
    onnx.checker.check_model(model, full_check=True)
    for run in (ort.InferenceSession(model.SerializeToString(),
                                     providers=["CPUExecutionProvider"]).run,
                onnx.reference.ReferenceEvaluator(model).run):
        label, scores = run(None, {"features": X.astype(np.float32)})
        assert np.max(np.abs(scores - F)) <= 1e-4 * max(1.0, np.max(np.abs(F)))
        clear = np.min(np.abs(F), axis=1) >= NEAR_ZERO
        # pairs here are oriented f_ij > 0 → class i; the task's vote counts f_ij > 0 → j
        win = vote(-F, [(0, 1), (0, 2), (1, 2)], 3)[0]
        assert np.array_equal(np.asarray(label)[clear], np.array(labels)[win][clear])
