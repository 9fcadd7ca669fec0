"""What is exported: a stored run or a multi-class parent, as one :class:`ExportSubject`.

A subject knows how to build its ONNX model and how to read kktrace's decision values,
predicted classes and probabilities both from kktrace's own model and from an
evaluator's outputs, so that :mod:`solver.exchange.export` checks every kind the same way.
Runs map by problem kind (:data:`RUN_MAPPINGS`); a one-vs-one parent maps through its task
(:meth:`solver.tasks.multiclass.MultiClassTask.export_mapping` → :func:`one_vs_one_subject`).

Layouts
-------
``binary``  ``Scaler`` → ``SVMClassifier`` (two classes);
``regression``  ``Scaler`` → ``SVMRegressor``;
``one_class``  ``Scaler`` → ``SVMRegressor`` → ``Sign``;
``one_vs_one_pooled``  the standard's own one-vs-one ``SVMClassifier`` over every pair —
    possible only when all pairs share one standardiser and one kernel in float32 (e.g.
    ``--no-standardise`` with a given gamma);
``one_vs_one_votes``  one ``Scaler`` → ``SVMRegressor`` per pair (each pair keeps its own
    standardiser and gamma, as kktrace trains them), the pair values concatenated and
    counted into votes with the task's own rule (:func:`~.onnx_codec.vote_graph`).

Probabilities: a run (or every pair) with a fitted sigmoid (``calibration`` attachment,
Platt scaling) exports it as the standard's ``prob_a`` / ``prob_b`` in the layouts with an
``SVMClassifier``.  The votes layout has no operator that carries sigmoids and says so.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..model import model_from_solution
from ..problem import ONE_CLASS_KIND, REGRESSION_KIND
from ..run import RunRecord
from .onnx_codec import (
    KernelExpansion,
    PairwiseExpansion,
    classifier_graph,
    kernel_attributes,
    regressor_graph,
    vote_graph,
)

__all__ = ["ExportSubject", "RUN_MAPPINGS", "run_subject", "one_vs_one_subject",
           "sigmoid_attributes", "pairwise_expansion", "LAYOUTS"]

LAYOUTS = ("binary", "regression", "one_class", "one_vs_one_pooled", "one_vs_one_votes")

Outputs = list[np.ndarray]


@dataclass(frozen=True, eq=False)
class ExportSubject:
    """One exportable model and how to read it back.

    run_id : the exported run or parent; layout : one of :data:`LAYOUTS`;
    build(doc, integer_labels, probabilities) → ONNX model (``integer_labels`` writes the
    labels as 0 … k−1, for the reference evaluator; ``probabilities`` adds the sigmoids);
    training : (n, d) training rows in raw units;
    ours(X) → (m, q) kktrace decision values (one column per pair, or one column);
    our_labels(X) → (m,) predicted classes as text, or None (regression);
    theirs(outputs) → (m, q) decision values from an evaluator's outputs of the model built
    without probabilities; their_labels(outputs, classes) → (m,) classes as text or None;
    our_probabilities(X) / their_probabilities(outputs) → (m, k) or None;
    classes : class labels in model order (None for regression and one-class);
    probability_note : why probabilities are or are not part of the export.
    """

    run_id: str
    layout: str
    build: Callable[[str, bool, bool], Any]
    training: np.ndarray
    ours: Callable[[np.ndarray], np.ndarray]
    our_labels: Callable[[np.ndarray], np.ndarray | None]
    theirs: Callable[[Outputs], np.ndarray]
    their_labels: Callable[[Outputs, bool], np.ndarray | None]
    our_probabilities: Callable[[np.ndarray], np.ndarray] | None
    their_probabilities: Callable[[Outputs], np.ndarray] | None
    classes: tuple[Any, ...] | None
    probability_note: str


def _text(a: Any) -> np.ndarray:
    return np.asarray([str(v) for v in np.asarray(a).reshape(-1).tolist()])


def _raw(rec: RunRecord) -> np.ndarray:
    std = rec.standardiser
    return rec.problem.X * std.scale + std.centre


def _model(rec: RunRecord) -> Any:
    return model_from_solution(rec.problem, rec.result, rec.standardiser)


def _labels_from(out: Outputs, integer_labels: bool, classes: Sequence[Any]) -> np.ndarray:
    lab = np.asarray(out[0]).reshape(-1)
    if integer_labels:  # the copy written with 0 … k−1
        return _text(np.asarray(classes, dtype=object)[lab.astype(np.int64)])
    return _text(lab)


def _calibration(rec: RunRecord) -> Any:
    """The run's fitted sigmoid (:class:`~solver.calibration.Calibration`) or None."""
    raw = rec.attachments.get("calibration")
    if not raw:
        return None
    from ..calibration import Calibration

    cal = Calibration.from_attachment(raw)
    return cal if cal.success else None


