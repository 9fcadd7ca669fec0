"""The record of one solver run as it travels from solver to store to report."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .model import Standardiser
from .problem import DualProblem
from .result import SolveResult

__all__ = ["RunRecord", "Member", "ParentRecord"]


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


@dataclass(frozen=True)
class Member:
    """One member of a parent record: a stored run and what it is to the parent.

    run_id : the member run.
    role : the member's role, e.g. ``"pair"`` (a one-vs-one pair's primary run),
        ``"pair_challenger"`` (that pair's QP challenger), or a study's own roles.
    key : the member's key within the parent (for a pair its two class labels as text,
        first class first), or None.
    manifest_sha256 : SHA-256 of the member's ``manifest.json`` bytes, recorded by the
        store when the parent is saved (None before).
    """

    run_id: str
    role: str
    key: tuple[str, ...] | None = None
    manifest_sha256: str | None = None


@dataclass(frozen=True, eq=False)
class ParentRecord:
    """A record over member runs (a multi-class model, later a study).

    task : registry name of the task that made it (:data:`solver.tasks.TASKS`).
    members : the member runs, in the task's order.
    info : plain data the task needs to use the members (classes, vote and tie rules,
        options, weights, how the members were executed).
    data : plain data about the training data (as :attr:`RunRecord.data`).
    summary : plain-data key figures over the members (status, iterations, ...), used by
        the catalog and listings.
    attachments : named plain-data parts stored as ``<name>.json`` (e.g. ``holdout``).
    command : the command that reproduces the fit.
    run_id, created, manifest : filled by the store on save / load.
    """

    task: str
    members: tuple[Member, ...]
    info: Mapping[str, Any]
    data: Mapping[str, Any]
    summary: Mapping[str, Any] = field(default_factory=dict)
    attachments: Mapping[str, Any] = field(default_factory=dict)
    command: Any = None
    run_id: str | None = None
    created: str | None = None
    manifest: Mapping[str, Any] | None = None

    def member_ids(self, role: str | None = None) -> list[str]:
        """Run ids of the members (of one ``role`` when given), in order."""
        return [m.run_id for m in self.members if role is None or m.role == role]
