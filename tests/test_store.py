"""Run store: round trips, manifests, attachments, integrity (flip/delete/add), catalog, chains."""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_store_support import assert_records_bitwise, same_bits, synthetic_record

from solver.errors import ConvergenceWarning, IntegrityError, InvalidInputError
from solver.kernels import LinearKernel, PolynomialKernel, PrecomputedKernel
from solver.model import Standardiser
from solver.problem import binary_classification, index_features
from solver.run import RunRecord
from solver.store import FORMAT_VERSION, RunStore, is_run_id, new_run_id
from solver.store.catalog import Catalog
from solver.store.format import read_table

# ----------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """One synthetic run saved in a module-wide store: (store, run_id, record)."""
    store = RunStore(tmp_path_factory.mktemp("store"))
    rec = synthetic_record(1)
    return store, store.save(rec), rec


def _smo_record(rng: np.random.Generator, n: int = 60, trace: str = "full") -> RunRecord:
    from solver.smo import solve_smo

    X = rng.normal(size=(n, 3))
    lab = np.where(X[:, 0] + 0.7 * rng.normal(size=n) > 0, 1, -1)
    std = Standardiser.fit(X)
    prob = binary_classification(std.transform(X), lab, kernel=PolynomialKernel(degree=2,
                                                                                 offset=1.0), C=3.0)
    res = solve_smo(prob, kkt_tol=1e-6, trace=trace, snapshot_every=20)
    return RunRecord(problem=prob, result=res, data={"fingerprint": "x" * 64}, standardiser=std,
                     attachments={"command": {"argv": ["kktrace", "train", "a.csv"],
                                              "text": "kktrace train a.csv"}})


# ----------------------------------------------------------------------------- round trips


def test_round_trip_synthetic_is_bitwise(saved) -> None:
    store, rid, rec = saved
    back = store.load(rid)
    assert_records_bitwise(rec, back)
    assert back.run_id == rid and back.parent_id is None and back.created.endswith("Z")
    on_disk = json.loads((store.run_dir(rid) / "manifest.json").read_text())
    assert back.manifest == on_disk
    assert on_disk["format_version"] == FORMAT_VERSION and on_disk["run_id"] == rid


def test_round_trip_keeps_options_extra_and_attachments(saved) -> None:
    store, rid, rec = saved
    back = store.load(rid)
    o = back.result.options
    assert same_bits(o["weights"], rec.result.options["weights"]) and o["tiny"] == 5e-324
    assert o["time_limit"] is None and o["shrinking"] is True
    e = back.result.extra
    assert e["loop_violation"] == float("inf")
    assert same_bits(e["per_class"]["negative"], np.arange(3, dtype=np.int16))
    att = back.attachments
    assert att["command"] == rec.attachments["command"]
    assert att["holdout"] == rec.attachments["holdout"]
    assert np.isnan(att["comparison"]["objective_gap"])
    assert att["comparison"]["verdict"] == "agree"
    ex, ex0 = att["explanation"], rec.attachments["explanation"]
    assert list(ex) == list(ex0)
    for k in ex0:
        assert same_bits(ex[k], ex0[k]), k
    assert back.data == rec.data
    assert back.problem.labels == ("fail", "pass")


def test_explanation_csv_matches_parquet(saved) -> None:
    store, rid, rec = saved
    import csv

    rows = list(csv.reader((store.run_dir(rid) / "explanation.csv").open()))
    assert rows[0] == ["row", "alpha", "at_bound", "role"]
    alpha = rec.attachments["explanation"]["alpha"]
    # floats are written as shortest round-trip decimals: parsing gives the same bits
    assert same_bits(np.array([float(r[1]) for r in rows[1:]]), alpha)
    t = read_table((store.run_dir(rid) / "explanation.parquet").read_bytes(), "x")
    assert same_bits(t["alpha"], alpha)


def test_trace_parquet_is_readable_by_pandas(saved) -> None:
    pd = pytest.importorskip("pandas")
    store, rid, rec = saved
    df = pd.read_parquet(store.run_dir(rid) / "trace.parquet")
    assert list(df.columns) == list(rec.result.trace.columns)
    assert same_bits(df["objective"].to_numpy(), rec.result.trace.columns["objective"])
    assert str(df["i"].dtype) == "int32"


