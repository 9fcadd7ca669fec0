"""Runs serialised where they were computed and written by another process's store
(a study's workers encode, the client writes: issue 20), and catalog rows deferred to the
end of a block of saves."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from test_store_support import synthetic_record

from solver.errors import IntegrityError, InvalidInputError
from solver.store import RunStore
from solver.store.integrity import MANIFEST
from solver.store.store import EncodedRun, encode_run


def _folders(st: RunStore) -> list[str]:
    return sorted(p.name for p in st.root.iterdir() if p.is_dir())


def test_an_encoded_run_is_the_run_save_would_write(tmp_path):
    rec = synthetic_record(3, rows=60)
    st = RunStore(tmp_path / "s")
    plain = st.save(rec)
    enc = encode_run(rec)
    rid = st.save_encoded(enc)
    assert rid == enc.run_id and st.verify(rid).ok
    a, b = st.load(plain), st.load(rid)
    np.testing.assert_array_equal(a.result.alpha, b.result.alpha)
    for name, col in a.result.trace.columns.items():
        np.testing.assert_array_equal(col, b.result.trace.columns[name])
    files_a = {p.name: p.read_bytes() for p in st.run_dir(plain).iterdir()}
    files_b = {p.name: p.read_bytes() for p in st.run_dir(rid).iterdir()}
    assert set(files_a) == set(files_b)
    # only the files naming the run (its id, its time) differ
    differ = {n for n in files_a if files_a[n] != files_b[n]}
    assert differ <= {MANIFEST, "manifest.sha256", "model.json"}
    assert {r["run_id"] for r in st.runs()} == {plain, rid}


@pytest.mark.parametrize("damage", ["flip a byte", "drop a file", "add a file",
                                    "other run id", "reserved name"])
def test_an_encoded_run_that_does_not_describe_itself_is_refused(tmp_path, damage):
    enc = encode_run(synthetic_record(4, rows=40))
    files = dict(enc.files)
    name = sorted(files)[0]
    if damage == "flip a byte":
        b = bytearray(files[name])
        b[len(b) // 2] ^= 1
        files[name] = bytes(b)
    elif damage == "drop a file":
        del files[name]
    elif damage == "add a file":
        files["extra.json"] = b"{}"
    elif damage == "reserved name":
        files[MANIFEST] = files.pop(name)
    run_id = enc.run_id
    if damage == "other run id":
        run_id = encode_run(synthetic_record(4, rows=40)).run_id
    st = RunStore(tmp_path / "s")
    with pytest.raises(IntegrityError, match="does not describe its files"):
        st.save_encoded(EncodedRun(run_id=run_id, files=files, manifest=enc.manifest))
    assert not st.root.exists() or _folders(st) == []


def test_encode_run_takes_runs_without_a_parent(tmp_path):
    rec = dataclasses.replace(synthetic_record(5, rows=20), parent_id="x")
    with pytest.raises(InvalidInputError, match="without a parent"):
        encode_run(rec)


def test_deferred_index_writes_the_rows_when_the_block_ends(tmp_path):
    st = RunStore(tmp_path / "s")
    first = st.save(synthetic_record(6, rows=20))
    with st.deferred_index():
        inside = [st.save_encoded(encode_run(synthetic_record(k, rows=20))) for k in (7, 8)]
        inside.append(st.save(synthetic_record(9, rows=20)))
        assert set(st._catalog.read_rows()) == {first}  # nothing indexed yet
        listing = st.listing()  # the folders are the truth meanwhile
        assert {r["run_id"] for r in listing.rows} == {first, *inside}
        assert "catalog is stale" in (listing.catalog_note or "")
    assert set(st._catalog.read_rows()) == {first, *inside}
    assert st.listing().catalog_note is None


def test_rows_of_a_block_left_by_an_error_are_written_too(tmp_path):
    st = RunStore(tmp_path / "s")
    with pytest.raises(RuntimeError), st.deferred_index():
        rid = st.save(synthetic_record(10, rows=20))
        raise RuntimeError("the caller failed after one save")
    assert set(st._catalog.read_rows()) == {rid}
