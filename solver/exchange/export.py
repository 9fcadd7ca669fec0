"""Export a stored run's model to ONNX and check the file with two independent evaluators.

Each problem kind maps to the standard's operators through :data:`EXPORT_MAPPINGS`
(problem kind → function building the ONNX model and reading kktrace's decision values
back out of the evaluators' outputs); nothing branches on the kind elsewhere.

The check runs the exported file with onnxruntime and with the ``onnx`` package's
reference evaluator on the run's training rows (in raw units) and on any held-out rows
given, and compares the decision values with kktrace's own (float64).  The ONNX SVM
operators hold every number as float32, so differences of float32 rounding are expected:
the check reports them (largest absolute difference, the same relative to the largest
|f|, and the share of rows whose predicted class changes, counting separately the rows
with |f| < 10⁻⁴ where a float32 sign flip is expected).
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..model import model_from_solution
from ..problem import ONE_CLASS_KIND, REGRESSION_KIND
from ..run import RunRecord
from .onnx_codec import (
    INPUT_NAME,
    KernelExpansion,
    PairwiseExpansion,
    classifier_graph,
    regressor_graph,
)

__all__ = ["ExportCheck", "ExportOutcome", "EXPORT_MAPPINGS", "build_onnx", "check_onnx",
           "export_run", "NEAR_ZERO"]

#: |f| below this counts as "near the decision boundary": a float32 sign flip there is expected.
NEAR_ZERO = 1e-4
#: The export passes its check when max |Δf| ≤ this × max(1, max |f|) (float32 rounding).
RELATIVE_DRIFT_LIMIT = 1e-4


@dataclass(frozen=True)
class Mapping2Onnx:
    """How one problem kind is expressed in ONNX.

    build(record, doc, integer_labels) → ONNX model; values(outputs) → kktrace's decision
    values (m,) from an evaluator's outputs; labels(outputs) → the evaluator's predicted
    classes (m,) as text, or None; ours(model, f) → kktrace's predicted classes as text.
    """

    build: Callable[..., Any]
    values: Callable[[list[np.ndarray]], np.ndarray]
    labels: Callable[[list[np.ndarray]], np.ndarray | None]
    ours: Callable[[Any, np.ndarray], np.ndarray]


def _binary_model(rec: RunRecord, doc: str, integer_labels: bool | None = None) -> Any:
    m = model_from_solution(rec.problem, rec.result, rec.standardiser)
    neg, pos = m.labels
    y = np.sign(m.coefficients)
    # class 0 (first listed) is kktrace's negative label; the standard votes for class 0 when
    # its pair value is > 0, so the exported pair value is −f: coefficients −αy, rho −b.
    order = np.concatenate([np.flatnonzero(y < 0), np.flatnonzero(y >= 0)])
    exp = PairwiseExpansion(
        points=m.support_points[order], per_class=(int(np.sum(y < 0)), int(np.sum(y >= 0))),
        coefficients=-m.coefficients[order][None, :], biases=np.array([-m.bias]),
        labels=(neg, pos), kernel=m.kernel, centre=m.standardiser.centre,
        scale=m.standardiser.scale)
    return classifier_graph(exp, doc=doc, integer_labels=integer_labels)


def _binary_values(out: list[np.ndarray]) -> np.ndarray:
    # second output without probability attributes: [−g, g] for the exported pair value g = −f
    return np.asarray(out[1], dtype=np.float64)[:, 0]


def _expansion(rec: RunRecord) -> KernelExpansion:
    m = model_from_solution(rec.problem, rec.result, rec.standardiser)
    return KernelExpansion(points=m.support_points, coefficients=m.coefficients, bias=m.bias,
                           kernel=m.kernel, centre=m.standardiser.centre,
                           scale=m.standardiser.scale)


def _regression_model(rec: RunRecord, doc: str, integer_labels: bool | None = None) -> Any:
    return regressor_graph(_expansion(rec), doc=doc)


def _one_class_model(rec: RunRecord, doc: str, integer_labels: bool | None = None) -> Any:
    # f(x) = Σ αᵢK(xᵢ, x) − ρ: the bias −ρ is the regressor's rho; Sign gives the flag
    return regressor_graph(_expansion(rec), doc=doc, flag=True)


def _first_column(out: list[np.ndarray]) -> np.ndarray:
    return np.asarray(out[0], dtype=np.float64)[:, 0]


def _text(a: Any) -> np.ndarray:
    return np.asarray([str(v) for v in np.asarray(a).tolist()])


def _inlier_text(f: np.ndarray) -> np.ndarray:
    return np.where(np.asarray(f) >= 0, "inlier", "outlier")


EXPORT_MAPPINGS: dict[str, Mapping2Onnx] = {
    "binary_classification": Mapping2Onnx(
        build=_binary_model, values=_binary_values, labels=lambda out: _text(out[0]),
        ours=lambda model, f: _text(model.classify_values(f))),
    REGRESSION_KIND: Mapping2Onnx(
        build=_regression_model, values=_first_column, labels=lambda out: None,
        ours=lambda model, f: np.asarray([], dtype=str)),
    # the flag output is Sign(f): 0 on the boundary counts as inlier, as kktrace's f ≥ 0
    ONE_CLASS_KIND: Mapping2Onnx(
        build=_one_class_model, values=_first_column,
        labels=lambda out: _inlier_text(np.asarray(out[1], dtype=np.float64)[:, 0]),
        ours=lambda model, f: _inlier_text(f)),
}


def _mapping(rec: RunRecord) -> Mapping2Onnx:
    kind = rec.problem.kind
    found = EXPORT_MAPPINGS.get(kind)
    if found is None:
        raise InvalidInputError(f"run {rec.run_id}: problem kind {kind!r} has no ONNX export "
                                f"mapping (kktrace exports {', '.join(sorted(EXPORT_MAPPINGS))})")
    if rec.problem.kernel.name in ("callable", "precomputed"):
        raise InvalidInputError(f"run {rec.run_id}: a {rec.problem.kernel.name} kernel cannot "
                                "be expressed by the ONNX SVM operators")
    return found


def build_onnx(rec: RunRecord) -> bytes:
    """The ONNX file (bytes) for a stored run, checked with ``onnx.checker.check_model``."""
    import onnx

    mapping = _mapping(rec)
    doc = (f"kktrace run {rec.run_id}; float32 model (ONNX SVM attributes are float32). "
           "kktrace gives evidence about the optimisation, not a validation sign-off.")
    model = mapping.build(rec, doc)
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString()


@dataclass(frozen=True)
class ExportCheck:
    """Decision values of the exported file against kktrace's, per evaluator and row set."""

    sha256: str
    evaluators: Mapping[str, Mapping[str, Any]]
    rows: Mapping[str, int]
    relative_drift_limit: float
    near_zero: float
    passed: bool

    def to_dict(self) -> dict[str, Any]:
        """Plain data (the stored attachment ``onnx_export``)."""
        return {"sha256": self.sha256, "evaluators": {k: dict(v) for k, v in
                                                      self.evaluators.items()},
                "rows": dict(self.rows), "relative_drift_limit": self.relative_drift_limit,
                "near_zero": self.near_zero, "passed": self.passed,
                "float32": "the ONNX SVM operators hold every number as float32"}


