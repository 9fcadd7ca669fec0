"""``kktrace explain``: per-point reasons, decision breakdowns, leave-one-out."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ._shared import (
    EXIT_OK,
    add_column_options,
    add_command,
    cell,
    column_kwargs,
    emit_json,
    kv_lines,
    num,
    positive_int,
    print_rows,
    progress,
    to_dict,
)

_EXPLAIN_EXAMPLES = """examples:
  kktrace explain RUN_ID                      # the whole per-point table
  kktrace explain RUN_ID --out explanations   # ... written as CSV and Parquet
  kktrace explain RUN_ID --point "coating_thickness_um=92,dissolution_30min_pct=88,\\
hardness_n=120,moisture_pct=2.4"
  kktrace explain RUN_ID --query new_batches.csv --top 3 --json
  kktrace explain RUN_ID --leave-one-out"""


def _parse_point_text(text: str) -> dict[str, str]:
    point: dict[str, str] = {}
    for part in text.split(","):
        if not part.strip():
            continue
        name, sep, value = part.partition("=")
        if not sep or not name.strip():
            import solver

            raise solver.InvalidInputError(
                f"--point expects name=value pairs separated by commas, got {part.strip()!r}"
            )
        point[name.strip()] = value.strip()
    return point


def cmd_explain(args: argparse.Namespace) -> int:
    import solver

    if args.point is not None and args.query is not None:
        raise solver.InvalidInputError("give either --point or --query, not both")
    if args.leave_one_out:
        loo = solver.leave_one_out(args.run, store=args.store, progress=progress(args))
        d = loo.summary() if hasattr(loo, "summary") else to_dict(loo)
        if args.json:
            emit_json(d, sys.stdout)
        else:
            print(f"leave-one-out for run {args.run}:")
            print("\n".join(kv_lines(d)))
        return EXIT_OK
    points: Any = None
    if args.point is not None:
        points = _parse_point_text(args.point)
    elif args.query is not None:
        points = args.query
    kw = column_kwargs(args) if args.query is not None else {}
    if args.query is None and any(kw_v is not None for kw_v in column_kwargs(args).values()):
        raise solver.InvalidInputError("--features, --ignore and --delimiter apply to the "
                                       "--query file")
    res = solver.explain(args.run, store=args.store, points=points, top=args.top, **kw)
    if points is None:
        cols = {k: list(v) for k, v in res.to_columns().items()}
        if args.out:
            paths = solver.export_explanation(args.run, Path(args.out), store=args.store)
            if not args.json:
                for k, v in paths.items():
                    print(f"per-point table ({k}) written to {v}")
        if args.json:
            emit_json(cols, sys.stdout)
        elif not args.out:
            _print_columns(cols)
        return EXIT_OK
    d = to_dict(res)
    if args.json:
        emit_json(d, sys.stdout)
    else:
        _print_breakdown(d, args.run)
    return EXIT_OK


def _print_columns(cols: Mapping[str, list[Any]]) -> None:
    names = [c for c in cols if c != "reason"] + (["reason"] if "reason" in cols else [])
    n = len(next(iter(cols.values()), []))
    rows = [names] + [[cell(cols[c][i]) for c in names] for i in range(n)]
    print_rows(rows, indent="")


def _print_breakdown(d: Mapping[str, Any], run: str) -> None:
    import numpy as np

    values = np.atleast_1d(d["values"])
    rows = np.atleast_2d(d["top_rows"])
    contrib = np.atleast_2d(d["top_contributions"])
    shares = np.atleast_2d(d["top_shares"])
    print(f"decision values of run {run}: f(x) = sum of support-vector terms + bias "
          f"(bias {num(d['bias'])}, {d['n_support']} support vectors)")
    labels = d.get("labels")
    for q in range(values.shape[0]):
        side = "positive" if values[q] > 0 else "negative"
        if labels:
            lab = labels[1] if values[q] > 0 else labels[0]
            side = f"label {str(lab)!r}: {side} side"
        print(f"query {q + 1}: f(x) = {values[q]:+.6g}  ({side})")
        for r, c, sh in zip(rows[q], contrib[q], shares[q], strict=True):
            print(f"  training row {int(r) + 1:>6d} (index {int(r)})  {c:+.6g}  "
                  f"({sh:.1%} of the absolute total)")
        rem = np.atleast_1d(d["remainder"])[q]
        rem_share = np.atleast_1d(d["remainder_share"])[q]
        print(f"  all other support vectors  {rem:+.6g}  ({rem_share:.1%})")



def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "explain", "why points became support vectors; decision breakdowns",
            _EXPLAIN_EXAMPLES)
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--point", metavar="NAME=VALUE,...", default=None,
                   help="one query point in raw units")
    p.add_argument("--query", metavar="FILE", default=None, help="query points from a data file")
    p.add_argument("--top", type=positive_int, default=5,
                   help="support vectors listed per query (default 5)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="write the per-point table as CSV and Parquet into DIR")
    p.add_argument("--leave-one-out", action="store_true",
                   help="exact leave-one-out error and its bounds")
    add_column_options(p, "the --query file")
    p.set_defaults(func=cmd_explain)

