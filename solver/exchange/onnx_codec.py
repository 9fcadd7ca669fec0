"""Kernel expansions to and from ONNX graphs (``ai.onnx.ml`` domain, version 1).

The ONNX machine-learning operators ``Scaler``, ``SVMClassifier`` and ``SVMRegressor``
are an open standard (onnx ``Operators-ml.md``); inside this module their operator and
attribute names are used exactly as the standard spells them.  Facts designed by (from
the standard's text and its two evaluators, onnxruntime and ``onnx.reference``):

* every numeric attribute is float32, so an exported model computes in float32;
* ``Scaler``: Y = (X − offset) · scale, per feature;
* ``SVMClassifier`` one-vs-one layout: support vectors grouped by class in label order
  (``vectors_per_class``), ``coefficients`` row-major ((k − 1) × L); for the pair i < j,
  f_ij(x) = Σ_{s∈SV_i} coef[j−1, s] K(x, s) + Σ_{s∈SV_j} coef[i, s] K(x, s) + rho[p], and
  f_ij > 0 is a vote for class i (the first listed).  With two classes the runtime picks
  class 0 when f > 0 and the second output is [−f, f] when no probability attributes are
  set;
* ``SVMRegressor``: y = Σ_s coef_s K(x, s) + rho[0];
* ``kernel_params`` = [gamma, offset, degree] for POLY (gamma x·z + offset)^degree, RBF
  exp(−gamma ‖x − z‖²) and SIGMOID tanh(gamma x·z + offset); LINEAR is x·z.

Nothing here reads or writes files or runs a model: :mod:`solver.exchange.export` does.
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..kernels import Kernel, LinearKernel, PolynomialKernel, RBFKernel, SigmoidKernel

__all__ = [
    "KernelExpansion",
    "PairwiseExpansion",
    "ONNX_OPSET",
    "ONNX_ML_OPSET",
    "kernel_attributes",
    "kernel_from_attributes",
    "classifier_graph",
    "regressor_graph",
    "vote_graph",
    "ParsedModel",
    "parse_model",
]

ONNX_OPSET = 17
ONNX_ML_OPSET = 1
INPUT_NAME = "features"

_KERNEL_TYPES = {"linear": "LINEAR", "poly": "POLY", "rbf": "RBF", "sigmoid": "SIGMOID"}
_SUPPORTED_OPS = {("ai.onnx.ml", "Scaler"), ("ai.onnx.ml", "SVMClassifier"),
                  ("ai.onnx.ml", "SVMRegressor"), ("", "Sign"), ("", "Identity"),
                  ("", "Cast"), ("ai.onnx.ml", "ZipMap")}


@dataclass(frozen=True, eq=False)
class KernelExpansion:
    """f(x) = Σ_s coefficients[s] · K(points[s], standardise(x)) + bias.

    points (L, d) in standardised units, coefficients (L,), centre / scale (d,) of the
    standardiser in front (identity: zeros and ones).
    """

    points: np.ndarray
    coefficients: np.ndarray
    bias: float
    kernel: Kernel
    centre: np.ndarray
    scale: np.ndarray


@dataclass(frozen=True, eq=False)
class PairwiseExpansion:
    """One-vs-one classifier over ``labels`` (k ≥ 2, in the stored order).

    points (L, d) grouped by class (``per_class`` rows of each class, in label order),
    coefficients ((k − 1), L) in the standard's layout, biases (k(k−1)/2,) in pair order
    (0,1), (0,2), …, (1,2), …  A pair's f_ij > 0 votes for class i.
    """

    points: np.ndarray
    per_class: tuple[int, ...]
    coefficients: np.ndarray
    biases: np.ndarray
    labels: tuple[Hashable, ...]
    kernel: Kernel
    centre: np.ndarray
    scale: np.ndarray


def kernel_attributes(kernel: Kernel) -> tuple[str, list[float]]:
    """ONNX ``kernel_type`` and ``kernel_params`` [gamma, offset, degree] for ``kernel``."""
    kind = _KERNEL_TYPES.get(kernel.name)
    if kind is None:
        raise InvalidInputError(
            f"the ONNX SVM operators cannot express a {kernel.name!r} kernel (they know "
            "linear, poly, rbf and sigmoid); this run cannot be exported")
    p = kernel.params()
    gamma = float(p.get("gamma") or 0.0)
    offset = float(p.get("offset") or 0.0)
    degree = float(p.get("degree") or 0.0)
    return kind, [gamma, offset, degree]


def kernel_from_attributes(kind: str, params: Sequence[float]) -> Kernel:
    """The kktrace kernel for ONNX ``kernel_type`` / ``kernel_params`` (float32 → float64)."""
    vals = [float(v) for v in params] + [0.0] * (3 - len(params))
    gamma, offset, degree = vals[:3]
    kind = kind.upper()
    if kind == "LINEAR":
        return LinearKernel()
    if kind == "RBF":
        return RBFKernel(gamma=gamma)
    if kind == "POLY":
        if degree != int(degree) or degree < 1:
            raise InvalidInputError(f"POLY kernel with degree {degree!r} is not a positive integer")
        return PolynomialKernel(gamma=gamma, offset=offset, degree=int(degree))
    if kind == "SIGMOID":
        return SigmoidKernel(gamma=gamma, offset=offset)
    raise InvalidInputError(f"unsupported kernel_type {kind!r} (expected LINEAR, POLY, RBF or "
                            "SIGMOID)")


def _f32(a: Any) -> list[float]:
    return np.asarray(a, dtype=np.float32).ravel().tolist()


def _front(helper: Any, centre: np.ndarray, scale: np.ndarray) -> tuple[list[Any], str]:
    """The ``Scaler`` node that standardises raw features (Y = (X − offset) · scale)."""
    node = helper.make_node("Scaler", [INPUT_NAME], ["standardised"], domain="ai.onnx.ml",
                            offset=_f32(centre), scale=_f32(1.0 / np.asarray(scale)))
    return [node], "standardised"


def _model(helper: Any, nodes: list[Any], d: int, outputs: list[Any], name: str,
           doc: str, initializers: Sequence[Any] = ()) -> Any:
    import onnx

    graph = helper.make_graph(
        nodes, name, [helper.make_tensor_value_info(INPUT_NAME, onnx.TensorProto.FLOAT,
                                                    [None, d])], outputs,
        initializer=list(initializers))
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", ONNX_OPSET),
                                                    helper.make_opsetid("ai.onnx.ml",
                                                                        ONNX_ML_OPSET)],
                              producer_name="kktrace", doc_string=doc)
    model.ir_version = 8
    return model


def _label_attributes(labels: Sequence[Hashable], integer_labels: bool | None
                      ) -> tuple[list[Any], int]:
    """(label values, ONNX element type): integers when every label is one (or 0 … k−1 when
    ``integer_labels`` forces it), else text."""
    import onnx

    ints = integer_labels if integer_labels is not None else all(
        isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in labels)
    if ints:
        return ([int(v) for v in labels] if integer_labels is None
                else list(range(len(labels)))), onnx.TensorProto.INT64
    return [str(v) for v in labels], onnx.TensorProto.STRING


def classifier_graph(expansion: PairwiseExpansion, *, doc: str = "",
                     integer_labels: bool | None = None,
                     sigmoids: Sequence[tuple[float, float]] | None = None) -> Any:
    """An ONNX model: ``Scaler`` → ``SVMClassifier`` with outputs ``label`` and ``scores``.

    Labels are written as ``classlabels_ints`` when every label is an integer (or when
    ``integer_labels`` forces it, then as 0 … k−1), else as ``classlabels_strings``.
    ``sigmoids`` (one (prob_a, prob_b) per pair, pair order) become the standard's
    probability attributes; ``scores`` then holds the k class probabilities.
    """
    import onnx
    from onnx import helper

    e = expansion
    kind, params = kernel_attributes(e.kernel)
    nodes, x = _front(helper, e.centre, e.scale)
    labels, label_type = _label_attributes(e.labels, integer_labels)
    label_attr: dict[str, Any] = {("classlabels_ints" if label_type == onnx.TensorProto.INT64
                                   else "classlabels_strings"): labels}
    if sigmoids is not None:
        if len(sigmoids) != len(e.biases):
            raise InvalidInputError(f"{len(sigmoids)} sigmoids for {len(e.biases)} pairs")
        label_attr["prob_a"] = _f32([a for a, _ in sigmoids])
        label_attr["prob_b"] = _f32([b for _, b in sigmoids])
    nodes.append(helper.make_node(
        "SVMClassifier", [x], ["label", "scores"], domain="ai.onnx.ml",
        coefficients=_f32(e.coefficients), support_vectors=_f32(e.points),
        rho=_f32(e.biases), vectors_per_class=[int(c) for c in e.per_class],
        kernel_type=kind, kernel_params=_f32(params), post_transform="NONE", **label_attr))
    k = len(e.labels)
    width = 2 if k == 2 else (k if sigmoids is not None else k * (k - 1) // 2)
    outputs = [helper.make_tensor_value_info("label", label_type, [None]),
               helper.make_tensor_value_info("scores", onnx.TensorProto.FLOAT, [None, width])]
    return _model(helper, nodes, e.points.shape[1], outputs, "kktrace_classifier", doc)


def _regressor_nodes(helper: Any, e: KernelExpansion, out: str, suffix: str = ""
                     ) -> list[Any]:
    """``Scaler`` → ``SVMRegressor`` computing e's f(x) into the (N, 1) tensor ``out``."""
    kind, params = kernel_attributes(e.kernel)
    scaled = f"standardised{suffix}"
    return [
        helper.make_node("Scaler", [INPUT_NAME], [scaled], domain="ai.onnx.ml",
                         offset=_f32(e.centre), scale=_f32(1.0 / np.asarray(e.scale))),
        helper.make_node(
            "SVMRegressor", [scaled], [out], domain="ai.onnx.ml",
            coefficients=_f32(e.coefficients), support_vectors=_f32(e.points),
            rho=_f32([e.bias]), n_supports=int(e.points.shape[0]), kernel_type=kind,
            kernel_params=_f32(params), post_transform="NONE", one_class=0),
    ]


