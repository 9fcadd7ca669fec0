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

Every task refits through its task object, so binary, one-vs-one multi-class (every pair
refitted; drift over every pair's decision value, flips of the combined vote), regression
and one-class fits get the same evidence.  Reported for each: support-vector-set Jaccard
against the base (support vectors named by member and original row; a bootstrap's
repeated rows count once), max and RMS decision-value drift on the base's training rows
and on the held-out rows, flips of the predicted output there (class, inlier/outlier;
none for regression, whose output is the value itself), and the bias of every member; per
kind the largest spread (max − min, including the base) of any member's bias.
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
    """A refit: its member records (one, or every pair of a one-vs-one fit, as
    ``(role, key, record)``), the original row of every training row, every member's
    decision values (m, q) and the predicted outputs on the base training rows and on the
    held-out rows, and the parent's ``info`` (None for a single-run task)."""

    job: StabilityJob
    members: tuple[tuple[str, Any, RunRecord], ...]
    rows: np.ndarray
    train_values: np.ndarray
    hold_values: np.ndarray
    train_labels: np.ndarray
    hold_labels: np.ndarray
    info: Any = None
    data: Any = None

    @property
    def record(self) -> RunRecord:
        """The first (for a single-run task the only) member record."""
        return self.members[0][2]

    @property
    def success(self) -> bool:
        """Every member converged."""
        return all(r.result.success for _, _, r in self.members)

    @property
    def dual_objective(self) -> float:
        """Sum of the members' dual objectives."""
        return float(sum(r.result.certificate.dual_objective for _, _, r in self.members))

    @property
    def biases(self) -> list[float]:
        """Every member's bias."""
        return [float(r.result.bias) for _, _, r in self.members]


def fit_variant(data: Any, job: StabilityJob) -> VariantFit:
    """Refit ``job``'s variant (``data``: :class:`~.fits.StudyData`) through its task
    (every member of a one-vs-one fit refitted); nothing is stored."""
    from ..tasks import get_task
    from ..training import _fingerprint, _subset
    from .fits import _column, _kernel, _solve_from

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
    specs = task.members(_column(sub), options={"label_name": ds.label_name})
    opts = job.options
    facts = {"feature_names": list(ds.feature_names), "label_name": ds.label_name,
             "source": ds.source, "warnings": [], "stability_variant": job.kind,
             "stability_level": job.level, "stability_seed": int(job.seed)}
    members, models = [], []
    for m in specs:
        Xm = X[m.rows]
        std = Standardiser.fit(Xm) if opts.get("standardise", True) else \
            Standardiser.identity(Xm.shape[1])
        problem = task.cell_problem(std.transform(Xm), m, kernel=_kernel(opts, job.cell),
                                    cell=job.cell)
        result = _solve_from(problem, opts, None, _solve_any())
        models.append(model_from_solution(problem, result, std))
        mrows = rows[m.rows]
        members.append((m.role, m.key, RunRecord(
            problem=problem, result=result, standardiser=std,
            data={**facts, "fingerprint": _fingerprint(_subset(sub, m.rows)),
                  "n_rows": int(mrows.size)},
            attachments={"command": job.command, "stability_fit": {
                "kind": job.kind, "index": job.index, "level": job.level, "seed": job.seed,
                "cell": job.cell.to_dict(), "rows": [int(r) for r in mrows.tolist()]}})))
    info = task.describe(specs, sub.labels, None) if task.parent_record else None
    pt = task.predict(models, ds.X[base_rows], info)
    ph = task.predict(models, ds.X[hold_rows], info)
    q = len(models)
    return VariantFit(
        job=job, members=tuple(members), rows=rows,
        train_values=np.asarray(pt.values, np.float64).reshape(base_rows.size, q),
        hold_values=np.asarray(ph.values, np.float64).reshape(hold_rows.size, q),
        train_labels=np.asarray(pt.labels, dtype=object),
        hold_labels=np.asarray(ph.labels, dtype=object), info=info,
        data={**facts, "fingerprint": _fingerprint(sub), "n_rows": int(rows.size)})


def _solve_any() -> Any:
    from ..training import _solve

    return _solve


def _support(f: VariantFit) -> set[tuple[int, int]]:
    """Support vectors as (member, original data row): a variable with α above its lower
    bound, named by the row it belongs to (a bootstrap's repeated rows count once; an
    ε-regression row counts once for either of its two variables)."""
    out: set[tuple[int, int]] = set()
    for q, (_, _, rec) in enumerate(f.members):
        p = rec.problem
        var_rows = getattr(p, "rows", None)
        if var_rows is None:
            var_rows = np.arange(p.n)
        member_rows = np.asarray(rec.attachments["stability_fit"]["rows"], dtype=np.int64)
        active = np.flatnonzero(~np.asarray(rec.result.certificate.at_lower, dtype=bool))
        out.update((q, int(member_rows[int(var_rows[i])])) for i in active)
    return out


def _jaccard(a: set[int], b: set[int]) -> float:
    return len(a & b) / len(a | b) if a | b else 1.0


def summarise(fits: Sequence[VariantFit], run_ids: Sequence[str]) -> dict[str, Any]:
    """Plain-data stability evidence (see the module docstring)."""
    base = fits[0]
    base_sv = _support(base)
    dual0 = base.dual_objective
    variants = []
    for f, rid in zip(fits[1:], run_ids[1:], strict=True):
        dt = f.train_values - base.train_values
        dh = f.hold_values - base.hold_values
        dual = f.dual_objective
        rel = abs(dual - dual0) / max(1.0, abs(dual0))
        status = ("converged" if f.success else next(
            r.result.status.label for _, _, r in f.members if not r.result.success))
        row = {
            "kind": f.job.kind, "index": f.job.index, "level": f.job.level,
            "seed": f.job.seed, "run_id": rid, "status": status,
            "support_jaccard": _jaccard(base_sv, _support(f)),
            "max_drift_train": float(np.max(np.abs(dt))) if dt.size else 0.0,
            "rms_drift_train": float(np.sqrt(np.mean(dt ** 2))) if dt.size else 0.0,
            "max_drift_held_out": float(np.max(np.abs(dh))) if dh.size else 0.0,
            "rms_drift_held_out": float(np.sqrt(np.mean(dh ** 2))) if dh.size else 0.0,
            "flips_train": int(np.sum(f.train_labels != base.train_labels)),
            "flips_held_out": int(np.sum(f.hold_labels != base.hold_labels)),
            "bias": f.biases[0], "biases": f.biases,
            "dual_objective_relative_difference": rel,
        }
        if f.job.kind == "permutation":
            row["same_optimum"] = bool(f.success and base.success
                                       and rel <= SAME_OBJECTIVE_REL
                                       and row["max_drift_train"] <= SAME_VALUE_ABS)
        variants.append(row)
    kinds = {}
    b0 = base.biases
    for kind in ("permutation", "bootstrap", "noise"):
        vs = [v for v in variants if v["kind"] == kind]
        if not vs:
            continue
        spread = max(max(bs) - min(bs) for bs in zip(b0, *(v["biases"] for v in vs),
                                                      strict=True))
        kinds[kind] = {
            "refits": len(vs), "lowest_sv_jaccard": min(v["support_jaccard"] for v in vs),
            "max_drift_train": max(v["max_drift_train"] for v in vs),
            "max_drift_held_out": max(v["max_drift_held_out"] for v in vs),
            "max_flips_held_out": max(v["flips_held_out"] for v in vs),
            "bias_spread": float(spread),
        }
    perms = [v for v in variants if v["kind"] == "permutation"]
    same = all(v["same_optimum"] for v in perms)
    verdict = ("row-order permutations gave the same optimum within tolerance" if same else
               "FLAG: a row-order permutation did not give the same optimum: "
               + ", ".join(f"permutation {v['index']} (run {v['run_id']})" for v in perms
                           if not v["same_optimum"]))
    return {
        "cell": base.job.cell.label, "base_run_id": run_ids[0],
        "base_status": "converged" if base.success else "not converged",
        "members": len(base.members),
        "compared_on": ("every member's decision value and the task's predicted output "
                        "(for one-vs-one: every pair's value, flips of the combined vote)"),
        "held_out": "fold 0 of the study's folds", "base_support": len(base_sv),
        "noise_levels": list(NOISE_LEVELS), "variants": variants, "by_kind": kinds,
        "permutations_same_optimum": same, "permutation_verdict": verdict,
        "same_optimum_rule": f"both converged, dual objectives within {SAME_OBJECTIVE_REL:g} "
        f"relative, no training decision value moved by more than {SAME_VALUE_ABS:g}",
    }
