"""``kktrace verify``: integrity and reproduction of a stored run."""

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
    num,
    to_dict,
)

_VERIFY_EXAMPLES = """examples:
  kktrace verify RUN_ID
  kktrace verify RUN_ID --trusted keys/qa-lead.public.pem
  kktrace verify RUN_ID --rerun batches.csv

verify checks the run's files against their digests (no links; sizes before hashing),
then the run against itself: the certificate recomputed from the stored alpha, problem
arrays and kernel, the model rebuilt from solution.npz, the trace replayed to its last
row, the manifest fields against the format.  --trusted requires a signature by that key.
The result is evidence about the stored optimisation, not a validation sign-off."""


def cmd_verify(args: argparse.Namespace) -> int:
    import solver

    res = solver.verify(args.run, store=args.store, rerun=args.rerun, keep_rerun=args.keep,
                        trusted=args.trusted or None, **column_kwargs(args))
    integ = to_dict(res.integrity)
    repro = None if res.reproduction is None else to_dict(res.reproduction)
    if args.json:
        emit_json({"run_id": args.run, "ok": res.ok, "integrity": integ,
                   "reproduction": repro, "rerun_run_id": res.rerun_run_id,
                   "audit_note": res.audit_note, "calibration": res.calibration}, sys.stdout)
    else:
        if res.integrity.ok:
            chain = integ.get("chain") or [args.run]
            print(f"run {args.run}: files intact ({integ.get('files_checked', '?')} digests "
                  "match) and consistent with themselves (certificate recomputed, model "
                  f"rebuilt, trace replayed); chain of {len(chain)} run(s) checked"
                  + (" (a parent record and every member run)" if len(chain) > 1
                     and not integ.get("parent_id") else ""))
            if res.integrity.trusted:
                print(f"  signed by {res.integrity.signer}: a trusted key")
        else:
            print(f"run {args.run}: INTEGRITY CHECK FAILED")
            for p in integ.get("problems") or ():
                print(f"  - {p}")
        for note in integ.get("notes") or ():
            print(f"  note: {note}")
        if res.audit_note:
            print(f"  note: {res.audit_note}")
        if repro is not None and "pairs" in repro:
            print(f"re-run of every pair: alpha {repro['agreement']}")
            for r in repro["pairs"]:
                print(f"  pair {' vs '.join(r['pair'])} (run {r['run_id']}): alpha "
                      f"{r['agreement']} (max |difference| "
                      f"{num(r['max_abs_difference'])}); iterations {r['iterations']}")
        elif repro is not None:
            print(f"re-run: alpha {repro.get('agreement')} (max |difference| "
                  f"{num(repro.get('max_abs_difference'))}, tolerance "
                  f"{num(repro.get('tolerance'))}); iterations "
                  f"{repro.get('iterations')}, status {repro.get('status')}")
            for note in repro.get("notes") or ():
                print(f"  note: {note}")
        cal = res.calibration
        if cal is not None and "pairs" in cal:
            print(f"re-run: probability calibration of every pair {cal['agreement']} "
                  f"({cal['n_folds']} folds, seed {cal['seed']})")
            for r in cal["pairs"]:
                print(f"  pair {' vs '.join(r['pair'])}: {r['agreement']} (A "
                      f"{num(r['A'][1], '.10g')}, B {num(r['B'][1], '.10g')})")
        elif cal is not None:
            print(f"re-run: probability calibration {cal['agreement']} ({cal['n_folds']} folds, "
                  f"seed {cal['seed']}; A {num(cal['A'][0], '.10g')} vs "
                  f"{num(cal['A'][1], '.10g')}, B {num(cal['B'][0], '.10g')} vs "
                  f"{num(cal['B'][1], '.10g')})")
        if res.rerun_run_id:
            print(f"re-run stored as run {res.rerun_run_id}")
    if not res.ok:
        print(f"kktrace: error: run {args.run} failed verification", file=sys.stderr)
        return EXIT_ERROR
    return EXIT_OK



def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "verify", "check a run's files and, with --rerun, reproduce it",
                    _VERIFY_EXAMPLES)
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--rerun", metavar="DATAFILE", default=None,
                   help="re-run from this training data (must match the fingerprint)")
    p.add_argument("--keep", action="store_true",
                   help="store the re-run as a new run derived from RUN_ID")
    p.add_argument("--trusted", metavar="PUBKEY", action="append", default=None,
                   help="require a signature by this public key (NAME.public.pem from "
                   "'kktrace keys new'); may be given more than once")
    add_column_options(p, "the --rerun file")
    p.set_defaults(func=cmd_verify)