def vote_graph(pairs: Sequence[KernelExpansion], indices: Sequence[tuple[int, int]],
               labels: Sequence[Hashable], *, doc: str = "",
               integer_labels: bool | None = None) -> Any:
    """One-vs-one by votes, each pair with its own standardiser and kernel.

    Outputs ``label`` (N,), ``scores`` (N, q) — pair p = (i, j) gives kktrace's f_ij, whose
    positive class is j — and ``votes`` (N, k).  Pair (i, j) votes j where f_ij > 0, else i
    (``Greater`` → ``Cast`` → ``MatMul`` with a (q, k) matrix of +1 at j and −1 at i, plus
    the count of pairs in which each class is the first); ``ArgMax`` returns the first
    maximum, so a tie goes to the class first in the class order, as kktrace's own rule.
    """
    import onnx
    from onnx import helper, numpy_helper

    k, q = len(labels), len(pairs)
    if q != len(indices) or q == 0:
        raise InvalidInputError(f"{q} pair expansions for {len(indices)} pairs")
    nodes: list[Any] = []
    for p, e in enumerate(pairs):
        nodes += _regressor_nodes(helper, e, f"pair_{p}", f"_{p}")
    matrix = np.zeros((q, k), dtype=np.float32)
    base = np.zeros(k, dtype=np.float32)
    for p, (i, j) in enumerate(indices):
        matrix[p, j], matrix[p, i] = 1.0, -1.0
        base[i] += 1.0
    values, label_type = _label_attributes(labels, integer_labels)
    if label_type == onnx.TensorProto.INT64:
        label_tensor = numpy_helper.from_array(np.asarray(values, dtype=np.int64),
                                               "class_labels")
    else:
        label_tensor = helper.make_tensor("class_labels", onnx.TensorProto.STRING, [k],
                                          [v.encode("utf-8") for v in values])
    inits = [numpy_helper.from_array(np.zeros(1, dtype=np.float32), "zero"),
             numpy_helper.from_array(matrix, "vote_matrix"),
             numpy_helper.from_array(base, "vote_base"), label_tensor]
    nodes += [
        helper.make_node("Concat", [f"pair_{p}" for p in range(q)], ["scores"], axis=1),
        helper.make_node("Greater", ["scores", "zero"], ["positive_side"]),
        helper.make_node("Cast", ["positive_side"], ["positive_share"],
                         to=onnx.TensorProto.FLOAT),
        helper.make_node("MatMul", ["positive_share", "vote_matrix"], ["vote_change"]),
        helper.make_node("Add", ["vote_change", "vote_base"], ["votes"]),
        helper.make_node("ArgMax", ["votes"], ["winner"], axis=1, keepdims=0,
                         select_last_index=0),
        helper.make_node("Gather", ["class_labels", "winner"], ["label"], axis=0),
    ]
    outputs = [helper.make_tensor_value_info("label", label_type, [None]),
               helper.make_tensor_value_info("scores", onnx.TensorProto.FLOAT, [None, q]),
               helper.make_tensor_value_info("votes", onnx.TensorProto.FLOAT, [None, k])]
    return _model(helper, nodes, pairs[0].points.shape[1], outputs, "kktrace_one_vs_one",
                  doc, inits)


