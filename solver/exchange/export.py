"""Export a stored run or multi-class parent to ONNX and check the file with two independent
evaluators.

What is exported is an :class:`~solver.exchange.subjects.ExportSubject`: a run maps by its
problem kind, a parent through its task (:mod:`solver.exchange.subjects`); nothing here
branches on the kind.

The check runs the exported file with onnxruntime and with the ``onnx`` package's
reference evaluator on the training rows (in raw units) and on any held-out rows given,
and compares the decision values (every pair's, for one-vs-one), the predicted classes and
any exported probabilities with kktrace's own (float64).  The ONNX SVM
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
from ..run import RunRecord
from .onnx_codec import INPUT_NAME
from .subjects import ExportSubject, run_subject

__all__ = ["ExportCheck", "ExportOutcome", "build_onnx", "check_onnx", "export_run",
           "NEAR_ZERO", "as_subject"]

#: |f| below this counts as "near the decision boundary": a float32 sign flip there is expected.
NEAR_ZERO = 1e-4
#: The export passes its check when max |Δf| ≤ this × max(1, max |f|) (float32 rounding).
RELATIVE_DRIFT_LIMIT = 1e-4
#: Largest |Δp| of exported probabilities counted as passing.  Both evaluators compute the
#: sigmoid in float32 and onnxruntime with a fast approximation of exp: measured differences
#: up to 2.7e-3 on bundled iris, wine and breast cancer (tests/test_exchange_tasks.py).
PROBABILITY_DRIFT_LIMIT = 5e-3
#: The onnx package's reference evaluator (onnx 1.x, ``multiclass_probability``) fills the
#: off-diagonal of its coupling matrix with a dot product where the coupling method needs
#: the elementwise product, so its probabilities for three or more classes are not the
#: coupled ones; they are reported, not counted (tests/test_exchange_tasks.py shows it).
REFERENCE_COUPLING_NOTE = (
    "the onnx reference evaluator's pairwise coupling (multiclass_probability) uses a dot "
    "product where the coupling needs elementwise products, so its probabilities for three "
    "or more classes are reported, not counted")


def as_subject(x: RunRecord | ExportSubject) -> ExportSubject:
    """The export subject of a run record (a subject is returned as is)."""
    return x if isinstance(x, ExportSubject) else run_subject(x)


def _doc(subject: ExportSubject) -> str:
    return (f"kktrace record {subject.run_id} ({subject.layout}); float32 model (ONNX SVM "
            "attributes are float32). kktrace gives evidence about the optimisation, not a "
            "validation sign-off.")


def _with_probabilities(subject: ExportSubject) -> bool:
    return subject.our_probabilities is not None


def build_onnx(x: RunRecord | ExportSubject) -> bytes:
    """The ONNX file (bytes) for a stored run or subject, checked with
    ``onnx.checker.check_model(full_check=True)``; probabilities included when fitted."""
    import onnx

    subject = as_subject(x)
    model = subject.build(_doc(subject), False, _with_probabilities(subject))
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
    layout: str = "binary"
    probabilities: bool = False
    probability_drift_limit: float = PROBABILITY_DRIFT_LIMIT
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain data (the stored attachment ``onnx_export``)."""
        return {"sha256": self.sha256, "evaluators": {k: dict(v) for k, v in
                                                      self.evaluators.items()},
                "rows": dict(self.rows), "relative_drift_limit": self.relative_drift_limit,
                "near_zero": self.near_zero, "passed": self.passed, "layout": self.layout,
                "probabilities": self.probabilities,
                "probability_drift_limit": self.probability_drift_limit,
                "notes": list(self.notes),
                "float32": "the ONNX SVM operators hold every number as float32"}


def _compare(name: str, ours: np.ndarray, theirs: np.ndarray, our_labels: np.ndarray | None,
             their_labels: np.ndarray | None, near: np.ndarray) -> dict[str, Any]:
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
        out.update(label_changes=int(changed.sum()),
                   label_change_share=float(changed.mean()) if changed.size else 0.0,
                   label_changes_away_from_boundary=int(np.sum(changed & ~near)))
    return out


def _evaluators(subject: ExportSubject, data: bytes) -> dict[str, dict[str, Any]]:
    """Per evaluator: ``plain`` (decision values), ``file`` (labels), ``probs`` runners.

    onnxruntime runs the exported bytes; the reference evaluator runs copies with the labels
    written as 0 … k−1 (onnx 1.x cannot give string labels for two classes).  Decision values
    are read from copies without probability attributes (with them, ``scores`` holds
    probabilities).
    """
    import onnxruntime as ort
    from onnx.reference import ReferenceEvaluator

    def rt(b: bytes) -> Callable[[np.ndarray], list[np.ndarray]]:
        s = ort.InferenceSession(b, providers=["CPUExecutionProvider"])
        return lambda x: s.run(None, {INPUT_NAME: x})

    def ref(model: Any) -> Callable[[np.ndarray], list[np.ndarray]]:
        r = ReferenceEvaluator(model)
        return lambda x: r.run(None, {INPUT_NAME: x})

    probs = _with_probabilities(subject)
    plain_rt = (rt(subject.build("", False, False).SerializeToString()) if probs else rt(data))
    ref_ints = subject.classes is not None
    plain_ref = ref(subject.build("", ref_ints, False))
    return {
        "onnxruntime": {"plain": plain_rt, "file": rt(data) if probs else plain_rt,
                        "ints": False},
        "onnx_reference": {"plain": plain_ref,
                           "file": ref(subject.build("", ref_ints, True)) if probs
                           else plain_ref, "ints": ref_ints},
    }


