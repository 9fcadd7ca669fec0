"""Parsing, validation and warning helpers behind :mod:`solver.data` (internal).

Row descriptions ("where" functions) map a 0-based row index to the text used in
messages; see the row-number convention in :mod:`solver.data`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .errors import InvalidInputError

#: Warn when the largest / smallest feature standard deviation exceeds this ratio.
SCALE_RATIO_WARN = 1e3
#: At most this many examples are named in one message.
MAX_LISTED = 5

Where = Callable[[int], str]


def where_index(i: int) -> str:
    """Row description for array-like sources: 1-based row and 0-based index."""
    return f"row {i + 1} (index {i})"


def parse_number(text: str) -> float | None:
    """float value of a numeric text cell, None when it is not a number."""
    try:
        return float(text)
    except (TypeError, ValueError):
        return None


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
    out = np.empty(arr.shape[0], dtype=np.float64)
    for i, v in enumerate(arr.tolist()):
        if v is None or (isinstance(v, str) and not v.strip()):
            raise InvalidInputError(
                f"{prefix}{where(i)}, column {column!r}: empty cell (missing values are not "
                "allowed; fill or remove the row)"
            )
        if isinstance(v, bytes):
            v = v.decode("utf-8", "replace")
        if isinstance(v, (bool, np.bool_)):
            out[i] = float(v)
            continue
        if isinstance(v, (int, float, np.integer, np.floating)):
            out[i] = float(v)
            continue
        x = parse_number(v) if isinstance(v, str) else None
        if x is None:
            raise InvalidInputError(
                f"{prefix}{where(i)}, column {column!r}: {v!r} is not a number (if this column "
                "is not a feature, leave it out with feature_columns)"
            )
        out[i] = x
    return out


def check_finite(X: np.ndarray, names: Sequence[str], where: Where, prefix: str) -> None:
    bad = ~np.isfinite(X)
    if np.any(bad):
        r, c = (int(v) for v in np.argwhere(bad)[0])
        what = "NaN" if np.isnan(X[r, c]) else "an infinite value"
        raise InvalidInputError(
            f"{prefix}{where(r)}, column {names[c]!r}: {what} ({int(bad.sum())} non-finite "
            "value(s) in all); every feature value must be a finite number"
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
    for i, v in enumerate(items):
        if is_missing(v):
            raise InvalidInputError(
                f"{prefix}{where(i)}, {what}: label is missing ({v!r}); every row needs a label"
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
                    f"{prefix}feature scales differ by a factor of {ratio:.3g} (standard deviation "
                    f"of {names[hi]!r} is {sd[hi]:.3g}, of {names[lo]!r} is {sd[lo]:.3g}); "
                    "standardise the features (unscaled data slows SMO and lets the widest "
                    "column dominate the kernel)"
                )
    return out
