"""``kktrace apply``: decision values and labels of a stored model for new data."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ._shared import (
    EXIT_OK,
    add_column_options,
    add_command,
    column_kwargs,
    emit_json,
)

_APPLY_EXAMPLES = """examples:
  kktrace apply RUN_ID new_batches.csv
  kktrace apply RUN_ID new_batches.csv --out outputs.csv --json

For a multi-class model (a parent over one-vs-one pairs) every row gets its class, the
vote count of every class, whether the highest count was tied (the class first in the
class order wins a tie) and every pair's decision value."""


def cmd_apply(args: argparse.Namespace) -> int:
    import solver

    if args.out:
        solver.check_output_path(args.out, store=args.store)
    sc = solver.apply(args.run, args.data, store=args.store, label=args.label,
                      probabilities=args.probabilities, **column_kwargs(args))
    if args.out:
        _write_outputs(sc, Path(args.out))
    if args.json:
        emit_json(sc.to_dict(), sys.stdout)
        return EXIT_OK
    n = len(sc.values)
    print(f"applied run {args.run} to {n} rows of {sc.source or 'the data'} ")
    if sc.votes is not None:
        return _print_votes(sc, args)
    task = solver.task_for_kind(sc.kind)
    columns = task.output_columns(sc.values, sc.labels)
    if columns is not None:  # the task's own layout (ε-regression, one-class)
        return _print_task(task, columns, sc, args)
    if sc.confusion is not None:
        c = sc.confusion
        print(f"  accuracy {c['accuracy']:.3f}, balanced accuracy {c['balanced_accuracy']:.3f}")
        neg, pos = c["labels"]
        m = c["matrix"]
        print(f"  true {neg}: predicted {neg} {m[0][0]}, predicted {pos} {m[0][1]}")
        print(f"  true {pos}: predicted {neg} {m[1][0]}, predicted {pos} {m[1][1]}")
    probs = sc.probabilities
    if probs is not None:
        print(f"  {sc.probability_disagreements} of {n} rows: the most probable class differs "
              "from the decision-value label (the sigmoid's midpoint -B/A is not at f = 0; "
              "see the report's probability section)")
    if args.out:
        what = "decision values, labels and probabilities" if probs is not None else \
            "decision values and labels"
        print(f"  {what} written to {args.out}")
    else:
        heads = "" if probs is None else "  " + "  ".join(
            _prob_column(lab) for lab in sc.probability_labels)
        print("row  decision_value  label" + heads)
        for i, (v, lab) in enumerate(zip(sc.values.tolist(), sc.labels.tolist(), strict=True), 1):
            extra = "" if probs is None else "  " + "  ".join(f"{q:.6f}" for q in probs[i - 1])
            print(f"{i:<4d} {v:+.6f}       {lab}{extra}")
    return EXIT_OK


def _prob_column(label: Any) -> str:
    return f"probability_{label}"


def _vote_heads(sc: Any) -> list[str]:
    """CSV / table column names of a parent's output: votes, tie, pair values."""
    return ([f"votes_{c}" for c in sc.vote_classes] + ["tie"]
            + [f"value_{a}_vs_{b}" for a, b in sc.member_keys])


def _vote_cells(sc: Any, i: int) -> list[str]:
    return ([str(int(v)) for v in sc.votes[i]] + [str(int(bool(sc.tie[i])))]
            + [repr(float(v)) for v in sc.values[i]])


