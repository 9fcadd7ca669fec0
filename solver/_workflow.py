"""Shared pieces of the workflow layer (:mod:`solver.api`, :mod:`solver.training`).

Store location, choice lists, the progress-callback type, and helpers that load and align
data files and score held-out labels.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .data import Dataset
from .errors import InvalidInputError

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


def _load_data(data: Dataset | str | Path, label: str | None, what: str) -> Dataset:
    from .data import load_table

    if isinstance(data, Dataset):
        return data
    if not isinstance(data, (str, Path)):
        raise InvalidInputError(
            f"{what} must be a Dataset or a file path, got {type(data).__name__}"
        )
    path = Path(data)
    if not path.exists():
        raise InvalidInputError(f"{what} file {str(path)!r} does not exist")
    if path.is_dir():
        raise InvalidInputError(f"{what} path {str(path)!r} is a directory, not a data file")
    return load_table(path, label=label)


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
