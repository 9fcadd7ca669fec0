"""Shared pieces of the workflow layer (:mod:`solver.api`, :mod:`solver.training`).

Store location, choice lists, the progress-callback type, and helpers that load and align
data files and score held-out labels.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .data import Dataset
from .errors import DataWarning, InvalidInputError

if TYPE_CHECKING:  # pragma: no cover
    from .store import RunStore

#: Environment variable naming the default store directory.
STORE_ENV = "KKTRACE_STORE"
#: Store directory used when neither an argument nor :data:`STORE_ENV` gives one.
DEFAULT_STORE = "traces"
SOLVER_CHOICES = ("smo", "qp", "both")
KERNEL_CHOICES = ("linear", "poly", "rbf", "sigmoid")

#: ``progress(task, info)``: task is ``"solve"`` (info: solver, iteration, violation, kkt_tol,
#: iteration_limit) or ``"leave_one_out"`` (info: done, total); ``"done"`` ends a task.
ProgressFn = Callable[[str, Mapping[str, Any]], None]


def open_store(store: Any = None, *, signing_key: str | Path | None = None) -> RunStore:
    """The :class:`~solver.store.RunStore` for ``store``: a store, a directory, or None.

    None means ``$KKTRACE_STORE`` if set, else ``./traces``.  ``signing_key`` (a private
    key file; default ``$KKTRACE_SIGNING_KEY``) makes every save sign its manifest digest.
    """
    from .store import RunStore

    if isinstance(store, RunStore):
        return store
    if store is None:
        store = os.environ.get(STORE_ENV) or DEFAULT_STORE
    root = Path(store)
    if root.exists() and not root.is_dir():
        raise InvalidInputError(f"store {str(root)!r} exists but is not a directory")
    return RunStore(root, signing_key=signing_key)


@dataclass(frozen=True)
class Columns:
    """How a data file's columns are read: ``features`` (the feature columns, default all
    but the label / target), ``ignore`` (columns left out) and the CSV ``delimiter``
    (default detected).  The CLI's ``--features``, ``--ignore`` and ``--delimiter``."""

    features: tuple[str, ...] | None = None
    ignore: tuple[str, ...] | None = None
    delimiter: str | None = None

    @classmethod
    def of(cls, features: Sequence[str] | None = None, ignore: Sequence[str] | None = None,
           delimiter: str | None = None) -> Columns:
        """Validated choice (each list a sequence of column names, not one string)."""
        def names(v: Sequence[str] | None, what: str) -> tuple[str, ...] | None:
            if v is None:
                return None
            if isinstance(v, str) or not all(isinstance(c, str) and c for c in v):
                raise InvalidInputError(f"{what} must be a list of column names")
            return tuple(v)

        return cls(names(features, "feature_columns"), names(ignore, "ignore_columns"),
                   delimiter)


NO_CHOICE = Columns()


def _check_path(data: Any, what: str) -> Path:
    if not isinstance(data, (str, Path)):
        raise InvalidInputError(
            f"{what} must be a Dataset or a file path, got {type(data).__name__}"
        )
    path = Path(data)
    if not path.exists():
        raise InvalidInputError(f"{what} file {str(path)!r} does not exist")
    if path.is_dir():
        raise InvalidInputError(f"{what} path {str(path)!r} is a directory, not a data file")
    return path


