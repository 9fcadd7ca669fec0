"""The study report: the grid, the score map beside the convergence-difficulty map, the
chosen cell with the rule that chose it, the warm-start check, every fit that did not
converge, and the cautions — as HTML (inline SVG), PDF and JSON.

Maps are drawn over C (columns) × γ (rows) with the report's own style
(:func:`solver.reporting.figures.style`, :data:`~solver.reporting.figures.PALETTE`):
mean cross-validated accuracy; mean iterations (log colour scale); the share of folds that
did not converge (cells with any such fold hatched); the mean bounded share.  The cell the
one-standard-error rule chose is framed, the best cell by mean score dotted.  With a
degree axis (poly) the maps show the chosen degree's slice (said in the title).
"""

from __future__ import annotations

import html
import io
import json
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InvalidInputError

__all__ = ["study_report", "study_maps", "difficulty_notes"]

CAUTIONS = (
    "kktrace gives evidence about the optimisation and the cross-validated scores of these "
    "fits; it is not a validation sign-off of a model.",
    "Cross-validated scores estimate performance on data like the training rows; they say "
    "nothing about rows from another process, site or time.",
    "The chosen cell is the output of a stated rule over this grid; a finer or wider grid "
    "may choose otherwise.",
)

#: the four maps: (key in the cell aggregates, title, colour at the high end, log scale)
MAPS = (("mean_score", "mean accuracy", "tide", False),
        ("mean_iterations", "mean iterations (log)", "rust", True),
        ("not_converged_share", "share of folds not converged", "oxblood", False),
        ("bounded_share", "mean bounded share", "heather", False))


def _axis(values: Sequence[Any]) -> list[Any]:
    return sorted({v for v in values}, key=lambda v: (v is None, v or 0.0))


def study_maps(results: Mapping[str, Any]) -> dict[str, Any]:
    """Plain data of the maps from a study's ``results`` attachment: the axes, one
    (γ, C) matrix per map — (γ, ν) for one-class — and the positions of the chosen and
    best cells.  With a degree or ε axis the maps are the chosen cell's slice."""
    cells = list(results["cells"])
    choice = results["choice"]
    chosen = next(c for c in cells if c["cell"] == choice["one_se"])
    best = next(c for c in cells if c["cell"] == choice["best"])
    x = "C" if any(c["C"] is not None for c in cells) else "nu"
    deg, eps = chosen["degree"], chosen.get("epsilon")
    sl = [c for c in cells if c["degree"] == deg and c.get("epsilon") == eps]
    Cs = _axis([c[x] for c in sl])
    gs = _axis([c["gamma"] for c in sl])
    out: dict[str, Any] = {"C": Cs, "gamma": gs, "degree": deg, "epsilon": eps,
                           "x_name": x, "maps": {}}
    for key, *_ in MAPS:
        m = np.full((len(gs), len(Cs)), np.nan)
        for c in sl:
            m[gs.index(c["gamma"]), Cs.index(c[x])] = c[key]
        out["maps"][key] = m.tolist()
    out["chosen"] = [gs.index(chosen["gamma"]), Cs.index(chosen[x])]
    out["best"] = ([gs.index(best["gamma"]), Cs.index(best[x])]
                   if best["degree"] == deg and best.get("epsilon") == eps else None)
    out["score"] = choice.get("score", "accuracy")
    out["higher_is_better"] = bool(choice.get("higher_is_better", True))
    return out


def _score_words(choice: Mapping[str, Any]) -> str:
    """``mean accuracy`` / ``mean rmse (lower is better)``."""
    words = f"mean {choice.get('score', 'accuracy')}"
    return words if choice.get("higher_is_better", True) else words + " (lower is better)"


def difficulty_notes(results: Mapping[str, Any]) -> list[str]:
    """One note for every cell where some fold did not converge or hit the iteration
    limit, and one for the hardest region (most iterations)."""
    notes = []
    for c in results["cells"]:
        share = c["not_converged_share"]
        if share > 0:
            notes.append(f"{c['cell']}: {share:.0%} of folds did not converge"
                         + (f" ({c['iteration_limit_hits']} hit the iteration limit)"
                            if c["iteration_limit_hits"] else "")
                         + f"; worst final violation {c['max_violation']:.3g}")
    hard = max(results["cells"], key=lambda c: c["mean_iterations"])
    easy = min(results["cells"], key=lambda c: c["mean_iterations"])
    notes.append(f"hardest cell: {hard['cell']} ({hard['mean_iterations']:.0f} iterations "
                 f"on average, {hard['mean_iterations'] / max(1.0, easy['mean_iterations']):.1f}"
                 f"x the easiest, {easy['cell']})")
    return notes


