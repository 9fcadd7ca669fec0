"""Output paths that could damage a run, and the leftovers of killed writers."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
from test_store_support import synthetic_record

import solver
from solver.store import RunStore, new_run_id


@pytest.fixture()
def store(tmp_path):
    st = RunStore(tmp_path / "s")
    rid = st.save(synthetic_record(1, rows=20))
    return st, rid


@pytest.mark.parametrize("where", ["RUN/manifest.json", "RUN", "RUN/sub/dir/x.csv",
                                   "catalog.sqlite", "catalog.sqlite-wal", "audit-log.jsonl",
                                   ".tmp-x-1/f.csv"])
def test_output_inside_a_run_or_the_catalog_is_refused(store, where) -> None:
    st, rid = store
    target = st.root / where.replace("RUN", rid)
    with pytest.raises(solver.InvalidInputError) as exc:
        solver.check_output_path(target, store=st)
    msg = str(exc.value)
    assert (f"inside run {rid}" in msg) if "RUN" in where else (where.split("/")[0] in msg)


def test_output_through_a_link_or_in_another_store_is_refused(store, tmp_path) -> None:
    st, rid = store
    link = tmp_path / "innocent"
    link.symlink_to(st.run_dir(rid), target_is_directory=True)
    with pytest.raises(solver.InvalidInputError, match=f"inside run {rid}"):
        solver.check_output_path(link / "scores.csv", store=st)
    # a run folder of a store other than --store is recognised by its manifest pair
    other = RunStore(tmp_path / "other")
    with pytest.raises(solver.InvalidInputError, match=f"inside run {rid}"):
        solver.check_output_path(st.run_dir(rid) / "model.json", store=other)


def test_output_outside_the_runs_is_allowed(store, tmp_path) -> None:
    st, _ = store
    for ok in (tmp_path / "scores.csv", st.root / "reports" / "r1", st.root / "notes.txt"):
        assert solver.check_output_path(ok, store=st) == ok


def test_report_and_explanation_refuse_a_run_folder(store) -> None:
    st, rid = store
    with pytest.raises(solver.InvalidInputError, match=f"inside run {rid}"):
        solver.export_explanation(rid, st.run_dir(rid), store=st)
    assert st.verify(rid).ok


def test_listing_reports_temp_folders_and_clean_removes_only_dead_ones(store) -> None:
    st, rid = store
    dead = st.root / f".tmp-{new_run_id()}-999999999"
    dead.mkdir()
    (dead / "trace.parquet").write_bytes(b"partial")
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        live = st.root / f".tmp-{new_run_id()}-{sleeper.pid}"
        live.mkdir()
        # a link named like a temporary folder, pointing at a run: never followed or removed
        trap = st.root / f".tmp-{new_run_id()}-999999998"
        trap.symlink_to(st.run_dir(rid), target_is_directory=True)
        listing = solver.store_listing(store=st)
        temps = {t["folder"]: t for t in listing.temp_folders}
        assert set(temps) == {dead.name, live.name}
        assert temps[dead.name]["writer_running"] is False
        assert temps[live.name]["writer_running"] is True
        assert [r["run_id"] for r in listing.rows] == [rid]
        assert solver.clean_store(store=st) == [dead.name]
        assert live.is_dir() and trap.is_symlink() and st.verify(rid).ok
    finally:
        sleeper.kill()
        sleeper.wait()
    assert solver.clean_store(store=st) == [live.name]
    assert st.temp_folders() == [] and st.run_ids() == [rid]


def test_listing_reports_a_requested_challenger_that_was_never_saved(tmp_path) -> None:
    from dataclasses import replace

    st = RunStore(tmp_path / "s")
    both = replace(synthetic_record(2, rows=20), attachments={
        "command": {"argv": ["kktrace", "train", "a.csv", "--solver", "both"],
                    "text": "kktrace train a.csv --solver both"}})
    alone = replace(synthetic_record(3, rows=20), attachments={
        "command": "kktrace train a.csv --solver smo"})
    orphan = st.save(both)
    st.save(alone)
    paired = st.save(both)
    qp = replace(synthetic_record(4, rows=20), result=replace(synthetic_record(4).result,
                                                             solver="qp"))
    st.save(qp, parent=paired)
    listing = st.listing()
    assert [m["run_id"] for m in listing.missing_challengers] == [orphan]


def test_reading_never_writes_the_catalog(store) -> None:
    """Listing a store whose catalog lacks a folder indexes nothing; the listing says so."""
    st, rid = store
    for f in st.root.glob("catalog.sqlite*"):
        f.unlink()
    listing = st.listing()
    assert [r["run_id"] for r in listing.rows] == [rid]
    assert not st.catalog_path.exists()
    st.catalog_path.mkdir()  # a catalog that is a directory
    listing = st.listing()
    assert [r["run_id"] for r in listing.rows] == [rid]
    assert "is not a regular file" in listing.catalog_note
    assert st.verify(rid).ok
    with pytest.warns(solver.StoreWarning, match="catalog is stale"):
        rid2 = st.save(synthetic_record(5, rows=20))
    assert {r["run_id"] for r in st.runs()} == {rid, rid2}
    os.rmdir(st.catalog_path)
