"""Benchmark: the diagnosis of a 200,000-iteration SMO run (target: under 5 s).

Solves a seeded random problem (n = 3000, 5 features, RBF, overlapping classes, C = 10⁵)
until its iteration limit of 200,000 (non-converged on purpose), saves it to a temporary
store and times (a) loading it with every integrity check and (b) the diagnosis of the
loaded record, and (c) both together through ``solver.diagnose(run_id)``.  The solve and
the load are printed as references measured in the same run; times are wall-clock on a
shared machine.

    python tests/benchmarks/bench_diagnose.py [--iterations 200000] [--n 3000]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import solver

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_report import long_run  # noqa: E402  (the same seeded long run)

from solver.diagnosis import diagnose
from solver.store import RunStore

TARGET_SECONDS = 5.0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--iterations", type=int, default=200_000)
    ap.add_argument("--n", type=int, default=3000)
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
        t0, c0 = time.perf_counter(), time.process_time()
        d = diagnose(loaded)
        t_diag, c_diag = time.perf_counter() - t0, time.process_time() - c0
        t0 = time.perf_counter()
        solver.diagnose(run_id, store=store)
        t_both = time.perf_counter() - t0
    print(f"findings: {', '.join(d.codes) or 'none'}")
    print(f"load (all integrity checks): {t_load:.2f} s")
    print(f"diagnosis of the loaded run: {t_diag:.2f} s wall, {c_diag:.2f} s CPU "
          f"({t_diag / t_solve:.3f} × the solve)")
    print(f"load + diagnosis (solver.diagnose): {t_both:.2f} s "
          f"({t_both / t_load:.2f} × the load alone)")
    ok = t_both < TARGET_SECONDS
    print(f"diagnose a {record.result.iterations}-iteration run: {t_both:.2f} s "
          f"({'within' if ok else 'OVER'} the {TARGET_SECONDS:g} s target)")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
