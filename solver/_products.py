"""Kernel-matrix products Q v outside the SMO loop, by the loop's own compiled kernel.

``(Q v)_i = y_i Σ_{j∈S} K(x_i, x_j) y_j v_j`` over the columns S where v ≠ 0 (the support
vectors, for a dual solution).  The built-in kernels (linear, polynomial, RBF, sigmoid)
are evaluated by :func:`solver._smo_kernels.reconstruct` — the same arithmetic as the
solver's kernel rows, four target rows per pass over the support points — which measured
2.7× faster than the numpy blocks of :meth:`solver.problem.DualProblem.q_times` at
n = 20 000, |S| = 5238, d = 20 (1.3 s against 3.6 s, one thread) and equal to them within
3.5e-13 relative.  Other kernels, small products and runs with ``NUMBA_DISABLE_JIT=1``
(where the compiled loop would run as plain Python) keep the numpy blocks.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .problem import DualProblem

__all__ = ["kernel_code", "compiled_q_times", "compiled_values", "use_compiled",
           "COMPILED_MIN_ENTRIES"]

#: n · |S| from which :meth:`DualProblem.q_times` uses the compiled product (below it the
#: numpy blocks cost less than loading the compiled code).
COMPILED_MIN_ENTRIES = 4_000_000


def kernel_code(kernel: Any) -> tuple[int, float, float, int]:
    """(code, gamma, offset, degree) of kernels the compiled code evaluates itself."""
    from . import _smo_kernels as _k
    from .kernels import LinearKernel, PolynomialKernel, RBFKernel, SigmoidKernel

    if isinstance(kernel, RBFKernel):
        return _k.KERNEL_RBF, float(kernel.gamma), 0.0, 1
    if isinstance(kernel, PolynomialKernel):
        return _k.KERNEL_POLY, float(kernel.gamma), float(kernel.offset), int(kernel.degree)
    if isinstance(kernel, SigmoidKernel):
        return _k.KERNEL_SIGMOID, float(kernel.gamma), float(kernel.offset), 1
    if isinstance(kernel, LinearKernel):
        return _k.KERNEL_LINEAR, 0.0, 0.0, 1
    return _k.KERNEL_EXTERNAL, 0.0, 0.0, 1


def compiled_q_times(problem: DualProblem, v: np.ndarray) -> np.ndarray | None:
    """Q v (n,) by the compiled kernel, or None when the kernel is not a built-in one."""
    from . import _smo_kernels as _k

    code, gamma, offset, degree = kernel_code(problem.kernel)
    if code == _k.KERNEL_EXTERNAL:
        return None
    v = np.asarray(v, dtype=np.float64)
    sv = np.flatnonzero(v != 0.0)
    if sv.size == 0:
        return np.zeros(problem.n)
    yb = problem.y * v
    XK = np.array(problem.features().T, order="C")
    sq = np.zeros(problem.n)
    _k.self_dots(XK, sq)
    F = np.zeros(problem.n)
    allpos = np.arange(problem.n, dtype=np.int64)
    _k.reconstruct(XK, sq, allpos, allpos, np.ascontiguousarray(XK[:, sv]), sq[sv],
                   np.ascontiguousarray(yb[sv]), np.zeros(problem.n), F, code, gamma, offset,
                   degree, np.zeros((4, _k.CHUNK)), np.zeros(_k.CHUNK, dtype=np.int64))
    return problem.y * (-F)  # F = −Kβ here (q = 0)


def compiled_values(kernel: Any, Z: np.ndarray, points: np.ndarray,
                    coef: np.ndarray) -> np.ndarray | None:
    """Σ_s coef[s] K(z_i, points[s]) (m,) for rows z_i of ``Z`` (m, d) by the compiled
    kernel, or None when the kernel is not a built-in one."""
    from . import _smo_kernels as _k

    code, gamma, offset, degree = kernel_code(kernel)
    if code == _k.KERNEL_EXTERNAL:
        return None
    m = Z.shape[0]
    XK = np.array(np.asarray(Z, dtype=np.float64).T, order="C")
    XV = np.array(np.asarray(points, dtype=np.float64).T, order="C")
    sq, sqv = np.zeros(m), np.zeros(XV.shape[1])
    _k.self_dots(XK, sq)
    _k.self_dots(XV, sqv)
    F = np.zeros(m)
    pos = np.arange(m, dtype=np.int64)
    _k.reconstruct(XK, sq, pos, pos, XV, sqv, np.ascontiguousarray(coef, dtype=np.float64),
                   np.zeros(m), F, code, gamma, offset, degree, np.zeros((4, _k.CHUNK)),
                   np.zeros(_k.CHUNK, dtype=np.int64))
    return -F  # F = −q − Σ coef K with q = 0


def use_compiled(n: int, support: int) -> bool:
    """True when a product of n rows over ``support`` columns should be compiled.  By size
    only, so that every process computes the same product the same way (the two ways
    differ in the last bits)."""
    import os

    if os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0"):
        return False
    return n * support >= COMPILED_MIN_ENTRIES
