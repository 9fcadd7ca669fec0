"""Benchmark: QP reference solver, structured KKT solver vs cvxopt's generic dense reduction.

Both formulations solve the same seeded RBF problem in the same run, so the ratio is the
figure to read (the absolute times depend on the machine and its load).

    python tests/benchmarks/bench_qp.py                 # n = 500, 1000, 2000, 3000
    python tests/benchmarks/bench_qp.py --sizes 500 1000
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from solver.kernels import RBFKernel  # noqa: E402
from solver.model import Standardiser  # noqa: E402
from solver.problem import binary_classification  # noqa: E402
from solver.qp import solve_qp  # noqa: E402


def seeded_problem(n: int, seed: int = 0):
    """Two overlapping Gaussian classes in 20 dimensions (10 informative), standardised."""
    rng = np.random.default_rng(seed)
    d, informative = 20, 10
    y = np.where(np.arange(n) % 2 == 0, 1, -1)
    X = rng.normal(size=(n, d))
    X[:, :informative] += 0.6 * y[:, None] * rng.normal(1.0, 0.3, size=informative)
    X = Standardiser.fit(X).transform(X)
    return binary_classification(X, y, kernel=RBFKernel(), C=1.0)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[500, 1000, 2000, 3000])
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    print(f"python {platform.python_version()}, numpy {np.__version__}, "
          f"{os.cpu_count()} cpus; RBF kernel (median-heuristic gamma), C = 1, kkt_tol = default")
    head = (f"{'n':>6} {'structured s':>13} {'generic s':>10} {'ratio':>6} {'iters s/g':>10} "
            f"{'|Δ objective|':>14} {'status s/g':>22}")
    print(head)
    print("-" * len(head))
    for n in args.sizes:
        prob = seeded_problem(n, args.seed)
        out = {}
        for kkt in ("structured", "generic"):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                t0 = time.perf_counter()
                r = solve_qp(prob, kkt=kkt, trace="off", snapshot_every=0)
                out[kkt] = (time.perf_counter() - t0, r)
        (ts, rs), (tg, rg) = out["structured"], out["generic"]
        diff = abs(rs.certificate.dual_objective - rg.certificate.dual_objective)
        print(f"{n:>6} {ts:>13.2f} {tg:>10.2f} {tg / ts:>6.1f} "
              f"{rs.iterations:>4}/{rg.iterations:<5} {diff:>14.2e} "
              f"{rs.status.label + '/' + rg.status.label:>22}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
