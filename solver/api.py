"""The kktrace workflow in Python, with the same names the ``kktrace`` command uses.

``train`` loads data, standardises it, audits the kernel, solves the SVM dual with SMO
(and, with ``solver="both"``, with the independent QP challenger), explains every
training point, applies each model to held-out data and saves each run to the store.  The other
functions are thin wrappers that take run ids (or loaded records) and a store:
``load_run``, ``runs``, ``compare``, ``explain``, ``leave_one_out``, ``replay``,
``verify``, ``apply``, ``report`` and ``export_explanation``.

Nothing here prints; progress is reported through an optional ``progress(task, info)``
callable (see :data:`ProgressFn`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._workflow import (
    DEFAULT_STORE,
    KERNEL_CHOICES,
    NO_CHOICE,
    SOLVER_CHOICES,
    STORE_ENV,
    Columns,
    ProgressFn,
    _confusion,
    _fingerprint,
    _load_data,
    _plain,
    _stored_holdout,
    check_finite_values,
    check_known_labels,
    open_store,
)
from .data import Dataset
from .errors import InvalidInputError
from .model import model_from_solution
from .run import RunRecord
from .training import TrainOutcome, train

if TYPE_CHECKING:  # pragma: no cover
    pass

__all__ = [
    "STORE_ENV",
    "DEFAULT_STORE",
    "SOLVER_CHOICES",
    "KERNEL_CHOICES",
    "ProgressFn",
    "TrainOutcome",
    "ModelOutput",
    "VerifyOutcome",
    "open_store",
    "train",
    "load_run",
    "runs",
    "compare",
    "explain",
    "leave_one_out",
    "replay",
    "verify",
    "apply",
    "report",
    "export_explanation",
    "check_output_path",
    "store_listing",
    "clean_store",
    "new_signing_keys",
]


def load_run(run: str | RunRecord, *, store: Any = None) -> RunRecord:
    """The stored :class:`~solver.run.RunRecord` with id ``run`` (a record is returned as is)."""
    if isinstance(run, RunRecord):
        return run
    if not isinstance(run, str) or not run:
        raise InvalidInputError(f"a run id must be a non-empty string, got {run!r}")
    st = open_store(store)
    if st.is_parent(run):
        raise InvalidInputError(
            f"run {run} is a multi-class model over pair runs; this step works on one pair: "
            "name it with --pair A,B (Python: pair='A,B') or give the pair's run id "
            "(kktrace runs lists them under the model)")
    return st.load(run)


def _parent_runs(run: Any, store: Any) -> Any:
    """The loaded parent record and members when ``run`` is a parent's id, else None."""
    if not isinstance(run, str) or not run:
        return None
    st = open_store(store)
    if not st.is_parent(run):
        return None
    from .parent_workflow import load_parent_runs

    return load_parent_runs(st, run)


def runs(*, store: Any = None, **filters: Any) -> list[dict[str, Any]]:
    """Catalog rows (one dict per run, key figures) matching ``filters`` (e.g. ``status=``)."""
    return list(open_store(store).runs(**{k: v for k, v in filters.items() if v is not None}))


# --------------------------------------------------------------------------- wrappers


def compare(
    run_a: str | RunRecord,
    run_b: str | RunRecord,
    *,
    store: Any = None,
    holdout: Dataset | str | Path | None = None,
    tolerances: Mapping[str, float] | None = None,
    allow_mismatch: bool = False,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
) -> Any:
    """Solver-agreement :class:`~solver.agreement.Comparison` of two runs.

    ``holdout`` (data file or Dataset, label column optional) adds decision-value agreement
    on held-out rows; its columns are matched to the run's features by name
    (``feature_columns`` / ``ignore_columns`` / ``delimiter`` as for :func:`train`; other
    columns are ignored with a :class:`~solver.errors.DataWarning` naming them).  Without
    it the held-out rows stored with run A (else run B) at training are used, and a note
    says which, or that none are stored and how to add them.  Runs of different problems
    raise :class:`~solver.errors.ProblemMismatchError` unless ``allow_mismatch``.
    """
    from .agreement import compare_runs

    pa, pb = _parent_runs(run_a, store), _parent_runs(run_b, store)
    if pa is not None or pb is not None:
        from .parent_workflow import compare_parents

        if pa is None or pb is None:
            raise InvalidInputError("compare a multi-class model with another multi-class "
                                    "model (pair by pair), or one pair's run with another run")
        hX = None if holdout is None else _holdout_X(
            holdout, pa.parent.data, Columns.of(feature_columns, ignore_columns, delimiter))
        return compare_parents(pa, pb, holdout_X=hX, tolerances=tolerances,
                               allow_mismatch=allow_mismatch)
    a, b = load_run(run_a, store=store), load_run(run_b, store=store)
    hX, note = None, None
    if holdout is not None:
        hX = _holdout_X(holdout, a.data, Columns.of(feature_columns, ignore_columns, delimiter))
    else:
        hX, note = _stored_holdout(a, b)
    comp = compare_runs(a, b, holdout_X=hX, tolerances=tolerances,
                        allow_mismatch=allow_mismatch)
    return comp if note is None else replace(comp, notes=(*comp.notes, note))


