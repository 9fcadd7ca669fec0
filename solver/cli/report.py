"""``kktrace report``: the audit report (HTML, PDF, JSON)."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ._shared import (
    EXIT_OK,
    add_command,
    emit_json,
)

_REPORT_EXAMPLES = """examples:
  kktrace report RUN_ID
  kktrace report SMO_RUN_ID QP_RUN_ID --out audit-2024 --format html,pdf
  kktrace report PARENT_ID --pair release,rework"""


def cmd_report(args: argparse.Namespace) -> int:
    import solver

    formats = tuple(f.strip() for f in args.format.split(",") if f.strip())
    paths = solver.report(args.runs, store=args.store, out_dir=args.out, formats=formats,
                          notes=args.notes, pair=args.pair)
    if args.json:
        emit_json({k: str(v) for k, v in paths.items()}, sys.stdout)
    else:
        print(f"report for run(s) {', '.join(args.runs)} written:")
        for k, v in paths.items():
            print(f"  {k:5s} {v}")
        print(solver.caution_line())
    return EXIT_OK



def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "report", "write the audit report (HTML, PDF, JSON) for one run or a pair",
            _REPORT_EXAMPLES)
    p.add_argument("runs", metavar="RUN_ID", nargs="+",
                   help="a run id, or two (primary, challenger)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default <store>/reports/<run id>)")
    p.add_argument("--format", default="html,pdf,json",
                   help="comma-separated formats (default html,pdf,json)")
    p.add_argument("--notes", default=None, help="a note printed in the report")
    p.add_argument("--pair", metavar="A,B", default=None,
                   help="for a multi-class model: the pair shown in full (default: the worst "
                   "pair; every pair is in the multi-class table)")
    p.set_defaults(func=cmd_report)

