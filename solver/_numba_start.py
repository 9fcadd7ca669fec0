"""How a kktrace command process starts numba (no numba import here).

numba's first compiled call imports ``scipy.linalg`` to look for a BLAS for numba's own
``np.dot`` and linear algebra in compiled code (``numba.np.arraymath._check_blas``); that
import took 0.38–0.45 s of every ``kktrace train`` here, and kktrace's compiled code calls
no BLAS.  The kktrace command sets :data:`SKIP_BLAS_PROBE` (in its entry point) so that the
probe fails at once; a library user's process is left alone, since their own compiled code
may need numba's BLAS.
"""

from __future__ import annotations

import sys

#: set by the ``kktrace`` command before anything imports numba
SKIP_BLAS_PROBE = False


def prepare_numba() -> None:
    """Import numba's array maths with the BLAS probe failing, when :data:`SKIP_BLAS_PROBE`
    is set and neither numba's array maths nor ``scipy.linalg`` is loaded yet."""
    if (not SKIP_BLAS_PROBE or "numba.np.arraymath" in sys.modules
            or "scipy.linalg" in sys.modules):
        return
    sys.modules["scipy.linalg"] = None  # type: ignore[assignment]  # import fails at once
    try:
        import numba.np.arraymath  # noqa: F401
    finally:
        del sys.modules["scipy.linalg"]
