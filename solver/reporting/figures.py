"""Drawing: :class:`~.content.FigureData` → matplotlib figures → inline SVG or PDF pages.

Uses only ``matplotlib.figure.Figure`` (no pyplot, no global style change): every drawing
runs inside :func:`style`, a local rc context with the kktrace look — warm paper, dotted
grid, left-aligned titles and our own palette (:data:`PALETTE`).  Text taken from the
user's data (feature names, label values, categories) passes through :func:`plain_text`
so that matplotlib does not interpret ``$`` as mathematics; matplotlib's SVG writer escapes
``<``, ``>`` and ``&`` itself (checked in the tests).
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from typing import Any

import matplotlib
import numpy as np
from cycler import cycler
from matplotlib.figure import Figure, SubFigure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from ..vocabulary import SUPERSCRIPT_DIGITS, category_label, figure_text
from .content import FigureData

__all__ = ["PALETTE", "style", "plain_text", "draw", "render_figure", "figure_svg", "svg_text"]

#: The report palette (names are ours).  Ink and paper are for text and background.
PALETTE: dict[str, str] = {
    "ink": "#1d2a33",
    "paper": "#fffdf7",
    "grid": "#d9d2c1",
    "muted": "#7d8489",
    "tide": "#1f6f78",
    "rust": "#b0472a",
    "mustard": "#c8961e",
    "heather": "#6b5b95",
    "pine": "#3f7a4a",
    "oxblood": "#8e1f2f",
    "tint_neg": "#dcebec",
    "tint_pos": "#f5e1d8",
}
LINE_COLOURS = ("tide", "rust", "heather", "mustard", "pine", "oxblood")
CLASS_COLOURS = ("tide", "rust")  # label mapped to −1, label mapped to +1
EVENT_COLOURS = {"shrink": "mustard", "reconstruct": "heather", "curvature_fix": "oxblood"}

_STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 8.0,
    "text.color": PALETTE["ink"],
    "axes.labelcolor": PALETTE["ink"],
    "axes.edgecolor": PALETTE["ink"],
    "axes.linewidth": 0.6,
    "axes.facecolor": PALETTE["paper"],
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "axes.titlesize": 8.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 4.0,
    "axes.prop_cycle": cycler(color=[PALETTE[c] for c in LINE_COLOURS]),
    "grid.color": PALETTE["grid"],
    "grid.linewidth": 0.5,
    "grid.linestyle": (0, (1, 2)),
    "xtick.color": PALETTE["ink"],
    "ytick.color": PALETTE["ink"],
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0,
    "legend.frameon": False,
    "legend.fontsize": 7.0,
    "legend.handlelength": 1.6,
    "lines.linewidth": 1.0,
    "figure.facecolor": PALETTE["paper"],
    "savefig.facecolor": PALETTE["paper"],
    "svg.fonttype": "none",
    "svg.hashsalt": "kktrace-report",
    "pdf.fonttype": 42,
    "path.simplify": True,
}

#: The unit of every fixed axis label the figures print (audited by a test: a new label
#: needs its entry).  Counts and dimensionless quantities of the dual problem carry no unit
#: on the axis; a label holding a physical unit says it in brackets, e.g. "(s)".
AXIS_UNITS: dict[str, str] = {
    "iteration": "count (solver iterations)",
    "m(α) − M(α)": "dimensionless (the KKT violation of the scaled dual)",
    "objective": "dimensionless (dual objective D)",
    "above final": "dimensionless (D − D_final)",
    "duality gap and residuals": "dimensionless",
    "points": "count (training points)",
    "α": "dimensionless (Lagrange multiplier, 0 ≤ α ≤ C)",
    "points ranked by selections": "rank (count)",
    "times selected": "count",
    "y · f₋ᵢ(xᵢ)": "dimensionless (decision value times label)",
    "left-out point": "rank (count)",
    "rows": "count (training rows)",
    "training rows": "count (training rows)",
    "decision value f(x)": "dimensionless (decision value)",
    "g(x) = Σ αⱼ K(xⱼ, x)": "dimensionless (kernel sum)",
    "share of training rows": "share (0 to 1)",
    "best violation so far": "dimensionless (KKT violation)",
    "(D − D*) / max(1, |D*|)": "dimensionless (relative objective gap)",
    "time (s), estimated at each run's average rate": "s",
    "index (0-based training row)": "row number (data row = index + 1)",
    "share correct": "share (0 to 1)",
    "top class probability": "probability (0 to 1)",
}
#: Labels made from the data: a feature or target column keeps that column's own unit;
#: principal components of standardised features are in standard deviations.
AXIS_UNIT_PATTERNS: tuple[tuple[str, str], ...] = (
    (r"^.+ \(standardised\)$", "standard deviations of the training columns"),
    (r"^.+ \((actual|fitted)\)$", "the target column's own unit"),
    (r"^residual .+$", "the target column's own unit"),
    (r"^share .+$", "share (0 to 1)"),
    (r"^predicted P\(.+\)$", "probability (0 to 1)"),
    (r"^P\(.+ \| f\)$", "probability (0 to 1)"),
)


def axis_unit(label: str, columns: Sequence[str] = ()) -> str | None:
    """The unit statement of an axis label (:data:`AXIS_UNITS`, then the data-derived
    :data:`AXIS_UNIT_PATTERNS`; a bare column name of ``columns`` or a principal component
    of raw columns keeps the data's own unit); None for a label nobody has given a unit."""
    import re

    if label in AXIS_UNITS:
        return AXIS_UNITS[label]
    if label in columns or re.match(r"^principal component \d+$", label):
        return "the data columns' own unit"
    for pattern, unit in AXIS_UNIT_PATTERNS:
        if re.match(pattern, label):
            return unit
    return None


#: Size of one figure in the HTML report, inches.
FIG_SIZE = (6.4, 2.7)
FIG_SIZE_TALL = (6.4, 3.6)
MAP_SIZE = (5.2, 4.4)


@contextmanager
def style() -> Iterator[None]:
    """The kktrace drawing style, as a local rc context."""
    with matplotlib.rc_context(_STYLE):
        yield


def plain_text(s: Any, limit: int = 60) -> str:
    """User text made safe for matplotlib: ``$`` escaped (no mathtext), long text shortened."""
    t = str(s)
    if len(t) > limit:
        t = t[: limit - 1] + "…"
    return t.replace("$", r"\$")


def _c(name: str) -> str:
    return PALETTE[name]




def _pow10(v: float, _pos: int) -> str:
    """Tick label 10ⁿ with Unicode superscripts (no mathtext parsing, which is slow)."""
    if not v > 0:
        return ""
    e = np.log10(v)
    r = int(round(e))
    return f"10{str(r).translate(SUPERSCRIPT_DIGITS)}" if abs(e - r) < 1e-9 else ""


def _count(v: float, _pos: int) -> str:
    """Tick label for counts and iterations: integers with thin-space thousands."""
    if abs(v - round(v)) > 1e-9:
        return f"{v:g}".replace("-", "−")
    return f"{int(round(v)):,}".replace(",", "\u2009").replace("-", "−")


def _num(v: float, _pos: int) -> str:
    """Tick label for a real value: 3 significant digits, ×10ⁿ for large or small values."""
    if v == 0:
        return "0"
    text = f"{v:.3g}"
    if "e" in text:
        m, e = text.split("e")
        text = f"{m}×10{str(int(e)).translate(SUPERSCRIPT_DIGITS)}"
    return text.replace("-", "−")


def _log_y(ax: Any) -> None:
    ax.set_yscale("log")
    ax.yaxis.set_major_locator(LogLocator(base=10.0, numticks=7))
    ax.yaxis.set_major_formatter(FuncFormatter(_pow10))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _iter_x(ax: Any, label: str = "iteration") -> None:
    ax.xaxis.set_major_formatter(FuncFormatter(_count))
    ax.set_xlabel(label)


def _with_rug(fig: Figure | SubFigure, events: Mapping[str, np.ndarray]) -> tuple[Any, Any]:
    """Main axes plus, when there are events, a thin strip below it with one row of ticks
    per event kind (shrink, reconstruct, curvature fix ...) on the shared iteration axis."""
    kinds = sorted(k for k, v in events.items() if len(v))
    if not kinds:
        return _axes(fig), None
    gs = fig.add_gridspec(2, 1, height_ratios=[1.0, 0.05 + 0.07 * len(kinds)], hspace=0.06,
                          **_margins(fig))
    ax = fig.add_subplot(gs[0])
    rug = fig.add_subplot(gs[1], sharex=ax)
    ax.tick_params(labelbottom=False)
    for row, name in enumerate(kinds):
        colour = _c(EVENT_COLOURS.get(name, "muted"))
        rug.vlines(events[name], row + 0.15, row + 0.85, colors=colour, linewidth=0.7)
    rug.set_ylim(0, len(kinds))
    rug.set_yticks(np.arange(len(kinds)) + 0.5, labels=[plain_text(k, 20) for k in kinds])
    rug.tick_params(axis="y", length=0, labelsize=6.5)
    rug.grid(False)
    rug.spines["left"].set_visible(False)
    return ax, rug


def _margins(fig: Figure | SubFigure, **over: float) -> dict[str, float]:
    """Fixed axes margins as figure fractions (cheaper than a layout engine): room for tick
    labels on the left, the axis label below and a one-line legend above."""
    w, h = _size(fig)
    m = {"left": min(0.2, 0.75 / w), "right": 0.98, "bottom": min(0.3, 0.45 / h),
         "top": 1.0 - min(0.25, 0.36 / h)}
    m.update(over)
    return m


def _size(fig: Figure | SubFigure) -> tuple[float, float]:
    """Width and height in inches of a figure or sub-figure."""
    bb = fig.bbox
    dpi = fig.figure.dpi
    return bb.width / dpi, bb.height / dpi


def _axes(fig: Figure | SubFigure, **over: float) -> Any:
    """One axes placed with :func:`_margins` (ignored when a layout engine is active)."""
    gs = fig.add_gridspec(1, 1, **_margins(fig, **over))
    return fig.add_subplot(gs[0])


def _legend_above(ax: Any, handles: list) -> None:
    """Legend in one band above the axes, left-aligned, so it never covers data."""
    if handles:
        ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.01),
                  ncol=min(len(handles), 4), borderaxespad=0.0, columnspacing=1.2)


