"""Class probabilities of a one-vs-one model: each pair's sigmoid, then pairwise coupling.

Pair (i, j), i < j in the class order, is a binary run whose positive label is the later
class c_j (:mod:`solver.tasks.multiclass`), so its fitted sigmoid gives
P(c_j | c_i or c_j, x) = 1 / (1 + exp(A f_ij + B)) and

    r_ij = P(c_i | c_i or c_j, x) = 1 / (1 + exp(−A f_ij − B)),   r_ji = 1 − r_ij.

The k class probabilities come from :func:`~solver.calibration.coupling.couple_pairwise`
(method 2 of Wu, Lin & Weng 2004).  Before coupling each r_ij is clipped to
[PAIR_CLIP, 1 − PAIR_CLIP]: far from a pair's boundary the sigmoid rounds to exactly 0 or 1,
where the coupling matrix loses rank (clipping pairwise probabilities at 1e−7 is common
practice).  Every pair needs a fitted sigmoid; the first pair without one is named.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InvalidInputError
from ..plaindata import to_plain
from .coupling import couple_pairwise_rows
from .crossval import Calibration, usable_calibration
from .platt import sigmoid_probability

__all__ = ["PAIR_CLIP", "COUPLING_METHOD", "PairwiseCalibration", "pair_calibration",
           "parent_calibration", "parent_attachment"]

#: Pairwise probabilities are kept inside [PAIR_CLIP, 1 − PAIR_CLIP] before coupling.
PAIR_CLIP = 1e-7
#: Plain-language statement of the method, stored with multi-class probabilities.
COUPLING_METHOD = (
    "pairwise coupling, method 2 of Wu, Lin & Weng (2004, JMLR 5): p minimises "
    "sum_i sum_{j != i} (r_ji p_i - r_ij p_j)^2 subject to sum_i p_i = 1, solved as the "
    "linear system [[Q, e], [e^T, 0]] [p; b] = [0; 1] with Q_ii = sum_{s != i} r_si^2, "
    "Q_ij = -r_ji r_ij; r_ij = P(class i | class i or j) from pair (i, j)'s sigmoid, "
    f"clipped to [{PAIR_CLIP:g}, 1 - {PAIR_CLIP:g}]")


@dataclass(frozen=True, eq=False)
class PairwiseCalibration:
    """The fitted sigmoids of every pair of a one-vs-one model.

    classes : the k class labels in the task's order.  pairs : the k(k−1)/2 index pairs
    (i, j), i < j, in member order.  calibrations : one fitted :class:`Calibration` per pair.
    """

    classes: tuple[Any, ...]
    pairs: tuple[tuple[int, int], ...]
    calibrations: tuple[Calibration, ...]

    def pair_table(self) -> list[dict[str, Any]]:
        """Every pair's A, B, folds and seed (plain data, for the parent record and report)."""
        out = []
        for (i, j), cal in zip(self.pairs, self.calibrations, strict=True):
            out.append({"pair": [str(self.classes[i]), str(self.classes[j])],
                        "positive": str(self.classes[j]), "A": cal.A, "B": cal.B,
                        "n_folds": cal.n_folds, "seed": cal.seed,
                        "newton_steps": cal.fit.newton_steps if cal.fit else None,
                        "gradient_norm": cal.fit.gradient_norm if cal.fit else None})
        return out

    def pairwise(self, values: np.ndarray) -> np.ndarray:
        """(m, q) r_ij = P(c_i | c_i or c_j) from pair decision values ``values`` (m, q)."""
        V = np.asarray(values, dtype=np.float64)
        q = len(self.pairs)
        if V.ndim != 2 or V.shape[1] != q:
            raise InvalidInputError(f"expected decision values of {q} pairs, got shape {V.shape}")
        R = np.empty_like(V)
        for p, cal in enumerate(self.calibrations):
            R[:, p] = sigmoid_probability(V[:, p], -cal.A, -cal.B)
        return np.clip(R, PAIR_CLIP, 1.0 - PAIR_CLIP)

    def probabilities(self, values: np.ndarray) -> np.ndarray:
        """(m, k) class probabilities (columns in :attr:`classes` order), rows summing to 1."""
        return couple_pairwise_rows(self.pairwise(values), len(self.classes))


