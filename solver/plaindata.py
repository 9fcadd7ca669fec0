"""Plain data for JSON: one conversion used by the CLI, the training workflow and the report."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["to_plain"]

_SCALARS = (str, int, float, bool, type(None))


def to_plain(
    value: Any,
    *,
    nonfinite_as_none: bool = False,
    other: Callable[[Any], Any] | None = None,
) -> Any:
    """``value`` as JSON-ready plain data.

    Mappings become dicts with string keys, lists / tuples / arrays become lists, numpy
    scalars Python scalars, paths strings.  With ``nonfinite_as_none`` NaN and ±inf become
    None; ``other`` converts any remaining non-scalar object (default: left as it is).
    """
    def conv(v: Any) -> Any:
        if isinstance(v, np.generic):
            v = v.item()
        if isinstance(v, float):
            return None if nonfinite_as_none and not math.isfinite(v) else v
        if isinstance(v, np.ndarray):
            return [conv(x) for x in v.tolist()]
        if isinstance(v, Mapping):
            return {str(k): conv(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [conv(x) for x in v]
        if isinstance(v, Path):
            return str(v)
        if other is not None and not isinstance(v, _SCALARS):
            return other(v)
        return v

    return conv(value)
