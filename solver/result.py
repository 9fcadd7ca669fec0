"""Immutable records every solver returns: :class:`SolveResult` and its :class:`Trace`."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .certificate import Certificate
from .status import Status

__all__ = ["Trace", "SolveResult", "KeptGradient", "TRACE_LEVELS"]

TRACE_LEVELS = ("full", "sampled", "off")


@dataclass(frozen=True, eq=False)
class KeptGradient:
    """The gradient G = Qα + p (n,) a solver ended with, and the α (n,) it belongs to.

    Kept in memory with a fresh :class:`SolveResult` so that decision values on the
    training rows can be read off it instead of a kernel product
    (:func:`solver.explanation.decision_on_training` checks it against an exact product on
    a sample of rows first); never stored, so a loaded run has none."""

    alpha: np.ndarray
    values: np.ndarray

    def for_alpha(self, alpha: np.ndarray) -> np.ndarray | None:
        """``values`` when ``alpha`` is the α they belong to (same object or same values),
        else None (e.g. a result rebuilt with another α)."""
        a = np.asarray(alpha)
        if a is self.alpha or (a.shape == self.alpha.shape and np.array_equal(a, self.alpha)):
            return self.values
        return None


@dataclass(frozen=True, eq=False)
class Trace:
    """Per-iteration record of one solve.

    Attributes
    ----------
    solver : name of the solver that wrote it (columns differ per solver).
    level : ``"full"`` (every iteration), ``"sampled"`` (every ``sample_every``-th plus
        every iteration with an event) or ``"off"`` (no rows; snapshots still kept).
    columns : equal-length 1-D arrays, one row per recorded iteration; always has
        ``"iteration"`` (int64, 1-based: row k describes the state after iteration k).
        SMO columns: ``i``, ``j`` (int32 working set), ``alpha_i``, ``alpha_j`` (new
        multipliers), ``step`` (change of αᵢ), ``objective`` (dual objective after the
        step), ``violation`` (maximal violation before the step), ``active`` (int32
        active-set size).  QP columns: ``primal_objective``, ``dual_objective``, ``gap``,
        ``relative_gap``, ``primal_residual``, ``dual_residual``, ``step``.
    events : equal-length arrays ``iteration`` (int64), ``kind`` (int8), ``value`` (float64).
    event_kinds : code → name for ``events["kind"]``.
    snapshot_iterations : (k,) int64 iterations at which full α was stored (0 = start).
    snapshots : (k, n) float64 α after each snapshot iteration.
    sample_every, snapshot_every : recording periods (iterations).
    """

    solver: str
    level: str
    columns: Mapping[str, np.ndarray]
    events: Mapping[str, np.ndarray]
    event_kinds: Mapping[int, str]
    snapshot_iterations: np.ndarray
    snapshots: np.ndarray
    sample_every: int = 1
    snapshot_every: int = 0

    @property
    def n_rows(self) -> int:
        """Number of recorded iterations."""
        col = self.columns.get("iteration")
        return 0 if col is None else int(col.shape[0])


@dataclass(frozen=True, eq=False)
class SolveResult:
    """What a solver returns, whatever the backend.

    ``alpha`` (n,) and ``bias`` define f(x) = Σ αᵢyᵢK(xᵢ, x) + b.  ``status`` says why
    the solver stopped; only :attr:`success` (status CONVERGED) means the optimality
    test was met.  ``certificate`` is computed by :func:`solver.certificate.certify`.
    ``options`` holds every option with defaults resolved; ``extra`` holds
    backend-specific figures (e.g. raw backend status, compile time, curvature fixes).
    """

    solver: str
    status: Status
    message: str
    alpha: np.ndarray
    bias: float
    iterations: int
    certificate: Certificate
    seconds: float
    options: Mapping[str, Any]
    trace: Trace | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)
    kept_gradient: KeptGradient | None = field(default=None, repr=False)

    @property
    def timing(self) -> dict[str, float | None]:
        """Wall-clock seconds of the solve call, split (the names every output uses).

        ``solve_seconds``: the iterations themselves; ``compile_seconds``: compiling (or
        loading from the on-disk cache) the numba code, paid once per process (0 for a
        solver without compiled code); ``setup_seconds``: start-up before the first
        iteration (kernel storage, or loading cvxopt and building Q); ``total_seconds``:
        the whole call (:attr:`seconds`, which also holds the final certificate).  A part
        the solver did not record is None.
        """
        ex = self.extra or {}

        def part(key: str) -> float | None:
            v = ex.get(key)
            return None if v is None else float(v)

        return {"solve_seconds": part("solve_seconds"), "compile_seconds": part("compile_seconds"),
                "setup_seconds": part("setup_seconds"), "total_seconds": float(self.seconds)}

    @property
    def success(self) -> bool:
        """True only when the solver's optimality test was met."""
        return self.status == Status.CONVERGED

    def summary(self) -> dict[str, Any]:
        """Key figures as plain data."""
        c = self.certificate
        return {
            "solver": self.solver,
            "status": self.status.label,
            "message": self.message,
            "iterations": int(self.iterations),
            "seconds": float(self.seconds),
            **self.timing,
            "bias": float(self.bias),
            **c.to_dict(),
        }