def pair_calibration(classes: Sequence[Any], keys: Sequence[Sequence[Any]],
                     attachments: Sequence[Mapping[str, Any] | None]) -> PairwiseCalibration:
    """The :class:`PairwiseCalibration` of a one-vs-one model from its pairs' attachments.

    classes : the k class labels in order; keys : each pair's two labels (as text), member
    order; attachments : each pair run's ``calibration`` attachment or None.  A pair without
    a fitted sigmoid is named in a one-line :class:`InvalidInputError`."""
    names = [str(c) for c in classes]
    pairs: list[tuple[int, int]] = []
    cals: list[Calibration] = []
    for key, att in zip(keys, attachments, strict=True):
        a, b = (str(v) for v in key)
        if a not in names or b not in names:
            raise InvalidInputError(f"pair {a!r} vs {b!r} is not a pair of the classes {names}")
        cal = usable_calibration(att, f"pair {a!r} vs {b!r}")
        pairs.append((names.index(a), names.index(b)))
        cals.append(cal)
    k = len(names)
    expected = [(i, j) for i in range(k) for j in range(i + 1, k)]
    if pairs != expected:
        raise InvalidInputError(f"{k} classes need the pairs {expected} in that order, "
                                f"got {pairs}")
    return PairwiseCalibration(classes=tuple(classes), pairs=tuple(pairs),
                               calibrations=tuple(cals))


def parent_calibration(parent: Any, members: Sequence[Any]) -> PairwiseCalibration:
    """The :class:`PairwiseCalibration` of a one-vs-one parent record.

    parent : a :class:`~solver.run.ParentRecord` (``info.class_values``, pair members);
    members : the member :class:`~solver.run.RunRecord` s in the parent's member order
    (challenger members, if any, are skipped)."""
    refs = list(parent.members)
    if len(refs) != len(members):
        raise InvalidInputError(f"parent {parent.run_id} has {len(refs)} members, "
                                f"{len(members)} records given")
    pairs = [(ref, rec) for ref, rec in zip(refs, members, strict=True) if ref.role == "pair"]
    classes = list(parent.info.get("class_values") or parent.info.get("classes") or [])
    return pair_calibration(classes, [ref.key for ref, _ in pairs],
                            [(rec.attachments or {}).get("calibration") for _, rec in pairs])


def parent_attachment(classes: Sequence[Any], keys: Sequence[Sequence[Any]],
                      attachments: Sequence[Mapping[str, Any] | None],
                      values: np.ndarray | None = None, truth: Sequence[Any] | None = None,
                      voted: Sequence[Any] | None = None, *,
                      source: str | None = None) -> dict[str, Any]:
    """The parent record's ``calibration`` attachment (plain data): the coupling method,
    every pair's sigmoid (A, B, status, folds, seed) and, with held-out pair values
    ``values`` (m, q), true labels ``truth`` and voted labels ``voted``, the multi-class
    evidence on those rows (:func:`~solver.calibration.evidence.multiclass_evidence`)."""
    from .evidence import multiclass_evidence

    pairs = []
    for key, att in zip(keys, attachments, strict=True):
        row: dict[str, Any] = {"pair": [str(v) for v in key], "positive": str(key[1])}
        if att is None:
            row.update(status="missing", message="no calibration stored with this pair")
        else:
            row.update({k: att.get(k) for k in ("status", "message", "A", "B", "n_folds",
                                                 "seed")})
            sig = att.get("sigmoid") or {}
            row.update(newton_steps=sig.get("newton_steps"),
                       gradient_norm=sig.get("gradient_norm"))
        pairs.append(row)
    out: dict[str, Any] = {"method": "pairwise_coupling", "coupling": COUPLING_METHOD,
                           "classes": [str(c) for c in classes], "pairs": pairs,
                           "holdout": None}
    try:
        pc = pair_calibration(classes, keys, attachments)
    except InvalidInputError as exc:
        out.update(status="failed", message=str(exc))
        return to_plain(out, nonfinite_as_none=True)
    out.update(status="fitted", message="every pair's sigmoid fitted; class probabilities by "
                                        "pairwise coupling")
    if values is not None and truth is not None and voted is not None and len(truth):
        names = [str(c) for c in classes]
        t = np.array([names.index(str(v)) for v in truth], dtype=np.int64)
        v = np.array([names.index(str(x)) for x in voted], dtype=np.int64)
        ev = multiclass_evidence(pc.probabilities(values), t, v)
        out["holdout"] = {**ev, "disagreement_rows": ev["disagreement_rows"].tolist(),
                          "source": source}
    # parent attachments hold JSON values only: no arrays, empty bins' means as null
    return to_plain(out, nonfinite_as_none=True)