def _draw_violation(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax, rug = _with_rug(fig, d.get("events") or {})
    y = np.asarray(d["y"], dtype=np.float64)
    x = np.asarray(d["x"], dtype=np.float64)
    pos = y > 0
    ax.plot(x[pos], y[pos], color=_c("tide"), linewidth=0.8, label="maximal violation")
    ax.axhline(d["kkt_tol"], color=_c("rust"), linestyle=(0, (5, 3)), linewidth=1.0,
               label=f"kkt_tol = {figure_text(float(d['kkt_tol']))}")
    fy = d["final_y"] if d["final_y"] > 0 else (y[pos].min() if pos.any() else d["kkt_tol"]) * 0.5
    ax.plot([d["final_x"]], [fy], marker="o", markersize=6, markerfacecolor="none",
            markeredgecolor=_c("ink"), linestyle="none", label="final certificate")
    _log_y(ax)
    _iter_x(rug if rug is not None else ax)
    ax.set_ylabel("m(α) − M(α)")
    _legend_above(ax, ax.get_legend_handles_labels()[0])


def _draw_objective(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    gs = fig.add_gridspec(2, 1, height_ratios=[1.3, 1.0], hspace=0.08, **_margins(fig, top=0.9))
    top = fig.add_subplot(gs[0])
    bottom = fig.add_subplot(gs[1], sharex=top)
    top.tick_params(labelbottom=False)
    top.plot(d["x"], d["y"], color=_c("tide"), label="dual objective")
    if "lower_x" in d:
        top.plot(d["lower_x"], d["lower_y"], color=_c("rust"), linestyle=(0, (4, 2)),
                 label="lower bound (interior-point dual)")
    top.axhline(d["final"], color=_c("muted"), linewidth=0.6, linestyle=(0, (1, 1)))
    top.yaxis.set_major_formatter(FuncFormatter(_num))
    top.set_ylabel("objective")
    _legend_above(top, top.get_legend_handles_labels()[0])
    dx, dy = np.asarray(d["dist_x"]), np.asarray(d["dist_y"])
    if dy.size and np.any(dy > 0):
        bottom.plot(dx[dy > 0], dy[dy > 0], color=_c("heather"), linewidth=0.8)
        _log_y(bottom)
    else:
        bottom.text(0.5, 0.5, "objective equal to its final value throughout",
                    transform=bottom.transAxes, ha="center", va="center", color=_c("muted"))
    bottom.set_ylabel("above final")
    _iter_x(bottom)


def _draw_gap(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig)
    styles = {"gap": ("tide", "-"), "relative_gap": ("rust", "-"),
              "primal_residual": ("heather", (0, (4, 2))), "dual_residual": ("pine", (0, (1, 1.5)))}
    for name, (x, y) in d["lines"].items():
        y = np.asarray(y)
        ok = y > 0
        colour, ls = styles.get(name, ("muted", "-"))
        ax.plot(np.asarray(x)[ok], y[ok], color=_c(colour), linestyle=ls, marker=".",
                markersize=3, label=name.replace("_", " "))
    _log_y(ax)
    _iter_x(ax)
    ax.set_ylabel("duality gap and residuals")
    _legend_above(ax, ax.get_legend_handles_labels()[0])


def _draw_sets(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax, rug = _with_rug(fig, d.get("events") or {})
    if "support" in d:
        x, y = d["support"]
        ax.step(x, y, where="post", color=_c("tide"), label="support set (α > lower bound)")
    if "bounded" in d:
        x, y = d["bounded"]
        ax.step(x, y, where="post", color=_c("mustard"), linestyle=(0, (1, 1.5)),
                label="held at upper bound")
    if "active" in d:
        x, y = d["active"]
        ax.step(x, y, where="post", color=_c("rust"), linestyle=(0, (4, 2)),
                label="active set (not shrunk)")
    _iter_x(rug if rug is not None else ax)
    ax.yaxis.set_major_formatter(FuncFormatter(_count))
    ax.set_ylabel("points")
    ax.set_ylim(bottom=0)
    _legend_above(ax, ax.get_legend_handles_labels()[0])


def _draw_trajectories(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, right=0.84)
    for k, line in enumerate(d["lines"]):
        colour = _c(LINE_COLOURS[k % len(LINE_COLOURS)])
        ax.step(line["x"], line["y"], where="post", color=colour, linewidth=0.9,
                label=f"row {line['row']}")
        ax.axhline(line["upper"], color=colour, linewidth=0.6, linestyle=(0, (1, 2)))
    _iter_x(ax)
    ax.yaxis.set_major_formatter(FuncFormatter(_num))
    ax.set_ylabel("α")
    ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5))


def _category_marker(cat: str, k: int) -> tuple[str, bool, float]:
    """(marker, filled, size) for a category name; unknown names get further shapes."""
    kind = _category_kind(cat)
    if kind == "bounded":
        return "s", False, 22.0
    if kind == "wrong":
        return "X", True, 24.0
    if kind == "zero":
        return "o", True, 5.0
    if kind == "free":
        return "D", True, 18.0
    return ("^", "v", "P", "X", "h")[k % 5], True, 18.0


def _category_kind(cat: str) -> str:
    """Coarse kind of a category name: wrong (misclassified), bounded, zero, free or other."""
    low = cat.lower()
    if "misclass" in low or "wrong" in low:
        return "wrong"
    if "bound" in low or "upper" in low or "clip" in low:
        return "bounded"
    if "non" in low or "zero" in low or "inactive" in low or "lower" in low:
        return "zero"
    if "free" in low or "margin" in low:
        return "free"
    return "other"


CATEGORY_COLOURS = {"bounded": "mustard", "wrong": "oxblood", "zero": "muted", "free": "pine",
                    "other": "heather"}


def _draw_selection(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig)
    rank, count = np.asarray(d["rank"]), np.asarray(d["count"])
    cats = d.get("category")
    ok = count > 0
    if cats is None:
        ax.plot(rank[ok], count[ok], color=_c("tide"), marker=".", markersize=2, linestyle="none")
    else:
        cats = np.asarray(cats).astype(str)
        for k, cat in enumerate(sorted(set(cats.tolist()))):
            sel = ok & (cats == cat)
            if not sel.any():
                continue
            marker, filled, size = _category_marker(cat, k)
            colour = _c(CATEGORY_COLOURS[_category_kind(cat)])
            ax.scatter(rank[sel], count[sel], s=size * 0.6, marker=marker,
                       facecolors=colour if filled else "none", edgecolors=colour,
                       linewidths=0.6, label=plain_text(category_label(cat), 40))
        _legend_above(ax, ax.get_legend_handles_labels()[0])
    if np.any(ok):
        _log_y(ax)
    _iter_x(ax, "points ranked by selections")
    ax.set_ylabel("times selected")


def _draw_regions(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, right=0.7, top=0.96)
    ax.grid(False)
    v = np.asarray(d["values"])
    gx, gy = np.asarray(d["gx"]), np.asarray(d["gy"])
    big = float(np.max(np.abs(v))) + 1.0 if v.size else 1.0
    ax.contourf(gx, gy, v, levels=[-big, 0.0, big], colors=[_c("tint_neg"), _c("tint_pos")])
    if v.min() < 0 < v.max():
        ax.contour(gx, gy, v, levels=[0.0], colors=[_c("ink")], linewidths=1.1)
    lv = [lvl for lvl in (-1.0, 1.0) if v.min() < lvl < v.max()]
    if lv:
        ax.contour(gx, gy, v, levels=lv, colors=[_c("muted")], linewidths=0.7,
                   linestyles=[(0, (1, 2))])
    z, y = np.asarray(d["z"]), np.asarray(d["y"])
    cats = np.asarray(d["category"]).astype(str)
    handles = []
    for k, cat in enumerate(sorted(set(cats.tolist()))):
        marker, filled, size = _category_marker(cat, k)
        for s, cname in ((-1.0, CLASS_COLOURS[0]), (1.0, CLASS_COLOURS[1])):
            sel = (cats == cat) & (y == s)
            if not sel.any():
                continue
            colour = _c(cname)
            ax.scatter(z[sel, 0], z[sel, 1], s=size, marker=marker,
                       facecolors=colour if filled else "none", edgecolors=colour,
                       linewidths=0.8 if not filled else 0.3, zorder=3)
        handles.append(Line2D([], [], marker=marker, linestyle="none", color=_c("ink"),
                              markerfacecolor=_c("ink") if filled else "none",
                              markersize=4 if size < 10 else 5,
                              label=plain_text(category_label(cat), 40)))
    neg, pos = d["labels"]
    handles.append(Line2D([], [], marker="o", linestyle="none", color=_c(CLASS_COLOURS[0]),
                          markersize=5, label=f"label {plain_text(neg, 30)}"))
    handles.append(Line2D([], [], marker="o", linestyle="none", color=_c(CLASS_COLOURS[1]),
                          markersize=5, label=f"label {plain_text(pos, 30)}"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    ax.set_xlabel(plain_text(d["xlabel"]))
    ax.set_ylabel(plain_text(d["ylabel"]))


def _draw_loo(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig)
    x, y = np.asarray(d["x"]), np.asarray(d["y"])
    wrong = np.asarray(d["wrong"], dtype=bool)
    ax.axhline(0.0, color=_c("ink"), linewidth=0.7)
    ax.axhline(1.0, color=_c("muted"), linewidth=0.6, linestyle=(0, (1, 2)))
    ax.scatter(x[~wrong], y[~wrong], s=5, color=_c("tide"), label="kept its side")
    ax.scatter(x[wrong], y[wrong], s=22, marker="x", color=_c("rust"), linewidths=0.9,
               label="leave-one-out error")
    ax.set_xlabel(plain_text(d.get("xlabel", "left-out point")))
    ax.set_ylabel("y · f₋ᵢ(xᵢ)")
    _legend_above(ax, ax.get_legend_handles_labels()[0])


def _draw_reliability(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    """Reliability diagram: observed share against mean probability per bin, and below it
    the rows in each bin."""
    gs = fig.add_gridspec(2, 1, height_ratios=[1.0, 0.38], hspace=0.1, **_margins(fig))
    ax = fig.add_subplot(gs[0])
    bars = fig.add_subplot(gs[1], sharex=ax)
    ax.tick_params(labelbottom=False)
    ax.plot([0, 1], [0, 1], color=_c("muted"), linewidth=0.7, linestyle=(0, (4, 2)),
            label="perfect calibration")
    ax.plot(d["mean"], d["observed"], color=_c("tide"), marker="o", markersize=4,
            label="bins with rows")
    for x, y, n in zip(d["mean"], d["observed"], d["occupied_rows"], strict=True):
        ax.annotate(f"{n}", (x, y), textcoords="offset points", xytext=(4, -9), fontsize=6,
                    color=_c("muted"))
    ax.set_xlim(0, 1)
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel(plain_text(d.get("ylabel") or f"share {d['positive']}", 30))
    _legend_above(ax, ax.get_legend_handles_labels()[0])
    low, high = np.asarray(d["low"]), np.asarray(d["high"])
    bars.bar(low, d["rows"], width=high - low, align="edge", color=_c("tint_neg"),
             edgecolor=_c("tide"), linewidth=0.5)
    bars.set_ylabel("rows")
    bars.yaxis.set_major_formatter(FuncFormatter(_count))
    bars.set_xlabel(plain_text(d.get("xlabel") or f"predicted P({d['positive']})", 40))


def _draw_sigmoid(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    """The fitted sigmoid over the decision values, the rows as ticks by class, and the
    band between f = 0 and the sigmoid's midpoint."""
    ax = _axes(fig)
    f = np.asarray(d["values"], dtype=np.float64)
    pos = np.asarray(d["positive"], dtype=bool)
    c = d["crossover"]
    if c is not None and np.isfinite(c):
        ax.axvspan(min(0.0, c), max(0.0, c), color=_c("tint_pos"), linewidth=0,
                   label="class by f and by P differ")
    ax.axvline(0.0, color=_c("ink"), linewidth=0.6)
    ax.axhline(0.5, color=_c("muted"), linewidth=0.5, linestyle=(0, (1, 2)))
    ax.plot(d["grid"], d["p"], color=_c("tide"), linewidth=1.2, label="fitted sigmoid")
    ax.plot(f[pos], np.full(int(pos.sum()), 1.03), linestyle="none", marker="|",
            markersize=5, color=_c("rust"), alpha=0.6,
            label=plain_text(f"rows of {d['positive_label']}", 30))
    ax.plot(f[~pos], np.full(int((~pos).sum()), -0.03), linestyle="none", marker="|",
            markersize=5, color=_c("tide"), alpha=0.6,
            label=plain_text(f"rows of {d['negative_label']}", 30))
    ax.set_ylim(-0.08, 1.08)
    ax.set_xlabel("decision value f(x)")
    ax.set_ylabel(plain_text(f"P({d['positive_label']} | f)", 30))
    ax.xaxis.set_major_formatter(FuncFormatter(_num))
    _legend_above(ax, ax.get_legend_handles_labels()[0])


#: Markers of the task sections' row categories (matched on the display words' start).
_TASK_MARKS = (("inside", "muted", "o", True, 5.0), ("interior", "muted", "o", True, 5.0),
               ("on the", "pine", "D", True, 16.0), ("outside", "mustard", "s", False, 20.0))


def _task_mark(cat: str) -> tuple[str, str, bool, float]:
    for start, colour, marker, filled, size in _TASK_MARKS:
        if cat.startswith(start):
            return colour, marker, filled, size
    return "heather", "^", True, 14.0


def _scatter_by_category(ax: Any, x: np.ndarray, y: np.ndarray, cats: np.ndarray) -> None:
    order = sorted(set(cats.tolist()), key=lambda c: _task_mark(c)[3])
    for cat in order:
        sel = cats == cat
        colour, marker, filled, size = _task_mark(cat)
        ax.scatter(x[sel], y[sel], s=size, marker=marker, zorder=3,
                   facecolors=_c(colour) if filled else "none", edgecolors=_c(colour),
                   linewidths=0.7,
                   label=f"{plain_text(category_label(cat), 40)} ({int(sel.sum())})")


def _legend_two(ax: Any) -> None:
    """Legend in two columns above the axes (long category words)."""
    handles = ax.get_legend_handles_labels()[0]
    if handles:
        ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.01), ncol=2,
                  borderaxespad=0.0, columnspacing=1.2)


def _draw_fit_tube(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, top=0.8, left=0.15)
    t, f = np.asarray(d["actual"], np.float64), np.asarray(d["fitted"], np.float64)
    eps = float(d["epsilon"])
    lo = float(min(t.min(), f.min())) - eps
    hi = float(max(t.max(), f.max())) + eps
    line = np.array([lo, hi])
    ax.fill_between(line, line - eps, line + eps, color=_c("tint_neg"), linewidth=0, zorder=1)
    ax.plot(line, line, color=_c("ink"), linewidth=0.8, zorder=2)
    for s in (-1.0, 1.0):
        ax.plot(line, line + s * eps, color=_c("tide"), linewidth=0.7, linestyle=(0, (1, 2)),
                zorder=2)
    _scatter_by_category(ax, t, f, np.asarray(d["category"]).astype(str))
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_xlabel(plain_text(d.get("xlabel", "actual")))
    ax.set_ylabel(plain_text(d.get("ylabel", "fitted")))
    _legend_two(ax)


def _draw_residuals(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, top=0.8, left=0.15)
    f, r = np.asarray(d["fitted"], np.float64), np.asarray(d["residual"], np.float64)
    eps = float(d["epsilon"])
    ax.axhspan(-eps, eps, color=_c("tint_neg"), linewidth=0, zorder=1)
    ax.axhline(0.0, color=_c("ink"), linewidth=0.7, zorder=2)
    for s in (-1.0, 1.0):
        ax.axhline(s * eps, color=_c("tide"), linewidth=0.7, linestyle=(0, (1, 2)), zorder=2)
    _scatter_by_category(ax, f, r, np.asarray(d["category"]).astype(str))
    ax.set_xlabel(plain_text(d.get("xlabel", "fitted")))
    ax.set_ylabel(plain_text(d.get("ylabel", "residual")))
    _legend_two(ax)


def _draw_score_distribution(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, top=0.8, left=0.15)
    g = np.asarray(d["expansion"], np.float64)
    cats = np.asarray(d["category"]).astype(str)
    rho = float(d["rho"])
    lo, hi = float(min(g.min(), rho)), float(max(g.max(), rho))
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    edges = np.linspace(lo - 0.02 * span, hi + 0.02 * span, 41)
    groups = sorted(set(cats.tolist()), key=lambda c: _task_mark(c)[3])
    ax.hist([g[cats == c] for c in groups], bins=edges, stacked=True,
            color=[_c(_task_mark(c)[0]) for c in groups],
            label=[f"{plain_text(c, 40)} ({int(np.sum(cats == c))})" for c in groups])
    ax.axvline(rho, color=_c("rust"), linewidth=1.1, linestyle=(0, (5, 3)),
               label=f"ρ = {rho:.4g}")
    ax.yaxis.set_major_formatter(FuncFormatter(_count))
    ax.set_xlabel("g(x) = Σ αⱼ K(xⱼ, x)")
    ax.set_ylabel("training rows")
    _legend_two(ax)


def _draw_nu_shares(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    ax = _axes(fig, left=0.3, right=0.9)
    names = ["outlier share", "ν", "support-vector share"]
    vals = [float(d["outlier_share"]), float(d["nu"]), float(d["support_share"])]
    colours = [_c("rust"), _c("ink"), _c("tide")]
    ax.barh(names, vals, color=colours, height=0.55)
    ax.axvline(float(d["nu"]), color=_c("ink"), linewidth=0.7, linestyle=(0, (1, 2)))
    for k, v in enumerate(vals):
        ax.text(v, k, f"  {v:.4g}", va="center", ha="left", fontsize=7.0)
    ax.set_xlim(0.0, max(1.0, max(vals) * 1.15))
    ax.invert_yaxis()
    ax.set_xlabel("share of training rows" + ("" if d.get("holds") else
                                                "  (ν-property does NOT hold)"))


def _draw_overlay(fig: Figure | SubFigure, d: Mapping[str, Any]) -> None:
    """Several runs of one problem: violation and objective gap against iterations (left)
    and estimated seconds (right); data from :func:`solver.diagnosis.overlay.overlay_series`."""
    gs = fig.add_gridspec(2, 2, hspace=0.12, wspace=0.22, **_margins(fig, top=0.8,
                                                                      bottom=0.1, left=0.1))
    axes = [[fig.add_subplot(gs[r, c]) for c in range(2)] for r in range(2)]
    for k, run in enumerate(d["runs"]):
        colour = _c(LINE_COLOURS[k % len(LINE_COLOURS)])
        for c, xkey in enumerate(("iterations", "seconds")):
            x = np.asarray(run[xkey], dtype=np.float64)
            for r, ykey in enumerate(("violation", "objective_gap")):
                y = np.asarray(run[ykey], dtype=np.float64)
                ok = np.isfinite(y) & (y > 0)
                axes[r][c].plot(x[ok], y[ok], color=colour, linewidth=0.9,
                                label=plain_text(f"{run['label']} ({run['solver']}, "
                                                 f"{run['status']})", 60) if r + c == 0 else None)
    for r in range(2):
        for c in range(2):
            ax = axes[r][c]
            if ax.lines:
                _log_y(ax)
            if r == 0:
                ax.tick_params(labelbottom=False)
    axes[1][0].set_xlabel("iteration")
    axes[1][0].xaxis.set_major_formatter(FuncFormatter(_count))
    axes[1][1].set_xlabel("time (s), estimated at each run's average rate")
    for c in range(2):
        axes[0][c].set_ylabel("best violation so far")
        axes[1][c].set_ylabel("(D − D*) / max(1, |D*|)")
    handles = axes[0][0].get_legend_handles_labels()[0]
    if handles:
        axes[0][0].legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.02),
                          ncol=1, borderaxespad=0.0)


_DRAW = {
    "overlay": (_draw_overlay, (7.2, 5.2)),
    "violation": (_draw_violation, FIG_SIZE),
    "objective": (_draw_objective, FIG_SIZE_TALL),
    "gap": (_draw_gap, FIG_SIZE),
    "sets": (_draw_sets, FIG_SIZE),
    "trajectories": (_draw_trajectories, FIG_SIZE),
    "selection": (_draw_selection, FIG_SIZE),
    "regions": (_draw_regions, MAP_SIZE),
    "loo": (_draw_loo, FIG_SIZE),
    "reliability": (_draw_reliability, FIG_SIZE_TALL),
    "sigmoid": (_draw_sigmoid, FIG_SIZE),
    "fit_tube": (_draw_fit_tube, MAP_SIZE),
    "residuals": (_draw_residuals, FIG_SIZE_TALL),
    "score_distribution": (_draw_score_distribution, FIG_SIZE_TALL),
    "nu_shares": (_draw_nu_shares, FIG_SIZE),
}


def draw(fig: Figure | SubFigure, fd: FigureData) -> None:
    """Draw ``fd`` into an existing figure or sub-figure (call inside :func:`style`)."""
    func, _ = _DRAW[fd.kind]
    func(fig, fd.data)


#: Figure kinds with user-supplied axis or legend text: laid out by matplotlib's
#: constrained layout (slower); all others use fixed margins.
NEEDS_LAYOUT = frozenset({"regions"})


def render_figure(fd: FigureData) -> Figure:
    """A new stand-alone matplotlib figure for ``fd``, sized for the HTML page."""
    _, size = _DRAW[fd.kind]
    with style():
        fig = Figure(figsize=size, layout="constrained" if fd.kind in NEEDS_LAYOUT else None)
        draw(fig, fd)
    return fig


_XML_HEAD = re.compile(r"^.*?(?=<svg\b)", re.S)
_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_XMLNS = re.compile(r'\s+xmlns(:xlink)?="[^"]*"')
_SIZE_ATTR = re.compile(r'\s(width|height)="[0-9.]+pt"')
_ID = re.compile(r'\bid="([^"]+)"')
_REF = re.compile(r'(url\(#|href="#)([^)"]+)')
_PATH_D = re.compile(r'\bd="([^"]*)"')
_XY = re.compile(r'(\s(?:x|y|width|height)=")([-0-9.]+)"')
_DECIMALS = re.compile(r"(\.[0-9]{2})[0-9]+")


def svg_text(fig: Figure, prefix: str) -> str:
    """``fig`` as an ``<svg>`` element for inline use in HTML.

    The XML prologue, DOCTYPE and metadata are removed, namespace declarations dropped
    (the HTML parser places inline SVG in its namespace) and every id prefixed with
    ``prefix`` so that several figures can share one page.  Width and height are left to
    CSS; the viewBox keeps the aspect ratio.
    """
    buf = io.StringIO()
    with style():
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    s = buf.getvalue()
    s = _XML_HEAD.sub("", s, count=1)
    s = _METADATA.sub("", s, count=1)
    head_end = s.index(">")
    head = _SIZE_ATTR.sub("", _XMLNS.sub("", s[:head_end]))
    s = head + s[head_end:]
    s = _ID.sub(lambda m: f'id="{prefix}-{m.group(1)}"', s)
    s = _REF.sub(lambda m: f"{m.group(1)}{prefix}-{m.group(2)}", s)
    # coordinates to 0.01 pt: path data and x/y attributes only (never text content)
    s = _PATH_D.sub(lambda m: 'd="' + _DECIMALS.sub(r"\1", m.group(1)) + '"', s)
    s = _XY.sub(lambda m: m.group(1) + _DECIMALS.sub(r"\1", m.group(2)) + '"', s)
    return s.strip()


def figure_svg(fd: FigureData, prefix: str) -> str:
    """Render ``fd`` and return inline SVG text (see :func:`svg_text`)."""
    fig = render_figure(fd)
    return svg_text(fig, prefix)
