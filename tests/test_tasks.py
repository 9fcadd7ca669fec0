"""Tasks registry, parent records in the store (integrity), and the distributed runner."""

from __future__ import annotations

import json

import numpy as np
import pytest

import solver
from solver.data import from_arrays
from solver.distributed import CLUSTER_MIN_WORK, choose_execution, run_jobs
from solver.errors import InvalidInputError
from solver.store import RunStore
from solver.tasks import TASKS, Task, classification_task, get_task, task_for_kind, task_of_manifest


def _three_classes(rng: np.random.Generator, n: int = 15) -> tuple[np.ndarray, np.ndarray]:
    centres = np.array([[0.0, 0.0], [3.0, 0.0], [0.0, 3.0]])
    X = np.vstack([c + rng.normal(scale=0.8, size=(n, 2)) for c in centres])
    lab = np.repeat(np.array(["a", "b", "c"]), n)
    return X, lab


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    rng = np.random.default_rng(7)
    X, lab = _three_classes(rng)
    ds = from_arrays(X, lab, feature_names=["x1", "x2"], label_name="grade")
    store = RunStore(tmp_path_factory.mktemp("mc"))
    out = solver.train(ds, kernel="rbf", C=2.0, kkt_tol=1e-6, solver="both", store=store,
                       parallel="sequential")
    return store, out, ds


# ----------------------------------------------------------------------------- registry


def test_registry_names_and_lookup() -> None:
    assert set(TASKS) >= {"binary", "multiclass"}
    for name in TASKS:
        task = get_task(name)
        assert isinstance(task, Task) and task.name == name and task.problem_kinds
        assert task.categories and task.measures
    assert task_for_kind("binary_classification").name == "binary"
    assert classification_task(2).name == "binary" and classification_task(5).name == "multiclass"
    with pytest.raises(InvalidInputError, match="unknown task"):
        get_task("ranking")
    assert task_of_manifest({"record": "parent", "task": "multiclass"}).name == "multiclass"
    assert task_of_manifest({"problem": {"kind": "binary_classification"}}).name == "binary"


def test_binary_task_builds_the_problem_train_built_before() -> None:
    from solver.kernels import make_kernel
    from solver.problem import binary_classification

    rng = np.random.default_rng(3)
    X = rng.normal(size=(20, 2))
    lab = np.where(X[:, 0] > 0, "pass", "fail")
    task = get_task("binary")
    (m,) = task.members(lab)
    p1 = task.build_problem(X, m, kernel=make_kernel("rbf", gamma=0.5), C=3.0)
    p0 = binary_classification(X, lab, kernel=make_kernel("rbf", gamma=0.5), C=3.0)
    for a in ("X", "y", "p", "lower", "upper"):
        assert np.array_equal(getattr(p1, a), getattr(p0, a))
    assert p1.info == p0.info and p1.kind == p0.kind


# ----------------------------------------------------------------------------- parent record


def test_parent_manifest_lists_every_member_with_its_digest(fitted) -> None:
    store, out, _ = fitted
    pid = out.run_id
    m = json.loads((store.run_dir(pid) / "manifest.json").read_text())
    assert m["record"] == "parent" and m["task"] == "multiclass"
    assert [x["role"] for x in m["members"]] == ["pair", "pair_challenger"] * 3
    assert [x["key"] for x in m["members"][::2]] == [["a", "b"], ["a", "c"], ["b", "c"]]
    import hashlib

    for x in m["members"]:
        mb = (store.run_dir(x["run_id"]) / "manifest.json").read_bytes()
        assert hashlib.sha256(mb).hexdigest() == x["manifest_sha256"]
    assert m["info"]["classes"] == ["a", "b", "c"]
    assert "first in the class order" in m["info"]["tie_rule"]
    assert m["info"]["execution"]["mode"] == "sequential"
    v = store.verify(pid)
    assert v.ok, v.problems
    assert v.chain[0] == pid and len(v.chain) == 7
    back = store.load_parent(pid)
    assert back.member_ids("pair") == [x["run_id"] for x in m["members"][::2]]
    with pytest.raises(InvalidInputError, match="parent record"):
        store.load(pid)


