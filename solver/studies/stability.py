"""Stability evidence for one setting (a study's chosen cell): refits under row-order
permutations, bootstrap resamples and small feature noise, each compared with the base
fit.  Pure: records are returned, the caller stores them.

Base fit: the chosen cell trained on every row outside fold 0; fold 0 is held out.  Each
variant is a complete refit (own standardiser, own solve) of the same cell:

* ``permutation`` — the same rows in another order (seeded).  The dual is the same
  problem with its variables renumbered, so the optimum must be the same: both fits
  converged, dual objectives within :data:`SAME_OBJECTIVE_REL` relative and no training
  decision value moved by more than :data:`SAME_VALUE_ABS`; otherwise the variant is
  flagged.
* ``bootstrap`` — as many rows drawn with replacement (seeded).
* ``noise`` — every feature plus Gaussian noise of sd = level × that feature's sd on the
  training rows, at the levels :data:`NOISE_LEVELS`.

Reported for each: support-vector-set Jaccard against the base (support vectors named by
their original row; a bootstrap's repeated rows count once), max and RMS decision-value
drift on the base's training rows and on the held-out rows, prediction flips there, and
the bias; per kind the spread (max − min) of the bias including the base.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..model import Standardiser, model_from_solution
from ..run import RunRecord
from .grid import Cell

__all__ = ["StabilityJob", "stability_jobs", "fit_variant", "summarise", "NOISE_LEVELS",
           "SAME_OBJECTIVE_REL", "SAME_VALUE_ABS"]

#: feature-noise levels, as a fraction of each feature's standard deviation
NOISE_LEVELS = (0.01, 0.05)
#: same optimum: relative dual-objective difference at most this ...
SAME_OBJECTIVE_REL = 1e-3
#: ... and no training decision value moved by more than this (decision-value units)
SAME_VALUE_ABS = 1e-2


@dataclass(frozen=True)
class StabilityJob:
    """One refit: ``kind`` (``base``, ``permutation``, ``bootstrap``, ``noise``), its
    ``level`` (noise level or None), ``seed`` and the options of the cell."""

    kind: str
    index: int
    level: float | None
    seed: int
    cell: Cell
    task: str
    options: Mapping[str, Any]
    command: Any = None


def stability_jobs(cell: Cell, task: str, options: Mapping[str, Any], seed: int, *,
                   permutations: int = 3, bootstraps: int = 3, command: Any = None
                   ) -> list[StabilityJob]:
    """The base fit then the variants (seeds derived from ``seed``)."""
    jobs = [StabilityJob("base", 0, None, seed, cell, task, options, command)]
    jobs += [StabilityJob("permutation", i, None, seed + 101 + i, cell, task, options, command)
             for i in range(permutations)]
    jobs += [StabilityJob("bootstrap", i, None, seed + 211 + i, cell, task, options, command)
             for i in range(bootstraps)]
    jobs += [StabilityJob("noise", i, lvl, seed + 307 + i, cell, task, options, command)
             for i, lvl in enumerate(NOISE_LEVELS)]
    return jobs


@dataclass(frozen=True, eq=False)
class VariantFit:
    """A refit: its record, original row of every training variable, decision values on
    the base training rows and on the held-out rows."""

    job: StabilityJob
    record: RunRecord
    rows: np.ndarray
    train_values: np.ndarray
    hold_values: np.ndarray


def fit_variant(data: Any, job: StabilityJob) -> VariantFit:
    """Refit ``job``'s variant (``data``: :class:`~.fits.StudyData`); nothing is stored."""
    from ..tasks import get_task
    from ..training import _fingerprint, _subset
    from .fits import _kernel, _solve_from

    ds = data.dataset
    base_rows = np.flatnonzero(data.folds != 0)
    hold_rows = np.flatnonzero(data.folds == 0)
    rng = np.random.default_rng(job.seed)
    rows = base_rows
    X = ds.X[base_rows]
    if job.kind == "permutation":
        rows = base_rows[rng.permutation(base_rows.size)]
        X = ds.X[rows]
    elif job.kind == "bootstrap":
        rows = np.sort(rng.choice(base_rows, size=base_rows.size, replace=True))
        X = ds.X[rows]
    elif job.kind == "noise":
        sd = ds.X[base_rows].std(axis=0)
        X = ds.X[base_rows] + rng.normal(size=X.shape) * (float(job.level) * sd)
    sub = _subset(ds, rows)
    task = get_task(job.task)
    (member,) = task.members(sub.labels)
    opts = job.options
    std = Standardiser.fit(X) if opts.get("standardise", True) else \
        Standardiser.identity(X.shape[1])
    problem = task.build_problem(std.transform(X), member, kernel=_kernel(opts, job.cell),
                                 C=job.cell.C)
    result = _solve_from(problem, opts, None, _solve_any())
    model = model_from_solution(problem, result, std)
    rec = RunRecord(problem=problem, result=result, standardiser=std, data={
        "fingerprint": _fingerprint(sub), "feature_names": list(ds.feature_names),
        "label_name": ds.label_name, "source": ds.source, "warnings": [],
        "n_rows": int(rows.size), "stability_variant": job.kind,
        "stability_level": job.level, "stability_seed": int(job.seed)},
        attachments={"command": job.command, "stability_fit": {
            "kind": job.kind, "index": job.index, "level": job.level, "seed": job.seed,
            "cell": job.cell.to_dict(), "rows": [int(r) for r in rows.tolist()]}})
    return VariantFit(job=job, record=rec, rows=rows,
                      train_values=model.values(ds.X[base_rows]),
                      hold_values=model.values(ds.X[hold_rows]))


