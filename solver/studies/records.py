"""The records of a study: its fits stored (a run, or pair runs and a parent over them),
fits already stored found and loaded, the warm-start check, and the study's parent record.

Used by :func:`solver.studies.study` (:mod:`.runner`); nothing here talks to Dask.
"""

from __future__ import annotations

import shlex
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..run import Member, ParentRecord
from .fits import FitJob, FitOutput, FitView
from .grid import Grid
from .table import write_parquet

__all__ = ["WARM_OBJECTIVE_TOL", "stored_fits", "study_command", "load_fit", "save_fit",
           "save_variant", "compare_warm_cold", "study_record"]


def stored_fits(store: Any, fingerprints: Sequence[str]) -> dict[str, str]:
    """study fit key → run id, for the runs already in the store on these training sets."""
    from ..store.format import parse_json

    found: dict[str, str] = {}
    if not Path(store.root).is_dir():
        return found
    for fp in sorted(set(fingerprints)):
        for row in store.runs(fingerprint=fp):
            rid = row.get("run_id")
            try:
                m = parse_json((store.run_dir(rid) / "manifest.json").read_bytes(),
                               "manifest.json")
            except Exception:  # noqa: BLE001 - an unreadable run is simply not reused
                continue
            key = (m.get("data") or {}).get("study_fit_key") if isinstance(m, dict) else None
            if isinstance(key, str):
                found.setdefault(key, rid)
    return found


def study_command(data: Any, label: str | None, args: Mapping[str, Any]) -> dict[str, Any]:
    if not isinstance(data, (str, Path)):
        return {"argv": None, "text": None, "python": "solver.study(dataset, ...)",
                "note": "study of an in-memory dataset: reproduce with the Python call"}
    argv = ["kktrace", "study", str(data)]
    if label is not None:
        argv += ["--label", label]
    for k, v in args.items():
        if v is None or v is False:
            continue
        flag = "--" + k.replace("_", "-")
        if v is True:
            argv += [flag]
        elif isinstance(v, (list, tuple)):
            argv += [flag, ",".join(x if isinstance(x, str) else f"{x:g}" for x in v)]
        else:
            argv += [flag, str(v)]
    return {"argv": argv, "text": shlex.join(argv), "python": None}


