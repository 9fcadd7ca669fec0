"""Issue 13 item 10: every figure of every report kind has a label on each numeric axis,
and each label has a stated unit (:data:`solver.reporting.figures.AXIS_UNITS`, the
data-derived patterns, or a data column's own unit).  Rendered through the same
``render_figure`` the HTML and PDF use, for a two-class SMO + QP pair with probabilities,
a regression pair and a one-class pair."""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import numpy as np
import pytest

import solver
from solver.reporting._records import ordered_figures
from solver.reporting.content import build_report_content
from solver.reporting.figures import axis_unit, render_figure
from solver.store import RunStore

_NUMBER = re.compile(r"^[−\-+]?[0-9.\u2009]+(×10[⁻⁰¹²³⁴⁵⁶⁷⁸⁹]+)?$|^10[⁻⁰¹²³⁴⁵⁶⁷⁸⁹]+$")


def _csv(path: Path, names: list[str], M: np.ndarray, labels=None) -> Path:
    head = names + (["outcome"] if labels is not None else [])
    lines = [",".join(head)]
    for i, row in enumerate(M):
        cells = [repr(float(v)) for v in row] + ([str(labels[i])] if labels is not None else [])
        lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    d = tmp_path_factory.mktemp("axes")
    rng = np.random.default_rng(3)
    X = rng.normal(size=(120, 3))
    y = np.where(X[:, 0] + X[:, 1] ** 2 > 0.5, "pass", "fail")
    t = np.sin(X[:, 0]) + 0.1 * rng.normal(size=120)
    store = d / "store"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        groups = [
            solver.train(str(_csv(d / "b.csv", ["a", "b", "c"], X, y)), label="outcome",
                         solver="both", probabilities=True, store=str(store)).run_ids,
            solver.train(str(_csv(d / "r.csv", ["a", "b", "c", "t"], np.c_[X, t])),
                         task="regression", target="t", epsilon=0.1, solver="both",
                         store=str(store)).run_ids,
            solver.train(str(_csv(d / "o.csv", ["a", "b"], X[:, :2])), task="one-class",
                         nu=0.2, solver="both", store=str(store)).run_ids,
        ]
    st = RunStore(store)
    return [build_report_content([st.load(i) for i in ids]) for ids in groups]


def _shown_axes(content):
    for fd in ordered_figures(content):
        fig = render_figure(fd)
        for ax in fig.get_axes():
            for which, axis in (("x", ax.xaxis), ("y", ax.yaxis)):
                ticks = [tl.get_text() for tl in axis.get_ticklabels()
                         if tl.get_visible() and tl.get_text()]
                if axis.get_visible() and ticks:
                    yield fd.kind, which, axis.get_label_text(), ticks


def test_every_numeric_axis_has_a_label_with_a_stated_unit(reports):
    seen = set()
    for content in reports:
        for kind, which, label, ticks in _shown_axes(content):
            seen.add(kind)
            if not all(_NUMBER.match(t) for t in ticks):
                continue  # a category axis: its tick labels are the words
            assert label.strip(), f"figure {kind!r}: the {which} axis has no label"
            assert axis_unit(label, ("a", "b", "c", "t")) is not None, (
                f"figure {kind!r}: {which} label {label!r} has no stated unit")
    # the audit reached every kind of figure these reports draw
    assert {"violation", "objective", "gap", "sets", "trajectories", "selection", "regions",
            "reliability", "sigmoid", "fit_tube", "residuals", "score_distribution",
            "nu_shares"} <= seen, seen


def test_tick_labels_use_one_minus_sign(reports):
    for content in reports:
        for kind, which, _label, ticks in _shown_axes(content):
            assert not any(t.startswith("-") for t in ticks), (kind, which, ticks)
