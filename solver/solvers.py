"""Registry of solvers: name → solve function with the common contract (see DEVELOPERS.md)."""

from __future__ import annotations

from collections.abc import Callable
from importlib import import_module
from typing import Any

from .errors import InvalidInputError
from .problem import DualProblem
from .result import SolveResult

__all__ = ["SOLVERS", "SOLVER_METHODS", "get_solver", "solve"]

#: name → "module:function"; imported on first use so that numba / cvxopt load only when needed.
SOLVERS: dict[str, str] = {
    "smo": "solver.smo:solve_smo",
    "qp": "solver.qp:solve_qp",
}
#: name → the family of method, as outputs describe it ("working-set": one pair of
#: multipliers per iteration; "interior-point": every multiplier every iteration).
SOLVER_METHODS: dict[str, str] = {"smo": "working-set", "qp": "interior-point"}


def get_solver(name: str) -> Callable[..., SolveResult]:
    """The solve function registered under ``name``."""
    target = SOLVERS.get(name)
    if target is None:
        raise InvalidInputError(f"unknown solver {name!r}; choose one of {', '.join(SOLVERS)}")
    module, func = target.split(":")
    return getattr(import_module(module), func)


def solve(problem: DualProblem, *, method: str = "smo", **options: Any) -> SolveResult:
    """Solve ``problem`` with the registered solver ``method``.

    ``options`` are that solver's keyword options.
    """
    return get_solver(method)(problem, **options)
