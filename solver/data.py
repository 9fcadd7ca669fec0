"""Data intake: files and arrays → validated :class:`Dataset` with a stable fingerprint.

Formats (chosen by file suffix)
-------------------------------
``.csv``
    UTF-8 text, comma separated, one header row of column names.  ``label`` names the
    label column; every other column (or those named in ``feature_columns``) must hold
    numbers.  Blank lines are skipped.
``.parquet`` / ``.pq``
    Read with pyarrow.  Feature columns must be numeric (integer, floating, decimal,
    boolean) or text that reads as numbers.
``.npy``
    One 2-D numeric array.  It has no column names, so its columns are called
    ``col1``, ``col2``, … (1-based) and ``label`` picks one of them by that name, e.g.
    ``label="col5"``; with ``label=None`` every column is a feature.
``.npz``
    Arrays ``X`` (2-D, required), ``y`` or ``labels`` (1-D, optional), ``feature_names``
    (1-D text, optional, default ``col1``, …) and ``label_name`` (text, optional).  The
    label column is called ``label_name`` when stored, else by its array name
    (``"y"`` or ``"labels"``); ``label`` must give that name.

``label=None`` always means query data: labels are not read and ``Dataset.labels`` is None.
Files are read without executing code (``np.load(..., allow_pickle=False)``, the ``csv``
module, pyarrow).

Row numbers in messages
-----------------------
"row r" is the 1-based number of the data row, as a spreadsheet user counts records
below the header: the first data row is row 1.  CSV messages add the file line
(``line r+1`` when no blank or multi-line records come before it); array and binary
formats add the 0-based ``index``.

Labels
------
Label values are canonicalised so that the same labels read from any format are equal:
when every label reads as a number they become numbers — ``int64`` when all are whole
numbers (``"1"``, ``1`` and ``1.0`` are all the integer 1), else ``float64``; otherwise
they are text (``str``, surrounding spaces removed; booleans become ``"True"`` /
``"False"``).  Empty, missing or NaN labels are errors.
"""

from __future__ import annotations

import csv
import functools
import hashlib
import json
import warnings
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ._intake import (
    MAX_LISTED,
    SCALE_RATIO_WARN,
    Where,
    canonical_labels,
    check_finite,
    check_names,
    intake_warnings,
    numeric_column,
    select_columns,
    where_index,
)
from .errors import DataWarning, InvalidInputError

__all__ = [
    "Dataset",
    "load_table",
    "from_arrays",
    "fingerprint",
    "FINGERPRINT_VERSION",
    "SCALE_RATIO_WARN",
    "SUPPORTED_SUFFIXES",
]

#: Bumped whenever the canonical encoding behind :func:`fingerprint` changes.
FINGERPRINT_VERSION = "kktrace-dataset-v1"
SUPPORTED_SUFFIXES = (".csv", ".parquet", ".pq", ".npy", ".npz")

@dataclass(frozen=True, eq=False)
class Dataset:
    """Validated training or query data.

    X : (n, d) float64 raw features; labels : (n,) label values (numbers or strings) or
    None for unlabelled query data; feature_names : d column names; label_name : label
    column name; source : file name it came from (None for arrays); warnings : data
    warnings found at intake (conflicting duplicates, constant or unscaled features).

    Build it with :func:`load_table` or :func:`from_arrays`, which validate the values;
    the constructor itself only checks shapes and makes read-only private copies.
    """

    X: np.ndarray
    labels: np.ndarray | None
    feature_names: tuple[str, ...]
    label_name: str | None = None
    source: str | None = None
    warnings: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        X = np.array(self.X, dtype=np.float64, order="C")
        if X.ndim != 2:
            raise InvalidInputError(f"dataset X must be 2-D (rows, features), got shape {X.shape}")
        X.setflags(write=False)
        object.__setattr__(self, "X", X)
        names = tuple(str(c) for c in self.feature_names)
        if len(names) != X.shape[1]:
            raise InvalidInputError(
                f"dataset has {X.shape[1]} feature columns but {len(names)} feature names"
            )
        object.__setattr__(self, "feature_names", names)
        if self.labels is not None:
            lab = np.array(self.labels)
            if lab.shape != (X.shape[0],):
                raise InvalidInputError(
                    f"dataset has {X.shape[0]} rows but labels of shape {lab.shape}"
                )
            lab.setflags(write=False)
            object.__setattr__(self, "labels", lab)
        object.__setattr__(self, "warnings", tuple(str(w) for w in self.warnings))

    @property
    def n_rows(self) -> int:
        """Number of data rows n."""
        return int(self.X.shape[0])

    @property
    def n_features(self) -> int:
        """Number of feature columns d."""
        return int(self.X.shape[1])

    @functools.cached_property
    def fingerprint(self) -> str:
        """SHA-256 hex digest of the canonical encoding (see :func:`fingerprint`)."""
        return fingerprint(self)

    def describe(self) -> dict[str, Any]:
        """Plain data for a run record: fingerprint, names, source, warnings, sizes."""
        return {
            "fingerprint": self.fingerprint,
            "feature_names": list(self.feature_names),
            "label_name": self.label_name,
            "source": self.source,
            "warnings": list(self.warnings),
            "n_rows": self.n_rows,
            "n_features": self.n_features,
        }


