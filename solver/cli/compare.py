"""``kktrace compare``: the solver-agreement verdict for two runs."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import (
    EXIT_OK,
    add_column_options,
    add_command,
    column_kwargs,
    emit_json,
    num,
    print_rows,
    to_dict,
)

_COMPARE_EXAMPLES = """examples:
  kktrace compare SMO_RUN_ID QP_RUN_ID
  kktrace compare RUN_A RUN_B --holdout new_batches.csv --json

Two multi-class models are compared pair by pair; the worst pair decides the verdict and
every pair is listed."""


def cmd_compare(args: argparse.Namespace) -> int:
    import solver

    comp = solver.compare(args.run_a, args.run_b, store=args.store, holdout=args.holdout,
                          allow_mismatch=args.allow_mismatch, **column_kwargs(args))
    d = to_dict(comp)
    if args.json:
        emit_json(d, sys.stdout)
        return EXIT_OK
    if d.get("pairs") is not None:
        return _print_parents(d)
    print(f"run A {args.run_a}\nrun B {args.run_b}")
    print(f"verdict: {d.get('verdict')}")
    if d.get("verdict_text"):
        print(f"  {d['verdict_text']}")
    measures = d.get("measures") or {}
    if measures:
        rows = [["measure", "value", "strict", "loose", "result"]]
        for name, m in measures.items():
            rule = m.get("rule", "")
            result = ("pass" if m.get("passed") else
                      "within loose" if m.get("passed_loose") else "FAIL")
            rows.append([name, num(m.get("value")), f"{rule} {num(m.get('tolerance'))}",
                         f"{rule} {num(m.get('loose_tolerance'))}", result])
        print_rows(rows)
    timing = ("solve_seconds", "compile_seconds", "setup_seconds", "total_seconds")
    for run in d.get("runs") or []:
        print("  " + ", ".join(f"{k} {num(v) if isinstance(v, float) else v}"
                               for k, v in run.items() if k not in timing))
        print(f"    time {solver.timing_text(run)}")
    for note in list(d.get("mismatches") or []) + list(d.get("notes") or []):
        print(f"note: {note}")
    return EXIT_OK



def _print_parents(d: Any) -> int:
    """Two multi-class models: one verdict (the worst pair's), every pair listed."""
    print(f"model A {d['run_a']}\nmodel B {d['run_b']}")
    worst = " vs ".join(d["worst_pair"] or [])
    print(f"verdict: {d['verdict']}  ({d['rule']}; decided by pair {worst})")
    rows = [["pair", "verdict", "objective diff", "alpha rms diff", "decision rms diff",
             "failed measures"]]
    for p in d["pairs"]:
        rows.append([" vs ".join(p["pair"]), p["verdict"], num(p.get("objective_abs_diff")),
                     num(p.get("alpha_rms_diff")), num(p.get("decision_rms_diff")),
                     ", ".join(p.get("failed") or []) or "-"])
    print_rows(rows)
    for p in d["pairs"]:
        for note in list(p.get("mismatches") or []) + list(p.get("notes") or []):
            print(f"note: pair {' vs '.join(p['pair'])}: {note}")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "compare", "solver-agreement verdict for two runs of the same problem",
            _COMPARE_EXAMPLES)
    p.add_argument("run_a", metavar="RUN_A")
    p.add_argument("run_b", metavar="RUN_B")
    p.add_argument("--holdout", metavar="FILE", default=None,
                   help="also compare decision values on this data")
    p.add_argument("--allow-mismatch", action="store_true",
                   help="compare runs of different problems (the verdict says so)")
    add_column_options(p, "the --holdout file")
    p.set_defaults(func=cmd_compare)

