"""``kktrace diagnose`` (findings about a stored run, optional what-if re-solves) and
``kktrace resume`` (continue a run stopped by a limit)."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Mapping
from typing import Any

from ._shared import (
    EXIT_NOT_CONVERGED,
    EXIT_OK,
    add_command,
    emit_json,
    float_arg,
    num,
    positive_int,
    print_rows,
)

CAUTION = ("kktrace gives evidence about the optimisation, not a validation sign-off; decisions "
           "rest with the accountable model owner and validator.")

_DIAGNOSE_EXAMPLES = """examples:
  kktrace diagnose RUN_ID
  kktrace diagnose RUN_ID --json
  kktrace diagnose RUN_ID --try standardise
  kktrace diagnose RUN_ID --try selection=first_order --try shrinking=off --save

changes for --try: standardise, gamma=V, C=V, selection=first_order|second_order,
working_set=pair|block, shrinking=on|off, kkt_tol=V.  Each re-solves the run's data with
that one change and prints both runs side by side (with the agreement verdict when the
problem is unchanged)."""

_OVERLAY_EXAMPLES = """examples:
  kktrace overlay SMO_RUN QP_RUN --out convergence.svg
  kktrace overlay RUN_A RUN_B RUN_C --out convergence.png --json

The seconds axis is an estimate: traces record no per-iteration time, so each run's
iterations are spread evenly over its loop seconds."""

_RESUME_EXAMPLES = """examples:
  kktrace resume RUN_ID
  kktrace resume RUN_ID --iteration-limit 500000 --json"""


def _short(v: Any) -> str:
    if isinstance(v, float):
        return num(v)
    if isinstance(v, Mapping):
        return "{" + ", ".join(f"{k} {_short(x)}" for k, x in list(v.items())[:6]) + "}"
    if isinstance(v, (list, tuple)):
        inner = ", ".join(_short(x) for x in list(v)[:4])
        return f"[{inner}{', …' if len(v) > 4 else ''}]"
    return str(v)


def _print_diagnosis(d: Mapping[str, Any]) -> None:
    print(f"run {d['run_id']}  status {d['status']}  iterations {d['iterations']}  "
          f"trace {d['trace_level'] or 'none'}")
    if d["phases"]:
        print("phases: " + "; ".join(
            f"{p['name']} {p['first']}–{p['last']} ({p['iterations']} it, violation "
            f"{num(p['violation_start'])} → {num(p['violation_end'])})"
            for p in d["phases"]))
    print(d["statement"])
    for f in d["findings"]:
        print(f"  {f['severity'].upper():8s} {f['code']}: {f['summary']}")
        ev = {k: v for k, v in f["evidence"].items() if not isinstance(v, Mapping)}
        if ev:
            print("           evidence: " + ", ".join(f"{k} {_short(v)}"
                                                      for k, v in list(ev.items())[:8]))
        print(f"           action: {f['action']}"
              + (f"  (what-if: --try {f['try']})" if f.get("try") else ""))
    for code, why in d["skipped"].items():
        print(f"  not checked: {code} — {why}")


def _print_what_if(w: Mapping[str, Any]) -> None:
    print(f"what-if {w['change']}:")
    a, b = w["base"], w["changed"]
    rows = [["", "stored run", "with the change"]]
    for key in ("iterations", "seconds", "status", "max_violation", "relative_gap",
                "dual_objective", "n_support"):
        rows.append([key, _short(a.get(key)), _short(b.get(key))])
    print_rows(rows)
    if w.get("comparison"):
        print(f"  agreement: {w['comparison']['verdict']} — {w['comparison']['text']}")
    else:
        print("  the change alters the problem: the solutions are not compared")
    if w.get("run_id"):
        print(f"  saved as run {w['run_id']} (parent {a.get('run_id')})")


def cmd_diagnose(args: argparse.Namespace) -> int:
    import solver

    for text in args.try_change or ():
        solver.parse_change(text)  # refuse a bad change before any work
    diag = solver.diagnose(args.run, store=args.store).to_dict()
    trials = [solver.what_if(args.run, text, store=args.store, save=args.save,
                             rerun_base=True).to_dict() for text in args.try_change or ()]
    if args.json:
        emit_json({**diag, "what_if": trials, "caution": CAUTION}, sys.stdout)
        return EXIT_OK
    _print_diagnosis(diag)
    for w in trials:
        _print_what_if(w)
    print(f"note: {CAUTION}")
    return EXIT_OK


def cmd_resume(args: argparse.Namespace) -> int:
    import solver

    out = solver.resume(args.run, iteration_limit=args.iteration_limit,
                        time_limit=args.time_limit, store=args.store)
    d = out.to_dict()
    if args.json:
        emit_json(d, sys.stdout)
    else:
        print(f"resumed run {d['run_id']} (parent {d['parent_id']}, status "
              f"{d['status']['parent']} after {d['iterations']['parent']} iterations)")
        print(f"  status {d['status']['resumed']} after {d['iterations']['resumed']} more "
              f"iterations ({d['iterations']['total']} in all); maximal violation "
              f"{num(d['max_violation'])} (kkt_tol {num(d['kkt_tol'])}), "
              f"relative gap {num(d['relative_gap'])}")
    return EXIT_OK if out.converged else EXIT_NOT_CONVERGED


def cmd_overlay(args: argparse.Namespace) -> int:
    import solver

    d = solver.overlay(args.runs, out=args.out, store=args.store,
                       allow_mismatch=args.allow_mismatch)
    if args.json:
        emit_json(d, sys.stdout)
        return EXIT_OK
    rows = [["run", "solver", "status", "iterations", "last seconds", "best violation or gap",
             "final objective gap"]]
    for r in d["runs"]:
        rows.append([str(r["label"]), r["solver"], r["status"], _short(r["iterations"][-1]),
                     _short(r["seconds"][-1]), _short(min(r["violation"])),
                     _short(r["objective_gap"][-1])])
    print_rows(rows)
    for label in d["without_trace"]:
        print(f"  {label}: no trace rows, not plotted")
    for m in d["mismatch"]:
        print(f"note: the problems differ: {m}")
    print(f"note: {d['seconds_note']}")
    if d.get("figure"):
        print(f"figure: {d['figure']}")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "diagnose", "why a run was hard, where it went wrong, what would "
                    "change it", _DIAGNOSE_EXAMPLES)
    p.add_argument("run", metavar="RUN")
    p.add_argument("--try", dest="try_change", action="append", metavar="CHANGE",
                   help="re-solve with this change and compare (repeatable)")
    p.add_argument("--save", action="store_true",
                   help="store each what-if re-solve as a child run of RUN")
    p.set_defaults(func=cmd_diagnose)
    p = add_command(sub, "overlay", "convergence of several runs of one problem, side by side",
                    _OVERLAY_EXAMPLES)
    p.add_argument("runs", metavar="RUN", nargs="+")
    p.add_argument("--out", metavar="FILE", default=None,
                   help="write the figure here (.png, .svg or .pdf)")
    p.add_argument("--allow-mismatch", action="store_true",
                   help="overlay runs of different problems (the output says what differs)")
    p.set_defaults(func=cmd_overlay)
    p = add_command(sub, "resume", "continue a run stopped by its iteration or time limit",
                    _RESUME_EXAMPLES)
    p.add_argument("run", metavar="RUN")
    p.add_argument("--iteration-limit", type=positive_int, default=None, metavar="N",
                   help="iteration limit of the continuation (default: the stopped run's)")
    p.add_argument("--time-limit", type=float_arg, default=None, metavar="S",
                   help="wall-clock budget in seconds (default: the stopped run's)")
    p.set_defaults(func=cmd_resume)
