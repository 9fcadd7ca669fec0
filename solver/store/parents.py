"""Parent records: a run folder that ties member runs together (multi-class models, studies).

A parent folder is named by a run id like any run and holds ``manifest.json``,
``manifest.sha256`` and one ``<name>.json`` per attachment (``<name>.parquet`` for an
attachment given as the bytes of a Parquet file, e.g. a study's results table).  Its manifest has
``"record": "parent"``, the task name, and a ``members`` list with every member's run id,
role, key and the SHA-256 of the member's ``manifest.json`` at the time the parent was
saved (``traces/README.md`` section 17).  Because each member manifest holds the digests
of all the member's files, one digest per member pins every byte of every member.

Verification of a parent (:func:`verify_parent`) checks the parent folder itself, then
for every member: the folder exists, its manifest digest is the recorded one, and the
member verifies on its own.  Each finding names the member by role, key and run id.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from ..errors import IntegrityError, InvalidInputError
from ..run import Member, ParentRecord
from .environment import environment
from .format import FORMAT_NAME, FORMAT_VERSION, dump_json, from_plain, is_run_id, to_plain
from .integrity import MANIFEST, Verification, check_folder

if TYPE_CHECKING:  # pragma: no cover
    from .store import RunStore

__all__ = ["PARENT_RECORD", "encode_parent", "decode_parent", "is_parent_manifest",
           "verify_parent", "member_label"]

#: value of the manifest key ``record`` in a parent folder (run folders have no such key).
PARENT_RECORD = "parent"


def is_parent_manifest(manifest: Any) -> bool:
    """True for the manifest of a parent record."""
    return isinstance(manifest, Mapping) and manifest.get("record") == PARENT_RECORD


def member_label(role: Any, key: Any, run_id: Any) -> str:
    """How findings name a member: ``member pair 'a' vs 'b' (run <id>)``."""
    if isinstance(key, (list, tuple)) and key:
        k = " vs ".join(repr(str(v)) for v in key)
        return f"member {role} {k} (run {run_id})"
    return f"member {role} (run {run_id})"


def encode_parent(
    record: ParentRecord, *, run_id: str, created: str, digests: Mapping[str, str]
) -> tuple[dict[str, bytes], dict[str, Any]]:
    """Serialise a parent → (files ``{name: bytes}``, manifest without ``files``).

    ``digests`` maps every member run id to the SHA-256 of its manifest bytes.
    """
    from .. import __version__
    from .codec import _ATTACHMENT_NAME, _RESERVED

    if not isinstance(record, ParentRecord):
        raise InvalidInputError(f"save_parent() needs a ParentRecord, got {type(record).__name__}")
    if not record.members:
        raise InvalidInputError("a parent record needs at least one member run")
    files: dict[str, bytes] = {}
    att_m: dict[str, Any] = {}
    for name, value in record.attachments.items():
        if not isinstance(name, str) or not _ATTACHMENT_NAME.fullmatch(name) or name in _RESERVED:
            raise InvalidInputError(f"attachment name {name!r} is not allowed")
        if isinstance(value, (bytes, bytearray)):  # a Parquet table (a study's results)
            if not bytes(value[:4]) == b"PAR1":
                raise InvalidInputError(f"attachment {name!r}: bytes must be a Parquet file")
            files[f"{name}.parquet"] = bytes(value)
            att_m[name] = {"kind": "parquet", "files": [f"{name}.parquet"]}
            continue
        files[f"{name}.json"] = dump_json(to_plain(value, None, f"attachment {name!r}"))
        att_m[name] = {"kind": "json", "files": [f"{name}.json"]}
    members = []
    for m in record.members:
        members.append({
            "run_id": m.run_id, "role": str(m.role),
            "key": None if m.key is None else [str(v) for v in m.key],
            "manifest_sha256": digests[m.run_id],
        })
    summary = dict(record.summary)
    manifest: dict[str, Any] = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "run_id": run_id,
        "created": created,
        "kktrace_version": __version__,
        "record": PARENT_RECORD,
        "task": str(record.task),
        "members": members,
        "info": to_plain(dict(record.info), None, "parent info"),
        "data": to_plain(dict(record.data), None, "data"),
        "summary": to_plain(summary, None, "summary"),
        # the three objects below use the run manifest's key names so that catalogs and
        # listings read a parent's key figures where they read a run's
        "solver": to_plain(dict(summary.get("solver") or {}), None, "summary.solver"),
        "problem": to_plain(dict(summary.get("problem") or {}), None, "summary.problem"),
        "certificate": to_plain(dict(summary.get("certificate") or {}), None,
                                "summary.certificate"),
        "parent": None,
        "command": to_plain(record.command, None, "command"),
        "attachments": att_m,
        "environment": environment(),
    }
    return files, manifest


def decode_parent(manifest: Mapping[str, Any], blobs: Mapping[str, bytes]) -> ParentRecord:
    """The :class:`ParentRecord` of a parent manifest and its attachment files."""
    from .format import parse_json

    if not is_parent_manifest(manifest):
        raise IntegrityError("manifest.json: not a parent record")
    raw = manifest.get("members")
    if not isinstance(raw, list) or not raw:
        raise IntegrityError("manifest.json: field members must be a non-empty list")
    members = []
    for k, m in enumerate(raw):
        if not (isinstance(m, dict) and is_run_id(m.get("run_id"))
                and isinstance(m.get("role"), str)
                and isinstance(m.get("manifest_sha256"), str)
                and (m.get("key") is None or (isinstance(m["key"], list)
                                              and all(isinstance(v, str) for v in m["key"])))):
            raise IntegrityError(f"manifest.json: members[{k}] is malformed")
        members.append(Member(run_id=m["run_id"], role=m["role"],
                              key=None if m.get("key") is None else tuple(m["key"]),
                              manifest_sha256=m["manifest_sha256"]))
    atts = {}
    for name, desc in (manifest.get("attachments") or {}).items():
        if isinstance(desc, dict) and desc.get("kind") == "parquet":
            fname = f"{name}.parquet"
            if fname not in blobs:
                raise IntegrityError(f"{fname}: missing")
            atts[name] = bytes(blobs[fname])
            continue
        fname = f"{name}.json"
        if fname not in blobs:
            raise IntegrityError(f"{fname}: missing")
        atts[name] = from_plain(parse_json(blobs[fname], fname), {}, fname)
    return ParentRecord(
        task=str(manifest.get("task")), members=tuple(members),
        info=from_plain(manifest.get("info") or {}, {}, "manifest.json: info"),
        data=from_plain(manifest.get("data") or {}, {}, "manifest.json: data"),
        summary=from_plain(manifest.get("summary") or {}, {}, "manifest.json: summary"),
        attachments=atts, command=manifest.get("command"), run_id=manifest.get("run_id"),
        created=manifest.get("created"), manifest=manifest,
    )


def verify_parent(store: RunStore, run_id: str, *, trusted: Any = None) -> Verification:
    """Check a parent folder and every member it names (see the module docstring).

    The parent folder gets the folder checks, the catalog and audit-log digest checks and
    the signature check of a run; each member gets :meth:`RunStore.verify`."""
    from .catalog import CATALOG_FILE, CatalogUnavailable

    d = store.root / run_id
    problems, manifest, digest, checked = check_folder(d, run_id)
    notes: list[str] = []
    try:
        recorded = store._catalog.read_digest(run_id)
    except CatalogUnavailable as exc:
        recorded = None
        notes.append(f"catalog not consulted ({CATALOG_FILE} {exc})")
    if recorded and digest and recorded != digest:
        problems.append(f"{MANIFEST}: digest differs from the one the catalog recorded at save")
    signer, is_trusted = store._signature(d, digest, trusted, problems, notes)
    store._audit_checks(run_id, manifest, digest, problems)
    chain = [run_id]
    members = manifest.get("members") if isinstance(manifest, dict) else None
    if not isinstance(members, list) or not members:
        problems.append(f"{MANIFEST}: field members must be a non-empty list")
        members = []
    seen: set[str] = set()
    for k, m in enumerate(members):
        if not (isinstance(m, dict) and is_run_id(m.get("run_id"))
                and isinstance(m.get("manifest_sha256"), str)):
            problems.append(f"{MANIFEST}: members[{k}] is malformed (needs run_id and "
                            "manifest_sha256)")
            continue
        mid = m["run_id"]
        who = member_label(m.get("role"), m.get("key"), mid)
        if mid in seen or mid == run_id:
            problems.append(f"{MANIFEST}: members[{k}] repeats run {mid}")
            continue
        seen.add(mid)
        chain.append(mid)
        mdir = store.root / mid
        if not mdir.is_dir():
            problems.append(f"{who}: run folder is missing")
            continue
        _, _, mdigest, _ = check_folder(mdir, mid)
        if mdigest != m["manifest_sha256"]:
            problems.append(f"{who}: manifest.json differs from the digest recorded by the "
                            f"parent {run_id}")
        v = store.verify(mid, trusted=trusted)
        problems += [f"{who}: {p}" for p in v.problems]
        checked += v.files_checked
    return Verification(ok=not problems, run_id=run_id, problems=problems,
                        files_checked=checked, parent_id=None, parent_chain_ok=not problems,
                        chain=chain, manifest_sha256=digest, signer=signer,
                        trusted=is_trusted, notes=notes)