def test_round_trip_real_smo_run(tmp_path, rng) -> None:
    rec = _smo_record(rng)
    store = RunStore(tmp_path)
    rid = store.save(rec)
    back = store.load(rid)
    assert_records_bitwise(rec, back)
    assert back.manifest["solver"]["options"] == json.loads(
        (store.run_dir(rid) / "manifest.json").read_text())["solver"]["options"]
    # the stored model gives the same decision values as one built from the record
    from solver.model import model_from_solution

    m0 = model_from_solution(rec.problem, rec.result, rec.standardiser)
    m1 = store.load_model(rid)
    Z = rng.normal(size=(7, 3))
    assert same_bits(m0.values(Z), m1.values(Z))
    # saving the loaded record again reproduces every data file byte for byte (model.json
    # names its run, so it differs only there)
    rid2 = store.save(back)
    m_a = dict(back.manifest["files"])
    m_b = dict(store.load(rid2).manifest["files"])
    assert m_a.pop("model.json") != m_b.pop("model.json")
    assert m_a == m_b
    j_a = json.loads((store.run_dir(rid) / "model.json").read_text())
    j_b = json.loads((store.run_dir(rid2) / "model.json").read_text())
    assert j_a.pop("run_id") == rid and j_b.pop("run_id") == rid2 and j_a == j_b


