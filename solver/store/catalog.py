"""The run catalog: an SQLite index (stdlib ``sqlite3``, WAL) of the run folders in a store.

The folders are the truth; the catalog is an index that can always be rebuilt from them.
Schema (table ``runs``, one row per run) is listed in :data:`COLUMNS` and in
``traces/README.md``.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import shlex
import sqlite3
import time
import warnings
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from ..errors import InvalidInputError

__all__ = ["CATALOG_FILE", "COLUMNS", "SCHEMA_VERSION", "Catalog", "CatalogUnavailable",
           "row_from_manifest", "query_rows"]

CATALOG_FILE = "catalog.sqlite"
SCHEMA_VERSION = 1
#: longest wait of a writer (a save) for the catalog's write lock; after it the run is
#: stored anyway and the catalog reported stale (indexed by the next save)
BUSY_TIMEOUT_S = 10.0
#: longest wait of a reader for a locked catalog before listing from the folders instead
READ_WAIT_S = 2.0

#: (column, SQLite type) of table ``runs``.
COLUMNS: tuple[tuple[str, str], ...] = (
    ("run_id", "TEXT PRIMARY KEY"),
    ("created", "TEXT"),
    ("solver", "TEXT"),
    ("status", "TEXT"),
    ("converged", "INTEGER"),
    ("problem_kind", "TEXT"),
    ("kernel", "TEXT"),
    ("gamma", "REAL"),
    ("C", "REAL"),
    ("n", "INTEGER"),
    ("n_features", "INTEGER"),
    ("kkt_tol", "REAL"),
    ("iterations", "INTEGER"),
    ("seconds", "REAL"),
    ("max_violation", "REAL"),
    ("duality_gap", "REAL"),
    ("relative_gap", "REAL"),
    ("dual_objective", "REAL"),
    ("primal_objective", "REAL"),
    ("bias", "REAL"),
    ("n_support", "INTEGER"),
    ("n_free", "INTEGER"),
    ("n_bounded", "INTEGER"),
    ("trace_level", "TEXT"),
    ("trace_rows", "INTEGER"),
    ("data_fingerprint", "TEXT"),
    ("data_source", "TEXT"),
    ("parent_id", "TEXT"),
    ("manifest_sha256", "TEXT"),
    ("bytes", "INTEGER"),
    ("kktrace_version", "TEXT"),
    ("format_version", "INTEGER"),
    ("command", "TEXT"),
)
_NAMES = tuple(c for c, _ in COLUMNS)
#: friendlier filter names accepted by :meth:`Catalog.query`.
ALIASES = {"fingerprint": "data_fingerprint", "parent": "parent_id", "kind": "problem_kind"}


def _num(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(float(v)) else None


def _int(v: Any) -> int | None:
    return int(v) if isinstance(v, int) and not isinstance(v, bool) else None


def _str(v: Any) -> str | None:
    return v if isinstance(v, str) else None


def _get(d: Any, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, Mapping):
            return None
        d = d.get(k)
    return d


def _command_text(v: Any) -> str | None:
    if v is None or isinstance(v, str):
        return v
    if isinstance(v, Mapping) and isinstance(v.get("text"), str):
        return v["text"]
    if isinstance(v, Mapping) and isinstance(v.get("argv"), list):
        return shlex.join(str(a) for a in v["argv"])
    return json.dumps(v, ensure_ascii=False, sort_keys=True)


def row_from_manifest(
    m: Mapping[str, Any], manifest_sha256: str | None, total_bytes: int
) -> dict[str, Any]:
    """Catalog row from a parsed manifest (tolerant: a missing or mistyped field gives NULL)."""
    cert = _get(m, "certificate") or {}
    kern = _get(m, "problem", "kernel") or {}
    status = _str(_get(m, "solver", "status"))
    return {
        "run_id": _str(m.get("run_id")),
        "created": _str(m.get("created")),
        "solver": _str(_get(m, "solver", "name")),
        "status": status,
        "converged": None if status is None else int(status == "converged"),
        "problem_kind": _str(_get(m, "problem", "kind")),
        "kernel": _str(_get(kern, "name")),
        "gamma": _num(_get(kern, "params", "gamma")),
        "C": _num(_get(m, "problem", "info", "C")),
        "n": _int(_get(m, "problem", "n")),
        "n_features": _int(_get(m, "problem", "n_features")),
        "kkt_tol": _num(_get(cert, "kkt_tol")),
        "iterations": _int(_get(m, "solver", "iterations")),
        "seconds": _num(_get(m, "solver", "seconds")),
        "max_violation": _num(_get(cert, "max_violation")),
        "duality_gap": _num(_get(cert, "duality_gap")),
        "relative_gap": _num(_get(cert, "relative_gap")),
        "dual_objective": _num(_get(cert, "dual_objective")),
        "primal_objective": _num(_get(cert, "primal_objective")),
        "bias": _num(_get(m, "solver", "bias")),
        "n_support": _int(_get(cert, "n_support")),
        "n_free": _int(_get(cert, "n_free")),
        "n_bounded": _int(_get(cert, "n_bounded")),
        "trace_level": _str(_get(m, "trace", "level")),
        "trace_rows": _int(_get(m, "trace", "rows")),
        "data_fingerprint": _str(_get(m, "data", "fingerprint")),
        "data_source": _str(_get(m, "data", "source")),
        "parent_id": _str(_get(m, "parent", "run_id")),
        "manifest_sha256": manifest_sha256,
        "bytes": int(total_bytes),
        "kktrace_version": _str(m.get("kktrace_version")),
        "format_version": _int(m.get("format_version")),
        "command": _command_text(m.get("command")),
    }


class CatalogUnavailable(Exception):
    """The catalog cannot be read (absent, locked, damaged, not a file); the message says why."""


def _where(filters: Mapping[str, Any]) -> tuple[str, list[Any]] | None:
    """SQL WHERE clause and arguments for :meth:`Catalog.query` filters (None: no row can match)."""
    where, args = [], []
    for key, value in filters.items():
        if key in ("since", "until"):
            if not isinstance(value, str):
                raise InvalidInputError(f"runs(): {key} must be an ISO time string")
            where.append('"created" >= ?' if key == "since" else '"created" <= ?')
            args.append(value)
            continue
        col = ALIASES.get(key, key)
        if col not in _NAMES:
            raise InvalidInputError(
                f"runs(): unknown filter {key!r}; use one of "
                f"{', '.join(sorted(set(_NAMES) | set(ALIASES) | {'since', 'until'}))}"
            )
        if isinstance(value, bool):
            value = int(value)
        if isinstance(value, (list, tuple, set, frozenset)):
            vals = list(value)
            if not vals:
                return None
            where.append(f'"{col}" IN ({", ".join("?" for _ in vals)})')
            args += vals
        elif value is None:
            where.append(f'"{col}" IS NULL')
        else:
            where.append(f'"{col}" = ?')
            args.append(value)
    return (" WHERE " + " AND ".join(where) if where else ""), args


def _typed(row: Any) -> dict[str, Any]:
    """A catalog row as a dict, ``converged`` as a boolean (SQLite stores it as 0/1), so
    listings and the report's JSON agree on its type."""
    d = dict(row)
    if d.get("converged") is not None:
        d["converged"] = bool(d["converged"])
    return d


