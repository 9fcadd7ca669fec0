"""Checks on the per-iteration series of an SMO trace: phases, stall, cycling, objective rises.

All functions take plain arrays (one entry per recorded iteration, ascending) and return
records; they never read files.  Costs are O(rows) or O(rows log rows) (a 200 000-row trace
takes well under a second).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ._records import Finding, Phase

__all__ = ["phases", "stall", "cycling", "objective_increase", "STALL_FACTOR",
           "STALL_MIN_WINDOW", "STALL_WINDOW_SHARE", "CYCLE_TOP", "CYCLE_SHARE",
           "CYCLE_MIN_ROWS", "FAST_SHARE", "PLATEAU_SHARE"]

#: stall: the running minimum of the violation improves by less than this factor ...
STALL_FACTOR = 2.0
#: ... over a window of max(STALL_MIN_WINDOW, STALL_WINDOW_SHARE × iterations) iterations
STALL_MIN_WINDOW = 1000
STALL_WINDOW_SHARE = 0.1
#: cycling: the CYCLE_TOP most frequent pairs make up at least CYCLE_SHARE of a window of
#: at least CYCLE_MIN_ROWS iterations: the stall stretch, or the last tenth of a run that
#: did not converge (a converged run alternating between a few pairs at its end is ordinary)
CYCLE_TOP = 3
CYCLE_SHARE = 0.5
CYCLE_MIN_ROWS = 500
#: phases: the fast decrease ends when FAST_SHARE of the total objective decrease is made;
#: the final tail is the last decade of the violation's running minimum
FAST_SHARE = 0.9
#: a plateau longer than this share of the run (and ≥ STALL_MIN_WINDOW iterations) is a finding
PLATEAU_SHARE = 0.5
#: an objective rise counts when it exceeds this relative size (rounding of the incremental
#: objective is far smaller on the problems measured)
RISE_RTOL = 1e-9


def _envelope(violation: np.ndarray) -> np.ndarray:
    """Running minimum of the violation (its best value so far)."""
    return np.minimum.accumulate(violation)


def phases(it: np.ndarray, violation: np.ndarray, objective: np.ndarray,
           *, kkt_tol: float) -> tuple[tuple[Phase, ...], Finding | None, dict[str, Any]]:
    """Phases fast decrease → plateau → final tail and a ``long_plateau`` finding.

    Fast decrease: iterations until FAST_SHARE of the objective's total decrease is made.
    Final tail: from the first iteration whose running-minimum violation is within 10× the
    final one (when the violation fell by at least a decade after the fast decrease), to the
    end.  Plateau: what lies between.
    """
    n = it.size
    checks = {"fast_share": FAST_SHARE, "tail_rule": "last decade of the running-minimum "
              "violation", "plateau_share": PLATEAU_SHARE}
    if n < 3:
        return (), None, checks
    env = _envelope(violation)
    drop = objective[0] - objective
    total = drop[-1]
    k_fast = int(np.argmax(drop >= FAST_SHARE * total)) if total > 0 else 0
    final = env[-1]
    k_tail = int(np.argmax(env <= 10.0 * final)) if final > 0 else n - 1
    if final <= 0 or env[k_fast] < 10.0 * final:
        k_tail = n  # no decade left after the fast decrease: no tail of its own
    k_tail = max(k_tail, k_fast + 1)
    bounds = [("fast_decrease", 0, k_fast), ("plateau", k_fast + 1, k_tail - 1),
              ("final_tail", k_tail, n - 1)]
    out = []
    for name, a, b in bounds:
        if a > b or a >= n:
            continue
        first = int(it[a - 1]) + 1 if a > 0 else 1
        out.append(Phase(name, first, int(it[b]), int(it[b]) - first + 1,
                         float(violation[a]), float(violation[b]), float(objective[a]),
                         float(objective[b])))
    finding = None
    plateau = next((p for p in out if p.name == "plateau"), None)
    total_it = int(it[-1])
    if (plateau is not None and plateau.iterations >= STALL_MIN_WINDOW
            and plateau.iterations >= PLATEAU_SHARE * total_it):
        finding = Finding(
            "long_plateau", "caution",
            f"{plateau.iterations} of {total_it} iterations ({plateau.iterations / total_it:.0%})"
            f" were a plateau (iterations {plateau.first}–{plateau.last}): the objective had "
            f"made {FAST_SHARE:.0%} of its decrease and the violation fell only from "
            f"{plateau.violation_start:.3g} to {plateau.violation_end:.3g}",
            {"first": plateau.first, "last": plateau.last, "iterations": plateau.iterations,
             "share": plateau.iterations / total_it, "kkt_tol": kkt_tol},
            "see the stall and cycling findings for the rows involved; a looser kkt_tol ends "
            "the run sooner if the plateau sits below the accuracy you need")
    return tuple(out), finding, checks


def _runs_of_true(mask: np.ndarray) -> list[tuple[int, int]]:
    """(start, end) inclusive index ranges of maximal runs of True."""
    if not mask.any():
        return []
    d = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    starts, ends = np.flatnonzero(d == 1).tolist(), (np.flatnonzero(d == -1) - 1).tolist()
    return list(zip(starts, ends, strict=True))


def _top(values: np.ndarray, k: int) -> list[dict[str, Any]]:
    """The k most frequent values with counts and shares (ties to the lower value)."""
    if values.size == 0:
        return []
    u, c = np.unique(values, return_counts=True)
    order = np.lexsort((u, -c))[:k]
    return [{"row": int(u[t]), "count": int(c[t]), "share": float(c[t] / values.size)}
            for t in order]


def stall(it: np.ndarray, violation: np.ndarray, wi: np.ndarray, wj: np.ndarray,
          *, kkt_tol: float) -> tuple[Finding | None, tuple[int, int] | None, dict[str, Any]]:
    """The longest stretch over which the running-minimum violation improves by less than
    STALL_FACTOR within every window of W iterations, with the dominant working-set rows.

    Returns the finding (or None), the stretch as (first row, last row) of the series, and
    the check's figures (window, factor).
    """
    last = int(it[-1]) if it.size else 0
    window = max(STALL_MIN_WINDOW, int(STALL_WINDOW_SHARE * last))
    checks = {"window": window, "factor": STALL_FACTOR}
    if it.size < 2 or last < 2 * window:
        checks["skipped"] = f"the run has fewer than 2 × {window} iterations"
        return None, None, checks
    env = _envelope(violation)
    ahead = np.searchsorted(it, it + window)  # first row at or after k + W
    valid = ahead < it.size
    flat = np.zeros(it.size, dtype=bool)
    flat[valid] = env[ahead[valid]] > env[valid] / STALL_FACTOR
    # a stretch where the envelope is already below kkt_tol is convergence, not a stall
    flat &= env > kkt_tol
    runs = _runs_of_true(flat)
    if not runs:
        return None, None, checks
    a, b = max(runs, key=lambda r: (r[1] - r[0], -r[0]))
    b_end = int(min(ahead[b], it.size - 1))
    first, end = int(it[a]), int(it[b_end])
    span = end - first + 1
    if span < window:
        return None, None, checks
    rows = np.concatenate([wi[a:b_end + 1], wj[a:b_end + 1]])
    top = _top(rows, 5)
    finding = Finding(
        "stall", "caution",
        f"the maximal violation stalled over iterations {first}–{end} ({span} iterations): "
        f"its best value improved by less than a factor {STALL_FACTOR:g} within every window "
        f"of {window} iterations (from {env[a]:.3g} to {env[b_end]:.3g}; kkt_tol {kkt_tol:g})",
        {"first": first, "last": end, "iterations": span, "window": window,
         "factor": STALL_FACTOR, "violation_start": float(env[a]),
         "violation_end": float(env[b_end]), "dominant_rows": top},
        "look at the dominant rows (duplicates, label noise); try the other working-set "
        "selection, a smaller C, or a looser kkt_tol", "selection=first_order")
    return finding, (a, b_end), checks


def cycling(it: np.ndarray, wi: np.ndarray, wj: np.ndarray, stretch: tuple[int, int] | None,
            describe_pair: Any, *, converged: bool) -> tuple[Finding | None, dict[str, Any]]:
    """Whether CYCLE_TOP pairs make up CYCLE_SHARE of the stall stretch (or, for a run that
    did not converge, of its last tenth).  ``describe_pair(i, j)`` gives facts about two rows."""
    if stretch is None and converged:
        return None, {"skipped": "converged without a stall"}
    if stretch is None:
        a = max(0, it.size - max(CYCLE_MIN_ROWS, it.size // 10))
        b = it.size - 1
    else:
        a, b = stretch
    rows = b - a + 1
    checks = {"top": CYCLE_TOP, "share": CYCLE_SHARE, "min_rows": CYCLE_MIN_ROWS,
              "window": [int(it[a]), int(it[b])] if rows > 0 else None}
    if rows < CYCLE_MIN_ROWS:
        return None, checks
    lo = np.minimum(wi[a:b + 1], wj[a:b + 1]).astype(np.int64)
    hi = np.maximum(wi[a:b + 1], wj[a:b + 1]).astype(np.int64)
    key = lo * (int(max(hi.max(), lo.max())) + 1) + hi
    u, c = np.unique(key, return_counts=True)
    order = np.lexsort((u, -c))[:CYCLE_TOP]
    share = float(c[order].sum() / rows)
    checks.update(top_share=share, distinct_pairs=int(u.size))
    if share < CYCLE_SHARE:
        return None, checks
    pairs = []
    for t in order:
        pos = int(np.flatnonzero(key == u[t])[0])
        i, j = int(lo[pos]), int(hi[pos])
        pairs.append({"i": i, "j": j, "count": int(c[t]), "share": float(c[t] / rows),
                      **describe_pair(i, j)})
    names = "; ".join(f"({p['i']}, {p['j']}) {p['count']}× {p['relation']}" for p in pairs)
    finding = Finding(
        "cycling", "caution",
        f"{len(pairs)} working-set pairs make up {share:.0%} of iterations {int(it[a])}–"
        f"{int(it[b])}: {names}",
        {"first": int(it[a]), "last": int(it[b]), "pairs": pairs, "share": share,
         "distinct_pairs": int(u.size)},
        "check these rows: remove exact duplicates with conflicting labels, or lower C so "
        "their multipliers can settle at the bound")
    return finding, checks


def objective_increase(it: np.ndarray, objective: np.ndarray) -> tuple[Finding | None,
                                                                         dict[str, Any]]:
    """Rows where the recorded objective rose (SMO's objective never rises in exact
    arithmetic: each step minimises it along a feasible direction)."""
    if objective.size < 2:
        return None, {"rises": 0}
    rise = np.diff(objective)
    scale = np.maximum(np.abs(objective[1:]), 1.0)
    bad = np.flatnonzero(rise > RISE_RTOL * scale)
    checks: dict[str, Any] = {"rises": int(bad.size), "rtol": RISE_RTOL,
                              "largest_rise": float(rise.max()) if rise.size else 0.0}
    if bad.size == 0:
        return None, checks
    k = int(bad[np.argmax(rise[bad])])
    finding = Finding(
        "objective_increase", "caution",
        f"the recorded dual objective rose at {bad.size} iteration(s), most by "
        f"{rise[k]:.3g} at iteration {int(it[k + 1])}",
        {"count": int(bad.size), "largest": float(rise[k]), "at_iteration": int(it[k + 1]),
         "first_iterations": [int(it[t + 1]) for t in bad[:10]]},
        "rises come from non-positive curvature (indefinite kernel) or rounding in the "
        "incremental objective; see the curvature and drift findings")
    return finding, checks


def unshrink_reopened(events: Mapping[str, np.ndarray], kinds: Mapping[int, str], n: int,
                      iterations: int) -> tuple[Finding | None, dict[str, Any]]:
    """Reconstructions that re-opened shrunk variables while the run still had to go on."""
    code = {v: k for k, v in kinds.items()}
    ev_it, ev_kind, ev_val = (np.asarray(events[k]) for k in ("iteration", "kind", "value"))
    shr, rec = code.get("shrink"), code.get("reconstruct")
    checks: dict[str, Any] = {"shrinks": int(np.sum(ev_kind == shr)),
                              "reconstructions": int(np.sum(ev_kind == rec))}
    undone = []
    active = n
    for t in range(ev_it.size):
        if ev_kind[t] == shr and np.isfinite(ev_val[t]):
            active = int(ev_val[t])
        elif ev_kind[t] == rec:
            if ev_it[t] < iterations and n - active > 0:
                undone.append({"iteration": int(ev_it[t]), "reopened": int(n - active),
                               "violation_after": float(ev_val[t])})
            active = n
    checks["undone"] = len(undone)
    if not undone:
        return None, checks
    after = iterations - undone[0]["iteration"]
    big = max(u["reopened"] for u in undone)
    severity = "caution" if after >= 0.2 * iterations and big >= 0.1 * n else "note"
    finding = Finding(
        "shrinking_undone", severity,
        f"shrinking was undone {len(undone)} time(s) before the end (first at iteration "
        f"{undone[0]['iteration']}, re-opening up to {big} of {n} variables); "
        f"{after} iterations followed",
        {"reconstructions": undone[:20], "iterations_after_first": int(after)},
        "compare with shrinking off (what-if) if these re-openings cost much time",
        "shrinking=off")
    return finding, checks