def _load_data(data: Dataset | str | Path, label: str | None, what: str,
               columns: Columns = NO_CHOICE, *, names: Sequence[str] | None = None,
               ) -> Dataset:
    """A Dataset from a Dataset or a file.

    Without ``names`` (training data) the file's features follow ``columns``.  With
    ``names`` (a run's features: held-out, query or applied data) exactly those columns
    are read, in that order; the file's other columns — those ``columns`` leaves in
    beyond ``names`` — are ignored with one :class:`DataWarning` naming them, and no
    intake warnings are raised (the run's standardiser, not these rows, sets the scale).
    """
    from .data import column_names, load_table

    if names is None:
        if isinstance(data, Dataset):
            return _select(data, columns, what)
        return load_table(_check_path(data, what), label=label,
                          feature_columns=columns.features, ignore_columns=columns.ignore,
                          delimiter=columns.delimiter)
    names = [str(c) for c in names]
    if isinstance(data, Dataset):
        ds = _select(data, columns, what)
        _model_columns(list(ds.feature_names), names, what, ds.source, columns)
        if list(ds.feature_names) == names:
            return ds
        X = ds.X[:, [ds.feature_names.index(c) for c in names]]
        return replace(ds, X=X, feature_names=tuple(names))
    path = _check_path(data, what)
    available = [c for c in column_names(path, delimiter=columns.delimiter) if c != label]
    _model_columns(available, names, what, str(path), columns)
    return load_table(path, label=label, feature_columns=names,
                      delimiter=columns.delimiter, warn=False)


def _select(ds: Dataset, columns: Columns, what: str) -> Dataset:
    """``ds`` restricted to the chosen feature columns (names checked)."""
    from ._intake import select_columns

    if columns.features is None and columns.ignore is None:
        return ds
    prefix = f"{ds.source}: " if ds.source else f"{what}: "
    keep = select_columns(list(ds.feature_names), None, columns.features, prefix,
                          columns.ignore)
    idx = [ds.feature_names.index(c) for c in keep]
    return replace(ds, X=ds.X[:, idx], feature_names=tuple(keep))


def _model_columns(available: Sequence[str], names: Sequence[str], what: str,
                   source: str | None, columns: Columns) -> None:
    """Check a file against a run's features; warn once about the columns left out."""
    from ._intake import select_columns

    prefix = f"{source}: " if source else f"{what}: "
    ignore = None if columns.ignore is None else [c for c in columns.ignore if c in available]
    chosen = select_columns(list(available), None, columns.features, prefix, ignore)
    missing = [c for c in names if c not in chosen]
    if missing:
        left = [c for c in missing if c in available]
        why = (f" ({', '.join(map(repr, left))} left out by --features / --ignore)"
               if left else "")
        raise InvalidInputError(
            f"{prefix}{what} lacks the run's feature column(s) "
            f"{', '.join(map(repr, missing))}{why}; the run's features are "
            f"{', '.join(map(repr, names))}")
    extra = [c for c in chosen if c not in names]
    if extra:
        warnings.warn(
            f"{prefix}column(s) {', '.join(map(repr, extra))} are not features of the run "
            "and were ignored", DataWarning, stacklevel=4)


def _align(query: Dataset, names: Sequence[str], what: str) -> np.ndarray:
    """Query features in the training column order (matched by name when names are known)."""
    qn = list(query.feature_names)
    if qn == list(names):
        return query.X
    missing = [c for c in names if c not in qn]
    if missing:
        raise InvalidInputError(
            f"{what} lacks training feature column(s) {', '.join(map(repr, missing))}"
            + (f" (file {query.source})" if query.source else "")
        )
    extra = [c for c in qn if c not in names]
    if extra:
        raise InvalidInputError(
            f"{what} has column(s) {', '.join(map(repr, extra))} that the run was not trained "
            "on; remove them or name the label column"
        )
    return query.X[:, [qn.index(c) for c in names]]


def check_known_labels(ds: Dataset, classes: Sequence[Any], what: str) -> None:
    """Refuse labels of ``ds`` that are not among the run's ``classes`` (matched by text),
    naming the file, the column and the first such row (1-based data row)."""
    if ds.labels is None:
        return
    known = {str(c) for c in classes}
    text = [str(v) for v in ds.labels.tolist()]
    bad = [i for i, v in enumerate(text) if v not in known]
    if bad:
        unseen = list(dict.fromkeys(text[i] for i in bad))
        where = f"{ds.source}: " if ds.source else ""
        raise InvalidInputError(
            f"{where}label column {ds.label_name!r} of the {what} has value(s) "
            f"{', '.join(map(repr, unseen[:5]))} that the run was not trained on (first at "
            f"row {bad[0] + 1}, {len(bad)} row(s) in all; training labels: "
            f"{', '.join(repr(str(c)) for c in classes)})")