def _figure(maps: Mapping[str, Any], title: str) -> Any:
    """The four maps side by side (see the module docstring)."""
    from matplotlib.colors import LinearSegmentedColormap, LogNorm, Normalize
    from matplotlib.figure import Figure

    from ..reporting.figures import PALETTE, style

    with style():
        fig = Figure(figsize=(7.2, 5.6))
        axes = fig.subplots(2, 2)
        fig.suptitle(title, x=0.02, ha="left", fontsize=9, fontweight="bold")
        Cs, gs = maps["C"], maps["gamma"]
        for ax, (key, label, colour, log) in zip(axes.ravel(), MAPS, strict=True):
            m = np.array(maps["maps"][key], dtype=float)
            cmap = LinearSegmentedColormap.from_list(
                f"kk-{colour}", [PALETTE["paper"], PALETTE[colour]])
            finite = m[np.isfinite(m)]
            if log:
                lo = max(1.0, float(np.min(finite)) if finite.size else 1.0)
                hi = max(lo * 1.01, float(np.max(finite)) if finite.size else 10.0)
                norm: Any = LogNorm(lo, hi)
            elif key.endswith("_share"):
                norm = Normalize(0.0, 1.0)
            else:
                lo = float(np.min(finite)) if finite.size else 0.0
                hi = float(np.max(finite)) if finite.size else 1.0
                norm = Normalize(lo, hi if hi > lo else lo + 1e-9)
            im = ax.imshow(m, cmap=cmap, norm=norm, origin="lower", aspect="auto")
            ax.grid(False)
            ax.set_title(_score_words(maps) if key == "mean_score" else label)
            ax.set_xticks(range(len(Cs)), [f"{c:g}" for c in Cs])
            ax.set_yticks(range(len(gs)), ["-" if g is None else f"{g:g}" for g in gs])
            ax.set_xlabel(maps.get("x_name", "C"))
            ax.set_ylabel("gamma")
            nc = np.array(maps["maps"]["not_converged_share"], dtype=float)
            for i in range(m.shape[0]):
                for j in range(m.shape[1]):
                    v = m[i, j]
                    if not math.isfinite(v):
                        continue
                    txt = f"{v:.3f}" if key == "mean_score" else (
                        f"{v:.0f}" if log else f"{v:.0%}")
                    ax.text(j, i, txt, ha="center", va="center", fontsize=6.5,
                            color=PALETTE["ink"])
                    if nc[i, j] > 0:
                        ax.add_patch(_rect(j, i, hatch="////", colour=PALETTE["oxblood"]))
            ci, cj = maps["chosen"]
            ax.add_patch(_rect(cj, ci, colour=PALETTE["ink"], width=1.6))
            if maps["best"] is not None and maps["best"] != maps["chosen"]:
                bi, bj = maps["best"]
                ax.plot([bj], [bi - 0.32], marker="o", ms=3.5, color=PALETTE["ink"])
            fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03)
        fig.text(0.02, 0.005, "framed: chosen by the one-standard-error rule; dot: best "
                 f"{_score_words(maps)}; hatched: some fold did not converge", fontsize=6.5,
                 color=PALETTE["muted"])
        fig.subplots_adjust(left=0.08, right=0.97, bottom=0.1, top=0.9, wspace=0.35,
                            hspace=0.45)
    return fig


def _rect(j: int, i: int, *, colour: str, width: float = 0.0, hatch: str | None = None):
    from matplotlib.patches import Rectangle

    return Rectangle((j - 0.5, i - 0.5), 1, 1, fill=False, edgecolor=colour,
                     linewidth=width or 0.0, hatch=hatch)


def _svg(fig: Any) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg")
    text = buf.getvalue()
    return text[text.index("<svg"):]


def _content(parent: Any) -> dict[str, Any]:
    res = parent.attachments["results"]
    info = parent.info
    not_conv = [{k: r[k] for k in ("cell", "fold", "run_id", "status", "iterations",
                                   "max_violation")}
                for r in res["fits"] if not r["converged"]]
    return {
        "study_id": parent.run_id, "created": parent.created, "data": dict(parent.data),
        "grid": info["grid"], "folds": info["folds"], "options": info["options"],
        "execution": info["execution"], "versions": info["versions"],
        "choice": res["choice"], "cells": res["cells"],
        "warm_start_check": res.get("warm_start_check"),
        "not_converged": not_conv, "difficulty_notes": difficulty_notes(res),
        "maps": study_maps(res), "members": len(parent.members), "cautions": list(CAUTIONS),
        "stability": parent.attachments.get("stability"),
        "task": info.get("member_task"), "score_note": info.get("score_note"),
        "measures": list(info.get("measures") or ("accuracy", "balanced_accuracy")),
    }


