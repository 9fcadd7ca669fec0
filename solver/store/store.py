"""RunStore: atomic, concurrent-safe run folders under one root, indexed by an SQLite catalog.

Layout of a store root (see ``traces/README.md``)::

    <root>/catalog.sqlite            index (rebuildable from the folders)
    <root>/<run id>/manifest.json    one folder per complete run
    <root>/.tmp-<run id>-<pid>/      a save in progress (or left by a crash; ignored)

A save writes every file into a temporary folder inside the root, fsyncs each file
and the folder, then renames the folder to its run id (atomic on POSIX file systems)
and fsyncs the root; only then is the catalog row written.  A crash therefore leaves
either no run folder or a complete one; :meth:`RunStore.runs` re-indexes folders the
catalog has not seen and forgets rows whose folder is gone.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import sqlite3
import stat
import time
import warnings
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ..errors import IntegrityError, InvalidInputError, StoreWarning
from ..model import Model
from ..run import ParentRecord, RunRecord
from . import auditlog
from .catalog import (
    BUSY_TIMEOUT_S,
    CATALOG_FILE,
    Catalog,
    CatalogUnavailable,
    query_rows,
    row_from_manifest,
)
from .codec import decode_model, decode_record, encode_record
from .format import check_run_id, dump_json, is_run_id, new_run_id, parse_json, read_npz, utc_stamp
from .integrity import (
    MANIFEST,
    MANIFEST_DIGEST,
    SIGNATURE,
    Verification,
    check_folder,
    digest_file_bytes,
    parse_digest_file,
    read_regular,
    sha256_hex,
)
from .parents import is_parent_manifest
from .semantic import manifest_field_problems, semantic_problems

__all__ = ["RunStore", "Listing", "ENV_VAR", "DEFAULT_DIR", "TEMP_PREFIX", "EncodedRun",
           "encode_run", "finish_manifest"]

ENV_VAR = "KKTRACE_STORE"
DEFAULT_DIR = "traces"
TEMP_PREFIX = ".tmp-"
_MAX_CHAIN = 10_000
#: names a run's own files may not take (written by the store itself)
_RESERVED = frozenset({MANIFEST, MANIFEST_DIGEST, SIGNATURE})


def _write_durable(path: Path, data: bytes) -> None:
    """Create ``path`` (must not exist), write ``data``, flush and fsync."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view):]
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _files_table(files: Mapping[str, bytes]) -> dict[str, dict[str, Any]]:
    """A manifest's ``files``: name → SHA-256 and size."""
    return {name: {"sha256": sha256_hex(b), "bytes": len(b)} for name, b in files.items()}


def finish_manifest(manifest: dict[str, Any], files: Mapping[str, bytes]) -> bytes:
    """Add the files table (:func:`_files_table`) to ``manifest``; its JSON bytes."""
    manifest["files"] = _files_table(files)
    return dump_json(manifest)


@dataclass(frozen=True, eq=False)
class EncodedRun:
    """A run serialised where it was computed (:func:`encode_run`), for a
    :class:`RunStore` elsewhere to write (:meth:`RunStore.save_encoded`): the run id, the
    files by name and the bytes of ``manifest.json`` (its files table included)."""

    run_id: str
    files: Mapping[str, bytes]
    manifest: bytes


def encode_run(record: RunRecord) -> EncodedRun:
    """Serialise ``record`` (a run without a parent) exactly as :meth:`RunStore.save`
    would, without touching any store: a fresh run id and creation time from this
    process's clock.  Pure apart from the clock and the id's random bits."""
    if record.parent_id is not None:
        raise InvalidInputError("encode_run() takes runs without a parent; use RunStore.save")
    now = datetime.now(timezone.utc)
    run_id = new_run_id(now)
    files, manifest = encode_record(record, run_id=run_id, created=utc_stamp(now), parent=None)
    return EncodedRun(run_id=run_id, files=files, manifest=finish_manifest(manifest, files))