def query_rows(rows: Iterable[Mapping[str, Any]], filters: Mapping[str, Any]) -> list[dict]:
    """Filter and order catalog-shaped rows in memory (same rules as :meth:`Catalog.query`)."""
    w = _where(filters)
    if w is None:
        return []
    con = sqlite3.connect(":memory:")
    con.row_factory = sqlite3.Row
    try:
        cols = ", ".join(f'"{c}" {t}' for c, t in COLUMNS)
        con.execute(f"CREATE TABLE runs ({cols})")
        sql = (f"INSERT OR REPLACE INTO runs ({', '.join(chr(34) + c + chr(34) for c in _NAMES)})"
               f" VALUES ({', '.join('?' for _ in _NAMES)})")
        con.executemany(sql, [tuple(r.get(c) for c in _NAMES) for r in rows])
        return [_typed(r) for r in con.execute(
            f"SELECT * FROM runs{w[0]} ORDER BY created, run_id", w[1])]
    finally:
        con.close()


class Catalog:
    """SQLite catalog file ``<root>/catalog.sqlite``; one short-lived connection per call."""

    def __init__(self, root: Path) -> None:
        self.path = Path(root) / CATALOG_FILE
        self._ready = False  # schema checked by this object while the file existed

    def _connect(self) -> sqlite3.Connection:
        try:
            return self._open()
        except sqlite3.DatabaseError as exc:
            if isinstance(exc, sqlite3.OperationalError):
                raise
            # not a database (overwritten, truncated): the folders are the truth, so set
            # the damaged file aside and start an empty catalog that listings re-fill
            aside = self.path.with_name(f"{CATALOG_FILE}.damaged-{time.time_ns()}")
            try:
                os.replace(self.path, aside)
            except FileNotFoundError:
                pass  # another process set it aside first
            for suffix in ("-wal", "-shm"):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(str(self.path) + suffix)
            warnings.warn(f"catalog {self.path} was damaged ({exc}); moved to {aside.name} "
                          "and rebuilt from the run folders", stacklevel=3)
            return self._open()

    def _open(self) -> sqlite3.Connection:
        existed = self.path.exists()
        con = sqlite3.connect(str(self.path), timeout=BUSY_TIMEOUT_S, isolation_level=None)
        con.row_factory = sqlite3.Row
        con.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
        if self._ready and existed:
            try:
                con.execute("PRAGMA schema_version").fetchone()  # reads the header: cheap
            except sqlite3.DatabaseError:
                con.close()
                self._ready = False
                raise
            return con
        deadline = time.monotonic() + BUSY_TIMEOUT_S
        while True:  # switching to WAL needs a moment of exclusive access
            try:
                if con.execute("PRAGMA journal_mode").fetchone()[0] != "wal":
                    con.execute("PRAGMA journal_mode = WAL")
                con.execute("PRAGMA synchronous = NORMAL")
                cols = ", ".join(f'"{c}" {t}' for c, t in COLUMNS)
                con.execute(f"CREATE TABLE IF NOT EXISTS runs ({cols})")
                con.execute("CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT)")
                con.execute("INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)",
                            (str(SCHEMA_VERSION),))
                break
            except sqlite3.OperationalError as exc:
                if "locked" not in str(exc) or time.monotonic() > deadline:
                    con.close()
                    raise
                time.sleep(0.02)
        ver = con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0]
        existing = [r[1] for r in con.execute("PRAGMA table_info(runs)")]
        if ver != str(SCHEMA_VERSION) or tuple(existing) != _NAMES:
            # an older or foreign layout: recreate; the store re-indexes the folders
            con.execute("BEGIN IMMEDIATE")
            con.execute("DROP TABLE runs")
            cols = ", ".join(f'"{c}" {t}' for c, t in COLUMNS)
            con.execute(f"CREATE TABLE runs ({cols})")
            con.execute("UPDATE meta SET value=? WHERE key='schema_version'",
                        (str(SCHEMA_VERSION),))
            con.execute("COMMIT")
        self._ready = True
        return con

    def upsert(self, rows: Iterable[Mapping[str, Any]]) -> None:
        """Insert or replace rows (one transaction)."""
        rows = list(rows)
        if not rows:
            return
        sql = (f"INSERT OR REPLACE INTO runs ({', '.join(chr(34) + c + chr(34) for c in _NAMES)}) "
               f"VALUES ({', '.join('?' for _ in _NAMES)})")
        con = self._connect()
        try:
            con.execute("BEGIN IMMEDIATE")
            con.executemany(sql, [tuple(r.get(c) for c in _NAMES) for r in rows])
            con.execute("COMMIT")
        finally:
            con.close()

    def delete(self, run_ids: Iterable[str]) -> None:
        """Remove the rows of ``run_ids``."""
        ids = [(r,) for r in run_ids]
        if not ids:
            return
        con = self._connect()
        try:
            con.execute("BEGIN IMMEDIATE")
            con.executemany("DELETE FROM runs WHERE run_id = ?", ids)
            con.execute("COMMIT")
        finally:
            con.close()

    def replace_all(self, rows: Iterable[Mapping[str, Any]]) -> None:
        """Make the table hold exactly ``rows`` (one transaction)."""
        rows = list(rows)
        sql = (f"INSERT INTO runs ({', '.join(chr(34) + c + chr(34) for c in _NAMES)}) "
               f"VALUES ({', '.join('?' for _ in _NAMES)})")
        con = self._connect()
        try:
            con.execute("BEGIN IMMEDIATE")
            con.execute("DELETE FROM runs")
            con.executemany(sql, [tuple(r.get(c) for c in _NAMES) for r in rows])
            con.execute("COMMIT")
        finally:
            con.close()

    def _open_ro(self) -> sqlite3.Connection:
        """A read-only connection (never creates, converts or writes anything)."""
        import urllib.parse

        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            raise CatalogUnavailable("no catalog file") from None
        except OSError as exc:
            raise CatalogUnavailable(f"cannot be opened ({exc.strerror})") from None
        import stat as _stat

        if not _stat.S_ISREG(st.st_mode):
            raise CatalogUnavailable("is not a regular file")
        base = "file:" + urllib.parse.quote(str(self.path))
        last: Exception | None = None
        # ?mode=ro needs the -shm file of a WAL database; a read-only folder without one
        # is opened as immutable (the WAL is then not read, the folders fill the gap)
        for suffix in ("?mode=ro", "?mode=ro&immutable=1"):
            con = None
            try:
                con = sqlite3.connect(base + suffix, uri=True, timeout=READ_WAIT_S,
                                      isolation_level=None)
                con.row_factory = sqlite3.Row
                con.execute(f"PRAGMA busy_timeout = {int(READ_WAIT_S * 1000)}")
                ver = con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
                if ver is None or ver[0] != str(SCHEMA_VERSION):
                    con.close()
                    raise CatalogUnavailable("is of another schema version")
                return con
            except sqlite3.Error as exc:
                last = exc
                if con is not None:
                    con.close()
                if "locked" in str(exc) or "not a database" in str(exc):
                    break
        raise CatalogUnavailable(f"cannot be read ({last})")

    def read_rows(self) -> dict[str, dict[str, Any]]:
        """Every row, run_id → row, read without writing; raises :class:`CatalogUnavailable`."""
        con = self._open_ro()
        try:
            return {r["run_id"]: dict(r) for r in con.execute("SELECT * FROM runs")}
        except sqlite3.Error as exc:
            raise CatalogUnavailable(f"cannot be read ({exc})") from None
        finally:
            con.close()

    def read_digest(self, run_id: str) -> str | None:
        """The recorded manifest digest of ``run_id``, read without writing; raises
        :class:`CatalogUnavailable`."""
        con = self._open_ro()
        try:
            row = con.execute("SELECT manifest_sha256 FROM runs WHERE run_id = ?",
                              (run_id,)).fetchone()
            return None if row is None else row[0]
        except sqlite3.Error as exc:
            raise CatalogUnavailable(f"cannot be read ({exc})") from None
        finally:
            con.close()

    def digests(self) -> dict[str, str | None]:
        """run_id → recorded manifest digest, for every row."""
        if not self.path.exists():
            return {}
        con = self._connect()
        try:
            return {r[0]: r[1] for r in con.execute("SELECT run_id, manifest_sha256 FROM runs")}
        finally:
            con.close()

    def digest(self, run_id: str) -> str | None:
        """The manifest digest recorded for ``run_id`` (None when absent or no catalog)."""
        if not self.path.exists():
            return None
        con = self._connect()
        try:
            row = con.execute("SELECT manifest_sha256 FROM runs WHERE run_id = ?",
                              (run_id,)).fetchone()
            return None if row is None else row[0]
        finally:
            con.close()

    def query(self, filters: Mapping[str, Any]) -> list[dict[str, Any]]:
        """Rows matching every filter, oldest first.

        Filters: any column name (or alias ``fingerprint``, ``parent``, ``kind``) equal to a
        value, or to any of a list/tuple of values; ``since`` / ``until`` bound ``created``
        (ISO strings, inclusive).
        """
        w = _where(filters)
        if w is None:
            return []
        sql = f"SELECT * FROM runs{w[0]} ORDER BY created, run_id"
        con = self._connect()
        try:
            return [_typed(r) for r in con.execute(sql, w[1])]
        finally:
            con.close()
