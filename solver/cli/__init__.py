"""The ``kktrace`` command: one module per command group, assembled here.

Uses only the public API in :mod:`solver`.  Exit codes: 0 success, 1 user or data error
(one line on stderr naming the problem), 2 usage error, 3 a solver did not converge (the
run is still stored and marked), 4 internal error (a bug; set ``KKTRACE_DEBUG=1`` for the
traceback).  Nothing here is imported by the library.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from collections.abc import Callable, Sequence
from importlib import import_module
from typing import TextIO

from ._shared import (
    EXIT_ERROR,
    EXIT_INTERNAL,
    EXIT_OK,
    EXIT_TEXT,
    Formatter,
)

#: command modules, in the order their commands are listed by ``kktrace --help``
COMMAND_MODULES = ("train", "inspect", "compare", "explain", "verify", "apply", "report",
                   "exchange", "upkeep", "diagnose", "study")


def build_parser() -> argparse.ArgumentParser:
    """The ``kktrace`` argument parser (long options only)."""
    top = argparse.ArgumentParser(
        prog="kktrace", add_help=False, allow_abbrev=False, formatter_class=Formatter,
        description="Auditable SVM training: SMO with per-iteration traces, an independent "
        "QP challenger, convergence certificates, support-vector explanations and reports.",
        epilog="examples:\n  kktrace demo\n  kktrace train data.csv --label outcome "
        "--solver both\n  kktrace runs\n  kktrace report RUN_ID\n\n"
        "run 'kktrace COMMAND --help' for a command's options.\n\n" + EXIT_TEXT,
    )
    top.add_argument("--help", action="help", help="show this help and exit")
    top.add_argument("--version", action="version", version=_version(),
                     help="show the kktrace version and exit")
    sub = top.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMAND_MODULES:
        import_module(f"{__name__}.{name}").register(sub)
    return top


def _version() -> str:
    from solver import __version__

    return f"kktrace {__version__}"


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return " ".join(text.split())


def _warning_printer() -> Callable[..., None]:
    """``warnings.showwarning`` for the command: each warning once, as one line on stderr
    in the tool's words (no source lines, no file positions)."""
    shown: set[str] = set()

    def show(message: Warning | str, category: type[Warning], filename: str, lineno: int,
             file: TextIO | None = None, line: str | None = None) -> None:
        text = _one_line(message if isinstance(message, BaseException) else Warning(message))
        if text not in shown:
            shown.add(text)
            print(f"kktrace: warning: {text}", file=sys.stderr)

    return show


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``kktrace`` command; returns the exit status."""
    from solver import _numba_start

    _numba_start.SKIP_BLAS_PROBE = True  # this process runs only kktrace's compiled code
    parser = build_parser()
    args = parser.parse_args(argv)
    from solver import KktraceError

    try:
        with warnings.catch_warnings():
            warnings.showwarning = _warning_printer()
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
