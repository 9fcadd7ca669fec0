"""The grid of a study: C × γ (× degree for the polynomial kernel, × ε for ε-regression),
or ν × γ for one-class (which has no C), validated up front."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from ..errors import InvalidInputError

__all__ = ["Cell", "Grid", "make_grid", "parse_values"]

#: kernels whose γ is a grid axis (the linear kernel has none)
_GAMMA_KERNELS = ("rbf", "poly", "sigmoid")


@dataclass(frozen=True)
class Cell:
    """One grid cell: penalty C (> 0; None for one-class), kernel γ (> 0, None for the
    linear kernel), degree (poly only, else None), ε (regression only: half-width of the
    tube, target units) and ν (one-class only, 0 < ν ≤ 1)."""

    C: float | None
    gamma: float | None
    degree: int | None
    epsilon: float | None = None
    nu: float | None = None

    @property
    def label(self) -> str:
        """How tables and messages name the cell, e.g. ``C=1 gamma=0.1``."""
        parts = [] if self.C is None else [f"C={self.C:g}"]
        if self.nu is not None:
            parts.append(f"nu={self.nu:g}")
        if self.gamma is not None:
            parts.append(f"gamma={self.gamma:g}")
        if self.degree is not None:
            parts.append(f"degree={self.degree}")
        if self.epsilon is not None:
            parts.append(f"epsilon={self.epsilon:g}")
        return " ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        """Plain data."""
        out: dict[str, Any] = {"C": self.C, "gamma": self.gamma, "degree": self.degree}
        if self.epsilon is not None:
            out["epsilon"] = self.epsilon
        if self.nu is not None:
            out["nu"] = self.nu
        return out

    @classmethod
    def of(cls, d: Any) -> Cell:
        """The cell of its plain data (:meth:`to_dict`)."""
        return cls(d["C"], d["gamma"], d["degree"], d.get("epsilon"), d.get("nu"))


@dataclass(frozen=True)
class Grid:
    """The axes of a study grid, each sorted ascending and free of repeats (an axis the
    task does not have is ``(None,)``)."""

    kernel: str
    C: tuple[float | None, ...]
    gamma: tuple[float | None, ...]
    degree: tuple[int | None, ...]
    epsilon: tuple[float | None, ...] = (None,)
    nu: tuple[float | None, ...] = (None,)

    def cells(self) -> list[Cell]:
        """Every cell, γ-major then degree then ε, then C (or ν) ascending innermost: the
        order warm starts walk."""
        return [Cell(c, g, d, e, v) for g in self.gamma for d in self.degree
                for e in self.epsilon for c in self.C for v in self.nu]

    def to_dict(self) -> dict[str, Any]:
        """Plain data (stored in the study's manifest)."""
        out = {"kernel": self.kernel, "C": list(self.C), "gamma": list(self.gamma),
               "degree": list(self.degree), "cells": len(self.cells())}
        if self.epsilon != (None,):
            out["epsilon"] = list(self.epsilon)
        if self.nu != (None,):
            out["nu"] = list(self.nu)
        return out


def parse_values(text: str, name: str) -> list[float]:
    """Comma-separated numbers → list; a clear error naming the option otherwise."""
    if not isinstance(text, str) or not text.strip():
        raise InvalidInputError(f"the grid of {name} is empty; give values such as 0.1,1,10")
    out = []
    for part in text.split(","):
        p = part.strip()
        if not p:
            raise InvalidInputError(f"the grid of {name} has an empty entry in {text!r}")
        try:
            out.append(float(p))
        except ValueError:
            raise InvalidInputError(f"the grid of {name}: {p!r} is not a number") from None
    return out


def _axis(values: Any, name: str, *, integer: bool = False,
          at_most: float | None = None) -> tuple[Any, ...]:
    if values is None:
        raise InvalidInputError(f"the grid of {name} is empty; give at least one value")
    if isinstance(values, str):
        values = parse_values(values, name)
    if isinstance(values, (int, float)):
        values = [values]
    vals = list(values)
    if not vals:
        raise InvalidInputError(f"the grid of {name} is empty; give at least one value")
    out: list[Any] = []
    for v in vals:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise InvalidInputError(f"the grid of {name}: {v!r} is not a finite number")
        if v <= 0:
            raise InvalidInputError(f"the grid of {name}: {v!r} is not > 0 (every {name} "
                                    "must be a positive number)")
        if at_most is not None and v > at_most:
            raise InvalidInputError(f"the grid of {name}: {v!r} is above {at_most:g} "
                                    f"(every {name} must lie in (0, {at_most:g}])")
        if integer:
            if float(v) != int(v):
                raise InvalidInputError(f"the grid of {name}: {v!r} is not a whole number")
            v = int(v)
        else:
            v = float(v)
        out.append(v)
    if len(set(out)) != len(out):
        raise InvalidInputError(f"the grid of {name} repeats a value: {out}")
    return tuple(sorted(out))


def make_grid(kernel: str, C: Sequence[float] | str | None,
              gamma: Sequence[float] | str | None = None,
              degree: Sequence[int] | str | None = None, *,
              epsilon: Sequence[float] | str | None = None,
              nu: Sequence[float] | str | None = None) -> Grid:
    """Validated :class:`Grid`: every axis non-empty, every value finite and > 0.

    ``gamma`` is required for the ``rbf``, ``poly`` and ``sigmoid`` kernels and refused for
    ``linear``; ``degree`` belongs to ``poly`` (default (3,)).  ``epsilon`` (regression)
    adds an ε axis; ``nu`` (one-class, each in (0, 1]) replaces the C axis, so ``C`` must
    then be None.
    """
    from .._workflow import KERNEL_CHOICES

    if kernel not in KERNEL_CHOICES:
        raise InvalidInputError(f"unknown kernel {kernel!r}; choose one of "
                                f"{', '.join(KERNEL_CHOICES)}")
    if nu is not None:
        if C is not None:
            raise InvalidInputError("a one-class study has no C: its grid is nu x gamma; "
                                    "drop --C")
        cs: tuple[float | None, ...] = (None,)
        nus: tuple[float | None, ...] = _axis(nu, "nu", at_most=1.0)
    else:
        cs = _axis(C, "C")
        nus = (None,)
    eps: tuple[float | None, ...] = (None,) if epsilon is None else _axis(epsilon, "epsilon")
    if kernel in _GAMMA_KERNELS:
        gs: tuple[float | None, ...] = _axis(gamma, "gamma")
    elif gamma is not None:
        raise InvalidInputError(f"the {kernel} kernel has no gamma; drop --gamma")
    else:
        gs = (None,)
    if kernel == "poly":
        ds: tuple[int | None, ...] = _axis(degree if degree is not None else [3], "degree",
                                           integer=True)
    elif degree is not None:
        raise InvalidInputError(f"degree belongs to the poly kernel, not {kernel}")
    else:
        ds = (None,)
    return Grid(kernel=kernel, C=cs, gamma=gs, degree=ds, epsilon=eps, nu=nus)
