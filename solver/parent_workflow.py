"""The workflow on parent records (one-vs-one multi-class models): apply, explain, compare,
replay, re-run.

A parent names its task (:func:`solver.tasks.task_of_manifest`); everything here asks that
task (prediction rule, held-out measures, explanation vocabulary) and works member by
member, naming the pair wherever a finding is about one pair.  The functions of
:mod:`solver.api` come here when the run id they are given is a parent record.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

from ._workflow import (
    NO_CHOICE,
    Columns,
    _fingerprint,
    _load_data,
    _plain,
    check_finite_values,
    check_known_labels,
    open_store,
)
from .errors import InvalidInputError
from .model import model_from_solution
from .run import Member, ParentRecord, RunRecord
from .tasks import Task, get_task

__all__ = ["ParentRuns", "load_parent_runs", "pair_key", "member_name", "apply_parent",
           "ParentPointTable", "ParentBreakdown", "explain_parent", "explain_parent_points",
           "ParentComparison", "compare_parents", "rerun_parent", "ROWS_ATTACHMENT"]

#: parent attachment holding each training row's class index (class order of ``info``).
ROWS_ATTACHMENT = "training_rows"


def member_name(key: Sequence[str] | None) -> str:
    """How output names a pair: ``'a' vs 'b'``."""
    return " vs ".join(repr(str(k)) for k in key) if key else "the model"


@dataclass(frozen=True, eq=False)
class ParentRuns:
    """A loaded parent and its member runs.

    parent : the :class:`ParentRecord`.  task : its :class:`Task`.
    primary : the primary run of every member key, in task order (one per pair).
    members : the :class:`Member` entries of ``primary``, same order.
    challengers : member key → the key's challenger run (``--solver both``).
    """

    parent: ParentRecord
    task: Task
    primary: tuple[RunRecord, ...]
    members: tuple[Member, ...]
    challengers: Mapping[tuple[str, ...], RunRecord] = field(default_factory=dict)

    @property
    def keys(self) -> list[tuple[str, ...]]:
        """The member keys, in task order."""
        return [tuple(m.key or ()) for m in self.members]

    def models(self) -> list[Any]:
        """The primary runs' models, in task order."""
        return [model_from_solution(r.problem, r.result, r.standardiser) for r in self.primary]

    def member(self, key: tuple[str, ...]) -> RunRecord:
        """The primary run of member ``key``."""
        for m, r in zip(self.members, self.primary, strict=True):
            if tuple(m.key or ()) == tuple(key):
                return r
        raise InvalidInputError(
            f"parent {self.parent.run_id} has no pair {member_name(key)}; its pairs are "
            f"{', '.join(member_name(k) for k in self.keys)}")


def load_parent_runs(store: Any, run_id: str, *, trusted: Any = None) -> ParentRuns:
    """The parent ``run_id`` and its members, every one verified first."""
    st = open_store(store)
    v = st.verify(run_id, trusted=trusted)
    if not v.ok:
        from .errors import IntegrityError

        raise IntegrityError(f"run {run_id} failed verification: " + "; ".join(v.problems))
    parent = st.load_parent(run_id, verify=False)
    task = get_task(parent.task)
    if getattr(task, "not_a_model", None):  # e.g. a study: its members are not one model
        raise InvalidInputError(str(task.not_a_model))
    prim, mems, chal = [], [], {}
    for m in parent.members:
        rec = st.load(m.run_id, verify=False)
        if m.role.endswith("_challenger"):
            chal[tuple(m.key or ())] = rec
        else:
            prim.append(rec)
            mems.append(m)
    return ParentRuns(parent=parent, task=task, primary=tuple(prim), members=tuple(mems),
                      challengers=chal)


def pair_key(text: str | Sequence[str]) -> tuple[str, ...]:
    """A member key from ``"a,b"`` (or a sequence of labels)."""
    if isinstance(text, str):
        parts = tuple(p.strip() for p in text.split(","))
    else:
        parts = tuple(str(p) for p in text)
    if len(parts) != 2 or not all(parts):
        raise InvalidInputError(f"a pair is two class labels separated by a comma (e.g. "
                                f"'release,rework'), got {text!r}")
    return parts


# --------------------------------------------------------------------------- apply