def check_onnx(x: RunRecord | ExportSubject, data: bytes,
               holdout: np.ndarray | None = None) -> ExportCheck:
    """Run the exported bytes with onnxruntime and ``onnx.reference`` and compare with kktrace.

    holdout : optional (m, d) held-out rows in raw units, checked as a second row set.
    Decision values (every pair's for one-vs-one), predicted classes and, when exported,
    probabilities are compared; the reference evaluator's multi-class probabilities are
    reported only (:data:`REFERENCE_COUPLING_NOTE`).
    """
    subject = as_subject(x)
    sets = {"training": np.asarray(subject.training, dtype=np.float64)}
    if holdout is not None:
        sets["holdout"] = np.asarray(holdout, dtype=np.float64)
    runners = _evaluators(subject, data)
    evaluators: dict[str, dict[str, Any]] = {name: {} for name in runners}
    passed = True
    notes = [subject.probability_note]
    multi = subject.classes is not None and len(subject.classes) > 2
    if _with_probabilities(subject) and multi:
        notes.append(REFERENCE_COUPLING_NOTE)
    for name, X in sets.items():
        ours = subject.ours(X)
        near = np.min(np.abs(ours), axis=1) < NEAR_ZERO
        our_labels = subject.our_labels(X)
        our_p = subject.our_probabilities(X) if _with_probabilities(subject) else None
        x32 = np.ascontiguousarray(X, dtype=np.float32)
        for ev, run in runners.items():
            plain = run["plain"](x32)
            out = run["file"](x32) if run["file"] is not run["plain"] else plain
            facts = _compare(name, ours, subject.theirs(plain), our_labels,
                             subject.their_labels(out, run["ints"]), near)
            passed &= facts["finite"] and facts["max_rel_diff"] <= RELATIVE_DRIFT_LIMIT
            passed &= facts.get("label_changes_away_from_boundary", 0) == 0
            if our_p is not None and subject.their_probabilities is not None:
                dp = np.abs(subject.their_probabilities(out) - our_p)
                counted = not (multi and ev == "onnx_reference")
                facts["probability_max_abs_diff"] = float(dp.max()) if dp.size else 0.0
                facts["probability_counted"] = counted
                if counted:
                    passed &= bool(np.all(np.isfinite(dp))) and \
                        facts["probability_max_abs_diff"] <= PROBABILITY_DRIFT_LIMIT
            evaluators[ev][name] = facts
    return ExportCheck(sha256=hashlib.sha256(data).hexdigest(), evaluators=evaluators,
                       rows={k: int(v.shape[0]) for k, v in sets.items()},
                       relative_drift_limit=RELATIVE_DRIFT_LIMIT, near_zero=NEAR_ZERO,
                       passed=bool(passed), layout=subject.layout,
                       probabilities=_with_probabilities(subject),
                       probability_drift_limit=PROBABILITY_DRIFT_LIMIT, notes=tuple(notes))


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


def _store_check(store: Any, record: Any, check: ExportCheck, path: Path) -> str:
    """Save a record derived from ``record`` that carries the check as ``onnx_export``.

    Stored runs never change, so the check lives on a derived run (parent: the exported
    run) or, for a parent record, a derived parent over the same members
    (``info.derived_from``).
    """
    from dataclasses import replace

    from ..plaindata import to_plain
    from ..run import ParentRecord

    att = to_plain({**check.to_dict(), "file": path.name})
    if isinstance(record, ParentRecord):
        derived = replace(record, attachments={**record.attachments, "onnx_export": att},
                          info={**record.info, "derived_from": record.run_id},
                          run_id=None, created=None, manifest=None)
        return store.save_parent(derived)
    child = replace(record, attachments={**record.attachments, "onnx_export": att})
    return store.save(child, parent=record.run_id)


def export_run(record: Any, to: str | Path, *, store: Any, holdout: np.ndarray | None = None,
               subject: ExportSubject | None = None) -> ExportOutcome:
    """Export ``record`` (a stored run, or a parent with its ``subject``) to ``to``, check it,
    and store the check (:func:`_store_check`).  The file is written only after the check
    ran."""
    subject = subject or as_subject(record)
    data = build_onnx(subject)
    check = check_onnx(subject, data, holdout)
    path = write_export(Path(to), data)
    checked = _store_check(store, record, check, path)
    return ExportOutcome(path=path, check=check, run_id=str(record.run_id),
                         checked_run_id=checked)