def _holdout_X(holdout: Any, data: Mapping[str, Any], cols: Columns) -> np.ndarray:
    """Held-out rows (m, d) in the run's feature order, label column optional."""
    lab = _split_column(data)
    if isinstance(holdout, (str, Path)) and not _has_column(Path(holdout), lab, cols):
        lab = None
    return _load_data(holdout, lab, "held-out data", cols,
                      names=data.get("feature_names") or []).X


def _parse_point(point: Mapping[str, float] | Sequence[float] | np.ndarray,
                 names: Sequence[str]) -> np.ndarray:
    if isinstance(point, Mapping):
        unknown = [k for k in point if k not in names]
        if unknown:
            raise InvalidInputError(
                f"unknown feature(s) {', '.join(map(repr, unknown))}; the run's features are "
                f"{', '.join(names)}"
            )
        missing = [k for k in names if k not in point]
        if missing:
            raise InvalidInputError(f"the point lacks feature(s) {', '.join(missing)}")
        row = []
        for k in names:
            try:
                v = float(point[k])
            except (TypeError, ValueError):
                raise InvalidInputError(f"feature {k!r}: {point[k]!r} is not a number") from None
            if not math.isfinite(v):
                raise InvalidInputError(f"feature {k!r}: value {v!r} is not finite")
            row.append(v)
        return np.array([row])
    arr = np.asarray(point, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != len(names):
        raise InvalidInputError(
            f"query points must have {len(names)} features ({', '.join(names)}), got shape "
            f"{arr.shape}"
        )
    if not np.all(np.isfinite(arr)):
        raise InvalidInputError("query points contain non-finite values")
    return arr


def explain(
    run: str | RunRecord,
    *,
    store: Any = None,
    points: Mapping[str, float] | Sequence[float] | np.ndarray | Dataset | str | Path | None = None,
    top: int = 5,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
) -> Any:
    """Explain a run.

    Without ``points``: the per-point :class:`~solver.explanation.PointTable` of the training
    data (category and reason for every point).  With ``points`` (a mapping feature →
    value, an (m, d) array in raw units, a Dataset or a data file): the decision
    :class:`~solver.explanation.Breakdown` of each query into its ``top`` contributing support
    vectors and the remainder.  A query file's columns are matched to the run's features
    by name (``feature_columns`` / ``ignore_columns`` / ``delimiter`` as for :func:`train`).
    """
    from .explanation import breakdown, point_table

    pr = _parent_runs(run, store)
    if pr is not None:
        from .parent_workflow import explain_parent, explain_parent_points

        if points is None:
            return explain_parent(pr)
        if isinstance(top, bool) or not isinstance(top, int) or top < 1:
            raise InvalidInputError(f"top must be a positive integer, got {top!r}")
        cols = Columns.of(feature_columns, ignore_columns, delimiter)
        return explain_parent_points(pr, _query_rows(points, pr.parent.data, cols).X, top)
    rec = load_run(run, store=store)
    if points is None:
        if rec.problem.labels is None:
            from .explanation import kind_point_table

            return kind_point_table(rec.problem, rec.result)
        return point_table(rec.problem, rec.result)
    cols = Columns.of(feature_columns, ignore_columns, delimiter)
    qds = _query_rows(points, rec.data, cols)
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    if isinstance(top, bool) or not isinstance(top, int) or top < 1:
        raise InvalidInputError(f"top must be a positive integer, got {top!r}")
    with np.errstate(all="ignore"):
        res = breakdown(model, qds.X, top=top)
    check_finite_values(res.values, qds, "query data")
    return res


def _query_rows(points: Any, data: Mapping[str, Any], cols: Columns = NO_CHOICE
                ) -> Dataset:
    """Query rows (m, d) in raw units, as a Dataset with the run's feature names, from a
    mapping, an array, a Dataset or a file (matched to the run's features by name)."""
    names = list(data.get("feature_names") or [])
    if isinstance(points, (str, Path)):
        lab = _split_column(data)
        lab = lab if _has_column(Path(points), lab, cols) else None
        return _load_data(points, lab, "query data", cols, names=names)
    if isinstance(points, Dataset):
        return _load_data(points, None, "query data", replace(cols, delimiter=None),
                          names=names)
    return Dataset(X=_parse_point(points, names), labels=None, feature_names=tuple(names))


def leave_one_out(
    run: str | RunRecord, *, store: Any = None, progress: ProgressFn | None = None,
    keep: bool = False, pair: str | Sequence[str] | None = None,
) -> Any:
    """Exact leave-one-out error (support-vector refits) with the Vapnik and Joachims bounds.

    Returns :class:`~solver.explanation.LeaveOneOut` (ε-regression / one-class:
    :class:`~solver.explanation.KindLeaveOneOut`); needs a converged run.  With ``keep``
    the figures are stored as the attachment ``leave_one_out`` of a child record of the
    run (the run's parts plus the attachment, parent link with the run's manifest
    digest, so it is verified with the run on every load); its id is ``kept_as``.  For a
    multi-class model ``pair`` (``"a,b"``) names the pair run.
    """
    import dataclasses

    from .explanation import leave_one_out as _loo

    pr = _parent_runs(run, store) if pair is not None else None
    if pair is not None and pr is None:
        raise InvalidInputError(f"--pair applies to multi-class models; run {run} is one run")
    if pr is not None:
        from .parent_workflow import pair_key

        rec = pr.member(pair_key(pair))
    else:
        rec = load_run(run, store=store)
    if keep and rec.run_id is None:
        raise InvalidInputError("leave-one-out figures can be kept only for a stored run")
    if rec.problem.labels is None:  # ε-regression / one-class: KindLeaveOneOut
        from .explanation import kind_leave_one_out

        if not rec.result.success:
            raise InvalidInputError(f"run {rec.run_id} did not converge "
                                    f"({rec.result.status.label}); leave-one-out needs a "
                                    "converged run")
        loo = kind_leave_one_out(rec.problem, rec.result)
    elif progress is None:
        loo = _loo(rec.problem, rec.result)
    else:
        def cb(done: int, total: int) -> None:
            progress("leave_one_out", {"done": done, "total": total})

        try:
            loo = _loo(rec.problem, rec.result, progress=cb)
        finally:
            progress("done", {"task": "leave_one_out"})
    if keep:
        child = dataclasses.replace(
            rec, attachments={**rec.attachments, LOO_ATTACHMENT: loo_attachment(loo)})
        loo = dataclasses.replace(loo, kept_as=open_store(store).save(child, parent=rec.run_id))
    return loo


#: Attachment name of stored leave-one-out figures.
LOO_ATTACHMENT = "leave_one_out"


def loo_attachment(loo: Any) -> dict[str, Any]:
    """Plain data of a leave-one-out result as stored: its scalars (the keys of
    :data:`solver.vocabulary.LEAVE_ONE_OUT`) and ``per_point`` (equal-length arrays:
    ``row_id``, ``loo_value`` the left-out decision value / prediction / score,
    ``refitted``, and for classification ``loo_wrong``)."""
    if hasattr(loo, "to_columns"):
        scalars, per_point = loo.to_dict(), loo.to_columns()
    else:
        scalars = loo.summary()
        per_point = {"row_id": np.arange(loo.values.size, dtype=np.int64),
                     "loo_value": np.asarray(loo.values, np.float64),
                     "refitted": np.asarray(loo.refitted, bool)}
    scalars.pop("kept_as", None)
    return {**scalars, "per_point": per_point}


def kept_leave_one_out(st: Any, rec: RunRecord) -> tuple[Any, str, str] | None:
    """The newest child record of ``rec`` holding leave-one-out figures, loaded with
    verification: (attachment, child run id, child manifest SHA-256), or None."""
    if rec.run_id is None:
        return None
    rows = sorted(st.runs(parent=rec.run_id), key=lambda r: str(r.get("created") or ""),
                  reverse=True)
    for row in rows:
        cid = row.get("run_id")
        if not cid or not (st.run_dir(cid) / f"{LOO_ATTACHMENT}.json").exists():
            continue
        child = st.load(cid)  # verified: digests, the child against itself, the parent link
        att = child.attachments.get(LOO_ATTACHMENT)
        if att is not None:
            import hashlib

            digest = hashlib.sha256((st.run_dir(cid) / "manifest.json").read_bytes()).hexdigest()
            return att, cid, digest
    return None


def replay(run: str | RunRecord, iteration: int, *, store: Any = None,
           pair: str | Sequence[str] | None = None) -> Any:
    """State of a run at a recorded ``iteration`` (α, certificate figures, decision function).

    For a multi-class parent ``pair`` (``"a,b"``) names the pair run to rebuild."""
    from .store import replay as _replay

    if isinstance(iteration, bool) or not isinstance(iteration, int) or iteration < 0:
        raise InvalidInputError(f"iteration must be a non-negative integer, got {iteration!r}")
    pr = _parent_runs(run, store)
    if pr is not None:
        from .parent_workflow import member_name, pair_key

        if pair is None:
            raise InvalidInputError(
                f"run {run} is a multi-class model over {len(pr.keys)} pair runs; name the "
                f"pair to rebuild with --pair (one of {', '.join(map(member_name, pr.keys))})")
        return _replay(pr.member(pair_key(pair)), iteration)
    if pair is not None:
        raise InvalidInputError(f"--pair applies to multi-class models; run {run} is one run")
    rec = load_run(run, store=store)
    return _replay(rec, iteration)


@dataclass(frozen=True, eq=False)
class VerifyOutcome:
    """Result of :func:`verify`: integrity of the stored run and, optionally, a re-run.

    ``integrity`` is the store's :class:`~solver.store.Verification` (``ok``, ``problems``,
    ``signer``, ``trusted``, ``notes``); ``reproduction`` the re-run's
    :class:`~solver.store.Reproduction` (None without ``rerun``); ``rerun_run_id`` the id
    of the stored re-run (with ``keep_rerun``); ``audit_note`` why no ``run_verified``
    entry was appended to the store's audit log (None when it was); ``calibration`` the
    re-fitted probability calibration compared with the stored one (runs trained with
    probabilities, with ``rerun``).
    ``ok`` is True only when the run is intact, any re-run reproduced α bitwise or
    within the reproduction tolerance, and any calibration reproduced bitwise.
    """

    run_id: str
    integrity: Any
    reproduction: Any | None
    rerun_run_id: str | None = None
    audit_note: str | None = None
    calibration: Mapping[str, Any] | None = None

    @property
    def ok(self) -> bool:
        """True only when every check passed."""
        ok = bool(self.integrity.ok)
        if self.reproduction is not None:
            ok = ok and bool(self.reproduction.within_tolerance)
        if self.calibration is not None:
            ok = ok and self.calibration["agreement"] == "bitwise"
        return ok


@dataclass(frozen=True, eq=False)
class _ParentReproduction:
    """The re-run of every pair of a multi-class parent: ``pairs`` (key, Reproduction)."""

    pairs: tuple[tuple[tuple[str, ...], Any], ...]

    @property
    def within_tolerance(self) -> bool:
        """True when every pair reproduced."""
        return all(bool(r.within_tolerance) for _, r in self.pairs)

    @property
    def agreement(self) -> str:
        """The worst pair's agreement (``bitwise`` only when every pair is bitwise)."""
        found = [str(r.agreement) for _, r in self.pairs]
        for a in ("different", "within_tolerance"):
            if a in found:
                return a
        return found[0] if len(set(found)) == 1 else ", ".join(sorted(set(found)))

    def to_dict(self) -> dict[str, Any]:
        """Plain data: every pair's reproduction."""
        from .reporting._records import _plain as plain

        out = [{"pair": list(key), **{k: plain(getattr(r, k)) for k in (
            "run_id", "agreement", "max_abs_difference", "tolerance", "problem_identical",
            "iterations", "status")}} for key, r in self.pairs]
        return {"agreement": self.agreement, "within_tolerance": self.within_tolerance,
                "pairs": out}


def _trusted_keys(trusted: Any) -> list[Any] | None:
    from .store.signing import PublicKey, load_public_key

    if trusted is None:
        return None
    items = [trusted] if isinstance(trusted, (str, Path, PublicKey)) else list(trusted)
    keys = [k if isinstance(k, PublicKey) else load_public_key(k) for k in items]
    return keys or None


def verify(
    run: str, *, store: Any = None, rerun: Dataset | str | Path | None = None,
    keep_rerun: bool = False, trusted: Any = None,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None, delimiter: str | None = None,
) -> VerifyOutcome:
    """Check a stored run and optionally re-run it.

    The run is checked byte for byte against its manifest, against itself (certificate
    recomputed from α, model rebuilt, trace replayed, manifest fields; see
    :mod:`solver.store.semantic`), against the catalog and the audit log where they
    hold its digest, and along its parent chain.  ``trusted`` (public-key file(s) from
    :func:`new_signing_keys`) requires a valid signature by one of those keys.
    ``rerun`` is the training data (file or Dataset); it must match the stored
    fingerprint.  The run's own feature columns are read from it by name (other columns,
    e.g. an ID column, are ignored with a note); ``feature_columns`` / ``ignore_columns`` /
    ``delimiter`` as for :func:`train`.  With ``keep_rerun`` the re-run is saved as a new
    run whose parent is ``run``.  A ``run_verified`` (and ``run_rerun``) entry is appended
    to the store's audit log when the store is writable; nothing is written on a read-only
    store.
    """
    from .store import auditlog, reproduce

    st = open_store(store)
    keys = _trusted_keys(trusted)
    integrity = st.verify(run, trusted=keys)
    reproduction = None
    new_id = None
    calibration = None
    if rerun is not None and integrity.ok and st.is_parent(run):
        from .parent_workflow import load_parent_runs, rerun_parent

        if keep_rerun:
            raise InvalidInputError("--keep stores one re-run; a multi-class model's pairs are "
                                    "re-run and compared without storing them")

        from .calibration.reproduce import recalibrate_pairs

        pr = load_parent_runs(st, run, trusted=keys)
        reps = rerun_parent(pr, rerun, Columns.of(feature_columns, ignore_columns, delimiter))
        reproduction = _ParentReproduction(tuple(reps))
        calibration = recalibrate_pairs([
            (key, (rec.attachments or {}).get("calibration"), rep.record.problem)
            for (key, rep), rec in zip(reps, pr.primary, strict=True)])
    elif rerun is not None and integrity.ok:
        rec = st.load(run, trusted=keys)
        ds = _load_data(rerun, _split_column(rec.data), "re-run data",
                        Columns.of(feature_columns, ignore_columns, delimiter),
                        names=rec.data.get("feature_names") or None)
        reproduction = reproduce(rec, ds)
        if keep_rerun:
            new_id = st.save(reproduction.record, parent=run)
        if rec.attachments.get("calibration") is not None:
            from .calibration.reproduce import recalibrate

            calibration = recalibrate(rec.attachments["calibration"], reproduction.record.problem)
    note = None
    if st.root.is_dir():
        note = auditlog.append(st.root, "run_verified", run, {
            "ok": bool(integrity.ok), "problems": len(integrity.problems),
            "trusted": bool(integrity.trusted), "signer": integrity.signer})
        if reproduction is not None:
            note = auditlog.append(st.root, "run_rerun", run, {
                "agreement": str(getattr(reproduction, "agreement", "")),
                "new_run_id": new_id}) or note
    return VerifyOutcome(run_id=run, integrity=integrity, reproduction=reproduction,
                         rerun_run_id=new_id, audit_note=note, calibration=calibration)


def check_output_path(path: str | Path, *, store: Any = None, what: str = "--out") -> Path:
    """``path`` made absolute, or :class:`~solver.errors.InvalidInputError` when it lies
    inside a run folder (of ``store`` or any folder recognisable as a run) or names the
    store's catalog or audit-log files.  Every command's output option goes through this."""
    return open_store(store).check_output_path(path, what)


def store_listing(*, store: Any = None, **filters: Any) -> Any:
    """Runs matching ``filters`` plus the store's leftovers (:class:`~solver.store.Listing`):
    ``.tmp-*`` folders of writers that may have been killed, SMO runs whose requested QP
    challenger was never saved, and whether the catalog was current.  Never writes."""
    return open_store(store).listing(**{k: v for k, v in filters.items() if v is not None})


def clean_store(*, store: Any = None) -> list[str]:
    """Remove the ``.tmp-*`` folders whose writing process no longer runs (this host);
    returns their names.  Runs are never touched."""
    return open_store(store).clean_temp()


def new_signing_keys(name: str, directory: str | Path) -> tuple[Path, Path]:
    """Write an Ed25519 key pair ``NAME.private.pem`` (mode 0600) / ``NAME.public.pem``."""
    from .store.signing import new_key_pair

    return new_key_pair(name, directory)


@dataclass(frozen=True, eq=False)
class ModelOutput:
    """Decision values and labels of a run's model on new data.

    values : (m,) decision values f(x) (ε-regression: the predictions; one-class: the signed
    scores); labels : (m,) predicted label values (one-class: ``inlier`` / ``outlier``;
    regression: None);
    truth : (m,) given labels or None; confusion : confusion matrix and accuracies when
    the data carried the label column, else None; fingerprint : of the scored data.
    probabilities : (m, k) class probabilities (columns in ``probability_labels`` order)
    when asked for, else None; probability_disagreements : rows whose most probable class
    differs from the decision-value label.
    A multi-class parent (``kind`` ``"multiclass_one_vs_one"``) also fills: values (m, q)
    every pair's decision value (columns in ``member_keys`` order); votes (m, k) vote
    counts (columns in ``vote_classes`` order); tie (m,) True where the highest count was
    shared (the class first in the class order won: ``tie_rule``).
    """

    run_id: str | None
    values: np.ndarray
    labels: np.ndarray
    truth: np.ndarray | None
    confusion: Mapping[str, Any] | None
    fingerprint: str
    source: str | None
    kind: str = "binary_classification"
    probabilities: np.ndarray | None = None
    probability_labels: tuple[Any, ...] | None = None
    probability_disagreements: int | None = None
    votes: np.ndarray | None = None
    vote_classes: tuple[Any, ...] | None = None
    tie: np.ndarray | None = None
    member_keys: tuple[tuple[str, ...], ...] | None = None
    vote_rule: str | None = None
    tie_rule: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain data (lists)."""
        out = {
            "run_id": self.run_id,
            "kind": self.kind,
            "n": int(self.values.shape[0]),
            "fingerprint": self.fingerprint,
            "source": self.source,
            "values": self.values.tolist(),
            "labels": [_plain(v) for v in self.labels.tolist()],
            "confusion": None if self.confusion is None else dict(self.confusion),
        }
        if self.probabilities is not None:
            out["probability_labels"] = [_plain(v) for v in self.probability_labels or ()]
            out["probabilities"] = self.probabilities.tolist()
            out["probability_disagreements"] = self.probability_disagreements
        if self.votes is not None:
            out["pairs"] = [list(k) for k in self.member_keys or ()]
            out["vote_classes"] = [_plain(v) for v in self.vote_classes or ()]
            out["votes"] = self.votes.tolist()
            out["tie"] = self.tie.tolist() if self.tie is not None else None
            out["vote_rule"], out["tie_rule"] = self.vote_rule, self.tie_rule
        return out


def _has_column(path: Path, column: str | None, columns: Columns = NO_CHOICE) -> bool:
    """Whether a data file has a column ``column`` (header peek; no data parsed)."""
    from .data import SUPPORTED_SUFFIXES, column_names

    if column is None or not path.is_file() or path.suffix.lower() not in SUPPORTED_SUFFIXES:
        return False
    return column in column_names(path, delimiter=columns.delimiter)


def apply(
    run: str | RunRecord, data: Dataset | str | Path, *, store: Any = None,
    label: str | None = None, probabilities: bool = False,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None,
    delimiter: str | None = None,
) -> ModelOutput:
    """Decision values and predicted labels of a stored run's model on ``data``.

    When the data carry a label column (``label``, or the run's label column if the file
    has it) the confusion matrix, accuracy and balanced accuracy are included.  With
    ``probabilities`` the run's fitted sigmoid gives P(class | x) for every class (an
    :class:`InvalidInputError` says how to get one when the run has none, or why its fit
    failed).  The run's features are read by name; the file's other columns are ignored
    (a :class:`~solver.errors.DataWarning` names them); ``feature_columns`` /
    ``ignore_columns`` / ``delimiter`` as for :func:`train`.
    """
    cols = Columns.of(feature_columns, ignore_columns, delimiter)
    pr = _parent_runs(run, store)
    if pr is not None:
        from .parent_workflow import apply_parent

        if isinstance(data, (str, Path)) and label is None:
            lab = pr.parent.data.get("label_name")
            label = lab if _has_column(Path(data), lab, cols) else None
        return ModelOutput(run_id=pr.parent.run_id, kind="multiclass_one_vs_one",
                           **apply_parent(pr, data, label, probabilities, cols))
    rec = load_run(run, store=store)
    names = list(rec.data.get("feature_names") or [])
    if rec.problem.labels is None:
        return _apply_kind(rec, data, names, label, cols)
    if isinstance(data, (str, Path)) and label is None:
        lab = rec.data.get("label_name")
        label = lab if _has_column(Path(data), lab, cols) else None
    ds = _load_data(data, label, "data the model is applied to", cols, names=names)
    X = ds.X
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    check_known_labels(ds, model.labels, "data the model is applied to")
    with np.errstate(all="ignore"):
        values = model.values(X)
    check_finite_values(values, ds, "data the model is applied to")
    pred = model.classify(X)
    conf = None if ds.labels is None else _confusion(ds.labels, pred, model.labels)
    probs = plabels = disagree = None
    if probabilities:
        from .calibration.reproduce import run_calibration

        cal = run_calibration(rec)
        probs = cal.probabilities(values)
        plabels = tuple(model.labels)
        disagree = int(np.sum((probs[:, 1] > 0.5) != (values > 0)))
    return ModelOutput(run_id=rec.run_id, values=values, labels=pred, truth=ds.labels,
                       confusion=conf, fingerprint=_fingerprint(ds), source=ds.source,
                       probabilities=probs, probability_labels=plabels,
                       probability_disagreements=disagree)


def _split_column(data: Mapping[str, Any]) -> str | None:
    """The column a run's training file had split off: label, target or known outliers."""
    return data.get("label_name") or data.get("target_name") or data.get("outlier_column")


