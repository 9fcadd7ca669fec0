"""Data intake: files and arrays → validated :class:`Dataset` with a stable fingerprint.

(Foundation issue: loaders and validation are being filled in; the interface below is fixed.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Dataset"]


@dataclass(frozen=True, eq=False)
class Dataset:
    """Validated training or query data.

    X : (n, d) float64 raw features; labels : (n,) label values (numbers or strings) or
    None for unlabelled query data; feature_names : d column names; label_name : label
    column name; source : file name it came from (None for arrays); warnings : data
    warnings found at intake (conflicting duplicates, constant or unscaled features).
    """

    X: np.ndarray
    labels: np.ndarray | None
    feature_names: tuple[str, ...]
    label_name: str | None = None
    source: str | None = None
    warnings: tuple[str, ...] = ()