def _compare(name: str, ours: np.ndarray, theirs: np.ndarray, our_labels: np.ndarray | None,
             their_labels: np.ndarray | None) -> dict[str, Any]:
    diff = np.abs(theirs - ours)
    scale = max(1.0, float(np.max(np.abs(ours)))) if ours.size else 1.0
    out: dict[str, Any] = {
        "row_set": name, "max_abs_diff": float(diff.max()) if diff.size else 0.0,
        "rms_diff": float(np.sqrt(np.mean(diff ** 2))) if diff.size else 0.0,
        "max_rel_diff": float(diff.max() / scale) if diff.size else 0.0,
        "finite": bool(np.all(np.isfinite(theirs))),
    }
    if our_labels is not None and their_labels is not None:
        changed = np.asarray(our_labels) != np.asarray(their_labels)
        near = np.abs(ours) < NEAR_ZERO
        out.update(label_changes=int(changed.sum()),
                   label_change_share=float(changed.mean()) if changed.size else 0.0,
                   label_changes_away_from_boundary=int(np.sum(changed & ~near)))
    return out


def check_onnx(rec: RunRecord, data: bytes,
               holdout: np.ndarray | None = None) -> ExportCheck:
    """Run the exported bytes with onnxruntime and ``onnx.reference`` and compare with kktrace.

    holdout : optional (m, d) held-out rows in raw units, checked as a second row set.
    """
    import onnx
    import onnxruntime as ort
    from onnx.reference import ReferenceEvaluator

    mapping = _mapping(rec)
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    std = rec.standardiser
    sets = {"training": rec.problem.X * std.scale + std.centre}
    if holdout is not None:
        sets["holdout"] = np.asarray(holdout, dtype=np.float64)
    session = ort.InferenceSession(data, providers=["CPUExecutionProvider"])
    # the reference evaluator (onnx 1.x) cannot give string labels for two classes; it runs
    # a copy with the labels written as 0 … k−1 and is compared on decision values only
    ref_model = relabelled = onnx.load_from_string(data)
    if any(a.name == "classlabels_strings" for n in ref_model.graph.node for a in n.attribute):
        ref_model = relabelled = mapping.build(rec, "", integer_labels=True)
    else:
        relabelled = None
    reference = ReferenceEvaluator(ref_model)
    evaluators: dict[str, dict[str, Any]] = {"onnxruntime": {}, "onnx_reference": {}}
    passed = True
    for name, X in sets.items():
        ours = model.values(X)
        our_labels = mapping.ours(model, ours)
        x32 = np.ascontiguousarray(X, dtype=np.float32)
        out_rt = session.run(None, {INPUT_NAME: x32})
        out_ref = reference.run(None, {INPUT_NAME: x32})
        # the reference copy of a string-labelled classifier carries 0 … k−1, not the labels
        ref_labelled = ref_model is not relabelled
        for ev, out, labelled in (("onnxruntime", out_rt, True), ("onnx_reference", out_ref,
                                                                  ref_labelled)):
            theirs = mapping.values(out)
            lab = mapping.labels(out) if labelled else None
            facts = _compare(name, ours, theirs, our_labels if lab is not None else None, lab)
            evaluators[ev][name] = facts
            passed &= facts["finite"] and facts["max_rel_diff"] <= RELATIVE_DRIFT_LIMIT
            passed &= facts.get("label_changes_away_from_boundary", 0) == 0
    return ExportCheck(sha256=hashlib.sha256(data).hexdigest(), evaluators=evaluators,
                       rows={k: int(v.shape[0]) for k, v in sets.items()},
                       relative_drift_limit=RELATIVE_DRIFT_LIMIT, near_zero=NEAR_ZERO,
                       passed=bool(passed))


