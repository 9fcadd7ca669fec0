"""Parsing, validation and warning helpers behind :mod:`solver.data` (internal).

Row descriptions ("where" functions) map a 0-based row index to the text used in
messages; see the row-number convention in :mod:`solver.data`.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .errors import InvalidInputError

#: Warn when the largest / smallest feature standard deviation exceeds this ratio.
SCALE_RATIO_WARN = 1e3
#: The words that start the feature-scale warning, and its advice (training words the
#: advice for the run's settings: :func:`solver.training._for_settings`).
SCALE_WARNING = "feature scales differ by a factor of"
SCALE_ADVICE = ("; standardising them (kktrace's default when training) removes this; "
                "unscaled features slow SMO and let the widest column dominate the kernel")
#: At most this many examples are named in one message.
MAX_LISTED = 5

Where = Callable[[int], str]


def where_index(i: int) -> str:
    """Row description for array-like sources: 1-based row and 0-based index."""
    return f"row {i + 1} (index {i})"


#: The numeral rule (README "Numbers in data files"): ASCII decimal numbers only — an
#: optional sign, digits with an optional decimal point, an optional exponent.
NUMERAL = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
#: Spellings of NaN / infinity that are read (and then refused as feature values).
NONFINITE = re.compile(r"[+-]?(?:nan|inf|infinity)", re.IGNORECASE)
_DECIMAL_COMMA = re.compile(r"[+-]?[0-9]*,[0-9]+(?:[eE][+-]?[0-9]+)?")
_HEX = re.compile(r"[+-]?0[xX][0-9a-fA-F_]+")
_MISSING_MARKERS = frozenset({"na", "n/a", "n.a.", "null", "none", "missing", "#n/a", "?",
                              "-", "--", "."})


def parse_number(text: str) -> float | None:
    """float value of a numeric text cell under the numeral rule, None when it is not one.

    NaN / infinity spellings give NaN / ±inf; a numeral beyond the float64 range (e.g.
    ``1e400``) gives None (see :func:`numeral_problem`)."""
    if not isinstance(text, str):
        return None
    s = text.strip()
    if NUMERAL.fullmatch(s):
        x = float(s)
        return x if math.isfinite(x) else None
    if NONFINITE.fullmatch(s):
        return float(s)
    return None


def numeral_problem(text: str) -> str:
    """Why ``text`` is not read as a number (the words of the one-line error)."""
    s = text.strip()
    if not s:
        return "empty cell (missing values are not allowed; fill or remove the row)"
    if NUMERAL.fullmatch(s):
        return (f"{s!r} is beyond the range of 64-bit floating-point numbers "
                "(largest magnitude about 1.8e308)")
    if _DECIMAL_COMMA.fullmatch(s):
        return (f"{s!r} has a decimal comma (or a thousands separator); kktrace reads "
                f"decimal points only and no digit grouping (write {s.replace(',', '.')!r} "
                "or the plain digits, e.g. export the file with '.' as the decimal separator)")
    if _HEX.fullmatch(s):
        return f"{s!r} is a hexadecimal numeral; kktrace reads decimal numbers only"
    if "_" in s and NUMERAL.fullmatch(s.replace("_", "")):
        return (f"{s!r} has digit-group separators ('_'); write the digits without them")
    if any(ch.isdigit() and not ("0" <= ch <= "9") for ch in s):
        return (f"{s!r} has non-ASCII digits; kktrace reads ASCII decimal numbers only "
                "(0-9)")
    if s.lower() in _MISSING_MARKERS:
        return (f"{s!r} looks like a missing-value marker (missing values are not allowed; "
                "fill or remove the row)")
    return f"{s!r} is not a number"


#: Hint added to "not a number" errors: how to leave a column out.
LEAVE_OUT = ("if this column is not a feature, leave it out with --ignore COLUMN "
             "(Python: ignore_columns=)")


def _cell_value(v: Any) -> tuple[float | None, str | None]:
    """(value, None) for a readable cell, else (None, the text to diagnose)."""
    if v is None:
        return None, ""
    if isinstance(v, bytes):
        v = v.decode("utf-8", "replace")
    if isinstance(v, (bool, np.bool_, int, float, np.integer, np.floating)):
        return float(v), None
    if isinstance(v, str):
        x = parse_number(v)
        return (x, None) if x is not None else (None, v)
    return None, str(v)


def numeric_block(
    cells: Any, names: Sequence[str], where: Where, prefix: str,
    order: Sequence[int] | None = None,
) -> np.ndarray:
    """Feature cells (n, k) as float64; the error names the first bad cell in file order.

    ``order`` gives each column's position in the file (default: as given), so "first"
    means the smallest (row, file column).  The message also counts the bad cells.
    """
    arr = np.asarray(cells, dtype=object)
    n, k = arr.shape
    out = np.empty((n, k), dtype=np.float64)
    bad: list[tuple[int, int, int, str]] = []
    for j in range(k):
        pos = j if order is None else int(order[j])
        for i, v in enumerate(arr[:, j].tolist()):
            x, text = _cell_value(v)
            if text is None:
                out[i, j] = x
            else:
                bad.append((i, pos, j, text))
    if bad:
        i, _pos, j, text = min(bad)
        empty = sum(1 for b in bad if not b[3].strip())
        other = len(bad) - empty
        counts = ", ".join(p for p in (f"{empty} empty" if empty else "",
                                       f"{other} not readable as numbers" if other else "") if p)
        hint = "" if not text.strip() else f"; {LEAVE_OUT}"
        raise InvalidInputError(
            f"{prefix}{where(i)}, column {names[j]!r}: {numeral_problem(text)} (first of "
            f"{len(bad)} unreadable feature cell(s) in file order: {counts}){hint}"
        )
    return out


def numeric_column(values: Any, column: str, where: Where, prefix: str) -> np.ndarray:
    """One feature column as float64 (n,); errors name the row and column."""
    arr = np.asarray(values)
    if arr.dtype.kind in "iufb":
        return arr.astype(np.float64)
    if arr.dtype.kind == "c":
        raise InvalidInputError(f"{prefix}column {column!r} holds complex numbers, not real ones")
    if arr.dtype.kind not in "USO":
        raise InvalidInputError(
            f"{prefix}column {column!r} has type {arr.dtype}, not numbers"
        )
    return numeric_block(arr.reshape(-1, 1), [column], where, prefix)[:, 0]


#: a column of plain numerals (spaces or tabs around them), one per line
_NUMERAL_LINES = re.compile(r"(?:[ \t]*" + NUMERAL.pattern + r"[ \t]*\n)*[ \t]*"
                            + NUMERAL.pattern + r"[ \t]*")


def column_reads_fast(cells: Sequence[str]) -> bool:
    """True when every text cell is a plain ASCII numeral (no diagnosis needed).

    One match over the column's cells joined by newlines first (cells that hold a newline
    themselves fail its count); when that fails, each cell stripped of any whitespace."""
    if cells:
        joined = "\n".join(cells)
        if joined.count("\n") == len(cells) - 1 and _NUMERAL_LINES.fullmatch(joined):
            return True
    match = NUMERAL.fullmatch
    return all(match(c.strip()) for c in cells)


def check_finite(X: np.ndarray, names: Sequence[str], where: Where, prefix: str) -> None:
    bad = ~np.isfinite(X)
    if np.any(bad):
        r, c = (int(v) for v in np.argwhere(bad)[0])
        what = "NaN" if np.isnan(X[r, c]) else "an infinite value"
        raise InvalidInputError(
            f"{prefix}{where(r)}, column {names[c]!r}: {what} ({int(bad.sum())} non-finite "
            "value(s) in all); every feature value must be a finite number"
        )


def check_spread(X: np.ndarray, names: Sequence[str], where: Where, prefix: str) -> None:
    """Refuse a column whose mean or standard deviation overflows float64 (naming it).

    Standardising such a column would divide by infinity and make it 0 in every row."""
    with np.errstate(over="ignore", invalid="ignore"):
        ok = np.isfinite(X.mean(axis=0)) & np.isfinite(X.std(axis=0))
    if not np.all(ok):
        j = int(np.flatnonzero(~ok)[0])
        i = int(np.argmax(np.abs(X[:, j])))
        raise InvalidInputError(
            f"{prefix}column {names[j]!r}: values up to {X[i, j]:.3g} ({where(i)}) are so large "
            "that the column's mean or standard deviation overflows 64-bit floating point; "
            "rescale the column (e.g. to other units) before training"
        )


def is_missing(v: Any) -> bool:
    if v is None:
        return True
    if isinstance(v, str):
        s = v.strip()
        return not s or (parse_number(s) is not None and math.isnan(float(s)))
    if isinstance(v, (float, np.floating)):
        return math.isnan(float(v))
    return False


def canonical_labels(values: Any, where: Where, prefix: str, label_name: str) -> np.ndarray:
    """Canonical label array (int64, float64 or str); see the module notes."""
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise InvalidInputError(f"{prefix}labels must be 1-D, got shape {arr.shape}")
    what = f"label column {label_name!r}" if label_name else "labels"
    if arr.dtype.kind == "b":
        return np.where(arr, "True", "False").astype(str)
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64)
    items = arr.tolist()
    by_value = _canonical_by_value(items, prefix, label_name)
    if by_value is not None:
        return by_value
    missing = [i for i, v in enumerate(items) if is_missing(v)]
    if missing:
        i = missing[0]
        raise InvalidInputError(
            f"{prefix}{where(i)}, {what}: label is missing ({items[i]!r}; the first of "
            f"{len(missing)} row(s) without a label); every row needs a label"
        )
    numbers: list[float | int] = []
    for v in items:
        if isinstance(v, bytes):
            v = v.decode("utf-8", "replace")
        if isinstance(v, (bool, np.bool_)):
            break
        if isinstance(v, (int, np.integer)):
            numbers.append(int(v))
        elif isinstance(v, (float, np.floating)):
            numbers.append(float(v))
        elif isinstance(v, str):
            s = v.strip()
            if not (NUMERAL.fullmatch(s) or NONFINITE.fullmatch(s)):
                break  # text labels (the numeral rule also applies to labels)
            try:
                numbers.append(int(s))  # exact for long integers
            except ValueError:
                x = parse_number(s)
                if x is None:
                    break
                numbers.append(x)
        else:
            break
    if len(numbers) == len(items):
        for i, x in enumerate(numbers):
            if not math.isfinite(x):
                raise InvalidInputError(
                    f"{prefix}{where(i)}, {what}: label {items[i]!r} is not a finite value"
                )
        if all(float(x).is_integer() for x in numbers):
            try:
                return np.array([int(x) for x in numbers], dtype=np.int64)
            except OverflowError:
                pass
        return np.array([float(x) for x in numbers], dtype=np.float64)
    text = []
    for v in items:
        if isinstance(v, bytes):
            v = v.decode("utf-8", "replace")
        text.append(str(bool(v)) if isinstance(v, (bool, np.bool_)) else str(v).strip())
    return np.array(text, dtype=str)


#: text label columns at least this long are canonicalised once per distinct value
BY_VALUE_MIN_ROWS = 1024


def _canonical_by_value(items: list[Any], prefix: str, label_name: str) -> np.ndarray | None:
    """:func:`canonical_labels` of a long column of text labels with few distinct values
    (at most a quarter of the rows), computed once per distinct value and spread back;
    None when that does not apply or the distinct values raise a problem (the row by row
    path then names the first row that has it).  The rules act on each value alone and
    decide the array's type from the set of values, so the result is the same."""
    n = len(items)
    if n < BY_VALUE_MIN_ROWS or not all(type(v) is str for v in items):
        return None
    codes: dict[str, int] = {}
    index = np.fromiter((codes.setdefault(v, len(codes)) for v in items), dtype=np.int64,
                        count=n)
    if 4 * len(codes) > n:
        return None
    try:
        canon = canonical_labels(np.array(list(codes), dtype=object), where_index, prefix,
                                 label_name)
    except InvalidInputError:
        return None
    return canon[index]


