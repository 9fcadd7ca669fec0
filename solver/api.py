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
from dataclasses import dataclass
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
    return open_store(store).load(run)


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
    columns are ignored with a :class:`~solver.errors.DataWarning` naming them).  Runs of
    different problems raise
    :class:`~solver.errors.ProblemMismatchError` unless ``allow_mismatch``.
    """
    from .agreement import compare_runs

    a, b = load_run(run_a, store=store), load_run(run_b, store=store)
    hX = None
    if holdout is not None:
        cols = Columns.of(feature_columns, ignore_columns, delimiter)
        lab = _split_column(a.data)
        if isinstance(holdout, (str, Path)) and not _has_column(Path(holdout), lab, cols):
            lab = None
        hold = _load_data(holdout, lab, "held-out data", cols,
                          names=a.data.get("feature_names") or [])
        hX = hold.X
    return compare_runs(a, b, holdout_X=hX, tolerances=tolerances, allow_mismatch=allow_mismatch)


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

    rec = load_run(run, store=store)
    if points is None:
        if rec.problem.labels is None:
            from .explanation import kind_point_table

            return kind_point_table(rec.problem, rec.result)
        return point_table(rec.problem, rec.result)
    names = list(rec.data.get("feature_names") or [])
    if isinstance(points, (str, Path)):
        cols = Columns.of(feature_columns, ignore_columns, delimiter)
        lab = _split_column(rec.data)
        lab = lab if _has_column(Path(points), lab, cols) else None
        qds = _load_data(points, lab, "query data", cols, names=names)
    elif isinstance(points, Dataset):
        qds = _load_data(points, None, "query data",
                         Columns.of(feature_columns, ignore_columns), names=names)
    else:
        qds = Dataset(X=_parse_point(points, names), labels=None, feature_names=tuple(names))
    model = model_from_solution(rec.problem, rec.result, rec.standardiser)
    if isinstance(top, bool) or not isinstance(top, int) or top < 1:
        raise InvalidInputError(f"top must be a positive integer, got {top!r}")
    with np.errstate(all="ignore"):
        res = breakdown(model, qds.X, top=top)
    check_finite_values(res.values, qds, "query data")
    return res


def leave_one_out(
    run: str | RunRecord, *, store: Any = None, progress: ProgressFn | None = None
) -> Any:
    """Exact leave-one-out error (support-vector refits) with the Vapnik and Joachims bounds.

    Returns :class:`~solver.explanation.LeaveOneOut`; needs a converged run.
    """
    from .explanation import leave_one_out as _loo

    rec = load_run(run, store=store)
    if rec.problem.labels is None:  # ε-regression / one-class: KindLeaveOneOut
        from .explanation import kind_leave_one_out

        if not rec.result.success:
            raise InvalidInputError(f"run {rec.run_id} did not converge "
                                    f"({rec.result.status.label}); leave-one-out needs a "
                                    "converged run")
        return kind_leave_one_out(rec.problem, rec.result)
    if progress is None:
        return _loo(rec.problem, rec.result)

    def cb(done: int, total: int) -> None:
        progress("leave_one_out", {"done": done, "total": total})

    try:
        return _loo(rec.problem, rec.result, progress=cb)
    finally:
        progress("done", {"task": "leave_one_out"})


def replay(run: str | RunRecord, iteration: int, *, store: Any = None) -> Any:
    """State of a run at a recorded ``iteration`` (α, certificate figures, decision function)."""
    from .store import replay as _replay

    if isinstance(iteration, bool) or not isinstance(iteration, int) or iteration < 0:
        raise InvalidInputError(f"iteration must be a non-negative integer, got {iteration!r}")
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
) -> VerifyOutcome:
    """Check a stored run and optionally re-run it.

    The run is checked byte for byte against its manifest, against itself (certificate
    recomputed from α, model rebuilt, trace replayed, manifest fields; see
    :mod:`solver.store.semantic`), against the catalog and the audit log where they
    hold its digest, and along its parent chain.  ``trusted`` (public-key file(s) from
    :func:`new_signing_keys`) requires a valid signature by one of those keys.
    ``rerun`` is the training data (file or Dataset); it must match the stored
    fingerprint.  With ``keep_rerun`` the re-run is saved as a new run whose parent is
    ``run``.  A ``run_verified`` (and ``run_rerun``) entry is appended to the store's
    audit log when the store is writable; nothing is written on a read-only store.
    """
    from .store import auditlog, reproduce

    st = open_store(store)
    keys = _trusted_keys(trusted)
    integrity = st.verify(run, trusted=keys)
    reproduction = None
    new_id = None
    calibration = None
    if rerun is not None and integrity.ok:
        rec = st.load(run, trusted=keys)
        ds = _load_data(rerun, _split_column(rec.data), "re-run data")
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
    rec = load_run(run, store=store)
    names = list(rec.data.get("feature_names") or [])
    cols = Columns.of(feature_columns, ignore_columns, delimiter)
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
    from .measures import novelty_measures, regression_measures
    from .problem import REGRESSION_KIND
    from .training_kinds import known_outliers, numeric_column

    col = label or rec.data.get("target_name") or rec.data.get("known_outlier_column")
    if isinstance(data, (str, Path)) and col is not None and not _has_column(Path(data), col,
                                                                              cols):
        col = None
    ds = _load_data(data, col, "data the model is applied to", cols, names=names)
    X = ds.X
    with np.errstate(all="ignore"):
        values = model_from_solution(rec.problem, rec.result, rec.standardiser).values(X)
    check_finite_values(values, ds, "data the model is applied to")
    if rec.problem.kind == REGRESSION_KIND:
        labels = np.full(values.shape[0], None, dtype=object)
        facts = None if ds.labels is None else regression_measures(
            numeric_column(ds, "target"), values, epsilon=float(rec.problem.info["epsilon"]))
    else:
        labels = np.where(values >= 0, "inlier", "outlier").astype(object)
        facts = novelty_measures(values, None if ds.labels is None else known_outliers(ds))
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
) -> dict[str, Path]:
    """Write the audit report for one run (or a run and its challenger) and return the paths.

    With two runs the comparison stored with the challenger is used when the second run
    derives from the first; otherwise the two runs are compared afresh.  ``out_dir``
    defaults to ``<store>/reports/<first run id>``.
    """
    from .reporting import write_report

    st = open_store(store)
    ids = [run_ids] if isinstance(run_ids, (str, RunRecord)) else list(run_ids)
    if not 1 <= len(ids) <= 2:
        raise InvalidInputError(f"a report covers one run or two runs, got {len(ids)}")
    recs = [load_run(r, store=st) for r in ids]
    comparison = None
    if len(recs) == 2:
        comparison = _stored_comparison(recs[1], recs[0])
        if comparison is None:
            from .agreement import compare_runs

            comparison = compare_runs(recs[0], recs[1])
    out = Path(out_dir) if out_dir is not None else Path(st.root) / "reports" / str(recs[0].run_id)
    st.check_output_path(out, "report folder")
    paths = write_report(recs, out, formats=tuple(formats), comparison=comparison, notes=notes,
                         stem=stem)
    _log_report(st, recs, paths)
    return paths


def _log_report(st: Any, recs: Sequence[RunRecord], paths: Mapping[str, Path]) -> None:
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
    rec = load_run(run, store=store)
    table = explain(rec)
    out.mkdir(parents=True, exist_ok=True)
    stem = f"points-{rec.run_id or 'unsaved'}"
    paths: dict[str, Path] = {}
    if "csv" in formats:
        paths["csv"] = table.write_csv(out / f"{stem}.csv")
    if "parquet" in formats:
        paths["parquet"] = table.write_parquet(out / f"{stem}.parquet")
    return paths
