"""Benchmark: the audit report for a 200,000-iteration SMO run (target: under 10 s).

Solves a seeded random problem (n = 3000, 5 features, RBF) with SMO until its iteration
limit of 200,000 (the run is non-converged on purpose: it must be reported as such), saves
it to a temporary store, loads it back and times the report: content, HTML, PDF and JSON.
Times are wall-clock on a shared machine; the solve and the store load are printed as
references measured in the same run.

    python tests/benchmarks/bench_report.py [--iterations 200000] [--keep DIR]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.reporting import build_report_content, render_report
from solver.run import RunRecord
from solver.smo import solve_smo
from solver.store import RunStore

TARGET_SECONDS = 10.0


def long_run(n: int, iterations: int) -> tuple[RunRecord | None, float]:
    """The seeded long SMO run both report and diagnosis benchmarks time: (record, solve
    seconds); record None (and a line printed) when the run stopped early."""
    g = np.random.default_rng(7)
    X = g.normal(size=(n, 5))
    y = np.where(X[:, 0] + 1.5 * g.normal(size=n) > 0, "yes", "no")
    std = Standardiser.fit(X)
    # heavily overlapping classes, a huge C and a tiny kkt_tol: SMO runs into its iteration limit
    problem = binary_classification(std.transform(X), y, kernel=RBFKernel(gamma=0.5), C=1e5)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve_smo(problem, kkt_tol=1e-12, iteration_limit=iterations)
    t_solve = time.perf_counter() - t0
    print(f"solve: {result.iterations} iterations, status {result.status.label}, "
          f"{result.trace.n_rows} trace rows, {t_solve:.2f} s")
    if result.trace.n_rows < iterations:
        print(f"the run stopped after {result.trace.n_rows} recorded iterations, fewer than "
              f"the {iterations} this benchmark needs; make the problem harder")
        return None, t_solve
    data = {"fingerprint": "benchmark", "feature_names": [f"x{k}" for k in range(5)],
            "label_name": "y", "source": None, "warnings": [], "n_rows": n}
    return RunRecord(problem=problem, result=result, data=data, standardiser=std), t_solve


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--iterations", type=int, default=200_000)
    ap.add_argument("--n", type=int, default=3000)
    ap.add_argument("--keep", type=Path, default=None, help="also write the report files here")
    args = ap.parse_args(argv)

    record, t_solve = long_run(args.n, args.iterations)
    if record is None:
        return 2

    with tempfile.TemporaryDirectory() as tmp:
        store = RunStore(Path(tmp) / "store")
        run_id = store.save(record)
        t0 = time.perf_counter()
        loaded = store.load(run_id)
        t_load = time.perf_counter() - t0

    t_all, c_all = time.perf_counter(), time.process_time()
    t0, c0 = time.perf_counter(), time.process_time()
    content = build_report_content([loaded])
    times = {"content": (time.perf_counter() - t0, time.process_time() - c0)}
    sizes = {}
    outputs = {}
    for fmt in ("html", "pdf", "json"):
        t0, c0 = time.perf_counter(), time.process_time()
        outputs[fmt] = render_report(content, fmt)
        times[fmt] = (time.perf_counter() - t0, time.process_time() - c0)
        sizes[fmt] = len(outputs[fmt])
    total, cpu = time.perf_counter() - t_all, time.process_time() - c_all

    print(f"store load (reference): {t_load:.2f} s")
    for k, (wall, c) in times.items():
        extra = f"  ({sizes[k] / 1e6:.2f} MB)" if k in sizes else ""
        print(f"report {k:8s}: {wall:6.2f} s wall, {c:6.2f} s CPU{extra}")
    print(f"report total   : {total:6.2f} s wall, {cpu:6.2f} s CPU  (target < {TARGET_SECONDS:g} s "
          f"wall; {total / t_solve:.2f} × the solve, {total / max(t_load, 1e-9):.1f} × the load)")
    print("within target" if total < TARGET_SECONDS else "OVER TARGET")
    if args.keep:
        args.keep.mkdir(parents=True, exist_ok=True)
        for fmt, data_bytes in outputs.items():
            (args.keep / f"bench_report.{fmt}").write_bytes(data_bytes)
        print(f"files written to {args.keep}")
    return 0 if total < TARGET_SECONDS else 1


if __name__ == "__main__":
    sys.exit(main())