def _missing_challengers(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """SMO runs trained with ``--solver both`` whose QP challenger run was never saved
    (the writer was killed between the two saves).  The request is read from the run's
    recorded command; a challenger skipped for size is recorded and not reported."""
    children = {r.get("parent_id") for r in rows if r.get("solver") == "qp"}
    out = []
    for r in rows:
        if r.get("solver") != "smo" or r["run_id"] in children:
            continue
        cmd = r.get("command") or ""
        if "--solver both" in cmd or "solver='both'" in cmd:
            out.append({"run_id": r["run_id"], "created": r.get("created")})
    return out


@dataclass(frozen=True)
class Listing:
    """What :meth:`RunStore.listing` found.

    rows : catalog-shaped rows of the matching runs, oldest first.
    catalog_note : why the catalog was not (fully) used, or None when it was current.
    temp_folders : ``.tmp-*`` folders: ``folder``, ``pid``, ``writer_running``, ``age_seconds``.
    missing_challengers : SMO runs whose requested QP challenger was never saved.
    parents : parent record id → its members (``run_id``, ``role``, ``key``), for the
        parents among ``rows`` (listings fold the members under their parent).
    """

    rows: list[dict[str, Any]]
    catalog_note: str | None = None
    temp_folders: list[dict[str, Any]] = field(default_factory=list)
    missing_challengers: list[dict[str, Any]] = field(default_factory=list)
    parents: dict[str, list[dict[str, Any]]] = field(default_factory=dict)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class RunStore:
    """A folder of runs plus its catalog.

    Parameters
    ----------
    root : store folder; None → ``$KKTRACE_STORE`` if set, else ``./traces``.  The
        folder is created by the first :meth:`save`.
    """

    def __init__(self, root: str | Path | None = None, *,
                 signing_key: str | Path | None = None) -> None:
        if root is None:
            root = os.environ.get(ENV_VAR) or DEFAULT_DIR
        self.root = Path(root).expanduser().absolute()
        self._catalog = Catalog(self.root)
        #: catalog rows waiting for the end of a :meth:`deferred_index` block, or None
        self._pending: list[dict[str, Any]] | None = None
        from .signing import SIGNING_KEY_ENV, load_private_key

        if signing_key is None:
            signing_key = os.environ.get(SIGNING_KEY_ENV) or None
        #: (Ed25519 private key, signer name) every save signs with, or None
        self.signer = None if signing_key is None else load_private_key(signing_key)

    def __repr__(self) -> str:
        return f"RunStore({str(self.root)!r})"

    # ------------------------------------------------------------------ paths

    def run_dir(self, run_id: str) -> Path:
        """Folder of ``run_id`` (validated: a run id never holds a path separator)."""
        return self.root / check_run_id(run_id)

    def _existing(self, run_id: str) -> Path:
        d = self.run_dir(run_id)
        if not os.path.lexists(d):
            raise InvalidInputError(f"no run {run_id} in store {self.root}")
        return d

    def run_ids(self) -> list[str]:
        """Ids of every run folder (complete runs only; temporary folders are ignored)."""
        if not self.root.is_dir():
            return []
        return sorted(e.name for e in os.scandir(self.root) if is_run_id(e.name) and e.is_dir())

    # ------------------------------------------------------------------ save

    def _write_folder(self, run_id: str, files: Mapping[str, bytes], mbytes: bytes,
                      parent_id: str | None) -> tuple[str, Any]:
        """Write a run (or parent) folder atomically: files, manifest (``mbytes``, its
        files table already in it: :func:`finish_manifest`), digest, signature, the audit
        entry, then one rename, then a sync of the root.  Returns (manifest digest, the
        audit log's note or None)."""
        mdigest = sha256_hex(mbytes)
        self.root.mkdir(parents=True, exist_ok=True)
        tmp = self.root / f"{TEMP_PREFIX}{run_id}-{os.getpid()}"
        tmp.mkdir()
        try:
            for name, data in files.items():
                _write_durable(tmp / name, data)
            _write_durable(tmp / MANIFEST, mbytes)
            _write_durable(tmp / MANIFEST_DIGEST, digest_file_bytes(mdigest))
            if self.signer is not None:
                from .signing import signature_file

                _write_durable(tmp / SIGNATURE, signature_file(
                    self.signer[0], self.signer[1], mdigest, utc_stamp()))
            _fsync_dir(tmp)
            # logged just before the rename, so a run folder never lacks its entry (an entry
            # whose folder never appeared is a save that did not complete)
            note = auditlog.append(self.root, "run_created", run_id, {
                "manifest_sha256": mdigest, "parent": parent_id,
                "signer": None if self.signer is None else self.signer[1]})
            os.rename(tmp, self.root / run_id)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        try:  # make the rename itself durable; the run is complete and visible either way
            _fsync_dir(self.root)
        except OSError as exc:
            warnings.warn(f"run {run_id} saved, but syncing the store folder failed ({exc}); "
                          "the run may be lost if the machine crashes now", StoreWarning,
                          stacklevel=3)
        if note:
            warnings.warn(f"run {run_id} saved; {note}", StoreWarning, stacklevel=3)
        return mdigest, note

    def _index(self, manifest: Mapping[str, Any], mdigest: str, files: Mapping[str, bytes],
               mbytes: bytes) -> None:
        """The catalog row of a folder just written (now, or at the end of
        :meth:`deferred_index`), then the writer-side reconcile."""
        total = len(mbytes) + 65 + len(MANIFEST) + 1 + sum(len(b) for b in files.values())
        row = row_from_manifest(dict(manifest), mdigest, total)
        if self._pending is not None:
            self._pending.append(row)
            return
        self._upsert([row])

    def _upsert(self, rows: list[dict[str, Any]]) -> None:
        try:
            self._catalog.upsert(rows)
            self._index_missing()
        except sqlite3.Error as exc:  # the runs are stored; the next save indexes them
            warnings.warn(f"{len(rows)} run(s) saved, but the catalog was not updated within "
                          f"{BUSY_TIMEOUT_S:g} s ({exc}): the catalog is stale until a later save "
                          "indexes the folders; listings read the folders meanwhile",
                          StoreWarning, stacklevel=3)

    @contextlib.contextmanager
    def deferred_index(self) -> Iterator[RunStore]:
        """Within the ``with`` block, saves write their folders as usual but their catalog
        rows are written together when the block ends (one transaction instead of one
        per save: a study of hundreds of fits).  The folders are the truth either way: a
        process killed inside the block leaves folders the catalog lacks, which listings
        read from their manifests and the next save indexes."""
        if self._pending is not None:  # nested: the outer block writes the rows
            yield self
            return
        self._pending = []
        try:
            yield self
        finally:
            rows, self._pending = self._pending, None
            if rows:
                self._upsert(rows)

    def save_encoded(self, run: EncodedRun) -> str:
        """Store a run serialised elsewhere by :func:`encode_run` (a study's worker) and
        return its run id.  The bytes are checked against themselves first: the manifest
        names this run id, no parent, and exactly these files with their SHA-256 and
        sizes; anything else is an :class:`IntegrityError` and nothing is written."""
        if not isinstance(run, EncodedRun) or not is_run_id(run.run_id):
            raise IntegrityError("save_encoded() needs an EncodedRun with a well-formed run id")
        manifest = parse_json(run.manifest, MANIFEST)
        listed = manifest.get("files") if isinstance(manifest, dict) else None
        if (not isinstance(manifest, dict) or manifest.get("run_id") != run.run_id
                or manifest.get("parent") is not None or listed != _files_table(run.files)
                or any(not is_plain_name(n) or n in _RESERVED for n in run.files)):
            raise IntegrityError(f"encoded run {run.run_id}: its manifest does not describe "
                                 "its files (run id, parent or files table differ); not saved")
        mdigest, _ = self._write_folder(run.run_id, run.files, run.manifest, None)
        self._index(manifest, mdigest, run.files, run.manifest)
        return run.run_id

    def save(self, record: RunRecord, *, parent: str | None = None) -> str:
        """Store ``record`` as a new run and return its run id (always a new run, even for a
        record that was loaded from a store).

        ``parent`` (or, when omitted, ``record.parent_id``) names the run this one derives
        from; it must be in this store, and its manifest digest is recorded.  The run
        appears atomically: complete or not at all.
        """
        parent_id = parent if parent is not None else record.parent_id
        parent_m = None
        if parent_id is not None:
            pdir = self._existing(parent_id)
            try:
                pbytes = (pdir / MANIFEST).read_bytes()
                recorded = parse_digest_file((pdir / MANIFEST_DIGEST).read_bytes())
            except OSError as exc:
                raise IntegrityError(
                    f"parent run {parent_id}: cannot read its manifest ({exc})") from None
            pdigest = sha256_hex(pbytes)
            if recorded != pdigest:
                raise IntegrityError(f"parent run {parent_id}: manifest.json does not match "
                                     "manifest.sha256; verify the parent before deriving from it")
            if parent is None and record.parent_digest and record.parent_digest != pdigest:
                raise IntegrityError(f"parent run {parent_id} changed since this record was made "
                                     f"(digest {pdigest} vs recorded {record.parent_digest})")
            parent_m = {"run_id": parent_id, "manifest_sha256": pdigest}
        now = datetime.now(timezone.utc)
        run_id = new_run_id(now)
        files, manifest = encode_record(record, run_id=run_id, created=utc_stamp(now),
                                        parent=parent_m)
        mbytes = finish_manifest(manifest, files)
        mdigest, _ = self._write_folder(run_id, files, mbytes, parent_id)
        self._index(manifest, mdigest, files, mbytes)
        return run_id

    def _index_missing(self) -> None:
        """Writer-side reconcile: index folders the catalog lacks, drop rows of gone folders."""
        known = set(self._catalog.digests())  # read before listing (see module docstring)
        present = set(self.run_ids())
        if present - known:
            self._catalog.upsert(self._row(r) for r in sorted(present - known))
        if known - present:
            self._catalog.delete(sorted(known - present))

    # ------------------------------------------------------------------ load

    def _read_manifest(self, d: Path, run_id: str) -> tuple[dict[str, Any], bytes]:
        try:
            mbytes = (d / MANIFEST).read_bytes()
        except OSError:
            raise IntegrityError(f"run {run_id}: manifest.json is missing") from None
        manifest = parse_json(mbytes, MANIFEST)
        if not isinstance(manifest, dict):
            raise IntegrityError(f"run {run_id}: manifest.json must hold a JSON object")
        return manifest, mbytes

    def _blobs(self, d: Path, manifest: Mapping[str, Any], verify: bool) -> dict[str, bytes]:
        files = manifest.get("files")
        if not isinstance(files, dict):
            raise IntegrityError("manifest.json: field files must be an object")
        blobs = {}
        for name, entry in files.items():
            if not is_plain_name(name):
                raise IntegrityError(f"manifest.json: files lists an invalid file name {name!r}")
            try:
                data = (d / name).read_bytes()
            except OSError:
                raise IntegrityError(f"{name}: missing from run folder {d.name}") from None
            if verify and (not isinstance(entry, dict) or entry.get("sha256") != sha256_hex(data)):
                raise IntegrityError(f"{name}: content changed (sha256 mismatch)")
            blobs[name] = data
        return blobs

    def _inspect(
        self, run_id: str, trusted: Any = None
    ) -> tuple[Verification, RunRecord | None, dict[str, bytes]]:
        """Every check of :meth:`verify`; also the decoded record (None when any check
        failed) and the bytes that were checked (decoded from exactly these)."""
        check_run_id(run_id)
        d = self.root / run_id
        blobs: dict[str, bytes] = {}
        problems, manifest, digest, checked = check_folder(d, run_id, blobs)
        notes: list[str] = []
        record = None
        if manifest is not None:
            problems += manifest_field_problems(manifest)
        if not problems and manifest is not None:
            record = self._semantic(manifest, blobs, problems)
        try:
            recorded = self._catalog.read_digest(run_id)
        except CatalogUnavailable as exc:
            recorded = None
            notes.append(f"catalog not consulted ({CATALOG_FILE} {exc})")
        if recorded and digest and recorded != digest:
            problems.append(f"{MANIFEST}: digest differs from the one the catalog recorded at save")
        signer, is_trusted = self._signature(d, digest, trusted, problems, notes)
        self._audit_checks(run_id, manifest, digest, problems)
        chain = [run_id]
        parent_ok = True
        parent_id = None
        parent = manifest.get("parent") if isinstance(manifest, dict) else None
        if isinstance(parent, dict):
            parent_id = parent.get("run_id")
            parent_ok = self._check_chain(parent, chain, problems)
        elif parent is not None:
            problems.append(f"{MANIFEST}: field parent must be an object or null")
            parent_ok = False
        v = Verification(ok=not problems, run_id=run_id, problems=problems,
                         files_checked=checked, parent_id=parent_id,
                         parent_chain_ok=parent_ok, chain=chain, manifest_sha256=digest,
                         signer=signer, trusted=is_trusted, notes=notes)
        return v, (record if v.ok else None), blobs

    @staticmethod
    def _semantic(manifest: dict[str, Any], blobs: Mapping[str, bytes],
                  problems: list[str]) -> RunRecord | None:
        try:
            record = decode_record(manifest, blobs)
        except IntegrityError as exc:
            problems.append(str(exc))
            return None
        mj = ma = None
        if "model.json" in blobs and "model.npz" in blobs:
            try:
                mj = parse_json(blobs["model.json"], "model.json")
                ma = read_npz(blobs["model.npz"], "model.npz")
                if not isinstance(mj, dict):
                    raise IntegrityError("model.json: not a JSON object")
            except IntegrityError as exc:
                problems.append(str(exc))
                return record
        problems += semantic_problems(record, mj, ma)
        return record

    def _signature(self, d: Path, digest: str | None, trusted: Any, problems: list[str],
                   notes: list[str]) -> tuple[str | None, bool]:
        from .signing import check_signature

        sig = None
        path = d / SIGNATURE
        if os.path.lexists(path):
            sig, why = read_regular(path, limit=1 << 16)
            if sig is None:
                problems.append(f"{SIGNATURE}: {why}")
        if sig is None and not trusted:
            return None, False
        sp, sn, signer, ok = check_signature(sig, digest, list(trusted or ()))
        problems += sp
        notes += sn
        return signer, ok

    def _audit_checks(self, run_id: str, manifest: Any, digest: str | None,
                      problems: list[str]) -> None:
        lp, by_run, first = auditlog.check_log(self.root)
        problems += lp
        created = manifest.get("created") if isinstance(manifest, dict) else None
        if lp or first is None or not isinstance(created, str) or created <= first:
            return
        mine = [e for e in by_run.get(run_id, []) if e["event"] == "run_created"]
        if not mine:
            problems.append(f"{auditlog.LOG_FILE}: holds no run_created entry for run {run_id}, "
                            f"though the log began before it ({first}): entries were removed")
        elif digest and all(e["details"].get("manifest_sha256") != digest for e in mine):
            problems.append(f"{MANIFEST}: digest differs from the one the audit log recorded "
                            "when the run was created")

    def _checked_dir(self, run_id: str, verify: bool) -> Path:
        """The run's folder; with ``verify``, IntegrityError listing every finding first."""
        d = self._existing(run_id)
        if verify:
            v = self.verify(run_id)
            if not v.ok:
                raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
        return d

    def load(self, run_id: str, *, verify: bool = True, trusted: Any = None) -> RunRecord:
        """The stored run as a :class:`RunRecord` (``manifest`` filled in).

        With ``verify`` (default) every check of :meth:`verify` runs first (digests, links,
        the run against itself, the parent chain; the signature with ``trusted`` public
        keys) and the record is decoded from exactly the bytes that were checked; any
        finding raises :class:`IntegrityError` listing every problem.  Without it,
        malformed files still raise :class:`IntegrityError` naming the file and field.
        """
        if self.is_parent(run_id):
            raise InvalidInputError(
                f"{run_id} is a parent record over member runs; load it with load_parent")
        if verify:
            self._existing(run_id)
            v, record, _ = self._inspect(run_id, trusted)
            if not v.ok or record is None:
                raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
            return record
        d = self._existing(run_id)
        manifest, mbytes = self._read_manifest(d, run_id)
        record = decode_record(manifest, self._blobs(d, manifest, verify))
        if record.run_id != run_id:
            raise IntegrityError(
                f"manifest.json: run_id {record.run_id} does not match folder {run_id}")
        return record

    def load_verified(self, run_id: str, *, trusted: Any = None) -> tuple[RunRecord, Verification]:
        """The run and the :class:`Verification` it passed, from one check of exactly the
        bytes decoded (what :meth:`load` does, with the findings kept); a failed check
        raises :class:`IntegrityError` listing every problem."""
        if self.is_parent(run_id):
            raise InvalidInputError(
                f"{run_id} is a parent record over member runs; load it with load_parent")
        self._existing(run_id)
        v, record, _ = self._inspect(run_id, trusted)
        if not v.ok or record is None:
            raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
        return record, v

    def load_model(
        self, run_id: str, *, verify: bool = True, require_converged: bool = True
    ) -> Model:
        """The trained model of a classification run (from ``model.json`` + ``model.npz``).

        A run whose solver did not converge raises :class:`InvalidInputError` unless
        ``require_converged`` is False.
        """
        d = self._existing(run_id)
        if verify:
            v, _, blobs = self._inspect(run_id)
            if not v.ok:
                raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
        manifest, _ = self._read_manifest(d, run_id)
        if manifest.get("model") is None:
            raise InvalidInputError(f"run {run_id} holds no classification model")
        status = (manifest.get("solver") or {}).get("status")
        if require_converged and status != "converged":
            raise InvalidInputError(f"run {run_id} did not converge (status {status}); "
                                    "pass require_converged=False to load its model anyway")
        files = manifest.get("files")
        if not isinstance(files, dict):
            raise IntegrityError("manifest.json: field files must be an object")
        wanted = ("model.json", "model.npz", "solution.npz")
        if not verify:
            blobs = self._blobs(d, {"files": {k: v for k, v in files.items() if k in wanted}},
                                False)
        if not all(k in blobs for k in wanted):
            raise IntegrityError(f"run {run_id}: model.json, model.npz or solution.npz not listed")
        gram = None
        if ((manifest.get("problem") or {}).get("kernel") or {}).get("name") == "precomputed":
            gram = read_npz(blobs["solution.npz"], "solution.npz")["gram"]
        return decode_model(blobs["model.json"], blobs["model.npz"], gram)

    # ------------------------------------------------------------------ verify

    def verify(self, run_id: str, *, trusted: Any = None) -> Verification:
        """Check a run: its files byte for byte against its manifest (no links, sizes
        first), the run against itself (certificate recomputed, model rebuilt, trace
        replayed, manifest fields; see :mod:`solver.store.semantic`), the catalog's and the
        audit log's record of its digest, its signature (required, and by one of the
        ``trusted`` public keys, when they are given) and its parent chain.

        For a parent record: the parent folder, then every member it names
        (:mod:`solver.store.parents`)."""
        check_run_id(run_id)
        if self.is_parent(run_id):
            from .parents import verify_parent

            return verify_parent(self, run_id, trusted=trusted)
        return self._inspect(run_id, trusted)[0]

    def _check_chain(
        self, parent: Mapping[str, Any], chain: list[str], problems: list[str]
    ) -> bool:
        ok = True
        while parent is not None:
            pid, want = parent.get("run_id"), parent.get("manifest_sha256")
            if not is_run_id(pid) or not isinstance(want, str):
                problems.append(f"{MANIFEST}: field parent of run {chain[-1]} is malformed "
                                f"(parent.run_id {pid!r} must be a valid run id, "
                                "parent.manifest_sha256 a string)")
                return False
            if pid in chain or len(chain) > _MAX_CHAIN:
                problems.append(f"parent run {pid}: the parent chain loops")
                return False
            chain.append(pid)
            pprob, pman, pdigest, _ = check_folder(self.root / pid, pid)
            if pdigest is None and not (self.root / pid).is_dir():
                problems.append(f"parent run {pid}: not found in this store")
                return False
            if pdigest != want:
                problems.append(f"parent run {pid}: manifest.json differs from the digest recorded "
                                f"by its child {chain[-2]}")
                ok = False
            problems += [f"parent run {pid}: {p}" for p in pprob]
            ok = ok and not pprob
            parent = pman.get("parent") if isinstance(pman, dict) else None
            if parent is not None and not isinstance(parent, dict):
                problems.append(f"parent run {pid}: field parent must be an object or null")
                return False
        return ok

    # ------------------------------------------------------------------ catalog

    def _row(self, run_id: str) -> dict[str, Any]:
        d = self.root / run_id
        total = 0
        for e in os.scandir(d):
            if e.is_file():
                total += e.stat().st_size
        try:
            mbytes = (d / MANIFEST).read_bytes()
            manifest = parse_json(mbytes, MANIFEST)
            digest = sha256_hex(mbytes)
        except (OSError, IntegrityError):
            manifest, digest = {}, None
        row = row_from_manifest(manifest if isinstance(manifest, dict) else {}, digest, total)
        row["run_id"] = run_id
        return row

    def listing(self, **filters: Any) -> Listing:
        """Rows of every run matching ``filters`` plus the store's leftovers; never writes.

        Rows come from the catalog (opened read-only, waiting at most
        :data:`~solver.store.catalog.READ_WAIT_S` s for a lock) and, for run folders it
        lacks or when it cannot be read, from the folders' manifests.
        """
        note = None
        try:
            cat = self._catalog.read_rows()  # read before listing: see module docstring
        except CatalogUnavailable as exc:
            cat = {}
            if self.catalog_path.exists() or os.path.islink(self.catalog_path):
                note = f"catalog not used ({CATALOG_FILE} {exc}); runs listed from their folders"
        present = self.run_ids()
        rows = [cat[r] if r in cat else self._row(r) for r in present]
        lacking = [r for r in present if r not in cat]
        gone = sorted(set(cat) - set(present))
        if note is None and (lacking or gone) and cat:
            note = (f"catalog is stale: {len(lacking)} run folder(s) not indexed, {len(gone)} "
                    "row(s) without a folder (listed from the folders; the next save re-indexes)")
        elif note is None and lacking and self.catalog_path.exists():
            note = "catalog is empty or stale; runs listed from their folders"
        matched = query_rows(rows, filters)
        temps = [self._temp_info(p) for p in self.temp_folders()]
        parents = self._parents_among(rows)
        return Listing(rows=matched, catalog_note=note, temp_folders=temps,
                       missing_challengers=_missing_challengers(
                           [r for r in rows if r["run_id"] not in parents]),
                       parents={k: v for k, v in parents.items()
                                if any(r["run_id"] == k for r in matched)})

    def _parents_among(self, rows: list[dict[str, Any]]) -> dict[str, list[dict[str, Any]]]:
        """Parent id → members for the parent records among ``rows`` (a parent has no
        trace, so only rows without a trace level are read from their folders)."""
        out: dict[str, list[dict[str, Any]]] = {}
        for r in rows:
            rid = r.get("run_id")
            if r.get("trace_level") is not None or not isinstance(rid, str):
                continue
            if not self.is_parent(rid):
                continue
            try:
                m = parse_json((self.run_dir(rid) / MANIFEST).read_bytes(), MANIFEST)
            except (OSError, IntegrityError):
                continue
            out[rid] = [{"run_id": x.get("run_id"), "role": x.get("role"), "key": x.get("key")}
                        for x in (m.get("members") or []) if isinstance(x, dict)]
        return out

    def runs(self, **filters: Any) -> list[dict[str, Any]]:
        """Catalog rows (oldest first) matching ``filters``; folders the catalog lacks are
        listed from their manifests.  Never writes (see :meth:`listing`).

        Filters are column names (``solver="smo"``, ``status="converged"``,
        ``kernel="rbf"``, ``fingerprint=...``, ``parent=...``, ``converged=True``, ...),
        a list of values for "any of", or ``since`` / ``until`` ISO times.
        """
        if not self.root.is_dir():
            return self._check_filters_only(filters)
        return self.listing(**filters).rows

    def _check_filters_only(self, filters: Mapping[str, Any]) -> list[dict[str, Any]]:
        from .catalog import ALIASES, COLUMNS

        names = {c for c, _ in COLUMNS} | set(ALIASES) | {"since", "until"}
        bad = sorted(set(filters) - names)
        if bad:
            raise InvalidInputError(f"runs(): unknown filter(s) {', '.join(bad)}")
        return []

    def rebuild_catalog(self) -> int:
        """Re-create the catalog from the run folders; returns the number of runs indexed."""
        ids = self.run_ids()
        if not self.root.is_dir():
            return 0
        self._catalog.replace_all(self._row(r) for r in ids)
        auditlog.append(self.root, "catalog_rebuilt", None, {"runs": len(ids)})
        return len(ids)

    # ------------------------------------------------------------------ maintenance

    def temp_folders(self) -> list[Path]:
        """Temporary folders of saves in progress or interrupted by a crash (real folders
        only: a symbolic link named like one is never followed)."""
        if not self.root.is_dir():
            return []
        return sorted(Path(e.path) for e in os.scandir(self.root)
                      if e.name.startswith(TEMP_PREFIX) and e.is_dir(follow_symlinks=False))

    @staticmethod
    def _temp_info(p: Path) -> dict[str, Any]:
        try:
            pid = int(p.name.rsplit("-", 1)[1])
        except (IndexError, ValueError):
            pid = -1
        alive = pid > 0 and _pid_alive(pid)
        try:
            age = time.time() - p.lstat().st_mtime
        except OSError:
            age = None
        return {"folder": p.name, "pid": pid if pid > 0 else None, "writer_running": alive,
                "age_seconds": age}

    def clean_temp(self, *, max_age_seconds: float | None = None) -> list[str]:
        """Delete temporary folders whose writing process no longer runs (same host);
        returns the names removed.  Never touches runs, never follows a link.

        ``max_age_seconds`` (default None: off) also removes folders older than that whose
        process id is alive, for a pid reused by another program; use it only when no
        save can still be running that long.
        """
        removed = []
        for p in self.temp_folders():
            info = self._temp_info(p)
            pid = info["pid"] or -1
            age = info["age_seconds"]
            if age is None:
                continue
            old = max_age_seconds is not None and age > max_age_seconds
            if pid == os.getpid() and not old:
                continue
            if pid <= 0 or not info["writer_running"] or old:
                st = os.lstat(p)
                if not stat.S_ISDIR(st.st_mode):  # replaced by a link meanwhile
                    continue
                shutil.rmtree(p, ignore_errors=True)
                if not os.path.lexists(p):
                    removed.append(p.name)
                    auditlog.append(self.root, "temp_removed", None,
                                    {"folder": p.name, "pid": info["pid"]})
        return removed

    # ------------------------------------------------------------------ output paths

    def check_output_path(self, path: str | Path, what: str = "--out") -> Path:
        """``path`` as an absolute path, or :class:`InvalidInputError` when writing there
        could damage a run: inside a run folder or a temporary folder (of this store or,
        recognised by its manifest pair, of any store), or the catalog / audit-log files."""
        p = Path(path).expanduser().absolute()
        root = self.root.resolve()
        for cand in (p, p.resolve()):
            for a in (cand, *cand.parents):
                name = a.name
                if a.parent == root or a.parent == self.root:
                    if is_run_id(name):
                        raise InvalidInputError(f"{what} {str(path)!r} is inside run {name} of "
                                                f"store {self.root}; write outside the run folders")
                    if name.startswith(TEMP_PREFIX):
                        raise InvalidInputError(f"{what} {str(path)!r} is inside the temporary "
                                                f"folder {name} of store {self.root}")
                    if name.startswith(CATALOG_FILE) or name.startswith(auditlog.LOG_FILE):
                        raise InvalidInputError(f"{what} {str(path)!r} would overwrite the store's "
                                                f"{name}; choose another file")
                if is_run_id(name) and (a / MANIFEST).is_file() and (a / MANIFEST_DIGEST).is_file():
                    raise InvalidInputError(f"{what} {str(path)!r} is inside run {name} "
                                            f"({a}); write outside the run folders")
        return p

    def leftovers(self) -> Listing:
        """The store's leftovers only (same as :meth:`listing` with its rows)."""
        return self.listing()

    # ------------------------------------------------------------------ parents

    def is_parent(self, run_id: str) -> bool:
        """True when the folder ``run_id`` holds a parent record (its manifest says so)."""
        d = self.run_dir(run_id)
        if os.path.islink(d / MANIFEST):
            return False
        try:
            manifest = parse_json((d / MANIFEST).read_bytes(), MANIFEST)
        except (OSError, IntegrityError):
            return False
        return is_parent_manifest(manifest)

    def save_parent(self, record: ParentRecord) -> str:
        """Store a parent record over member runs already in this store; returns its id.

        The SHA-256 of every member's ``manifest.json`` is recorded (a member whose
        manifest does not match its ``manifest.sha256`` is refused).  Atomic, signed and
        logged like :meth:`save`.
        """
        from .parents import encode_parent

        digests: dict[str, str] = {}
        for m in record.members if isinstance(record, ParentRecord) else ():
            mdir = self._existing(m.run_id)
            try:
                mb = (mdir / MANIFEST).read_bytes()
                rec = parse_digest_file((mdir / MANIFEST_DIGEST).read_bytes())
            except OSError as exc:
                raise IntegrityError(f"member run {m.run_id}: cannot read its manifest "
                                     f"({exc})") from None
            if rec != sha256_hex(mb):
                raise IntegrityError(f"member run {m.run_id}: manifest.json does not match "
                                     "manifest.sha256")
            digests[m.run_id] = sha256_hex(mb)
        now = datetime.now(timezone.utc)
        run_id = new_run_id(now)
        files, manifest = encode_parent(record, run_id=run_id, created=utc_stamp(now),
                                        digests=digests)
        mbytes = finish_manifest(manifest, files)
        mdigest, _ = self._write_folder(run_id, files, mbytes, None)
        self._index(manifest, mdigest, files, mbytes)
        return run_id

    def load_parent(self, run_id: str, *, verify: bool = True) -> ParentRecord:
        """The stored parent record (with ``verify``: it and every member verified first)."""
        from .parents import decode_parent

        d = self._existing(run_id)
        if verify:
            v = self.verify(run_id)
            if not v.ok:
                raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
        manifest, _ = self._read_manifest(d, run_id)
        if not is_parent_manifest(manifest):
            raise InvalidInputError(f"run {run_id} is not a parent record")
        return decode_parent(manifest, self._blobs(d, manifest, verify))

    @property
    def catalog_path(self) -> Path:
        """Path of the SQLite catalog file."""
        return self.root / CATALOG_FILE


def is_plain_name(name: Any) -> bool:
    """A run-folder file name: no separators, not hidden, not the manifest pair."""
    return (isinstance(name, str) and name not in ("", ".", "..", MANIFEST, MANIFEST_DIGEST)
            and "/" not in name and "\\" not in name and not name.startswith(".")
            and "\x00" not in name)
