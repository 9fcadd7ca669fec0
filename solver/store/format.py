"""Run-folder format (version 1): names, run ids, and safe readers/writers for JSON, npz, Parquet.

Everything a run folder holds is specified in ``traces/README.md``.  This module only
turns Python values into bytes and bytes back into validated values; it never touches
the file system except through the byte strings it is handed.  Every reader raises
:class:`~solver.errors.IntegrityError` naming the file and the field that is wrong.
"""

from __future__ import annotations

import io
import json
import math
import re
import secrets
import zipfile
import zlib
from collections.abc import Mapping
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pyarrow loads only when a table is written or read
    import pyarrow as pa

from ..errors import IntegrityError, InvalidInputError

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "RUN_ID_PATTERN",
    "new_run_id",
    "check_run_id",
    "is_run_id",
    "dump_json",
    "parse_json",
    "to_plain",
    "from_plain",
    "write_npz",
    "read_npz",
    "write_table",
    "read_table",
    "write_csv",
]

FORMAT_NAME = "kktrace-run"
FORMAT_VERSION = 3
#: versions this code reads; version 1 used the option names ``tol``, ``max_iter``,
#: ``cache_mb``, ``tau`` and the certificate field ``tol`` (renamed in version 2); version 3
#: added the SMO trace column ``outer`` and the SMO option ``working_set`` (before it, every
#: SMO run used the two-variable working set, one selection per step).
READABLE_VERSIONS = (1, 2, 3)

#: ``YYYYMMDDTHHMMSSffffffZ-`` + 12 lower-case hex digits (48 random bits).
RUN_ID_PATTERN = re.compile(r"[0-9]{8}T[0-9]{12}Z-[0-9a-f]{12}")

#: Parquet compression used for every table (zstd; level 3 is zstd's own default).
ZSTD_LEVEL = 3

_NPZ_DATE = (1980, 1, 1, 0, 0, 0)  # fixed zip member timestamp: same arrays → same bytes
_ALLOWED_KINDS = "biuf"  # bool, signed, unsigned, float: nothing that needs pickle
_NPZ_SAMPLE = 8192  # bytes of a float member deflated to decide whether to deflate it
_NPZ_STORE_RATIO = 0.9  # ... stored as is when the sample deflates to more than this share


def new_run_id(now: datetime | None = None) -> str:
    """A fresh run id: UTC time to the microsecond + 48 random bits (sorts by creation time)."""
    now = now or datetime.now(timezone.utc)
    return now.strftime("%Y%m%dT%H%M%S%fZ") + "-" + secrets.token_hex(6)


def is_run_id(text: object) -> bool:
    """True when ``text`` is a well-formed run id."""
    return isinstance(text, str) and RUN_ID_PATTERN.fullmatch(text) is not None


def check_run_id(text: object) -> str:
    """Return ``text`` if it is a well-formed run id, else raise :class:`InvalidInputError`."""
    if not is_run_id(text):
        raise InvalidInputError(
            f"{text!r} is not a run id (expected e.g. 20260101T120000000000Z-0123456789ab; "
            "no path separators)"
        )
    return str(text)


def check_run_id_integrity(text: str, fname: str) -> str:
    """Like :func:`check_run_id` for a run id read from a file: raises :class:`IntegrityError`."""
    if not is_run_id(text):
        raise IntegrityError(f"{fname}: {text!r} is not a valid run id")
    return text


def utc_stamp(now: datetime | None = None) -> str:
    """ISO 8601 UTC time with microseconds, e.g. ``2026-01-01T12:00:00.000000Z``."""
    now = now or datetime.now(timezone.utc)
    return now.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


# ----------------------------------------------------------------------------- JSON

