"""Kernel-matrix products Q v outside the SMO loop, by the loop's own compiled kernel.

``(Q v)_i = y_i Σ_{j∈S} K(x_i, x_j) y_j v_j`` over the columns S where v ≠ 0 (the support
vectors, for a dual solution).  The built-in kernels (linear, polynomial, RBF, sigmoid)
are evaluated by :func:`solver._smo_kernels.reconstruct` — the same arithmetic as the
solver's kernel rows, four target rows per pass over the support points — which measured
2.7× faster than the numpy blocks of :meth:`solver.problem.DualProblem.q_times` at
n = 20 000, |S| = 5238, d = 20 (1.3 s against 3.6 s, one thread) and equal to them within
3.5e-13 relative.  From :data:`SPLIT_MIN_ENTRIES` entries the target rows are split over
two threads where the process may use two (n = 20 000, |S| = 7000, d = 20: 0.80 s → 0.42 s
wall); every row is still computed by one thread, so the bits do not depend on it.  Other
kernels, small products and runs with ``NUMBA_DISABLE_JIT=1`` (where the compiled loop
would run as plain Python) keep the numpy blocks.  :func:`compiled_values` gives decision
values of new rows the same way (used by :meth:`solver.model.Model.values`).
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
    F = _reconstruct(XK, sq, np.ascontiguousarray(XK[:, sv]), sq[sv],
                     np.ascontiguousarray(yb[sv]), code, gamma, offset, degree)
    return problem.y * (-F)  # F = −Kβ here (q = 0)


#: a product of at least this many kernel entries is split over two threads (when the
#: process may use two: ``KKTRACE_THREADS`` and the cores allow it)
SPLIT_MIN_ENTRIES = 1 << 22


def _reconstruct(XK: np.ndarray, sq: np.ndarray, XV: np.ndarray, sqv: np.ndarray,
                 coef: np.ndarray, code: int, gamma: float, offset: float,
                 degree: int) -> np.ndarray:
    """F = −Σ_s coef[s] K(x_t, v_s) (m,) for the columns x_t of XK, by
    :func:`solver._smo_kernels.reconstruct`; the rows split over two threads from
    :data:`SPLIT_MIN_ENTRIES` entries.  Each row is computed by one thread alone, so the
    bits are those of one thread."""
    import threading

    from . import _smo_kernels as _k
    from .smo import _threads_from_environment, available_cores

    m = XK.shape[1]
    F = np.zeros(m)
    pos = np.arange(m, dtype=np.int64)
    q = np.zeros(m)

    def part(lo: int, hi: int) -> None:
        _k.reconstruct(XK, sq, pos[lo:hi], pos[lo:hi], XV, sqv, coef, q, F, code, gamma,
                       offset, degree, np.zeros((4, _k.CHUNK)),
                       np.zeros(_k.CHUNK, dtype=np.int64))

    if (m * XV.shape[1] >= SPLIT_MIN_ENTRIES and m >= 8
            and min(available_cores(), _threads_from_environment()) >= 2):
        h = (m // 2) // 4 * 4
        helper = threading.Thread(target=part, args=(h, m))
        helper.start()
        part(0, h)
        helper.join()
    else:
        part(0, m)
    return F


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
    return -_reconstruct(XK, sq, XV, sqv, np.ascontiguousarray(coef, dtype=np.float64), code,
                         gamma, offset, degree)


def use_compiled(n: int, support: int) -> bool:
    """True when a product of n rows over ``support`` columns should be compiled.  By size
    only, so that every process computes the same product the same way (the two ways
    differ in the last bits)."""
    import os

    if os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0"):
        return False
    return n * support >= COMPILED_MIN_ENTRIES
