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

import contextvars
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
    check_spread,
    column_reads_fast,
    intake_warnings,
    numeric_block,
    numeric_column,
    select_columns,
    where_index,
)
from .errors import DataWarning, InvalidInputError

__all__ = [
    "Dataset",
    "load_table",
    "column_names",
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
        framed: dict[Any, bytes] = {}  # each distinct label's length prefix and UTF-8 once
        chunks = []
        for v in labels.tolist():
            b = framed.get(v)
            if b is None:
                e = str(v).encode("utf-8")
                b = framed[v] = len(e).to_bytes(8, "little") + e
            chunks.append(b)
        h.update(b"".join(chunks))  # the same bytes as one part per label
    return h.hexdigest()


def _build(
    X: np.ndarray, labels: Any, names: Sequence[str], label_name: str | None,
    source: str | None, where: Where, prefix: str, min_classes: int, stacklevel: int = 5,
    notes: Sequence[str] = (),
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
    if _WARN.get():  # data to train on (data a model is applied to are standardised by it)
        check_spread(X, names, where, prefix)
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
    found_warnings = [*notes, *(intake_warnings(X, lab, names, where, prefix)
                                if _WARN.get() else [])]
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
    ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
    warn: bool = True,
) -> Dataset:
    """Load and validate a table from ``.csv``, ``.parquet``/``.pq``, ``.npy`` or ``.npz``.

    Parameters
    ----------
    path : the file; its suffix chooses the reader (see the module notes).
    label : name of the label column, or None for query data without labels.
    feature_columns : names of the feature columns, in the order wanted; default every
        column except the label.
    min_classes : fewest distinct labels accepted (2 for training data).
    ignore_columns : columns left out of the features (e.g. an ID column); each must exist.
    delimiter : CSV field delimiter; default detected (see :func:`_sniff_delimiter`).
    warn : data to train on: look for the intake warnings (conflicting duplicates,
        constant or unscaled features) and refuse a column whose spread overflows; False
        for data a trained model is applied to.

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
    _check_delimiter(delimiter, prefix)
    if delimiter is not None and suffix != ".csv":
        raise InvalidInputError(f"{prefix}a delimiter applies to CSV files only")
    token = _WARN.set(bool(warn))
    try:
        if suffix == ".csv":
            return _read_csv(p, prefix, label, feature_columns, min_classes, ignore_columns,
                             delimiter)
        reader = {".parquet": _read_parquet, ".pq": _read_parquet,
                  ".npy": _read_npy, ".npz": _read_npz}[suffix]
        return reader(p, prefix, label, feature_columns, min_classes, ignore_columns)
    finally:
        _WARN.reset(token)


def column_names(path: str | Path, *, delimiter: str | None = None) -> list[str]:
    """The column names of a data file (for ``.npz`` / ``.npy`` the feature names and the
    label array's name), read without parsing the values of a CSV or Parquet file."""
    p = Path(path)
    prefix = f"{p}: "
    suffix = p.suffix.lower()
    _check_delimiter(delimiter, prefix)
    try:
        if suffix == ".csv":
            delim = delimiter if delimiter is not None else _sniff_delimiter(p)
            with open(p, encoding="utf-8-sig", newline="") as fh:
                for rec in csv.reader(fh, delimiter=delim, strict=True):
                    if rec and not (len(rec) == 1 and not rec[0].strip()):
                        names = [c.strip() for c in rec]
                        hint = _looks_like(names, delim)
                        if hint:
                            raise InvalidInputError(
                                f"{prefix}the header has one column {names[0]!r}{hint}")
                        return names[:-1] if len(names) > 1 and not names[-1] else names
            return []
        if suffix in (".parquet", ".pq"):
            import pyarrow.parquet as pq

            return [str(c) for c in pq.read_schema(p).names]
    except (OSError, UnicodeDecodeError, csv.Error, ValueError) as exc:
        if isinstance(exc, InvalidInputError):
            raise
        raise InvalidInputError(f"{prefix}cannot read the column names: {exc}") from None
    if suffix == ".npy":
        arr = _load_numpy(p, prefix)
        return _default_names(arr.shape[1]) if arr.ndim == 2 else []
    if suffix == ".npz":
        archive = _load_numpy(p, prefix, members=("X", "feature_names", "label_name"))
        keys = archive["__files__"]
        if "feature_names" in keys:
            names = _text_entry(archive["feature_names"], "feature_names", prefix)
        elif "X" in keys and archive["X"].ndim == 2:
            names = _default_names(archive["X"].shape[1])
        else:
            names = []
        if "label_name" in keys:
            names += _text_entry(archive["label_name"], "label_name", prefix)[:1]
        else:
            names += [k for k in ("y", "labels") if k in keys]
        return names
    return []


_WARN: contextvars.ContextVar[bool] = contextvars.ContextVar("kktrace_intake_warn",
                                                             default=True)


#: Delimiters the CSV reader detects, with their names in messages.
DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab", "|": "vertical bar"}
#: Records of the file's start used to detect the delimiter.
SNIFF_RECORDS = 20
_SNIFF_CHARS = 1 << 16


def _sniff_delimiter(p: Path) -> str:
    """The delimiter of a CSV file: the first of ``DELIMITERS`` under which the header has
    more than one field and the next records (up to :data:`SNIFF_RECORDS`) have as many;
    a comma when none qualifies (the errors then say what the file looks like)."""
    import io

    with open(p, encoding="utf-8-sig", newline="") as fh:
        sample = fh.read(_SNIFF_CHARS)
        truncated = bool(fh.read(1))
    if truncated:  # the last line may be cut: leave it out
        sample = sample[: max(sample.rfind("\n"), 0)]
    for delim in DELIMITERS:
        try:
            recs = [r for r in csv.reader(io.StringIO(sample), delimiter=delim, strict=True)
                    if r and not (len(r) == 1 and not r[0].strip())][: SNIFF_RECORDS + 1]
        except csv.Error:
            continue
        if recs and len(recs[0]) > 1 and all(len(r) == len(recs[0]) for r in recs):
            return delim
    return ","


def _looks_like(header: Sequence[str], delimiter: str) -> str:
    """Hint for a header read as one field although it holds another delimiter."""
    if len(header) != 1:
        return ""
    for d, name in DELIMITERS.items():
        if d != delimiter and d in header[0]:
            return f"; this looks {name}-separated: use --delimiter {d!r}"
    return ""


def _check_delimiter(delimiter: str | None, prefix: str) -> None:
    if delimiter is not None and (not isinstance(delimiter, str) or len(delimiter) != 1
                                  or delimiter in "\"\r\n" or delimiter.isalnum()):
        raise InvalidInputError(
            f"{prefix}delimiter must be one character such as ',' ';' or a tab, "
            f"got {delimiter!r}")


def _read_csv(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int, ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
) -> Dataset:
    try:
        delim = delimiter if delimiter is not None else _sniff_delimiter(p)
        fast = _read_plain(p, prefix, label, feature_columns, min_classes, ignore_columns,
                           delim)
        if fast is not None:
            return fast
        with open(p, encoding="utf-8-sig", newline="") as fh:
            reader = csv.reader(fh, delimiter=delim, strict=True)
            header: list[str] | None = None
            rows: list[list[str]] = []
            lines: list[int] = []
            for rec in reader:
                if not rec or (len(rec) == 1 and not rec[0].strip()):
                    continue  # blank line
                if header is None:
                    header = [c.strip() for c in rec]
                    width = len(header)
                    hint = _looks_like(header, delim)
                    if hint:
                        raise InvalidInputError(
                            f"{prefix}the header has one column {header[0]!r}{hint}")
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
    notes: list[str] = []
    if len(header) > 1 and not header[-1] and all(not r[-1].strip() for r in rows):
        # a spreadsheet export's trailing delimiter: an unnamed column empty in every row
        header = header[:-1]
        rows = [r[:-1] for r in rows]
        notes.append(f"{prefix}the last column has no name and is empty in every row "
                     "(a trailing delimiter); it was left out")
    check_names(header, prefix)
    chosen = select_columns(header, label, feature_columns, prefix, ignore_columns)
    if not rows:
        raise InvalidInputError(f"{prefix}the file has a header but no data rows")

    def where(i: int) -> str:
        return f"row {i + 1} (line {lines[i]})"

    col = {c: k for k, c in enumerate(header)}
    X = np.empty((len(rows), len(chosen)), dtype=np.float64)
    slow: list[int] = []
    for j, c in enumerate(chosen):
        raw = [r[col[c]] for r in rows]
        if column_reads_fast(raw):
            X[:, j] = np.fromiter(map(float, raw), dtype=np.float64, count=len(raw))
            if np.all(np.isfinite(X[:, j])):
                continue  # else a numeral beyond the float64 range: diagnosed below
        slow.append(j)
    if slow:  # the first bad cell in file order, and how many there are
        cells = np.array([[r[col[chosen[j]]] for j in slow] for r in rows], dtype=object)
        X[:, slow] = numeric_block(cells, [chosen[j] for j in slow], where, prefix,
                                   order=[col[chosen[j]] for j in slow])
    labels = None if label is None else np.array([r[col[label]] for r in rows], dtype=object)
    return _build(X, labels, chosen, label, str(p), where, prefix, min_classes, stacklevel=4,
                  notes=notes)


def _read_plain(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int, ignore_columns: Sequence[str] | None, delim: str,
) -> Dataset | None:
    """The dataset of a plain CSV file of at least :data:`~solver._csv_fast.FAST_MIN_BYTES`
    read by pyarrow (:mod:`solver._csv_fast`), or None: the csv-module path then reads it
    (and reports any problem)."""
    from ._csv_fast import FAST_MIN_BYTES, read_plain_csv

    if p.stat().st_size < FAST_MIN_BYTES:
        return None

    def choose(header: list[str]) -> Sequence[str]:
        check_names(header, prefix)
        return select_columns(header, label, feature_columns, prefix, ignore_columns)

    got = read_plain_csv(p, delim, choose, label)
    if got is None:
        return None
    chosen, X, labels, header_line = got

    def where(i: int) -> str:
        return f"row {i + 1} (line {header_line + 1 + i})"

    return _build(X, labels, list(chosen), label, str(p), where, prefix, min_classes,
                  stacklevel=5)


#: A compressed file (``.npz`` archive, Parquet file) may inflate to at most this many
#: bytes in all, or to :data:`INFLATE_RATIO` times its size on disk if that is more.
INFLATE_FLOOR = 256 * 2**20
INFLATE_RATIO = 50


def _inflate_limit(p: Path) -> int:
    return max(INFLATE_FLOOR, INFLATE_RATIO * p.stat().st_size)


def _inflate_refusal(prefix: str, size: int, p: Path, what: str) -> InvalidInputError:
    return InvalidInputError(
        f"{prefix}{what} would inflate to {size:,} bytes, more than kktrace's limit of "
        f"{_inflate_limit(p):,} bytes (the larger of {INFLATE_FLOOR // 2**20} MiB and "
        f"{INFLATE_RATIO} times the file's size); store the data uncompressed")


def _read_parquet(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int, ignore_columns: Sequence[str] | None = None,
) -> Dataset:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        # page checksums are verified where the writer stored them (a flipped byte is caught)
        pf = pq.ParquetFile(p, page_checksum_verification=True)
        names = [str(c) for c in pf.schema_arrow.names]
        check_names(names, prefix)  # before reading: duplicates make column lookup ambiguous
        chosen = select_columns(names, label, feature_columns, prefix, ignore_columns)
        wanted = [*chosen, *([label] if label is not None else [])]
        meta = pf.metadata
        index = {meta.schema.column(k).path: k for k in range(meta.num_columns)}
        inflated = sum(meta.row_group(g).column(index[c]).total_uncompressed_size
                       for g in range(meta.num_row_groups) for c in wanted if c in index)
        if inflated > _inflate_limit(p):
            raise _inflate_refusal(prefix, inflated, p, "the columns read")
        table = pf.read(columns=wanted, use_threads=False)  # see store.format.read_table
    except (pa.ArrowException, OSError, ValueError) as exc:
        if isinstance(exc, InvalidInputError):
            raise
        raise InvalidInputError(f"{prefix}cannot read as Parquet: {exc}") from None
    if table.num_rows == 0:
        raise InvalidInputError(f"{prefix}the table has no data rows")
    nulls = [(int(np.flatnonzero(table.column(c).is_null().to_numpy(zero_copy_only=False))[0]),
              names.index(c), c, table.column(c).null_count)
             for c in chosen if table.column(c).null_count]
    if nulls:
        i, _pos, c, _k = min(nulls)
        raise InvalidInputError(
            f"{prefix}{where_index(i)}, column {c!r}: missing value (null), the first of "
            f"{sum(k for *_, k in nulls)} missing feature value(s) in file order; "
            "fill or remove the rows"
        )
    X = np.empty((table.num_rows, len(chosen)), dtype=np.float64)
    for j, c in enumerate(chosen):
        column = table.column(c)
        t = column.type
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


#: dtype kinds read from .npy / .npz files (numbers, booleans and text; never objects).
_NPY_KINDS = "biufUS"


def _read_npy_stream(fh: Any, size: int, prefix: str, what: str) -> np.ndarray:
    """One array in ``.npy`` format from ``fh`` holding ``size`` bytes in all.

    The header is checked against ``size`` before anything is allocated, so a header
    declaring a huge shape costs nothing; object arrays (pickles) are refused.
    """
    try:
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
        elif version in ((2, 0), (3, 0)):
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
        else:
            raise ValueError(f"unsupported .npy format version {version}")
        offset = fh.tell()
    except (ValueError, SyntaxError, TypeError, EOFError, OSError) as exc:
        raise InvalidInputError(f"{prefix}{what or 'the file'} is not in .npy format "
                                f"({exc})") from None
    if dtype.hasobject or dtype.kind not in _NPY_KINDS:
        raise _numpy_error(ValueError("pickle" if dtype.hasobject else
                                      f"dtype {dtype} is not numbers or text"), prefix)
    count = 1
    for k in shape:
        count *= int(k)
    need = count * dtype.itemsize
    if need != size - offset:
        raise InvalidInputError(
            f"{prefix}{what + ': its' if what else 'its'} .npy header declares shape "
            f"{tuple(shape)} of {dtype} "
            f"({need:,} bytes) but {max(size - offset, 0):,} data bytes follow; the file is "
            "truncated or corrupt")
    raw = fh.read(need)
    if len(raw) != need:
        raise InvalidInputError(f"{prefix}{what or 'the array'} is truncated ({len(raw):,} of "
                                f"{need:,} bytes)")
    arr = np.frombuffer(raw, dtype=dtype).reshape(shape, order="F" if fortran else "C")
    return np.array(arr, order="C")


def _load_numpy(p: Path, prefix: str, members: Sequence[str] | None = None) -> Any:
    """A ``.npy`` file's array, or the wanted members of a ``.npz`` archive as a dict.

    No pickle is ever loaded; ``.npz`` members are inflated only after their declared
    sizes pass the limit (:data:`INFLATE_FLOOR`, :data:`INFLATE_RATIO`).
    """
    with open(p, "rb") as fh:
        head = fh.read(6)
    if p.suffix.lower() == ".npy":
        if head != b"\x93NUMPY":
            if head[:4] == b"PK\x03\x04":
                raise InvalidInputError(
                    f"{prefix}the file is a .npz archive; give it the .npz suffix")
            raise InvalidInputError(f"{prefix}cannot read as NumPy data: no .npy header")
        with open(p, "rb") as fh:
            return _read_npy_stream(fh, p.stat().st_size, prefix, "")
    if head[:4] != b"PK\x03\x04":
        raise InvalidInputError(f"{prefix}cannot read as NumPy data: not a .npz (zip) archive")
    try:
        with zipfile.ZipFile(p) as zf:
            infos = {i.filename[:-4]: i for i in zf.infolist() if i.filename.endswith(".npy")}
            odd = [i.filename for i in zf.infolist() if not i.filename.endswith(".npy")]
            if odd:
                raise InvalidInputError(
                    f"{prefix}member {odd[0]!r} is not a .npy array; a .npz archive holds "
                    ".npy arrays only")
            keys = list(infos) if members is None else [k for k in members if k in infos]
            total = sum(infos[k].file_size for k in keys)
            if total > _inflate_limit(p):
                raise _inflate_refusal(prefix, total, p, "the archive's arrays")
            out = {"__files__": list(infos)}
            for k in keys:
                with zf.open(infos[k]) as fh:
                    out[k] = _read_npy_stream(fh, infos[k].file_size, prefix,
                                              f"member {k!r}")
            return out
    except (OSError, EOFError, zipfile.BadZipFile, zipfile.LargeZipFile, ValueError,
            NotImplementedError) as exc:
        if isinstance(exc, InvalidInputError):
            raise
        raise InvalidInputError(f"{prefix}cannot read as NumPy data: {exc}") from None


def _read_npy(
    p: Path, prefix: str, label: str | None, feature_columns: Sequence[str] | None,
    min_classes: int, ignore_columns: Sequence[str] | None = None,
) -> Dataset:
    arr = _load_numpy(p, prefix)
    if arr.ndim != 2:
        raise InvalidInputError(
            f"{prefix}expected a 2-D array (rows, columns), got shape {arr.shape}"
        )
    names = _default_names(arr.shape[1])
    chosen = select_columns(names, label, feature_columns, prefix, ignore_columns)
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
    min_classes: int, ignore_columns: Sequence[str] | None = None,
) -> Dataset:
    archive = _load_numpy(p, prefix, members=("X", "feature_names", "label_name", "y",
                                               "labels"))
    keys = archive["__files__"]
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
    chosen = select_columns(all_names, None, feature_columns, prefix, ignore_columns)
    if labels is not None and (labels.ndim != 1 or labels.shape[0] != X.shape[0]):
        raise InvalidInputError(
            f"{prefix}label array {label_key!r} has shape {labels.shape} but 'X' has "
            f"{X.shape[0]} rows; give one label per row"
        )
    if X.shape[0] == 0:
        raise InvalidInputError(f"{prefix}array 'X' has no data rows")
    idx = [all_names.index(c) for c in chosen]
    return _from_file_arrays(X[:, idx], labels, chosen, label, p, prefix, min_classes)