def _apply_kind(rec: RunRecord, data: Any, names: list[str], label: str | None,
                cols: Columns = NO_CHOICE) -> ModelOutput:
    """ε-regression (values = predictions, no labels) or one-class (values = signed scores,
    labels ``inlier`` / ``outlier``); with the target or known-outlier column present the
    held-out facts go into ``confusion`` (regression: RMSE, MAE, R², tube coverage)."""
    from .tasks import task_for_kind

    col = label or rec.data.get("target_name") or rec.data.get("known_outlier_column")
    if isinstance(data, (str, Path)) and col is not None and not _has_column(Path(data), col,
                                                                              cols):
        col = None
    ds = _load_data(data, col, "data the model is applied to", cols, names=names)
    with np.errstate(all="ignore"):
        values = model_from_solution(rec.problem, rec.result, rec.standardiser).values(ds.X)
    check_finite_values(values, ds, "data the model is applied to")
    labels, facts = task_for_kind(rec.problem.kind).applied(rec.problem, values, ds)
    return ModelOutput(run_id=rec.run_id, values=values, labels=labels, truth=ds.labels,
                       confusion=facts, fingerprint=_fingerprint(ds), source=ds.source,
                       kind=rec.problem.kind)


def _stored_comparison(second: RunRecord, first: RunRecord) -> Any | None:
    comp = second.attachments.get("comparison")
    if comp and second.parent_id == first.run_id:
        return comp
    return None