def sigmoid_attributes(A: float, B: float) -> tuple[float, float]:
    """The standard's (prob_a, prob_b) for kktrace's sigmoid P(positive | f) =
    1 / (1 + exp(A f + B)).

    Exported pair values are g = −f (the standard votes for the first listed class, kktrace's
    negative one, when g > 0) and both evaluators give P(first class | g) =
    1 / (1 + exp(prob_a · g + prob_b)); P(negative | f) = 1 / (1 + exp(−A f − B)) =
    1 / (1 + exp(A g − B)), so prob_a = A and prob_b = −B.
    """
    return float(A), -float(B)


# --------------------------------------------------------------------------- runs


def _binary_expansion(rec: RunRecord) -> tuple[PairwiseExpansion, Any]:
    m = _model(rec)
    y = np.sign(m.coefficients)
    # class 0 (first listed) is kktrace's negative label; the standard votes for class 0 when
    # its pair value is > 0, so the exported pair value is −f: coefficients −αy, rho −b.
    order = np.concatenate([np.flatnonzero(y < 0), np.flatnonzero(y >= 0)])
    exp = PairwiseExpansion(
        points=m.support_points[order], per_class=(int(np.sum(y < 0)), int(np.sum(y >= 0))),
        coefficients=-m.coefficients[order][None, :], biases=np.array([-m.bias]),
        labels=tuple(m.labels), kernel=m.kernel, centre=m.standardiser.centre,
        scale=m.standardiser.scale)
    return exp, m


def _binary_subject(rec: RunRecord) -> ExportSubject:
    exp, m = _binary_expansion(rec)
    cal = _calibration(rec)
    sig = None if cal is None else [sigmoid_attributes(cal.A, cal.B)]

    def build(doc: str, integer_labels: bool, probabilities: bool) -> Any:
        return classifier_graph(exp, doc=doc, integer_labels=integer_labels or None,
                                sigmoids=sig if probabilities else None)

    classes = tuple(m.labels)
    return ExportSubject(
        run_id=str(rec.run_id), layout="binary", build=build, training=_raw(rec),
        ours=lambda X: m.values(X)[:, None],
        our_labels=lambda X: _text(m.classify(X)),
        # second output without probability attributes: [−g, g] for g = −f
        theirs=lambda out: np.asarray(out[1], dtype=np.float64)[:, :1],
        their_labels=lambda out, ints: _labels_from(out, ints, classes),
        our_probabilities=None if cal is None else (lambda X: cal.probabilities(m.values(X))),
        their_probabilities=None if cal is None else (
            lambda out: np.asarray(out[1], dtype=np.float64)),
        classes=classes,
        probability_note=("the run's sigmoid (Platt scaling) is exported as prob_a / prob_b"
                          if cal is not None else "the run has no fitted sigmoid"))


def _kernel_expansion(rec: RunRecord) -> tuple[KernelExpansion, Any]:
    m = _model(rec)
    return KernelExpansion(points=m.support_points, coefficients=m.coefficients, bias=m.bias,
                           kernel=m.kernel, centre=m.standardiser.centre,
                           scale=m.standardiser.scale), m


def _inlier_text(f: np.ndarray) -> np.ndarray:
    # the flag output is Sign(f): 0 on the boundary counts as inlier, as kktrace's f ≥ 0
    return np.where(np.asarray(f).reshape(-1) >= 0, "inlier", "outlier")


def _regressor_subject(rec: RunRecord, *, flag: bool) -> ExportSubject:
    exp, m = _kernel_expansion(rec)
    return ExportSubject(
        run_id=str(rec.run_id), layout="one_class" if flag else "regression",
        build=lambda doc, ints, probs: regressor_graph(exp, doc=doc, flag=flag),
        training=_raw(rec), ours=lambda X: m.values(X)[:, None],
        our_labels=(lambda X: _inlier_text(m.values(X))) if flag else (lambda X: None),
        theirs=lambda out: np.asarray(out[0], dtype=np.float64)[:, :1],
        their_labels=((lambda out, ints: _inlier_text(np.asarray(out[1])[:, 0])) if flag
                      else (lambda out, ints: None)),
        our_probabilities=None, their_probabilities=None, classes=None,
        probability_note="no probabilities for this kind")


