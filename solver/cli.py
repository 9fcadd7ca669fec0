"""The ``kktrace`` command: train, inspect, compare, explain, replay, verify, score, report.

Uses only the public API in :mod:`solver`.  Exit codes: 0 success, 1 user or data error
(one line on stderr naming the problem), 2 usage error, 3 a solver did not converge (the
run is still stored and marked), 4 internal error (a bug; set ``KKTRACE_DEBUG=1`` for the
traceback).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, TextIO

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_NOT_CONVERGED, EXIT_INTERNAL = 0, 1, 2, 3, 4

_EXIT_TEXT = """exit status:
  0  success
  1  user or data error (one line on stderr names the problem)
  2  usage error (unknown option, missing argument)
  3  a solver stopped before its optimality test was met (the run is stored, marked)
  4  internal error (a bug: rerun with KKTRACE_DEBUG=1 to see the traceback)"""

_STORE_HELP = "run store directory (default: $KKTRACE_STORE, else ./traces)"


# --------------------------------------------------------------------------- output helpers


def _clean(v: Any) -> Any:
    """JSON-safe copy: non-finite floats become null, numpy values become Python values."""
    import solver

    return solver.to_plain(v, nonfinite_as_none=True)


def _emit_json(obj: Any, out: TextIO) -> None:
    out.write(json.dumps(_clean(obj), indent=2, allow_nan=False, default=str) + "\n")


def _num(v: Any, spec: str = ".4g") -> str:
    if v is None:
        return "n/a"
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    try:
        return format(v, spec)
    except (TypeError, ValueError):
        return str(v)


def _to_dict(obj: Any) -> dict[str, Any]:
    """Plain data from a result object (``to_dict()``, a dataclass, or a mapping)."""
    import dataclasses

    if obj is None:
        return {}
    if isinstance(obj, Mapping):
        return dict(obj)
    for name in ("to_dict", "summary"):
        fn = getattr(obj, name, None)
        if callable(fn):
            return dict(fn())
    if dataclasses.is_dataclass(obj):
        return {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}
    return {"value": obj}


def _kv_lines(d: Mapping[str, Any], indent: str = "  ", skip: Sequence[str] = ()) -> list[str]:
    lines = []
    for k, v in d.items():
        if k in skip:
            continue
        if isinstance(v, Mapping):
            lines.append(f"{indent}{k}:")
            lines.extend(_kv_lines(v, indent + "  "))
        elif isinstance(v, (list, tuple)) and len(v) > 8:
            lines.append(f"{indent}{k}: [{len(v)} values]")
        else:
            lines.append(f"{indent}{k}: {_num(v) if isinstance(v, float) else v}")
    return lines


class _Progress:
    """One-line progress bar on stderr, drawn only on a terminal and at most 10 times a second."""

    def __init__(self, stream: TextIO, enabled: bool) -> None:
        self.stream = stream
        self.enabled = enabled
        self.first_violation: float | None = None
        self.last = 0.0
        self.width = 0

    def __call__(self, task: str, info: Mapping[str, Any]) -> None:
        if not self.enabled:
            return
        if task == "done":
            self._clear()
            self.first_violation = None
            return
        now = time.monotonic()
        if now - self.last < 0.1:
            return
        self.last = now
        if task == "solve":
            line = self._solve_line(info)
        elif task == "leave_one_out":
            done, total = int(info.get("done", 0)), int(info.get("total", 0) or 1)
            line = f"leave-one-out refits {_bar(done / total)} {done}/{total}"
        else:
            return
        self._draw(line)

    def _solve_line(self, info: Mapping[str, Any]) -> str:
        it = info.get("iteration")
        v, tol = info.get("violation"), info.get("tol")
        text = f"{info.get('solver', 'solver')} iteration {it if it is not None else '?'}"
        frac = None
        if isinstance(v, (int, float)) and isinstance(tol, (int, float)) and v > 0 and tol > 0:
            if self.first_violation is None or v > self.first_violation:
                self.first_violation = max(float(v), float(tol) * 10)
            span = math.log(self.first_violation / tol)
            frac = 1.0 if v <= tol else max(0.0, math.log(self.first_violation / v) / span)
            text += f"  violation {v:.2e} (tol {tol:.1e})"
        elif isinstance(info.get("gap"), (int, float)):
            text += f"  gap {info['gap']:.2e}"
        return (f"{_bar(frac)} " if frac is not None else "") + text

    def _draw(self, line: str) -> None:
        pad = max(0, self.width - len(line))
        self.stream.write("\r" + line + " " * pad)
        self.stream.flush()
        self.width = len(line)

    def _clear(self) -> None:
        if self.width:
            self.stream.write("\r" + " " * self.width + "\r")
            self.stream.flush()
            self.width = 0


def _bar(frac: float, width: int = 24) -> str:
    k = int(round(max(0.0, min(1.0, frac)) * width))
    return "[" + "=" * k + " " * (width - k) + "]"


def _progress(args: argparse.Namespace) -> _Progress:
    return _Progress(sys.stderr, enabled=not args.quiet and sys.stderr.isatty())


# --------------------------------------------------------------------------- commands


def _run_block(s: Mapping[str, Any], role: str) -> list[str]:
    k = s.get("kernel") or {}
    params = dict(k.get("params") or {})
    source = params.pop("gamma_source", None)
    kp = ", ".join(f"{a}={_num(b) if isinstance(b, float) else b}"
                   for a, b in params.items() if b is not None)
    if source and source != "given":
        kp += f"; gamma from the {source.replace('_', ' ')}"
    state = "converged" if s.get("converged") else f"NOT CONVERGED ({s['status']})"
    lines = [
        f"{role} run {s['run_id']}  [{s['solver']}]  {state}",
        f"  kernel        {k.get('name', '?')}" + (f" ({kp})" if kp else "")
        + f", C = {_num(s.get('C'))}",
        f"  iterations    {s['iterations']}  in {s['seconds']:.2f} s",
        f"  violation     {_num(s['max_violation'], '.3e')}  (tol {_num(s['tol'], '.1e')})",
        f"  objectives    dual (minimised) {_num(s['dual_objective'], '.8g')}, "
        f"primal {_num(s['primal_objective'], '.8g')}",
        f"  duality gap   {_num(s['duality_gap'], '.3e')} = primal + dual  "
        f"(relative {_num(s.get('relative_gap'), '.2e')})",
        f"  support       {s['n_support']} of {s['n_rows']} points "
        f"({s['n_free']} on the margin, {s['n_bounded']} at the bound), bias {_num(s['bias'])}",
    ]
    if "holdout_accuracy" in s:
        lines.append(
            f"  held-out      accuracy {_num(s['holdout_accuracy'], '.3f')}, balanced accuracy "
            f"{_num(s['holdout_balanced_accuracy'], '.3f')}"
        )
    if not s.get("converged"):
        lines.append(f"  note          {s.get('message', '')}")
    lines.append(f"  stored in     {s['run_dir']}")
    return lines


def cmd_train(args: argparse.Namespace) -> int:
    import solver

    outcome = solver.train(
        args.data, label=args.label, kernel=args.kernel, gamma=args.gamma,
        degree=args.degree, offset=args.offset, C=args.C, tol=args.tol,
        max_iter=args.max_iter, solver=args.solver, standardise=not args.no_standardise,
        holdout=args.holdout, store=args.store, trace=args.trace, quiet=True,
        progress=_progress(args),
    )
    if args.json:
        _emit_json(outcome.summary(), sys.stdout)
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


def cmd_runs(args: argparse.Namespace) -> int:
    import solver

    filters = {"status": args.status, "solver": args.solver, "kernel": args.kernel,
               "fingerprint": args.fingerprint}
    rows = solver.runs(store=args.store, **filters)
    if args.limit is not None:
        rows = rows[-args.limit:] if args.limit > 0 else []
    if args.json:
        _emit_json(rows, sys.stdout)
        return EXIT_OK
    if not rows:
        print("no runs match" if any(v is not None for v in filters.values())
              else "the store holds no runs yet")
        return EXIT_OK
    cols = [c for c in ("run_id", "created", "solver", "status", "iterations", "n",
                        "kernel", "C", "max_violation", "duality_gap", "parent_id")
            if any(c in r for r in rows)]
    table = [[_cell(r.get(c)) for c in cols] for r in rows]
    widths = [max(len(c), *(len(t[i]) for t in table)) for i, c in enumerate(cols)]
    print("  ".join(c.ljust(w) for c, w in zip(cols, widths, strict=True)))
    for t in table:
        print("  ".join(v.ljust(w) for v, w in zip(t, widths, strict=True)))
    return EXIT_OK


def _cell(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return _num(v, ".3g")
    if isinstance(v, Mapping):
        return str(v.get("name", v))
    return str(v)


def cmd_report(args: argparse.Namespace) -> int:
    import solver

    formats = tuple(f.strip() for f in args.format.split(",") if f.strip())
    paths = solver.report(args.runs, store=args.store, out_dir=args.out, formats=formats,
                          notes=args.notes)
    if args.json:
        _emit_json({k: str(v) for k, v in paths.items()}, sys.stdout)
    else:
        print(f"report for run(s) {', '.join(args.runs)} written:")
        for k, v in paths.items():
            print(f"  {k:5s} {v}")
    return EXIT_OK


def cmd_compare(args: argparse.Namespace) -> int:
    import solver

    comp = solver.compare(args.run_a, args.run_b, store=args.store, holdout=args.holdout,
                          allow_mismatch=args.allow_mismatch)
    d = _to_dict(comp)
    if args.json:
        _emit_json(d, sys.stdout)
        return EXIT_OK
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
            rows.append([name, _num(m.get("value"), ".4g"), f"{rule} {_num(m.get('tolerance'))}",
                         f"{rule} {_num(m.get('loose_tolerance'))}", result])
        _print_rows(rows)
    for run in d.get("runs") or []:
        print("  " + ", ".join(f"{k} {_num(v, '.4g') if isinstance(v, float) else v}"
                               for k, v in run.items()))
    for note in list(d.get("mismatches") or []) + list(d.get("notes") or []):
        print(f"note: {note}")
    return EXIT_OK


def _print_rows(rows: Sequence[Sequence[str]], indent: str = "  ") -> None:
    widths = [max(len(r[j]) for r in rows) for j in range(len(rows[0]))]
    for r in rows:
        print(indent + "  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)).rstrip())


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
        loo = solver.leave_one_out(args.run, store=args.store, progress=_progress(args))
        d = _to_dict(loo)
        if args.json:
            _emit_json(d, sys.stdout)
        else:
            print(f"leave-one-out for run {args.run}:")
            print("\n".join(_kv_lines(d)))
        return EXIT_OK
    points: Any = None
    if args.point is not None:
        points = _parse_point_text(args.point)
    elif args.query is not None:
        points = args.query
    res = solver.explain(args.run, store=args.store, points=points, top=args.top)
    if points is None:
        cols = {k: list(v) for k, v in res.to_columns().items()}
        if args.out:
            paths = solver.export_explanation(args.run, Path(args.out), store=args.store)
            if not args.json:
                for k, v in paths.items():
                    print(f"per-point table ({k}) written to {v}")
        if args.json:
            _emit_json(cols, sys.stdout)
        elif not args.out:
            _print_columns(cols)
        return EXIT_OK
    d = _to_dict(res)
    if args.json:
        _emit_json(d, sys.stdout)
    else:
        _print_breakdown(d, args.run)
    return EXIT_OK


def _print_columns(cols: Mapping[str, list[Any]]) -> None:
    names = [c for c in cols if c != "reason"] + (["reason"] if "reason" in cols else [])
    n = len(next(iter(cols.values()), []))
    rows = [names] + [[_cell(cols[c][i]) for c in names] for i in range(n)]
    _print_rows(rows, indent="")


def _print_breakdown(d: Mapping[str, Any], run: str) -> None:
    import numpy as np

    values = np.atleast_1d(d["values"])
    rows = np.atleast_2d(d["top_rows"])
    contrib = np.atleast_2d(d["top_contributions"])
    shares = np.atleast_2d(d["top_shares"])
    print(f"decision values of run {run}: f(x) = sum of support-vector terms + bias "
          f"(bias {_num(d['bias'])}, {d['n_support']} support vectors)")
    for q in range(values.shape[0]):
        side = "positive" if values[q] > 0 else "negative"
        print(f"query {q}: f(x) = {values[q]:+.6g}  ({side} side)")
        for r, c, sh in zip(rows[q], contrib[q], shares[q], strict=True):
            print(f"  training row {int(r):>6d}  {c:+.6g}  ({sh:.1%} of the absolute total)")
        rem = np.atleast_1d(d["remainder"])[q]
        rem_share = np.atleast_1d(d["remainder_share"])[q]
        print(f"  all other support vectors  {rem:+.6g}  ({rem_share:.1%})")


def cmd_replay(args: argparse.Namespace) -> int:
    import solver

    state = solver.replay(args.run, args.iteration, store=args.store)
    cert = state.certificate.to_dict()
    d = {
        "run_id": state.run_id,
        "iteration": state.iteration,
        "base_iteration": state.base_iteration,
        "deltas_applied": state.deltas_applied,
        "certificate": cert,
        "recorded": dict(state.recorded) if state.recorded is not None else None,
    }
    if args.json:
        d["alpha"] = state.alpha.tolist()
        _emit_json(d, sys.stdout)
        return EXIT_OK
    print(f"run {args.run} rebuilt at iteration {state.iteration} "
          f"(snapshot {state.base_iteration} + {state.deltas_applied} recorded steps)")
    print(f"  violation     {_num(cert['max_violation'], '.3e')}  (tol {_num(cert['tol'], '.1e')})")
    print(f"  objectives    dual {_num(cert['dual_objective'], '.8g')}, "
          f"primal {_num(cert['primal_objective'], '.8g')}")
    print(f"  duality gap   {_num(cert['duality_gap'], '.3e')}")
    print(f"  support       {cert['n_support']} points ({cert['n_free']} free, "
          f"{cert['n_bounded']} at the bound), bias {_num(cert['bias'])}")
    if state.recorded:
        print("  trace row     " + ", ".join(
            f"{k} {_num(v, '.6g') if isinstance(v, float) else v}"
            for k, v in state.recorded.items()))
    return EXIT_OK


def _is_long_array(v: Any) -> bool:
    shape = getattr(v, "shape", None)
    return shape is not None and len(shape) >= 1 and shape[0] > 8


def cmd_verify(args: argparse.Namespace) -> int:
    import solver

    res = solver.verify(args.run, store=args.store, rerun=args.rerun, keep_rerun=args.keep)
    integ = _to_dict(res.integrity)
    repro = None if res.reproduction is None else _to_dict(res.reproduction)
    if args.json:
        _emit_json({"run_id": args.run, "ok": res.ok, "integrity": integ,
                    "reproduction": repro, "rerun_run_id": res.rerun_run_id}, sys.stdout)
    else:
        if res.integrity.ok:
            chain = integ.get("chain") or [args.run]
            print(f"run {args.run}: files intact ({integ.get('files_checked', '?')} digests "
                  f"match; chain of {len(chain)} run(s) checked)")
        else:
            print(f"run {args.run}: INTEGRITY CHECK FAILED")
            for p in integ.get("problems") or ():
                print(f"  - {p}")
        if repro is not None:
            print(f"re-run: alpha {repro.get('agreement')} (max |difference| "
                  f"{_num(repro.get('max_abs_difference'), '.3g')}, tolerance "
                  f"{_num(repro.get('tolerance'), '.3g')}); iterations "
                  f"{repro.get('iterations')}, status {repro.get('status')}")
            for note in repro.get("notes") or ():
                print(f"  note: {note}")
        if res.rerun_run_id:
            print(f"re-run stored as run {res.rerun_run_id}")
    if not res.ok:
        print(f"kktrace: error: run {args.run} failed verification", file=sys.stderr)
        return EXIT_ERROR
    return EXIT_OK


def cmd_score(args: argparse.Namespace) -> int:
    import solver

    sc = solver.score(args.run, args.data, store=args.store, label=args.label)
    if args.out:
        _write_scores(sc, Path(args.out))
    if args.json:
        _emit_json(sc.to_dict(), sys.stdout)
        return EXIT_OK
    n = len(sc.values)
    print(f"scored {n} rows of {sc.source or 'the data'} with run {args.run}")
    if sc.confusion is not None:
        c = sc.confusion
        print(f"  accuracy {c['accuracy']:.3f}, balanced accuracy {c['balanced_accuracy']:.3f}")
        neg, pos = c["labels"]
        m = c["matrix"]
        print(f"  true {neg}: predicted {neg} {m[0][0]}, predicted {pos} {m[0][1]}")
        print(f"  true {pos}: predicted {neg} {m[1][0]}, predicted {pos} {m[1][1]}")
    if args.out:
        print(f"  decision values and labels written to {args.out}")
    else:
        print("row  decision_value  label")
        for i, (v, lab) in enumerate(zip(sc.values.tolist(), sc.labels.tolist(), strict=True)):
            print(f"{i:<4d} {v:+.6f}       {lab}")
    return EXIT_OK


def _write_scores(sc: Any, path: Path) -> None:
    import csv

    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["row", "decision_value", "label"])
        for i, (v, lab) in enumerate(zip(sc.values.tolist(), sc.labels.tolist(), strict=True)):
            w.writerow([i, repr(float(v)), lab])


def cmd_demo(args: argparse.Namespace) -> int:
    import solver

    if not args.json:
        print("kktrace demo: the tablet-coating QC data below are INVENTED for this demo; "
              "they describe no real product, process or laboratory.")
    res = solver.run_demo(store=args.store, quiet=True, progress=_progress(args))
    tr = res.train
    if args.json:
        _emit_json({
            "invented_data": True,
            "store": str(res.store),
            "data_files": [str(p) for p in res.data_files],
            "runs": tr.summary(),
            "reports": {k: str(v) for k, v in res.reports.items()},
            "explanations": {k: str(v) for k, v in res.explanation_files.items()},
            "seconds": res.seconds,
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
        print(f"demo finished in {res.seconds:.1f} s; store: {res.store}")
    return EXIT_OK if tr.converged else EXIT_NOT_CONVERGED


# --------------------------------------------------------------------------- parser


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=30, width=100)


def _common(json_flag: bool = True, store: bool = True) -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(add_help=False, allow_abbrev=False)
    g = p.add_argument_group("common options")
    if store:
        g.add_argument("--store", metavar="DIR", default=None, help=_STORE_HELP)
    if json_flag:
        g.add_argument("--json", action="store_true", help="print machine-readable JSON")
    g.add_argument("--quiet", action="store_true", help="no progress bar")
    g.add_argument("--help", action="help", help="show this help and exit")
    return p


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}")
    return v


def _nonneg_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a non-negative integer, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative integer, got {text!r}")
    return v


def _float(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None


_EXAMPLES = {
    "train": """examples:
  kktrace train batches.csv --label lab_decision --kernel rbf --C 10 --solver both \\
      --holdout batches_holdout.csv
  kktrace train scores.parquet --label outcome --kernel poly --degree 2 --offset 1 --json
  kktrace train X.npz --label y --kernel linear --tol 1e-5 --store audit-traces""",
    "runs": """examples:
  kktrace runs
  kktrace runs --status iteration_limit --json""",
    "report": """examples:
  kktrace report RUN_ID
  kktrace report SMO_RUN_ID QP_RUN_ID --out audit-2024 --format html,pdf""",
    "compare": """examples:
  kktrace compare SMO_RUN_ID QP_RUN_ID
  kktrace compare RUN_A RUN_B --holdout new_batches.csv --json""",
    "explain": """examples:
  kktrace explain RUN_ID                      # the whole per-point table
  kktrace explain RUN_ID --out explanations   # ... written as CSV and Parquet
  kktrace explain RUN_ID --point "coating_thickness_um=92,dissolution_30min_pct=88,\\