def apply_parent(pr: ParentRuns, data: Any, label: str | None,
                 probabilities: bool = False, columns: Columns = NO_CHOICE) -> dict[str, Any]:
    """The task's prediction for ``data`` (votes, ties and every member's decision value),
    with the held-out measures when the data carry the label column.  Plain parts for
    :class:`solver.api.ModelOutput`.

    With ``probabilities`` every pair's fitted sigmoid gives r_ij = P(class i | i or j, x)
    and pairwise coupling the class probabilities
    (:class:`solver.calibration.multiclass.PairwiseCalibration`)."""
    info = dict(pr.parent.info)
    names = list(pr.parent.data.get("feature_names") or [])
    what = "data the model is applied to"
    ds = _load_data(data, label, what, columns, names=names)
    check_known_labels(ds, info["class_values"], what)
    with np.errstate(all="ignore"):
        pred = pr.task.predict(pr.models(), ds.X, info)
    vals = np.asarray(pred.values)
    check_finite_values(vals if vals.ndim == 1 else vals.sum(axis=1), ds, what)
    measures = None
    if ds.labels is not None:
        measures = pr.task.held_out(pred, ds.labels, info["class_values"])
        measures["ties"] = int(np.sum(pred.tie)) if pred.tie is not None else 0
    probs = disagree = None
    if probabilities:
        from .calibration.multiclass import pair_calibration

        pc = pair_calibration(info["class_values"], pr.keys,
                              [(rec.attachments or {}).get("calibration") for rec in pr.primary])
        probs = pc.probabilities(pred.values)
        cv = np.empty(len(info["class_values"]), dtype=object)
        cv[:] = list(info["class_values"])
        disagree = int(np.sum(cv[np.argmax(probs, axis=1)] != pred.labels))
    return {"values": pred.values, "labels": pred.labels, "truth": ds.labels,
            "probabilities": probs, "probability_disagreements": disagree,
            "probability_labels": tuple(info["class_values"]) if probabilities else None,
            "confusion": measures, "fingerprint": _fingerprint(ds), "source": ds.source,
            "votes": pred.votes, "vote_classes": pred.classes, "tie": pred.tie,
            "member_keys": tuple(tuple(k) for k in pr.keys),
            "vote_rule": info.get("vote_rule"), "tie_rule": info.get("tie_rule")}


# --------------------------------------------------------------------------- explain


