"""Tamper evidence: per-file SHA-256 digests, the manifest digest, and folder verification."""

from __future__ import annotations

import errno
import hashlib
import os
import re
import stat
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .format import is_run_id, parse_json

__all__ = [
    "MANIFEST",
    "MANIFEST_DIGEST",
    "Verification",
    "sha256_hex",
    "file_sha256",
    "digest_file_bytes",
    "parse_digest_file",
    "check_folder",
    "check_file_entries",
    "read_regular",
    "SIGNATURE",
    "MAX_MANIFEST_BYTES",
]

MANIFEST = "manifest.json"
MANIFEST_DIGEST = "manifest.sha256"
_HEX64 = re.compile(r"[0-9a-f]{64}")
_FILE_NAME = re.compile(r"[a-z][a-z0-9_]{0,63}\.(json|parquet|npz|csv)")


@dataclass(frozen=True)
class Verification:
    """Outcome of checking one run folder and its chain of parent runs.

    ok : True when this run and every ancestor are intact.
    problems : one line per finding, each starting with the file it concerns
        (``"trace.parquet: content changed ..."``, ``"extra file: notes.txt"``,
        ``"parent run <id>: ..."``).
    files_checked : files of this run whose digest was compared.
    parent_id : the recorded parent run id (None for a root run).
    parent_chain_ok : True when every ancestor exists, matches the digest its child
        recorded and verifies (True for a root run).
    chain : run ids checked, this run first, then parent, grandparent, ...
    manifest_sha256 : SHA-256 of this run's manifest.json bytes as found (None if absent).
    signer : who signed the manifest digest (``"NAME (key sha256 …)"``), None if unsigned.
    trusted : True when the signature was checked against a trusted public key and holds.
    notes : findings that are not failures (catalog not consulted, signature not checked
        against a trusted key, ...).
    """

    ok: bool
    run_id: str
    problems: list[str] = field(default_factory=list)
    files_checked: int = 0
    parent_id: str | None = None
    parent_chain_ok: bool = True
    chain: list[str] = field(default_factory=list)
    manifest_sha256: str | None = None
    signer: str | None = None
    trusted: bool = False
    notes: list[str] = field(default_factory=list)


def sha256_hex(data: bytes) -> str:
    """Lower-case hex SHA-256 of ``data``."""
    return hashlib.sha256(data).hexdigest()


def file_sha256(path: Path) -> tuple[str, int]:
    """(hex SHA-256, size in bytes) of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
            size += len(chunk)
    return h.hexdigest(), size


def digest_file_bytes(manifest_digest: str) -> bytes:
    """Content of ``manifest.sha256``: one ``sha256sum``-compatible line."""
    return f"{manifest_digest}  {MANIFEST}\n".encode()


def parse_digest_file(data: bytes) -> str | None:
    """The digest recorded in ``manifest.sha256`` bytes, or None when malformed."""
    try:
        text = data.decode("ascii")
    except UnicodeDecodeError:
        return None
    m = re.fullmatch(r"([0-9a-f]{64})  manifest\.json\n", text)
    return m.group(1) if m else None


def check_file_entries(files: Any) -> list[str]:
    """Problems with the manifest's ``files`` table itself (names and digest shapes)."""
    if not isinstance(files, Mapping):
        return [f"{MANIFEST}: field files must be an object"]
    out = []
    for name, entry in files.items():
        if not isinstance(name, str) or not _FILE_NAME.fullmatch(name) or name == MANIFEST:
            out.append(f"{MANIFEST}: files lists an invalid file name {name!r}")
        elif not (isinstance(entry, Mapping) and isinstance(entry.get("sha256"), str)
                  and _HEX64.fullmatch(entry["sha256"]) and isinstance(entry.get("bytes"), int)
                  and not isinstance(entry.get("bytes"), bool)):
            out.append(f"{MANIFEST}: files entry for {name} must hold sha256 (64 hex) and bytes")
    return out


#: a manifest larger than this is refused before it is read (bounded memory)
MAX_MANIFEST_BYTES = 64 << 20
SIGNATURE = "manifest.sig"


def read_regular(path: Path, *, limit: int | None = None, expect: int | None = None
                 ) -> tuple[bytes | None, str | None]:
    """Bytes of a regular file, opened without following a symbolic link.

    Returns (bytes, None), or (None, reason) when the path is a link, not a regular file,
    has more than one hard link, is larger than ``limit`` or differs in size from
    ``expect`` (sizes are compared before anything is read).
    """
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            return None, "is a symbolic link (a run file must be a regular file in the folder)"
        if exc.errno == errno.ENOENT:
            return None, "missing"
        return None, f"cannot be read ({exc.strerror})"
    try:
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            return None, "is not a regular file"
        if st.st_nlink != 1:
            return None, (f"has {st.st_nlink} hard links (a run file must have exactly one, "
                          "so it cannot be changed through another name)")
        if expect is not None and st.st_size != expect:
            return None, f"content changed (size {st.st_size} vs recorded {expect}; not hashed)"
        if limit is not None and st.st_size > limit:
            return None, f"is {st.st_size} bytes, above the limit of {limit}"
        chunks = []
        while True:
            chunk = os.read(fd, 1 << 20)
            if not chunk:
                break
            chunks.append(chunk)
        return b"".join(chunks), None
    finally:
        os.close(fd)