# ---------------------------------------------------------------------------- fingerprint


def _label_kind(labels: np.ndarray | None) -> str | None:
    if labels is None:
        return None
    if labels.dtype.kind in "iu":
        return "int64"
    if labels.dtype.kind == "f":
        return "float64"
    return "str"


def fingerprint(dataset: Dataset) -> str:
    """SHA-256 hex digest identifying the values, names and canonical types of ``dataset``.

    Encoding (version :data:`FINGERPRINT_VERSION`), each part preceded by its byte length
    as an 8-byte little-endian integer: a JSON header (sorted keys; version, n_rows,
    n_features, feature_names, label_name, X dtype ``float64``, label kind ``int64`` /
    ``float64`` / ``str`` / null), then X as little-endian float64 in C order (−0.0 written
    as 0.0), then the labels (int64 or float64 little-endian, or each text label as UTF-8
    with its own length prefix).  Because intake canonicalises values and types, the same
    table read from CSV, Parquet, ``.npz`` or arrays gives the same digest.  The source
    file name and the warnings are not part of it.
    """
    h = hashlib.sha256()

    def part(b: bytes) -> None:
        h.update(len(b).to_bytes(8, "little"))
        h.update(b)

    labels = dataset.labels
    kind = _label_kind(labels)
    header = {
        "version": FINGERPRINT_VERSION,
        "n_rows": dataset.n_rows,
        "n_features": dataset.n_features,
        "feature_names": list(dataset.feature_names),
        "label_name": dataset.label_name,
        "x_dtype": "float64",
        "label_kind": kind,
    }
    part(json.dumps(header, sort_keys=True, ensure_ascii=False, separators=(",", ":")).encode())
    part((np.ascontiguousarray(dataset.X, dtype="<f8") + 0.0).tobytes())
    if labels is None:
        part(b"")
    elif kind == "int64":
        part(np.ascontiguousarray(labels, dtype="<i8").tobytes())
    elif kind == "float64":
        part((np.ascontiguousarray(labels, dtype="<f8") + 0.0).tobytes())
    else:
        h.update(len(labels).to_bytes(8, "little"))
        for v in labels.tolist():
            part(str(v).encode("utf-8"))
    return h.hexdigest()


def _build(
    X: np.ndarray, labels: Any, names: Sequence[str], label_name: str | None,
    source: str | None, where: Where, prefix: str, min_classes: int, stacklevel: int = 5,
) -> Dataset:
    """Shared final validation, warnings and construction.

    ``stacklevel`` points warnings at the caller of the public function (5 for
    ``load_table`` → reader → helper → ``_build``; 3 for ``from_arrays``).
    """
    n, d = X.shape
    if n == 0:
        raise InvalidInputError(f"{prefix}no data rows")
    if d == 0:
        raise InvalidInputError(f"{prefix}no feature columns")
    check_finite(X, names, where, prefix)
    lab = None
    if labels is not None:
        lab = canonical_labels(labels, where, prefix, label_name or "")
        classes = list(dict.fromkeys(lab.tolist()))
        if len(classes) < min_classes:
            what = f"label column {label_name!r}" if label_name else "the labels"
            found = ", ".join(map(repr, classes[:MAX_LISTED]))
            raise InvalidInputError(
                f"{prefix}{what} has {len(classes)} distinct value(s) ({found} in all {n} rows); "
                f"at least {min_classes} classes are needed"
            )
    found_warnings = intake_warnings(X, lab, names, where, prefix)
    for w in found_warnings:
        warnings.warn(w, DataWarning, stacklevel=stacklevel)
    return Dataset(
        X=X, labels=lab, feature_names=tuple(names), label_name=label_name,
        source=source, warnings=tuple(found_warnings),
    )


# ---------------------------------------------------------------------------- arrays


