"""The Python workflow API (``solver.train`` and its wrappers), in-process.

Data here are seeded synthetic blobs from ``numpy.random.default_rng``; scikit-learn's
metrics serve as the reference for the held-out confusion matrix and balanced accuracy.
"""

from __future__ import annotations

import csv
import warnings
from pathlib import Path

import numpy as np
import pytest

import solver
from solver import api, training
from solver.errors import ConvergenceWarning, InvalidInputError


def _blobs(rng: np.random.Generator, n: int, shift: float = 1.6):
    """Two overlapping Gaussian classes in 3-D; labels 'good' / 'bad'."""
    y = np.where(np.arange(n) % 2 == 0, "good", "bad")
    X = rng.normal(size=(n, 3))
    X[y == "good", 0] += shift
    X[y == "good", 1] -= 0.5 * shift
    X[:, 2] *= 50.0  # a feature on another scale: standardising matters
    return X, y


def _write_csv(path: Path, X: np.ndarray, y: np.ndarray | None) -> Path:
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["f1", "f2", "f3"] + (["outcome"] if y is not None else []))
        for i in range(X.shape[0]):
            w.writerow([repr(float(v)) for v in X[i]] + ([y[i]] if y is not None else []))
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    rng = np.random.default_rng(7)
    d = tmp_path_factory.mktemp("api")
    X, y = _blobs(rng, 120)
    Xh, yh = _blobs(rng, 60)
    return {"dir": d, "train": _write_csv(d / "train.csv", X, y),
            "holdout": _write_csv(d / "holdout.csv", Xh, yh),
            "query": _write_csv(d / "query.csv", Xh[:9], None),
            "X": X, "y": y, "Xh": Xh, "yh": yh}


@pytest.fixture(scope="module")
def both(files):
    store = files["dir"] / "store"
    out = solver.train(files["train"], label="outcome", kernel="rbf", C=2.0, kkt_tol=1e-5,
                       solver="both", holdout=files["holdout"], store=store)
    return out, store


def test_train_both_saves_two_linked_runs(both, files):
    out, store = both
    assert len(out.run_ids) == 2 and out.converged
    smo, qp = out.records
    assert smo.result.solver == "smo" and qp.result.solver == "qp"
    assert qp.parent_id == out.run_ids[0]
    s = out.summary()
    assert s["run_id"] == out.run_id and s["challenger"]["run_id"] == out.run_ids[1]
    assert s["verdict"] == out.verdict == out.comparison.verdict
    loaded = solver.load_run(out.run_ids[1], store=store)
    assert loaded.parent_id == out.run_ids[0]
    assert loaded.attachments["comparison"]["verdict"] == out.verdict
    for rec in (solver.load_run(r, store=store) for r in out.run_ids):
        assert {"audit", "explanation", "holdout", "command"} <= set(rec.attachments)
        assert rec.data["fingerprint"] == solver.fingerprint(
            solver.load_table(files["train"], label="outcome"))
        assert rec.data["feature_names"] == ["f1", "f2", "f3"]
        assert rec.data["label_name"] == "outcome" and rec.data["n_rows"] == 120
    first = solver.load_run(out.run_ids[0], store=store)
    assert np.array_equal(first.result.alpha, smo.result.alpha)  # bitwise round trip


def test_holdout_scores_match_the_reference_metrics(both, files):
    from sklearn.metrics import balanced_accuracy_score, confusion_matrix  # reference library

    out, store = both
    hold = out.records[0].attachments["holdout"]
    sc = solver.apply(out.run_id, files["holdout"], store=store)
    neg, pos = hold["labels"]
    cm = confusion_matrix(files["yh"], sc.labels.astype(str), labels=[neg, pos])
    assert hold["matrix"] == cm.tolist()
    assert hold["accuracy"] == pytest.approx(np.mean(sc.labels.astype(str) == files["yh"]))
    assert hold["balanced_accuracy"] == pytest.approx(
        balanced_accuracy_score(files["yh"], sc.labels.astype(str)))
    assert hold["fingerprint"] == sc.fingerprint and hold["n"] == 60


