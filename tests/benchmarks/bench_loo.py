"""Benchmark: exact leave-one-out by support-vector refits against brute force.

Data: scikit-learn's bundled Wisconsin breast-cancer data (569 rows, 30 features),
standardised, RBF kernel (median-heuristic gamma), C = 1, SMO tolerance 1e-3.
Prints the times of

* ``support_refits`` — refit only the support vectors: decremental path from the full
  solution, SMO (warm-started, working set) only where the path's answer does not meet
  the stopping test;
* ``brute_force``   — refit all n points from the default start (same shared kernel values);
* a plain loop      — ``solve_smo`` on each problem without one row, as a user would write it;

the speed-ups (target ≥ 5× against brute force), and whether the answers agree.
Timings are wall-clock on a shared machine: the two methods run in interleaved pairs
(``--repeat``) and the median pair ratio is reported.

Run: ``python tests/benchmarks/bench_loo.py [--C 1.0] [--kkt-tol 1e-3] [--repeat 3] [--skip-plain]``
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
from sklearn.datasets import load_breast_cancer

from solver.errors import ConvergenceWarning
from solver.explanation import leave_one_out
from solver.explanation._refit import drop_row
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.smo import solve_smo


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--C", type=float, default=1.0)
    ap.add_argument("--kkt-tol", type=float, default=1e-3)
    ap.add_argument("--skip-plain", action="store_true", help="skip the plain-loop baseline")
    ap.add_argument("--repeat", type=int, default=3,
                    help="interleaved runs per method; the median pair ratio is reported")
    args = ap.parse_args()

    X, t = load_breast_cancer(return_X_y=True)
    Z = Standardiser.fit(X).transform(X)
    prob = binary_classification(Z, t, kernel=RBFKernel(), C=args.C)
    solve_smo(prob, kkt_tol=args.kkt_tol, trace="off")  # compile / load the numba cache
    small = binary_classification(Z[:80], t[:80], kernel=RBFKernel(), C=args.C)
    leave_one_out(small, solve_smo(small, kkt_tol=args.kkt_tol, trace="off"))  # same for the path
    t0 = time.perf_counter()
    res = solve_smo(prob, kkt_tol=args.kkt_tol, trace="off")
    full = time.perf_counter() - t0
    print(f"breast cancer: n = {prob.n}, d = {prob.X.shape[1]}, gamma = {prob.kernel.gamma:.4g}"
          f" (median heuristic), C = {args.C:g}, kkt_tol = {args.kkt_tol:g}")
    print(f"full fit: {res.status.label}, {res.iterations} iterations, {full * 1e3:.1f} ms, "
          f"{res.certificate.n_support} support vectors "
          f"({res.certificate.n_free} free, {res.certificate.n_bounded} bounded)")

    # interleaved pairs, so both methods see the same machine load; the median pair ratio
    # is the headline figure
    pairs = []
    for _ in range(max(1, args.repeat)):
        pairs.append((leave_one_out(prob, res, method="support_refits"),
                      leave_one_out(prob, res, method="brute_force")))
    ratios = [b.seconds / f.seconds for f, b in pairs]
    k_med = int(np.argsort(ratios)[len(ratios) // 2])
    fast, brute = pairs[k_med]
    by_path = int(np.sum(fast.refit_rounds == 0))
    smo = fast.refit_rounds > 0
    ws = f"{fast.refit_working_set[smo].mean():.1f}" if smo.any() else "-"
    print(f"support_refits: {fast.refits:4d} refits, {fast.seconds:8.3f} s, "
          f"{by_path} settled by the decremental path alone, {int(smo.sum())} by SMO "
          f"(mean working set {ws}, {fast.refit_iterations.sum()} SMO iterations in all), "
          f"non-converged {fast.non_converged_rows.size}")
    print(f"brute_force   : {brute.refits:4d} refits, {brute.seconds:8.3f} s, "
          f"mean {brute.refit_iterations.mean():7.1f} iterations/refit, "
          f"non-converged {brute.non_converged_rows.size}")
    print("pairs (support_refits s, brute_force s, ratio): " + ", ".join(
        f"({f.seconds:.3f}, {b.seconds:.3f}, {r:.1f}x)"
        for (f, b), r in zip(pairs, ratios, strict=True)))
    print(f"speed-up support_refits vs brute_force (median of {len(pairs)} interleaved pairs):"
          f" {ratios[k_med]:6.1f}x   (target >= 5x)")
    print(f"speed-up estimated inside the support_refits run   : {fast.speedup:6.1f}x "
          f"(n x fastest of 3 cold refits = {fast.estimated_brute_force_seconds:.3f} s)")
    if not args.skip_plain:
        t0 = time.perf_counter()
        plain_wrong = np.zeros(prob.n, dtype=bool)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            for i in range(prob.n):
                sub, _ = drop_row(prob, i)
                r = solve_smo(sub, kkt_tol=args.kkt_tol, trace="off")
                f_i = prob.kernel.block(prob.X[i], sub.X)[0] @ (r.alpha * sub.y) + r.bias
                plain_wrong[i] = (f_i > 0) != (prob.y[i] > 0)
        plain = time.perf_counter() - t0
        print(f"plain loop    : {prob.n:4d} refits, {plain:8.3f} s "
              f"(solve_smo on each problem without one row)")
        print(f"speed-up support_refits vs plain loop (one run)  : {plain / fast.seconds:6.1f}x;"
              f" plain-loop errors {int(plain_wrong.sum())}, same rows as support_refits: "
              f"{bool(np.array_equal(plain_wrong, fast.loo_wrong))}")
    same = bool(np.array_equal(fast.loo_wrong, brute.loo_wrong))
    gap = float(np.max(np.abs(fast.loo_values - brute.loo_values)))
    print(f"leave-one-out errors: support_refits {fast.errors}, brute_force {brute.errors}, "
          f"same rows: {same}, max |f difference| {gap:.2e}")
    print(f"rows with |f| within the tolerance of the boundary: {fast.near_boundary_rows.size}")
    print(f"error rate {fast.error_rate:.4f} <= xi-alpha estimate {fast.slack_bound_rate:.4f} "
          f"(R^2 = {fast.kernel_value_range:.4f}) "
          f"<= support-vector bound {fast.support_vector_bound:.4f}")


if __name__ == "__main__":
    main()