# ---------------------------------------------------------------------------- checks


def check_names(
    names: Sequence[str], prefix: str, what: str = "column", whats: str = "columns"
) -> None:
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        if not str(name).strip():
            raise InvalidInputError(f"{prefix}{what} {k + 1} has an empty name")
        if name in seen:
            raise InvalidInputError(
                f"{prefix}{whats} {seen[name] + 1} and {k + 1} are both named {name!r}; "
                "column names must be unique"
            )
        seen[name] = k


def select_columns(
    available: Sequence[str], label: str | None, feature_columns: Sequence[str] | None,
    prefix: str, ignore_columns: Sequence[str] | None = None,
) -> list[str]:
    """Feature column names: ``feature_columns`` (default all but the label) less
    ``ignore_columns``; every name given must be a column of the file."""
    chosen = _chosen_columns(available, label, feature_columns, prefix)
    if ignore_columns:
        if isinstance(ignore_columns, str):
            raise InvalidInputError(
                f"{prefix}ignore_columns must be a sequence of column names, not one string")
        ignore = [str(c) for c in ignore_columns]
        missing = [c for c in ignore if c not in available]
        if missing:
            raise InvalidInputError(
                f"{prefix}cannot ignore column(s) {', '.join(map(repr, missing))}: not in the "
                f"file (available columns: {', '.join(repr(c) for c in available)})")
        if label is not None and label in ignore:
            raise InvalidInputError(
                f"{prefix}column {label!r} is the label column and cannot be ignored")
        chosen = [c for c in chosen if c not in ignore]
        if not chosen:
            raise InvalidInputError(f"{prefix}every feature column is ignored")
    return chosen