def report(
    run_ids: str | Sequence[str | RunRecord],
    *,
    store: Any = None,
    out_dir: str | Path | None = None,
    formats: Sequence[str] = ("html", "pdf", "json"),
    notes: str | None = None,
    stem: str = "report",
    pair: str | Sequence[str] | None = None,
) -> dict[str, Path]:
    """Write the audit report for one run (or a run and its challenger) and return the paths.

    With two runs the comparison stored with the challenger is used when the second run
    derives from the first; otherwise the two runs are compared afresh.  ``out_dir``
    defaults to ``<store>/reports/<first run id>``.

    For a multi-class model (a parent id) the report has the task's multi-class section
    (every pair's convergence, the confusion matrix) and the full pages of one pair and
    its challenger: ``pair`` (``"a,b"``), by default the worst pair (not converged first,
    then the worst verdict, then the most iterations).
    """
    from .reporting import write_report

    st = open_store(store)
    ids = [run_ids] if isinstance(run_ids, (str, RunRecord)) else list(run_ids)
    if not 1 <= len(ids) <= 2:
        raise InvalidInputError(f"a report covers one run or two runs, got {len(ids)}")
    own = _own_report(st, ids[0]) if len(ids) == 1 else None
    if own is not None:  # a parent whose task writes its own report (a study)
        return own(st, ids[0], out_dir, tuple(formats))
    pr = _parent_runs(ids[0], st) if len(ids) == 1 else None
    if pr is not None:
        return _parent_report(st, pr, out_dir, formats, notes, stem, pair)
    if pair is not None:
        raise InvalidInputError("--pair applies to the report of a multi-class model")
    loaded = [_load_with_evidence(st, r) for r in ids]
    recs = [_with_kept_leave_one_out(st, rec) for rec, _ in loaded]
    comparison = None
    if len(recs) == 2:
        comparison = _stored_comparison(recs[1], recs[0])
        if comparison is None:
            from .agreement import compare_runs

            comparison = compare_runs(recs[0], recs[1])
    out = Path(out_dir) if out_dir is not None else Path(st.root) / "reports" / str(recs[0].run_id)
    st.check_output_path(out, "report folder")
    paths = write_report(recs, out, formats=tuple(formats), comparison=comparison, notes=notes,
                         stem=stem, evidence=[ev for _, ev in loaded])
    _log_report(st, recs, paths)
    return paths


