"""Models trained elsewhere: read an ONNX file or an open JSON table into pairwise expansions.

A challenge needs, for every binary problem the model solved (one, or one per pair of
classes), the support vectors, their signed dual coefficients αᵢyᵢ, the bias and the
kernel, plus the input scaling in front.  Two sources are read:

* an ONNX file with one ``SVMClassifier`` (two classes or one-vs-one) and an optional
  ``Scaler`` (:func:`solver.exchange.onnx_codec.parse_model`);
* kktrace's open table, a JSON document (no code is ever executed; size-limited)::

      {"format": "kktrace-external-svm", "format_version": 1,
       "kernel": {"name": "rbf", "params": {"gamma": 0.05}},
       "labels": {"positive": "pass", "negative": "fail"},
       "support_vectors": [[...], ...],      # (L, d), in the model's input units
       "coefficients": [...],                # (L,) signed: αᵢyᵢ, yᵢ = +1 for "positive"
       "bias": -0.31,
       "input_scaling": {"centre": [...], "scale": [...]}}   # optional: (x − centre)/scale

Each expansion is a :class:`ExternalPair`: f(x) = Σ coefficients·K(points, x) + bias > 0
means ``positive``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Hashable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..kernels import Kernel, kernel_from_description

__all__ = ["ExternalPair", "ExternalModel", "read_external_model", "MAX_MODEL_BYTES"]

#: A model file larger than this is refused before it is read (bounded memory and time).
MAX_MODEL_BYTES = 512 * 1024 * 1024
TABLE_FORMAT = "kktrace-external-svm"


@dataclass(frozen=True, eq=False)
class ExternalPair:
    """One binary problem of an external model: ``positive`` where f(x) > 0.

    points (L, d) in the model's input units (after its scaling), coefficients (L,) = αᵢyᵢ.
    """

    positive: Hashable
    negative: Hashable
    points: np.ndarray
    coefficients: np.ndarray
    bias: float


@dataclass(frozen=True, eq=False)
class ExternalModel:
    """What the model file says: its pairs, kernel, scaling (centre, scale, or None)."""

    source: str
    source_sha256: str
    source_format: str
    pairs: tuple[ExternalPair, ...]
    labels: tuple[Hashable, ...]
    kernel: Kernel
    centre: np.ndarray | None
    scale: np.ndarray | None
    float32: bool


def _pairs_from_onnx(parsed: Any) -> tuple[ExternalPair, ...]:
    """Split the standard's one-vs-one layout into binary expansions (pair i < j: i positive)."""
    labels, per = parsed.labels, parsed.per_class
    start = np.concatenate([[0], np.cumsum(per)]).astype(int)
    k = len(labels)
    pairs, p = [], 0
    for i in range(k):
        for j in range(i + 1, k):
            si = slice(start[i], start[i + 1])
            sj = slice(start[j], start[j + 1])
            coef = np.concatenate([parsed.coefficients[j - 1, si], parsed.coefficients[i, sj]])
            pts = np.concatenate([parsed.points[si], parsed.points[sj]])
            keep = coef != 0.0
            pairs.append(ExternalPair(positive=labels[i], negative=labels[j],
                                      points=pts[keep], coefficients=coef[keep],
                                      bias=float(parsed.biases[p])))
            p += 1
    return tuple(pairs)


def _read_onnx(raw: bytes, source: str) -> ExternalModel:
    import onnx

    from .onnx_codec import parse_model

    try:
        model = onnx.load_from_string(raw)
        onnx.checker.check_model(model)
    except Exception as exc:  # the onnx package raises several unrelated types
        text = " ".join(str(exc).split())[:200]
        raise InvalidInputError(f"{source}: not a valid ONNX model ({text})") from None
    parsed = parse_model(model, source)
    if parsed.operator != "SVMClassifier":
        raise InvalidInputError(f"{source}: holds an SVMRegressor; a challenge currently reads "
                                "classifiers (two classes or one-vs-one) only")
    if parsed.post_transform not in ("NONE", ""):
        raise InvalidInputError(f"{source}: post_transform {parsed.post_transform!r} changes the "
                                "scores; only NONE can be challenged")
    centre = scale = None
    if parsed.offset is not None:
        d = parsed.points.shape[1]
        off = np.broadcast_to(parsed.offset, (d,)).astype(np.float64)
        mul = np.broadcast_to(parsed.scale, (d,)).astype(np.float64)
        if np.any(mul == 0):
            raise InvalidInputError(f"{source}: the Scaler has a zero scale")
        centre, scale = off, 1.0 / mul
    return ExternalModel(source=source, source_sha256=hashlib.sha256(raw).hexdigest(),
                         source_format="onnx", pairs=_pairs_from_onnx(parsed),
                         labels=parsed.labels, kernel=parsed.kernel, centre=centre, scale=scale,
                         float32=True)


