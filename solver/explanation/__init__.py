"""Support-vector explanations: why these points, what each contributes, what happens without them.

* :func:`point_table` — one row per training point: multiplier, margin, slack, KKT residual,
  category with a plain-language reason, and trace history (first non-zero, last change,
  times selected).
* :func:`breakdown` — f(x) split into its largest support-vector contributions and a remainder.
* :func:`feature_space` — the explicit weight vector where it exists (linear; low-degree
  polynomial via the explicit feature map) and ‖w‖ = sqrt(αᵀQα) for every kernel.
* :func:`leave_one_out` — support-vector-count bound, Joachims' ξα-estimate and the exact
  leave-one-out error from refits of the support vectors only (decremental path from the
  full solution, SMO where the path's answer does not meet the stopping test).
* :func:`sensitivity` — per support vector, how the training decision values move without it.
* :func:`kind_point_table`, :func:`kind_leave_one_out` — the same for ε-regression (inside /
  on the edge of / outside the tube) and one-class (interior / boundary / outside) fits.
"""

from __future__ import annotations

from ._breakdown import Breakdown, breakdown
from ._feature_space import MAX_MONOMIALS, FeatureSpaceView, feature_space
from ._kinds import (
    ONE_CLASS_CATEGORIES,
    REGRESSION_CATEGORIES,
    KindLeaveOneOut,
    KindTable,
    kind_leave_one_out,
    kind_point_table,
)
from ._table import CATEGORIES, COLUMNS, PointTable, point_table

#: Names from :mod:`._loo`, imported on first use: the leave-one-out refits pull in their
#: compiled path kernels, which a plain ``train`` (point table only) never needs.
_LAZY = ("LOO_METHODS", "LeaveOneOut", "Sensitivity", "leave_one_out", "sensitivity")


def __getattr__(name: str):
    if name in _LAZY:
        from . import _loo

        value = getattr(_loo, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

__all__ = [
    "CATEGORIES",
    "COLUMNS",
    "LOO_METHODS",
    "ONE_CLASS_CATEGORIES",
    "REGRESSION_CATEGORIES",
    "KindLeaveOneOut",
    "KindTable",
    "kind_leave_one_out",
    "kind_point_table",
    "MAX_MONOMIALS",
    "Breakdown",
    "FeatureSpaceView",
    "LeaveOneOut",
    "PointTable",
    "Sensitivity",
    "breakdown",
    "feature_space",
    "leave_one_out",
    "point_table",
    "sensitivity",
]