def _html(c: Mapping[str, Any], svg: str) -> str:
    from ..reporting.figures import PALETTE

    e = html.escape
    ch = c["choice"]
    rows = "".join(
        f"<tr><td>{e(x['cell'])}</td><td>{x['mean_score']:.4f}</td>"
        f"<td>{x['se_score']:.4f}</td><td>{x['mean_iterations']:.0f}</td>"
        f"<td>{x['not_converged_share']:.0%}</td><td>{x['bounded_share']:.0%}</td></tr>"
        for x in c["cells"])
    nc = "".join(f"<li>{e(r['cell'])}, fold {r['fold']}: {e(r['status'])} after "
                 f"{r['iterations']} iterations (run <code>{e(r['run_id'])}</code>)</li>"
                 for r in c["not_converged"]) or "<li>none: every fit converged</li>"
    notes = "".join(f"<li>{e(n)}</li>" for n in c["difficulty_notes"])
    cautions = "".join(f"<li>{e(n)}</li>" for n in c["cautions"])
    sw = _score_words(ch)
    meas = [m for m in c["measures"] if any(x.get(f"mean_{m}") is not None
                                            for x in c["cells"])]
    mrows = "".join(
        f"<tr><td>{e(x['cell'])}</td>" + "".join(
            f"<td>{_fmt(x.get(f'mean_{m}'))}</td>" for m in meas) + "</tr>"
        for x in c["cells"])
    measures = "" if not meas else (
        f"<h2>Held-out measures ({e(str(c.get('task')))})</h2><p>Mean over the folds of "
        f"each validation fold's measures.  Score: {e(str(c.get('score_note')))}.</p>"
        "<table><tr><th>cell</th>" + "".join(f"<th>mean {e(m)}</th>" for m in meas)
        + f"</tr>{mrows}</table>")
    w = c["warm_start_check"]
    warm = "" if not w else (
        f"<h2>Warm starts along C</h2><p>{w['warm_iterations']} iterations warm against "
        f"{w['cold_iterations']} cold on the same {len(w['cells'])} cells (fold 0): ratio "
        f"{w['ratio_cold_to_warm']:.2f}; whole path {w['path_ratio_cold_to_warm']:.2f}. "
        f"Certificates {'all the same' if w['all_same_certificate'] else 'NOT all the same'}"
        f" ({e(w['rule'])}).</p>")
    st = c.get("stability")
    stab = ""
    if st:
        krows = "".join(
            f"<tr><td>{e(k)}</td><td>{v['refits']}</td><td>{v['lowest_sv_jaccard']:.3f}</td>"
            f"<td>{v['max_drift_train']:.3g}</td><td>{v['max_drift_held_out']:.3g}</td>"
            f"<td>{v['max_flips_held_out']}</td><td>{v['bias_spread']:.3g}</td></tr>"
            for k, v in st["by_kind"].items())
        stab = (f"<h2>Stability of {e(st['cell'])}</h2><p>{e(st['permutation_verdict'])} "
                f"(rule: {e(st['same_optimum_rule'])}).  Held out: {e(st['held_out'])}; "
                f"noise levels {e(str(st['noise_levels']))} of each feature's sd.</p>"
                "<table><tr><th>refits</th><th>n</th><th>min SV Jaccard</th><th>max drift "
                "(train)</th><th>max drift (held out)</th><th>max flips (held out)</th>"
                f"<th>bias spread</th></tr>{krows}</table>")
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>kktrace study {e(str(c['study_id']))}</title>
<style>body{{font-family:"DejaVu Sans",sans-serif;background:{PALETTE['paper']};
color:{PALETTE['ink']};max-width:60rem;margin:2rem auto;padding:0 1rem;font-size:14px}}
h1,h2{{font-weight:600}} table{{border-collapse:collapse}} td,th{{padding:2px 10px;
border-bottom:1px dotted {PALETTE['grid']};text-align:right}} td:first-child{{text-align:left}}
.rule{{color:{PALETTE['muted']}}} .caution{{border-left:3px solid {PALETTE['rust']};
padding-left:1rem}}</style></head><body>
<h1>Study {e(str(c['study_id']))}</h1>
<p>{c['members']} member runs of task {e(str(c.get('task')))}; grid
{e(json.dumps(c['grid']))}; {c['folds']['k']} folds ({e(c['folds']['rule'])}), seed
{c['folds']['seed']}; data {e(str(c['data'].get('source')))} ({c['data']['n_rows']}
rows, fingerprint <code>{e(c['data']['fingerprint'][:16])}</code>...).</p>
<h2>Chosen cell</h2>
<p><b>{e(ch['one_se'])}</b> ({e(sw)} {ch['one_se_mean']:.4f}); best by mean:
{e(ch['best'])} ({ch['best_mean']:.4f}, standard error {ch['best_se']:.4f}).</p>
<p class="rule">Chosen by the {e(ch['rule'])}.</p>
<h2>Score map and convergence-difficulty map</h2>{svg}
<h2>Where the optimisation was hard</h2><ul>{notes}</ul>
<h2>Fits that did not converge</h2><ul>{nc}</ul>{warm}
{stab}
{measures}
<h2>Cells</h2><table><tr><th>cell</th><th>{e(sw)}</th><th>std error</th>
<th>mean iterations</th><th>not converged</th><th>bounded share</th></tr>{rows}</table>
<h2>Cautions</h2><ul class="caution">{cautions}</ul>
</body></html>
"""


def _fmt(v: Any) -> str:
    return "-" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:.4g}"


def study_report(study_id: str, *, store: Any = None, out_dir: str | Path | None = None,
                 formats: Sequence[str] = ("html", "pdf", "json")) -> dict[str, Path]:
    """Write the report of a stored study (verified first) and return ``{format: path}``.

    ``out_dir`` defaults to ``<store>/reports/<study id>``; files are ``study.html``,
    ``study.pdf``, ``study.json``."""
    from matplotlib.backends.backend_pdf import PdfPages

    from .._workflow import open_store

    bad = [f for f in formats if f not in ("html", "pdf", "json")]
    if bad or not formats:
        raise InvalidInputError(f"report formats are html, pdf and json, got {list(formats)}")
    st = open_store(store)
    parent = st.load_parent(study_id)
    if parent.task != "study":
        raise InvalidInputError(f"run {study_id} is a {parent.task} record, not a study")
    c = _content(parent)
    out = Path(out_dir) if out_dir is not None else Path(st.root) / "reports" / study_id
    st.check_output_path(out, "report folder")
    out.mkdir(parents=True, exist_ok=True)
    mp = c["maps"]
    title = (f"score map and convergence-difficulty map over {mp['x_name']} x gamma"
             + (f" (degree {mp['degree']})" if mp["degree"] is not None else "")
             + (f" (epsilon {mp['epsilon']:g})" if mp.get("epsilon") is not None else ""))
    fig = _figure(c["maps"], title)
    paths: dict[str, Path] = {}
    if "json" in formats:
        paths["json"] = out / "study.json"
        paths["json"].write_text(json.dumps(c, indent=1, default=float, allow_nan=True),
                                 encoding="utf-8")
    if "html" in formats:
        paths["html"] = out / "study.html"
        paths["html"].write_text(_html(c, _svg(fig)), encoding="utf-8")
    if "pdf" in formats:
        paths["pdf"] = out / "study.pdf"
        with PdfPages(paths["pdf"]) as pdf:
            pdf.savefig(_text_page(c))
            pdf.savefig(fig)
    return paths


def _text_page(c: Mapping[str, Any]) -> Any:
    from matplotlib.figure import Figure

    from ..reporting.figures import style

    ch = c["choice"]
    lines = [f"kktrace study {c['study_id']}", "",
             f"chosen cell: {ch['one_se']} ({_score_words(ch)} {ch['one_se_mean']:.4f})",
             f"score: {c.get('score_note')}",
             f"best cell by mean: {ch['best']} ({ch['best_mean']:.4f}, "
             f"standard error {ch['best_se']:.4f})", "rule: " + ch["rule"], "",
             f"{c['members']} member runs, {c['folds']['k']} folds, seed {c['folds']['seed']}",
             "", "where the optimisation was hard:", *[f"  {n}" for n in c["difficulty_notes"]],
             "", "fits that did not converge:",
             *([f"  {r['cell']} fold {r['fold']}: {r['status']} (run {r['run_id']})"
                for r in c["not_converged"]] or ["  none"]),
             *([] if not c.get("stability") else
               ["", f"stability of {c['stability']['cell']}: "
                + c["stability"]["permutation_verdict"],
                *[f"  {k}: {v['refits']} refits, min SV Jaccard "
                  f"{v['lowest_sv_jaccard']:.3f}, max drift train "
                  f"{v['max_drift_train']:.3g}, held out {v['max_drift_held_out']:.3g}, "
                  f"bias spread {v['bias_spread']:.3g}"
                  for k, v in c["stability"]["by_kind"].items()]]),
             "", "cautions:", *[f"  {n}" for n in c["cautions"]]]
    with style():
        fig = Figure(figsize=(8.27, 11.69))
        import textwrap

        text = "\n".join(w for ln in lines for w in (textwrap.wrap(ln, 95,
                                                                    subsequent_indent="    ")
                                                     or [""]))
        fig.text(0.06, 0.96, text, va="top", ha="left", fontsize=8, family="DejaVu Sans")
    return fig