@dataclass(frozen=True, eq=False)
class ParentPointTable:
    """One row per training point of a parent: for each pair, the point's category and
    multiplier there (``not_in_pair`` / None where its class is not in the pair), and in how
    many of its k − 1 pairs it is a support vector.

    columns : name → (n,) array: ``row_id``, ``label``, then ``category <a> vs <b>`` and
        ``alpha <a> vs <b>`` per pair, then ``support_pairs`` (m) and ``pairs_taken_part``
        (k − 1), ``summary`` ("support vector in m of its k−1 pairs").
    """

    columns: Mapping[str, np.ndarray]
    run_id: str | None
    pairs: tuple[tuple[str, ...], ...]

    def to_columns(self) -> dict[str, np.ndarray]:
        """The columns, in order."""
        return dict(self.columns)

    def write_csv(self, path: Any) -> Any:
        """Write the table as CSV; returns the path."""
        import csv
        from pathlib import Path

        p = Path(path)
        cols = self.to_columns()
        n = len(next(iter(cols.values())))
        with p.open("w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(list(cols))
            for i in range(n):
                w.writerow(["" if cols[c][i] is None else _plain(cols[c][i]) for c in cols])
        return p

    def write_parquet(self, path: Any) -> Any:
        """Write the table as Parquet; returns the path."""
        import pyarrow.parquet as pq

        from .store.format import arrow_table

        cols = {c: (v.tolist() if v.dtype == object else v) for c, v in self.columns.items()}
        pq.write_table(arrow_table(cols), str(path))
        return path


def _pair_rows(pr: ParentRuns) -> tuple[np.ndarray, list[np.ndarray]]:
    att = pr.parent.attachments.get(ROWS_ATTACHMENT)
    if not att or "class_index" not in att:
        raise InvalidInputError(
            f"parent {pr.parent.run_id} does not record which training row is in which pair "
            "(made before that record existed); explain one pair's run instead")
    ci = np.asarray(att["class_index"], dtype=np.int64)
    classes = [str(c) for c in pr.parent.info["classes"]]
    rows = []
    for key in pr.keys:
        a, b = classes.index(key[0]), classes.index(key[1])
        rows.append(np.flatnonzero((ci == a) | (ci == b)))
    return ci, rows


def explain_parent(pr: ParentRuns) -> ParentPointTable:
    """The per-point table of a parent (see :class:`ParentPointTable`)."""
    from .explanation import point_table

    ci, rows = _pair_rows(pr)
    n = ci.shape[0]
    classes = list(pr.parent.info["class_values"])
    labels = np.empty(n, dtype=object)
    labels[:] = [classes[c] for c in ci.tolist()]
    cols: dict[str, np.ndarray] = {"row_id": np.arange(n), "label": labels}
    support = np.zeros(n, dtype=np.int64)
    taken = np.zeros(n, dtype=np.int64)
    for key, rec, r in zip(pr.keys, pr.primary, rows, strict=True):
        if r.shape[0] != rec.problem.n:
            raise InvalidInputError(f"pair {member_name(key)}: {rec.problem.n} rows stored, "
                                    f"{r.shape[0]} expected from the parent's row record")
        t = point_table(rec.problem, rec.result).to_columns()
        cat = np.full(n, "not_in_pair", dtype=object)
        alpha = np.full(n, None, dtype=object)
        cat[r] = t["category"].astype(str)
        alpha[r] = t["alpha"].astype(np.float64).tolist()
        name = " vs ".join(key)
        cols[f"category {name}"] = cat
        cols[f"alpha {name}"] = alpha
        support[r] += (t["category"].astype(str) != "non_support")
        taken[r] += 1
    cols["support_pairs"] = support
    cols["pairs_taken_part"] = taken
    cols["summary"] = np.array([f"support vector in {s} of its {k} pairs"
                                for s, k in zip(support.tolist(), taken.tolist(), strict=True)],
                               dtype=object)
    return ParentPointTable(columns=cols, run_id=pr.parent.run_id, pairs=tuple(pr.keys))


@dataclass(frozen=True, eq=False)
class ParentBreakdown:
    """Query rows broken down per pair, and the vote.

    labels (m,) predicted classes; votes (m, k) in ``classes`` order; tie (m,); pairs: per
    pair (key, :class:`~solver.explanation.Breakdown` of the m queries in that pair's
    training rows, the class each query votes for there); rows of a pair's breakdown are
    that pair's training rows, mapped to the parent's training rows in ``row_ids`` when the
    parent records them (else None).
    """

    run_id: str | None
    classes: tuple[str, ...]
    labels: np.ndarray
    votes: np.ndarray
    tie: np.ndarray
    pairs: tuple[tuple[tuple[str, ...], Any, tuple[str, ...], np.ndarray | None], ...]
    vote_rule: str
    tie_rule: str

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        out = []
        for key, b, votes_for, row_ids in self.pairs:
            d = {f.name: getattr(b, f.name) for f in fields(b)}
            d = {k: (v.tolist() if isinstance(v, np.ndarray) else _plain(v)) for k, v in d.items()}
            if row_ids is not None:
                d["top_rows_parent"] = row_ids[np.asarray(b.top_rows, dtype=np.int64)].tolist()
            out.append({"pair": list(key), "votes_for": list(votes_for), **d})
        return {"run_id": self.run_id, "record": "parent", "classes": list(self.classes),
                "labels": [_plain(v) for v in self.labels.tolist()],
                "votes": self.votes.tolist(), "tie": self.tie.tolist(), "pairs": out,
                "vote_rule": self.vote_rule, "tie_rule": self.tie_rule}


def explain_parent_points(pr: ParentRuns, X: np.ndarray, top: int) -> ParentBreakdown:
    """Each query broken down per pair (its top support vectors there) and the vote."""
    from .explanation import breakdown

    info = dict(pr.parent.info)
    models = pr.models()
    pred = pr.task.predict(models, X, info)
    try:
        _, rows = _pair_rows(pr)
    except InvalidInputError:
        rows = [None] * len(models)
    per_pair = []
    for key, model, r in zip(pr.keys, models, rows, strict=True):
        b = breakdown(model, X, top=top)
        votes_for = tuple(key[1] if v > 0 else key[0] for v in np.atleast_1d(b.values).tolist())
        per_pair.append((tuple(key), b, votes_for, r))
    return ParentBreakdown(run_id=pr.parent.run_id,
                           classes=tuple(str(c) for c in info["classes"]),
                           labels=pred.labels, votes=pred.votes, tie=pred.tie,
                           pairs=tuple(per_pair), vote_rule=str(info.get("vote_rule")),
                           tie_rule=str(info.get("tie_rule")))


# --------------------------------------------------------------------------- compare


@dataclass(frozen=True, eq=False)
class ParentComparison:
    """Two parents compared pair by pair: one verdict, the worst pair's.

    verdict : the worst of the pairs' verdicts (``agree`` < ``agree_within_tolerances`` <
        ``disagree``).  worst_pair : the pair that decided it.  pairs : (key, comparison)
        for every pair, in task order.
    """

    run_a: str
    run_b: str
    verdict: str
    worst_pair: tuple[str, ...] | None
    pairs: tuple[tuple[tuple[str, ...], Any], ...]
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        return {"run_a": self.run_a, "run_b": self.run_b, "verdict": self.verdict,
                "rule": "the worst pair decides (agree < agree_within_tolerances < disagree)",
                "worst_pair": None if self.worst_pair is None else list(self.worst_pair),
                "pairs": [{"pair": list(k), **c.to_dict()} for k, c in self.pairs],
                "notes": list(self.notes)}


_VERDICT_ORDER = ("agree", "agree_within_tolerances", "disagree")


def compare_parents(a: ParentRuns, b: ParentRuns, *, holdout_X: np.ndarray | None = None,
                    tolerances: Any = None, allow_mismatch: bool = False) -> ParentComparison:
    """Every pair of ``a`` against the same pair of ``b`` (:func:`solver.agreement.compare_runs`,
    its problem-mismatch check included: weights, C, kernel, rows).  Without ``holdout_X``
    each pair uses the held-out rows stored with it (attachment ``holdout_rows``), if any."""
    from .agreement import compare_runs
    from .errors import ProblemMismatchError

    if a.task.name != b.task.name:
        raise ProblemMismatchError(f"parent {a.parent.run_id} is a {a.task.name} model, "
                                   f"{b.parent.run_id} a {b.task.name} model")
    if a.keys != b.keys:
        raise ProblemMismatchError(
            f"the parents have different pairs: {', '.join(map(member_name, a.keys))} vs "
            f"{', '.join(map(member_name, b.keys))}")
    from ._workflow import _stored_holdout

    out = []
    for key, ra, rb in zip(a.keys, a.primary, b.primary, strict=True):
        # without held-out data given, each pair reuses the held-out rows stored with it
        hX = holdout_X if holdout_X is not None else _stored_holdout(ra, rb)[0]
        try:
            c = compare_runs(ra, rb, holdout_X=hX, tolerances=tolerances,
                             allow_mismatch=allow_mismatch)
        except ProblemMismatchError as exc:
            raise ProblemMismatchError(f"pair {member_name(key)}: {exc}") from None
        out.append((key, c))
    rank = {v: k for k, v in enumerate(_VERDICT_ORDER)}
    worst = max(out, key=lambda kc: rank.get(str(kc[1].verdict), len(rank)))
    return ParentComparison(run_a=str(a.parent.run_id), run_b=str(b.parent.run_id),
                            verdict=str(worst[1].verdict), worst_pair=worst[0],
                            pairs=tuple(out))


# --------------------------------------------------------------------------- re-run


def rerun_parent(pr: ParentRuns, data: Any, columns: Columns = NO_CHOICE,
                 ) -> list[tuple[tuple[str, ...], Any]]:
    """Re-run every pair from the parent's training data (the parent's features read by
    name, ``columns`` as chosen on the command line); (key, Reproduction) per pair."""
    from .store import reproduce
    from .training import _subset, _weights

    pdata = pr.parent.data
    opts = dict(pr.parent.info.get("options") or {})
    names = list(pdata.get("feature_names") or [])
    if names and opts.get("weight_column"):
        names.append(str(opts["weight_column"]))  # read with the features, split off below
    ds0 = _load_data(data, pdata.get("label_name"), "re-run data", columns,
                     names=names or None)
    ds, _ = _weights(ds0, None, opts.get("weight_column"))
    if _fingerprint(ds) != pdata.get("fingerprint"):
        raise InvalidInputError(
            f"data {ds.source or '(arrays)'} do not match parent {pr.parent.run_id}: "
            f"fingerprint {_fingerprint(ds)} differs from the recorded "
            f"{pdata.get('fingerprint')}")
    text = np.array([str(v) for v in np.asarray(ds.labels, dtype=object).tolist()])
    out = []
    for key, rec in zip(pr.keys, pr.primary, strict=True):
        rows = np.flatnonzero(np.isin(text, list(key)))
        out.append((key, reproduce(rec, _subset(ds, rows))))
    return out
