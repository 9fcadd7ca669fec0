"""Run-store benchmark: bytes per iteration on disk and write time for a long full SMO trace.

A real SMO run (solver.smo.solve_smo, full trace) on a deliberately hard problem:
noisy labels, a wide RBF kernel (small gamma) and a large C, stopped by the iteration
limit at exactly ``--iterations`` iterations (default 1,000,000).  Prints, for every
file of the stored run, its size and bytes per iteration, then save and load times as
ratios to the solve time measured in the same run.  Target: trace.parquet ≤ 40 bytes
per iteration.

    python tests/benchmarks/bench_store.py [--iterations 1000000] [--n 1500]
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings

import numpy as np
import pyarrow.parquet as pq

from solver.errors import ConvergenceWarning
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.run import RunRecord
from solver.smo import solve_smo
from solver.store import RunStore, replay


def hard_problem(n: int, seed: int = 0):
    """Overlapping classes (30 % label noise), gamma 0.02 on 8 standardised features, C = 1e4."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 8))
    score = X[:, 0] + 0.5 * X[:, 1] - 0.3 * X[:, 2]
    flip = rng.random(n) < 0.3
    labels = np.where((score > 0) ^ flip, 1, -1)
    std = Standardiser.fit(X)
    problem = binary_classification(std.transform(X), labels, kernel=RBFKernel(gamma=0.02), C=1e4)
    return problem, std


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--iterations", type=int, default=1_000_000)
    ap.add_argument("--n", type=int, default=1500)
    args = ap.parse_args()

    problem, std = hard_problem(args.n)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        solve_smo(problem, kkt_tol=1e-3,
                  iteration_limit=10)  # compile the numba loop outside the timing
        t0 = time.perf_counter()
        result = solve_smo(problem, kkt_tol=1e-12, iteration_limit=args.iterations, trace="full")
    solve_s = time.perf_counter() - t0
    rows = result.trace.n_rows
    print(f"problem: n={problem.n}, d={problem.X.shape[1]}, rbf gamma=0.02, C=1e4, 30% label noise")
    print(f"solve: real SMO, {result.iterations} iterations, status {result.status.label}, "
          f"{rows} trace rows, {result.trace.snapshots.shape[0]} snapshots, {solve_s:.2f} s")

    record = RunRecord(problem=problem, result=result, data={"fingerprint": "benchmark"},
                       standardiser=std)
    with tempfile.TemporaryDirectory() as root:
        store = RunStore(root)
        t0 = time.perf_counter()
        run_id = store.save(record)
        save_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        loaded = store.load(run_id)
        load_s = time.perf_counter() - t0
        same = all(np.array_equal(loaded.result.trace.columns[c], result.trace.columns[c])
                   for c in result.trace.columns)
        files = sorted(store.run_dir(run_id).iterdir())
        total = 0
        print(f"{'file':<18}{'bytes':>14}{'bytes/iteration':>18}")
        for f in files:
            size = f.stat().st_size
            total += size
            print(f"{f.name:<18}{size:>14,}{size / rows:>18.2f}")
        print(f"{'run folder total':<18}{total:>14,}{total / rows:>18.2f}")
        trace_b = (store.run_dir(run_id) / "trace.parquet").stat().st_size
        raw = sum(np.asarray(c).nbytes for c in result.trace.columns.values())
        print(f"trace.parquet: {trace_b / rows:.2f} bytes/iteration (target <= 40; raw arrays "
              f"{raw / rows:.0f} bytes/iteration, compression x{raw / trace_b:.2f}); "
              f"{'MEETS' if trace_b / rows <= 40 else 'MISSES'} target")
        md = pq.ParquetFile(store.run_dir(run_id) / "trace.parquet").metadata
        per_col = {}
        for g in range(md.num_row_groups):
            for c in range(md.num_columns):
                col = md.row_group(g).column(c)
                per_col[col.path_in_schema] = (per_col.get(col.path_in_schema, 0)
                                               + col.total_compressed_size)
        print("trace.parquet by column (bytes/iteration, exact float64 values): " + ", ".join(
            f"{k} {v / rows:.2f}" for k, v in per_col.items()))
        print(f"save: {save_s:.2f} s = {save_s / solve_s:.3f} x solve time; "
              f"load+verify: {load_s:.2f} s = {load_s / solve_s:.3f} x solve time; "
              f"trace round trip bitwise: {same}")
        snaps = result.trace.snapshot_iterations
        k = int(snaps[-2] + snaps[-1]) // 2  # half-way between the last two snapshots
        t0 = time.perf_counter()
        st = replay(loaded, k)
        print(f"replay to iteration {st.iteration} ({st.deltas_applied} deltas + certificate): "
              f"{time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