def from_arrays(
    X: Any,
    labels: Any = None,
    *,
    feature_names: Sequence[str] | None = None,
    label_name: str | None = None,
    source: str | None = None,
    min_classes: int = 2,
) -> Dataset:
    """Validated :class:`Dataset` from in-memory arrays.

    Parameters
    ----------
    X : (n, d) numbers (or text that reads as numbers); a table object with a
        ``columns`` attribute (e.g. a pandas DataFrame) also gives the feature names.
    labels : (n,) label values, or None for query data.
    feature_names : d unique names; default the table's columns, else ``col1`` … ``cold``.
    label_name : name of the label column (recorded and fingerprinted).
    source : where the arrays came from, for messages and the record.
    min_classes : fewest distinct labels accepted (2 for training; 1 for labelled
        evaluation data).
    """
    prefix = f"{source}: " if source else ""
    arr = np.asarray(X)
    if arr.ndim != 2:
        raise InvalidInputError(f"{prefix}X must be 2-D (rows, features), got shape {arr.shape}")
    n, d = arr.shape
    if feature_names is None and getattr(X, "columns", None) is not None:
        feature_names = [str(c) for c in X.columns]
    names = _default_names(d) if feature_names is None else [str(c) for c in feature_names]
    if len(names) != d:
        raise InvalidInputError(f"{prefix}{len(names)} feature names given for {d} columns of X")
    check_names(names, prefix)
    if label_name is not None and label_name in names:
        raise InvalidInputError(f"{prefix}label name {label_name!r} is also a feature name")
    if arr.dtype.kind in "iufb":
        Xf = arr.astype(np.float64)
    else:
        Xf = np.empty((n, d), dtype=np.float64)
        for j in range(d):
            Xf[:, j] = numeric_column(arr[:, j], names[j], where_index, prefix)
    if labels is not None:
        lab = np.asarray(labels)
        if lab.ndim != 1 or lab.shape[0] != n:
            raise InvalidInputError(
                f"{prefix}labels have shape {lab.shape} but X has {n} rows; "
                "give one label per row"
            )
    return _build(
        Xf, labels, names, label_name, source, where_index, prefix, min_classes, stacklevel=3
    )


def _default_names(d: int) -> list[str]:
    return [f"col{j + 1}" for j in range(d)]


# ---------------------------------------------------------------------------- files


def load_table(
    path: str | Path,
    *,
    label: str | None,
    feature_columns: Sequence[str] | None = None,
    min_classes: int = 2,
) -> Dataset:
    """Load and validate a table from ``.csv``, ``.parquet``/``.pq``, ``.npy`` or ``.npz``.

    Parameters
    ----------
    path : the file; its suffix chooses the reader (see the module notes).
    label : name of the label column, or None for query data without labels.
    feature_columns : names of the feature columns, in the order wanted; default every
        column except the label.
    min_classes : fewest distinct labels accepted (2 for training data).

    Raises
    ------
    InvalidInputError
        Naming the file, and where it applies the row (1-based data row) and column, for a
        missing, unreadable or corrupt file, an unknown suffix, empty data, duplicate or
        missing columns, non-numeric, missing, NaN or infinite feature values, missing
        labels, mismatched lengths and fewer than ``min_classes`` classes.
    """
    p = Path(path)
    prefix = f"{p}: "
    suffix = p.suffix.lower()
    if suffix not in SUPPORTED_SUFFIXES:
        raise InvalidInputError(
            f"{prefix}unsupported file type {p.suffix or '(none)'!r}; "
            f"use one of {', '.join(SUPPORTED_SUFFIXES)}"
        )
    if not p.exists():
        raise InvalidInputError(f"{prefix}file not found")
    if not p.is_file():
        raise InvalidInputError(f"{prefix}not a regular file")
    if label is not None and not isinstance(label, str):
        raise InvalidInputError(f"{prefix}label must be a column name (text) or None")
    reader = {".csv": _read_csv, ".parquet": _read_parquet, ".pq": _read_parquet,
              ".npy": _read_npy, ".npz": _read_npz}[suffix]
    return reader(p, prefix, label, feature_columns, min_classes)


