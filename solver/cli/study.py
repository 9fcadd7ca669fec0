"""``kktrace study``: a grid of C × γ (× degree) with stratified seeded k-fold
cross-validation on Dask; every fit a stored run, the study a parent record."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import (
    EXIT_NOT_CONVERGED,
    EXIT_OK,
    add_column_options,
    add_command,
    bar,
    column_kwargs,
    emit_json,
    float_arg,
    num,
    positive_int,
    print_rows,
)

_STUDY_EXAMPLES = """examples:
  kktrace study batches.csv --label lab_decision --C 0.1,1,10 --gamma 0.01,0.1 --folds 5
  kktrace study batches.csv --label lab_decision --C 0.1,1,10 --gamma 0.1 \\
      --scheduler tcp://10.0.0.5:8786 --table study.parquet --json
  kktrace study batches.csv --label lab_decision --kernel poly --degree 2,3 --gamma 0.1 \\
      --C 1,10 --warm-start
  kktrace study batches.csv --task regression --target coating_thickness_um \\
      --C 1,10 --gamma 0.05,0.1 --epsilon 0.1,0.5
  kktrace study released.csv --task one-class --nu 0.05,0.2 --gamma 0.05,0.1"""


class _Ticker:
    """Study progress on a terminal: cells done / total, failures, elapsed, time left."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled
        self.width = 0

    def __call__(self, done: int, total: int, failures: int, elapsed: float,
                 left: float | None) -> None:
        if not self.enabled:
            return
        eta = "?" if left is None else f"{left:.0f} s"
        line = (f"study fits {bar(done / max(1, total))} {done}/{total}  not converged "
                f"{failures}  elapsed {elapsed:.0f} s  left ~{eta}")
        sys.stderr.write("\r" + line + " " * max(0, self.width - len(line)))
        sys.stderr.flush()
        self.width = len(line)

    def close(self) -> None:
        if self.enabled and self.width:
            sys.stderr.write("\r" + " " * self.width + "\r")
            sys.stderr.flush()


def cmd_study(args: argparse.Namespace) -> int:
    import solver

    ticker = _Ticker(enabled=not args.quiet and not args.json and sys.stderr.isatty())
    try:
        out = solver.study(
            args.data, label=args.label, task=args.task, target=args.target,
            outlier_column=args.outlier_column, kernel=args.kernel, C=args.C,
            gamma=args.gamma, degree=args.degree, epsilon=args.epsilon, nu=args.nu,
            offset=args.offset, folds=args.folds, seed=args.seed,
            kkt_tol=args.kkt_tol, iteration_limit=args.iteration_limit, trace=args.trace,
            standardise=not args.no_standardise, warm_start=args.warm_start,
            stability=args.stability,
            scheduler=args.scheduler, workers=args.workers,
            connect_timeout=args.connect_timeout, store=args.store, table=args.table,
            progress=ticker, **column_kwargs(args))
    finally:
        ticker.close()
    s = out.summary()
    paths = {}
    if args.report is not None:
        paths = solver.study_report(out.study_id, store=args.store, out_dir=args.report)
        s["report"] = {k: str(v) for k, v in paths.items()}
    code = EXIT_OK if not out.not_converged else EXIT_NOT_CONVERGED
    if args.json:
        emit_json(s, sys.stdout)
        return code
    ex = s["execution"]
    print(f"study {out.study_id}: {len(out.rows)} fits over {len(out.cells)} cells "
          f"({out.fitted} fitted now, {out.reused} found stored and verified)")
    print(f"  ran on      {ex['mode']} ({ex['workers']} worker(s)): {ex['reason']}")
    ch = out.choice
    better = "higher" if ch.get("higher_is_better", True) else "lower"
    rows = [["cell", f"mean {ch['score']} ({better} is better)", "std error",
             "mean iterations", "not converged", "bounded share"]]
    for c in out.cells:
        rows.append([c["cell"], num(c["mean_score"], ".4f"), num(c["se_score"], ".4f"),
                     num(c["mean_iterations"], ".0f"), f"{c['not_converged_share']:.0%}",
                     f"{c['bounded_share']:.0%}"])
    print_rows(rows)
    print(f"best cell by mean {ch['score']}: {ch['best']} ({num(ch['best_mean'], '.4f')})")
    print(f"chosen cell: {ch['one_se']} ({num(ch['one_se_mean'], '.4f')}) by the {ch['rule']}")
    wc = out.warm_check
    if wc is not None:
        same = "all the same" if wc["all_same_certificate"] else "NOT all the same"
        print(f"warm starts: {wc['warm_iterations']} iterations against "
              f"{wc['cold_iterations']} cold on the same {len(wc['cells'])} cells (fold 0), "
              f"ratio {num(wc['ratio_cold_to_warm'])}; certificates {same} "
              f"(dual objectives within {num(wc['objective_tolerance'])} relative)")
    st = out.stability
    if st is not None:
        print(f"stability of {st['cell']}: {st['permutation_verdict']}")
        for k, v in st["by_kind"].items():
            print(f"  {k:<12} {v['refits']} refits, min support-vector Jaccard "
                  f"{v['lowest_sv_jaccard']:.3f}, max drift {num(v['max_drift_train'])} "
                  f"(train) {num(v['max_drift_held_out'])} (held out), flips "
                  f"{v['max_flips_held_out']}, bias spread {num(v['bias_spread'])}")
    for r in out.not_converged:
        print(f"NOT CONVERGED: {r['cell']} fold {r['fold']} run {r['run_id']} ({r['status']})")
    for w in out.warnings:
        print(f"note: {w}")
    if out.table_path is not None:
        print(f"results table: {out.table_path}")
    for fmt, path in paths.items():
        print(f"report {fmt}: {path}")
    print(f"caution: {s['caution']}")
    return code