def _solve_any() -> Any:
    from ..training import _solve

    return _solve


def _jaccard(a: set[int], b: set[int]) -> float:
    return len(a & b) / len(a | b) if a | b else 1.0


def summarise(fits: Sequence[VariantFit], run_ids: Sequence[str]) -> dict[str, Any]:
    """Plain-data stability evidence (see the module docstring)."""
    base = fits[0]
    sv = lambda f: {int(f.rows[i]) for i in np.flatnonzero(  # noqa: E731
        ~np.asarray(f.record.result.certificate.at_lower, dtype=bool))}
    base_sv = sv(base)
    dual0 = float(base.record.result.certificate.dual_objective)
    variants = []
    for f, rid in zip(fits[1:], run_ids[1:], strict=True):
        dt = f.train_values - base.train_values
        dh = f.hold_values - base.hold_values
        dual = float(f.record.result.certificate.dual_objective)
        rel = abs(dual - dual0) / max(1.0, abs(dual0))
        row = {
            "kind": f.job.kind, "index": f.job.index, "level": f.job.level,
            "seed": f.job.seed, "run_id": rid, "status": f.record.result.status.label,
            "support_jaccard": _jaccard(base_sv, sv(f)),
            "max_drift_train": float(np.max(np.abs(dt))) if dt.size else 0.0,
            "rms_drift_train": float(np.sqrt(np.mean(dt ** 2))) if dt.size else 0.0,
            "max_drift_held_out": float(np.max(np.abs(dh))) if dh.size else 0.0,
            "rms_drift_held_out": float(np.sqrt(np.mean(dh ** 2))) if dh.size else 0.0,
            "flips_train": int(np.sum((f.train_values > 0) != (base.train_values > 0))),
            "flips_held_out": int(np.sum((f.hold_values > 0) != (base.hold_values > 0))),
            "bias": float(f.record.result.bias),
            "dual_objective_relative_difference": rel,
        }
        if f.job.kind == "permutation":
            row["same_optimum"] = bool(f.record.result.success and base.record.result.success
                                       and rel <= SAME_OBJECTIVE_REL
                                       and row["max_drift_train"] <= SAME_VALUE_ABS)
        variants.append(row)
    kinds = {}
    b0 = float(base.record.result.bias)
    for kind in ("permutation", "bootstrap", "noise"):
        vs = [v for v in variants if v["kind"] == kind]
        if not vs:
            continue
        biases = [b0] + [v["bias"] for v in vs]
        kinds[kind] = {
            "refits": len(vs), "lowest_sv_jaccard": min(v["support_jaccard"] for v in vs),
            "max_drift_train": max(v["max_drift_train"] for v in vs),
            "max_drift_held_out": max(v["max_drift_held_out"] for v in vs),
            "max_flips_held_out": max(v["flips_held_out"] for v in vs),
            "bias_spread": float(max(biases) - min(biases)),
        }
    perms = [v for v in variants if v["kind"] == "permutation"]
    same = all(v["same_optimum"] for v in perms)
    verdict = ("row-order permutations gave the same optimum within tolerance" if same else
               "FLAG: a row-order permutation did not give the same optimum: "
               + ", ".join(f"permutation {v['index']} (run {v['run_id']})" for v in perms
                           if not v["same_optimum"]))
    return {
        "cell": base.job.cell.label, "base_run_id": run_ids[0],
        "base_status": base.record.result.status.label,
        "held_out": "fold 0 of the study's folds", "base_support": len(base_sv),
        "noise_levels": list(NOISE_LEVELS), "variants": variants, "by_kind": kinds,
        "permutations_same_optimum": same, "permutation_verdict": verdict,
        "same_optimum_rule": f"both converged, dual objectives within {SAME_OBJECTIVE_REL:g} "
        f"relative, no training decision value moved by more than {SAME_VALUE_ABS:g}",
    }
