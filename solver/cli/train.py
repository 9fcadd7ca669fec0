"""``kktrace train`` and ``kktrace demo``: fit on a data file and store the run(s)."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Mapping
from typing import Any

from ._shared import (
    EXIT_NOT_CONVERGED,
    EXIT_OK,
    add_column_options,
    add_command,
    column_kwargs,
    emit_json,
    float_arg,
    num,
    positive_int,
    progress,
)

_TRAIN_EXAMPLES = """examples:
  kktrace train batches.csv --label lab_decision --kernel rbf --C 10 --solver both \\
      --holdout batches_holdout.csv
  kktrace train scores.parquet --label outcome --kernel poly --degree 2 --offset 1 --json
  kktrace train X.npz --label y --kernel linear --kkt-tol 1e-5 --store audit-traces
  kktrace train grades.csv --label grade --class-weight balanced --solver both
  kktrace train batches.csv --label outcome --weight-column batch_weight \\
      --class-weight release=1,rework=2,reject=4
  kktrace train batches.csv --task regression --target coating_thickness_um --epsilon 0.5 \
      --C 10 --solver both
  kktrace train released.csv --task one-class --nu 0.05 --holdout new_batches.csv \
      --outlier-column known_unusual"""

_DEMO_EXAMPLES = """examples:
  kktrace demo
  kktrace demo --store /tmp/demo-traces --json"""


def _run_block(s: Mapping[str, Any], role: str) -> list[str]:
    import solver

    k = s.get("kernel") or {}
    params = dict(k.get("params") or {})
    source = params.pop("gamma_source", None)
    kp = ", ".join(f"{a}={num(b) if isinstance(b, float) else b}"
                   for a, b in params.items() if b is not None)
    if source and source != "given":
        kp += f"; gamma from the {source.replace('_', ' ')}"
    state = "converged" if s.get("converged") else f"NOT CONVERGED ({s['status']})"
    lines = [
        f"{role} run {s['run_id']}  [{s['solver']}]  {state}",
        f"  kernel        {k.get('name', '?')}" + (f" ({kp})" if kp else "")
        + f", C = {num(s.get('C'))}",
        f"  iterations    {s['iterations']}",
        f"  time          {solver.timing_text(s)}",
        f"  violation     {num(s['max_violation'])}  (kkt_tol {num(s['kkt_tol'])})",
        f"  objectives    dual (minimised) {num(s['dual_objective'])}, "
        f"primal {num(s['primal_objective'])}",
        f"  duality gap   {num(s['duality_gap'])} = primal + dual  "
        f"(relative {num(s.get('relative_gap'))})",
        f"  support       {s['n_support']} of {s['n_rows']} points "
        f"({s['n_free']} {solver.term('n_free').label}, {s['n_bounded']} "
        f"{solver.term('n_bounded').label}), bias {num(s['bias'])}",
    ]
    if isinstance(s.get("task"), str):  # the task's own lines (ε-regression, one-class)
        for head, text in solver.get_task(s["task"]).run_lines(s):
            lines.append(f"  {head:13s} {text}")
    labels = s.get("labels")
    if labels:
        lines.append(f"  labels        f(x) > 0 predicts {str(labels['positive'])!r} (positive), "
                     f"f(x) <= 0 predicts {str(labels['negative'])!r} (negative)")
    if "holdout_accuracy" in s:
        lines.append(
            f"  held-out      accuracy {num(s['holdout_accuracy'], '.3f')}, balanced accuracy "
            f"{num(s['holdout_balanced_accuracy'], '.3f')}"
        )
    cal = s.get("calibration")
    if cal:
        if cal.get("status") == "fitted":
            lines.append(f"  probabilities P(positive) = 1 / (1 + exp(A f + B)), A = "
                         f"{num(cal.get('A'))}, B = {num(cal.get('B'))} "
                         f"(on {cal.get('n_folds')}-fold cross-validated values, seed "
                         f"{cal.get('seed')})")
        else:
            lines.append(f"  probabilities NOT AVAILABLE: {cal.get('message')}")
    if not s.get("converged"):
        lines.append(f"  note          {s.get('message', '')}")
    lines.append(f"  stored in     {s['run_dir']}")
    return lines


def class_weight_arg(text: str) -> str | dict[str, float]:
    """``balanced`` or ``LABEL=W,LABEL=W`` (weights parsed later, errors name the label)."""
    text = text.strip()
    if text == "balanced":
        return text
    out: dict[str, Any] = {}
    for part in text.split(","):
        label, sep, w = part.partition("=")
        if not sep or not label.strip():
            raise argparse.ArgumentTypeError(
                f"{part!r} is not LABEL=W (use e.g. 'pass=1,rework=2.5' or 'balanced')")
        out[label.strip()] = w.strip()
    return out


def _pair_line(s: Mapping[str, Any]) -> str:
    state = "converged" if s.get("converged") else f"NOT CONVERGED ({s['status']})"
    key = " vs ".join(s.get("key") or [])
    verdict = f", agreement {s['verdict']}" if s.get("verdict") else ""
    return (f"  {key:24s} {s['solver']:3s} {s['run_id']}  {state}, {s['iterations']} it, "
            f"violation {num(s['max_violation'])}, gap {num(s['duality_gap'])}"
            f"{verdict}")


def _print_parent(outcome: Any) -> None:
    s = outcome.summaries[0]
    info = outcome.parent.info
    state = "converged" if s.get("converged") else f"NOT CONVERGED (worst status {s['status']})"
    ex = info.get("execution") or {}
    out = [
        f"multi-class parent {s['run_id']}  [one-vs-one, {s['pairs']} pairs]  {state}",
        f"  classes       {', '.join(info['classes'])}",
        f"  pairs ran     {ex.get('mode', 'sequential')} ({ex.get('reason', 'one pair')})",
        f"  slowest pair  {' vs '.join(s['slowest_pair']['key'] or [])}: "
        f"{s['slowest_pair']['iterations']} iterations",
        f"  worst verdict {s.get('worst_verdict') or 'n/a (no challenger)'}",
        f"  violation     largest {num(s['max_violation'])} "
        f"(kkt_tol {num(s['kkt_tol'])})",
    ]
    if "holdout_accuracy" in s:
        out.append(f"  held-out      accuracy {num(s['holdout_accuracy'], '.3f')}, balanced "
                   f"accuracy {num(s['holdout_balanced_accuracy'], '.3f')}")
    out.append("  pair runs:")
    out += [_pair_line(m) for m in outcome.members]
    out.append(f"  stored in     {s['run_dir']}")
    for w in outcome.warnings:
        out.append(f"warning: {w}")
    print("\n".join(out))


def cmd_train(args: argparse.Namespace) -> int:
    import solver

    if args.task == "classification" and args.label is None:
        args.train_parser.error("--label COLUMN is required for classification "
                                "(or choose --task regression / one-class)")

    outcome = solver.train(
        args.data, label=args.label, kernel=args.kernel, gamma=args.gamma,
        degree=args.degree, offset=args.offset, C=args.C, kkt_tol=args.kkt_tol,
        iteration_limit=args.iteration_limit, solver=args.solver, standardise=not
        args.no_standardise,
        holdout=args.holdout, store=solver.open_store(args.store, signing_key=args.sign),
        trace=args.trace, quiet=True, progress=progress(args), class_weight=args.class_weight,
        weight_column=args.weight_column, max_classes=args.max_classes,
        parallel=args.parallel, task=args.task,
        target=args.target, epsilon=args.epsilon, nu=args.nu,
        outlier_column=args.outlier_column, probabilities=args.probabilities,
        calibration_folds=args.calibration_folds, calibration_seed=args.calibration_seed,
        positive_label=args.positive, **column_kwargs(args),
    )
    if args.json:
        emit_json(outcome.summary(), sys.stdout)
    elif outcome.parent is not None:
        _print_parent(outcome)
    else:
        _print_outcome(outcome)
    return EXIT_OK if outcome.converged else EXIT_NOT_CONVERGED


def _print_outcome(outcome: Any) -> None:
    out = []
    for k, s in enumerate(outcome.summaries):
        out.extend(_run_block(s, "primary" if k == 0 else "challenger"))
    if outcome.verdict is not None:
        out.append(f"solver agreement: {outcome.verdict}  (details: kktrace compare "
                   f"{outcome.run_ids[0]} {outcome.run_ids[1]})")
    for w in outcome.warnings:
        out.append(f"warning: {w}")
    print("\n".join(out))


def cmd_demo(args: argparse.Namespace) -> int:
    import solver

    if not args.json:
        print("kktrace demo: the tablet-coating QC data below are INVENTED for this demo; "
              "they describe no real product, process or laboratory.")
    res = solver.run_demo(store=args.store, quiet=True, progress=progress(args))
    tr = res.train
    if args.json:
        emit_json({
            "invented_data": True,
            "store": str(res.store),
            "data_files": [str(p) for p in res.data_files],
            "runs": tr.summary(),
            "reports": {k: str(v) for k, v in res.reports.items()},
            "explanations": {k: str(v) for k, v in res.explanation_files.items()},
            "seconds": res.seconds,
            "parts": {name: {"title": part.title,
                             "data_files": [str(f) for f in part.data_files],
                             "runs": part.train.summary(),
                             "reports": {k: str(v) for k, v in part.reports.items()}}
                      for name, part in res.parts.items()},
            "caution": solver.caution_line(prefix=False),
        }, sys.stdout)
    else:
        print(f"data (invented): {res.data_files[0]}  (held out: {res.data_files[1]})")
        _print_outcome(tr)
        print("per-point explanations:")
        for k, v in res.explanation_files.items():
            print(f"  {k:7s} {v}")
        print("audit report:")
        for k, v in res.reports.items():
            print(f"  {k:7s} {v}")
        for part in res.parts.values():
            print(f"\n{part.title}")
            print(f"data (invented): {part.data_files[0]}  (held out: {part.data_files[1]})")
            if part.train.parent is not None:
                _print_parent(part.train)
            else:
                _print_outcome(part.train)
            print("audit report:")
            for k, v in part.reports.items():
                print(f"  {k:7s} {v}")
        print(f"demo finished in {res.seconds:.1f} s; store: {res.store}")
        print(solver.caution_line())
    ok = tr.converged and all(part.train.converged for part in res.parts.values())
    return EXIT_OK if ok else EXIT_NOT_CONVERGED



def register(sub: Any) -> None:
    """Add ``train`` and ``demo`` to the sub-command table."""
    p = add_command(sub, "train", "train on a data file and store the run(s)", _TRAIN_EXAMPLES)
    p.add_argument("data", metavar="DATAFILE", help="CSV (header row), Parquet, .npy or .npz")
    p.add_argument("--task", choices=("classification", "regression", "one-class"),
                   default="classification",
                   help="classification (default; --label), regression (--target, --epsilon) "
                   "or one-class (--nu)")
    p.add_argument("--label", metavar="COLUMN", default=None,
                   help="label column (classification): two values, or three or more for "
                   "one-vs-one (one run per pair of classes, tied together by a parent record)")
    p.add_argument("--target", metavar="COLUMN", default=None,
                   help="numeric target column (regression)")
    p.add_argument("--epsilon", type=float_arg, default=0.1,
                   help="half-width of the ε-tube in target units, >= 0 (regression; default 0.1)")
    p.add_argument("--nu", type=float_arg, default=0.5,
                   help="ν in (0, 1]: bound on the outlier share (one-class; default 0.5)")
    p.add_argument("--outlier-column", metavar="COLUMN", default=None,
                   help="column of known outliers (1/0, yes/no): set aside in training, used "
                   "for the held-out confusion (one-class)")
    p.add_argument("--kernel", choices=("linear", "poly", "rbf", "sigmoid"), default="rbf",
                   help="kernel (default rbf)")
    p.add_argument("--gamma", type=float_arg, default=None,
                   help="kernel gamma (default: 1 / median squared distance, recorded)")
    p.add_argument("--degree", type=positive_int, default=3,
                   help="poly kernel degree (default 3)")
    p.add_argument("--offset", type=float_arg, default=0.0,
                   help="poly / sigmoid kernel constant (default 0)")
    p.add_argument("--C", type=float_arg, default=1.0, help="penalty C > 0 (default 1)")
    p.add_argument("--kkt-tol", type=float_arg, default=1e-3,
                   help="tolerance on the maximal KKT violation (default 1e-3)")
    p.add_argument("--iteration-limit", type=positive_int, default=None,
                   help="iteration limit (default: the solver's own; with --solver both it "
                   "limits SMO only)")
    p.add_argument("--solver", choices=("smo", "qp", "both"), default="smo",
                   help="smo, qp, or both: SMO plus the QP challenger and their comparison")
    p.add_argument("--holdout", metavar="FILE", default=None,
                   help="held-out labelled data, scored and recorded with the run")
    p.add_argument("--trace", choices=("full", "sampled", "off"), default="full",
                   help="trace level (default full)")
    p.add_argument("--class-weight", metavar="LABEL=W,...", type=class_weight_arg,
                   default=None,
                   help="scale C per class: LABEL=W pairs, or 'balanced' for "
                   "w_c = n / (k * n_c) (n rows, k classes, n_c rows of class c); "
                   "bounds become u_i = C * w_class * w_row")
    p.add_argument("--positive", metavar="LABEL", default=None,
                   help="the label that f(x) > 0 predicts (two classes; default the later "
                   "of the two sorted labels)")
    p.add_argument("--weight-column", metavar="COLUMN", default=None,
                   help="column of per-row weights > 0 scaling C per row (not a feature)")
    p.add_argument("--max-classes", type=positive_int, default=None,
                   help="refuse a label column with more classes than this (default 30)")
    p.add_argument("--parallel", metavar="WHERE", default="auto",
                   help="where one-vs-one pairs run: auto (a Dask LocalCluster when the "
                   "work is large enough, else in this process), sequential, local, or a "
                   "Dask scheduler address tcp://HOST:PORT (default auto)")
    p.add_argument("--no-standardise", action="store_true",
                   help="use the features as given (default: standardise to mean 0, sd 1)")
    p.add_argument("--probabilities", action="store_true",
                   help="also fit Platt scaling on cross-validated decision values, so that "
                   "'apply --probabilities' can give class probabilities")
    p.add_argument("--calibration-folds", type=positive_int, default=5,
                   help="stratified folds of that cross-validation (default 5)")
    p.add_argument("--calibration-seed", type=int, default=0,
                   help="seed of the fold assignment (default 0; recorded with the run)")
    p.add_argument("--sign", metavar="PRIVATE_KEY", default=None,
                   help="sign each run's manifest digest with this Ed25519 key "
                   "(NAME.private.pem from 'kktrace keys new'; default $KKTRACE_SIGNING_KEY)")
    add_column_options(p, "DATAFILE and --holdout")
    p.set_defaults(func=cmd_train, train_parser=p)

    p = add_command(sub, "demo", "run the full audit on invented tablet-coating QC data",
                    _DEMO_EXAMPLES)
    p.set_defaults(func=cmd_demo)