def check_finite_values(values: np.ndarray, ds: Dataset, what: str) -> None:
    """Refuse decision values that are not finite (e.g. features near ±1e308 with an RBF
    kernel), naming the file, the first such row and that row's largest feature."""
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = int(bad[0])
        j = int(np.argmax(np.abs(ds.X[i])))
        where = f"{ds.source}: " if ds.source else ""
        raise InvalidInputError(
            f"{where}row {i + 1}, column {ds.feature_names[j]!r}: the decision value is not "
            f"finite ({float(values[i])!r}): the value {ds.X[i, j]:.6g} is too large for the "
            f"model's kernel arithmetic ({bad.size} row(s) of the {what} in all); no labels "
            "were assigned")


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        return v.item()
    return v


def _confusion(truth: np.ndarray, pred: np.ndarray, labels: tuple[Any, Any]) -> dict[str, Any]:
    """Confusion matrix (rows: true label, columns: predicted; order negative, positive)."""
    neg, pos = labels
    t = np.asarray(truth, dtype=object)
    p = np.asarray(pred, dtype=object)
    unknown = sorted({str(v) for v in t.tolist()} - {str(neg), str(pos)})
    if unknown:
        raise InvalidInputError(
            f"held-out labels {', '.join(map(repr, unknown))} were not seen in training "
            f"(training labels: {neg!r}, {pos!r})"
        )
    ts = np.array([str(v) for v in t.tolist()])
    ps = np.array([str(v) for v in p.tolist()])
    sn, sp = str(neg), str(pos)
    m = [[int(np.sum((ts == a) & (ps == b))) for b in (sn, sp)] for a in (sn, sp)]
    n = int(ts.size)
    acc = (m[0][0] + m[1][1]) / n if n else float("nan")
    recalls = [m[i][i] / sum(m[i]) for i in range(2) if sum(m[i]) > 0]
    bal = float(np.mean(recalls)) if recalls else float("nan")
    return {
        "labels": [_plain(neg), _plain(pos)],
        "matrix": m,
        "matrix_layout": "rows: true label, columns: predicted label",
        "n": n,
        "accuracy": float(acc),
        "balanced_accuracy": bal,
    }


def _fingerprint(ds: Dataset) -> str:
    from .data import fingerprint

    return fingerprint(ds)


#: attachment holding the held-out rows themselves, so that ``compare`` can reuse them
HOLDOUT_ROWS = "holdout_rows"


def _holdout_rows(hold: Dataset, names: Sequence[str]) -> dict[str, Any]:
    """The held-out feature rows (m, d) in raw units, training column order, with their
    fingerprint and source: attachment :data:`HOLDOUT_ROWS`."""
    return {"features": np.ascontiguousarray(_align(hold, names, "held-out data"),
                                             dtype=np.float64),
            "feature_names": list(names), "fingerprint": _fingerprint(hold),
            "source": hold.source}


def _stored_holdout(*records: Any) -> tuple[np.ndarray | None, str]:
    """Held-out rows stored with the first of ``records`` that has them, and a note saying
    where they came from, or why there are none and how to add them."""
    for k, rec in enumerate(records):
        rows = (rec.attachments or {}).get(HOLDOUT_ROWS)
        if isinstance(rows, Mapping) and rows.get("features") is not None:
            X = np.asarray(rows["features"], dtype=np.float64)
            names = "AB"[k] if len(records) == 2 else str(k)
            return X, (f"held-out rows: the {X.shape[0]} stored with run {names} "
                       f"({rows.get('source') or 'in-memory data'}, fingerprint "
                       f"{str(rows.get('fingerprint'))[:12]}…)")
    held = any("holdout" in (rec.attachments or {}) for rec in records)
    why = ("the runs were scored on held-out data but do not store its rows (trained before "
           "kktrace kept them)" if held else "neither run was trained with held-out data")
    return None, (f"held-out measures not computed: {why}; add them with "
                  "'kktrace compare RUN_A RUN_B --holdout FILE' (Python: "
                  "solver.compare(a, b, holdout=FILE))")