def test_score_explain_and_model_agree(both, files):
    out, store = both
    rec = solver.load_run(out.run_id, store=store)
    model = solver.model_from_solution(rec.problem, rec.result, rec.standardiser)
    sc = solver.apply(out.run_id, files["query"], store=store)
    assert sc.confusion is None and sc.truth is None
    np.testing.assert_allclose(sc.values, model.values(files["Xh"][:9]), rtol=1e-12)
    point = dict(zip(["f1", "f2", "f3"], files["Xh"][0].tolist(), strict=True))
    parts = solver.explain(out.run_id, store=store, points=point, top=4)
    assert parts.values[0] == pytest.approx(sc.values[0], rel=1e-12)
    batch = solver.explain(out.run_id, store=store, points=files["Xh"][:9], top=2)
    np.testing.assert_allclose(batch.values, sc.values, rtol=1e-12)
    from_file = solver.explain(out.run_id, store=store, points=files["holdout"], top=1)
    assert from_file.values.shape == (60,)
    with pytest.raises(InvalidInputError, match="colour"):
        solver.explain(out.run_id, store=store, points={**point, "colour": 1.0})
    with pytest.raises(InvalidInputError, match="f3"):
        solver.explain(out.run_id, store=store, points={"f1": 0.0, "f2": 0.0})


def test_point_table_export_and_categories(both, tmp_path):
    out, store = both
    table = solver.explain(out.run_id, store=store)
    counts = table.category_counts()
    cert = out.records[0].result.certificate
    assert sum(counts.values()) == 120
    assert counts["non_support"] == cert.n_zero
    paths = solver.export_explanation(out.run_id, tmp_path, store=store)
    assert paths["csv"].is_file() and paths["parquet"].is_file()
    with paths["csv"].open(newline="") as fh:
        assert len(list(csv.DictReader(fh))) == 120


def test_replay_verify_and_keep_rerun(both, files):
    out, store = both
    start = solver.replay(out.run_id, 0, store=store)
    assert not np.any(start.alpha)
    v = solver.verify(out.run_id, store=store, rerun=files["train"], keep_rerun=True)
    assert v.ok and v.integrity.ok and v.reproduction.bitwise
    child = solver.load_run(v.rerun_run_id, store=store)
    assert child.parent_id == out.run_id
    with pytest.raises(InvalidInputError):
        solver.replay(out.run_id, -1, store=store)


def test_runs_compare_and_report(both, tmp_path):
    out, store = both
    rows = solver.runs(store=store, solver="qp")
    assert out.run_ids[1] in [r["run_id"] for r in rows]
    comp = solver.compare(out.run_ids[0], out.run_ids[1], store=store)
    assert comp.verdict == out.verdict
    paths = solver.report(list(out.run_ids), store=store, out_dir=tmp_path, formats=("json",))
    assert set(paths) == {"json"} and paths["json"].stat().st_size > 0
    with pytest.raises(InvalidInputError):
        solver.report([out.run_id] * 3, store=store, out_dir=tmp_path)


def test_challenger_skipped_above_its_size_limit(files, monkeypatch, tmp_path):
    monkeypatch.setattr(training, "_qp_limit", lambda: 50)
    out = solver.train(files["train"], label="outcome", kernel="linear", solver="both",
                       store=tmp_path)
    assert len(out.run_ids) == 1 and out.comparison is None
    assert "120" in out.challenger_skipped and "50" in out.challenger_skipped
    rec = solver.load_run(out.run_id, store=tmp_path)
    assert rec.attachments["challenger"]["ran"] is False
    assert out.summary()["challenger_skipped"] == out.challenger_skipped


def test_qp_alone_is_the_primary_run(files, tmp_path):
    out = solver.train(files["train"], label="outcome", kernel="linear", solver="qp",
                       store=tmp_path)
    assert len(out.run_ids) == 1 and out.records[0].result.solver == "qp"
    assert out.summary()["solver"] == "qp"


