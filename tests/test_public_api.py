"""The public surface in ``solver/__init__.py``: every name resolves and is documented,
the workflow names match the CLI's subcommands, and the CLI uses only the public API."""

from __future__ import annotations

import ast
import importlib
import inspect
import re
import subprocess
import sys
from pathlib import Path

import pytest

import solver

ROOT = Path(__file__).resolve().parents[1]
PUBLIC = [n for n in solver.__all__ if n != "__version__"]


@pytest.mark.parametrize("name", PUBLIC)
def test_every_public_name_resolves_and_has_a_docstring(name):
    obj = getattr(solver, name)
    doc = inspect.getdoc(obj)
    assert doc and len(doc.strip()) > 10, f"solver.{name} has no docstring"


def test_all_is_sorted_into_known_names_without_duplicates():
    assert len(solver.__all__) == len(set(solver.__all__))
    assert set(dir(solver)) >= set(solver.__all__)
    with pytest.raises(AttributeError):
        solver.no_such_name  # noqa: B018


#: commands whose public function has another name
_COMMAND_FUNCTIONS = {"demo": "run_demo", "export": "export_onnx", "keys": "new_signing_keys",
                      "clean": "clean_store"}


def test_workflow_names_are_the_cli_subcommands():
    from solver.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    commands = set(sub.choices)
    assert {"train", "runs", "report", "compare", "explain", "replay", "verify", "apply",
            "demo", "export", "challenge"} <= commands
    for name in commands:
        assert callable(getattr(solver, _COMMAND_FUNCTIONS.get(name, name), None)), name


def test_options_use_our_own_names():
    """Issue 13 item 12: the KKT tolerance, the iteration limit and the apply command have
    our own names; the old spellings are gone from the command line and the Python API."""
    import inspect as _inspect

    from solver.cli import build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "command")
    train = {s for a in sub.choices["train"]._actions for s in a.option_strings}
    assert {"--kkt-tol", "--iteration-limit"} <= train
    assert not {"--tol", "--max-iter"} & train
    assert "score" not in sub.choices and "apply" in sub.choices
    for fn in (solver.train, solver.solve):
        params = set(_inspect.signature(fn).parameters)
        assert not {"tol", "max_iter", "cache_mb", "tau"} & params, fn
    from solver.smo import solve_smo

    params = set(_inspect.signature(solve_smo).parameters)
    assert {"kkt_tol", "iteration_limit", "row_cache_mb"} <= params


def test_workflow_names_are_functions_not_submodules():
    """``compare``, ``explain``, ``report`` are API functions, not shadowed by submodules.

    The implementations live in ``solver.agreement``, ``solver.explanation``,
    ``solver.reporting``.
    """
    import solver.agreement
    import solver.explanation
    import solver.reporting  # noqa: F401

    for name in ("compare", "explain", "report"):
        assert inspect.isfunction(getattr(solver, name)), name
        assert getattr(solver, name).__module__ == "solver.api"
        assert f"solver.{name}" not in sys.modules


def test_import_solver_is_light():
    """Importing the package must not pull in the heavy backends (numba, cvxopt, matplotlib)."""
    code = ("import sys, solver; solver.KktraceError; "
            "print(','.join(m for m in ('numba','cvxopt','matplotlib','pyarrow') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    assert out.stdout.strip() == ""


def test_cli_imports_only_the_public_api():
    """Every module of the ``solver.cli`` package imports only ``solver`` (and its own siblings)."""
    files = sorted((ROOT / "solver" / "cli").glob("*.py"))
    assert len(files) >= 3
    used: set[str] = set()
    for path in files:
        text = path.read_text(encoding="utf-8")
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, ast.ImportFrom):
                if node.level:
                    assert node.level == 1, f"{path.name}: import from outside solver.cli"
                    continue
                if (node.module or "").split(".")[0] == "solver":
                    assert node.module in ("solver", "solver.cli"), \
                        f"{path.name} imports {node.module}"
            elif isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name.split(".")[0] == "solver":
                        assert alias.name == "solver", f"{path.name} imports {alias.name}"
        used |= set(re.findall(r"\bsolver\.([A-Za-z_]+)", text))
    # every solver.<name> the CLI uses is public (``solver.cli`` itself aside)
    used.discard("cli")
    assert used <= set(solver.__all__), used - set(solver.__all__)


def test_no_library_module_imports_the_cli():
    for path in (ROOT / "solver").rglob("*.py"):
        if "cli" in path.relative_to(ROOT / "solver").parts:
            continue
        assert "solver.cli" not in path.read_text(encoding="utf-8"), path


def test_notebook_uses_only_the_public_api():
    import json

    nb = json.loads((ROOT / "notebooks" / "audit_walkthrough.ipynb").read_text(encoding="utf-8"))
    code = "\n".join("".join(c["source"]) for c in nb["cells"] if c["cell_type"] == "code")
    for line in code.splitlines():
        m = re.match(r"\s*(?:from|import)\s+(solver[\w.]*)", line)
        if m:
            assert m.group(1) == "solver", line
    used = set(re.findall(r"\bsolver\.([A-Za-z_]+)", code))
    assert used <= set(solver.__all__), used - set(solver.__all__)


def test_api_module_docstrings_and_keyword_only_options():
    api = importlib.import_module("solver.api")
    for name in api.__all__:
        obj = getattr(api, name)
        if inspect.isfunction(obj):
            assert inspect.getdoc(obj), name
            params = list(inspect.signature(obj).parameters.values())
            # options after the leading data / run arguments are keyword-only
            positional = [p for p in params if p.kind in (p.POSITIONAL_ONLY,
                                                          p.POSITIONAL_OR_KEYWORD)]
            assert len(positional) <= 3, (name, positional)


# Names that belong to other programs' interfaces and must not appear in our files.
_FORBIDDEN = ["dual_coef_", "support_vectors_", "n_support_", "intercept_", "coef0",
              "decision_function", "predict_proba", "nSV", "nBSV", "svm_type", "kernel_type",
              "total_sv", "nr_class", "nr_sv", "probA", "probB", "fit_status_",
              "optimization finished", "#iter", "obj = ", "gamma='scale'"]
_OWNED = sorted(
    str(p.relative_to(ROOT))
    for pattern in ("solver/**/*.py", "solver/**/*.json", "solver/**/*.css", "notebooks/*.ipynb")
    for p in ROOT.glob(pattern)
) + ["README.md", "DEVELOPERS.md", "traces/README.md"]


#: the ONNX standard's own operator / attribute names, allowed only in the ONNX codec
_ONNX_STANDARD = {"kernel_type"}
_ONNX_CODEC = "solver/exchange/onnx_codec.py"


@pytest.mark.parametrize("rel", _OWNED)
def test_owned_files_use_our_own_vocabulary(rel):
    text = (ROOT / rel).read_text(encoding="utf-8")
    for word in _FORBIDDEN:
        if rel == _ONNX_CODEC and word in _ONNX_STANDARD:
            continue
        assert word not in text, f"{rel} contains {word!r}"
    # our own attribute names never end in an underscore (numpy/pyarrow's own names excepted)
    ours = re.sub(r"\b(np|pa)\.(bool_|ix_)", "", text.replace("__", ""))
    assert not re.search(r"\.[a-z][a-z0-9_]*[a-z0-9]_\b", ours), rel
