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
  kktrace explain RUN_ID --leave-one-out

For a multi-class model (a parent over one-vs-one pairs) the table has one row per
training point with its category and multiplier in every pair it took part in, and
"support vector in m of its k-1 pairs"; --point / --query break a query down per pair
and show the vote."""


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
    if args.pair is not None and not args.leave_one_out:
        raise solver.InvalidInputError("--pair goes with --leave-one-out (the per-point table "
                                       "and --point cover every pair already)")
    if args.leave_one_out:
        loo = solver.leave_one_out(args.run, store=args.store, progress=progress(args),
                                   keep=not args.no_keep, pair=args.pair)
        d = loo.summary() if hasattr(loo, "summary") else to_dict(loo)
        if args.json:
            emit_json(d, sys.stdout)
        else:
            _print_loo(d, f"pair {' vs '.join(args.pair.split(','))} of model {args.run}"
                       if args.pair else f"run {args.run}")
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
            traced = getattr(res, "trace_level", "full") is not None
            _print_columns(cols, None if traced else solver.vocabulary.not_traced(
                getattr(res, "solver", None), None))
        return EXIT_OK
    d = res.to_dict() if hasattr(res, "to_dict") else to_dict(res)
    if args.json:
        emit_json(d, sys.stdout)
    elif d.get("record") == "parent":
        _print_parent_breakdown(d, args.run)
    else:
        _print_breakdown(d, args.run)
    return EXIT_OK


def _print_parent_breakdown(d: Mapping[str, Any], run: str) -> None:
    """A multi-class parent: per query, the vote, then every pair's breakdown."""
    print(f"multi-class model {run}: {len(d['pairs'])} pairs vote ({d['vote_rule']}; "
          f"{d['tie_rule']})")
    for q, lab in enumerate(d["labels"]):
        votes = ", ".join(f"{c} {v}" for c, v in zip(d["classes"], d["votes"][q], strict=True))
        tie = "  (tied: the first class in the class order wins)" if d["tie"][q] else ""
        print(f"query {q}: class {lab}  [votes {votes}]{tie}")
        for p in d["pairs"]:
            val = p["values"][q]
            print(f"  pair {' vs '.join(p['pair'])}: f(x) = {val:+.6g} → votes "
                  f"{p['votes_for'][q]}  (bias {num(p['bias'])}, {p['n_support']} support "
                  "vectors)")
            rows = p.get("top_rows_parent") or p["top_rows"]
            for r, c, sh in zip(rows[q], p["top_contributions"][q], p["top_shares"][q],
                                strict=True):
                print(f"      training row {int(r):>6d}  {c:+.6g}  ({sh:.1%} of the "
                      "absolute total)")
            print(f"      all other support vectors  {p['remainder'][q]:+.6g}  "
                  f"({p['remainder_share'][q]:.1%})")


def _print_columns(cols: Mapping[str, list[Any]], placeholder: str | None) -> None:
    """The per-point table with the vocabulary's labels; untraced columns say why."""
    import solver

    voc = solver.vocabulary
    names = [c for c in cols if c != "reason"] + (["reason"] if "reason" in cols else [])
    n = len(next(iter(cols.values()), []))

    def show(c: str, v: Any) -> str:
        if placeholder is not None and c in voc.TRACE_COLUMNS:
            return placeholder
        return cell(v)

    rows = [list(voc.labels(names, voc.POINT_COLUMNS))]
    rows += [[show(c, cols[c][i]) for c in names] for i in range(n)]
    print_rows(rows, indent="")


def _print_loo(d: Mapping[str, Any], run: str) -> None:
    import solver

    voc = solver.vocabulary
    print(f"leave-one-out for {run}:")
    rows = []
    for k, v in d.items():
        if k == "kept_as" or isinstance(v, Mapping):
            continue
        if isinstance(v, (list, tuple)):
            shown = f"[{len(v)} rows]" if len(v) > 8 else (", ".join(map(str, v)) or "none")
        else:
            shown = cell(v)
        rows.append([voc.label(k, voc.LEAVE_ONE_OUT), shown, voc.meaning(k, voc.LEAVE_ONE_OUT)])
    print_rows(rows, indent="  ")
    if d.get("kept_as"):
        print(f"stored as child record {d['kept_as']} of run {run} (the report shows it)")
    else:
        print("not stored (--no-keep)")


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
    p.add_argument("--pair", metavar="A,B", default=None,
                   help="with --leave-one-out on a multi-class model: the pair run")
    p.add_argument("--leave-one-out", action="store_true",
                   help="exact leave-one-out error and its bounds, stored with the run "
                        "as a child record")
    p.add_argument("--no-keep", action="store_true",
                   help="with --leave-one-out: print the figures without storing them")
    add_column_options(p, "the --query file")
    p.set_defaults(func=cmd_explain)

