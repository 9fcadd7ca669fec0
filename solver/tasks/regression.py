"""The ``regression`` task: ε-support-vector regression of one numeric target column.

One problem in the 2n-variable form (:func:`solver.problem.regression`), stored as one run
(no parent record).  Training goes through :mod:`solver.training_kinds`; this object gives
the task's vocabulary, its held-out measures and its report section.

Report section (plain data, drawn by :mod:`solver.reporting`): the fit against the target
with the ε-tube (predicted against actual; a point is inside the tube when
|t − f(x)| ≤ ε, i.e. between the lines f = t − ε and f = t + ε), residuals against fitted
values with the band ±ε, support vectors marked by category, and the training facts
(RMSE, MAE, R², tube coverage; :func:`solver.measures.regression_measures`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..explanation._kinds import REGRESSION_CATEGORIES
from ..problem import REGRESSION_KIND
from ..vocabulary import figure_text
from ._base import MemberSpec, Prediction, Task

__all__ = ["RegressionTask", "TASK"]

#: display words of the per-point categories (codes from the explanation table)
CATEGORY_WORDS = {"inside_tube": "inside the tube",
                  "on_tube_edge": "on the tube edge (free)",
                  "outside_tube": "outside the tube (bounded)"}


class RegressionTask(Task):
    """ε-regression: f(x) = Σ (α⁺ᵢ − α⁻ᵢ) K(xᵢ, x) + b predicts the target (its units)."""

    name = "regression"
    problem_kinds = (REGRESSION_KIND,)
    parent_record = False
    categories = tuple(REGRESSION_CATEGORIES)
    measures = ("rmse", "mae", "r2", "tube_coverage", "max_abs_residual")
    class_labels = False
    study_axes = ("C", "epsilon")
    study_score = ("rmse", False)
    study_score_note = ("root mean squared error of the validation fold's predictions, "
                        "target units (R² and MAE beside it); lower is better")
    study_measures = ("rmse", "r2", "mae", "tube_coverage")
    decides_by_sign = False

    def members(self, labels: np.ndarray, *, weights: Any = None,
                options: Mapping[str, Any] | None = None) -> list[MemberSpec]:
        """One member over every row; ``labels`` are the (m,) numeric targets."""
        t = np.asarray(labels, np.float64)
        return [MemberSpec(role="model", key=None, rows=np.arange(t.shape[0]), labels=t)]

    def cell_problem(self, X: np.ndarray, member: MemberSpec, *, kernel: Any,
                     cell: Any) -> Any:
        """The ε-regression dual of a study cell (its C and ε)."""
        return self.fit_problem(X, member.labels, kernel=kernel, C=cell.C,
                                options={"epsilon": cell.epsilon})

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        """f(x) is the prediction (no labels)."""
        (model,) = models
        values = np.asarray(model.values(X), np.float64)
        return Prediction(labels=np.full(values.shape[0], None, dtype=object),
                          values=values[:, None], member_keys=(None,))

    def study_scores(self, prediction: Any, truth: Any, classes: Sequence[Any],
                     cell: Any) -> dict[str, Any]:
        """RMSE, MAE, R², tube coverage (the cell's ε) on the validation fold."""
        return self.held_out(prediction, truth, classes, epsilon=float(cell.epsilon))

    def decision_rule(self, record: Any) -> list[tuple[str, str]]:
        """f(x) itself is the prediction (no sign rule, no labels)."""
        return [("decision value", "f(x) = Σ (α⁺ᵢ − α⁻ᵢ)K(xᵢ, x) + b on the standardised "
                 "features"), ("prediction", "f(x) itself, in the target's units")]

    def fit_problem(self, X: np.ndarray, values: np.ndarray | None, *, kernel: Any, C: float,
                    options: Mapping[str, Any]) -> Any:
        """The ε-regression dual on standardised rows X (m, d) and targets ``values`` (m,)."""
        from ..problem import regression

        return regression(X, values, kernel=kernel, C=C, epsilon=options["epsilon"])

    def fit_attachments(self, problem: Any, result: Any, table: Any,
                        values: np.ndarray | None) -> dict[str, Any]:
        """``training_fit``: RMSE, MAE, R², tube coverage on the training rows."""
        from ..measures import regression_measures

        return {"training_fit": regression_measures(
            values, table.columns["prediction"], epsilon=float(problem.info["epsilon"]))}

    def summary_facts(self, record: Any) -> dict[str, Any]:
        """ε, rows and the training fit, for a run summary."""
        out: dict[str, Any] = {"epsilon": record.problem.info.get("epsilon"),
                               "n_rows": int(record.problem.X.shape[0])}
        fit = (record.attachments or {}).get("training_fit")
        if fit:
            out["training_rmse"] = fit["rmse"]
            out["training_tube_coverage"] = fit["tube_coverage"]
        return out

    def report_section(self, parent: Any, members: Sequence[Any]) -> dict[str, Any] | None:
        """Fit, residual and support-vector facts of one stored ε-regression run."""
        from ..explanation import kind_point_table
        from ..measures import regression_measures

        (rec,) = members
        p, res = rec.problem, rec.result
        table = kind_point_table(p, res)
        cols = table.columns
        t = np.asarray(cols["target"], np.float64)
        f = np.asarray(cols["prediction"], np.float64)
        cat = np.asarray(cols["category"]).astype(str)
        eps = float(p.info["epsilon"])
        fit = regression_measures(t, f, epsilon=eps)
        target = (rec.data or {}).get("target_name") or "target"
        counts = table.category_counts()
        n = int(t.size)
        n_sv = n - counts["inside_tube"]
        facts = [
            ("target column", target), ("ε (half-width of the tube, target units)", eps),
            ("C", p.info.get("C")), ("training rows", n),
            ("training RMSE", fit["rmse"]), ("training MAE", fit["mae"]),
            ("training R²", fit["r2"]),
            ("tube coverage: share of rows with |t − f(x)| ≤ ε", fit["tube_coverage"]),
            ("largest |residual|", fit["max_abs_residual"]),
            ("support vectors (rows with α⁺ or α⁻ > 0)", n_sv),
        ]
        cat_rows = tuple((CATEGORY_WORDS[c], counts[c], REGRESSION_CATEGORIES[c])
                         for c in REGRESSION_CATEGORIES)
        # rows outside the tube by the residual, whatever their multiplier (a check of the
        # category: with a converged run every bounded row has |r| ≥ ε − kkt_tol)
        r = t - f
        tol = float(res.certificate.kkt_tol)
        above, below = int(np.sum(r > eps + tol)), int(np.sum(r < -eps - tol))
        words = np.array([CATEGORY_WORDS[c] for c in cat], dtype=object)
        return {
            "title": f"ε-regression of {target}",
            "intro": (f"The fit f(x) against the target {target} on the training rows. The "
                      f"ε-tube is |t − f(x)| ≤ ε = {eps:.6g}: rows inside it carry no "
                      "multiplier; rows on its edge (free multipliers) and outside it "
                      "(multipliers at C) are the support vectors."),
            "facts": facts,
            "tables": [{"columns": ("category", "rows", "meaning"), "rows": cat_rows,
                        "note": (f"Rows by the multipliers against their bounds; by the "
                                 f"residual alone {above} rows lie above the tube and "
                                 f"{below} below it by more than kkt_tol = {figure_text(tol)}.")}],
            "figures": [
                {"key": "fit_tube", "kind": "fit_tube",
                 "title": f"fit against {target} with the ε-tube",
                 "caption": (f"Each training row at (target, fitted value). Solid line f = t; "
                             f"dotted lines f = t ± ε bound the tube (ε = {eps:.4g}). Markers "
                             "give the row's category; squares are bounded support vectors "
                             "outside the tube, diamonds free ones on its edge."),
                 "data": {"actual": t, "fitted": f, "epsilon": eps, "category": words,
                          "xlabel": f"{target} (actual)", "ylabel": f"{target} (fitted)"}},
                {"key": "residuals", "kind": "residuals",
                 "title": "residuals against fitted values",
                 "caption": (f"Residual t − f(x) against f(x) for each training row; the band "
                             f"±ε = ±{eps:.4g} is the tube. Support vectors marked as in the "
                             "figure above."),
                 "data": {"fitted": f, "residual": r, "epsilon": eps, "category": words,
                          "xlabel": f"{target} (fitted)", "ylabel": "residual t − f(x)"}},
            ],
            "flags": [],
        }

    def run_lines(self, summary: Mapping[str, Any]) -> list[tuple[str, str]]:
        lines = [("task", f"ε-regression, ε = {summary.get('epsilon'):g}; training RMSE "
                          f"{_num(summary.get('training_rmse'), '.4g')}, inside or on the tube "
                          f"{_num(summary.get('training_tube_coverage'), '.3f')}")]
        hold = summary.get("holdout")
        if hold:
            lines.append(("held-out", _held_out_text(hold)))
        return lines

    def applied_lines(self, facts: Mapping[str, Any] | None) -> list[str]:
        return [] if not facts else [_held_out_text(facts)]

    def applied(self, problem: Any, values: np.ndarray,
                data: Any) -> tuple[np.ndarray, dict[str, Any] | None]:
        """No labels; RMSE, MAE, R², tube coverage when the rows carry the target column."""
        from ..measures import regression_measures
        from ..training_kinds import numeric_column

        labels = np.full(np.asarray(values).shape[0], None, dtype=object)
        if data.labels is None:
            return labels, None
        return labels, regression_measures(numeric_column(data, "target"), values,
                                           epsilon=float(problem.info["epsilon"]))

    def output_columns(self, values: np.ndarray,
                       labels: np.ndarray) -> dict[str, list[Any]] | None:
        return {"prediction": [float(v) for v in np.asarray(values, np.float64)]}

    def held_out(self, prediction: Any, truth: np.ndarray,
                 classes: Sequence[Any], *, epsilon: float = 0.0) -> dict[str, Any]:
        """RMSE, MAE, R², tube coverage of predicted values against the true targets."""
        from ..measures import regression_measures

        values = np.asarray(getattr(prediction, "values", prediction), np.float64)
        return regression_measures(truth, values.reshape(-1), epsilon=epsilon)


def _num(v: Any, spec: str) -> str:
    return "n/a" if v is None else format(float(v), spec)


def _held_out_text(f: Mapping[str, Any]) -> str:
    return (f"RMSE {_num(f.get('rmse'), '.4g')}, MAE {_num(f.get('mae'), '.4g')}, "
            f"R² {_num(f.get('r2'), '.4f')}, tube coverage (|t − f| ≤ ε = "
            f"{_num(f.get('epsilon'), 'g')}) {_num(f.get('tube_coverage'), '.3f')}")


TASK = RegressionTask()