def _own_report(st: Any, run: Any) -> Any:
    """The ``write_report`` of the task of parent ``run`` when it has one, else None."""
    if not isinstance(run, str) or not run or not st.is_parent(run):
        return None
    from .store.format import parse_json
    from .tasks import task_of_manifest

    manifest = parse_json((st.run_dir(run) / "manifest.json").read_bytes(), "manifest.json")
    return getattr(task_of_manifest(manifest), "write_report", None)


def _load_with_evidence(st: Any, run: str | RunRecord) -> tuple[RunRecord, dict[str, Any] | None]:
    """A run for the report and what its verification found while the report is written
    (None for a record passed in memory: nothing on disk to check)."""
    if isinstance(run, RunRecord):
        return run, None
    if not isinstance(run, str) or not run:
        raise InvalidInputError(f"a run id must be a non-empty string, got {run!r}")
    from .store.format import utc_stamp

    rec, v = st.load_verified(run)
    return rec, {"manifest_sha256": v.manifest_sha256, "verified": bool(v.ok),
                 "checked_at": utc_stamp(), "files_checked": int(v.files_checked),
                 "parent_chain": list(v.chain), "signer": v.signer, "trusted": bool(v.trusted),
                 "problems": list(v.problems), "notes": list(v.notes)}


def _with_kept_leave_one_out(st: Any, rec: RunRecord) -> RunRecord:
    """``rec`` with the leave-one-out figures of its newest child record that holds them
    (see :func:`leave_one_out` with ``keep``), marked with that record's id and digest."""
    import dataclasses

    if rec.attachments.get(LOO_ATTACHMENT) is not None:
        return rec
    kept = kept_leave_one_out(st, rec)
    if kept is None:
        return rec
    att, cid, digest = kept
    value = {**dict(att), "kept_as": cid, "kept_digest": digest}
    return dataclasses.replace(rec, attachments={**rec.attachments, LOO_ATTACHMENT: value})