def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "study", "cross-validate a grid of C x gamma on Dask; every fit "
                    "a stored run, the study a parent record", _STUDY_EXAMPLES)
    p.add_argument("data", metavar="DATAFILE")
    p.add_argument("--label", metavar="COLUMN", default=None,
                   help="label column (two or more classes; --task classification)")
    p.add_argument("--task", choices=("classification", "regression", "one-class"),
                   default="classification",
                   help="classification (default; --label, scored by accuracy), regression "
                   "(--target, an --epsilon axis, scored by RMSE) or one-class (features "
                   "alone, a --nu axis instead of --C, scored by |held-out share flagged - "
                   "nu|)")
    p.add_argument("--target", metavar="COLUMN", default=None,
                   help="numeric target column (--task regression)")
    p.add_argument("--outlier-column", metavar="COLUMN", default=None,
                   help="column of known outliers, never used for fitting (--task "
                   "one-class; adds detection and false-alarm rates)")
    p.add_argument("--kernel", default="rbf", choices=["linear", "poly", "rbf", "sigmoid"])
    p.add_argument("--C", metavar="VALUES", default=None,
                   help="comma-separated penalties, each > 0 (default 0.1,1,10; one-class "
                   "has none)")
    p.add_argument("--epsilon", metavar="VALUES", default=None,
                   help="comma-separated tube half-widths, each > 0, target units "
                   "(--task regression; default 0.1)")
    p.add_argument("--nu", metavar="VALUES", default=None,
                   help="comma-separated nu values in (0, 1] (--task one-class; default 0.5)")
    p.add_argument("--gamma", metavar="VALUES", default=None,
                   help="comma-separated kernel gammas, each > 0 (rbf, poly, sigmoid)")
    p.add_argument("--degree", metavar="VALUES", default=None,
                   help="comma-separated degrees for the poly kernel (default 3)")
    p.add_argument("--offset", type=float_arg, default=0.0, help="poly/sigmoid offset")
    p.add_argument("--folds", type=positive_int, default=5, help="k of the stratified k-fold")
    p.add_argument("--seed", type=int, default=0, help="seed of the fold assignment")
    p.add_argument("--kkt-tol", type=float_arg, default=1e-3, help="stopping tolerance")
    p.add_argument("--iteration-limit", type=positive_int, default=None)
    p.add_argument("--trace", default="sampled", choices=["full", "sampled", "off"],
                   help="trace level of every fit (default sampled: bounded size per fit)")
    p.add_argument("--no-standardise", action="store_true", help="do not standardise")
    p.add_argument("--warm-start", action="store_true",
                   help="start each C from the previous C's solution (same fold and gamma)")
    p.add_argument("--stability", action="store_true",
                   help="also refit the chosen cell under row-order permutations, bootstrap "
                   "resamples and feature noise")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="Dask scheduler address (default $KKTRACE_SCHEDULER, else a local "
                   "cluster); 'sequential' runs in this process")
    p.add_argument("--workers", type=positive_int, default=None,
                   help="worker processes of the local cluster (default one per core)")
    p.add_argument("--connect-timeout", type=float_arg, default=10.0,
                   help="seconds to wait for --scheduler before giving up (default 10)")
    p.add_argument("--table", metavar="FILE", default=None,
                   help="also write the results table to this Parquet file")
    p.add_argument("--report", metavar="DIR", default=None,
                   help="also write the study report (HTML, PDF, JSON) to this folder")
    add_column_options(p, "DATAFILE")
    p.set_defaults(func=cmd_study)
