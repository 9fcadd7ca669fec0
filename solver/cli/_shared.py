"""Output helpers, argument types and the common options shared by every command module."""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from collections.abc import Mapping, Sequence
from typing import Any, TextIO

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_NOT_CONVERGED, EXIT_INTERNAL = 0, 1, 2, 3, 4

EXIT_TEXT = """exit status:
  0  success
  1  user or data error (one line on stderr names the problem)
  2  usage error (unknown option, missing argument)
  3  a solver stopped before its optimality test was met (the run is stored, marked)
  4  internal error (a bug: rerun with KKTRACE_DEBUG=1 to see the traceback)"""

STORE_HELP = "run store directory (default: $KKTRACE_STORE, else ./traces)"


def clean(v: Any) -> Any:
    """JSON-safe copy: non-finite floats become null, numpy values become Python values."""
    import solver

    return solver.to_plain(v, nonfinite_as_none=True)


def emit_json(obj: Any, out: TextIO) -> None:
    out.write(json.dumps(clean(obj), indent=2, allow_nan=False, default=str) + "\n")


def num(v: Any, spec: str | None = None) -> str:
    """A figure for the terminal: by default :func:`solver.vocabulary.figure_text`, the one
    display form the HTML and PDF reports use too; ``spec`` (a format spec) only for a
    fixed-point share or score (``.3f``) or a full-precision reproduction (``.10g``)."""
    if v is None:
        return "n/a"
    if spec is None and isinstance(v, (int, float)) and not isinstance(v, bool):
        import solver

        return solver.figure_text(v)
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    try:
        return format(v, spec)
    except (TypeError, ValueError):
        return str(v)


def to_dict(obj: Any) -> dict[str, Any]:
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


def kv_lines(d: Mapping[str, Any], indent: str = "  ", skip: Sequence[str] = ()) -> list[str]:
    lines = []
    for k, v in d.items():
        if k in skip:
            continue
        if isinstance(v, Mapping):
            lines.append(f"{indent}{k}:")
            lines.extend(kv_lines(v, indent + "  "))
        elif isinstance(v, (list, tuple)) and len(v) > 8:
            lines.append(f"{indent}{k}: [{len(v)} values]")
        else:
            lines.append(f"{indent}{k}: {num(v) if isinstance(v, float) else v}")
    return lines


class Progress:
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
            line = f"leave-one-out refits {bar(done / total)} {done}/{total}"
        else:
            return
        self._draw(line)

    def _solve_line(self, info: Mapping[str, Any]) -> str:
        it = info.get("iteration")
        v, kkt_tol = info.get("violation"), info.get("kkt_tol")
        text = f"{info.get('solver', 'solver')} iteration {it if it is not None else '?'}"
        frac = None
        if isinstance(v, (int, float)) and isinstance(kkt_tol, (int,
                                                                float)) and v > 0 and kkt_tol > 0:
            if self.first_violation is None or v > self.first_violation:
                self.first_violation = max(float(v), float(kkt_tol) * 10)
            span = math.log(self.first_violation / kkt_tol)
            frac = 1.0 if v <= kkt_tol else max(0.0, math.log(self.first_violation / v) / span)
            text += f"  violation {num(float(v))} (kkt_tol {num(float(kkt_tol))})"
        elif isinstance(info.get("gap"), (int, float)):
            text += f"  gap {num(float(info['gap']))}"
        return (f"{bar(frac)} " if frac is not None else "") + text

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


def bar(frac: float, width: int = 24) -> str:
    k = int(round(max(0.0, min(1.0, frac)) * width))
    return "[" + "=" * k + " " * (width - k) + "]"


def progress(args: argparse.Namespace) -> Progress:
    return Progress(sys.stderr, enabled=not args.quiet and sys.stderr.isatty())


def print_rows(rows: Sequence[Sequence[str]], indent: str = "  ") -> None:
    widths = [max(len(r[j]) for r in rows) for j in range(len(rows[0]))]
    for r in rows:
        print(indent + "  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)).rstrip())


def cell(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return num(v)
    if isinstance(v, Mapping):
        return str(v.get("name", v))
    return str(v)


class Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=30, width=100)


def common_options(json_flag: bool = True, store: bool = True) -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(add_help=False, allow_abbrev=False)
    g = p.add_argument_group("common options")
    if store:
        g.add_argument("--store", metavar="DIR", default=None, help=STORE_HELP)
    if json_flag:
        g.add_argument("--json", action="store_true", help="print machine-readable JSON")
    g.add_argument("--quiet", action="store_true", help="no progress bar")
    g.add_argument("--help", action="help", help="show this help and exit")
    return p


def positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}")
    return v


def nonneg_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a non-negative integer, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative integer, got {text!r}")
    return v


def float_arg(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None




def add_command(sub: Any, name: str, helptext: str, examples: str,
                parents: Sequence[argparse.ArgumentParser] | None = None,
                ) -> argparse.ArgumentParser:
    """Add one sub-command with the shared formatter, help flag and exit-status epilog."""
    return sub.add_parser(
        name, help=helptext, description=helptext, add_help=False, allow_abbrev=False,
        parents=list(parents) if parents is not None else [common_options()],
        formatter_class=Formatter, epilog=examples + "\n\n" + EXIT_TEXT,
    )


def names_arg(text: str) -> list[str]:
    """``COL,COL,...``: column names separated by commas (surrounding spaces removed)."""
    names = [c.strip() for c in text.split(",")]
    if not all(names):
        raise argparse.ArgumentTypeError(
            f"expected column names separated by commas, got {text!r}")
    return names


def delimiter_arg(text: str) -> str:
    """One delimiter character; ``tab`` or ``\\t`` for a tab."""
    return "\t" if text in ("tab", "\\t") else text


def add_column_options(p: argparse.ArgumentParser, what: str) -> None:
    """``--features``, ``--ignore`` and ``--delimiter`` for the data file ``what``."""
    g = p.add_argument_group(f"columns of {what}")
    g.add_argument("--features", metavar="COL,...", type=names_arg, default=None,
                   help="feature columns (default: every column but the label)")
    g.add_argument("--ignore", metavar="COL,...", type=names_arg, default=None,
                   help="columns to leave out (e.g. an ID column)")
    g.add_argument("--delimiter", metavar="CHAR", type=delimiter_arg, default=None,
                   help="CSV delimiter, e.g. ';' or tab (default: detected)")


def column_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """The API keywords of :func:`add_column_options`."""
    return {"feature_columns": args.features, "ignore_columns": args.ignore,
            "delimiter": args.delimiter}

