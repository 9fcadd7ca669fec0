"""The report's probability-calibration section, from a run's ``calibration`` attachment.

Shows how the probabilities were obtained (Platt scaling fitted by the method of Lin, Lin &
Weng 2007 on stratified, seeded, cross-validated decision values: folds, seed, A, B, Newton
steps, final gradient norm, the weights the fold fits carried) and the calibration evidence
(:func:`solver.calibration.evidence.calibration_evidence`): reliability bins with their row
counts, Brier score, log-loss, expected calibration error with the binning stated, the
sigmoid over the decision values, and the rows where the most probable class differs from
the decision-value class, with the reason.  The evidence is on the held-out rows when the
run scored held-out data, otherwise on the cross-validated values, and says which.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..plaindata import to_plain
from ._records import FigureData, Table

__all__ = ["CalibrationContent", "calibration_content", "CROSS_VALIDATED", "HELD_OUT"]

CROSS_VALIDATED = ("cross-validated decision values of the training rows (no held-out data "
                   "were scored with this run; each row's value comes from the fold fit that "
                   "did not see it, the same values the sigmoid was fitted on)")
HELD_OUT = "held-out rows scored with the final model"
_SIGMOID_POINTS = 201


@dataclass(frozen=True, eq=False)
class CalibrationContent:
    """What the report shows about a run's probabilities.

    facts : (name, value) rows.  evidence : the evidence figures (plain data, JSON).
    bins : reliability bins.  folds : one row per cross-validation fit.  figures :
    reliability diagram and sigmoid.  notes : explanations (source of the evidence, why the
    most probable class can differ from the decision-value class, failures).
    """

    facts: tuple[tuple[str, Any], ...]
    evidence: Mapping[str, Any] | None
    bins: Table | None
    folds: Table | None
    figures: tuple[FigureData, ...]
    notes: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain data for the JSON summary."""
        return to_plain({
            "facts": {k: v for k, v in self.facts},
            "evidence": None if self.evidence is None else
            {k: v for k, v in self.evidence.items() if k != "disagreement_rows"},
            "folds": None if self.folds is None else
            {"columns": list(self.folds.columns), "rows": [list(r) for r in self.folds.rows]},
            "notes": list(self.notes),
        }, nonfinite_as_none=True, other=str)


def _bins_table(ev: Mapping[str, Any]) -> Table:
    rows = tuple((f"{b['low']:.1f}–{b['high']:.1f}", b["rows"], b["mean_probability"],
                  b["observed_frequency"]) for b in ev["bins"])
    return Table(columns=("P(positive) bin", "rows", "mean P(positive)", "observed share positive"),
                 rows=rows, note=f"Reliability bins: {ev['binning']}.")


def _figures(cal: Any, f: np.ndarray, pos: np.ndarray, ev: Mapping[str, Any], source: str,
             label: str, labels: Mapping[str, Any]) -> tuple[FigureData, ...]:
    from ..calibration import sigmoid_probability

    occupied = [b for b in ev["bins"] if b["rows"]]
    rel = FigureData(
        key="calibration_reliability", kind="reliability",
        title=f"Reliability of P({labels['positive']}) — {label}",
        caption=(f"Observed share of the positive class against the mean predicted "
                 f"probability in each bin ({ev['binning']}), on the {source}; the diagonal "
                 "is perfect calibration; the bars below give the rows in each bin."),
        data={"low": [b["low"] for b in ev["bins"]], "high": [b["high"] for b in ev["bins"]],
              "rows": [b["rows"] for b in ev["bins"]],
              "mean": [b["mean_probability"] for b in occupied],
              "observed": [b["observed_frequency"] for b in occupied],
              "occupied_rows": [b["rows"] for b in occupied],
              "positive": str(labels["positive"])})
    lo, hi = float(np.min(f)), float(np.max(f))
    pad = 0.05 * (hi - lo) if hi > lo else 1.0
    grid = np.linspace(lo - pad, hi + pad, _SIGMOID_POINTS)
    sig = FigureData(
        key="calibration_sigmoid", kind="sigmoid",
        title=f"Fitted sigmoid over the decision values — {label}",
        caption=(f"P({labels['positive']} | f) = 1 / (1 + exp(A f + B)) with A = {cal.A:.6g}, "
                 f"B = {cal.B:.6g}; ticks: the {source} (top: class {labels['positive']}, "
                 f"bottom: class {labels['negative']}); the shaded band between f = 0 and "
                 f"f = −B/A = {cal.crossover:.4g} holds the rows whose most probable class "
                 "differs from the decision-value class."),
        data={"grid": grid.tolist(), "p": sigmoid_probability(grid, cal.A, cal.B).tolist(),
              "values": f.tolist(), "positive": pos.tolist(), "crossover": cal.crossover,
              "positive_label": str(labels["positive"]),
              "negative_label": str(labels["negative"])})
    return rel, sig


