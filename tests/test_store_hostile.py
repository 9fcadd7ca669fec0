"""Malformed and hostile run files: clear errors naming file and field; nothing is executed."""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from test_store_support import synthetic_record

from solver.errors import IntegrityError, InvalidInputError
from solver.store import RunStore
from solver.store.format import read_npz, read_table, write_table


@pytest.fixture
def run(tmp_path):
    store = RunStore(tmp_path / "store")
    rid = store.save(synthetic_record(11, rows=60))
    return store, rid, store.run_dir(rid)


def _rewrite_manifest(d: Path, edit) -> None:
    """Edit manifest.json, keep manifest.sha256 consistent and re-index the catalog (a
    thorough forgery: only the format checks stand between it and the caller)."""
    m = json.loads((d / "manifest.json").read_text())
    edit(m)
    b = (json.dumps(m, indent=1) + "\n").encode()
    (d / "manifest.json").write_bytes(b)
    (d / "manifest.sha256").write_text(f"{hashlib.sha256(b).hexdigest()}  manifest.json\n")
    RunStore(d.parent).rebuild_catalog()


def _refresh_digest(d: Path, name: str) -> None:
    data = (d / name).read_bytes()

    def edit(m):
        m["files"][name] = {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}

    _rewrite_manifest(d, edit)


# ----------------------------------------------------------------------------- Parquet


@pytest.mark.parametrize("cut", [0, 4, 100, -8, -1])
def test_truncated_parquet_is_a_clear_error(run, cut) -> None:
    store, rid, d = run
    data = (d / "trace.parquet").read_bytes()
    (d / "trace.parquet").write_bytes(data[:cut] if cut else b"")
    with pytest.raises(IntegrityError, match="trace.parquet"):
        store.load(rid)
    with pytest.raises(IntegrityError, match="trace.parquet"):
        store.load(rid, verify=False)
    _refresh_digest(d, "trace.parquet")  # even with forged digests: a format error, not a crash
    with pytest.raises(IntegrityError, match="trace.parquet"):
        store.load(rid)


def test_parquet_with_other_columns_or_types_is_refused(run) -> None:
    store, rid, d = run
    for cols in ({"iteration": np.arange(60)},  # columns missing
                 {**{c: np.zeros(60) for c in ("iteration", "i", "j", "alpha_i", "alpha_j",
                                                "step", "objective", "violation", "active")}}):
        (d / "trace.parquet").write_bytes(write_table(cols))
        _refresh_digest(d, "trace.parquet")
        with pytest.raises(IntegrityError, match="trace.parquet"):
            store.load(rid)
    with pytest.raises(IntegrityError, match="x.parquet: not a readable"):
        read_table(b"PAR1garbagePAR1", "x.parquet")


# ----------------------------------------------------------------------------- manifest


@pytest.mark.parametrize("path, value, field", [
    (("solver", "iterations"), "many", "solver.iterations"),
    (("solver", "iterations"), True, "solver.iterations"),
    (("solver", "status"), 0, "solver.status"),
    (("solver", "status"), "finished", "solver.status"),
    (("solver", "options"), [1, 2], "solver.options"),
    (("problem", "n"), "40", "problem.n"),
    (("problem", "n"), 41, "solution.npz"),
    (("problem", "kernel", "name"), "os.system", "problem.kernel"),
    (("problem", "kernel", "params", "gamma"), "__import__('os')", "problem.kernel"),
    (("problem", "kernel", "params", "gamma"), [1.0], "problem.kernel.params.gamma"),
    (("certificate", "max_violation"), "small", "certificate.max_violation"),
    (("certificate", "max_violation"), {"$float": "huge"}, "$float"),
    (("certificate",), None, "certificate"),
    (("trace", "rows"), 59, "trace.rows"),
    (("trace", "level"), "everything", "trace.level"),
    (("trace", "columns", "i"), "object", "trace.columns.i"),
    (("trace", "event_kinds"), {"x": "shrink"}, "trace.event_kinds"),
    (("format_version",), "1", "format_version"),
    (("format_version",), 99, "format_version"),
    (("format",), "pickle", "format"),
    (("run_id",), "../../etc", "run_id"),
    (("parent",), {"run_id": "../x", "manifest_sha256": "0" * 64}, "parent.run_id"),
    (("attachments",), ["explanation"], "attachments"),
    (("attachments", "holdout", "kind"), "python", "attachments.holdout.kind"),
    (("attachments", "../x"), {"kind": "json"}, "attachments"),
    (("data",), "all of it", "data"),
])
def test_manifest_with_wrong_types_is_named(run, path, value, field) -> None:
    store, rid, d = run

    def edit(m):
        node = m
        for k in path[:-1]:
            node = node[k]
        node[path[-1]] = value

    _rewrite_manifest(d, edit)
    with pytest.raises(IntegrityError) as exc:
        store.load(rid)
    assert field in str(exc.value)
    assert "manifest.json" in str(exc.value) or "solution.npz" in str(exc.value)