def regressor_graph(expansion: KernelExpansion, *, doc: str = "", flag: bool = False) -> Any:
    """An ONNX model: ``Scaler`` → ``SVMRegressor`` (output ``value``, shape (N, 1)).

    With ``flag`` (one-class models) a ``Sign`` node adds the output ``flag``: +1 where the
    value is positive (inside the learned region), −1 outside, 0 on the boundary.
    """
    import onnx
    from onnx import helper

    e = expansion
    nodes = _regressor_nodes(helper, e, "value")
    outputs = [helper.make_tensor_value_info("value", onnx.TensorProto.FLOAT, [None, 1])]
    if flag:
        nodes.append(helper.make_node("Sign", ["value"], ["flag"]))
        outputs.append(helper.make_tensor_value_info("flag", onnx.TensorProto.FLOAT, [None, 1]))
    return _model(helper, nodes, e.points.shape[1], outputs, "kktrace_regressor", doc)


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True, eq=False)
class ParsedModel:
    """What an ONNX file with one SVM node (and an optional ``Scaler``) says.

    operator : ``"SVMClassifier"`` or ``"SVMRegressor"``; offset / scale (d,) of the
    ``Scaler`` (None without one); points (L, d) float64 copies of the float32 support
    vectors; coefficients ((k − 1), L) for a classifier, (1, L) for a regressor; biases
    (pairs,) or (1,); labels (classifier) in the model's order; per_class (classifier).
    """

    operator: str
    offset: np.ndarray | None
    scale: np.ndarray | None
    points: np.ndarray
    coefficients: np.ndarray
    biases: np.ndarray
    labels: tuple[Hashable, ...] | None
    per_class: tuple[int, ...] | None
    kernel: Kernel
    post_transform: str
    one_class: bool
    has_probability: bool


