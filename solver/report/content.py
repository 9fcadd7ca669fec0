"""Gather everything a report shows from stored runs into one plain-data :class:`ReportContent`.

The renderers (:mod:`.html`, :mod:`.pdf`, :mod:`.summary`) only lay out what is collected
here, so the three formats always carry the same figures.  Long traces are downsampled for
plotting (min/max per bucket, :func:`._series.minmax_downsample`); stored arrays are read,
never changed.  Any missing attachment leaves its section saying "not available".
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np

from ..run import RunRecord
from ..status import Status
from ._series import bucket_envelope, minmax_downsample, replay_pairs, thin_events

__all__ = [
    "CAUTION",
    "Flag",
    "Table",
    "FigureData",
    "RunContent",
    "ReportContent",
    "build_report_content",
]

#: The standing caution printed on every report (HTML, PDF and JSON).
CAUTION = (
    "kktrace gives evidence about the optimisation, not a validation sign-off; decisions on use "
    "rest with the accountable model owner and validator under local regulation."
)

#: Severity order used for sorting flags: "stop" (result not usable as is), "caution", "note".
SEVERITIES = ("stop", "caution", "note")

#: A run is flagged when at least this share of its support vectors sit at the upper bound
#: (our heuristic: most multipliers clipped at C suggests the penalty C is too small).
BOUNDED_SHARE = 0.5
#: Features whose standard deviations differ by more than this factor count as unscaled
#: (our heuristic; standardising before distance-based kernels is common practice).
SCALE_RATIO = 100.0
#: Points drawn on the decision map at most (a seeded sample beyond that; seed 0).
MAP_POINTS = 1500
#: Most-changed multipliers drawn as trajectories.
N_TRAJECTORIES = 6
#: Rows in the table of the most influential points.
N_INFLUENTIAL = 15
#: Plot points per series at most (min/max per bucket).
PLOT_POINTS = 1200
#: Plot points per multiplier trajectory and in the selection-count plot at most.
SMALL_PLOT_POINTS = 400


@dataclass(frozen=True)
class Flag:
    """One warning: ``code`` (stable identifier), ``severity`` (stop/caution/note), message."""

    code: str
    severity: str
    message: str
    run: str | None = None


@dataclass(frozen=True, eq=False)
class Table:
    """A small table of plain values (str, int, float, None)."""

    columns: tuple[str, ...]
    rows: tuple[tuple[Any, ...], ...]
    note: str = ""


@dataclass(frozen=True, eq=False)
class FigureData:
    """Plot-ready data for one figure; ``kind`` selects the drawing routine in :mod:`.figures`."""

    key: str
    kind: str
    title: str
    caption: str
    data: Mapping[str, Any]


@dataclass(frozen=True, eq=False)
class RunContent:
    """Everything shown about one run.  ``label`` is the short name used across the report."""

    label: str
    run_id: str | None
    solver: str
    identity: tuple[tuple[str, Any], ...]
    environment: tuple[tuple[str, Any], ...]
    reproduce_command: str | None
    reproduce_python: str | None
    reproduce_note: str | None
    reproduce_code: str
    problem: tuple[tuple[str, Any], ...]
    options: tuple[tuple[str, Any], ...]
    audit: tuple[tuple[str, Any], ...] | None
    audit_verdict: str
    data_warnings: tuple[str, ...]
    termination: Mapping[str, Any]
    figures: tuple[FigureData, ...]
    figure_notes: tuple[str, ...]
    categories: Mapping[str, int]
    categories_source: str
    influential: Table | None
    influential_note: str
    loo: Table | None
    loo_figure: FigureData | None
    loo_note: str
    holdout: Mapping[str, Any] | None
    confusion: Table | None
    decision_map: FigureData | None
    decision_note: str
    flags: tuple[Flag, ...]
    series: Mapping[str, Mapping[str, list[float]]] = field(default_factory=dict)
    data_facts: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class ReportContent:
    """The whole report as plain data."""

    title: str
    generated: str
    kktrace_version: str
    caution: str
    notes: str | None
    runs: tuple[RunContent, ...]
    comparison: Mapping[str, Any] | None
    comparison_note: str
    flags: tuple[Flag, ...]

    @property
    def converged(self) -> bool:
        """True when every run met its optimality test."""
        return all(r.termination.get("converged") for r in self.runs)


# --------------------------------------------------------------------------- helpers


def _plain(v: Any) -> Any:
    """Numpy scalars → Python scalars; arrays → short description; mappings recursively."""
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        if v.size <= 8 and v.ndim <= 1:
            return [_plain(x) for x in v.tolist()]
        return f"array of shape {tuple(v.shape)}"
    if isinstance(v, Status):
        return v.label
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        if len(v) > 20:
            return f"{len(v)} items"
        return [_plain(x) for x in v]
    if isinstance(v, (str, int, float, bool)) or v is None:
        return v
    return repr(v)


def _scalar_items(
    d: Mapping[str, Any] | None, skip: Sequence[str] = ()
) -> tuple[tuple[str, Any], ...]:
    if not d:
        return ()
    out = []
    for k, v in d.items():
        if k in skip:
            continue
        out.append((str(k), _plain(v)))
    return tuple(out)


def _status_of(result: Any) -> Status | None:
    s = getattr(result, "status", None)
    if isinstance(s, Status):
        return s
    try:
        return Status(int(s)) if isinstance(s, (int, np.integer)) else Status.from_label(str(s))
    except (ValueError, TypeError):
        return None


def _as_mapping(obj: Any) -> Mapping[str, Any] | None:
    if obj is None:
        return None
    if isinstance(obj, Mapping):
        return obj
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        d = to_dict()
        return d if isinstance(d, Mapping) else None
    return None


def _float(v: Any) -> float | None:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f


def _fmt_num(v: Any) -> str:
    f = _float(v)
    if f is None:
        return str(v)
    if math.isnan(f):
        return "n/a"
    if f != 0 and (abs(f) < 1e-3 or abs(f) >= 1e5):
        return f"{f:.3e}"
    return f"{f:.6g}"


# --------------------------------------------------------------------------- identity


def _identity(rec: RunRecord, label: str) -> tuple[tuple[tuple[str, Any], ...], tuple]:
    man = rec.manifest or {}
    res = rec.result
    version = man.get("kktrace_version") or man.get("version")
    ident: list[tuple[str, Any]] = [
        ("run label", label),
        ("run id", rec.run_id or "not stored (in-memory run)"),
        ("created", rec.created or man.get("created") or "not recorded"),
        ("parent run", rec.parent_id or "none"),
        ("solver", res.solver),
        ("solve time (s)", _plain(res.seconds)),
        ("kktrace version at solve", version or "not recorded"),
        ("data fingerprint", rec.data.get("fingerprint") or "not recorded"),
        ("data source", rec.data.get("source") or "in-memory arrays"),
        ("training rows", _plain(rec.data.get("n_rows", rec.problem.n))),
        ("label column", rec.data.get("label_name") or "not named"),
    ]
    if rec.parent_digest:
        ident.append(("parent digest", rec.parent_digest))
    for key in ("digest", "run_digest", "format_version"):
        if key in man:
            ident.append((key.replace("_", " "), _plain(man[key])))
    env = man.get("environment")
    env_items = _scalar_items(env) if isinstance(env, Mapping) else ()
    return tuple(ident), env_items


def _command_parts(cmd: Any) -> tuple[str | None, str | None, str | None]:
    """(shell command, Python call, note) from a ``"command"`` attachment (text, list or dict)."""
    if cmd is None:
        return None, None, None
    python = note = None
    if isinstance(cmd, Mapping):
        python = cmd.get("python")
        note = cmd.get("note")
        cmd = cmd.get("text") or cmd.get("argv") or cmd.get("command")
    if isinstance(cmd, (list, tuple)):
        import shlex

        cmd = shlex.join(str(c) for c in cmd)
    return (str(cmd) if cmd else None, str(python) if python else None,
            str(note) if note else None)


def _options_for_code(options: Mapping[str, Any]) -> tuple[dict[str, Any], list[str]]:
    kept, dropped = {}, []
    for k, v in options.items():
        v = _plain(v)
        if isinstance(v, (str, int, float, bool)) or v is None:
            kept[str(k)] = v
        else:
            dropped.append(str(k))
    return kept, dropped


def _reproduce_code(rec: RunRecord) -> str:
    opts, dropped = _options_for_code(rec.result.options or {})
    opts.pop("callback", None)
    opt_text = ", ".join(f"{k}={v!r}" for k, v in opts.items())
    sep = ", " if opt_text else ""
    lines = ["# Python: repeat the solve on exactly the stored problem and compare."]
    if rec.run_id:
        lines += [
            "from solver.store import RunStore",
            "from solver.solvers import solve",
            "",
            f'record = RunStore("<store folder>").load({rec.run_id!r})',
            f"again = solve(record.problem, method={rec.result.solver!r}{sep}{opt_text})",
        ]
    else:
        desc = rec.problem.kernel.describe()
        info = rec.problem.info
        labels = info.get("labels") or {}
        lines += [
            "from solver.kernels import kernel_from_description",
            "from solver.problem import binary_classification",
            "from solver.solvers import solve",
            "",
            f"# X: the standardised training rows with fingerprint {rec.data.get('fingerprint')!r}",
            f"kernel = kernel_from_description({_plain(desc)!r})",
            f"problem = binary_classification(X, labels, kernel=kernel, C={info.get('C')!r}, "
            f"positive_label={labels.get('positive')!r})",
            f"again = solve(problem, method={rec.result.solver!r}{sep}{opt_text})",
        ]
    lines.append(f"assert again.status.label == {_status_label(rec.result)!r}")
    lines.append(f"assert again.iterations == {int(rec.result.iterations)}")
    if dropped:
        lines.append(f"# options not shown (not plain values): {', '.join(dropped)}")
    return "\n".join(lines)


def _status_label(result: Any) -> str:
    s = _status_of(result)
    return s.label if s is not None else str(getattr(result, "status", "unknown"))


# --------------------------------------------------------------------------- problem/audit


def _problem_items(rec: RunRecord) -> tuple[tuple[str, Any], ...]:
    p = rec.problem
    desc = p.describe()
    kern = desc.pop("kernel", {})
    items: list[tuple[str, Any]] = [("problem kind", p.kind), ("points (n)", p.n),
                                    ("features", int(p.X.shape[1]))]
    items.append(("kernel", kern.get("name")))
    for k, v in (kern.get("params") or {}).items():
        items.append((f"kernel {k}", _plain(v)))
    for k in ("C", "labels", "class_weight", "sample_weight", "class_counts"):
        if k in desc and desc[k] is not None:
            items.append((k, _plain(desc[k])))
    items.append(("upper bounds range", f"{_fmt_num(p.upper.min())} … {_fmt_num(p.upper.max())}"))
    std = rec.standardiser
    ident = bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    items.append(("features standardised", "no" if ident else "yes (mean 0, s.d. 1)"))
    names = rec.data.get("feature_names")
    if names:
        items.append(("feature names", ", ".join(map(str, names))))
    return tuple(items)


_PSD_KEYS = ("psd", "is_psd", "psd_verdict", "verdict")
_EIG_KEYS = ("min_eigenvalue", "smallest_eigenvalue", "lambda_min")


def _audit_indefinite(audit: Mapping[str, Any]) -> bool | None:
    """True when the audit says the kernel matrix is indefinite, None when it says nothing."""
    for k in _PSD_KEYS:
        if k in audit:
            v = audit[k]
            if isinstance(v, (bool, np.bool_)):
                return not bool(v)
            if isinstance(v, str):
                low = v.lower()
                if "indefinite" in low or "not" in low or "fail" in low or low == "no":
                    return True
                if "psd" in low or "semi" in low or "pass" in low or low in ("yes", "ok"):
                    return False
    return None


def _audit_verdict(audit: Mapping[str, Any] | None, rec: RunRecord) -> str:
    """One sentence: the PSD verdict and the smallest eigenvalue, or why there is none."""
    if not audit:
        psd = rec.problem.kernel.is_psd
        promise = {True: "positive semi-definite by construction",
                   False: "not positive semi-definite in general",
                   None: "of unknown definiteness"}[psd]
        return f"No kernel audit attached; the {rec.problem.kernel.name} kernel is {promise}."
    ind = _audit_indefinite(audit)
    eig = next((audit[k] for k in _EIG_KEYS if k in audit), None)
    tol = audit.get("psd_tol")
    scope = audit.get("psd_scope")
    word = {True: "INDEFINITE", False: "positive semi-definite", None: "not stated"}[ind]
    text = f"PSD verdict: {word}"
    if eig is not None:
        text += f"; smallest eigenvalue {_fmt_num(eig)}"
        if tol is not None:
            text += f" (tolerance −{_fmt_num(tol)})"
    if scope:
        text += f"; checked on {str(scope).replace('_', ' ')}"
    return text + "."


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
    tol = float(res.certificate.tol)

    if "violation" in cols:
        vx, vy = minmax_downsample(x, np.asarray(cols["violation"], dtype=np.float64), PLOT_POINTS)
        series["violation"] = bucket_envelope(x, cols["violation"])
        figs.append(FigureData(
            key="violation", kind="violation",
            title=f"{label}: maximal KKT violation per iteration",
            caption=("Maximal violation m(α) − M(α) before each step (log scale) against the "
                     f"tolerance {_fmt_num(tol)} (dashed); the ring marks the final certificate. "
                     f"Event marks: {_event_text(ev_counts)}. {trace.n_rows} recorded rows "
                     f"({level_note}), drawn as {vx.size} points keeping each bucket's min "
                     "and max."),
            data={"x": vx, "y": vy, "tol": tol, "final_x": float(res.iterations),
                  "final_y": float(res.certificate.max_violation), "events": ev_draw},
        ))
    final = float(res.certificate.dual_objective)
    obj = lower = None
    if "objective" in cols:  # SMO: the dual objective after each step
        obj = np.asarray(cols["objective"], dtype=np.float64)
    elif "primal_objective" in cols:
        # interior point: our dual problem is the QP solver's primal, so its primal objective
        # is our (minimised) dual objective and its dual objective a lower bound on it
        obj = np.asarray(cols["primal_objective"], dtype=np.float64)
        if "dual_objective" in cols:
            lower = np.asarray(cols["dual_objective"], dtype=np.float64)
    if obj is not None:
        ox, oyd = minmax_downsample(x, obj, PLOT_POINTS)
        dist = np.abs(obj - final)
        dx, dy = minmax_downsample(x, np.where(dist > 0, dist, np.nan), PLOT_POINTS)
        series["dual_objective"] = bucket_envelope(x, obj)
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
                     + ("; dashed: the interior-point solver's lower bound on it (its own dual "
                        "objective — our dual problem is that solver's primal)"
                        if lower is not None else "") + "."),
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
            caption=("Duality gap, relative gap and primal/dual residuals per interior-point "
                     f"iteration (absolute values, log scale); final relative gap "
                     f"{_fmt_num(res.certificate.relative_gap)}."),
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


# --------------------------------------------------------------------------- support vectors


def _categories(rec: RunRecord) -> tuple[np.ndarray, str]:
    expl = rec.attachments.get("explanation") if rec.attachments else None
    if isinstance(expl, Mapping) and "category" in expl:
        cat = np.asarray(expl["category"]).astype(str)
        if cat.shape == (rec.problem.n,):
            return cat, "explanation attachment"
    c = rec.result.certificate
    cat = np.where(c.at_lower, "non-support", np.where(c.at_upper, "bounded", "free"))
    return cat.astype(str), "certificate (α against its bounds)"


def _influential(rec: RunRecord, sel: np.ndarray | None) -> tuple[Table | None, str]:
    expl = rec.attachments.get("explanation") if rec.attachments else None
    p, res = rec.problem, rec.result
    if isinstance(expl, Mapping) and "alpha" in expl:
        alpha = np.asarray(expl["alpha"], dtype=np.float64)
        tie = (np.asarray(expl["times_selected"], np.float64) if "times_selected" in expl
               else np.zeros_like(alpha))
        order = np.lexsort((-tie, -alpha))[:N_INFLUENTIAL]
        order = order[alpha[order] > 0]
        wanted = ["row_id", "label", "category", "alpha", "alpha_ratio", "margin", "slack",
                  "kkt_residual", "times_selected", "first_nonzero_iteration",
                  "last_change_iteration", "reason"]
        cols = [c for c in wanted if c in expl]
        rows = tuple(tuple(_plain(np.asarray(expl[c])[k]) for c in cols) for k in order)
        return Table(columns=tuple(cols), rows=rows,
                     note=f"Points with the largest multipliers α (top {len(rows)}), "
                          "from the explanation attachment."), ""
    if p.n == 0:
        return None, "no training points"
    alpha = res.alpha
    # largest α first; ties (e.g. all at C) broken by how often the solver selected the point
    tie = sel if sel is not None else np.zeros(p.n)
    order = np.lexsort((-tie, -alpha))[:N_INFLUENTIAL]
    order = order[alpha[order] > p.lower[order]]
    labels = p.labels
    cats, _ = _categories(rec)
    rows = []
    for k in order:
        lab = (labels[1] if p.y[k] > 0 else labels[0]) if labels else int(p.y[k])
        ratio = alpha[k] / p.upper[k] if p.upper[k] > 0 else float("nan")
        rows.append((int(k), _plain(lab), str(cats[k]), float(alpha[k]), float(ratio),
                     float(res.certificate.kkt_residual[k]),
                     int(sel[k]) if sel is not None else None))
    return (Table(columns=("row", "label", "category", "alpha", "alpha_ratio", "kkt_residual",
                           "times_selected"), rows=tuple(rows),
                  note=f"Points with the largest multipliers α (top {len(rows)}), from the "
                       "solver result."),
            "Explanation attachment not available: reasons, margins and slacks are not shown.")


def _loo(rec: RunRecord, label: str) -> tuple[Table | None, FigureData | None, str]:
    """Leave-one-out scalars as a table and, with per-point values, a figure."""
    raw = rec.attachments.get("leave_one_out") if rec.attachments else None
    if raw is None:
        return None, None, "Leave-one-out figures not available for this run."
    loo: dict[str, Any] = dict(_as_mapping(raw) or {})
    to_columns = getattr(raw, "to_columns", None)
    if callable(to_columns):
        loo.update(to_columns())
    if not loo:
        return None, None, "Leave-one-out figures not available for this run."
    arrays = {str(k): np.asarray(v) for k, v in loo.items()
              if isinstance(v, (np.ndarray, list, tuple)) and np.asarray(v).ndim == 1
              and np.asarray(v).size > 20}
    scalars = [(str(k), _plain(v)) for k, v in loo.items()
               if str(k) not in arrays and not isinstance(v, Mapping)]
    table = Table(columns=("measure", "value"), rows=tuple(scalars),
                  note="Leave-one-out figures for this run.") if scalars else None
    fig = None
    values = arrays.get("loo_value", arrays.get("loo_values"))
    if values is not None and values.dtype.kind in "fiu":
        p = rec.problem
        rows = arrays.get("row_id", np.arange(values.size)).astype(np.float64)
        wrong = arrays.get("loo_wrong")
        wrong = (np.zeros(values.size, bool) if wrong is None else wrong.astype(bool))
        y = p.y if p.n == values.size else np.ones(values.size)
        fig = FigureData(
            key="loo", kind="loo", title=f"{label}: leave-one-out decision values",
            caption=("Signed decision value y·f₋ᵢ(xᵢ) of each training point under the model "
                     "trained without it; points below zero (marked) are leave-one-out "
                     f"errors ({int(wrong.sum())} of {values.size})."),
            data={"x": rows, "y": y * values.astype(np.float64), "wrong": wrong,
                  "xlabel": "training row (0-based)"},
        )
    return table, fig, ""


# --------------------------------------------------------------------------- held-out, map


def _confusion(hold: Mapping[str, Any], labels: tuple | None) -> Table | None:
    cm = None
    for k in ("confusion_matrix", "confusion", "matrix"):
        if k in hold:
            cm = hold[k]
            break
    if cm is None:
        return None
    lab = None
    if isinstance(cm, Mapping):
        lab = cm.get("labels")
        cm = cm.get("matrix", cm.get("counts"))
    try:
        arr = np.asarray(cm, dtype=np.int64)
    except (TypeError, ValueError):
        return None
    if arr.ndim != 2 or arr.shape[0] != arr.shape[1]:
        return None
    lab = lab or hold.get("labels") or (list(labels) if labels else list(range(arr.shape[0])))
    lab = [str(v) for v in lab][: arr.shape[0]]
    if len(lab) != arr.shape[0]:
        lab = [str(i) for i in range(arr.shape[0])]
    rows = tuple((f"actual {lab[r]}", *[int(v) for v in arr[r]]) for r in range(arr.shape[0]))
    return Table(columns=("", *[f"classified {v}" for v in lab]), rows=rows)


def _decision_map(rec: RunRecord, label: str, cats: np.ndarray) -> tuple[FigureData | None, str]:
    from ..kernels import PrecomputedKernel
    from ..model import model_from_solution

    p = rec.problem
    if isinstance(p.kernel, PrecomputedKernel):
        return None, "Decision map not available: the kernel is precomputed (no feature space)."
    if p.labels is None:
        return None, f"Decision map not available for problem kind {p.kind!r}."
    d = int(p.X.shape[1])
    if d < 2 or p.n < 3:
        return None, "Decision map not available: fewer than two features or three points."
    model = model_from_solution(p, rec.result, None)
    names = [str(v) for v in (rec.data.get("feature_names") or [])]
    std = rec.standardiser
    standardised = not bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    unit = " (standardised)" if standardised else ""
    X = p.X
    if d == 2:
        Z = X
        basis = None
        centre = np.zeros(2)
        xlabel = (names[0] if len(names) == 2 else "feature 1") + unit
        ylabel = (names[1] if len(names) == 2 else "feature 2") + unit
        how = "the two features"
    else:
        centre = X.mean(axis=0)
        _, s, vt = np.linalg.svd(X - centre, full_matrices=False)
        basis = vt[:2]
        Z = (X - centre) @ basis.T
        share = (s[:2] ** 2).sum() / max((s**2).sum(), np.finfo(float).tiny)
        xlabel, ylabel = "principal component 1", "principal component 2"
        kind = unit.strip(" ()") or "raw"
        how = (f"a 2-D projection: the first two principal components of the {kind} "
               f"training rows ({100 * share:.1f} % of the variance); regions are the "
               "classifier on the plane through the data mean spanned by these components")
    lo, hi = Z.min(axis=0), Z.max(axis=0)
    pad = 0.06 * np.maximum(hi - lo, 1e-9)
    lo, hi = lo - pad, hi + pad
    g = 90 if model.support_rows.size <= 4000 else 60
    gx = np.linspace(lo[0], hi[0], g)
    gy = np.linspace(lo[1], hi[1], g)
    GX, GY = np.meshgrid(gx, gy)
    plane = np.column_stack((GX.ravel(), GY.ravel()))
    pts = plane if basis is None else centre + plane @ basis
    vals = model.values(pts, standardised=True).reshape(g, g)
    idx = np.arange(p.n)
    sampled = ""
    if p.n > MAP_POINTS:
        idx = np.sort(np.random.default_rng(0).choice(p.n, size=MAP_POINTS, replace=False))
        sampled = f" {MAP_POINTS} of {p.n} points drawn (seeded sample, seed 0)."
    neg, pos = p.labels
    return FigureData(
        key="decision_map", kind="regions", title=f"{label}: decision regions",
        caption=(f"Classifier regions over {how}. Shaded: classified {pos} (f > 0) or {neg}; "
                 "solid line f = 0, dotted lines f = ±1. Points are marked by their final "
                 f"category and coloured by label.{sampled}"),
        data={"gx": gx, "gy": gy, "values": vals, "z": Z[idx], "y": p.y[idx],
              "category": cats[idx], "xlabel": xlabel, "ylabel": ylabel,
              "labels": (str(neg), str(pos))},
    ), ""


# --------------------------------------------------------------------------- flags


def _run_flags(rec: RunRecord, label: str, term: Mapping[str, Any], audit: Mapping | None,
               facts: Mapping[str, Any]) -> list[Flag]:
    flags: list[Flag] = []
    status = term["status"]
    if not term["converged"]:
        flags.append(Flag("not_converged", "stop",
                          f"{label} did not converge: status {status} — {term['message']}. "
                          "Its multipliers are not an optimal solution.", label))
    elif not term.get("meets_tol", True):
        flags.append(Flag("tolerance_not_met", "stop",
                          f"{label} reports convergence but its certificate's maximal violation "
                          f"{_fmt_num(term['max_violation'])} exceeds tol "
                          f"{_fmt_num(term['tol'])}.", label))
    if audit:
        ind = _audit_indefinite(audit)
        eig = next((audit[k] for k in _EIG_KEYS if k in audit), None)
        if ind:
            flags.append(Flag("indefinite_kernel", "caution",
                              f"{label}: the kernel audit finds the kernel matrix indefinite"
                              + (f" (smallest eigenvalue {_fmt_num(eig)})" if eig is not None
                                 else "") + "; the dual may be non-convex.", label))
    else:
        psd = rec.problem.kernel.is_psd
        if psd is False:
            flags.append(Flag("indefinite_kernel", "caution",
                              f"{label}: the {rec.problem.kernel.name} kernel is not positive "
                              "semi-definite in general and no kernel audit is attached.", label))
    ev = facts.get("event_counts", {})
    curv = sum(v for k, v in ev.items() if "curvature" in k)
    if curv:
        psd_known = audit is not None and _audit_indefinite(audit) is False
        flags.append(Flag("curvature_fixes", "note" if psd_known else "caution",
                          f"{label}: {curv} working-set pair(s) had non-positive curvature "
                          "K_ii + K_jj − 2K_ij and were regularised; this happens for duplicate "
                          "points" + (" (the kernel audit found the kernel PSD)." if psd_known
                                      else " or an indefinite kernel."), label))
    std = rec.standardiser
    standardised = not bool(np.all(std.centre == 0) and np.all(std.scale == 1))
    for w in rec.data.get("warnings") or ():
        low = str(w).lower()
        if "duplicate" in low or "identical features" in low:
            code, sev, tail = "conflicting_duplicates", "caution", ""
        elif "scale" in low:
            code = "unscaled_features"
            sev, tail = (("note", " (the run standardised the features before solving)")
                         if standardised else ("caution", ""))
        elif "constant" in low:
            code, sev, tail = "constant_feature", "caution", ""
        else:
            code, sev, tail = "data_warning", "caution", ""
        flags.append(Flag(code, sev, f"{label}: data warning — {w}{tail}", label))
    if (not standardised
            and rec.problem.kernel.name in ("rbf", "poly", "sigmoid", "linear")
            and rec.problem.X.shape[1] > 1
            and not any(f.code == "unscaled_features" for f in flags)):
        sd = rec.problem.X.std(axis=0)
        sd = sd[sd > 0]
        if sd.size > 1 and sd.max() / sd.min() > SCALE_RATIO:
            flags.append(Flag("unscaled_features", "caution",
                              f"{label}: features were not standardised and their spreads differ "
                              f"by a factor of {sd.max() / sd.min():.3g} (> {SCALE_RATIO:g}).",
                              label))
    n_sv, n_b = int(term.get("n_support") or 0), int(term.get("n_bounded") or 0)
    if n_sv and n_b / n_sv >= BOUNDED_SHARE:
        flags.append(Flag("many_bounded", "caution",
                          f"{label}: {n_b} of {n_sv} support vectors sit at the upper bound C "
                          f"(≥ {BOUNDED_SHARE:.0%}); the penalty C may be too small.", label))
    rep = facts.get("replay")
    if rep is not None and not rep["reproduced"]:
        flags.append(Flag("replay_mismatch", "caution",
                          f"{label}: replaying the trace does not give the final multipliers "
                          f"(largest difference {_fmt_num(rep['max_abs_difference'])}).", label))
    return flags


#: Verdicts that mean the two solvers agree (strictly / within the loose tolerances).
AGREE_VERDICTS = ("agree",)
LOOSE_VERDICTS = ("agree_within_tolerances",)


def _comparison(comp: Any) -> tuple[dict[str, Any] | None, list[Flag]]:
    """Plain comparison record (verdict, every measure with its tolerances) and its flags."""
    d = _as_mapping(comp)
    if not d:
        return None, []
    measures_in = d.get("measures") or {}
    tols = d.get("tolerances") or {}
    loose = d.get("loose_tolerances") or {}
    failed = {str(f) for f in (d.get("failed") or [])}
    if isinstance(measures_in, Mapping):
        items = list(measures_in.items())
    else:
        items = [(m.get("name"), m) for m in measures_in if isinstance(m, Mapping)]
    rows = []
    for name, m in items:
        name = str(name)
        if isinstance(m, Mapping):
            row = {"name": name, "value": _plain(m.get("value")),
                   "rule": m.get("rule"),
                   "tolerance": _plain(m.get("tolerance", tols.get(name))),
                   "loose_tolerance": _plain(m.get("loose_tolerance", loose.get(name))),
                   "passed": m.get("passed"), "passed_loose": m.get("passed_loose"),
                   "waived": m.get("waived")}
        else:
            row = {"name": name, "value": _plain(m), "rule": None,
                   "tolerance": _plain(tols.get(name)), "loose_tolerance": _plain(loose.get(name)),
                   "passed": None, "passed_loose": None, "waived": None}
        if row["passed"] is None and "failed" in d:
            row["passed"] = name not in failed
        for k in ("passed", "passed_loose"):
            row[k] = None if row[k] is None else bool(row[k])
        rows.append(row)
    for name, tol in tols.items():
        if not any(r["name"] == str(name) for r in rows):
            rows.append({"name": str(name), "value": None, "rule": None, "tolerance": _plain(tol),
                         "loose_tolerance": _plain(loose.get(name)),
                         "passed": (str(name) not in failed) if "failed" in d else None,
                         "passed_loose": None, "waived": None})
    verdict = str(d.get("verdict", "not stated"))
    extra = {str(k): _plain(v) for k, v in d.items()
             if k not in ("verdict", "measures", "tolerances", "loose_tolerances", "failed",
                          "settings", "runs", "verdict_text", "failures")
             and not isinstance(v, Mapping)
             and not (isinstance(v, (list, tuple, np.ndarray)) and len(v) == 0)}
    out = {"verdict": verdict, "verdict_text": str(d.get("verdict_text") or ""),
           "measures": rows, "failed": sorted(failed), "extra": extra}
    flags = []
    if verdict in AGREE_VERDICTS and not failed:
        pass
    elif verdict in LOOSE_VERDICTS:
        flags.append(Flag("solvers_agree_loosely", "note",
                          f"Challenger comparison verdict: {verdict} — the solvers agree only "
                          "within the loose tolerances"
                          + (f" (strict tolerance missed: {', '.join(sorted(failed))})"
                             if failed else "") + "."))
    else:
        flags.append(Flag("solvers_disagree", "stop",
                          f"Challenger comparison verdict: {verdict}"
                          + (f"; measures outside tolerance: {', '.join(sorted(failed))}"
                             if failed else "") + "."))
    return out, flags


# --------------------------------------------------------------------------- main


def _run_content(rec: RunRecord, label: str, holdout: Mapping | None) -> RunContent:
    res = rec.result
    cert = res.certificate
    status = _status_of(res)
    cd = cert.to_dict()
    term: dict[str, Any] = {
        "status": status.label if status is not None else str(res.status),
        "message": str(res.message),
        "converged": status == Status.CONVERGED,
        "iterations": int(res.iterations),
        "seconds": float(res.seconds),
        **{k: _plain(v) for k, v in cd.items()},
    }
    ident, env = _identity(rec, label)
    cats, cat_src = _categories(rec)
    figs, fig_notes, facts, series = _trace_figures(rec, label, cats)
    if "replay" in facts:
        term["replay_reproduced"] = facts["replay"]["reproduced"]
        term["replay_max_difference"] = facts["replay"]["max_abs_difference"]
    term["events"] = facts.get("event_counts", {})
    att = rec.attachments or {}
    audit = _as_mapping(att.get("audit"))
    sel = None
    tr = res.trace
    if tr is not None and tr.level == "full" and "i" in tr.columns and rec.problem.n:
        sel = (np.bincount(np.asarray(tr.columns["i"], np.int64), minlength=rec.problem.n)
               + np.bincount(np.asarray(tr.columns["j"], np.int64), minlength=rec.problem.n))
    infl, infl_note = _influential(rec, sel)
    loo_table, loo_fig, loo_note = _loo(rec, label)
    hold = _as_mapping(holdout) if holdout is not None else _as_mapping(att.get("holdout"))
    confusion = _confusion(hold, rec.problem.labels) if hold else None
    try:
        dmap, dnote = _decision_map(rec, label, cats)
    except Exception as exc:  # noqa: BLE001 - a map failure must not lose the report
        dmap, dnote = None, f"Decision map not available: {type(exc).__name__}: {exc}"
    flags = _run_flags(rec, label, term, audit, facts)
    cmd_text, cmd_py, cmd_note = _command_parts(att.get("command"))
    uniq, counts = np.unique(cats, return_counts=True)
    data_facts = {
        "fingerprint": rec.data.get("fingerprint"), "source": rec.data.get("source"),
        "n_rows": _plain(rec.data.get("n_rows", rec.problem.n)),
        "feature_names": [str(v) for v in (rec.data.get("feature_names") or [])],
        "label_name": rec.data.get("label_name"),
    }
    return RunContent(
        label=label, run_id=rec.run_id, solver=str(res.solver), identity=ident,
        environment=env, reproduce_command=cmd_text, reproduce_python=cmd_py,
        reproduce_note=cmd_note,
        reproduce_code=_reproduce_code(rec), problem=_problem_items(rec),
        options=_scalar_items(res.options, skip=("callback",)),
        audit=_scalar_items(audit) if audit else None,
        audit_verdict=_audit_verdict(audit, rec),
        data_warnings=tuple(str(w) for w in (rec.data.get("warnings") or ())),
        termination=term, figures=tuple(figs), figure_notes=tuple(fig_notes),
        categories={str(k): int(v) for k, v in zip(uniq, counts, strict=True)},
        categories_source=cat_src,
        influential=infl, influential_note=infl_note, loo=loo_table, loo_figure=loo_fig,
        loo_note=loo_note, holdout={k: _plain(v) for k, v in hold.items()} if hold else None,
        confusion=confusion, decision_map=dmap, decision_note=dnote, flags=tuple(flags),
        series=series, data_facts=data_facts,
    )


def build_report_content(
    runs: Sequence[RunRecord],
    *,
    comparison: Any | Mapping | None = None,
    holdout: Mapping | None = None,
    notes: str | None = None,
    title: str | None = None,
    generated: str | None = None,
) -> ReportContent:
    """Collect the report for ``runs`` (one or more stored runs) as plain data.

    comparison : a :class:`solver.compare.Comparison` or its ``to_dict()``; default the first
        ``"comparison"`` attachment found on the runs.
    holdout : held-out scores for the first run (default: each run's ``"holdout"`` attachment).
    notes : free text from the person preparing the report (shown escaped).
    generated : ISO time stamp to print (default now, UTC).
    """
    from .. import __version__
    from ..errors import InvalidInputError

    runs = list(runs)
    if not runs:
        raise InvalidInputError("a report needs at least one run")
    for k, r in enumerate(runs):
        if not isinstance(r, RunRecord):
            raise InvalidInputError(f"report input {k} is a {type(r).__name__}, not a RunRecord")
    letters = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    contents = []
    for k, rec in enumerate(runs):
        label = f"run {letters[k]}" if k < len(letters) else f"run {k + 1}"
        contents.append(_run_content(rec, label, holdout if k == 0 else None))
    comp_src = comparison
    if comp_src is None:
        comp_src = next((r.attachments.get("comparison") for r in runs
                         if r.attachments and r.attachments.get("comparison") is not None), None)
    comp, comp_flags = _comparison(comp_src)
    comp_note = "" if comp else ("Challenger comparison not available: no second solver's run "
                                 "was compared with this one.")
    flags = [f for rc in contents for f in rc.flags] + comp_flags
    flags.sort(key=lambda f: SEVERITIES.index(f.severity))
    if title is None:
        first = runs[0].run_id or "unsaved run"
        more = f" and {len(runs) - 1} further run(s)" if len(runs) > 1 else ""
        title = f"Convergence and audit record — {first}{more}"
    return ReportContent(
        title=title,
        generated=generated or datetime.now(timezone.utc).isoformat(timespec="seconds"),
        kktrace_version=__version__, caution=CAUTION, notes=notes, runs=tuple(contents),
        comparison=comp, comparison_note=comp_note, flags=tuple(flags),
    )
