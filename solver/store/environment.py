"""The computing environment recorded in every manifest (versions, platform, CPU, BLAS)."""

from __future__ import annotations

import functools
import os
import platform
import sys
from importlib import metadata
from typing import Any

__all__ = ["environment"]

_PACKAGES = ("numpy", "scipy", "numba", "llvmlite", "cvxopt", "pyarrow")


def _version(dist: str) -> str | None:
    try:
        return metadata.version(dist)
    except metadata.PackageNotFoundError:
        return None


def _cpu_model() -> str | None:
    """The first ``model name`` line of /proc/cpuinfo (Linux), else :func:`platform.processor`."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or None


def _blas() -> list[dict[str, Any]]:
    """BLAS / OpenMP libraries in use: threadpoolctl when installed, else numpy's build info."""
    try:
        import threadpoolctl

        found = []
        for lib in threadpoolctl.threadpool_info():
            found.append({
                "api": lib.get("internal_api"),
                "version": lib.get("version"),
                "threads": lib.get("num_threads"),
                "library": os.path.basename(str(lib.get("filepath", ""))),
                "architecture": lib.get("architecture"),
                "source": "threadpoolctl",
            })
        if found:
            return found
    except Exception:  # best effort; the numpy build info below still answers
        pass
    try:
        import numpy as np

        cfg = np.show_config(mode="dicts")
        deps = cfg.get("Build Dependencies", {})
        return [{"api": k, "name": deps[k].get("name"), "version": deps[k].get("version"),
                 "source": "numpy build configuration"} for k in ("blas", "lapack") if k in deps]
    except Exception:
        return []


@functools.lru_cache(maxsize=1)
def _static() -> dict[str, Any]:
    return {
        "python": sys.version.split()[0],
        "python_implementation": platform.python_implementation(),
        "packages": {p: _version(p) for p in _PACKAGES},
        "platform": platform.platform(),
        "machine": platform.machine(),
        "cpu_model": _cpu_model(),
        "cpu_count": os.cpu_count(),
        "byte_order": sys.byteorder,
        "blas": _blas(),
    }


def environment() -> dict[str, Any]:
    """Plain-data description of this process's environment (computed once per process).

    Keys: ``python``, ``python_implementation``, ``packages`` (name → version or None),
    ``platform``, ``machine``, ``cpu_model``, ``cpu_count``, ``byte_order``, ``blas``
    (list of libraries with api, version, threads), ``numba_disable_jit``.
    """
    env = dict(_static())
    env["packages"] = dict(env["packages"])
    env["blas"] = [dict(b) for b in env["blas"]]
    env["numba_disable_jit"] = os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0")
    return env