#: problem kind of a run → its subject.
RUN_MAPPINGS: dict[str, Callable[[RunRecord], ExportSubject]] = {
    "binary_classification": _binary_subject,
    REGRESSION_KIND: lambda rec: _regressor_subject(rec, flag=False),
    ONE_CLASS_KIND: lambda rec: _regressor_subject(rec, flag=True),
}


def _refuse_kernel(run_id: Any, kernel: Any) -> None:
    if kernel.name in ("callable", "precomputed"):
        raise InvalidInputError(f"run {run_id}: a {kernel.name} kernel cannot be expressed by "
                                "the ONNX SVM operators")


def run_subject(rec: RunRecord) -> ExportSubject:
    """The subject for a stored run (refusing kinds and kernels the standard cannot hold)."""
    kind = rec.problem.kind
    found = RUN_MAPPINGS.get(kind)
    if found is None:
        raise InvalidInputError(f"run {rec.run_id}: problem kind {kind!r} has no ONNX export "
                                f"mapping (kktrace exports {', '.join(sorted(RUN_MAPPINGS))})")
    _refuse_kernel(rec.run_id, rec.problem.kernel)
    return found(rec)


# --------------------------------------------------------------------------- one-vs-one


def _f32_key(a: np.ndarray) -> bytes:
    return np.asarray(a, dtype=np.float32).tobytes()


def _front_key(m: Any) -> tuple[Any, ...]:
    """Standardiser and kernel of a pair model as the float32 numbers an export writes."""
    kind, params = kernel_attributes(m.kernel)
    return (kind, _f32_key(params), _f32_key(m.standardiser.centre),
            _f32_key(m.standardiser.scale))


def _shared_front(models: Sequence[Any]) -> bool:
    """True when every pair has the same standardiser and kernel once written as float32."""
    return len({_front_key(m) for m in models}) == 1


def _pooled_expansion(models: Sequence[Any], pairs: Sequence[tuple[int, int]],
                      classes: Sequence[Any]) -> PairwiseExpansion:
    """The standard's one-vs-one layout from the pair models (pair (i, j): positive class j).

    Support points of one class shared by several pairs are merged by their bytes; a point
    that is a support vector in some of its pairs only gets coefficient 0 in the others.
    Pair (i, j) is exported as g_ij = −f_ij so that g_ij > 0 votes i, as the standard counts.
    """
    index: dict[tuple[int, bytes], int] = {}
    points: list[np.ndarray] = []
    row_class: list[int] = []
    spec = []
    for (i, j), m in zip(pairs, models, strict=True):
        y = np.sign(m.coefficients)
        rows = []
        for p, c in zip(m.support_points, np.where(y > 0, j, i), strict=True):
            key = (int(c), p.tobytes())
            if key not in index:
                index[key] = len(points)
                points.append(p)
                row_class.append(int(c))
            rows.append(index[key])
        spec.append((i, j, np.asarray(rows, dtype=np.int64), -m.coefficients, -m.bias))
    first = models[0]
    return pairwise_expansion(tuple(classes), np.asarray(row_class), np.asarray(points),
                              spec, first.kernel, first.standardiser.centre,
                              first.standardiser.scale)


def pairwise_expansion(
    labels: tuple[Any, ...], row_class: np.ndarray, points: np.ndarray,
    pairs: list[tuple[int, int, np.ndarray, np.ndarray, float]], kernel: Any,
    centre: np.ndarray, scale: np.ndarray,
) -> PairwiseExpansion:
    """The standard's one-vs-one layout from k(k−1)/2 binary expansions.

    labels : the k classes in order; row_class (n,) class index of every training row;
    points (n, d) standardised training rows; pairs : for each pair (i, j), i < j, in the
    standard's order (0,1), (0,2), …: (i, j, rows, coefficients, bias) with ``rows`` the
    training rows of the pair's support vectors and the expansion oriented so that
    f_ij > 0 is a vote for class i.  A row that is a support vector in some of its pairs
    only gets coefficient 0 in the others.
    """
    k = len(labels)
    used = np.zeros(row_class.shape[0], dtype=bool)
    for _, _, rows, _, _ in pairs:
        used[np.asarray(rows, dtype=np.int64)] = True
    order = np.concatenate([np.flatnonzero(used & (row_class == c)) for c in range(k)])
    column = np.full(row_class.shape[0], -1, dtype=np.int64)
    column[order] = np.arange(order.size)
    coef = np.zeros((k - 1, order.size))
    biases = []
    expected = [(i, j) for i in range(k) for j in range(i + 1, k)]
    if [(i, j) for i, j, *_ in pairs] != expected:
        raise InvalidInputError("pairs must come in the order (0,1), (0,2), …, (1,2), …")
    for i, j, rows, a, b in pairs:
        rows = np.asarray(rows, dtype=np.int64)
        a = np.asarray(a, dtype=np.float64)
        ci = row_class[rows] == i
        cj = row_class[rows] == j
        if not np.all(ci | cj):
            raise InvalidInputError(f"pair ({i}, {j}) lists a row of another class")
        # add, not assign: equal points of one class (duplicate rows) share a column
        np.add.at(coef[j - 1], column[rows[ci]], a[ci])
        np.add.at(coef[i], column[rows[cj]], a[cj])
        biases.append(float(b))
    per_class = tuple(int(np.sum(row_class[order] == c)) for c in range(k))
    return PairwiseExpansion(points=points[order], per_class=per_class, coefficients=coef,
                             biases=np.asarray(biases), labels=tuple(labels), kernel=kernel,
                             centre=np.asarray(centre), scale=np.asarray(scale))