def write_export(path: Path, data: bytes) -> Path:
    """Write the ONNX bytes atomically (temporary file, then rename)."""
    path = Path(path)
    if path.suffix.lower() != ".onnx":
        raise InvalidInputError(f"{path}: the export file name must end in .onnx")
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_bytes(data)
    tmp.replace(path)
    return path


@dataclass(frozen=True)
class ExportOutcome:
    """The written ONNX file, its check, and the derived run that stores the check."""

    path: Path
    check: ExportCheck
    run_id: str
    checked_run_id: str

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return {"path": str(self.path), "run_id": self.run_id,
                "checked_run_id": self.checked_run_id, "check": self.check.to_dict()}


def export_run(rec: RunRecord, to: str | Path, *, store: Any,
               holdout: np.ndarray | None = None) -> ExportOutcome:
    """Export ``rec`` (a stored run) to ``to``, check it, and store the check.

    Stored runs never change, so the check is kept as the attachment ``onnx_export`` of a
    derived run (parent: the exported run).  The file is written only after the check ran.
    """
    from dataclasses import replace

    from ..plaindata import to_plain

    data = build_onnx(rec)
    check = check_onnx(rec, data, holdout)
    path = write_export(Path(to), data)
    child = replace(rec, attachments={**rec.attachments,
                                      "onnx_export": to_plain({**check.to_dict(),
                                                               "file": path.name})})
    checked = store.save(child, parent=rec.run_id)
    return ExportOutcome(path=path, check=check, run_id=str(rec.run_id), checked_run_id=checked)


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
        coef[j - 1, column[rows[ci]]] = a[ci]
        coef[i, column[rows[cj]]] = a[cj]
        biases.append(float(b))
    per_class = tuple(int(np.sum(row_class[order] == c)) for c in range(k))
    return PairwiseExpansion(points=points[order], per_class=per_class, coefficients=coef,
                             biases=np.asarray(biases), labels=tuple(labels), kernel=kernel,
                             centre=np.asarray(centre), scale=np.asarray(scale))


def vote(pair_values: np.ndarray, k: int) -> np.ndarray:
    """Class index by one-vs-one votes: pair (i, j) votes i when f_ij > 0, else j; the
    first class with the most votes wins (the standard's rule, ONNX Operators-ml.md)."""
    votes = np.zeros((pair_values.shape[0], k), dtype=np.int64)
    p = 0
    for i in range(k):
        for j in range(i + 1, k):
            win = pair_values[:, p] > 0
            votes[win, i] += 1
            votes[~win, j] += 1
            p += 1
    return np.argmax(votes, axis=1)
