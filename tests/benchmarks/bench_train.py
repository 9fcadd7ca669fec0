"""Whole-process benchmark: ``kktrace train FILE --solver smo`` against a reference process.

Not a unit test: it prints figures (issue 15).  Problem: scikit-learn's
``make_classification(n_samples=n, n_features=20, n_informative=10, flip_y=0.05,
random_state=0)``, standardised, written to CSV; RBF kernel, gamma 0.05, tolerance 1e-3;
n ∈ {2000, 5000, 10000, 20000, 50000} × C ∈ {1, 100}, plus n = 100 000 at C = 1.

kktrace's sources are byte-compiled first (as an install does).  Each measured command runs
in a fresh process, one at a time, alternating kktrace and the
reference, best of ``--repeat`` (3 by default; one fit each above n = 20000).  The
reference process reads the same CSV with numpy and fits scikit-learn's SVC with the same
settings and the library's default cache, as a user would.  kktrace runs with its default
outputs (kernel audit, explanation table, full trace, store save) into a fresh store and
with its compiled code already on disk (one warm-up fit first).  Wall seconds, CPU seconds
(user + system of the child, from ``os.wait4``) and peak resident memory of each process
are printed, with the ratio reference / kktrace (> 1: kktrace is faster) and kktrace's own
solve, compile and set-up seconds from ``train --json``.

Usage::

    python tests/benchmarks/bench_train.py                       # every case
    python tests/benchmarks/bench_train.py --sizes 2000 5000 --cs 1   # a quick look
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

GAMMA = 0.05
TOL = 1e-3
CASES = [(n, c) for n in (2000, 5000, 10000, 20000, 50000) for c in (1.0, 100.0)] + [
    (100000, 1.0)]

REFERENCE = r"""
import sys, numpy as np
from sklearn.svm import SVC
path, C, gamma, tol = sys.argv[1], float(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
data = np.loadtxt(path, delimiter=",", skiprows=1)
SVC(C=C, kernel="rbf", gamma=gamma, tol=tol).fit(data[:, :-1], data[:, -1])
"""


def _problem(n: int, folder: str) -> str:
    from sklearn.datasets import make_classification

    path = os.path.join(folder, f"train_{n}.csv")
    if not os.path.exists(path):
        X, y = make_classification(n_samples=n, n_features=20, n_informative=10, flip_y=0.05,
                                   random_state=0)
        X = (X - X.mean(axis=0)) / X.std(axis=0)
        header = ",".join([f"x{j}" for j in range(20)] + ["label"])
        np.savetxt(path, np.column_stack([X, y]), delimiter=",", header=header, comments="",
                   fmt="%.17g")
    return path


def _measure(argv: list[str], env: dict[str, str]) -> dict[str, float | str]:
    """Wall, CPU (user + system) seconds and peak RSS (MB) of one child process."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    out = proc.stdout.read() if proc.stdout else b""
    err = proc.stderr.read() if proc.stderr else b""
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"{argv[:4]} failed ({proc.returncode}): {err.decode()[-400:]}")
    return {"wall": wall, "cpu": usage.ru_utime + usage.ru_stime,
            "peak_mb": usage.ru_maxrss / 1024.0, "stdout": out.decode()}


def _kktrace(path: str, C: float, store: str, env: dict[str, str]) -> dict[str, object]:
    argv = [sys.executable, "-m", "solver.cli", "train", path, "--label", "label",
            "--kernel", "rbf", "--gamma", str(GAMMA), "--C", str(C), "--kkt-tol", str(TOL),
            "--solver", "smo", "--store", store, "--json", "--quiet"]
    got = _measure(argv, env)
    summary = json.loads(str(got.pop("stdout")))
    got["status"] = summary.get("status")
    got["iterations"] = summary.get("iterations")
    for key in ("solve_seconds", "compile_seconds", "setup_seconds", "phase_seconds"):
        got[key] = summary.get(key)
    table = os.path.join(str(summary.get("run_dir")), "explanation.parquet")
    if os.path.exists(table):
        import pyarrow.parquet as pq

        got["explanation_rows"] = pq.ParquetFile(table).metadata.num_rows
    return got


def _reference(path: str, C: float, env: dict[str, str]) -> dict[str, object]:
    got = _measure([sys.executable, "-c", REFERENCE, path, str(C), str(GAMMA), str(TOL)], env)
    got.pop("stdout")
    return got


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=None)
    ap.add_argument("--cs", type=float, nargs="*", default=None)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--skip-reference-above", type=int, default=50000,
                    help="no reference fit above this n (its time grows quadratically)")
    args = ap.parse_args()
    cases = [(n, c) for n, c in CASES if (args.sizes is None or n in args.sizes)
             and (args.cs is None or c in args.cs)]
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))]
        + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    print("columns: wall / cpu s = whole process (fresh, best of the repeats); peak MB = peak "
          "resident memory; ratio = reference / kktrace (> 1: kktrace faster); solve / "
          "compile / setup = kktrace's own figures from train --json")
    # kktrace's bytecode, as an install writes it (pip compiles on install; this checkout
    # may run with PYTHONDONTWRITEBYTECODE, and the reference's libraries are installed)
    subprocess.run([sys.executable, "-m", "compileall", "-q", env["PYTHONPATH"].split(
        os.pathsep)[0] + os.sep + "solver"], check=True, env=env)
    with tempfile.TemporaryDirectory() as tmp:
        warm = _problem(2000, tmp)
        _kktrace(warm, 1.0, os.path.join(tmp, "warm"), env)  # compiled code onto disk
        for n, C in cases:
            path = _problem(n, tmp)
            reps = args.repeat if n <= 20000 else 1
            ours, theirs = [], []
            for r in range(reps):
                ours.append(_kktrace(path, C, os.path.join(tmp, f"s{n}_{C}_{r}"), env))
                if n <= args.skip_reference_above:
                    theirs.append(_reference(path, C, env))
            k = min(ours, key=lambda d: d["wall"])
            line = (f"n={n:6d} C={C:<5g} kktrace wall {k['wall']:7.2f} cpu {k['cpu']:7.2f} "
                    f"peak {k['peak_mb']:7.0f} MB  [{k['status']}, {k['iterations']} it; "
                    f"solve {k['solve_seconds']:.2f} compile {k['compile_seconds']:.2f} "
                    f"setup {k['setup_seconds']:.2f}; explanation table "
                    f"{k.get('explanation_rows', 'no')} rows]")
            if theirs:
                t = min(theirs, key=lambda d: d["wall"])
                line += (f"  reference wall {t['wall']:7.2f} cpu {t['cpu']:7.2f} peak "
                         f"{t['peak_mb']:6.0f} MB  ratio wall {t['wall'] / k['wall']:.2f} "
                         f"cpu {t['cpu'] / k['cpu']:.2f}")
            phases = k.get("phase_seconds") or {}
            if phases:
                line += "\n        phases (s): " + ", ".join(
                    f"{name} {sec:.2f}" for name, sec in phases.items())
            print(line, flush=True)


if __name__ == "__main__":
    main()