def test_non_converged_run_is_stored_and_reported(files, tmp_path):
    X, y = files["X"], files["y"]
    ds = solver.from_arrays(X, y, feature_names=["f1", "f2", "f3"], label_name="outcome")
    out = solver.train(ds, kernel="rbf", C=5.0, iteration_limit=3, store=tmp_path)
    s = out.summary()
    assert not out.converged and s["status"] == "iteration_limit" and s["iterations"] == 3
    assert any("did not converge" in w for w in out.warnings)
    rec = solver.load_run(out.run_id, store=tmp_path)
    assert rec.result.status.label == "iteration_limit"
    assert solver.verify(out.run_id, store=tmp_path).ok
    assert rec.attachments["command"]["text"] is None  # in-memory data: no CLI command
    with pytest.warns(ConvergenceWarning):
        solver.train(ds, kernel="rbf", C=5.0, iteration_limit=3, store=tmp_path, quiet=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        solver.train(ds, kernel="rbf", C=5.0, iteration_limit=3, store=tmp_path, quiet=True)


def test_command_attachment_round_trips_through_the_cli_parser(both):
    from solver.cli import build_parser

    out, _ = both
    cmd = out.records[0].attachments["command"]
    args = build_parser().parse_args(cmd["argv"][1:])
    assert (args.command, args.label, args.kernel, args.C, args.kkt_tol, args.solver) == (
        "train", "outcome", "rbf", 2.0, 1e-5, "both")
    assert Path(args.holdout).name == "holdout.csv"


@pytest.mark.parametrize("kwargs, word", [
    ({"solver": "fast"}, "solver"),
    ({"trace": "everything"}, "trace"),
    ({"kkt_tol": 0.0}, "kkt_tol"),
    ({"iteration_limit": 0}, "iteration_limit"),
    ({"kernel": "cubic"}, "kernel"),
    ({"C": -1.0}, "C"),
    ({"label": None}, "label"),
])
def test_bad_options_raise_invalid_input(files, tmp_path, kwargs, word):
    args = {"label": "outcome", "store": tmp_path / "s", **kwargs}
    with pytest.raises(InvalidInputError, match=word):
        solver.train(files["train"], **args)
    assert not (tmp_path / "s").exists() or not any((tmp_path / "s").iterdir())


def test_open_store_default_and_env(monkeypatch, tmp_path):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("KKTRACE_STORE", raising=False)
    assert Path(api.open_store().root) == (tmp_path / "traces").resolve()
    monkeypatch.setenv("KKTRACE_STORE", str(tmp_path / "elsewhere"))
    assert Path(api.open_store().root) == (tmp_path / "elsewhere").resolve()
    (tmp_path / "file").write_text("x")
    with pytest.raises(InvalidInputError, match="not a directory"):
        api.open_store(tmp_path / "file")


def test_progress_callback_sees_the_solve(files, tmp_path):
    events = []
    solver.train(files["train"], label="outcome", kernel="rbf", C=50.0, kkt_tol=1e-6,
                 store=tmp_path, progress=lambda task, info: events.append((task, dict(info))))
    assert events[-1][0] == "done"
    solves = [i for t, i in events if t == "solve"]
    assert solves and all(i["solver"] == "smo" and "violation" in i for i in solves)


def test_readme_python_tour_runs(tmp_path, monkeypatch):
    """The README's Python tour, executed as written (data paths point at the package)."""
    import re

    root = Path(__file__).resolve().parents[1]
    readme = (root / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", readme, flags=re.S)
    assert blocks, "README has no Python tour"
    from solver.demo import shipped_data

    data_dir = Path(shipped_data()[0]).parent
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("KKTRACE_STORE", raising=False)
    code = blocks[0].replace("solver/data/", f"{data_dir.as_posix()}/")
    # the report's three formats are covered by the CLI and demo tests; JSON keeps this fast
    assert "solver.report([smo_id, qp_id])" in code
    code = code.replace("solver.report([smo_id, qp_id])",
                        "solver.report([smo_id, qp_id], formats=('json',))")
    scope: dict = {}
    exec(compile(code, "README.md", "exec"), scope)  # noqa: S102 - our own README
    assert scope["out"].converged
    assert all(Path(p).is_file() for p in scope["paths"].values())
    assert (tmp_path / "traces").is_dir()