def check_folder(
    run_dir: Path, run_id: str, blobs: dict[str, bytes] | None = None
) -> tuple[list[str], dict[str, Any] | None, str | None, int]:
    """Check one run folder against its own manifest.

    Returns (problems, parsed manifest or None, actual manifest digest or None,
    number of files whose digest was compared).  Never raises for a damaged folder.
    The folder itself and every file in it must be real (no symbolic links, one hard
    link each); sizes are compared before hashing.  When ``blobs`` is a dict, the bytes
    of every listed file that matched its digest are put into it (so they are decoded
    exactly as checked).
    """
    problems: list[str] = []
    try:
        st = os.lstat(run_dir)
    except OSError:
        return [f"run folder {run_id} is missing"], None, None, 0
    if stat.S_ISLNK(st.st_mode):
        try:
            target = os.readlink(run_dir)
        except OSError:
            target = "?"
        return [f"run folder {run_id} is a symbolic link (to {target}); a run must be a real "
                "folder inside the store"], None, None, 0
    if not stat.S_ISDIR(st.st_mode):
        return [f"run folder {run_id} is missing (a file of that name is there)"], None, None, 0
    try:
        entries = {e.name: e for e in os.scandir(run_dir)}
    except OSError as exc:
        return [f"run folder {run_id} cannot be listed ({exc.strerror})"], None, None, 0
    manifest_bytes = None
    actual = None
    if MANIFEST in entries:
        manifest_bytes, why = read_regular(run_dir / MANIFEST, limit=MAX_MANIFEST_BYTES)
        if manifest_bytes is None:
            problems.append(f"{MANIFEST}: {why}")
        else:
            actual = sha256_hex(manifest_bytes)
    else:
        problems.append(f"{MANIFEST}: missing")
    if MANIFEST_DIGEST in entries:
        dbytes, why = read_regular(run_dir / MANIFEST_DIGEST, limit=4096)
        recorded = None if dbytes is None else parse_digest_file(dbytes)
        if dbytes is None:
            problems.append(f"{MANIFEST_DIGEST}: {why}")
        elif recorded is None:
            problems.append(f"{MANIFEST_DIGEST}: malformed (expected '<64 hex>  {MANIFEST}')")
        elif actual is not None and recorded != actual:
            problems.append(
                f"{MANIFEST}: content does not match the digest in {MANIFEST_DIGEST} "
                f"({MANIFEST} or {MANIFEST_DIGEST} changed)"
            )
    else:
        problems.append(f"{MANIFEST_DIGEST}: missing")
    manifest = None
    if manifest_bytes is not None:
        try:
            manifest = parse_json(manifest_bytes, MANIFEST)
            if not isinstance(manifest, dict):
                raise ValueError
        except Exception:  # IntegrityError or a non-object document
            problems.append(f"{MANIFEST}: not a valid JSON object")
            manifest = None
    checked = 0
    files: Mapping[str, Any] = {}
    if manifest is not None:
        if manifest.get("run_id") != run_id or not is_run_id(manifest.get("run_id")):
            problems.append(f"{MANIFEST}: run_id {manifest.get('run_id')!r} does not match "
                            f"the folder name {run_id}")
        entry_problems = check_file_entries(manifest.get("files"))
        problems += entry_problems
        if not entry_problems:
            files = manifest["files"]
        for name, entry in files.items():
            if name not in entries:
                problems.append(f"{name}: missing")
                continue
            data, why = read_regular(run_dir / name, expect=entry["bytes"])
            if data is None:
                problems.append(f"{name}: {why}")
                continue
            checked += 1
            if sha256_hex(data) != entry["sha256"]:
                problems.append(f"{name}: content changed (size {len(data)} vs recorded "
                                f"{entry['bytes']}; sha256 mismatch)")
            elif blobs is not None:
                blobs[name] = data
    known = {MANIFEST, MANIFEST_DIGEST, SIGNATURE, *files}
    for name in sorted(entries):
        if name == SIGNATURE:
            if entries[name].is_symlink() or not entries[name].is_file(follow_symlinks=False):
                problems.append(f"{SIGNATURE}: is not a regular file")
            continue
        if name not in known:
            what = "folder" if entries[name].is_dir(follow_symlinks=False) else "file"
            if manifest is None and name not in (MANIFEST, MANIFEST_DIGEST):
                problems.append(f"{name}: cannot be checked (manifest unreadable)")
            else:
                problems.append(f"extra {what}: {name}")
    return problems, manifest, actual, checked