@pytest.mark.parametrize("text", [
    b"", b"[]", b"{", b'{"format": NaN}', b"\xff\xfe", b"[" * 100_000 + b"]" * 100_000,
])
def test_unparseable_manifest_is_named(run, text) -> None:
    store, rid, d = run
    (d / "manifest.json").write_bytes(text)
    (d / "manifest.sha256").write_text(f"{hashlib.sha256(text).hexdigest()}  manifest.json\n")
    store.rebuild_catalog()
    with pytest.raises(IntegrityError, match="manifest.json"):
        store.load(rid, verify=False)
    v = store.verify(rid)
    assert not v.ok and any("manifest.json" in p for p in v.problems)


def test_files_table_cannot_point_outside_the_run(run, tmp_path) -> None:
    store, rid, d = run
    secret = tmp_path / "secret.json"
    secret.write_text("{}")

    def edit(m):
        m["files"]["../../secret.json"] = {"sha256": hashlib.sha256(b"{}").hexdigest(),
                                            "bytes": 2}

    _rewrite_manifest(d, edit)
    v = store.verify(rid)
    assert not v.ok and any("invalid file name" in p for p in v.problems)
    with pytest.raises(IntegrityError, match="invalid file name"):
        store.load(rid, verify=False)


# ----------------------------------------------------------------------------- npz


class _Trap:
    """Unpickling this would create the marker file (the classic pickle payload)."""

    marker = ""

    def __reduce__(self):
        return (open, (self.marker, "w"))


def _hostile_npz(original: bytes, member: str, marker: Path) -> bytes:
    trap = _Trap()
    trap.marker = str(marker)
    obj = np.empty(3, dtype=object)
    obj[:] = [trap, trap, trap]
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(original)) as src, zipfile.ZipFile(out, "w") as dst:
        for name in src.namelist():
            if name == member + ".npy":
                with dst.open(name, "w") as fh:
                    np.lib.format.write_array(fh, obj, allow_pickle=True)
            else:
                dst.writestr(name, src.read(name))
    return out.getvalue()


@pytest.mark.parametrize("fname, member", [("solution.npz", "alpha"),
                                           ("snapshots.npz", "snapshots"),
                                           ("arrays.npz", "a0"), ("model.npz", "coefficients")])
def test_npz_with_object_arrays_is_refused_and_never_unpickled(run, tmp_path, fname,
                                                               member) -> None:
    store, rid, d = run
    marker = tmp_path / "pwned"
    (d / fname).write_bytes(_hostile_npz((d / fname).read_bytes(), member, marker))
    # sanity: numpy itself *would* run the payload if pickle were allowed
    with np.load(io.BytesIO((d / fname).read_bytes()), allow_pickle=True) as z:
        z[member]
    assert marker.exists()
    marker.unlink()
    _refresh_digest(d, fname)
    with pytest.raises(IntegrityError, match=fname) as exc:
        if fname == "model.npz":
            store.load_model(rid, require_converged=False)
        else:
            store.load(rid)
    assert "object" in str(exc.value)
    assert not marker.exists()


def test_npz_member_names_and_shapes_are_checked(tmp_path) -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        with zf.open("../evil.npy", "w") as fh:
            np.lib.format.write_array(fh, np.zeros(3))
    with pytest.raises(IntegrityError, match="unexpected member"):
        read_npz(buf.getvalue(), "x.npz")
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        with zf.open("alpha.npy", "w") as fh:
            np.lib.format.write_array(fh, np.zeros(4))
    with pytest.raises(IntegrityError, match="shape"):
        read_npz(buf.getvalue(), "x.npz", {"alpha": ("f", (5,))})
    with pytest.raises(IntegrityError, match="missing arrays"):
        read_npz(buf.getvalue(), "x.npz", {"beta": ("f", (4,))})
    with pytest.raises(IntegrityError, match="x.npz: not a valid npz"):
        read_npz(b"PK\x03\x04 truncated", "x.npz")
    data = buf.getvalue()
    with pytest.raises(IntegrityError, match="x.npz"):
        read_npz(data[: len(data) // 2], "x.npz")


# ----------------------------------------------------------------------------- run ids


@pytest.mark.parametrize("bad", ["../x", "a/b", "..", "/etc/passwd", "x\\y", "", "20260101",
                                 "20261202T042024939170Z-98220a27eb83/../x"])
def test_run_ids_with_path_separators_are_refused(run, bad) -> None:
    store, _, _ = run
    for call in (store.load, store.verify, store.run_dir, store.load_model):
        with pytest.raises(InvalidInputError, match="not a run id"):
            call(bad)


def test_unknown_run_is_a_clear_error(run) -> None:
    store, rid, _ = run
    other = rid[:-1] + ("0" if rid[-1] != "0" else "1")
    with pytest.raises(InvalidInputError, match="no run"):
        store.load(other)
    v = store.verify(other)
    assert not v.ok and "missing" in v.problems[0]
