"""The ``multiclass`` task: one-vs-one over k ≥ 3 classes.

Members
-------
Classes c₀ < c₁ < … < c_{k−1} in the order of :func:`~solver.tasks._labels.class_order`
(recorded in the parent manifest, ``info.classes``).  For every pair i < j (in the order
(0,1), (0,2), …, (0,k−1), (1,2), …) one binary problem is built from the rows of the two
classes only, exactly as ``train`` builds a binary problem from a file holding only those
rows: the standardiser is fitted on the pair's rows, gamma (when not given) comes from
the median heuristic on them, and the positive label is the later class c_j.  A pair is
therefore bitwise the same run as a binary ``train`` on those two classes alone
(``tests/test_multiclass.py``).

Class weights are resolved once over all n rows (``balanced``: w_c = n / (k · n_c)) and
each pair gets its two classes' factors; per-row weights follow their rows.  Either way
the pair's bounds are uᵢ = C · w_class(i) · w_row(i).

Prediction rule
---------------
Pair (i, j) with decision value f_ij(x) votes for c_j when f_ij(x) > 0, else for c_i.
The predicted class has the most votes; when several classes share the highest count,
the tie goes to the class that comes first in the class order (the smallest i).  The
rule is stored in the parent manifest (``info.vote_rule``, ``info.tie_rule``).
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping, Sequence
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..problem import DualProblem, binary_classification
from ._base import MemberSpec, Prediction, Task, WeightSpec
from ._labels import BALANCED_RULE, class_order, resolve_class_weight

__all__ = ["MultiClassTask", "TASK", "MAX_CLASSES", "VOTE_RULE", "TIE_RULE", "vote"]

#: default limit on the number of classes (``max_classes`` option, ``--max-classes``).
MAX_CLASSES = 30
VOTE_RULE = ("pair (i, j), i < j in the class order, votes for class j where its decision "
             "value f_ij(x) > 0, else for class i; the predicted class has the most votes")
TIE_RULE = ("when several classes share the highest vote count, the class that comes first "
            "in the class order wins")


def vote(values: np.ndarray, pairs: Sequence[tuple[int, int]], k: int
         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(winner index (m,), votes (m, k), tie (m,) bool) from pair values (m, q)."""
    m = values.shape[0]
    votes = np.zeros((m, k), dtype=np.int64)
    rows = np.arange(m)
    for p, (i, j) in enumerate(pairs):
        winner = np.where(values[:, p] > 0, j, i)
        np.add.at(votes, (rows, winner), 1)
    best = votes.max(axis=1) if m else np.zeros(0, dtype=np.int64)
    win = np.argmax(votes, axis=1) if m else np.zeros(0, dtype=np.int64)  # first maximum
    tie = (votes == best[:, None]).sum(axis=1) > 1 if m else np.zeros(0, dtype=bool)
    return win, votes, tie


def _pairs(k: int) -> list[tuple[int, int]]:
    return [(i, j) for i in range(k) for j in range(i + 1, k)]


def _plain(v: Any) -> Any:
    return v.item() if isinstance(v, np.generic) else v


