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

import os
import shutil
import sqlite3
import time
import warnings
from collections.abc import Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from ..errors import IntegrityError, InvalidInputError
from ..model import Model
from ..run import ParentRecord, RunRecord
from .catalog import CATALOG_FILE, Catalog, row_from_manifest
from .codec import decode_model, decode_record, encode_record
from .format import check_run_id, dump_json, is_run_id, new_run_id, parse_json, read_npz, utc_stamp
from .integrity import (
    MANIFEST,
    MANIFEST_DIGEST,
    Verification,
    check_folder,
    digest_file_bytes,
    parse_digest_file,
    sha256_hex,
)
from .parents import is_parent_manifest

__all__ = ["RunStore", "ENV_VAR", "DEFAULT_DIR", "TEMP_PREFIX"]

ENV_VAR = "KKTRACE_STORE"
DEFAULT_DIR = "traces"
TEMP_PREFIX = ".tmp-"
_MAX_CHAIN = 10_000


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

    def __init__(self, root: str | Path | None = None) -> None:
        if root is None:
            root = os.environ.get(ENV_VAR) or DEFAULT_DIR
        self.root = Path(root).expanduser().absolute()
        self._catalog = Catalog(self.root)

    def __repr__(self) -> str:
        return f"RunStore({str(self.root)!r})"

    # ------------------------------------------------------------------ paths

    def run_dir(self, run_id: str) -> Path:
        """Folder of ``run_id`` (validated: a run id never holds a path separator)."""
        return self.root / check_run_id(run_id)

    def _existing(self, run_id: str) -> Path:
        d = self.run_dir(run_id)
        if not d.is_dir():
            raise InvalidInputError(f"no run {run_id} in store {self.root}")
        return d

    def run_ids(self) -> list[str]:
        """Ids of every run folder (complete runs only; temporary folders are ignored)."""
        if not self.root.is_dir():
            return []
        return sorted(e.name for e in os.scandir(self.root) if is_run_id(e.name) and e.is_dir())

    # ------------------------------------------------------------------ save

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
        manifest["files"] = {name: {"sha256": sha256_hex(b), "bytes": len(b)}
                             for name, b in files.items()}
        mbytes = dump_json(manifest)
        mdigest = sha256_hex(mbytes)

        self.root.mkdir(parents=True, exist_ok=True)
        tmp = self.root / f"{TEMP_PREFIX}{run_id}-{os.getpid()}"
        final = self.root / run_id
        tmp.mkdir()
        try:
            for name, data in files.items():
                _write_durable(tmp / name, data)
            _write_durable(tmp / MANIFEST, mbytes)
            _write_durable(tmp / MANIFEST_DIGEST, digest_file_bytes(mdigest))
            _fsync_dir(tmp)
            os.rename(tmp, final)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        try:  # make the rename itself durable; the run is complete and visible either way
            _fsync_dir(self.root)
        except OSError as exc:
            warnings.warn(f"run {run_id} saved, but syncing the store folder failed ({exc}); "
                          "the run may be lost if the machine crashes now", stacklevel=2)
        total = len(mbytes) + 65 + len(MANIFEST) + 1 + sum(len(b) for b in files.values())
        try:
            self._catalog.upsert([row_from_manifest(manifest, mdigest, total)])
        except sqlite3.Error as exc:  # the run is stored; runs() will index it later
            warnings.warn(f"run {run_id} saved but the catalog was not updated ({exc}); "
                          "it is indexed on the next listing", stacklevel=2)
        return run_id

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

    def _checked_dir(self, run_id: str, verify: bool) -> Path:
        """The run's folder; with ``verify``, IntegrityError listing every finding first."""
        d = self._existing(run_id)
        if verify:
            v = self.verify(run_id)
            if not v.ok:
                raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
        return d

    def load(self, run_id: str, *, verify: bool = True) -> RunRecord:
        """The stored run as a :class:`RunRecord` (``manifest`` filled in).

        With ``verify`` (default) the folder and its parent chain are checked first and
        the bytes actually decoded are checked against their digests; any finding
        raises :class:`IntegrityError` listing every problem.  Without it, malformed
        files still raise :class:`IntegrityError` naming the file and field.
        """
        d = self._checked_dir(run_id, verify)
        manifest, mbytes = self._read_manifest(d, run_id)
        if is_parent_manifest(manifest):
            raise InvalidInputError(
                f"{run_id} is a parent record (task {manifest.get('task')}) over "
                f"{len(manifest.get('members') or [])} member runs; load it with load_parent")
        if verify:
            recorded = parse_digest_file((d / MANIFEST_DIGEST).read_bytes())
            if recorded != sha256_hex(mbytes):
                raise IntegrityError("manifest.json: changed while loading")
        record = decode_record(manifest, self._blobs(d, manifest, verify))
        if record.run_id != run_id:
            raise IntegrityError(
                f"manifest.json: run_id {record.run_id} does not match folder {run_id}")
        return record

    def load_model(
        self, run_id: str, *, verify: bool = True, require_converged: bool = True
    ) -> Model:
        """The trained model of a classification run (from ``model.json`` + ``model.npz``).

        A run whose solver did not converge raises :class:`InvalidInputError` unless
        ``require_converged`` is False.
        """
        d = self._checked_dir(run_id, verify)
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
        blobs = self._blobs(d, {"files": {k: v for k, v in files.items() if k in wanted}}, verify)
        if not all(k in blobs for k in wanted):
            raise IntegrityError(f"run {run_id}: model.json, model.npz or solution.npz not listed")
        gram = None
        if ((manifest.get("problem") or {}).get("kernel") or {}).get("name") == "precomputed":
            gram = read_npz(blobs["solution.npz"], "solution.npz")["gram"]
        return decode_model(blobs["model.json"], blobs["model.npz"], gram)

    # ------------------------------------------------------------------ verify

    def verify(self, run_id: str) -> Verification:
        """Check a run folder byte for byte against its manifest, and its parent chain.

        For a parent record, check it and every member it names (:mod:`.parents`)."""
        check_run_id(run_id)
        if self.is_parent(run_id):
            from .parents import verify_parent

            return verify_parent(self, run_id)
        problems, manifest, digest, checked = check_folder(self.root / run_id, run_id)
        recorded = self._catalog.digest(run_id)
        if recorded and digest and recorded != digest:
            problems.append(f"{MANIFEST}: digest differs from the one the catalog recorded at save")
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
        return Verification(ok=not problems, run_id=run_id, problems=problems,
                            files_checked=checked, parent_id=parent_id,
                            parent_chain_ok=parent_ok, chain=chain, manifest_sha256=digest)

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

    def _reconcile(self) -> None:
        if not self.root.is_dir():
            return
        known = set(self._catalog.digests())  # read before listing: see module docstring
        present = set(self.run_ids())
        new = present - known
        if new:
            self._catalog.upsert(self._row(r) for r in sorted(new))
        gone = known - present
        if gone:
            self._catalog.delete(sorted(gone))

    def runs(self, **filters: Any) -> list[dict[str, Any]]:
        """Catalog rows (oldest first) matching ``filters``, after reconciling with the folders.

        Filters are column names (``solver="smo"``, ``status="converged"``,
        ``kernel="rbf"``, ``fingerprint=...``, ``parent=...``, ``converged=True``, ...),
        a list of values for "any of", or ``since`` / ``until`` ISO times.
        """
        if not self.root.is_dir():
            return self._check_filters_only(filters)
        self._reconcile()
        return self._catalog.query(filters)

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
        return len(ids)

    # ------------------------------------------------------------------ maintenance

    def temp_folders(self) -> list[Path]:
        """Temporary folders of saves in progress or interrupted by a crash."""
        if not self.root.is_dir():
            return []
        return sorted(p for p in self.root.iterdir()
                      if p.name.startswith(TEMP_PREFIX) and p.is_dir())

    def clean_temp(self, *, max_age_seconds: float = 6 * 3600.0) -> list[str]:
        """Delete temporary folders whose writing process has ended (same host) or that are
        older than ``max_age_seconds``; returns the names removed.  Never touches runs."""
        removed = []
        now = time.time()
        for p in self.temp_folders():
            try:
                pid = int(p.name.rsplit("-", 1)[1])
            except (IndexError, ValueError):
                pid = -1
            try:
                age = now - p.stat().st_mtime
            except OSError:
                continue
            if pid == os.getpid() and age < max_age_seconds:
                continue
            if pid <= 0 or not _pid_alive(pid) or age > max_age_seconds:
                shutil.rmtree(p, ignore_errors=True)
                removed.append(p.name)
        return removed

    # ------------------------------------------------------------------ parents

    def is_parent(self, run_id: str) -> bool:
        """True when the folder ``run_id`` holds a parent record (its manifest says so)."""
        d = self.run_dir(run_id)
        try:
            manifest = parse_json((d / MANIFEST).read_bytes(), MANIFEST)
        except (OSError, IntegrityError):
            return False
        return is_parent_manifest(manifest)

    def save_parent(self, record: ParentRecord) -> str:
        """Store a parent record over member runs already in this store; returns its id.

        The SHA-256 of every member's ``manifest.json`` is recorded (a member whose
        manifest does not match its ``manifest.sha256`` is refused).  Atomic like
        :meth:`save`.
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
        manifest["files"] = {name: {"sha256": sha256_hex(b), "bytes": len(b)}
                             for name, b in files.items()}
        mbytes = dump_json(manifest)
        mdigest = sha256_hex(mbytes)
        self.root.mkdir(parents=True, exist_ok=True)
        tmp = self.root / f"{TEMP_PREFIX}{run_id}-{os.getpid()}"
        tmp.mkdir()
        try:
            for name, data in files.items():
                _write_durable(tmp / name, data)
            _write_durable(tmp / MANIFEST, mbytes)
            _write_durable(tmp / MANIFEST_DIGEST, digest_file_bytes(mdigest))
            _fsync_dir(tmp)
            os.rename(tmp, self.root / run_id)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        try:
            _fsync_dir(self.root)
        except OSError as exc:
            warnings.warn(f"parent {run_id} saved, but syncing the store folder failed ({exc})",
                          stacklevel=2)
        total = len(mbytes) + 65 + len(MANIFEST) + 1 + sum(len(b) for b in files.values())
        try:
            self._catalog.upsert([row_from_manifest(manifest, mdigest, total)])
        except sqlite3.Error as exc:
            warnings.warn(f"parent {run_id} saved but the catalog was not updated ({exc})",
                          stacklevel=2)
        return run_id

    def load_parent(self, run_id: str, *, verify: bool = True) -> ParentRecord:
        """The stored parent record (with ``verify``: it and every member verified first)."""
        from .parents import decode_parent

        d = self._checked_dir(run_id, verify)
        manifest, _ = self._read_manifest(d, run_id)
        if not is_parent_manifest(manifest):
            raise InvalidInputError(f"run {run_id} is not a parent record")
        files = manifest.get("files")
        if not isinstance(files, dict):
            raise IntegrityError("manifest.json: field files must be an object")
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
