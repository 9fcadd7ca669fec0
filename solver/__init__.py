"""kktrace: SVM dual solvers with auditable optimisation traces (import package ``solver``)."""

from __future__ import annotations

__version__ = "0.1.0"