def _parent_report(st: Any, pr: Any, out_dir: Any, formats: Sequence[str], notes: str | None,
                   stem: str, pair: Any) -> dict[str, Path]:
    """The report of a multi-class parent (see :func:`report`)."""
    from .parent_workflow import pair_key
    from .reporting import write_report

    if pair is not None:
        key = pair_key(pair)
        pr.member(key)  # names the pairs when there is no such pair
    else:
        verdicts = ("agree", "agree_within_tolerances", "disagree")

        def badness(k: tuple[str, ...]) -> tuple[int, int, int]:
            rec = pr.member(k)
            ch = pr.challengers.get(k)
            comp = (ch.attachments or {}).get("comparison") if ch is not None else None
            v = str(comp.get("verdict")) if comp else "agree"
            return (int(not rec.result.success),
                    verdicts.index(v) if v in verdicts else len(verdicts),
                    int(rec.result.iterations))

        key = max(pr.keys, key=badness)
    recs = [pr.member(key)] + ([pr.challengers[key]] if key in pr.challengers else [])
    comparison = _stored_comparison(recs[1], recs[0]) if len(recs) == 2 else None
    members = [pr.member(tuple(m.key or ())) if not m.role.endswith("_challenger")
               else pr.challengers[tuple(m.key or ())] for m in pr.parent.members]
    rid = str(pr.parent.run_id)
    out = Path(out_dir) if out_dir is not None else Path(st.root) / "reports" / rid
    st.check_output_path(out, "report folder")
    paths = write_report(recs, out, formats=tuple(formats), comparison=comparison, notes=notes,
                         stem=stem, parent=pr.parent, parent_members=members)
    _log_report(st, [pr.parent, *recs], paths)
    return paths


