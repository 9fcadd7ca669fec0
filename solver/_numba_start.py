"""How a kktrace command process starts numba (no numba import here).

numba's first compiled call imports ``scipy.linalg`` to look for a BLAS for numba's own
``np.dot`` and linear algebra in compiled code (``numba.np.arraymath._check_blas``); that
import took 0.38–0.45 s of every ``kktrace train`` here, and kktrace's compiled code calls
no BLAS.  The kktrace command sets :data:`SKIP_BLAS_PROBE` (in its entry point) so that the
probe fails at once; a library user's process is left alone, since their own compiled code
may need numba's BLAS.

Likewise numba's first compiled call imports ``cffi`` (where it is installed) to type cffi
functions, and building ``cffi.FFI()`` imports pycparser and its lexer tables: 0.07 s of
every command here.  kktrace passes no cffi objects to compiled code, so the kktrace
command loads numba's cffi typing module with ``cffi`` hidden (that module then records
cffi as unavailable); ``cffi`` itself stays importable for everything else.
"""

from __future__ import annotations

import sys

#: set by the ``kktrace`` command before anything imports numba
SKIP_BLAS_PROBE = False


def prepare_numba() -> None:
    """Import numba's array maths with the BLAS probe failing and numba's cffi typing
    without cffi, when :data:`SKIP_BLAS_PROBE` is set and none of numba's array maths,
    ``scipy.linalg``, numba's cffi typing or ``cffi`` is loaded yet."""
    if (not SKIP_BLAS_PROBE or "numba.np.arraymath" in sys.modules
            or "scipy.linalg" in sys.modules):
        return
    hide = [m for m in ("scipy.linalg", "cffi") if m not in sys.modules]
    for m in hide:
        sys.modules[m] = None  # type: ignore[assignment]  # its import fails at once
    try:
        import numba.np.arraymath  # noqa: F401
        if "cffi" in hide:
            import numba.core.typing.cffi_utils  # noqa: F401
    finally:
        for m in hide:
            del sys.modules[m]