def _attrs(node: Any) -> dict[str, Any]:
    from onnx import helper

    return {a.name: helper.get_attribute_value(a) for a in node.attribute}


def parse_model(model: Any, source: str) -> ParsedModel:
    """Read the SVM of an ONNX model (already loaded, checked by the caller) — never runs it.

    Refuses, naming them, operators other than ``Scaler``, ``SVMClassifier``,
    ``SVMRegressor`` (and the trivial ``Sign`` / ``Identity`` / ``Cast``), more than one SVM
    node, and attribute arrays whose sizes do not agree.
    """
    nodes = list(model.graph.node)
    other = sorted({f"{n.domain or 'ai.onnx'}:{n.op_type}" for n in nodes
                    if (n.domain, n.op_type) not in _SUPPORTED_OPS})
    if other:
        raise InvalidInputError(f"{source}: unsupported operator(s) {', '.join(other)}; a "
                                "challenge reads one SVMClassifier or SVMRegressor node "
                                "with an optional Scaler in front")
    svm = [n for n in nodes if n.op_type in ("SVMClassifier", "SVMRegressor")]
    if len(svm) != 1:
        raise InvalidInputError(f"{source}: expected exactly one SVMClassifier or SVMRegressor "
                                f"node, found {len(svm)}")
    node = svm[0]
    a = _attrs(node)
    offset = scale = None
    scalers = [n for n in nodes if n.op_type == "Scaler"]
    if len(scalers) > 1:
        raise InvalidInputError(f"{source}: more than one Scaler node")
    if scalers:
        sa = _attrs(scalers[0])
        offset = np.asarray(sa.get("offset", [0.0]), dtype=np.float64)
        scale = np.asarray(sa.get("scale", [1.0]), dtype=np.float64)
    kind = a.get("kernel_type", b"LINEAR")
    kind = kind.decode() if isinstance(kind, bytes) else str(kind)
    kernel = kernel_from_attributes(kind, list(a.get("kernel_params", [])))
    sv = np.asarray(a.get("support_vectors", []), dtype=np.float64)
    coef = np.asarray(a.get("coefficients", []), dtype=np.float64)
    rho = np.asarray(a.get("rho", []), dtype=np.float64)
    post = a.get("post_transform", b"NONE")
    post = post.decode() if isinstance(post, bytes) else str(post)
    if node.op_type == "SVMClassifier":
        per_class = tuple(int(v) for v in a.get("vectors_per_class", []))
        if "classlabels_strings" in a:
            labels: tuple[Hashable, ...] = tuple(
                v.decode() if isinstance(v, bytes) else str(v) for v in a["classlabels_strings"])
        else:
            labels = tuple(int(v) for v in a.get("classlabels_ints", []))
        k, L = len(labels), int(sum(per_class))
        if k < 2 or len(per_class) != k:
            raise InvalidInputError(f"{source}: {k} class labels but vectors_per_class has "
                                    f"{len(per_class)} entries")
        if L == 0 or sv.size % L:
            raise InvalidInputError(f"{source}: support_vectors has {sv.size} values, not a "
                                    f"multiple of the {L} support vectors")
        if coef.size != (k - 1) * L:
            raise InvalidInputError(f"{source}: coefficients has {coef.size} values, expected "
                                    f"(k − 1) × L = {(k - 1) * L}")
        if rho.size != k * (k - 1) // 2:
            raise InvalidInputError(f"{source}: rho has {rho.size} values, expected one per "
                                    f"pair ({k * (k - 1) // 2})")
        return ParsedModel("SVMClassifier", offset, scale, sv.reshape(L, -1),
                           coef.reshape(k - 1, L), rho, labels, per_class, kernel, post,
                           False, bool(a.get("prob_a")))
    L = int(a.get("n_supports", 0))
    if L <= 0 or sv.size % L or coef.size != L or rho.size != 1:
        raise InvalidInputError(f"{source}: SVMRegressor attributes disagree (n_supports {L}, "
                                f"{sv.size} support-vector values, {coef.size} coefficients, "
                                f"{rho.size} rho)")
    return ParsedModel("SVMRegressor", offset, scale, sv.reshape(L, -1), coef.reshape(1, L),
                       rho, None, None, kernel, post, bool(a.get("one_class", 0)), False)
