"""Label helpers shared by the classification tasks: class order and class weights."""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from typing import Any

import numpy as np

from ..errors import InvalidInputError

__all__ = ["class_order", "resolve_class_weight", "BALANCED_RULE"]

#: the ``balanced`` rule in words (also in ``kktrace train --help``).
BALANCED_RULE = "w_c = n / (k * n_c): n rows, k classes, n_c rows of class c"


def _sort_key(v: Any) -> tuple[str, Any]:
    return (str(type(v)), v)


def class_order(labels: np.ndarray) -> list[Hashable]:
    """The distinct label values in the order every classification task uses: sorted
    (numbers ascending, text by code point), as :func:`solver.problem.binary_classification`
    sorts them."""
    return sorted(set(np.asarray(labels).tolist()), key=_sort_key)


def resolve_class_weight(
    spec: str | Mapping[str, float] | None, labels: np.ndarray, classes: Sequence[Hashable],
) -> dict[Hashable, float] | None:
    """Class value → weight factor, from ``"balanced"`` or a mapping label text → factor.

    ``balanced`` gives w_c = n / (k · n_c) over all n training rows and k classes (common
    practice).  Labels are matched by their text (``"1"`` matches the number 1).  An
    unknown label or a factor that is not a finite number > 0 raises
    :class:`InvalidInputError` naming it.
    """
    if spec is None:
        return None
    labels = np.asarray(labels)
    if isinstance(spec, str):
        if spec != "balanced":
            raise InvalidInputError(
                f"class weight {spec!r}: give 'balanced' or LABEL=W pairs such as a=1,b=2.5")
        n, k = labels.shape[0], len(classes)
        return {c: float(n) / (k * int(np.sum(labels == c))) for c in classes}
    if not isinstance(spec, Mapping) or not spec:
        raise InvalidInputError("class weights must be 'balanced' or LABEL=W pairs")
    by_text = {str(c): c for c in classes}
    out: dict[Hashable, float] = {}
    for key, w in spec.items():
        if str(key) not in by_text:
            raise InvalidInputError(
                f"class weight given for unknown label {str(key)!r}; the labels are "
                f"{', '.join(repr(str(c)) for c in classes)}")
        try:
            f = float(w)
        except (TypeError, ValueError):
            raise InvalidInputError(
                f"class weight for label {str(key)!r} is not a number: {w!r}") from None
        if isinstance(w, bool) or not math.isfinite(f) or f <= 0:
            raise InvalidInputError(
                f"class weight for label {str(key)!r} must be a finite number > 0, got {w!r}")
        out[by_text[str(key)]] = f
    return out