def to_plain(value: Any, arrays: dict[str, np.ndarray] | None, where: str) -> Any:
    """Plain JSON data for ``value``.

    numpy scalars become Python scalars, tuples become lists, non-finite floats become
    ``{"$float": "nan" | "inf" | "-inf"}``; numpy arrays go into ``arrays`` under a
    numbered key and are replaced by ``{"$array": key}`` (an error when ``arrays`` is
    None); enums with a ``label`` become that label; callables become
    ``{"$callable": "module.qualname"}`` (a name only; it cannot be called back).
    Anything else raises :class:`InvalidInputError` naming ``where``.
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if math.isfinite(f):
            return f
        return {"$float": "nan" if math.isnan(f) else ("inf" if f > 0 else "-inf")}
    if hasattr(value, "label") and hasattr(value, "name") and hasattr(type(value), "__members__"):
        return str(value.label)
    if isinstance(value, np.ndarray):
        if arrays is None:
            raise InvalidInputError(f"{where}: arrays are not allowed here")
        if value.dtype.kind not in _ALLOWED_KINDS:
            raise InvalidInputError(
                f"{where}: array of dtype {value.dtype} cannot be stored "
                "(numbers and booleans only)"
            )
        key = f"a{len(arrays)}"
        arrays[key] = np.ascontiguousarray(value)
        return {"$array": key}
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise InvalidInputError(f"{where}: mapping key {k!r} is not a string")
            out[k] = to_plain(v, arrays, f"{where}.{k}")
        return out
    if isinstance(value, (list, tuple)):
        return [to_plain(v, arrays, f"{where}[{i}]") for i, v in enumerate(value)]
    if callable(value):
        name = f"{getattr(value, '__module__', '?')}.{getattr(value, '__qualname__', '?')}"
        return {"$callable": name}
    raise InvalidInputError(
        f"{where}: value of type {type(value).__name__} is not plain data "
        "(numbers, strings, booleans, None, lists, string-keyed mappings, numeric arrays)"
    )


def from_plain(value: Any, arrays: Mapping[str, np.ndarray], where: str) -> Any:
    """Inverse of :func:`to_plain` (``$callable`` markers stay as their mapping)."""
    if isinstance(value, dict):
        if set(value) == {"$float"}:
            tag = value["$float"]
            if tag not in ("nan", "inf", "-inf"):
                raise IntegrityError(f"{where}: bad $float tag {tag!r}")
            return float(tag)
        if set(value) == {"$array"}:
            key = value["$array"]
            if not isinstance(key, str) or key not in arrays:
                raise IntegrityError(f"{where}: refers to missing array {key!r} in arrays.npz")
            return arrays[key]
        return {k: from_plain(v, arrays, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, list):
        return [from_plain(v, arrays, f"{where}[{i}]") for i, v in enumerate(value)]
    return value


def dump_json(obj: Any) -> bytes:
    """UTF-8 JSON bytes (strict: no NaN/Infinity literals), 1-space indent, trailing newline."""
    return (json.dumps(obj, indent=1, ensure_ascii=False, allow_nan=False) + "\n").encode()


def _no_constants(name: str) -> Any:
    raise ValueError(f"non-standard JSON literal {name}")


def parse_json(data: bytes, fname: str) -> Any:
    """Parse JSON bytes; malformed input → :class:`IntegrityError` naming ``fname``."""
    try:
        return json.loads(data.decode("utf-8"), parse_constant=_no_constants)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise IntegrityError(f"{fname}: not valid JSON ({exc})") from None


# ----------------------------------------------------------------------------- npz

def write_npz(arrays: Mapping[str, np.ndarray]) -> bytes:
    """``.npz`` bytes (zip) holding ``arrays``; deterministic for equal arrays.

    A member is deflated (level 1) unless it is a float array of more than
    :data:`_NPZ_SAMPLE` bytes whose first :data:`_NPZ_SAMPLE` bytes deflate to more than
    :data:`_NPZ_STORE_RATIO` of their size: such members (data rows, multipliers of many
    support vectors) are stored as they are, because deflating them saves a few per cent at
    ~25 MB/s on the machines measured.  Both are plain zip members that any zip reader opens.
    """
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        for name, arr in arrays.items():
            arr = np.asarray(arr)
            if arr.dtype.kind not in _ALLOWED_KINDS:
                raise InvalidInputError(f"array {name!r} has dtype {arr.dtype}; numbers only")
            member = io.BytesIO()
            np.lib.format.write_array(member, np.ascontiguousarray(arr), allow_pickle=False)
            data = member.getvalue()
            info = zipfile.ZipInfo(name + ".npy", date_time=_NPZ_DATE)
            stored = (arr.dtype.kind == "f" and len(data) > _NPZ_SAMPLE
                      and len(zlib.compress(data[:_NPZ_SAMPLE], 1))
                      > _NPZ_STORE_RATIO * _NPZ_SAMPLE)
            zf.writestr(info, data,
                        compress_type=zipfile.ZIP_STORED if stored else zipfile.ZIP_DEFLATED,
                        compresslevel=None if stored else 1)
    return buf.getvalue()


def _npy_header(fh: Any) -> tuple[tuple[int, ...], bool, np.dtype]:
    version = np.lib.format.read_magic(fh)
    if version == (1, 0):
        return np.lib.format.read_array_header_1_0(fh)
    if version in ((2, 0), (3, 0)):
        return np.lib.format.read_array_header_2_0(fh)
    raise ValueError(f"unsupported npy version {version}")


def read_npz(
    data: bytes,
    fname: str,
    expected: Mapping[str, tuple[str, tuple[int | None, ...]]] | None = None,
) -> dict[str, np.ndarray]:
    """Read ``.npz`` bytes without pickle, checking every member's header first.

    ``expected`` maps member name → (dtype kinds allowed, shape with None for any
    length); members missing from or extra to ``expected`` are errors.  With
    ``expected=None`` any numeric members are accepted.
    """
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
        names = zf.namelist()
    except (zipfile.BadZipFile, ValueError, OSError) as exc:
        raise IntegrityError(f"{fname}: not a valid npz (zip) file ({exc})") from None
    out: dict[str, np.ndarray] = {}
    keys = []
    for member in names:
        if not member.endswith(".npy") or "/" in member or member.startswith("."):
            raise IntegrityError(f"{fname}: unexpected member {member!r}")
        keys.append(member[:-4])
    if expected is not None:
        missing = sorted(set(expected) - set(keys))
        extra = sorted(set(keys) - set(expected))
        if missing or extra:
            raise IntegrityError(f"{fname}: missing arrays {missing}, unexpected arrays {extra}")
    for key in keys:
        try:
            with zf.open(key + ".npy") as fh:
                shape, _fortran, dtype = _npy_header(fh)
                if dtype.hasobject or dtype.kind not in _ALLOWED_KINDS:
                    raise IntegrityError(
                        f"{fname}: array {key!r} has dtype {dtype}; only numeric arrays are "
                        "allowed (object arrays would need pickle and are refused)"
                    )
                if expected is not None:
                    kinds, want = expected[key]
                    if dtype.kind not in kinds or len(shape) != len(want) or any(
                        w is not None and w != s for w, s in zip(want, shape, strict=True)
                    ):
                        raise IntegrityError(
                            f"{fname}: array {key!r} has dtype {dtype} shape {shape}, "
                            f"expected kind {kinds!r} shape {want}"
                        )
                count = int(np.prod(shape, dtype=np.int64)) if shape else 1
                raw = fh.read(count * dtype.itemsize + 1)
        except IntegrityError:
            raise
        except (ValueError, OSError, zipfile.BadZipFile, EOFError, KeyError,
                SyntaxError, TypeError) as exc:
            raise IntegrityError(f"{fname}: array {key!r} is malformed ({exc})") from None
        if len(raw) != count * dtype.itemsize:
            raise IntegrityError(f"{fname}: array {key!r} has {len(raw)} data bytes, "
                                 f"expected {count * dtype.itemsize}")
        arr = np.frombuffer(raw, dtype=dtype).reshape(shape, order="F" if _fortran else "C")
        out[key] = np.array(arr, order="C")  # own, writable, C-contiguous copy
    return out


# ----------------------------------------------------------------------------- Parquet

def _column_encoding(name: str, arr: np.ndarray) -> tuple[str | None, bool]:
    """(explicit encoding or None, use dictionary) for one column; see traces/README.md."""
    kind = arr.dtype.kind
    if kind == "f":
        return "BYTE_STREAM_SPLIT", False
    if kind in "iu":
        if name in ("iteration", "outer"):  # non-decreasing counters
            return "DELTA_BINARY_PACKED", False
        return None, True  # dictionary + RLE/bit-packed indices (falls back to plain if large)
    return None, True


def _to_arrow(arr: np.ndarray) -> pa.Array:
    """Arrow array from a 1-D numpy array, built from buffers (``pa.array`` would import pandas)."""
    import pyarrow as pa

    n = int(arr.shape[0])
    if arr.dtype.kind == "b":
        bits = np.packbits(arr.astype(np.uint8), bitorder="little")
        return pa.Array.from_buffers(pa.bool_(), n, [None, pa.py_buffer(bits.tobytes())])
    if arr.dtype.kind in "iuf":
        data = np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("="))
        return pa.Array.from_buffers(pa.from_numpy_dtype(data.dtype), n,
                                     [None, pa.py_buffer(data.tobytes())])
    parts = [str(v).encode("utf-8") for v in arr.tolist()]
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum([len(b) for b in parts], out=offsets[1:])
    return pa.Array.from_buffers(pa.large_string(), n, [None, pa.py_buffer(offsets.tobytes()),
                                                        pa.py_buffer(b"".join(parts))])


def arrow_column(values: Any) -> pa.Array:
    """Arrow array of a 1-D numpy array or a list of plain values (None for missing), with
    the types ``pyarrow.array`` infers (int64, double, bool, string, null) but built from
    buffers: ``pyarrow.array`` and ``pyarrow.table`` import pandas where it is installed
    (0.5 s).  Values of other kinds fall back to ``pyarrow.array``."""
    import pyarrow as pa

    if isinstance(values, np.ndarray) and values.dtype.kind in "biuf" and values.ndim == 1:
        return _to_arrow(values)
    items = values.tolist() if isinstance(values, np.ndarray) else [
        v.item() if isinstance(v, np.generic) else v for v in values]
    n = len(items)
    valid = np.array([v is not None for v in items], dtype=bool)
    present = [v for v in items if v is not None]
    if not present:
        return pa.nulls(n)
    mask = None if valid.all() else pa.py_buffer(
        np.packbits(valid, bitorder="little").tobytes())
    nulls = int(n - valid.sum())

    def numbers(dtype: Any, arrow_type: Any) -> pa.Array:
        data = np.zeros(n, dtype=dtype)
        data[valid] = present
        return pa.Array.from_buffers(arrow_type, n, [mask, pa.py_buffer(data.tobytes())],
                                     null_count=nulls)

    kinds = {type(v) for v in present}
    if kinds <= {bool}:
        bits = np.packbits(np.array([bool(v) if v is not None else False for v in items]),
                           bitorder="little")
        return pa.Array.from_buffers(pa.bool_(), n, [mask, pa.py_buffer(bits.tobytes())],
                                     null_count=nulls)
    if kinds <= {int}:
        return numbers(np.int64, pa.int64())
    if kinds <= {int, float}:
        return numbers(np.float64, pa.float64())
    if kinds <= {str}:
        parts = [v.encode("utf-8") if v is not None else b"" for v in items]
        offsets = np.zeros(n + 1, dtype=np.int32)
        np.cumsum([len(b) for b in parts], out=offsets[1:])
        return pa.Array.from_buffers(pa.string(), n, [mask, pa.py_buffer(offsets.tobytes()),
                                                      pa.py_buffer(b"".join(parts))],
                                     null_count=nulls)
    return pa.array(items)


def arrow_table(columns: Mapping[str, Any]) -> pa.Table:
    """Arrow table of named columns (see :func:`arrow_column`), without importing pandas."""
    import pyarrow as pa

    return pa.Table.from_arrays([arrow_column(v) for v in columns.values()],
                                names=list(columns))


_preload: Any = None


def preload_parquet() -> None:
    """Start importing ``pyarrow.parquet`` in a thread of its own (~0.1 s here: it loads
    pyarrow's file systems and ``ssl``), for a caller about to spend longer than that in
    compiled code that releases the GIL (a solve), so that the save finds it loaded.
    Does nothing when it is loaded or being loaded; a failed import is left for the
    writer to meet and report (:func:`write_table` waits for the thread first)."""
    global _preload
    import sys
    import threading

    if _preload is not None or "pyarrow.parquet" in sys.modules:
        return

    def run() -> None:
        try:
            import pyarrow.parquet  # noqa: F401
        except Exception:  # noqa: BLE001, S110 - imported again, in the open, by the writer
            pass

    _preload = threading.Thread(target=run, name="kktrace-preload-parquet", daemon=True)
    _preload.start()


def _parquet() -> Any:
    """``pyarrow.parquet``, after a :func:`preload_parquet` thread has finished."""
    if _preload is not None:
        _preload.join()
    import pyarrow.parquet as pq

    return pq


def write_table(
    columns: Mapping[str, np.ndarray],
    *,
    metadata: Mapping[str, str] | None = None,
    descriptions: Mapping[str, str] | None = None,
) -> bytes:
    """Parquet bytes for equal-length 1-D columns (zstd, per-column encodings, page CRCs).

    Numeric and boolean columns keep their dtype; string columns are UTF-8.
    ``descriptions`` become per-field metadata ``description`` for readers.
    """
    import pyarrow as pa

    pq = _parquet()
    fields, arrays, enc, dict_cols = [], [], {}, []
    for name, arr in columns.items():
        arr = np.asarray(arr)
        pa_arr = _to_arrow(arr)
        doc = descriptions.get(name) if descriptions else None
        meta = {"description": doc} if doc else None
        fields.append(pa.field(name, pa_arr.type, nullable=False, metadata=meta))
        arrays.append(pa_arr)
        e, use_dict = _column_encoding(name, arr)
        if e is not None:
            enc[name] = e
        if use_dict:
            dict_cols.append(name)
    schema = pa.schema(fields, metadata=dict(metadata or {}))
    table = pa.Table.from_arrays(arrays, schema=schema)
    buf = io.BytesIO()
    pq.write_table(
        table, buf, compression="zstd", compression_level=ZSTD_LEVEL,
        use_dictionary=dict_cols or False, column_encoding=enc or None,
        write_statistics=True, write_page_checksum=True, row_group_size=1 << 20,
    )
    return buf.getvalue()


_NUMPY_OF = {name: np.dtype(name) for name in (
    "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64")}
_NUMPY_OF.update({"float": np.dtype(np.float32), "double": np.dtype(np.float64),
                  "halffloat": np.dtype(np.float16)})


def _from_arrow(col: pa.ChunkedArray) -> np.ndarray:
    """numpy copy of a null-free numeric or boolean column, read from its buffers."""
    import pyarrow as pa

    typ = col.type
    parts = []
    for ch in col.chunks:
        buf = ch.buffers()[1]
        if pa.types.is_boolean(typ):
            bits = np.unpackbits(np.frombuffer(buf, dtype=np.uint8), bitorder="little")
            parts.append(bits[ch.offset:ch.offset + len(ch)].astype(bool))
        else:
            dt = _NUMPY_OF[str(typ)]
            parts.append(np.frombuffer(buf, dtype=dt, count=len(ch),
                                       offset=ch.offset * dt.itemsize))
    if not parts:
        return np.zeros(0, dtype=bool if pa.types.is_boolean(typ) else _NUMPY_OF[str(typ)])
    return np.concatenate(parts)


def read_table(
    data: bytes, fname: str, expected: Mapping[str, str] | None = None, spec: str = "columns"
) -> dict[str, np.ndarray]:
    """Read Parquet bytes into ``{name: 1-D numpy array}``.

    ``expected`` maps column name → numpy dtype string (``"str"`` for text); column set,
    order and dtypes must match exactly (``spec`` names the manifest field in messages).
    Malformed bytes → :class:`IntegrityError`.
    """
    import pyarrow as pa

    pq = _parquet()

    try:
        # ParquetFile, not pq.read_table: the latter imports pandas (a second of start-up)
        # one thread: once Arrow's thread pool has started, the process can abort at exit
        # ("terminate called without an active exception": 5 of 100 CLI runs, four at a time
        # on two cores; none in 280 with this).  A 1,000,000-row trace reads in ~0.1 s.
        table = pq.ParquetFile(pa.BufferReader(data), page_checksum_verification=True).read(
            use_threads=False)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise IntegrityError(f"{fname}: not a readable Parquet file ({exc})") from None
    names = list(table.column_names)
    if expected is not None and names != list(expected):
        raise IntegrityError(f"{fname}: columns {names} do not match manifest.json field "
                             f"{spec} {list(expected)}")
    out: dict[str, np.ndarray] = {}
    for name in names:
        col = table.column(name)
        if col.null_count:
            raise IntegrityError(f"{fname}: column {name!r} holds missing values")
        typ = col.type
        if pa.types.is_string(typ) or pa.types.is_large_string(typ):
            arr = np.array(col.to_pylist(), dtype=object)
            dt = "str"
        elif pa.types.is_integer(typ) or pa.types.is_floating(typ) or pa.types.is_boolean(typ):
            arr = _from_arrow(col)
            dt = str(arr.dtype)
        else:
            raise IntegrityError(f"{fname}: column {name!r} has unsupported type {typ}")
        if expected is not None and expected[name] != dt:
            raise IntegrityError(
                f"{fname}: column {name!r} has type {dt}, but manifest.json field "
                f"{spec}.{name} says {expected[name]}"
            )
        out[name] = np.array(arr, copy=True) if dt != "str" else arr
    return out


def write_csv(columns: Mapping[str, np.ndarray]) -> bytes:
    """CSV bytes (header row; floats as shortest round-trip decimal; RFC 4180 quoting).

    The bytes of :class:`csv.writer` with its defaults (minimal quoting, ``\n`` line ends),
    built a column at a time: each column's cells are formatted and, where one holds a
    comma, a quote or a newline, quoted; then every line is joined at once (the explanation
    table of 10 000 rows: 56 → 35 ms; a test compares the bytes with ``csv.writer``'s)."""
    names = list(columns)
    cells: list[list[str]] = [[_csv_cell(c) for c in names]]
    for c in names:
        arr = np.asarray(columns[c])
        vals = arr.tolist()
        if arr.dtype.kind == "f":
            cells.append(list(map(repr, vals)))
        elif arr.dtype.kind in "iub":
            cells.append(list(map(str, vals)))
        elif all(type(v) is str for v in vals):
            special = _CSV_SPECIAL.search
            cells.append([_quoted(v) if special(v) else v for v in vals])
        else:
            cells.append([_csv_cell(v) for v in vals])
    if len(names) == 1:  # a lone empty field is written as "" (csv.writer's rule)
        cells = [[v if v else '""' for v in col] for col in cells]
    header = ",".join(cells[0])
    rows = zip(*cells[1:], strict=True)
    return ("\n".join([header, *map(",".join, rows)]) + "\n").encode()


#: characters csv.writer quotes a field for, with ``lineterminator="\n"`` (a lone ``\r`` is
#: not one of them)
_CSV_SPECIAL = re.compile(r'[,"\n]')


def _csv_cell(v: Any) -> str:
    """One cell as :class:`csv.writer` writes it (None empty, floats by ``repr``)."""
    if v is None:
        return ""
    s = repr(v) if isinstance(v, float) else v if isinstance(v, str) else str(v)
    return _quoted(s) if _CSV_SPECIAL.search(s) else s


def _quoted(s: str) -> str:
    """``s`` in quotes, its quotes doubled (RFC 4180)."""
    return '"' + s.replace('"', '""') + '"'


# ----------------------------------------------------------------------------- field checks

def field(obj: Mapping[str, Any], key: str, types: type | tuple[type, ...], fname: str,
          path: str, *, optional: bool = False) -> Any:
    """``obj[key]`` checked to be of ``types`` (bool is never accepted as a number)."""
    if not isinstance(obj, Mapping):
        raise IntegrityError(f"{fname}: field {path or '(top level)'} must be an object")
    full = f"{path}.{key}" if path else key
    if key not in obj:
        if optional:
            return None
        raise IntegrityError(f"{fname}: field {full} is missing")
    v = obj[key]
    if v is None and optional:
        return None
    types_t = types if isinstance(types, tuple) else (types,)
    if isinstance(v, bool) and bool not in types_t:
        ok = False
    else:
        ok = isinstance(v, types_t)
    if not ok:
        names = "/".join(t.__name__ for t in types_t)
        raise IntegrityError(f"{fname}: field {full} must be {names}, got {type(v).__name__}")
    return v


def number(obj: Mapping[str, Any], key: str, fname: str, path: str) -> float:
    """A float field that may also be a ``$float`` tag (nan/inf)."""
    v = obj.get(key) if isinstance(obj, Mapping) else None
    if isinstance(v, dict):
        return float(from_plain(v, {}, f"{fname}: {path}.{key}"))
    return float(field(obj, key, (int, float), fname, path))


def str_list(obj: Mapping[str, Any], key: str, fname: str, path: str) -> list[str]:
    """A list-of-strings field."""
    v = field(obj, key, list, fname, path)
    if not all(isinstance(s, str) for s in v):
        raise IntegrityError(f"{fname}: field {path}.{key} must be a list of strings")
    return v
