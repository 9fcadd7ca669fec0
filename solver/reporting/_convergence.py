"""Convergence figures from a stored trace: violation, objective, gap, sets, trajectories,
selection counts.  Long traces are downsampled for plotting only (min/max per bucket)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ..run import RunRecord
from ._records import FigureData, _fmt_num
from ._series import bucket_envelope, minmax_downsample, replay_pairs, thin_events

#: Most-changed multipliers drawn as trajectories.
N_TRAJECTORIES = 6
#: Plot points per series at most (min/max per bucket).
PLOT_POINTS = 1200
#: Plot points per multiplier trajectory and in the selection-count plot at most.
SMALL_PLOT_POINTS = 400


# --------------------------------------------------------------------------- trace figures


def _events(trace: Any) -> dict[str, np.ndarray]:
    ev = getattr(trace, "events", None) or {}
    kinds = getattr(trace, "event_kinds", None) or {}
    it = np.asarray(ev.get("iteration", []), dtype=np.float64)
    kind = np.asarray(ev.get("kind", []))
    out: dict[str, np.ndarray] = {}
    for code in np.unique(kind) if kind.size else []:
        name = str(kinds.get(int(code), f"event {int(code)}"))
        out[name] = it[kind == code]
    return out


def _trace_figures(rec: RunRecord, label: str, categories: np.ndarray | None) -> tuple[
    list[FigureData], list[str], dict[str, Any], dict[str, dict[str, list[float]]]
]:
    """Convergence figures, notes, replay facts and JSON series for one run."""
    res = rec.result
    trace = res.trace
    figs: list[FigureData] = []
    notes: list[str] = []
    facts: dict[str, Any] = {}
    series: dict[str, dict[str, list[float]]] = {}
    if trace is None or trace.level == "off" or trace.n_rows == 0:
        notes.append("No per-iteration trace was recorded for this run (trace level "
                     f"{getattr(trace, 'level', 'none')!r}); convergence figures not available.")
        return figs, notes, facts, series
    cols = trace.columns
    x = np.asarray(cols["iteration"], dtype=np.float64)
    span = (0.0, float(x[-1]) if x.size else 1.0)
    events = _events(trace)
    ev_draw = {k: thin_events(v, span) for k, v in events.items()}
    ev_counts = {k: int(v.size) for k, v in events.items()}
    facts["event_counts"] = ev_counts
    level_note = (f"trace level {trace.level!r}" + (f", every {trace.sample_every}th iteration"
                                                      if trace.level == "sampled" else ""))
    kkt_tol = float(res.certificate.kkt_tol)

    if "violation" in cols:
        vx, vy = minmax_downsample(x, np.asarray(cols["violation"], dtype=np.float64), PLOT_POINTS)
        series["violation"] = bucket_envelope(x, cols["violation"])
        figs.append(FigureData(
            key="violation", kind="violation",
            title=f"{label}: maximal KKT violation per iteration",
            caption=("Maximal violation m(α) − M(α) before each step (log scale) against the "
                     f"tolerance {_fmt_num(kkt_tol)} (dashed); the ring marks the final "
                     "certificate. "
                     f"Event marks: {_event_text(ev_counts)}. {trace.n_rows} recorded rows "
                     f"({level_note}), drawn as {vx.size} points keeping each bucket's min "
                     "and max."),
            data={"x": vx, "y": vy, "kkt_tol": kkt_tol, "final_x": float(res.iterations),
                  "final_y": float(res.certificate.max_violation), "events": ev_draw},
        ))
    final = float(res.certificate.dual_objective)
    objective = lower = None
    if "objective" in cols:  # SMO: the dual objective after each step
        objective = np.asarray(cols["objective"], dtype=np.float64)
    elif "primal_objective" in cols:
        # interior point: our dual problem is the QP solver's primal, so its primal objective
        # is our (minimised) dual objective and its dual objective a lower bound on it
        objective = np.asarray(cols["primal_objective"], dtype=np.float64)
        if "dual_objective" in cols:
            lower = np.asarray(cols["dual_objective"], dtype=np.float64)
    if objective is not None:
        ox, oyd = minmax_downsample(x, objective, PLOT_POINTS)
        dist = np.abs(objective - final)
        dx, dy = minmax_downsample(x, np.where(dist > 0, dist, np.nan), PLOT_POINTS)
        series["dual_objective"] = bucket_envelope(x, objective)
        data: dict[str, Any] = {"x": ox, "y": oyd, "final": final, "dist_x": dx, "dist_y": dy}
        if lower is not None:
            lx, ly = minmax_downsample(x, lower, PLOT_POINTS)
            data.update(lower_x=lx, lower_y=ly)
            series["objective_lower_bound"] = bucket_envelope(x, lower)
        figs.append(FigureData(
            key="objective", kind="objective",
            title=f"{label}: dual objective",
            caption=("Dual objective ½αᵀQα + pᵀα (minimised; upper panel) and its distance "
                     f"|D − D_final| to the final value {_fmt_num(final)} (log scale; lower "
                     "panel)"
                     + ("; for the interior-point solver the curve is cvxopt's own primal "
                        "objective at its interior iterates (our dual problem is that "
                        "solver's primal) and the final value is the certificate's, at the "
                        "returned α; dashed: cvxopt's lower bound on it (its own dual "
                        "objective)" if lower is not None else "") + "."),
            data=data,
        ))
    gap_keys = [k for k in ("gap", "relative_gap", "primal_residual", "dual_residual") if k in cols]
    if gap_keys:
        lines = {}
        for k in gap_keys:
            gx, gy = minmax_downsample(x, np.abs(np.asarray(cols[k], dtype=np.float64)),
                                       PLOT_POINTS)
            lines[k] = (gx, gy)
            series[k] = bucket_envelope(x, cols[k])
        figs.append(FigureData(
            key="gap", kind="gap", title=f"{label}: duality gap and residuals",
            caption=("cvxopt's own gap sᵀz, relative gap and primal/dual residuals at each "
                     "of its interior iterates (absolute values, log scale; the library's "
                     "figures, not the certificate's). The certificate's relative gap at the "
                     "returned α (final iterate moved onto its active bounds) is "
                     f"{_fmt_num(res.certificate.relative_gap)}; it is not a point of these "
                     "curves."),
            data={"lines": lines},
        ))
    # support-set size, replay, trajectories, selection counts
    p = rec.problem
    replay = None
    if trace.level == "full" and all(k in cols for k in ("i", "j", "alpha_i", "alpha_j")):
        alpha0 = _start_alpha(rec)
        try:
            replay = replay_pairs(cols["iteration"], cols["i"], cols["j"], cols["alpha_i"],
                                  cols["alpha_j"], alpha0, p.lower, p.upper,
                                  bound_tol=float(res.certificate.bound_tol))
        except ValueError as exc:
            notes.append(f"Replay of the trace failed: {exc}.")
    sets: dict[str, Any] = {"events": {k: v for k, v in ev_draw.items() if "shrink" in k}}
    if replay is not None:
        diff = float(np.max(np.abs(replay.final_alpha - res.alpha))) if p.n else 0.0
        scale = float(max(1.0, np.max(p.upper)))
        ok = diff <= 1e-9 * scale
        facts["replay"] = {"max_abs_difference": diff, "reproduced": ok}
        sx, sy = minmax_downsample(replay.iterations, replay.support_size.astype(np.float64),
                                   PLOT_POINTS)
        sets["support"] = (sx, sy)
        sets["support_source"] = "replayed from the trace"
        series["support_size"] = bucket_envelope(replay.iterations, replay.support_size)
    elif trace.snapshots is not None and np.asarray(trace.snapshots).size:
        snaps = np.asarray(trace.snapshots)
        if (res.extra or {}).get("final_snapshot") == "returned_alpha" and p.n:
            # the QP solver's last snapshot is its returned α (solver/qp.py)
            diff = float(np.max(np.abs(snaps[-1] - res.alpha)))
            facts["replay"] = {"max_abs_difference": diff, "reproduced": diff == 0.0}
        thresh = p.lower + float(res.certificate.bound_tol) * np.maximum(p.upper - p.lower, 0)
        counts = np.sum(snaps > thresh[None, :], axis=1).astype(np.float64)
        sets["support"] = (np.asarray(trace.snapshot_iterations, dtype=np.float64), counts)
        sets["support_source"] = "counted at stored snapshots"
        series["support_size"] = bucket_envelope(trace.snapshot_iterations, counts)
    if replay is None and "n_at_lower" in cols and "n_at_upper" in cols:
        # interior point: α stays strictly inside the box, so count the points the method
        # treats as at a bound (slack below its multiplier, as recorded by the solver)
        nl = np.asarray(cols["n_at_lower"], dtype=np.float64)
        sets["support"] = minmax_downsample(x, p.n - nl, PLOT_POINTS)
        sets["support_source"] = "n minus the points the interior-point method holds at 0"
        sets["bounded"] = minmax_downsample(x, np.asarray(cols["n_at_upper"], np.float64),
                                            PLOT_POINTS)
        series["support_size"] = bucket_envelope(x, p.n - nl)
    if "active" in cols:
        sets["active"] = minmax_downsample(x, np.asarray(cols["active"], dtype=np.float64),
                                           PLOT_POINTS)
        series["active_size"] = bucket_envelope(x, cols["active"])
    if "support" in sets or "active" in sets or "bounded" in sets:
        src = sets.get("support_source", "not available")
        figs.append(FigureData(
            key="sets", kind="sets",
            title=f"{label}: support set" + (" and active set" if "active" in sets else ""),
            caption=("Number of points with α above its lower bound (support set; "
                     f"{src})"
                     + (", points held at the upper bound" if "bounded" in sets else "")
                     + (" and points still in the active (unshrunk) set" if "active" in sets
                        else "") + "."
                     + (f" Shrinking events: {ev_counts.get('shrink', 0)}." if "active" in sets
                        else "")),
            data=sets,
        ))
    if replay is not None and p.n:
        top = np.argsort(-replay.total_change, kind="stable")[:N_TRAJECTORIES]
        top = top[replay.total_change[top] > 0]
        traj = []
        for t in top:
            tx, ty = replay.trajectory(int(t))
            tx = np.append(tx, float(x[-1]))
            ty = np.append(ty, ty[-1])
            if tx.size > SMALL_PLOT_POINTS:
                tx, ty = minmax_downsample(tx, ty, SMALL_PLOT_POINTS)
            traj.append({"row": int(t), "x": tx, "y": ty, "upper": float(p.upper[t]),
                         "change": float(replay.total_change[t])})
        if traj:
            figs.append(FigureData(
                key="trajectories", kind="trajectories",
                title=f"{label}: multipliers that moved most",
                caption=(f"α of the {len(traj)} points with the largest total movement Σ|Δα| "
                         "over the run, replayed from the trace; dotted lines are their upper "
                         "bounds (C × weights). Row numbers are 0-based training rows."),
                data={"lines": traj},
            ))
    sel = None
    if trace.level == "full" and "i" in cols and "j" in cols and p.n:
        sel = (np.bincount(np.asarray(cols["i"], dtype=np.int64), minlength=p.n)
               + np.bincount(np.asarray(cols["j"], dtype=np.int64), minlength=p.n))
    else:
        expl = rec.attachments.get("explanation") if rec.attachments else None
        if isinstance(expl, Mapping) and "times_selected" in expl:
            sel = np.asarray(expl["times_selected"], dtype=np.int64)
            if sel.size == 0 or np.any(sel < 0):  # −1: not known (no full SMO trace)
                sel = None
    if sel is not None and sel.size:
        order = np.argsort(-sel, kind="stable")
        counts = sel[order].astype(np.float64)
        rank = np.arange(1, counts.size + 1, dtype=np.float64)
        cats = None if categories is None else np.asarray(categories)[order]
        never = int(np.sum(sel == 0))
        drawn = ""
        if counts.size > SMALL_PLOT_POINTS:
            keep = np.unique(np.concatenate((
                np.linspace(0, counts.size - 1, SMALL_PLOT_POINTS).astype(np.int64),
                np.arange(min(50, counts.size)))))
            drawn = (f" Drawn at {keep.size} of the {counts.size} ranks (the top 50 and evenly "
                     "spaced ranks).")
            rank, counts = rank[keep], counts[keep]
            cats = None if cats is None else cats[keep]
        facts["selection"] = {"most": int(sel.max()), "never": never,
                              "total": int(sel.sum())}
        figs.append(FigureData(
            key="selection", kind="selection", title=f"{label}: how often each point was selected",
            caption=(f"Times each point entered the working set, points ranked from most to "
                     f"least selected (log scale), marked by final category. {never} of "
                     f"{sel.size} points were never selected; the most selected point entered "
                     f"{int(sel.max())} times.{drawn}"),
            data={"rank": rank, "count": counts, "category": cats},
        ))
    return figs, notes, facts, series


def _event_text(counts: Mapping[str, int]) -> str:
    if not counts:
        return "none recorded"
    return ", ".join(f"{k} × {v}" for k, v in sorted(counts.items()))


def _start_alpha(rec: RunRecord) -> np.ndarray:
    trace = rec.result.trace
    its = np.asarray(getattr(trace, "snapshot_iterations", []))
    snaps = np.asarray(getattr(trace, "snapshots", np.zeros((0, 0))))
    if its.size and int(its[0]) == 0 and snaps.ndim == 2 and snaps.shape[1] == rec.problem.n:
        return np.array(snaps[0], dtype=np.float64)
    a0 = (rec.result.options or {}).get("alpha0")
    if isinstance(a0, np.ndarray) and a0.shape == (rec.problem.n,):
        return np.array(a0, dtype=np.float64)
    return rec.problem.feasible_start()
