"""Replay: α, certificate figures and the decision function at any recorded iteration.

α after iteration k is rebuilt from the last snapshot at or before k by applying the
trace rows after it in order (each SMO row records the *new* values of αᵢ and αⱼ, so
the rebuild copies values and is bitwise exact; no arithmetic is replayed).  The
certificate is then computed by :func:`solver.certificate.certify` with the gradient
recomputed from kernel blocks, never taken from the trace.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..certificate import Certificate, certify
from ..errors import InvalidInputError
from ..model import Model, model_from_solution
from ..run import RunRecord
from ..status import Status, decide

__all__ = ["ReplayState", "replay", "replayable_iterations"]

_DELTA_COLUMNS = ("iteration", "i", "j", "alpha_i", "alpha_j")


@dataclass(frozen=True, eq=False)
class ReplayState:
    """The state of a stored run after one recorded iteration.

    run_id : the run replayed (None for an unsaved record).
    iteration : the iteration k; α is the state after iteration k (0 = start).
    alpha : (n,) float64 multipliers after iteration k.
    base_iteration : snapshot iteration the rebuild started from.
    deltas_applied : trace rows applied on top of that snapshot.
    certificate : :func:`~solver.certificate.certify` at α (gradient recomputed).
    model : the decision function f(x) at α (support vectors α > lower bound, bias from
        the certificate), or None for problems without labels.
    recorded : the trace row of iteration k as plain numbers, or None if not recorded.
    run_status : the run's status (the status rule, :func:`solver.status.decide`),
        run_message its message and run_timing its :attr:`SolveResult.timing`: they
        describe the whole run, not iteration k.
    solver : the solver that wrote the trace.  alpha_source : what α is, in words (rebuilt
        bitwise from the trace; cvxopt's interior iterate; or the returned answer).
    """

    run_id: str | None
    iteration: int
    alpha: np.ndarray
    base_iteration: int
    deltas_applied: int
    certificate: Certificate
    model: Model | None
    recorded: Mapping[str, Any] | None
    run_status: Status | None = None
    run_message: str = ""
    run_timing: Mapping[str, float | None] | None = None
    solver: str = ""
    alpha_source: str = ""

    def values(self, X: np.ndarray, *, standardised: bool = False) -> np.ndarray:
        """Decision values f(x) at this iteration for rows of ``X`` (m, d)."""
        if self.model is None:
            raise InvalidInputError("this run has no classification model to evaluate")
        return self.model.values(X, standardised=standardised)


def replayable_iterations(record: RunRecord) -> np.ndarray:
    """Iterations at which α can be rebuilt: every snapshot, plus every row of a trace
    whose rows follow a snapshot without gaps (SMO-style rows with i, j, alpha_i, alpha_j)."""
    tr = record.result.trace
    if tr is None:
        return np.zeros(0, dtype=np.int64)
    snaps = np.asarray(tr.snapshot_iterations, dtype=np.int64)
    if not all(c in tr.columns for c in _DELTA_COLUMNS) or tr.n_rows == 0:
        return snaps.copy()
    it = np.asarray(tr.columns["iteration"], dtype=np.int64)
    ok = np.zeros(it.shape[0], dtype=bool)
    # a row is reachable when every iteration between the preceding snapshot and it is a row
    k = np.searchsorted(snaps, it, side="left") - 1  # last snapshot strictly before the row
    valid = k >= 0
    base = np.where(valid, snaps[np.maximum(k, 0)], -1)
    first_row = np.searchsorted(it, base, side="right")
    ok = valid & (it - base == np.arange(it.shape[0]) - first_row + 1)
    return np.union1d(snaps, it[ok])


def replay(record: RunRecord, iteration: int, *, base: int | None = None) -> ReplayState:
    """Rebuild the run's state after ``iteration`` from snapshots + trace rows.

    Parameters
    ----------
    record : a run (loaded from a store or fresh from a solver) with a trace.
    iteration : the iteration k (0 = start).
    base : snapshot iteration to start from; default the last snapshot at or before k.
        Starting from an earlier snapshot and checking against a later one is how the
        rebuild is verified to be bitwise exact.
    """
    tr = record.result.trace
    if tr is None:
        raise InvalidInputError("this run was saved without a trace; nothing to replay")
    if isinstance(iteration, bool) or not isinstance(iteration, (int, np.integer)):
        raise InvalidInputError(f"iteration must be an integer, got {iteration!r}")
    k = int(iteration)
    if k < 0 or k > int(record.result.iterations):
        raise InvalidInputError(
            f"iteration {k} is outside the run (0 … {int(record.result.iterations)})")
    snaps = np.asarray(tr.snapshot_iterations, dtype=np.int64)
    if base is None:
        pos = int(np.searchsorted(snaps, k, side="right")) - 1
        if pos < 0:
            raise InvalidInputError(f"no snapshot at or before iteration {k}")
    else:
        hits = np.flatnonzero(snaps == int(base))
        if hits.size == 0 or int(base) > k:
            raise InvalidInputError(
                f"base {base} is not a snapshot iteration at or before {k} "
                f"(snapshots: {snaps[:10].tolist()}{' …' if snaps.size > 10 else ''})")
        pos = int(hits[0])
    start = int(snaps[pos])
    alpha = np.array(tr.snapshots[pos], dtype=np.float64)
    applied = 0
    if k > start:
        missing = [c for c in _DELTA_COLUMNS if c not in tr.columns]
        if missing:
            raise InvalidInputError(
                f"iteration {k} is between snapshots and the {tr.solver} trace has no "
                f"per-iteration α changes (columns {missing} absent); replay works at "
                f"snapshot iterations only")
        it = np.asarray(tr.columns["iteration"], dtype=np.int64)
        lo = int(np.searchsorted(it, start, side="right"))
        hi = int(np.searchsorted(it, k, side="right"))
        if hi - lo != k - start or (hi > lo and (it[lo] != start + 1 or it[hi - 1] != k)):
            raise InvalidInputError(
                f"iteration {k} cannot be rebuilt: the trace ({tr.level}) does not hold every "
                f"iteration between snapshot {start} and {k}")
        idx = np.empty(2 * (hi - lo), dtype=np.int64)
        val = np.empty(2 * (hi - lo), dtype=np.float64)
        idx[0::2], idx[1::2] = tr.columns["i"][lo:hi], tr.columns["j"][lo:hi]
        val[0::2], val[1::2] = tr.columns["alpha_i"][lo:hi], tr.columns["alpha_j"][lo:hi]
        if idx.size and (idx.min() < 0 or idx.max() >= alpha.shape[0]):
            raise InvalidInputError("the trace names a working-set index outside 0 … n-1")
        # the last write to each index wins: take it explicitly (numpy does not promise
        # an order for repeated indices in one fancy assignment)
        uniq, first_rev = np.unique(idx[::-1], return_index=True)
        alpha[uniq] = val[idx.shape[0] - 1 - first_rev]
        applied = hi - lo
    problem = record.problem
    cert0 = record.result.certificate
    cert = certify(problem, alpha, kkt_tol=cert0.kkt_tol, bound_tol=cert0.bound_tol)
    model = None
    if problem.labels is not None:
        partial = replace(record.result, alpha=alpha, bias=cert.bias, certificate=cert,
                          iterations=k, trace=None)
        model = model_from_solution(problem, partial, record.standardiser)
    recorded = None
    if tr.n_rows:
        it = np.asarray(tr.columns["iteration"], dtype=np.int64)
        r = int(np.searchsorted(it, k))
        if r < it.shape[0] and it[r] == k:
            recorded = {c: np.asarray(v)[r].item() for c, v in tr.columns.items()}
    final = k == int(record.result.iterations)
    if applied or tr.solver != "qp":
        source = (f"rebuilt bit for bit from snapshot {start} and {applied} recorded steps"
                  if applied else f"snapshot {start}, stored bit for bit")
    elif final and (record.result.extra or {}).get("final_snapshot") == "returned_alpha":
        source = ("the returned answer: cvxopt's final iterate moved onto its active bounds "
                  "(equal to solution.npz, so these are the certificate's own figures)")
    else:
        source = (f"cvxopt's interior iterate {k} (strictly inside the box; not the returned "
                  "answer, which is moved onto its active bounds)")
    return ReplayState(run_id=record.run_id, iteration=k, alpha=alpha, base_iteration=start,
                       deltas_applied=applied, certificate=cert, model=model, recorded=recorded,
                       run_status=decide(record.result.status, cert0.max_violation,
                                         cert0.kkt_tol),
                       run_message=record.result.message,
                       run_timing=record.result.timing, solver=tr.solver,
                       alpha_source=source)