def test_round_trip_real_qp_run(tmp_path, rng) -> None:
    from solver.qp import solve_qp

    X = rng.normal(size=(30, 2))
    lab = np.where(X[:, 1] > 0, "b", "a")
    prob = binary_classification(X, lab, kernel=LinearKernel(), C=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        res = solve_qp(prob)
    rec = RunRecord(problem=prob, result=res, data={"fingerprint": "q" * 64},
                    standardiser=Standardiser.identity(2))
    store = RunStore(tmp_path)
    rid = store.save(rec)
    back = store.load(rid)
    assert_records_bitwise(rec, back)
    assert back.result.solver == "qp" and back.manifest["trace"]["columns"]["iteration"] == "int64"


def test_round_trip_precomputed_kernel_and_no_trace(tmp_path, rng) -> None:
    A = rng.normal(size=(12, 4))
    G = A @ A.T
    lab = np.array([0, 1] * 6)
    prob = binary_classification(index_features(12), lab, kernel=PrecomputedKernel(gram_matrix=G))
    rec0 = synthetic_record(2)
    from solver.certificate import certify

    cert = certify(prob, np.zeros(12))
    from dataclasses import replace

    res = replace(rec0.result, alpha=np.zeros(12), certificate=cert, bias=cert.bias, trace=None,
                  options={}, extra={})
    rec = RunRecord(problem=prob, result=res, data={}, standardiser=Standardiser.identity(1))
    store = RunStore(tmp_path)
    back = store.load(store.save(rec))
    assert_records_bitwise(rec, back)
    assert same_bits(back.problem.kernel.gram_matrix, G)
    assert not (store.run_dir(back.run_id) / "trace.parquet").exists()


def _dot(A, B):
    return A @ B.T


def test_callable_kernel_is_described_but_not_evaluable_after_load(tmp_path, rng) -> None:
    from dataclasses import replace

    from solver.certificate import certify
    from solver.kernels import CallableKernel

    X = rng.normal(size=(10, 2))
    prob = binary_classification(X, np.array([0, 1] * 5), kernel=CallableKernel(func=_dot))
    rec0 = synthetic_record(2)
    cert = certify(prob, np.zeros(10))
    res = replace(rec0.result, alpha=np.zeros(10), certificate=cert, bias=cert.bias,
                  trace=None, options={}, extra={})
    rec = RunRecord(problem=prob, result=res, data={}, standardiser=Standardiser.identity(2))
    store = RunStore(tmp_path)
    rid = store.save(rec)
    back = store.load(rid)
    assert back.problem.kernel.describe() == prob.kernel.describe()
    assert same_bits(back.result.alpha, rec.result.alpha)
    with pytest.raises(InvalidInputError, match="not stored"):
        back.problem.kernel_block(slice(0, 2), slice(0, 2))
    with pytest.raises(InvalidInputError, match="not stored"):
        store.load_model(rid, require_converged=False).values(X)


def test_unknown_attachment_plain_data_is_json_and_objects_are_refused(tmp_path) -> None:
    store = RunStore(tmp_path)
    rec = synthetic_record(4, attachments={"leave_one_out": {"changes": [1, 2]},
                                           "my_notes": ["a", {"b": 1.5}]})
    back = store.load(store.save(rec))
    assert back.attachments["my_notes"] == ["a", {"b": 1.5}]
    assert back.attachments["leave_one_out"] == {"changes": [1, 2]}
    for bad in ({"obj": {"x": object()}}, {"../evil": 1}, {"manifest": 1},
                {"explanation": {"a": np.zeros((2, 2))}},
                {"explanation": {"a": np.zeros(3), "b": np.zeros(4)}}):
        with pytest.raises(InvalidInputError):
            store.save(synthetic_record(4, attachments=bad))
    assert store.temp_folders() == []


def test_default_root_follows_environment(tmp_path, monkeypatch) -> None:
    monkeypatch.setenv("KKTRACE_STORE", str(tmp_path / "env-store"))
    assert RunStore().root == tmp_path / "env-store"
    monkeypatch.delenv("KKTRACE_STORE")
    monkeypatch.chdir(tmp_path)
    s = RunStore()
    assert s.root == tmp_path / "traces"
    assert not s.root.exists() and s.runs() == []  # created on first save only
    s.save(synthetic_record(5, rows=20))
    assert len(s.runs()) == 1


def test_run_ids_are_well_formed_and_unique() -> None:
    ids = {new_run_id() for _ in range(2000)}
    assert len(ids) == 2000 and all(is_run_id(i) for i in ids)
    for bad in ("../x", "a/b", "20260101T000000000000Z-0123456789a/", "", None, 5,
                "20260101T000000000000Z-0123456789AB"):
        assert not is_run_id(bad)


# ----------------------------------------------------------------------------- integrity


def _flip(path: Path, pos: int) -> None:
    b = bytearray(path.read_bytes())
    b[pos] ^= 0x5A
    path.write_bytes(bytes(b))


def test_every_file_byte_flip_is_detected_and_named(tmp_path) -> None:
    store = RunStore(tmp_path)
    rec = synthetic_record(6, rows=120)
    rid = store.save(rec)
    d = store.run_dir(rid)
    rng = np.random.default_rng(6)
    files = sorted(p.name for p in d.iterdir())
    assert len(files) >= 11
    for name in files:
        size = (d / name).stat().st_size
        for pos in {0, size - 1, size // 2, *rng.integers(0, size, 3).tolist()}:
            original = (d / name).read_bytes()
            _flip(d / name, pos)
            v = store.verify(rid)
            assert not v.ok, (name, pos)
            assert any(name in p for p in v.problems), (name, pos, v.problems)
            with pytest.raises(IntegrityError):
                store.load(rid)
            (d / name).write_bytes(original)
    assert store.verify(rid).ok


def test_every_byte_of_the_manifest_pair_is_covered(saved) -> None:
    """Exhaustive for manifest.sha256 (every byte, two flips) and every 16th byte of
    manifest.json: the special-cased pair always fails and names the changed file."""
    store, rid, _ = saved
    d = store.run_dir(rid)
    for name, stride, masks in (("manifest.sha256", 1, (0x01, 0x80)),
                                ("manifest.json", 16, (0x01,))):
        data = (d / name).read_bytes()
        try:
            for pos in range(0, len(data), stride):
                for mask in masks:
                    b = bytearray(data)
                    b[pos] ^= mask
                    (d / name).write_bytes(bytes(b))
                    v = store.verify(rid)
                    assert not v.ok and any(name in p for p in v.problems), (pos, mask)
        finally:
            (d / name).write_bytes(data)
    assert store.verify(rid).ok


@settings(derandomize=True, max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(which=st.integers(0, 10_000), where=st.floats(0, 1), bit=st.integers(0, 7))
def test_any_single_bit_flip_fails_verification(saved, which, where, bit) -> None:
    store, rid, _ = saved
    d = store.run_dir(rid)
    files = sorted(p.name for p in d.iterdir())
    name = files[which % len(files)]
    data = (d / name).read_bytes()
    pos = min(int(where * len(data)), len(data) - 1)
    b = bytearray(data)
    b[pos] ^= 1 << bit
    (d / name).write_bytes(bytes(b))
    try:
        v = store.verify(rid)
        assert not v.ok and any(name in p for p in v.problems)
    finally:
        (d / name).write_bytes(data)
    assert store.verify(rid).ok


def test_missing_and_extra_files_are_named(tmp_path) -> None:
    store = RunStore(tmp_path)
    rid = store.save(synthetic_record(7, rows=50))
    d = store.run_dir(rid)
    for name in sorted(p.name for p in d.iterdir()):
        data = (d / name).read_bytes()
        (d / name).unlink()
        v = store.verify(rid)
        assert not v.ok and any(name in p for p in v.problems), (name, v.problems)
        (d / name).write_bytes(data)
    (d / "notes.txt").write_text("hello")
    v = store.verify(rid)
    assert not v.ok and any("notes.txt" in p for p in v.problems)
    (d / "notes.txt").unlink()
    (d / "sub").mkdir()
    v = store.verify(rid)
    assert not v.ok and any("sub" in p for p in v.problems)
    (d / "sub").rmdir()
    assert store.verify(rid).ok


def test_parent_chain_is_tamper_evident(tmp_path) -> None:
    store = RunStore(tmp_path)
    a = store.save(synthetic_record(8, rows=30))
    b = store.save(synthetic_record(9, rows=30), parent=a)
    c = store.save(synthetic_record(10, rows=30), parent=b)
    v = store.verify(c)
    assert v.ok and v.chain == [c, b, a] and v.parent_id == b
    rec_c = store.load(c)
    assert rec_c.parent_id == b
    assert rec_c.parent_digest == store.verify(b).manifest_sha256
    # rewrite the grandparent's manifest consistently (digest file updated too): its own
    # folder verifies, but the child's recorded digest no longer matches
    da = store.run_dir(a)
    m = json.loads((da / "manifest.json").read_text())
    m["solver"]["message"] = "edited"  # a free-text field no semantic check can recompute
    new = (json.dumps(m, indent=1) + "\n").encode()
    import hashlib

    (da / "manifest.json").write_bytes(new)
    (da / "manifest.sha256").write_text(f"{hashlib.sha256(new).hexdigest()}  manifest.json\n")
    store.rebuild_catalog()  # forget the digest the catalog saw at save time
    assert store.verify(a).ok
    vc = store.verify(c)
    assert not vc.ok and not vc.parent_chain_ok
    assert any(a in p for p in vc.problems)
    with pytest.raises(IntegrityError):
        store.load(c)
    # a record derived from b, saved after b's manifest was rewritten, is refused
    db = store.run_dir(b)
    mb = json.loads((db / "manifest.json").read_text())
    mb["solver"]["message"] = "edited"
    newb = (json.dumps(mb, indent=1) + "\n").encode()
    (db / "manifest.json").write_bytes(newb)
    (db / "manifest.sha256").write_text(f"{hashlib.sha256(newb).hexdigest()}  manifest.json\n")
    with pytest.raises(IntegrityError, match="changed since"):
        store.save(rec_c)  # rec_c.parent_id = b with b's digest as it was at load time
    # a parent missing from the store breaks the chain too
    import shutil

    shutil.rmtree(da)
    assert not store.verify(b).ok


def test_consistent_forgery_is_caught_by_the_catalog(tmp_path) -> None:
    """Rewriting manifest.json *and* manifest.sha256 still differs from the digest the
    catalog recorded at save time (until someone also rebuilds the catalog)."""
    import hashlib

    store = RunStore(tmp_path)
    rid = store.save(synthetic_record(3, rows=10))
    d = store.run_dir(rid)
    m = json.loads((d / "manifest.json").read_text())
    m["solver"]["status"] = "converged"
    new = (json.dumps(m, indent=1) + "\n").encode()
    (d / "manifest.json").write_bytes(new)
    (d / "manifest.sha256").write_text(f"{hashlib.sha256(new).hexdigest()}  manifest.json\n")
    v = store.verify(rid)
    assert not v.ok
    assert "manifest.json: digest differs from the one the catalog recorded at save" in v.problems
    # the run checked against itself says what is wrong, whatever the catalog says
    assert any(p.startswith("manifest.json: solver.status says converged") for p in v.problems)


def test_unknown_parent_is_refused(tmp_path) -> None:
    store = RunStore(tmp_path)
    with pytest.raises(InvalidInputError, match="no run"):
        store.save(synthetic_record(1, rows=10), parent=new_run_id())
    with pytest.raises(InvalidInputError):
        store.save(synthetic_record(1, rows=10), parent="../../etc")
    assert store.runs() == []


# ----------------------------------------------------------------------------- catalog


def test_catalog_filters_and_rebuild(tmp_path, rng) -> None:
    store = RunStore(tmp_path)
    ids = [store.save(synthetic_record(s, rows=20)) for s in range(3)]
    smo = _smo_record(rng, n=30)
    ids.append(store.save(smo, parent=ids[0]))
    rows = store.runs()
    assert [r["run_id"] for r in rows] == sorted(ids)
    assert {r["run_id"] for r in store.runs(status="converged")} == {ids[3]}
    assert {r["run_id"] for r in store.runs(kernel="poly")} == {ids[3]}
    assert len(store.runs(solver="smo", status=["converged", "iteration_limit"])) == 4
    assert [r["run_id"] for r in store.runs(fingerprint="0" * 64)] == [ids[0]]
    assert [r["run_id"] for r in store.runs(parent=ids[0])] == [ids[3]]
    r3 = store.runs(converged=True)[0]
    assert r3["iterations"] == smo.result.iterations and r3["n"] == 30
    assert r3["max_violation"] == smo.result.certificate.max_violation
    assert r3["command"] == "kktrace train a.csv"
    with pytest.raises(InvalidInputError, match="unknown filter"):
        store.runs(colour="red")
    # lose the catalog: listing rebuilds it from the folders
    for f in tmp_path.glob("catalog.sqlite*"):
        f.unlink()
    assert [r["run_id"] for r in store.runs()] == sorted(ids)
    assert store.rebuild_catalog() == 4
    # a folder removed by hand disappears from the listing
    import shutil

    shutil.rmtree(store.run_dir(ids[1]))
    assert ids[1] not in {r["run_id"] for r in store.runs()}


def test_damaged_catalog_is_set_aside_and_rebuilt(tmp_path) -> None:
    store = RunStore(tmp_path)
    ids = {store.save(synthetic_record(s, rows=10)) for s in range(2)}
    for f in tmp_path.glob("catalog.sqlite-*"):
        f.unlink()
    store.catalog_path.write_bytes(b"this is not an SQLite database" * 10)
    # reading never writes: the listing comes from the folders and says why
    listing = store.listing()
    assert {r["run_id"] for r in listing.rows} == ids
    assert "catalog not used" in listing.catalog_note
    assert list(tmp_path.glob("catalog.sqlite.damaged-*")) == []
    assert all(store.verify(r).ok for r in ids)
    # the next save (a writer) sets the damaged file aside and re-indexes every folder
    with pytest.warns(UserWarning, match="damaged"):
        ids.add(store.save(synthetic_record(5, rows=10)))
    assert len(list(tmp_path.glob("catalog.sqlite.damaged-*"))) == 1
    assert set(Catalog(tmp_path).digests()) == ids
    assert store.listing().catalog_note is None


def test_temp_folders_are_ignored_and_cleaned(tmp_path) -> None:
    store = RunStore(tmp_path)
    rid = store.save(synthetic_record(1, rows=10))
    dead = tmp_path / f".tmp-{new_run_id()}-999999999"
    dead.mkdir()
    (dead / "trace.parquet").write_bytes(b"partial")
    live = tmp_path / f".tmp-{new_run_id()}-{os.getpid()}"
    live.mkdir()
    assert [r["run_id"] for r in store.runs()] == [rid]
    assert store.rebuild_catalog() == 1
    removed = store.clean_temp()
    assert removed == [dead.name] and live.exists()
    assert store.clean_temp(max_age_seconds=-1) == [live.name]
    assert store.temp_folders() == []


def _as_version_1(manifest: dict, qp: bool) -> dict:
    """The manifest as format version 1 wrote it: the option and certificate names before
    the version-2 renaming (tol, max_iter, cache_mb, tau)."""
    old = json.loads(json.dumps(manifest))
    old["format_version"] = 1
    back = {"kkt_tol": "tol", "iteration_limit": "max_iter", "row_cache_mb": "cache_mb",
            "curvature_floor": "tau"}
    if qp:
        back = {"interior_point_tol": "tol", "iteration_limit": "max_iter"}
    old["solver"]["options"] = {back.get(k, k): v for k, v in old["solver"]["options"].items()}
    old["certificate"] = {("tol" if k == "kkt_tol" else k): v
                          for k, v in old["certificate"].items()}
    return old


@pytest.mark.parametrize("method", ["smo", "qp"])
def test_format_version_1_manifests_are_still_read(tmp_path, rng, method) -> None:
    from solver.solvers import solve
    from solver.store.codec import decode_record

    X = rng.normal(size=(40, 3))
    prob = binary_classification(X, np.where(X[:, 0] > 0, 1, -1), C=1.0, kernel=LinearKernel())
    rec = RunRecord(problem=prob, result=solve(prob, method=method, trace="full"),
                    data={"fingerprint": "x" * 64}, standardiser=Standardiser.fit(X))
    store = RunStore(tmp_path)
    rid = store.save(rec)
    folder = store.run_dir(rid)
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["format_version"] == FORMAT_VERSION == 3
    blobs = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    old = _as_version_1(manifest, qp=method == "qp")
    assert "tol" in old["certificate"] and "kkt_tol" not in old["certificate"]
    new, v1 = decode_record(manifest, blobs), decode_record(old, blobs)
    assert v1.result.options == new.result.options
    assert v1.result.certificate.kkt_tol == new.result.certificate.kkt_tol
    assert same_bits(v1.result.alpha, new.result.alpha)
    if method == "qp":
        assert "interior_point_tol" in v1.result.options and "kkt_tol" in v1.result.options
    else:
        assert {"kkt_tol", "iteration_limit", "row_cache_mb", "curvature_floor"} <= set(
            v1.result.options)
    old["format_version"] = 4
    with pytest.raises(IntegrityError, match="format_version 4 is not supported"):
        decode_record(old, blobs)


def test_format_version_2_smo_runs_read_as_pair_runs_with_an_outer_column(tmp_path, rng) -> None:
    # version 2 had no trace column "outer" and no option "working_set": such a run is
    # read as a two-variable run whose every step was its own outer iteration
    import io

    import pyarrow.parquet as pq

    from solver.solvers import solve
    from solver.store.codec import decode_record

    X = rng.normal(size=(40, 3))
    prob = binary_classification(X, np.where(X[:, 0] > 0, 1, -1), C=1.0, kernel=LinearKernel())
    rec = RunRecord(problem=prob, result=solve(prob, method="smo", trace="full"),
                    data={"fingerprint": "x" * 64}, standardiser=Standardiser.fit(X))
    store = RunStore(tmp_path)
    folder = store.run_dir(store.save(rec))
    manifest = json.loads((folder / "manifest.json").read_text())
    blobs = {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}
    table = pq.read_table(io.BytesIO(blobs["trace.parquet"]))
    assert "outer" in table.column_names
    old_table = table.drop(["outer"])
    buf = io.BytesIO()
    pq.write_table(old_table, buf)
    blobs["trace.parquet"] = buf.getvalue()
    old = json.loads(json.dumps(manifest))
    old["format_version"] = 2
    del old["trace"]["columns"]["outer"]
    del old["solver"]["options"]["working_set"]
    v2 = decode_record(old, blobs)
    cols = v2.result.trace.columns
    assert np.array_equal(cols["outer"], cols["iteration"])
    assert v2.result.options["working_set"] == "pair"