def calibration_content(att: Mapping[str, Any] | None, label: str) -> CalibrationContent | None:
    """The section for a run with a ``calibration`` attachment ``att`` (None: no section)."""
    if att is None:
        return None
    from ..calibration import Calibration, calibration_evidence
    from ..errors import InvalidInputError

    try:
        cal = Calibration.from_attachment(att)
    except InvalidInputError as exc:
        return CalibrationContent(facts=(), evidence=None, bins=None, folds=None, figures=(),
                                  notes=(f"Calibration record not readable: {exc}",))
    fit = cal.fit
    facts: list[tuple[str, Any]] = [
        ("method", "Platt scaling on cross-validated decision values; Newton fit of Lin, Lin & "
                   "Weng (2007)"),
        ("formula", "P(positive | f) = 1 / (1 + exp(A f + B))"),
        ("positive class", cal.labels.get("positive")),
        ("fit status", cal.status.label), ("fit message", cal.message),
        ("A (slope)", cal.A), ("B (offset)", cal.B),
        ("P = 1/2 at f = −B/A", cal.crossover),
        ("calibration folds", cal.n_folds), ("fold seed", cal.seed),
        ("fold rule", "stratified: each class shuffled with numpy default_rng(seed), dealt to "
                      "the folds in turn"),
        ("Newton steps", None if fit is None else fit.newton_steps),
        ("final gradient norm (max |∂F/∂A|, |∂F/∂B|)", None if fit is None else fit.gradient_norm),
        ("regularised targets t₊, t₋", None if fit is None else
         [fit.target_positive, fit.target_negative]),
        ("class weights in the fold fits", cal.weights.get("class_weight") or "none"),
        ("sample weights in the fold fits", bool(cal.weights.get("sample_weight"))),
        ("fold solver", ", ".join([cal.solver, *(f"{k} {v}" for k, v in
                                                   cal.solver_options.items() if k != "trace")])),
    ]
    folds = Table(columns=("fold", "training rows", "held-out rows", "status", "iterations",
                           "max violation"),
                  rows=tuple((f["fold"], f["n_train"], f["n_test"], f["status"], f["iterations"],
                              f["max_violation"]) for f in cal.fold_fits),
                  note="Each cross-validation fit: trained on the other folds, scored on its own.")
    notes: list[str] = []
    if not cal.success:
        notes.append(f"No probabilities: {cal.message}. kktrace does not make up probabilities "
                     "for a failed fit.")
        return CalibrationContent(facts=tuple(facts), evidence=None, bins=None, folds=folds,
                                  figures=(), notes=tuple(notes))
    hold = cal.holdout
    if hold is not None and np.asarray(hold["values"]).size:
        f = np.asarray(hold["values"], dtype=np.float64)
        pos = np.asarray(hold["positive"], dtype=bool)
        source = HELD_OUT + (f" ({hold['source']})" if hold.get("source") else "")
    else:
        f, pos, source = cal.cv_values, cal.positive, CROSS_VALIDATED
    p = cal.probabilities(f)[:, 1]
    ev = calibration_evidence(p, pos, f)
    facts += [("evidence on", source), ("rows in the evidence", ev["rows"]),
              ("Brier score", ev["brier_score"]), ("log-loss", ev["log_loss"]),
              ("expected calibration error", ev["expected_calibration_error"]),
              ("binning", ev["binning"]),
              ("rows where the most probable class differs from the decision-value class",
               ev["disagreements"])]
    notes.append(f"Evidence on the {source}.")
    notes.append(f"{ev['disagreements']} of {ev['rows']} rows: the most probable class differs "
                 f"from the decision-value class. {ev['disagreement_note']}")
    notes.append("Definitions: Brier score = " + ev["definitions"]["brier_score"] + "; log-loss = "
                 + ev["definitions"]["log_loss"] + ".")
    if not math.isfinite(cal.crossover):
        notes.append("The sigmoid has no finite midpoint.")
    figs = _figures(cal, f, pos, ev, source.split(" (")[0], label, cal.labels)
    return CalibrationContent(facts=tuple(facts), evidence=ev, bins=_bins_table(ev),
                              folds=folds, figures=figs, notes=tuple(notes))