class MultiClassTask(Task):
    """k ≥ 3 classes by one-vs-one voting over k(k−1)/2 binary pair runs."""

    name = "multiclass"
    problem_kinds = ("binary_classification",)
    parent_record = True
    categories = ("non_support", "margin_support", "bounded_inside_margin",
                  "bounded_misclassified", "bounded_on_margin", "not_in_pair")
    measures = ("matrix", "accuracy", "balanced_accuracy", "recall")

    def classes(self, labels: np.ndarray, *, max_classes: int = MAX_CLASSES,
                label_name: str | None = None) -> list[Hashable]:
        """The class order, after the checks every multi-class fit makes."""
        labels = np.asarray(labels)
        classes = class_order(labels)
        what = f"label column {label_name!r}" if label_name else "the label column"
        if len(classes) > max_classes:
            raise InvalidInputError(
                f"{what} has {len(classes)} distinct values, more than the limit of "
                f"{max_classes} classes (a continuous column passed as the label is the usual "
                "cause; raise the limit with --max-classes)")
        if len(classes) < 3:
            raise InvalidInputError(f"one-vs-one needs at least 3 classes, found {len(classes)}")
        for c in classes:
            cnt = int(np.sum(labels == c))
            if cnt < 2:
                raise InvalidInputError(
                    f"class {str(c)!r} of {what} has {cnt} row; every class needs at least 2")
        return classes

    def members(
        self, labels: np.ndarray, *, weights: WeightSpec | None = None,
        options: Mapping[str, Any] | None = None,
    ) -> list[MemberSpec]:
        labels = np.asarray(labels)
        opts = dict(options or {})
        classes = self.classes(labels, max_classes=int(opts.get("max_classes") or MAX_CLASSES),
                               label_name=opts.get("label_name"))
        w = weights or WeightSpec()
        cw = resolve_class_weight(w.class_weight, labels, classes)
        out = []
        for i, j in _pairs(len(classes)):
            a, b = classes[i], classes[j]
            rows = np.flatnonzero((labels == a) | (labels == b))
            sw = None if w.sample_weight is None else np.asarray(w.sample_weight)[rows]
            pcw = None if cw is None else {a: cw.get(a, 1.0), b: cw.get(b, 1.0)}
            out.append(MemberSpec(
                role="pair", key=(str(a), str(b)), rows=rows, labels=labels[rows],
                build={"class_weight": pcw,
                       "sample_weight": sw, "positive_label": b}))
        return out

    def build_problem(
        self, X: np.ndarray, member: MemberSpec, *, kernel: Any, C: float
    ) -> DualProblem:
        return binary_classification(
            X, member.labels, kernel=kernel, C=C,
            class_weight=member.build.get("class_weight"),
            sample_weight=member.build.get("sample_weight"),
            positive_label=member.build.get("positive_label"))

    def describe(self, members: Sequence[MemberSpec], labels: np.ndarray | None = None,
                 weights: WeightSpec | None = None) -> dict[str, Any]:
        keys = [list(m.key) for m in members if m.key is not None]
        classes = [keys[0][0]] + [k[1] for k in keys if k[0] == keys[0][0]]
        out: dict[str, Any] = {
            "classes": classes,
            "pairs": keys,
            "vote_rule": VOTE_RULE,
            "tie_rule": TIE_RULE,
            "pair_rule": "each pair trains on the rows of its two classes only, with its own "
                         "standardiser and (when not given) its own median-heuristic gamma; "
                         "its positive label is the later class",
        }
        if labels is not None:
            lab = np.asarray(labels)
            out["class_values"] = [_plain(v) for v in class_order(lab)]
            out["class_counts"] = {str(c): int(np.sum(lab == c)) for c in class_order(lab)}
        if weights is not None and weights.class_weight is not None and labels is not None:
            cw = resolve_class_weight(weights.class_weight, np.asarray(labels),
                                      class_order(np.asarray(labels)))
            out["class_weight"] = {str(k): float(v) for k, v in (cw or {}).items()}
            out["class_weight_rule"] = (BALANCED_RULE if weights.class_weight == "balanced"
                                        else "given")
        return out

    def predict(self, models: Sequence[Any], X: np.ndarray,
                info: Mapping[str, Any] | None = None) -> Prediction:
        info = dict(info or {})
        class_values = list(info["class_values"])
        k = len(class_values)
        pairs = _pairs(k)
        if len(models) != len(pairs):
            raise InvalidInputError(f"{k} classes need {len(pairs)} pair models, "
                                    f"got {len(models)}")
        values = np.column_stack([m.values(X) for m in models]) if len(models) else None
        win, votes, tie = vote(values, pairs, k)
        cv = np.empty(k, dtype=object)
        cv[:] = class_values
        keys = tuple(tuple(p) for p in info.get("pairs") or [])
        return Prediction(labels=cv[win], values=values, member_keys=keys, votes=votes,
                          classes=tuple(class_values), tie=tie)

    def held_out(self, prediction: Prediction, truth: np.ndarray,
                 classes: Sequence[Any]) -> dict[str, Any]:
        return confusion_k(truth, prediction.labels, classes)

    def report_section(self, parent: Any, members: Sequence[Any]) -> dict[str, Any] | None:
        """The multi-class section of a parent's report: a per-pair convergence table
        (iterations, violation, gap, status, verdict) with the slowest pair and the worst
        verdict called out, the held-out k × k confusion matrix and per-class recall.

        members : the member runs in the parent's member order (pairs and challengers).
        Per-pair figures are not repeated here: ``kktrace report PARENT --pair A,B`` gives
        one pair's full pages.
        """
        if parent is None:
            return None  # a pair run reported on its own: the binary pages say it all
        from ..status import Status

        info, summary = dict(parent.info), dict(parent.summary)
        roles = [(m.role, tuple(m.key or ())) for m in parent.members]
        verdicts: dict[tuple[str, ...], str] = {}
        for (role, key), rec in zip(roles, members, strict=True):
            comp = (rec.attachments or {}).get("comparison")
            if role.endswith("_challenger") and comp:
                verdicts[key] = str(comp.get("verdict"))
        rows, flags = [], []
        worst_v = None
        order = ("agree", "agree_within_tolerances", "disagree")
        for (role, key), rec in zip(roles, members, strict=True):
            if role != "pair":
                continue
            r, c = rec.result, rec.result.certificate
            status = r.status.label if isinstance(r.status, Status) else str(r.status)
            v = verdicts.get(key, "no challenger")
            rows.append((" vs ".join(key), rec.run_id, int(r.iterations),
                         float(c.max_violation), float(c.duality_gap), status, v,
                         int(c.n_support), float(r.seconds)))
            if status != "converged":
                flags.append({"code": "pair_not_converged", "severity": "stop",
                              "message": f"pair {' vs '.join(key)} did not converge "
                                         f"({status}); the model's votes rest on it"})
            if v in order and (worst_v is None or order.index(v) > order.index(worst_v[1])):
                worst_v = (key, v)
        if worst_v is not None and worst_v[1] == "disagree":
            flags.append({"code": "pair_solvers_disagree", "severity": "caution",
                          "message": f"the solvers disagree on pair {' vs '.join(worst_v[0])}"})
        slow = max(rows, key=lambda t: t[2])
        facts = [
            ("classes (class order)", ", ".join(str(c) for c in info["classes"])),
            ("pairs", len(rows)),
            ("vote rule", info.get("vote_rule")), ("tie rule", info.get("tie_rule")),
            ("slowest pair", f"{slow[0]}: {slow[2]} iterations, {slow[8]:.3g} s"),
            ("worst verdict", "no challenger ran" if worst_v is None else
             f"{worst_v[1]} (every pair)" if len({t[6] for t in rows}) == 1 else
             f"{worst_v[1]} (pair {' vs '.join(worst_v[0])})"),
            ("worst status", summary.get("status")),
            ("largest violation over the pairs", max(t[3] for t in rows)),
            ("pairs ran", (info.get("execution") or {}).get("mode", "sequential")),
        ]
        if info.get("class_weight"):
            facts.append(("class weights (scale C per class)", ", ".join(
                f"{k} {v:.6g}" for k, v in info["class_weight"].items())
                + f" ({info.get('class_weight_rule', 'given')})"))
        wc = (info.get("options") or {}).get("weight_column")
        if wc:
            facts.append(("per-row weights from column", wc))
        tables = [{"columns": ["pair", "run", "iterations", "violation", "duality gap",
                               "status", "verdict", "support vectors", "seconds"],
                   "rows": rows,
                   "note": (f"slowest pair {slow[0]}; worst verdict "
                            f"{'n/a' if worst_v is None else worst_v[1]}. One pair's full "
                            f"pages: kktrace report {parent.run_id} --pair A,B")}]
        hold = (parent.attachments or {}).get("holdout")
        if hold:
            labs = [str(v) for v in hold["labels"]]
            tables.append({"columns": ["true \\ predicted", *labs],
                           "rows": [(lab, *row) for lab, row in
                                    zip(labs, hold["matrix"], strict=True)],
                           "note": f"held-out rows {hold['n']}: rows true class, columns "
                                   f"predicted; {hold.get('ties', 0)} tied votes"})
            tables.append({"columns": ["class", "recall"],
                           "rows": [(k, v) for k, v in hold["recall"].items()],
                           "note": f"accuracy {hold['accuracy']:.4f}, balanced accuracy "
                                   f"{hold['balanced_accuracy']:.4f}"})
            facts += [("held-out accuracy", hold["accuracy"]),
                      ("held-out balanced accuracy", hold["balanced_accuracy"])]
        figures: list[dict[str, Any]] = []
        from ..calibration.evidence import multiclass_report_part

        probs = multiclass_report_part((parent.attachments or {}).get("calibration"))
        if probs is not None:  # trained with probabilities: coupling, pair sigmoids, evidence
            facts += probs["facts"]
            tables += probs["tables"]
            figures += probs["figures"]
        return {
            "title": f"One-vs-one model over {len(info['classes'])} classes",
            "intro": (f"Multi-class model {parent.run_id}: {len(rows)} pair runs, each a "
                      "complete binary run on the rows of its two classes, tied together by "
                      "this parent record (verify checks every pair). The pages below show "
                      "one pair in full; the table lists every pair."),
            "facts": facts, "tables": tables, "figures": figures, "flags": flags,
        }

    def export_mapping(self, parent: Any, members: Sequence[Any]) -> Any:
        """The ONNX export subject of a one-vs-one parent (:mod:`solver.exchange.subjects`).

        members : the pair runs in pair order.  The check rows are the training rows of
        every class, read back in raw units from the first pair that holds the class
        (class 0 and 1 from pair (0, 1), class j ≥ 2 from pair (0, j)).
        """
        from ..exchange.subjects import one_vs_one_subject

        info = dict(parent.info)
        pairs = _pairs(len(info["class_values"]))
        if len(members) != len(pairs):
            raise InvalidInputError(f"parent {parent.run_id}: {len(pairs)} pairs expected, "
                                    f"{len(members)} pair runs found")
        blocks = []
        for (i, j), rec in zip(pairs, members, strict=True):
            raw = rec.problem.X * rec.standardiser.scale + rec.standardiser.centre
            positive = rec.problem.y > 0  # the later class j
            if i == 0:
                blocks += [raw[~positive]] if j == 1 else []
                blocks.append(raw[positive])
        return one_vs_one_subject(
            parent, members, pairs=pairs, training=np.vstack(blocks),
            predict=lambda models, X: self.predict(models, X, info))


