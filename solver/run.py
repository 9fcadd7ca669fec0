"""The record of one solver run as it travels from solver to store to report."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .model import Standardiser
from .problem import DualProblem
from .result import SolveResult

__all__ = ["RunRecord"]


@dataclass(frozen=True, eq=False)
class RunRecord:
    """Everything needed to store, verify, replay, explain and report one run.

    problem : the solved problem (holds the standardised training rows, y, bounds, kernel).
    result : the solver's :class:`SolveResult` (α, bias, status, certificate, trace).
    data : plain data about the training data: ``fingerprint`` (str), ``feature_names``
        (list), ``label_name``, ``source`` (file name or None), ``warnings`` (list of str),
        ``n_rows``.
    standardiser : the fitted standardiser (identity when standardising was off).
    run_id, created, parent_id, parent_digest : filled by the store on save / load.
    attachments : optional named parts stored with the run, each plain data or a
        mapping of equal-length arrays: ``"explanation"`` (per-point table),
        ``"comparison"`` (agreement verdict), ``"holdout"`` (held-out scores),
        ``"audit"`` (kernel audit), ``"command"`` (reproducing command line), ...
    manifest : the stored manifest (set on load; None before save).
    """

    problem: DualProblem
    result: SolveResult
    data: Mapping[str, Any]
    standardiser: Standardiser
    run_id: str | None = None
    created: str | None = None
    parent_id: str | None = None
    parent_digest: str | None = None
    attachments: Mapping[str, Any] = field(default_factory=dict)
    manifest: Mapping[str, Any] | None = None