def _copy_store(store: RunStore, tmp_path) -> RunStore:
    import shutil

    dst = tmp_path / "copy"
    shutil.copytree(store.root, dst)
    return RunStore(dst)


@pytest.mark.parametrize("pair", [0, 1, 2])
@pytest.mark.parametrize("fname", ["solution.npz", "trace.parquet", "explanation.csv",
                                   "manifest.json"])
def test_flipped_byte_in_any_pair_fails_the_parent_naming_the_pair(fitted, tmp_path, pair,
                                                                   fname) -> None:
    store, out, _ = fitted
    st = _copy_store(store, tmp_path)
    member = out.parent.members[2 * pair]
    path = st.run_dir(member.run_id) / fname
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    v = st.verify(out.run_id)
    assert not v.ok
    key = " vs ".join(repr(k) for k in member.key)
    assert any(f"member pair {key} (run {member.run_id})" in p for p in v.problems), v.problems


def test_removed_pair_folder_fails_the_parent_naming_the_pair(fitted, tmp_path) -> None:
    import shutil

    store, out, _ = fitted
    st = _copy_store(store, tmp_path)
    member = out.parent.members[4]  # pair b vs c
    shutil.rmtree(st.run_dir(member.run_id))
    v = st.verify(out.run_id)
    assert not v.ok
    assert f"member pair 'b' vs 'c' (run {member.run_id}): run folder is missing" in v.problems


def test_flipped_byte_in_the_parent_itself_fails(fitted, tmp_path) -> None:
    store, out, _ = fitted
    st = _copy_store(store, tmp_path)
    path = st.run_dir(out.run_id) / "manifest.json"
    path.write_bytes(path.read_bytes().replace(b'"pair"', b'"pain"', 1))
    v = st.verify(out.run_id)
    assert not v.ok and any("manifest.json" in p for p in v.problems)


# ----------------------------------------------------------------------------- distributed


def _square(x: int) -> int:
    return x * x


def test_auto_rule_stays_in_process_for_small_work(monkeypatch) -> None:
    monkeypatch.setattr("solver.distributed._cores", lambda: 2)
    assert choose_execution("auto", [100, 100]).mode == "sequential"
    assert choose_execution("auto", [2000]).mode == "sequential"  # one job
    assert choose_execution("auto", [1500, 1500]).mode == "local_cluster"
    assert 1500 ** 2 * 2 >= CLUSTER_MIN_WORK
    monkeypatch.setattr("solver.distributed._cores", lambda: 1)
    assert choose_execution("auto", [1500, 1500]).mode == "sequential"
    assert choose_execution("tcp://127.0.0.1:1", [1]).mode == "scheduler"
    with pytest.raises(InvalidInputError, match="scheduler"):
        choose_execution("threads", [1])


def test_sequential_runner_keeps_order() -> None:
    res, ex = run_jobs(_square, [3, 1, 2], where="sequential")
    assert res == [9, 1, 4] and ex.mode == "sequential"


def test_pairs_on_a_local_cluster_are_bitwise_the_pairs_in_process(fitted, tmp_path) -> None:
    store, out, ds = fitted
    out2 = solver.train(ds, kernel="rbf", C=2.0, kkt_tol=1e-6, solver="both",
                        store=RunStore(tmp_path / "cluster"), parallel="local")
    assert out2.parent.info["execution"]["mode"] == "local_cluster"
    assert len(out2.records) == len(out.records) == 6
    for a, b in zip(out.records, out2.records, strict=True):
        assert a.result.alpha.tobytes() == b.result.alpha.tobytes()
        assert a.result.bias == b.result.bias
        assert a.result.iterations == b.result.iterations
        if a.result.trace is not None:
            for c in a.result.trace.columns:
                assert np.asarray(a.result.trace.columns[c]).tobytes() == \
                    np.asarray(b.result.trace.columns[c]).tobytes()
