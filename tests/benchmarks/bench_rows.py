"""Kernel-row throughput: rows computed together (``solver._block_kernels.block_rows``,
four rows per pass over each tile of the data) against rows computed one at a time
(``solver._smo_kernels.kernel_row``, the two-variable loop's method), measured in the same
run.  Not a unit test: it prints entries per second and their ratio.

Data: standard normal (n, d) columns; RBF kernel, gamma = 1/d; 64 rows per call, best of
5 calls.  The two methods give bitwise equal rows (checked here and in
``tests/test_smo_block.py``).

Usage::

    python tests/benchmarks/bench_rows.py                 # n = 20000, d = 20 and 200
    python tests/benchmarks/bench_rows.py --n 50000 --d 20 50 200
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _measure(rng: np.random.Generator, n: int, d: int, q: int, repeat: int
             ) -> tuple[float, float, bool]:
    """(row-method entries/s, block-method entries/s, bitwise equal) for q RBF rows."""
    from solver import _block_kernels as B
    from solver import _smo_kernels as K

    XK = np.ascontiguousarray(rng.normal(size=(d, n)))
    sq = np.zeros(n)
    K.self_dots(XK, sq)
    srcs = rng.choice(n, size=q, replace=False).astype(np.int64)
    gamma = 1.0 / d
    acc = np.zeros(K.ROW_CHUNK)
    acc4 = np.zeros((4, K.ROW_CHUNK))
    ibuf = np.zeros(K.ROW_CHUNK, dtype=np.int64)
    one = np.zeros((q, n))
    blk = np.zeros(q * n)
    refs = np.arange(q, dtype=np.int64) * n
    gram = np.zeros((1, 1))

    def rows_one() -> None:
        for r in range(q):
            K.kernel_row(XK, srcs[r], sq[srcs[r]], XK, sq, n, one[r], K.KERNEL_RBF, gamma,
                         0.0, 1, acc, ibuf)

    def rows_block() -> None:
        B.block_rows(XK, sq, srcs, refs, q, n, gram, blk, K.KERNEL_RBF, gamma, 0.0, 1,
                     acc4, ibuf)

    rows_one()
    rows_block()  # compiled code loaded before timing
    best = {"one": np.inf, "block": np.inf}
    for _ in range(repeat):
        for name, fn in (("one", rows_one), ("block", rows_block)):
            t0 = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - t0)
    return q * n / best["one"], q * n / best["block"], bool(np.array_equal(one.ravel(), blk))


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=20000)
    ap.add_argument("--d", type=int, nargs="+", default=[20, 200])
    ap.add_argument("--rows", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    sys.path.insert(0, ROOT)
    print(f"kernel rows: n={args.n}, {args.rows} rows per call, RBF, best of {args.repeat}; "
          f"load average {os.getloadavg()[0]:.1f}")
    print(f"{'d':>5} | {'row method':>14} {'block method':>14} | {'ratio':>6} | same bits")
    rng = np.random.default_rng(0)
    for d in args.d:
        rate_one, rate_blk, same = _measure(rng, args.n, d, args.rows, args.repeat)
        print(f"{d:>5} | {rate_one:>10.3g} e/s {rate_blk:>10.3g} e/s | {rate_blk / rate_one:>6.2f} "
              f"| {same}", flush=True)
    print("e/s = kernel entries per second (one thread); ratio = block / row method")


if __name__ == "__main__":
    main()