def confusion_k(truth: np.ndarray, pred: np.ndarray, classes: Sequence[Any]) -> dict[str, Any]:
    """k × k confusion matrix (rows: true class, columns: predicted; class order),
    accuracy, balanced accuracy (mean recall over classes present) and per-class recall."""
    names = [str(c) for c in classes]
    ts = np.array([str(v) for v in np.asarray(truth, dtype=object).tolist()])
    ps = np.array([str(v) for v in np.asarray(pred, dtype=object).tolist()])
    unknown = sorted(set(ts.tolist()) - set(names))
    if unknown:
        raise InvalidInputError(
            f"held-out labels {', '.join(map(repr, unknown))} were not seen in training "
            f"(training classes: {', '.join(map(repr, names))})")
    m = [[int(np.sum((ts == a) & (ps == b))) for b in names] for a in names]
    n = int(ts.size)
    acc = sum(m[i][i] for i in range(len(names))) / n if n else float("nan")
    recall = {names[i]: (m[i][i] / sum(m[i]) if sum(m[i]) else None) for i in range(len(names))}
    present = [r for r in recall.values() if r is not None]
    return {
        "labels": [_plain(c) for c in classes],
        "matrix": m,
        "matrix_layout": "rows: true label, columns: predicted label",
        "n": n,
        "accuracy": float(acc),
        "balanced_accuracy": float(np.mean(present)) if present else float("nan"),
        "recall": recall,
    }


TASK = MultiClassTask()
