"""Public workflow functions of model exchange (re-exported as ``solver.export_onnx`` and
``solver.challenge``), with the same names as the ``kktrace export`` / ``challenge`` commands."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .._workflow import Columns, open_store
from ..data import Dataset
from .challenge import ChallengeOutcome
from .challenge import challenge as _challenge
from .export import ExportOutcome, export_run

__all__ = ["export_onnx", "challenge", "ExportOutcome", "ChallengeOutcome"]


def export_onnx(
    run: Any, to: str | Path, *, store: Any = None,
    holdout: Dataset | str | Path | None = None,
    feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None, delimiter: str | None = None,
) -> ExportOutcome:
    """Export a stored run's model to the ONNX file ``to`` and check it.

    The file holds a ``Scaler`` (the run's standardiser) and the standard's SVM operator
    for the run's problem kind; a multi-class parent is exported through its task, in the
    standard's one-vs-one layout when its pairs share one standardiser and kernel, else one
    ``SVMRegressor`` per pair and the task's vote (:mod:`solver.exchange.subjects`).
    onnxruntime and the ``onnx`` reference evaluator run it on
    the training rows (and ``holdout`` rows, if given); the largest decision-value
    difference (float32 drift) and the share of changed predicted classes are returned and
    stored as the attachment ``onnx_export`` of a run derived from ``run``.  The held-out
    file's columns are chosen by ``feature_columns`` / ``ignore_columns`` / ``delimiter``
    as for :func:`solver.train`; the run's features are read by name.
    """
    from ..api import _holdout_X, load_run
    from ..tasks import get_task

    st = open_store(store)
    subject = None
    if isinstance(run, str) and st.is_parent(run):
        rec: Any = st.load_parent(run)
        members = [st.load(i) for i in rec.member_ids("pair")]
        subject = get_task(rec.task).export_mapping(rec, members)
    else:
        rec = load_run(run, store=st)
    hX = None
    if holdout is not None:
        hX = np.asarray(_holdout_X(holdout, rec.data,
                                   Columns.of(feature_columns, ignore_columns, delimiter)),
                        dtype=np.float64)
    return export_run(rec, to, store=st, holdout=hX, subject=subject)


def challenge(
    model: str | Path, data: Dataset | str | Path, *, label: str | None, C: float | None,
    kkt_tol: float = 1e-3, standardise: bool = True, store: Any = None,
    challenger: bool = True, feature_columns: Sequence[str] | None = None,
    ignore_columns: Sequence[str] | None = None, delimiter: str | None = None,
) -> ChallengeOutcome:
    """Challenge a model trained elsewhere (ONNX file or open JSON table) on its training
    data: the external solution's certificate, fresh SMO and QP solves of the same problem,
    and the agreement verdict of the external solution against both (see
    :mod:`solver.exchange.challenge`); the data's columns chosen by ``feature_columns`` /
    ``ignore_columns`` / ``delimiter`` as for :func:`solver.train`."""
    return _challenge(model, data, label=label, C=C, kkt_tol=kkt_tol, standardise=standardise,
                      store=store, challenger=challenger,
                      columns=Columns.of(feature_columns, ignore_columns, delimiter))
