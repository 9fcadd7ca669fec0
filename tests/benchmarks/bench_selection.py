"""First- against second-order working-set selection on the hard-problem suite.

For every problem of :mod:`solver.hard` (default sizes) SMO runs with
``selection="first_order"`` (maximal violating pair) and ``"second_order"`` (Fan, Chen &
Lin, JMLR 6, 2005, WSS 2) under the suite's options and kkt_tol 1e-3.  Printed per
problem and selection: iterations, loop seconds (median of ``--repeats`` runs, compile
excluded), status and final maximal violation, then whether the published finding —
second order needs fewer iterations — holds there.  Times are wall-clock on a shared
machine; iteration counts are deterministic.

    python tests/benchmarks/bench_selection.py [--repeats 3] [--kkt-tol 1e-3]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import warnings

from solver.hard import HARD_PROBLEMS
from solver.smo import solve_smo


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--kkt-tol", type=float, default=1e-3)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    print("| problem | selection | iterations | seconds | status | final violation |")
    print("| --- | --- | --- | --- | --- | --- |")
    verdicts = []
    for name, gen in HARD_PROBLEMS.items():
        hp = gen()
        runs = {}
        for sel in ("first_order", "second_order"):
            solve_smo(hp.problem, kkt_tol=args.kkt_tol, selection=sel, trace="off",
                      iteration_limit=10)  # compile outside the timing
            secs, res = [], None
            for _ in range(args.repeats):
                res = solve_smo(hp.problem, kkt_tol=args.kkt_tol, selection=sel,
                                **hp.solve_options)
                secs.append(res.extra["solve_seconds"])
            runs[sel] = res
            print(f"| {name} | {sel} | {res.iterations} | {statistics.median(secs):.4f} | "
                  f"{res.status.label} | {res.certificate.max_violation:.3g} |")
        a, b = runs["first_order"], runs["second_order"]
        if a.success and b.success:
            holds = b.iterations < a.iterations
            text = (f"second order {'fewer' if holds else 'NOT fewer'} iterations "
                    f"({b.iterations} vs {a.iterations}, ratio {b.iterations / a.iterations:.2f})")
        else:
            holds = b.certificate.max_violation <= a.certificate.max_violation
            text = (f"both or one stopped at the limit: second order reached violation "
                    f"{b.certificate.max_violation:.3g} vs {a.certificate.max_violation:.3g}")
        verdicts.append((name, holds, text))
    print()
    for name, holds, text in verdicts:
        print(f"{name}: {'holds' if holds else 'does not hold'} — {text}")
    print(f"second order better on {sum(h for _, h, _ in verdicts)} of {len(verdicts)} problems")
    return 0


if __name__ == "__main__":
    sys.exit(main())