def _chosen_columns(
    available: Sequence[str], label: str | None, feature_columns: Sequence[str] | None,
    prefix: str,
) -> list[str]:
    listing = ", ".join(repr(c) for c in available)
    if label is not None and label not in available:
        raise InvalidInputError(
            f"{prefix}no label column {label!r}; available columns: {listing}"
        )
    if feature_columns is None:
        chosen = [c for c in available if c != label]
    else:
        if isinstance(feature_columns, str):
            raise InvalidInputError(
                f"{prefix}feature_columns must be a sequence of column names, not one string"
            )
        chosen = [str(c) for c in feature_columns]
        missing = [c for c in chosen if c not in available]
        if missing:
            raise InvalidInputError(
                f"{prefix}no feature column(s) {', '.join(map(repr, missing))}; "
                f"available columns: {listing}"
            )
        check_names(chosen, prefix + "feature_columns: ", what="entry", whats="entries")
        if label is not None and label in chosen:
            raise InvalidInputError(
                f"{prefix}column {label!r} is the label column and cannot also be a feature"
            )
    if not chosen:
        raise InvalidInputError(f"{prefix}no feature columns (available columns: {listing})")
    return chosen


def intake_warnings(
    X: np.ndarray, labels: np.ndarray | None, names: Sequence[str], where: Where, prefix: str
) -> list[str]:
    """Conflicting duplicates, constant features, feature scales differing > 1e3."""
    out: list[str] = []
    n = X.shape[0]
    if labels is not None and n > 1:
        _, inverse, counts = np.unique(X + 0.0, axis=0, return_inverse=True, return_counts=True)
        inverse = inverse.reshape(-1)
        order = np.argsort(inverse, kind="stable")  # rows grouped by identical feature vector
        starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
        conflicts = []
        for g in np.flatnonzero(counts > 1):
            rows = order[starts[g]:starts[g] + counts[g]]
            vals = list(dict.fromkeys(labels[rows].tolist()))
            if len(vals) > 1:
                conflicts.append((rows, vals))
        if conflicts:
            conflicts.sort(key=lambda c: int(c[0][0]))
            parts = []
            for rows, vals in conflicts[:MAX_LISTED]:
                shown = ", ".join(where(int(r)) for r in rows[:MAX_LISTED])
                more = f" and {rows.size - MAX_LISTED} more" if rows.size > MAX_LISTED else ""
                parts.append(f"[{shown}{more}] labelled {', '.join(map(repr, vals))}")
            extra = len(conflicts) - MAX_LISTED
            tail = f"; and {extra} more group(s)" if extra > 0 else ""
            out.append(
                f"{prefix}{len(conflicts)} group(s) of rows have identical features but "
                f"different labels: {'; '.join(parts)}{tail}"
            )
    if n > 1:
        spread = X.max(axis=0) - X.min(axis=0)
        const = [names[j] for j in np.flatnonzero(spread == 0.0)]
        if const:
            out.append(
                f"{prefix}constant feature column(s) {', '.join(map(repr, const))}: the same value "
                "in every row, so they carry no information"
            )
        sd = X.std(axis=0)
        live = np.flatnonzero(spread > 0.0)
        if live.size > 1:
            hi, lo = live[np.argmax(sd[live])], live[np.argmin(sd[live])]
            ratio = float(sd[hi] / sd[lo]) if sd[lo] > 0 else math.inf
            if ratio > SCALE_RATIO_WARN:
                out.append(
                    f"{prefix}{SCALE_WARNING} {ratio:.3g} (standard deviation "
                    f"of {names[hi]!r} is {sd[hi]:.3g}, of {names[lo]!r} is {sd[lo]:.3g})"
                    + SCALE_ADVICE
                )
    return out
