"""The ``one-class`` task: novelty detection from features alone (Schölkopf et al. 2001).

One problem (:func:`solver.problem.one_class`, scaled so that 0 ≤ α ≤ 1 and eᵀα = νn),
stored as one run.  Training goes through :mod:`solver.training_kinds`; this object gives
the task's vocabulary, its held-out measures and its report section.

Report section (plain data, drawn by :mod:`solver.reporting`): the distribution of the
kernel expansion g(x) = Σ αⱼ K(xⱼ, x) over the training rows with the threshold ρ (the
score is f(x) = g(x) − ρ; a row is flagged where f < 0), and the ν-property — ν is an upper
bound on the share of outliers and a lower bound on the share of support vectors
(Schölkopf et al. 2001, Proposition 4), checked by :func:`solver.measures.nu_property`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..explanation._kinds import ONE_CLASS_CATEGORIES
from ..problem import ONE_CLASS_KIND
from ..vocabulary import figure_text
from ._base import MemberSpec, Prediction, Task

__all__ = ["OneClassTask", "TASK"]

#: display words of the per-point categories (codes from the explanation table)
CATEGORY_WORDS = {"interior": "interior", "boundary": "on the boundary (free)",
                  "outside": "outside (bounded)"}


class OneClassTask(Task):
    """One-class: f(x) = Σ αⱼ K(xⱼ, x) − ρ; inlier where f(x) ≥ 0, outlier where f(x) < 0."""

    name = "one-class"
    problem_kinds = (ONE_CLASS_KIND,)
    parent_record = False
    categories = tuple(ONE_CLASS_CATEGORIES)
    measures = ("n_flagged", "share_flagged", "confusion", "detection_rate",
                "false_alarm_rate")
    class_labels = False
    study_axes = ("nu",)
    #: held-out |share flagged − ν| (see :meth:`study_scores`); smaller is better
    study_score = ("nu_gap", False)
    study_score_note = ("nu_gap = |share of the validation fold flagged (f < 0) − ν|: on "
                        "the training rows the share flagged is at most ν and tends to ν "
                        "(Schölkopf et al. 2001, Proposition 4), so a boundary that "
                        "generalises flags about ν of new rows; our choice of score for "
                        "data without labels; lower is better")
    study_measures = ("nu_gap", "share_flagged", "share_inside", "detection_rate",
                      "false_alarm_rate")

    def members(self, labels: np.ndarray, *, weights: Any = None,
                options: Mapping[str, Any] | None = None) -> list[MemberSpec]:
        """One member over every row (``labels``: (m,) known-outlier flags or Nones,
        never used for fitting)."""
        lab = np.asarray(labels, dtype=object)
        return [MemberSpec(role="model", key=None, rows=np.arange(lab.shape[0]), labels=lab)]

    def cell_problem(self, X: np.ndarray, member: MemberSpec, *, kernel: Any,
                     cell: Any) -> Any:
        """The one-class dual of a study cell (its ν; one-class has no C)."""
        return self.fit_problem(X, None, kernel=kernel, C=1.0, options={"nu": cell.nu})

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        """``inlier`` where f(x) ≥ 0, else ``outlier``."""
        (model,) = models
        v = np.asarray(model.values(X), np.float64)
        return Prediction(labels=np.where(v >= 0, "inlier", "outlier").astype(object),
                          values=v[:, None], member_keys=(None,))

    def study_scores(self, prediction: Any, truth: Any, classes: Sequence[Any],
                     cell: Any) -> dict[str, Any]:
        """Share flagged, share inside and ``nu_gap`` = |share flagged − ν| on the
        validation fold (and the confusion with known outliers).

        Our choice of score for a study without labels: on the training rows the share
        flagged is at most ν and tends to ν (Schölkopf et al. 2001, Proposition 4); a
        boundary that generalises flags about the same share of held-out rows, one that
        wraps the training rows too tightly flags far more.  Smaller is better.
        """
        known = None
        if truth is not None and not all(v is None for v in np.asarray(truth, object)):
            known = np.asarray(truth, dtype=bool)
        out = self.held_out(prediction, known, classes)
        out["share_inside"] = 1.0 - float(out["share_flagged"])
        out["nu"] = float(cell.nu)
        out["nu_gap"] = abs(float(out["share_flagged"]) - float(cell.nu))
        return out

    def decision_rule(self, record: Any) -> list[tuple[str, str]]:
        """Inlier where the score is ≥ 0 (the boundary f = 0 counts as inside)."""
        return [("score", "f(x) = Σ αⱼK(xⱼ, x) − ρ on the standardised features"),
                ("sign convention", "f(x) ≥ 0 → inlier; f(x) < 0 → outlier"),
                ("at f = 0", "inlier (the boundary belongs to the region)")]

    def fit_problem(self, X: np.ndarray, values: np.ndarray | None, *, kernel: Any, C: float,
                    options: Mapping[str, Any]) -> Any:
        """The one-class dual on standardised rows X (m, d); no target, no C."""
        from ..problem import one_class

        return one_class(X, kernel=kernel, nu=options["nu"])

    def fit_attachments(self, problem: Any, result: Any, table: Any,
                        values: np.ndarray | None) -> dict[str, Any]:
        """``nu_property``: outlier share ≤ ν ≤ support-vector share, checked."""
        from ..measures import nu_property

        return {"nu_property": nu_property(problem, result.alpha, table.columns["score"],
                                           kkt_tol=result.certificate.kkt_tol)}

    def summary_facts(self, record: Any) -> dict[str, Any]:
        """ν and the stored ν-property check, for a run summary."""
        return {"nu": record.problem.info.get("nu"),
                "nu_property": (record.attachments or {}).get("nu_property")}

    def report_section(self, parent: Any, members: Sequence[Any]) -> dict[str, Any] | None:
        """Score distribution, ρ, and the ν-property of one stored one-class run."""
        from ..explanation import kind_point_table
        from ..measures import nu_property

        (rec,) = members
        p, res = rec.problem, rec.result
        table = kind_point_table(p, res)
        cols = table.columns
        score = np.asarray(cols["score"], np.float64)
        cat = np.asarray(cols["category"]).astype(str)
        n = int(score.size)
        nu = float(p.info["nu"])
        rho = -float(res.bias)
        tol = float(res.certificate.kkt_tol)
        check = nu_property(p, res.alpha, score, kkt_tol=tol)
        stored = (rec.attachments or {}).get("nu_property")
        counts = table.category_counts()
        facts = [
            ("ν", nu), ("training rows", n),
            ("ρ (threshold on Σ αⱼK(xⱼ, x), this scaling: eᵀα = νn)", rho),
            ("ρ in the paper's scaling (eᵀα = 1): ρ / (νn)", rho / (nu * n)),
            ("outlier share (score < −kkt_tol)", check["outlier_share"]),
            ("share with score < 0", check["strict_outlier_share"]),
            ("support-vector share (α > 0)", check["support_share"]),
            ("ν-property: outlier share ≤ ν ≤ support-vector share", check["holds"]),
            ("tolerance of the outlier count (kkt_tol)", tol),
        ]
        if isinstance(stored, Mapping) and "holds" in stored:
            facts.append(("ν-property as stored with the run", bool(stored["holds"])))
        tables = [{"columns": ("category", "rows", "meaning"),
                   "rows": tuple((CATEGORY_WORDS[c], counts[c], ONE_CLASS_CATEGORIES[c])
                                 for c in ONE_CLASS_CATEGORIES),
                   "note": "Rows by their multiplier against its bounds."}]
        hold = (rec.attachments or {}).get("holdout")
        conf = hold.get("confusion") if isinstance(hold, Mapping) else None
        if isinstance(conf, Mapping):
            tables.append({
                "columns": ("", "flagged (score < 0)", "passed (score ≥ 0)"),
                "rows": (("known outlier", conf.get("flagged_known"), conf.get("missed")),
                         ("not known as outlier", conf.get("flagged_unknown"),
                          conf.get("passed"))),
                "note": "Held-out rows: flags against the known-outlier column."})
        flags = []
        if not check["holds"]:
            flags.append({"code": "nu_property_fails", "severity": "caution",
                          "message": (f"the ν-property does not hold: outlier share "
                                      f"{check['outlier_share']:.4g}, ν {nu:g}, support-vector "
                                      f"share {check['support_share']:.4g}; the run may not "
                                      "be at its optimum")})
        words = np.array([CATEGORY_WORDS[c] for c in cat], dtype=object)
        return {
            "title": f"One-class boundary (ν = {nu:g})",
            "intro": ("Each training row's kernel expansion g(x) = Σ αⱼK(xⱼ, x) against the "
                      f"threshold ρ = {rho:.6g}; the score is f(x) = g(x) − ρ and a row is "
                      "flagged as unusual where f(x) < 0. ν bounds the share of flagged "
                      "training rows from above and the share of support vectors from below "
                      "(Schölkopf et al. 2001, Proposition 4)."),
            "facts": facts,
            "tables": tables,
            "figures": [
                {"key": "score_distribution", "kind": "score_distribution",
                 "title": "distribution of g(x) with the threshold ρ",
                 "caption": (f"Histogram of g(x) = f(x) + ρ over the {n} training rows, "
                             f"stacked by category; the vertical line is ρ = {rho:.4g}. Rows "
                             "left of it are flagged."),
                 "data": {"expansion": score + rho, "rho": rho, "category": words}},
                {"key": "nu_shares", "kind": "nu_shares",
                 "title": "ν against the shares of outliers and support vectors",
                 "caption": ("Outlier share ≤ ν ≤ support-vector share must hold at the "
                             "optimum (Schölkopf et al. 2001, Proposition 4); outliers are "
                             f"rows with score below −kkt_tol = −{figure_text(tol)}. "
                             + ("It holds for this run." if check["holds"] else
                                "It does NOT hold for this run.")),
                 "data": {"nu": nu, "outlier_share": check["outlier_share"],
                          "support_share": check["support_share"], "holds": check["holds"]}},
            ],
            "flags": flags,
        }

    def run_lines(self, summary: Mapping[str, Any]) -> list[tuple[str, str]]:
        nuc = summary.get("nu_property") or {}
        lines = [("task", f"one-class, ν = {summary.get('nu'):g}; outlier share "
                          f"{_num(nuc.get('outlier_share'), '.4f')} <= ν <= support share "
                          f"{_num(nuc.get('support_share'), '.4f')}: "
                          + ("holds" if nuc.get("holds") else "DOES NOT HOLD"))]
        hold = summary.get("holdout")
        if hold:
            lines.append(("held-out", _flag_text(hold)))
        return lines

    def applied_lines(self, facts: Mapping[str, Any] | None) -> list[str]:
        if not facts:
            return []
        out = [f"flagged {facts['n_flagged']} of {facts['n']} as outliers ({facts['rule']})"]
        c = facts.get("confusion")
        if c:
            out.append(f"known outliers: flagged {c['flagged_known']}, missed {c['missed']}; "
                       f"others: false alarms {c['flagged_unknown']}, passed {c['passed']}")
        return out

    def applied(self, problem: Any, values: np.ndarray,
                data: Any) -> tuple[np.ndarray, dict[str, Any] | None]:
        """``inlier`` / ``outlier`` per row; share flagged, and the confusion when the rows
        carry the known-outlier column."""
        from ..measures import novelty_measures
        from ..training_kinds import known_outliers

        v = np.asarray(values, np.float64)
        labels = np.where(v >= 0, "inlier", "outlier").astype(object)
        return labels, novelty_measures(v, None if data.labels is None
                                        else known_outliers(data))

    def output_columns(self, values: np.ndarray,
                       labels: np.ndarray) -> dict[str, list[Any]] | None:
        v = np.asarray(values, np.float64)
        return {"score": [float(x) for x in v], "inlier": [int(x >= 0) for x in v]}

    def held_out(self, prediction: Any, truth: np.ndarray | None,
                 classes: Sequence[Any]) -> dict[str, Any]:
        """Share flagged and, with known outliers (``truth``, booleans), the confusion."""
        from ..measures import novelty_measures

        values = np.asarray(getattr(prediction, "values", prediction), np.float64)
        return novelty_measures(values.reshape(-1), truth)


def _num(v: Any, spec: str) -> str:
    return "n/a" if v is None else format(float(v), spec)


def _flag_text(f: Mapping[str, Any]) -> str:
    text = f"flagged {f['n_flagged']} of {f['n']}"
    conf = f.get("confusion")
    if conf:
        text += (f"; known outliers flagged {conf['flagged_known']}, missed "
                 f"{conf['missed']}, false alarms {conf['flagged_unknown']}")
    return text


TASK = OneClassTask()
