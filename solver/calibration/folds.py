"""Stratified, seeded k-fold assignment of training rows (fold number per row)."""

from __future__ import annotations

from collections.abc import Hashable, Sequence

import numpy as np

from ..errors import InvalidInputError

__all__ = ["stratified_folds"]


def stratified_folds(classes: Sequence[Hashable] | np.ndarray, n_folds: int, seed: int,
                     *, class_names: Sequence[str] | None = None) -> np.ndarray:
    """Fold number (0 … n_folds−1) for every row, stratified by ``classes`` (n,).

    Classes are taken in sorted order; the rows of each class are shuffled with
    ``numpy.random.default_rng(seed)`` (one generator, used class after class) and dealt
    to the folds in turn, continuing where the previous class stopped, so every fold gets
    ⌊n_c/k⌋ or ⌈n_c/k⌉ rows of class c and fold sizes differ by at most one row per class.
    The same ``classes``, ``n_folds`` and ``seed`` always give the same folds.

    A class with fewer rows than folds is refused (:class:`InvalidInputError` naming it):
    some fold would train without that class.  ``class_names`` maps the sorted classes
    to the names used in that message (default ``str`` of the class value).
    """
    if isinstance(n_folds, bool) or not isinstance(n_folds, (int, np.integer)) or n_folds < 2:
        raise InvalidInputError(f"the number of calibration folds must be an integer >= 2, "
                                f"got {n_folds!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InvalidInputError(f"the calibration seed must be a non-negative integer, "
                                f"got {seed!r}")
    c = np.asarray(classes)
    if c.ndim != 1 or c.size == 0:
        raise InvalidInputError("stratified folds need a non-empty 1-D array of classes")
    uniq, inverse, counts = np.unique(c, return_inverse=True, return_counts=True)
    names = list(class_names) if class_names is not None else [str(u) for u in uniq.tolist()]
    for name, cnt in zip(names, counts.tolist(), strict=True):
        if cnt < n_folds:
            raise InvalidInputError(
                f"class {name!r} has {cnt} training rows, fewer than the {n_folds} "
                f"calibration folds; use fewer folds (at most {cnt}) or more data")
    rng = np.random.default_rng(int(seed))
    folds = np.empty(c.size, dtype=np.int64)
    start = 0
    for k in range(uniq.size):
        rows = np.flatnonzero(inverse == k)
        rows = rows[rng.permutation(rows.size)]
        folds[rows] = (start + np.arange(rows.size)) % n_folds
        start = (start + rows.size) % n_folds
    return folds