def _array(doc: dict, key: str, source: str, ndim: int) -> np.ndarray:
    try:
        a = np.asarray(doc[key], dtype=np.float64)
    except KeyError:
        raise InvalidInputError(f"{source}: field {key!r} is missing") from None
    except (TypeError, ValueError):
        raise InvalidInputError(f"{source}: field {key!r} must hold numbers") from None
    if a.ndim != ndim or not np.all(np.isfinite(a)):
        raise InvalidInputError(f"{source}: field {key!r} must be a {ndim}-D array of finite "
                                "numbers")
    return a


def _read_table(raw: bytes, source: str) -> ExternalModel:
    try:
        doc = json.loads(raw.decode("utf-8"), parse_constant=lambda c: float("nan"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InvalidInputError(f"{source}: not JSON ({exc})") from None
    if not isinstance(doc, dict) or doc.get("format") != TABLE_FORMAT:
        raise InvalidInputError(f"{source}: expected a JSON object with format "
                                f"{TABLE_FORMAT!r}")
    kd = doc.get("kernel")
    if not isinstance(kd, dict) or kd.get("name") in ("callable", "precomputed"):
        raise InvalidInputError(f"{source}: field 'kernel' must describe a linear, poly, rbf or "
                                "sigmoid kernel")
    kernel = kernel_from_description(kd)
    labels = doc.get("labels")
    if not isinstance(labels, dict) or {"positive", "negative"} - set(labels):
        raise InvalidInputError(f"{source}: field 'labels' must name 'positive' and 'negative'")
    sv = _array(doc, "support_vectors", source, 2)
    coef = _array(doc, "coefficients", source, 1)
    if coef.shape[0] != sv.shape[0]:
        raise InvalidInputError(f"{source}: {sv.shape[0]} support vectors but "
                                f"{coef.shape[0]} coefficients")
    bias = doc.get("bias")
    if isinstance(bias, bool) or not isinstance(bias, (int, float)) or not np.isfinite(bias):
        raise InvalidInputError(f"{source}: field 'bias' must be a finite number")
    centre = scale = None
    if doc.get("input_scaling") is not None:
        sc = doc["input_scaling"]
        if not isinstance(sc, dict):
            raise InvalidInputError(f"{source}: field 'input_scaling' must be an object")
        centre = _array(sc, "centre", source, 1)
        scale = _array(sc, "scale", source, 1)
        if centre.shape != (sv.shape[1],) or scale.shape != centre.shape or np.any(scale <= 0):
            raise InvalidInputError(f"{source}: input_scaling must give one centre and one "
                                    "positive scale per feature")
    pos, neg = labels["positive"], labels["negative"]
    pair = ExternalPair(positive=pos, negative=neg, points=sv, coefficients=coef,
                        bias=float(bias))
    return ExternalModel(source=source, source_sha256=hashlib.sha256(raw).hexdigest(),
                         source_format=TABLE_FORMAT, pairs=(pair,), labels=(pos, neg),
                         kernel=kernel, centre=centre, scale=scale, float32=False)


def read_external_model(path: str | Path) -> ExternalModel:
    """Read an ONNX file (``.onnx``) or a kktrace open table (``.json``); never runs code."""
    p = Path(path)
    try:
        size = p.stat().st_size
    except OSError as exc:
        raise InvalidInputError(f"{p}: cannot read the model file ({exc.strerror})") from None
    if size > MAX_MODEL_BYTES:
        raise InvalidInputError(f"{p}: {size} bytes exceed the model size limit of "
                                f"{MAX_MODEL_BYTES} bytes")
    raw = p.read_bytes()
    if p.suffix.lower() == ".json":
        return _read_table(raw, str(p))
    if p.suffix.lower() == ".onnx":
        return _read_onnx(raw, str(p))
    raise InvalidInputError(f"{p}: expected a .onnx file or a .json open table")