hardness_n=120,moisture_pct=2.4"
  kktrace explain RUN_ID --query new_batches.csv --top 3 --json
  kktrace explain RUN_ID --leave-one-out""",
    "replay": """examples:
  kktrace replay RUN_ID --iteration 100
  kktrace replay RUN_ID --iteration 0 --json""",
    "verify": """examples:
  kktrace verify RUN_ID
  kktrace verify RUN_ID --rerun batches.csv""",
    "score": """examples:
  kktrace score RUN_ID new_batches.csv
  kktrace score RUN_ID new_batches.csv --out scores.csv --json""",
    "demo": """examples:
  kktrace demo
  kktrace demo --store /tmp/demo-traces --json""",
}


def build_parser() -> argparse.ArgumentParser:
    """The ``kktrace`` argument parser (long options only)."""
    top = argparse.ArgumentParser(
        prog="kktrace", add_help=False, allow_abbrev=False, formatter_class=_Formatter,
        description="Auditable SVM training: SMO with per-iteration traces, an independent "
        "QP challenger, convergence certificates, support-vector explanations and reports.",
        epilog="examples:\n  kktrace demo\n  kktrace train data.csv --label outcome "
        "--solver both\n  kktrace runs\n  kktrace report RUN_ID\n\n"
        "run 'kktrace COMMAND --help' for a command's options.\n\n" + _EXIT_TEXT,
    )
    top.add_argument("--help", action="help", help="show this help and exit")
    top.add_argument("--version", action="version", version=_version(),
                     help="show the kktrace version and exit")
    sub = top.add_subparsers(dest="command", metavar="COMMAND", required=True)

    def add(name: str, helptext: str, parents: list[argparse.ArgumentParser]) -> Any:
        return sub.add_parser(
            name, help=helptext, description=helptext, add_help=False, allow_abbrev=False,
            parents=parents, formatter_class=_Formatter,
            epilog=_EXAMPLES[name] + "\n\n" + _EXIT_TEXT,
        )

    p = add("train", "train on a data file and store the run(s)", [_common()])
    p.add_argument("data", metavar="DATAFILE", help="CSV (header row), Parquet, .npy or .npz")
    p.add_argument("--label", metavar="COLUMN", required=True, help="label column (two values)")
    p.add_argument("--kernel", choices=("linear", "poly", "rbf", "sigmoid"), default="rbf",
                   help="kernel (default rbf)")
    p.add_argument("--gamma", type=_float, default=None,
                   help="kernel gamma (default: 1 / median squared distance, recorded)")
    p.add_argument("--degree", type=_positive_int, default=3,
                   help="poly kernel degree (default 3)")
    p.add_argument("--offset", type=_float, default=0.0,
                   help="poly / sigmoid kernel constant (default 0)")
    p.add_argument("--C", type=_float, default=1.0, help="penalty C > 0 (default 1)")
    p.add_argument("--tol", type=_float, default=1e-3,
                   help="tolerance on the maximal KKT violation (default 1e-3)")
    p.add_argument("--max-iter", type=_positive_int, default=None,
                   help="iteration limit (default: the solver's own; with --solver both it "
                   "limits SMO only)")
    p.add_argument("--solver", choices=("smo", "qp", "both"), default="smo",
                   help="smo, qp, or both: SMO plus the QP challenger and their comparison")
    p.add_argument("--holdout", metavar="FILE", default=None,
                   help="held-out labelled data, scored and recorded with the run")
    p.add_argument("--trace", choices=("full", "sampled", "off"), default="full",
                   help="trace level (default full)")
    p.add_argument("--no-standardise", action="store_true",
                   help="use the features as given (default: standardise to mean 0, sd 1)")
    p.set_defaults(func=cmd_train)

    p = add("runs", "list the runs in the store", [_common()])
    p.add_argument("--status", default=None, help="only runs with this status (e.g. converged)")
    p.add_argument("--solver", default=None, help="only runs of this solver (smo, qp)")
    p.add_argument("--kernel", default=None, help="only runs with this kernel")
    p.add_argument("--fingerprint", default=None, help="only runs on data with this fingerprint")
    p.add_argument("--limit", type=_nonneg_int, default=None, help="show the newest N runs")
    p.set_defaults(func=cmd_runs)

    p = add("report", "write the audit report (HTML, PDF, JSON) for one run or a pair",
            [_common()])
    p.add_argument("runs", metavar="RUN_ID", nargs="+",
                   help="a run id, or two (primary, challenger)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default <store>/reports/<run id>)")
    p.add_argument("--format", default="html,pdf,json",
                   help="comma-separated formats (default html,pdf,json)")
    p.add_argument("--notes", default=None, help="a note printed in the report")
    p.set_defaults(func=cmd_report)

    p = add("compare", "solver-agreement verdict for two runs of the same problem",
            [_common()])
    p.add_argument("run_a", metavar="RUN_A")
    p.add_argument("run_b", metavar="RUN_B")
    p.add_argument("--holdout", metavar="FILE", default=None,
                   help="also compare decision values on this data")
    p.add_argument("--allow-mismatch", action="store_true",
                   help="compare runs of different problems (the verdict says so)")
    p.set_defaults(func=cmd_compare)

    p = add("explain", "why points became support vectors; decision breakdowns",
            [_common()])
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--point", metavar="NAME=VALUE,...", default=None,
                   help="one query point in raw units")
    p.add_argument("--query", metavar="FILE", default=None, help="query points from a data file")
    p.add_argument("--top", type=_positive_int, default=5,
                   help="support vectors listed per query (default 5)")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="write the per-point table as CSV and Parquet into DIR")
    p.add_argument("--leave-one-out", action="store_true",
                   help="exact leave-one-out error and its bounds")
    p.set_defaults(func=cmd_explain)

    p = add("replay", "rebuild a run's state at a recorded iteration", [_common()])
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--iteration", type=_nonneg_int, required=True, metavar="K",
                   help="iteration to rebuild (0 = start)")
    p.set_defaults(func=cmd_replay)

    p = add("verify", "check a run's files and, with --rerun, reproduce it", [_common()])
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("--rerun", metavar="DATAFILE", default=None,
                   help="re-run from this training data (must match the fingerprint)")
    p.add_argument("--keep", action="store_true",
                   help="store the re-run as a new run derived from RUN_ID")
    p.set_defaults(func=cmd_verify)

    p = add("score", "decision values and labels for new data", [_common()])
    p.add_argument("run", metavar="RUN_ID")
    p.add_argument("data", metavar="DATAFILE")
    p.add_argument("--label", metavar="COLUMN", default=None,
                   help="label column, if the data have one (default: the run's, if present)")
    p.add_argument("--out", metavar="FILE", default=None, help="write row, value, label as CSV")
    p.set_defaults(func=cmd_score)

    p = add("demo", "run the full audit on invented tablet-coating QC data", [_common()])
    p.set_defaults(func=cmd_demo)
    return top


def _version() -> str:
    from solver import __version__

    return f"kktrace {__version__}"


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return " ".join(text.split())


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``kktrace`` command; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    from solver import KktraceError

    try:
        return int(args.func(args))
    except BrokenPipeError:
        # the reader went away (e.g. `| head`): stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except KktraceError as exc:
        print(f"kktrace: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_ERROR
    except OSError as exc:
        name = getattr(exc, "filename", None)
        what = exc.strerror or _one_line(exc)
        msg = f"{name}: {what}" if name else what
        print(f"kktrace: error: {msg}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("\nkktrace: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug, not a user mistake
        if os.environ.get("KKTRACE_DEBUG"):
            raise
        print(f"kktrace: internal error ({type(exc).__name__}: {_one_line(exc)}); "
              "rerun with KKTRACE_DEBUG=1 for the traceback", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
