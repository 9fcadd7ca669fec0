"""Start-up stays light: ``kktrace --help`` and ``kktrace runs`` import no heavy backend.

Checks which modules a fresh interpreter holds after the command (``sys.modules``); it does
not time anything (speed lives in ``tests/benchmarks/bench_train.py``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("numba", "scipy", "cvxopt", "matplotlib", "pyarrow")

PROBE = """
import json, sys
sys.argv = ["kktrace"] + sys.argv[1:]
from solver.cli import main
try:
    main()
except SystemExit:
    pass
sys.stderr.write("\\nLOADED " + json.dumps(sorted(m for m in {heavy!r} if m in sys.modules)))
"""


def _loaded_after(*args: str, cwd: Path) -> list[str]:
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    proc = subprocess.run([sys.executable, "-c", PROBE.format(heavy=HEAVY), *args],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=120)
    line = [x for x in proc.stderr.splitlines() if x.startswith("LOADED ")]
    assert line, proc.stderr[-800:]
    return json.loads(line[-1][len("LOADED "):])


@pytest.fixture(scope="module")
def store_with_a_run(tmp_path_factory) -> Path:
    """A store holding one small run made by ``kktrace train``, so ``runs`` lists a row."""
    folder = tmp_path_factory.mktemp("startup")
    rng = np.random.default_rng(7)
    X = rng.normal(size=(40, 3))
    y = np.where(X[:, 0] + 0.3 * rng.normal(size=40) > 0, 1, 0)
    path = folder / "small.csv"
    np.savetxt(path, np.column_stack([X, y]), delimiter=",", header="a,b,c,label",
               comments="", fmt="%.10g")
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    proc = subprocess.run([sys.executable, "-m", "solver.cli", "train", str(path), "--label",
                           "label", "--store", str(folder / "store"), "--quiet"],
                          capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return folder


@pytest.mark.parametrize("args", [("--help",), ("train", "--help"), ("runs", "--help")])
def test_help_imports_no_heavy_backend(args, tmp_path):
    assert _loaded_after(*args, cwd=tmp_path) == []


@pytest.mark.parametrize("extra", [(), ("--json",)])
def test_runs_imports_no_heavy_backend(store_with_a_run, extra):
    store = store_with_a_run / "store"
    loaded = _loaded_after("runs", "--store", str(store), *extra, cwd=store_with_a_run)
    assert loaded == []


def test_runs_probe_sees_the_run(store_with_a_run):
    """The probe above really lists a run (so the empty module list is not vacuous)."""
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    proc = subprocess.run([sys.executable, "-m", "solver.cli", "runs", "--store",
                           str(store_with_a_run / "store"), "--json"],
                          capture_output=True, text=True, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert len(json.loads(proc.stdout)) >= 1


def test_train_skips_numbas_blas_probe(store_with_a_run):
    """``kktrace train`` loads numba but not ``scipy.linalg`` (numba's BLAS probe, 0.4 s)
    nor pycparser (numba's cffi typing, 0.07 s; see solver._numba_start), while a library
    process keeps numba's BLAS and its cffi typing."""
    import importlib.util

    folder = store_with_a_run
    probe = PROBE.replace("{heavy!r}", "('numba', 'scipy.linalg', 'pycparser')")
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    proc = subprocess.run([sys.executable, "-c", probe, "train", str(folder / "small.csv"),
                           "--label", "label", "--store", str(folder / "store"), "--quiet"],
                          capture_output=True, text=True, cwd=folder, env=env, timeout=300)
    line = [x for x in proc.stderr.splitlines() if x.startswith("LOADED ")]
    assert line and json.loads(line[-1][len("LOADED "):]) == ["numba"], proc.stderr[-800:]
    lib = subprocess.run([sys.executable, "-c", "import solver.smo, numba.np.arraymath as a; "
                          "import numba.core.typing.cffi_utils as c; "
                          "print(a._HAVE_BLAS, c.SUPPORTED)"], capture_output=True, text=True,
                         env=env, timeout=300)
    has_cffi = importlib.util.find_spec("cffi") is not None
    assert lib.stdout.split() == ["True", str(has_cffi)], lib.stderr[-800:]


def test_parquet_preloaded_in_a_thread_is_ready_for_the_writer():
    """``kktrace train`` starts importing pyarrow.parquet while the solve runs
    (solver.store.format.preload_parquet); the writer waits for that thread, and the table
    it writes reads back."""
    code = ("import sys, numpy as np\n"
            "import solver.store.format as f\n"
            "assert 'pyarrow.parquet' not in sys.modules\n"
            "f.preload_parquet(); f.preload_parquet()\n"
            "t = f._preload\n"
            "data = f.write_table({'a': np.arange(5.0)})\n"
            "assert not t.is_alive() and 'pyarrow.parquet' in sys.modules\n"
            "back = f.read_table(data, 'test.parquet', {'a': 'float64'})\n"
            "print(back['a'].tolist())\n")
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr[-800:]
    assert proc.stdout.strip() == "[0.0, 1.0, 2.0, 3.0, 4.0]"