def _print_votes(sc: Any, args: argparse.Namespace) -> int:
    """A multi-class parent: class, vote counts and every pair's decision value per row."""
    print(f"  one-vs-one over {len(sc.member_keys)} pairs: {sc.vote_rule}")
    print(f"  ties: {sc.tie_rule} ({int(sc.tie.sum())} of {len(sc.labels)} rows tied)")
    c = sc.confusion
    if c is not None:
        print(f"  accuracy {c['accuracy']:.3f}, balanced accuracy {c['balanced_accuracy']:.3f}; "
              "recall " + ", ".join(f"{k} {v:.3f}" if v is not None else f"{k} n/a"
                                    for k, v in c["recall"].items()))
        labs = [str(v) for v in c["labels"]]
        w = max(len(x) for x in labs) + 2
        print("  confusion (rows: true, columns: predicted)")
        print("  " + " " * w + "".join(x.rjust(w) for x in labs))
        for lab, row in zip(labs, c["matrix"], strict=True):
            print("  " + lab.ljust(w) + "".join(str(v).rjust(w) for v in row))
    if sc.probabilities is not None:
        print(f"  {sc.probability_disagreements} of {len(sc.labels)} rows: the most probable "
              "class (pairwise coupling) differs from the voted class")
    if args.out:
        print(f"  class, votes, ties and pair decision values written to {args.out}")
        return EXIT_OK
    heads = ["row", "label", *_vote_heads(sc)]
    if sc.probabilities is not None:
        heads += [_prob_column(lab) for lab in sc.probability_labels]
    print("  ".join(heads))
    for i, lab in enumerate(sc.labels.tolist()):
        extra = [] if sc.probabilities is None else [f"{q:.6f}" for q in sc.probabilities[i]]
        cells = [str(i + 1), str(lab), *_vote_cells(sc, i)[:len(sc.vote_classes) + 1],
                 *(f"{float(v):+.6f}" for v in sc.values[i]), *extra]
        print("  ".join(cells))
    return EXIT_OK


def _print_task(task: Any, columns: dict[str, list[Any]], sc: Any,
                args: argparse.Namespace) -> int:
    for line in task.applied_lines(sc.confusion):
        print(f"  {line}")
    if args.out:
        print(f"  outputs written to {args.out}")
        return EXIT_OK
    print("  ".join(["row ", *(f"{c:<11s}" for c in columns)]).rstrip())
    for i in range(len(sc.values)):
        cells = [f"{v:<+11.6f}" if isinstance(v, float) else f"{v!s:<11s}"
                 for v in (columns[c][i] for c in columns)]
        print("  ".join([f"{i + 1:<4d}", *cells]).rstrip())
    return EXIT_OK


def _write_outputs(sc: Any, path: Path) -> None:
    import csv

    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        if sc.votes is not None:
            probs = sc.probabilities
            heads = [] if probs is None else [_prob_column(lab) for lab in sc.probability_labels]
            w.writerow(["row", "label", *_vote_heads(sc), *heads])
            for i, lab in enumerate(sc.labels.tolist()):
                extra = [] if probs is None else [repr(float(q)) for q in probs[i]]
                w.writerow([i + 1, lab, *_vote_cells(sc, i), *extra])
            return
        import solver

        columns = solver.task_for_kind(sc.kind).output_columns(sc.values, sc.labels)
        if columns is not None:  # the task's own columns (ε-regression, one-class)
            w.writerow(["row", *columns])
            for i in range(len(sc.values)):
                w.writerow([i + 1, *(repr(v) if isinstance(v, float) else v
                                 for v in (columns[c][i] for c in columns))])
            return
        probs = sc.probabilities
        heads = [] if probs is None else [_prob_column(lab) for lab in sc.probability_labels]
        w.writerow(["row", "decision_value", "label", *heads])
        for i, (v, lab) in enumerate(zip(sc.values.tolist(), sc.labels.tolist(), strict=True), 1):
            extra = [] if probs is None else [repr(float(q)) for q in probs[i - 1]]
            w.writerow([i, repr(float(v)), lab, *extra])



def register(sub: Any) -> None:
    """Add this module's commands to the sub-command table."""
    p = add_command(sub, "apply", "decision values and labels for new data", _APPLY_EXAMPLES)
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("data", metavar="DATAFILE")
    p.add_argument("--label", metavar="COLUMN", default=None,
                   help="label column, if the data have one (default: the run's, if present)")
    p.add_argument("--out", metavar="FILE", default=None,
                   help="write row (the 1-based data row, as in error messages), value, label "
                   "(and probability_<label> columns) as CSV")
    p.add_argument("--probabilities", action="store_true",
                   help="add P(class | x) for every class from the run's fitted sigmoid "
                   "(the run must be trained with --probabilities)")
    add_column_options(p, "DATAFILE")
    p.set_defaults(func=cmd_apply)

