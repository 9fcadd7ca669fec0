"""Tamper evidence: per-file SHA-256 digests, the manifest digest, and folder verification."""

from __future__ import annotations

import hashlib
import re
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
    """

    ok: bool
    run_id: str
    problems: list[str] = field(default_factory=list)
    files_checked: int = 0
    parent_id: str | None = None
    parent_chain_ok: bool = True
    chain: list[str] = field(default_factory=list)
    manifest_sha256: str | None = None


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


def check_folder(
    run_dir: Path, run_id: str
) -> tuple[list[str], dict[str, Any] | None, str | None, int]:
    """Check one run folder against its own manifest.

    Returns (problems, parsed manifest or None, actual manifest digest or None,
    number of files whose digest was compared).  Never raises for a damaged folder.
    """
    problems: list[str] = []
    if not run_dir.is_dir():
        return [f"run folder {run_id} is missing"], None, None, 0
    entries = {p.name: p for p in run_dir.iterdir()}
    manifest_bytes = None
    actual = None
    if MANIFEST in entries and entries[MANIFEST].is_file():
        manifest_bytes = entries[MANIFEST].read_bytes()
        actual = sha256_hex(manifest_bytes)
    else:
        problems.append(f"{MANIFEST}: missing")
    if MANIFEST_DIGEST in entries and entries[MANIFEST_DIGEST].is_file():
        recorded = parse_digest_file(entries[MANIFEST_DIGEST].read_bytes())
        if recorded is None:
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
            path = entries.get(name)
            if path is None or not path.is_file():
                problems.append(f"{name}: missing")
                continue
            digest, size = file_sha256(path)
            checked += 1
            if size != entry["bytes"] or digest != entry["sha256"]:
                problems.append(f"{name}: content changed (size {size} vs recorded "
                                f"{entry['bytes']}; sha256 mismatch)")
    known = {MANIFEST, MANIFEST_DIGEST, *files}
    for name in sorted(entries):
        if name not in known:
            what = "folder" if entries[name].is_dir() else "file"
            if manifest is None and name not in (MANIFEST, MANIFEST_DIGEST):
                problems.append(f"{name}: cannot be checked (manifest unreadable)")
            else:
                problems.append(f"extra {what}: {name}")
    return problems, manifest, actual, checked
