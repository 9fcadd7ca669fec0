"""Append-only, hash-chained audit log of store events: ``<store>/audit-log.jsonl``.

One JSON object per line (UTF-8, ASCII-escaped), keys in this order: ``seq`` (1, 2, …),
``time`` (ISO 8601 UTC, microseconds), ``event`` (see :data:`EVENTS`), ``run_id`` (or
null), ``details`` (object), ``user``, ``host``, ``pid``, ``prev_sha256``: the SHA-256
of the previous line's bytes (without its newline; 64 zeros for the first entry).
Deleting, changing or reordering an entry therefore breaks the chain at the next one;
truncating the tail is caught for runs whose ``run_created`` entry went with it (every
run created after the log began must have one).  Entries are appended under an
exclusive ``flock`` of the log file, each with one ``write`` call, so concurrent
writers keep one chain and a killed writer leaves no partial line.

Reading commands append ``run_verified`` / ``report_written`` only where the store is
writable; on a read-only store nothing is written and the outcome says so.
"""

from __future__ import annotations

import errno
import fcntl
import getpass
import hashlib
import json
import os
import socket
import time
from collections.abc import Mapping
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

__all__ = ["LOG_FILE", "EVENTS", "append", "check_log", "LOCK_WAIT_S"]

LOG_FILE = "audit-log.jsonl"
#: event name → meaning (the ``details`` each carries)
EVENTS = {
    "run_created": "a run folder was saved (manifest_sha256, parent, signer)",
    "run_verified": "a run was verified (ok, problems: count, trusted)",
    "run_rerun": "a run was re-run from its training data (agreement, new run id or null)",
    "report_written": "an audit report was written (runs, files: name -> sha256)",
    "temp_removed": "a temporary folder of a killed writer was removed (folder)",
    "catalog_rebuilt": "the catalog was rebuilt from the run folders (runs)",
}
#: longest wait for the log's lock before an entry is given up (seconds)
LOCK_WAIT_S = 5.0
ZERO = "0" * 64
_KEYS = ("seq", "time", "event", "run_id", "details", "user", "host", "pid", "prev_sha256")
_MAX_LINE = 1 << 20
_MAX_LOG = 1 << 30


def _stamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no name for this uid (containers)
        return f"uid {os.getuid()}"


def _last_line(fd: int) -> bytes | None:
    size = os.fstat(fd).st_size
    if size == 0:
        return None
    back = min(size, _MAX_LINE + 1)
    os.lseek(fd, size - back, os.SEEK_SET)
    tail = os.read(fd, back)
    body = tail[:-1] if tail.endswith(b"\n") else tail
    return body.rsplit(b"\n", 1)[-1]


def append(root: Path, event: str, run_id: str | None, details: Mapping[str, Any]) -> str | None:
    """Append one entry; returns None, or the reason it was not written (read-only store,
    lock not obtained within :data:`LOCK_WAIT_S`).  Never raises for an I/O problem."""
    if event not in EVENTS:
        raise ValueError(f"unknown audit event {event!r}")
    path = Path(root) / LOG_FILE
    try:
        fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0),
                     0o644)
    except OSError as exc:
        if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
            return f"audit log not written ({path}: {exc.strerror}; the store is read-only)"
        return f"audit log not written ({path}: {exc.strerror})"
    try:
        deadline = time.monotonic() + LOCK_WAIT_S
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except OSError:
                if time.monotonic() > deadline:
                    return f"audit log not written (another process held its lock for more " \
                           f"than {LOCK_WAIT_S:g} s)"
                time.sleep(0.01)
        last = _last_line(fd)
        seq, prev = 1, ZERO
        if last:
            prev = hashlib.sha256(last).hexdigest()
            try:
                seq = int(json.loads(last)["seq"]) + 1
            except (ValueError, KeyError, TypeError):
                seq = -1  # the chain is already broken; check_log names the line
        entry = {"seq": seq, "time": _stamp(), "event": event, "run_id": run_id,
                 "details": dict(details), "user": _user(), "host": socket.gethostname(),
                 "pid": os.getpid(), "prev_sha256": prev}
        line = json.dumps(entry, ensure_ascii=True, separators=(",", ":"), default=str) + "\n"
        os.write(fd, line.encode())  # one write: no partial line if the process is killed
        os.fsync(fd)
        return None
    except OSError as exc:
        return f"audit log not written ({path}: {exc.strerror})"
    finally:
        os.close(fd)


def check_log(root: Path) -> tuple[list[str], dict[str, list[dict[str, Any]]], str | None]:
    """Check the chain of ``<root>/audit-log.jsonl``.

    Returns (problems, run id → that run's entries, time of the first entry or None).
    An absent log gives no problem (stores written before the log existed).
    """
    path = Path(root) / LOG_FILE
    by_run: dict[str, list[dict[str, Any]]] = {}
    if not os.path.lexists(path):
        return [], by_run, None
    if path.is_symlink() or not path.is_file():
        return [f"{LOG_FILE}: is not a regular file"], by_run, None
    size = path.stat().st_size
    if size > _MAX_LOG:
        return [f"{LOG_FILE}: {size} bytes, above the {_MAX_LOG} bytes this check reads"], \
            by_run, None
    problems: list[str] = []
    prev, seq, first, last_time = ZERO, 0, None, ""
    with open(path, "rb") as fh:
        for k, raw in enumerate(fh, start=1):
            if not raw.endswith(b"\n"):
                problems.append(f"{LOG_FILE}: line {k} is incomplete (no newline)")
                break
            body = raw[:-1]
            try:
                e = json.loads(body)
                if not isinstance(e, dict) or tuple(e) != _KEYS:
                    raise ValueError
            except ValueError:
                problems.append(f"{LOG_FILE}: line {k} is not an audit entry")
                break
            if e["prev_sha256"] != prev:
                problems.append(f"{LOG_FILE}: line {k} (entry {e['seq']}) does not chain to the "
                                "line before it: an entry was deleted, changed or moved")
                break
            if e["seq"] != seq + 1:
                problems.append(f"{LOG_FILE}: line {k} has entry number {e['seq']}, expected "
                                f"{seq + 1}")
                break
            if e["event"] not in EVENTS:
                problems.append(f"{LOG_FILE}: line {k} has unknown event {e['event']!r}")
                break
            if not isinstance(e["time"], str) or e["time"] < last_time:
                problems.append(f"{LOG_FILE}: line {k} is timed {e['time']!r}, before the "
                                f"entry above it ({last_time})")
                break
            first = first or e["time"]
            last_time = e["time"]
            prev, seq = hashlib.sha256(body).hexdigest(), e["seq"]
            if isinstance(e["run_id"], str):
                by_run.setdefault(e["run_id"], []).append(e)
    return problems, by_run, first
