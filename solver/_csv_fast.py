"""Plain CSV files read by pyarrow's CSV reader: the fast path of :func:`solver.data.load_table`.

A file takes this path only when it is *plain*: valid UTF-8 (an optional byte-order mark),
no quote character anywhere, lines ended by ``\\n`` or ``\\r\\n``, no blank line after the
header, a header whose names pass the same checks as on the csv-module path, and every
chosen feature cell a number that pyarrow parses to a finite float64.  Anything else —
a ragged row, an empty or non-numeric cell, NaN or infinity, a trailing delimiter — returns
None, and the caller reads the file with the csv module, which names the row, line and
column of the problem.  So the fast path never decides an error, only skips work.

The values are the same bits as Python's ``float`` of each cell: pyarrow's text-to-double
conversion rounds correctly to nearest, as ``float`` does (``tests/test_pipeline_costs.py``
compares both on random numerals and on hand-picked edge cases).  Arrays are taken from
the Arrow buffers directly: ``Array.to_numpy`` imports pandas where it is installed
(~0.2 s).  One thread (``use_threads=False``): a study's workers each have one core.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

__all__ = ["FAST_MIN_BYTES", "read_plain_csv"]

#: files smaller than this are read by the csv module: importing pyarrow (~0.1 s) would
#: cost more than it saves (the csv-module path reads ~30 MB/s here)
FAST_MIN_BYTES = 1 << 18
_BOM = b"\xef\xbb\xbf"


def _header(data: bytes) -> tuple[bytes, int, int] | None:
    """(header line without its end, its 1-based line number, offset of the next line),
    blank lines before it skipped as the csv-module path skips them; None without one."""
    pos, line_no = 0, 0
    while pos < len(data):
        nl = data.find(b"\n", pos)
        end = len(data) if nl < 0 else nl
        line = data[pos:end].removesuffix(b"\r")
        line_no += 1
        pos = end + 1
        if line.strip():
            return line, line_no, pos
    return None


def read_plain_csv(
    path: Path, delimiter: str, choose: Callable[[list[str]], Sequence[str]],
    label: str | None,
) -> tuple[list[str], np.ndarray, np.ndarray | None, int] | None:
    """Read a plain CSV file (see the module docstring) or return None.

    ``choose(names)`` gives the feature columns for the header's stripped names (it may
    raise :class:`~solver.errors.InvalidInputError`, which sends the file to the
    csv-module path to report it).  Returns (feature names, X (n, d) float64, the label
    column's raw text (n,) object or None, the header's line number); data row i is on
    line ``header_line + 1 + i``."""
    from .errors import InvalidInputError

    data = path.read_bytes()
    if not data.isascii():
        try:
            data.decode("utf-8")  # the csv-module path refuses a file that is not UTF-8
        except UnicodeDecodeError:
            return None
    if data.startswith(_BOM):
        data = data[len(_BOM):]
    if b'"' in data or data.count(b"\r") != data.count(b"\r\n"):
        return None
    found = _header(data)
    if found is None:
        return None
    raw, header_line, start = found
    if (not data[start:start + 1] or data.startswith((b"\n", b"\r\n"), start)
            or data.find(b"\n\n", start) >= 0 or data.find(b"\n\r\n", start) >= 0):
        return None  # no data line, or a blank line among them
    names = [c.strip() for c in raw.decode("utf-8").split(delimiter)]
    if len(names) < 2 or not names[-1]:
        return None  # one column (a hint may be due) or a trailing delimiter
    try:
        chosen = list(choose(names))
    except InvalidInputError:
        return None
    import pyarrow as pa
    import pyarrow.csv as pc

    wanted = [*chosen, *([label] if label is not None else [])]
    types = {c: pa.float64() for c in chosen}
    if label is not None:
        types[label] = pa.string()
    try:
        table = pc.read_csv(
            pa.BufferReader(pa.py_buffer(data).slice(start)),  # no copy of the file's bytes
            read_options=pc.ReadOptions(column_names=names, use_threads=False),
            parse_options=pc.ParseOptions(delimiter=delimiter, quote_char=False,
                                          double_quote=False, escape_char=False,
                                          newlines_in_values=False, ignore_empty_lines=False),
            convert_options=pc.ConvertOptions(column_types=types, include_columns=wanted,
                                              null_values=[], strings_can_be_null=False,
                                              quoted_strings_can_be_null=False,
                                              check_utf8=True))
    except (pa.ArrowException, ValueError):
        return None
    n = table.num_rows
    X = np.empty((n, len(chosen)), dtype=np.float64)
    for j, c in enumerate(chosen):
        col = table.column(c)
        if col.null_count:
            return None
        at = 0
        for chunk in col.chunks:
            k = len(chunk)
            X[at:at + k, j] = np.frombuffer(chunk.buffers()[1], dtype=np.float64, count=k,
                                            offset=8 * chunk.offset)
            at += k
    if not np.isfinite(X).all():
        return None
    labels = None
    if label is not None:
        labels = np.empty(n, dtype=object)
        labels[:] = table.column(label).to_pylist()
    return chosen, X, labels, header_line