def _read_csv(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int,
) -> Dataset:
    try:
        with open(p, encoding="utf-8-sig", newline="") as fh:
            reader = csv.reader(fh, strict=True)
            header: list[str] | None = None
            rows: list[list[str]] = []
            lines: list[int] = []
            for rec in reader:
                if not rec or (len(rec) == 1 and not rec[0].strip()):
                    continue  # blank line
                if header is None:
                    header = [c.strip() for c in rec]
                    width = len(header)
                    continue
                if len(rec) != width:
                    raise InvalidInputError(
                        f"{prefix}row {len(rows) + 1} (line {reader.line_num}) has {len(rec)} "
                        f"fields but the header has {width}"
                    )
                rows.append(rec)
                lines.append(reader.line_num)
    except UnicodeDecodeError as exc:
        msg = f"{prefix}cannot read the file as UTF-8 text ({exc.reason})"
        raise InvalidInputError(msg) from None
    except csv.Error as exc:
        raise InvalidInputError(f"{prefix}malformed CSV: {exc}") from None
    except OSError as exc:
        raise InvalidInputError(f"{prefix}cannot read the file: {exc.strerror or exc}") from None
    if header is None:
        raise InvalidInputError(
            f"{prefix}the file is empty (a header row of column names is needed)"
        )
    check_names(header, prefix)
    chosen = select_columns(header, label, feature_columns, prefix)
    if not rows:
        raise InvalidInputError(f"{prefix}the file has a header but no data rows")

    def where(i: int) -> str:
        return f"row {i + 1} (line {lines[i]})"

    cells = np.array(rows, dtype=object) if rows else np.empty((0, len(header)), dtype=object)
    col = {c: k for k, c in enumerate(header)}
    X = np.empty((len(rows), len(chosen)), dtype=np.float64)
    for j, c in enumerate(chosen):
        raw = cells[:, col[c]]
        try:  # fast path; the slow path below finds the offending cell
            X[:, j] = raw.astype(str).astype(np.float64)
        except ValueError:
            X[:, j] = numeric_column(raw, c, where, prefix)
    labels = None if label is None else cells[:, col[label]]
    return _build(X, labels, chosen, label, str(p), where, prefix, min_classes, stacklevel=4)


def _read_parquet(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int,
) -> Dataset:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        pf = pq.ParquetFile(p)
        names = [str(c) for c in pf.schema_arrow.names]
        check_names(names, prefix)  # before reading: duplicates make column lookup ambiguous
        table = pf.read(use_threads=False)  # see solver.store.format.read_table
    except (pa.ArrowException, OSError, ValueError) as exc:
        if isinstance(exc, InvalidInputError):
            raise
        raise InvalidInputError(f"{prefix}cannot read as Parquet: {exc}") from None
    chosen = select_columns(names, label, feature_columns, prefix)
    if table.num_rows == 0:
        raise InvalidInputError(f"{prefix}the table has no data rows")
    X = np.empty((table.num_rows, len(chosen)), dtype=np.float64)
    for j, c in enumerate(chosen):
        column = table.column(c)
        t = column.type
        if column.null_count:
            i = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
            raise InvalidInputError(
                f"{prefix}{where_index(i)}, column {c!r}: missing value (null); "
                "fill or remove the row"
            )
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t):
            X[:, j] = column.to_numpy().astype(np.float64)
        elif pa.types.is_decimal(t) or pa.types.is_string(t) or pa.types.is_large_string(t):
            vals = np.array([str(v) for v in column.to_pylist()], dtype=object)
            X[:, j] = numeric_column(vals, c, where_index, prefix)
        else:
            raise InvalidInputError(f"{prefix}column {c!r} has type {t}, not numbers")
    labels = None
    if label is not None:
        labels = np.array(table.column(label).to_pylist(), dtype=object)
    return _build(
        X, labels, chosen, label, str(p), where_index, prefix, min_classes, stacklevel=4
    )


def _numpy_error(exc: Exception, prefix: str) -> InvalidInputError:
    if "pickle" in str(exc).lower():
        return InvalidInputError(
            f"{prefix}the file holds Python objects, which kktrace does not load "
            "(loading them could run code); save plain numeric or text arrays"
        )
    return InvalidInputError(f"{prefix}cannot read as NumPy data: {exc}")


def _load_numpy(p: Path, prefix: str) -> Any:
    # np.load treats anything without the .npy / zip magic bytes as a pickle: check first
    with open(p, "rb") as fh:
        head = fh.read(6)
    if p.suffix.lower() == ".npy" and head != b"\x93NUMPY":
        if head[:4] == b"PK\x03\x04":
            raise InvalidInputError(f"{prefix}the file is a .npz archive; give it the .npz suffix")
        raise InvalidInputError(f"{prefix}cannot read as NumPy data: no .npy header")
    if p.suffix.lower() == ".npz" and head[:4] != b"PK\x03\x04":
        raise InvalidInputError(f"{prefix}cannot read as NumPy data: not a .npz (zip) archive")
    try:
        return np.load(p, allow_pickle=False)
    except ValueError as exc:
        raise _numpy_error(exc, prefix) from None
    except (OSError, EOFError, zipfile.BadZipFile) as exc:
        raise InvalidInputError(f"{prefix}cannot read as NumPy data: {exc}") from None


