"""Wall-clock seconds of the phases of a fit (attachment ``phases`` of every trained run).

Phases, in pipeline order: ``load`` (reading the data file(s)), ``standardise`` (fitting
and applying the standardiser, building the dual problem), ``audit`` (kernel audit),
``solve`` (this run's solver call, compile or cache loading included — the solver's own
split is in the manifest's timing fields), ``explanation`` (per-point table),
``holdout`` (held-out scores), ``calibration`` (cross-validated sigmoid fit).  A run
records the phases it went through; ``save`` is measured by ``train`` after the run is
written and so appears in ``train --json`` only.  Shared phases (load, standardise,
audit) are the same figure in a run and its challenger.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager

__all__ = ["PHASES", "PhaseClock"]

PHASES = ("load", "standardise", "audit", "solve", "explanation", "holdout", "calibration",
          "save")


class PhaseClock:
    """Accumulates ``time.perf_counter`` seconds per phase name."""

    def __init__(self, seconds: dict[str, float] | None = None) -> None:
        self.seconds: dict[str, float] = dict(seconds or {})

    @contextmanager
    def phase(self, name: str) -> Iterator[None]:
        """Time the block as phase ``name`` (added to what the phase already has)."""
        if name not in PHASES:
            raise ValueError(f"unknown phase {name!r}")
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = self.seconds.get(name, 0.0) + time.perf_counter() - t0

    def copy(self) -> PhaseClock:
        """A clock starting from this one's figures (a run's own phases on top of shared)."""
        return PhaseClock(self.seconds)

    def to_dict(self) -> dict[str, float]:
        """Phase → seconds, in pipeline order."""
        return {k: float(self.seconds[k]) for k in PHASES if k in self.seconds}