def _versions() -> dict[str, str]:
    import importlib.metadata as md

    from .. import __version__

    out = {"kktrace": __version__}
    for pkg in ("numpy", "scipy", "numba", "dask", "distributed", "pyarrow"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def load_fit(store: Any, run_id: str) -> FitView:
    """A stored fit (a run, or a one-vs-one parent and its pair runs), verified."""
    if store.is_parent(run_id):
        parent = store.load_parent(run_id)  # verifies the parent and every member
        recs = [store.load(m.run_id, verify=False) for m in parent.members]
        return FitView.of_records(parent.attachments, recs)
    rec = store.load(run_id, verify=True)
    return FitView.of_records(rec.attachments, [rec])


def save_variant(store: Any, f: Any) -> str:
    """Store a stability refit: its run, or its pair runs and a parent over them."""
    if f.info is None:
        return store.save(f.record)
    refs = [Member(run_id=store.save(rec), role=role, key=key) for role, key, rec in f.members]
    att = {"command": f.job.command,
           "stability_fit": f.record.attachments["stability_fit"]}
    return _save_parent_fit(store, refs, FitView.of_records(att, [r for *_, r in f.members]),
                            f.job.cell, f.info, f.data, f.job.task, f.job.options)


def save_fit(store: Any, o: FitOutput, task: str, *, job_opts: Mapping[str, Any]) -> str:
    """Store a fresh fit from its encoded runs: its run, or its pair runs then a parent
    record over them."""
    if not o.roles:
        return store.save_encoded(o.encoded[0])
    refs = [Member(run_id=store.save_encoded(e), role=role, key=key)
            for e, (role, key) in zip(o.encoded, o.roles, strict=True)]
    return _save_parent_fit(store, refs, o.view, o.cell, o.info, o.data, task, job_opts)


def _save_parent_fit(store: Any, refs: Sequence[Member], view: FitView, cell: Any,
                     info: Mapping[str, Any] | None, data: Mapping[str, Any], task: str,
                     job_opts: Mapping[str, Any]) -> str:
    """The parent record of a one-vs-one fit over its stored pair runs ``refs``."""
    from ..training import _STATUS_ORDER, worst

    rs = view.runs
    status = worst([r.status for r in rs], _STATUS_ORDER) or "converged"
    summary = {
        "task": task, "members": len(refs), "pairs": len(refs), "status": status,
        "converged": all(r.converged for r in rs),
        "solver": {"name": "smo", "status": status,
                   "iterations": int(sum(r.iterations for r in rs)),
                   "seconds": float(sum(r.seconds for r in rs))},
        "problem": {"kind": "multiclass_one_vs_one", "n": int(data["n_rows"]),
                    "n_features": rs[0].n_features, "kernel": dict(rs[0].kernel),
                    "info": {"C": None if cell.C is None else float(cell.C)}},
        "certificate": {"kkt_tol": float(job_opts["kkt_tol"]),
                        "max_violation": max(r.max_violation for r in rs),
                        "duality_gap": max(r.duality_gap for r in rs)},
    }
    return store.save_parent(ParentRecord(
        task=task, members=tuple(refs), info={**dict(info or {}), "options": dict(job_opts),
                                              "execution": None},
        data=dict(data), summary=summary, attachments=dict(view.attachments),
        command=view.attachments.get("command")))


#: warm and cold fits of a cell agree when both meet the certificate and their dual
#: objectives differ by at most this much relative to max(1, |objective|)
WARM_OBJECTIVE_TOL = 1e-3


def compare_warm_cold(checks: Sequence[FitJob], jobs: Sequence[FitJob],
                stored: Mapping[str, tuple[str, FitView]], opts: Mapping[str, Any]
                ) -> tuple[dict[str, Any], list[Member]]:
    """Iterations of warm-started fits against the same cells started cold, and whether
    both give the same certificate (see :data:`WARM_OBJECTIVE_TOL`)."""
    warm_of = {}
    for j in jobs:
        for c, key in zip(j.cells, j.keys, strict=True):
            warm_of[(j.fold, c)] = stored[key]
    cells, members = [], []
    for j in checks:
        c = j.cells[0]
        crid, cold = stored[j.keys[0]]
        wrid, warm = warm_of[(j.fold, c)]
        members.append(Member(run_id=crid, role="cold_check", key=(c.label, f"fold={j.fold}")))
        # every member (one run, or every pair of a one-vs-one fit) compared with its twin
        rels = [abs(w.dual_objective - cr.dual_objective) / max(1.0, abs(cr.dual_objective))
                for w, cr in zip(warm.runs, cold.runs, strict=True)]
        conv = all(r.converged for r in (*warm.runs, *cold.runs))
        rel = max(rels)
        hw, hc = warm.attachments["holdout"], cold.attachments["holdout"]
        score = next((m for m in ("accuracy", "rmse", "nu_gap") if m in hw), None)
        cells.append({
            "cell": c.label, "fold": j.fold, "warm_run_id": wrid, "cold_run_id": crid,
            "members": len(rels),
            "warm_iterations": int(sum(r.iterations for r in warm.runs)),
            "cold_iterations": int(sum(r.iterations for r in cold.runs)),
            "both_converged": bool(conv),
            "dual_objective_relative_difference": rel,
            "score": score,
            "score_difference": (None if score is None else
                                 abs(float(hw[score]) - float(hc[score]))),
            "same_certificate": bool(conv and rel <= WARM_OBJECTIVE_TOL),
        })
    w = sum(x["warm_iterations"] for x in cells)
    cd = sum(x["cold_iterations"] for x in cells)
    # the first C of every sampled chain starts cold either way: counted in both path totals
    first = sum(int(r.iterations) for j in jobs if j.fold == 0 and j.warm
                for r in stored[j.keys[0]][1].runs)
    return {"sample": "every cell but the first C of each gamma/degree chain, fold 0",
            "cells": cells, "warm_iterations": w, "cold_iterations": cd,
            "ratio_cold_to_warm": cd / w if w else None,
            "first_cell_iterations": first,
            "path_ratio_cold_to_warm": (cd + first) / (w + first) if w + first else None,
            "all_same_certificate": all(x["same_certificate"] for x in cells),
            "objective_tolerance": WARM_OBJECTIVE_TOL, "kkt_tol": float(opts["kkt_tol"]),
            "rule": "same certificate: both fits converged (violation <= kkt_tol) and their "
            "dual objectives differ by <= 1e-3 relative to max(1, |objective|) (for a "
            "one-vs-one fit: every pair with its own twin)"}, members


def study_record(fit_task: Any, grid: Grid, ds: Any, fold_of: np.ndarray, k: int, seed: int,
            opts: Mapping[str, Any], warm: bool, execution: Mapping[str, Any],
            rows: Sequence[Mapping[str, Any]], cells: Sequence[Mapping[str, Any]],
            choice: Mapping[str, Any], members: Sequence[Member], command: Any,
            warm_check: Mapping[str, Any] | None = None,
            stab: Mapping[str, Any] | None = None) -> ParentRecord:
    import io

    import pyarrow as pa  # noqa: F401 - the table is written with pyarrow

    from .._workflow import _fingerprint
    from ..training import _STATUS_ORDER, worst

    task = fit_task.name
    buf = io.BytesIO()
    write_parquet(rows, cells, buf)
    status = worst([r["status"] for r in rows], _STATUS_ORDER) or "converged"
    one_se = next(c for c in cells if c["cell"] == choice["one_se"])
    info = {
        "kind": "study", "member_task": task, "grid": grid.to_dict(),
        "folds": {"k": int(k), "seed": int(seed), "attachment": "folds",
                  "rule": "stratified by class, seeded (solver.calibration.stratified_folds)"
                  if fit_task.class_labels else "plain seeded k-fold: rows in the order of "
                  "numpy.random.default_rng(seed).permutation(n), dealt to folds 0..k-1 in "
                  "turn (solver.studies.study_folds)"},
        "options": dict(opts), "warm_start": bool(warm), "execution": dict(execution),
        "versions": _versions(), "score": choice["score"],
        "higher_is_better": bool(choice.get("higher_is_better", True)),
        "measures": list(fit_task.study_measures),
        "score_note": fit_task.study_score_note,
        "trace_level_reason": "sampled: every 100th iteration plus every event keeps each "
        "fit's convergence shape at a fraction of a full trace's size",
    }
    summary = {
        "task": "study", "members": len(members), "status": status,
        "converged": all(r["converged"] for r in rows), "choice": dict(choice),
        "solver": {"name": "smo", "status": status,
                   "iterations": int(sum(r["iterations"] for r in rows)),
                   "seconds": float(sum(r["seconds"] for r in rows))},
        "problem": {"kind": "study", "n": int(ds.X.shape[0]), "n_features": int(ds.X.shape[1]),
                    "kernel": {"name": grid.kernel,
                               "params": {} if one_se["gamma"] is None else
                               {"gamma": one_se["gamma"]}},
                    "info": {"C": None if one_se["C"] is None else float(one_se["C"])}},
        "certificate": {"kkt_tol": float(opts["kkt_tol"]),
                        "max_violation": float(max(r["max_violation"] for r in rows)),
                        "duality_gap": float(max(r["duality_gap"] for r in rows))},
    }
    data = {"fingerprint": _fingerprint(ds), "feature_names": list(ds.feature_names),
            "label_name": ds.label_name, "source": ds.source, "warnings": list(ds.warnings),
            "n_rows": int(ds.X.shape[0])}
    attachments = {
        "folds": {"fold": [int(v) for v in fold_of.tolist()], "k": int(k), "seed": int(seed)},
        "results": {"fits": list(rows), "cells": list(cells), "choice": dict(choice),
                    "warm_start_check": None if warm_check is None else dict(warm_check)},
        "results_table": buf.getvalue(),
    }
    if stab is not None:
        attachments["stability"] = dict(stab)
    return ParentRecord(task="study", members=tuple(members), info=info, data=data,
                        summary=summary, attachments=attachments, command=command)
