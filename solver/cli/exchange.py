"""``kktrace export`` and ``kktrace challenge``: model exchange through ONNX."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import (
    EXIT_ERROR,
    EXIT_OK,
    add_column_options,
    add_command,
    column_kwargs,
    emit_json,
    float_arg,
    num,
)

_EXPORT_EXAMPLES = """examples:
  kktrace export RUN_ID --to model.onnx
  kktrace export RUN_ID --to model.onnx --holdout new_batches.csv --json"""

_CHALLENGE_EXAMPLES = """examples:
  kktrace challenge vendor_model.onnx --data batches.csv --label lab_decision --C 10
  kktrace challenge model.json --data batches.csv --label lab_decision --C 1 --no-standardise"""


def cmd_export(args: argparse.Namespace) -> int:
    import solver

    solver.check_output_path(args.to, store=args.store, what="--to")
    out = solver.export_onnx(args.run, args.to, store=args.store, holdout=args.holdout,
                             **column_kwargs(args))
    if args.json:
        emit_json(out.to_dict(), sys.stdout)
        return EXIT_OK if out.check.passed else EXIT_ERROR
    print(f"record {out.run_id} exported to {out.path} (float32: the ONNX SVM operators hold "
          "every number as float32)")
    print(f"  layout:        {out.check.layout}")
    print(f"  probabilities: {'exported' if out.check.probabilities else 'not exported'}")
    for ev, sets in out.check.evaluators.items():
        for name, f in sets.items():
            line = (f"  {ev:15s} {name:8s} {out.check.rows[name]} rows: largest |difference| "
                    f"{num(f['max_abs_diff'])} (relative {num(f['max_rel_diff'])})")
            if "label_changes" in f:
                line += (f"; predicted class changed on {f['label_changes']} rows "
                         f"({f['label_changes_away_from_boundary']} with |f| >= "
                         f"{out.check.near_zero:g})")
            if "probability_max_abs_diff" in f:
                line += (f"; probabilities differ by at most "
                         f"{num(f['probability_max_abs_diff'])}"
                         + ("" if f["probability_counted"] else " (reported, not counted)"))
            print(line)
    for note in out.check.notes:
        print(f"note: {note}")
    verdict = "passed" if out.check.passed else "FAILED"
    print(f"check {verdict} (limit: relative difference <= "
          f"{out.check.relative_drift_limit:g}, no class change away from the boundary"
          + (f", probabilities within {out.check.probability_drift_limit:g}"
             if out.check.probabilities else "") + "); "
          f"stored with derived run {out.checked_run_id}")
    return EXIT_OK if out.check.passed else EXIT_ERROR


def cmd_challenge(args: argparse.Namespace) -> int:
    import solver

    out = solver.challenge(args.model, args.data, label=args.label, C=args.C,
                           kkt_tol=args.kkt_tol, standardise=not args.no_standardise,
                           store=args.store, challenger=not args.no_challenger,
                           **column_kwargs(args))
    if args.json:
        emit_json(out.to_dict(), sys.stdout)
        return EXIT_OK
    print(f"challenge of {out.source} (sha256 {out.source_sha256[:16]}…, {out.source_format})")
    print(f"  input scaling: {out.input_scaling}")
    for p in out.pairs:
        c = p.certificate
        state = "meets" if p.optimal else "FAILS"
        print(f"pair {p.positive} (positive) vs {p.negative}: external solution {state} the "
              f"optimality test — violation {num(c['max_violation'])} (kkt_tol "
              f"{num(p.kkt_tol)}, of which float32 allowance "
              f"{num(p.float32_allowance)}), duality gap {num(c['duality_gap'])}")
        print(f"  {p.matched} support vectors matched to training rows; external run "
              f"{p.external_run}")
        for method, verdict in p.verdicts.items():
            print(f"  against a fresh {method} solve (run {p.fresh_runs[method]}): {verdict}")
        for f in p.findings:
            print(f"  finding: {f}")
    print(f"overall: external solution {'optimal' if out.optimal else 'NOT optimal'}; "
          f"worst verdict {out.verdict}")
    for note in out.notes:
        print(f"note: {note}")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add ``export`` and ``challenge`` to the sub-command table."""
    p = add_command(sub, "export", "write a run's (or multi-class parent's) model as an ONNX "
                    "file and check it",
                    _EXPORT_EXAMPLES)
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--to", metavar="FILE.onnx", required=True, help="the ONNX file to write")
    p.add_argument("--holdout", metavar="FILE", default=None,
                   help="also check the exported file on these rows")
    add_column_options(p, "the --holdout file")
    p.set_defaults(func=cmd_export)

    p = add_command(sub, "challenge", "is a model trained elsewhere the optimum of its problem?",
                    _CHALLENGE_EXAMPLES)
    p.add_argument("model", metavar="MODEL",
                   help="ONNX file (one SVMClassifier, optional Scaler) or open JSON table")
    p.add_argument("--data", metavar="DATAFILE", required=True, help="the training data")
    p.add_argument("--label", metavar="COLUMN", required=True, help="label column")
    p.add_argument("--C", type=float_arg, default=None,
                   help="the C the model was trained with (required: it is not in the file)")
    p.add_argument("--kkt-tol", type=float_arg, default=1e-3,
                   help="tolerance on the maximal KKT violation (default 1e-3; float32 models "
                   "get a stated allowance on top)")
    p.add_argument("--no-standardise", action="store_true",
                   help="when the model has no input scaling, use the features as given")
    p.add_argument("--no-challenger", action="store_true",
                   help="skip the QP challenger (SMO only)")
    add_column_options(p, "the --data file")
    p.set_defaults(func=cmd_challenge)