def _log_report(st: Any, recs: Sequence[Any], paths: Mapping[str, Path]) -> None:
    import hashlib

    from .store import auditlog

    if not st.root.is_dir():
        return
    files = {}
    for k, p in paths.items():
        try:
            files[k] = {"path": str(p), "sha256": hashlib.sha256(Path(p).read_bytes()).hexdigest()}
        except OSError:
            files[k] = {"path": str(p), "sha256": None}
    auditlog.append(st.root, "report_written", recs[0].run_id,
                    {"runs": [r.run_id for r in recs], "files": files})


def export_explanation(
    run: str | RunRecord, out_dir: str | Path, *, store: Any = None,
    formats: Sequence[str] = ("csv", "parquet"),
) -> dict[str, Path]:
    """Write a run's per-point table as ``points-<run id>.csv`` / ``.parquet`` in ``out_dir``."""
    for fmt in formats:
        if fmt not in ("csv", "parquet"):
            raise InvalidInputError(f"unknown table format {fmt!r}; choose csv or parquet")
    out = check_output_path(out_dir, store=store if not isinstance(run, RunRecord) else store,
                            what="explanation folder")
    table = explain(run, store=store)
    out.mkdir(parents=True, exist_ok=True)
    rid = run.run_id if isinstance(run, RunRecord) else run
    stem = f"points-{rid or 'unsaved'}"
    paths: dict[str, Path] = {}
    if "csv" in formats:
        paths["csv"] = table.write_csv(out / f"{stem}.csv")
    if "parquet" in formats:
        paths["parquet"] = table.write_parquet(out / f"{stem}.parquet")
    return paths
