"""Benchmark of a study on Dask: a 5 × 5 grid (C × γ) × 5 folds at n = 3000 on a
LocalCluster with 2 workers against 1 worker (ratio; target ≥ 1.7× on 2 cores), and the
overhead per fit of going through Dask against calling ``solver.train`` in a loop on the
same training folds with the same options.  All figures are measured in this run.

Data: invented two-class rows (5 features, a curved boundary with label noise), seeded.
Every configuration writes to its own temporary store, made in ``--store-dir`` (default:
the current directory, where a user's ``./traces`` store would be; on some machines
``/tmp`` creates files many times more slowly than the working disk); the train loop
saves its runs too (trace ``sampled``, no explanation table, like the study's fits), so
both sides pay for the store.  Two ratios are printed: the whole ``study()`` call that
starts and stops its own LocalCluster (start-up and shutdown included), and the study on
a LocalCluster already running, given by address as with ``--scheduler`` (its warm-up of
the workers included, the cluster's start and stop not).  Best of ``--repeats``, the
configurations alternating.

Also printed first: warm starts along a six-value C path (n ≤ 1200, 3 folds), iterations
against cold starts on the same cells and whether the certificates agree.

Run: ``python tests/benchmarks/bench_study.py [--n 3000] [--grid 5] [--folds 5] [--sample 10]
[--repeats 2] [--store-dir DIR] [--warm-only]``
(``--grid 3 --n 1000`` for a quick look).  On a machine shared with other work the ratio
is lower than on two idle cores; the load average is printed with the figures.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import warnings

import numpy as np


def _data(n: int, seed: int = 0):
    import solver

    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 + rng.normal(scale=0.8, size=n) > 0.5,
                 "pass", "fail")
    return solver.from_arrays(X, y, label_name="qc", source="invented")


def warm_path(n: int, folds: int, store_dir: str | None = None) -> None:
    """Warm starts along a six-value C path (about 1.5x apart): iterations against the same
    cells started cold (fold 0), and whether their certificates agree."""
    from solver.studies import study

    ds = _data(n)
    with tempfile.TemporaryDirectory(dir=store_dir, prefix=".bench-study-") as st:
        out = study(ds, C=[1.0, 1.5, 2.2, 3.3, 5.0, 7.5], gamma=[0.1], folds=folds,
                    warm_start=True, scheduler="sequential", store=st)
    w = out.warm_check
    print(f"warm starts, n = {n}, {folds} folds, C path 1 ... 7.5 (6 values), gamma 0.1: "
          f"{w['warm_iterations']} warm vs {w['cold_iterations']} cold iterations on the "
          f"{len(w['cells'])} warm cells, ratio {w['ratio_cold_to_warm']:.2f}; whole path "
          f"(first C cold in both) {w['path_ratio_cold_to_warm']:.2f}; certificates "
          f"{'all the same' if w['all_same_certificate'] else 'NOT all the same'}; largest "
          f"dual-objective difference "
          f"{max(c['dual_objective_relative_difference'] for c in w['cells']):.1e} relative")


def main() -> None:
    import solver
    from solver.studies import study, study_folds

    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=3000)
    ap.add_argument("--grid", type=int, default=5)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--sample", type=int, default=10, help="train-loop fits timed")
    ap.add_argument("--warm-only", action="store_true", help="only the warm-start figure")
    ap.add_argument("--repeats", type=int, default=2, help="best of this many, alternating")
    ap.add_argument("--store-dir", default=".",
                    help="where the temporary stores go (default: here, as a user's ./traces)")
    a = ap.parse_args()
    warnings.simplefilter("ignore")
    warm_path(min(a.n, 1200), 3, a.store_dir)
    if a.warm_only:
        return
    ds = _data(a.n)
    Cs = list(np.round(np.logspace(-1, 2, a.grid), 4))
    gs = list(np.round(np.logspace(-2, 0, a.grid), 4))
    fits = len(Cs) * len(gs) * a.folds
    kw = {"C": Cs, "gamma": gs, "folds": a.folds, "seed": 0}
    print(f"study benchmark: n = {a.n}, grid {len(Cs)} x {len(gs)}, {a.folds} folds = {fits} "
          f"fits; load average before {os.getloadavg()[0]:.1f}")

    # train in a loop (a sample of the same fits: rows outside the fold, same options);
    # train also audits the kernel of every run, which a study's fits leave out
    folds = study_folds(ds.labels, a.folds, 0)
    every = max(1, fits // a.sample)
    sample = [(k, g, C) for k in range(a.folds) for g in gs for C in Cs][::every]
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(dir=a.store_dir, prefix=".bench-study-") as st:
        for k, g, C in sample:
            rows = np.flatnonzero(folds != k)
            sub = solver.from_arrays(ds.X[rows], ds.labels[rows], label_name="qc")
            solver.train(sub, C=float(C), gamma=float(g), trace="sampled", explain=False,
                         store=st)
    per_train = (time.perf_counter() - t0) / len(sample)
    print(f"  train in a loop ({len(sample)} of the fits)  {per_train:.3f} s per fit")

    from solver.studies.execute import connect

    t0 = time.perf_counter()
    client, cluster, _ = connect("local", 2)
    client.close()
    cluster.close()
    t_start = time.perf_counter() - t0
    print(f"  LocalCluster start and close (2 workers) {t_start:.1f} s")

    # best of --repeats, configurations alternating: in this process; a LocalCluster the
    # study starts and stops (its start-up and shutdown timed); an already running
    # LocalCluster given by address, as with --scheduler (started outside the timing)
    configs = [("in this process", "sequential", None, None), *(
        (f"LocalCluster {w} worker(s), started by the study", "local", w, None)
        for w in (1, 2)), *((f"running cluster, {w} worker(s), by address", "address", w, w)
                            for w in (1, 2))]
    times: dict[str, float] = {}
    solve: dict[str, float] = {}
    chosen: dict[str, str] = {}
    for _ in range(a.repeats):
        for label, where, workers, running in configs:
            cl = None
            if running:
                from dask.distributed import LocalCluster

                cl = LocalCluster(n_workers=running, threads_per_worker=1, processes=True,
                                  dashboard_address=":0", silence_logs=40,
                                  env={"KKTRACE_THREADS": "1"})
                where = cl.scheduler_address
            try:
                with tempfile.TemporaryDirectory(dir=a.store_dir, prefix=".bench-study-") as st:
                    t0 = time.perf_counter()
                    out = study(ds, scheduler=where, workers=workers, store=st, **kw)
                    took = time.perf_counter() - t0
            finally:
                if cl is not None:
                    cl.close()
            if took < times.get(label, float("inf")):
                times[label] = took
                solve[label] = sum(r["seconds"] for r in out.rows)
            chosen[label] = out.choice["one_se"]
    for label, *_ in configs:
        print(f"  study {label:48s} {times[label]:6.2f} s  ({times[label] / fits * 1000:4.0f} ms "
              f"per fit; solver seconds summed {solve[label]:.1f}; chosen {chosen[label]})")
    one, two = configs[1][0], configs[2][0]
    r_one, r_two = configs[3][0], configs[4][0]
    print(f"  ratio 1 worker / 2 workers, study starts the cluster  "
          f"{times[one] / times[two]:5.2f} x  (target >= 1.7)")
    print(f"  ratio 1 worker / 2 workers, cluster already running   "
          f"{times[r_one] / times[r_two]:5.2f} x  (target >= 1.7)")
    seq = times[configs[0][0]]
    print(f"  overhead per fit through Dask (1 worker) against the study's fits in this "
          f"process: {(times[one] - seq) / fits * 1000:+.0f} ms (cluster start-up "
          f"included), {(times[r_one] - seq) / fits * 1000:+.0f} ms on a running cluster")
    print(f"  study fit in this process against train in a loop: "
          f"{seq / fits:.3f} s vs {per_train:.3f} s per fit")
    print(f"  load average after {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