def _read_npy(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int,
) -> Dataset:
    arr = _load_numpy(p, prefix)
    if not isinstance(arr, np.ndarray):
        raise InvalidInputError(f"{prefix}expected one array")
    if arr.ndim != 2:
        raise InvalidInputError(
            f"{prefix}expected a 2-D array (rows, columns), got shape {arr.shape}"
        )
    names = _default_names(arr.shape[1])
    chosen = select_columns(names, label, feature_columns, prefix)
    if arr.shape[0] == 0:
        raise InvalidInputError(f"{prefix}the array has no data rows")
    idx = [int(c[3:]) - 1 for c in chosen]
    labels = None if label is None else arr[:, int(label[3:]) - 1]
    return _from_file_arrays(arr[:, idx], labels, chosen, label, p, prefix, min_classes)


def _from_file_arrays(
    X: np.ndarray, labels: Any, names: Sequence[str], label: str | None, p: Path,
    prefix: str, min_classes: int,
) -> Dataset:
    if X.dtype.kind in "iufb":
        Xf = X.astype(np.float64)
    else:
        Xf = np.empty(X.shape, dtype=np.float64)
        for j, c in enumerate(names):
            Xf[:, j] = numeric_column(X[:, j], c, where_index, prefix)
    return _build(Xf, labels, names, label, str(p), where_index, prefix, min_classes)


def _text_entry(v: np.ndarray, what: str, prefix: str) -> list[str]:
    if v.dtype.kind not in "US":
        raise InvalidInputError(f"{prefix}array {what!r} must hold text, got dtype {v.dtype}")
    return [x.decode() if isinstance(x, bytes) else str(x) for x in v.reshape(-1).tolist()]


def _read_npz(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int,
) -> Dataset:
    archive = _load_numpy(p, prefix)
    if not isinstance(archive, np.lib.npyio.NpzFile):
        raise InvalidInputError(f"{prefix}expected a .npz archive of arrays")
    try:
        with archive:
            keys = list(archive.files)
            if "X" not in keys:
                raise InvalidInputError(
                    f"{prefix}no array named 'X'; the archive holds {', '.join(keys) or 'nothing'}"
                )
            X = archive["X"]
            names = (_text_entry(archive["feature_names"], "feature_names", prefix)
                     if "feature_names" in keys else None)
            label_keys = [k for k in ("y", "labels") if k in keys]
            if len(label_keys) > 1:
                raise InvalidInputError(f"{prefix}holds both 'y' and 'labels'; keep one")
            label_key = label_keys[0] if label_keys else None
            stored_name = None
            if "label_name" in keys:
                entry = _text_entry(archive["label_name"], "label_name", prefix)
                if len(entry) != 1:
                    raise InvalidInputError(f"{prefix}'label_name' must hold one name")
                stored_name = entry[0]
            labels = None
            if label is not None:
                if label_key is None:
                    raise InvalidInputError(
                        f"{prefix}no label array ('y' or 'labels'); the archive holds "
                        f"{', '.join(keys)}"
                    )
                expected = stored_name or label_key
                if label != expected:
                    raise InvalidInputError(
                        f"{prefix}no label column {label!r}; the archive's labels are named "
                        f"{expected!r}"
                    )
                labels = archive[label_key]
    except (OSError, EOFError, zipfile.BadZipFile, ValueError) as exc:
        if isinstance(exc, InvalidInputError):
            raise
        raise _numpy_error(exc, prefix) from None
    if X.ndim != 2:
        raise InvalidInputError(f"{prefix}array 'X' must be 2-D (rows, features), got {X.shape}")
    all_names = _default_names(X.shape[1]) if names is None else names
    if len(all_names) != X.shape[1]:
        raise InvalidInputError(
            f"{prefix}'feature_names' has {len(all_names)} names but 'X' has {X.shape[1]} columns"
        )
    check_names(all_names, prefix)
    if label is not None and label in all_names:
        raise InvalidInputError(f"{prefix}label name {label!r} is also a feature name")
    chosen = select_columns(all_names, None, feature_columns, prefix)
    if labels is not None and (labels.ndim != 1 or labels.shape[0] != X.shape[0]):
        raise InvalidInputError(
            f"{prefix}label array {label_key!r} has shape {labels.shape} but 'X' has "
            f"{X.shape[0]} rows; give one label per row"
        )
    if X.shape[0] == 0:
        raise InvalidInputError(f"{prefix}array 'X' has no data rows")
    idx = [all_names.index(c) for c in chosen]
    return _from_file_arrays(X[:, idx], labels, chosen, label, p, prefix, min_classes)