def one_vs_one_subject(parent: Any, members: Sequence[RunRecord], *, pairs: Sequence[
        tuple[int, int]], predict: Callable[[Sequence[Any], np.ndarray], Any],
        training: np.ndarray) -> ExportSubject:
    """The subject of a one-vs-one parent.

    members : the pair runs in pair order (0,1), (0,2), …; pairs : their class indices;
    predict(models, X) → the task's :class:`~solver.tasks.Prediction` (labels, values);
    training : (n, d) raw training rows of the whole parent.
    """
    for rec in members:
        _refuse_kernel(rec.run_id, rec.problem.kernel)
    models = [_model(rec) for rec in members]
    classes = tuple(parent.info["class_values"])
    k = len(classes)

    def ours(X: np.ndarray) -> np.ndarray:
        return np.column_stack([m.values(X) for m in models])

    def our_labels(X: np.ndarray) -> np.ndarray:
        return _text(predict(models, X).labels)

    cals = [_calibration(rec) for rec in members]
    with_sig = all(c is not None for c in cals)
    if _shared_front(models):
        exp = _pooled_expansion(models, pairs, classes)
        sig = [sigmoid_attributes(c.A, c.B) for c in cals] if with_sig else None

        def build(doc: str, integer_labels: bool, probabilities: bool) -> Any:
            return classifier_graph(exp, doc=doc, integer_labels=integer_labels or None,
                                    sigmoids=sig if probabilities else None)

        def our_probabilities(X: np.ndarray) -> np.ndarray:
            from ..calibration import couple_pairwise_rows

            F = ours(X)
            # r_ij = P(class i | i or j): class i is the pair's negative (first) class
            P = np.column_stack([c.probabilities(F[:, p])[:, 0] for p, c in enumerate(cals)])
            return couple_pairwise_rows(P, k)

        return ExportSubject(
            run_id=str(parent.run_id), layout="one_vs_one_pooled", build=build,
            training=training, ours=ours, our_labels=our_labels,
            theirs=lambda out: -np.asarray(out[1], dtype=np.float64),
            their_labels=lambda out, ints: _labels_from(out, ints, classes),
            our_probabilities=our_probabilities if with_sig else None,
            their_probabilities=(lambda out: np.asarray(out[1], dtype=np.float64))
            if with_sig else None,
            classes=classes,
            probability_note=("every pair's sigmoid is exported as prob_a / prob_b; the "
                              "evaluators couple them (pairwise coupling)" if with_sig
                              else "the pairs have no fitted sigmoids"))
    regs = [KernelExpansion(points=m.support_points, coefficients=m.coefficients, bias=m.bias,
                            kernel=m.kernel, centre=m.standardiser.centre,
                            scale=m.standardiser.scale) for m in models]
    return ExportSubject(
        run_id=str(parent.run_id), layout="one_vs_one_votes",
        build=lambda doc, ints, probs: vote_graph(regs, pairs, classes, doc=doc,
                                                  integer_labels=ints),
        training=training, ours=ours, our_labels=our_labels,
        theirs=lambda out: np.asarray(out[1], dtype=np.float64),
        their_labels=lambda out, ints: _labels_from(out, ints, classes),
        our_probabilities=None, their_probabilities=None, classes=classes,
        probability_note=("the pairs have their own standardisers or kernels, so the export "
                          "keeps one SVMRegressor per pair and counts votes; no standard "
                          "operator carries their sigmoids, so probabilities are not exported"
                          if with_sig else "the pairs have no fitted sigmoids"))
