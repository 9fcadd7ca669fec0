"""One-vs-one multi-class: whole-process times on scikit-learn's bundled digits data.

    python tests/benchmarks/bench_multiclass.py [--repeats 2]

Writes the 1797 digits rows (64 pixel columns, label ``digit``, 10 classes → 45 pairs) to a
temporary CSV, then times, each as a fresh process on the same file:

1. the reference: a Python process that reads the CSV with numpy and fits scikit-learn's
   SVC (one-vs-one as well) with the same kernel, gamma, C and tolerance;
2. ``kktrace train --solver smo`` and ``--solver both`` (SMO plus the QP challenger and the
   comparison for every pair, every run stored with trace, certificate, audit and
   explanation), pairs one at a time (``--parallel sequential``);
3. the same with the 45 pairs on a two-worker Dask LocalCluster (``--parallel local``).

Printed as seconds and as ratios against the reference and against one at a time,
measured in the same run (best of ``--repeats``).  Both sides standardise: kktrace per pair
(its rule), the reference once over all rows.  Speed depends on the machine and its load;
nothing here is a test.
"""

from __future__ import annotations

import argparse
import csv
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GAMMA, C, TOL = 1.0 / 64, 1.0, 1e-3

REFERENCE = """
import sys, numpy as np
from sklearn.svm import SVC
raw = np.loadtxt(sys.argv[1], delimiter=",", skiprows=1)
X, y = raw[:, :-1], raw[:, -1]
sd = X.std(axis=0)
X = (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)
svc = SVC(kernel="rbf", gamma={g}, C={c}, tol={t}).fit(X, y)
print(int(svc.n_support_.sum()))
"""


def _write_digits(path: Path) -> None:
    from sklearn.datasets import load_digits

    X, y = load_digits(return_X_y=True)
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([f"px{i:02d}" for i in range(X.shape[1])] + ["digit"])
        for row, lab in zip(X.tolist(), y.tolist(), strict=True):
            w.writerow([f"{v:g}" for v in row] + [int(lab)])


def _time(argv: list[str], env: dict[str, str]) -> float:
    t0 = time.perf_counter()
    done = subprocess.run(argv, env=env, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if done.returncode not in (0, 3):  # 3: a run did not converge (still stored)
        sys.exit(f"{' '.join(argv[:4])} ... failed ({done.returncode}): {done.stderr[-400:]}")
    return dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=2)
    args = ap.parse_args()
    root = Path(__file__).resolve().parents[2]
    env = {**os.environ, "PYTHONPATH": str(root)}
    with tempfile.TemporaryDirectory() as tmp:
        data = Path(tmp) / "digits.csv"
        _write_digits(data)
        ref = [sys.executable, "-c", REFERENCE.format(g=GAMMA, c=C, t=TOL), str(data)]

        def kk(solver: str, parallel: str, k: int) -> list[str]:
            return [sys.executable, "-m", "solver.cli", "train", str(data), "--label",
                    "digit", "--kernel", "rbf", "--gamma", repr(GAMMA), "--C", repr(C),
                    "--kkt-tol", repr(TOL), "--solver", solver, "--parallel", parallel,
                    "--store", str(Path(tmp) / f"store-{solver}-{parallel}-{k}")]

        # warm the numba cache once so that no timed process pays the compile
        _time(kk("smo", "sequential", -1), env)
        best: dict[str, float] = {}
        for k in range(args.repeats):
            for name, argv in (("reference SVC process", ref),
                               ("smo, pairs one at a time", kk("smo", "sequential", k)),
                               ("smo, pairs on 2 workers", kk("smo", "local", k)),
                               ("both, pairs one at a time", kk("both", "sequential", k)),
                               ("both, pairs on 2 workers", kk("both", "local", k))):
                best[name] = min(best.get(name, float("inf")), _time(argv, env))
    ref_s = best["reference SVC process"]
    print(f"digits: 1797 rows, 64 features, 10 classes, 45 pairs; RBF gamma {GAMMA:g}, "
          f"C {C:g}, tolerance {TOL:g}; best of {args.repeats}; {os.cpu_count()} cores")
    for name, s in best.items():
        print(f"  {name:28s} {s:7.2f} s   {s / ref_s:6.2f} × reference")
    for solver in ("smo", "both"):
        seq, par = best[f"{solver}, pairs one at a time"], best[f"{solver}, pairs on 2 workers"]
        print(f"  {solver}: 2 workers / one at a time = {par / seq:.2f} "
              f"(speed-up {seq / par:.2f} ×)")


if __name__ == "__main__":
    main()
