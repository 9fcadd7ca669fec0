"""Shared builders for the run-store tests (synthetic SMO-like records), plus their own checks.

The synthetic records follow the SMO trace contract (solver/result.py): every row holds
the new values of the two multipliers it changed, snapshots hold α exactly, so replay
and round trips can be checked without running a solver.  Real-solver records are built
in the test files themselves.
"""

from __future__ import annotations

import numpy as np

from solver.certificate import certify
from solver.kernels import RBFKernel
from solver.model import Standardiser
from solver.problem import binary_classification
from solver.result import SolveResult, Trace
from solver.run import RunRecord
from solver.status import Status

EVENT_KINDS = {1: "shrink", 2: "reconstruct", 3: "curvature_fix"}


def synthetic_record(
    seed: int = 0,
    *,
    n: int = 40,
    d: int = 3,
    rows: int = 400,
    snapshot_every: int = 100,
    level: str = "full",
    attachments: dict | None = None,
    labels: tuple = ("fail", "pass"),
) -> RunRecord:
    """A binary classification record with an SMO-like trace of ``rows`` pair updates."""
    rng = np.random.default_rng(seed)
    raw = rng.normal(size=(n, d)) * 3.0 + 1.0
    y01 = rng.random(n) < 0.5
    y01[:2] = [True, False]
    lab = np.where(y01, labels[1], labels[0])
    std = Standardiser.fit(raw)
    problem = binary_classification(std.transform(raw), lab, kernel=RBFKernel(), C=2.5)
    y = problem.y
    pos, neg = np.flatnonzero(y > 0), np.flatnonzero(y < 0)
    alpha = np.zeros(n)
    C = problem.upper
    cols = {k: [] for k in ("iteration", "i", "j", "alpha_i", "alpha_j", "step", "objective",
                            "violation", "active")}
    snaps, snap_its = [alpha.copy()], [0]
    for it in range(1, rows + 1):
        i, j = int(rng.choice(pos)), int(rng.choice(neg))
        # y_i Δα_i + y_j Δα_j = 0 with y_i = +1, y_j = −1: both move by the same t
        lo_t = max(-alpha[i], -alpha[j])
        hi_t = min(C[i] - alpha[i], C[j] - alpha[j])
        t = float(np.clip(rng.normal() * 0.3, lo_t, hi_t))
        old_i = alpha[i]
        alpha[i] = min(max(alpha[i] + t, 0.0), C[i])
        alpha[j] = min(max(alpha[j] + t, 0.0), C[j])
        if level == "full" or it % 10 == 0:
            cols["iteration"].append(it)
            cols["i"].append(i)
            cols["j"].append(j)
            cols["alpha_i"].append(alpha[i])
            cols["alpha_j"].append(alpha[j])
            cols["step"].append(alpha[i] - old_i)
            cols["objective"].append(-0.01 * it + rng.normal() * 1e-3)
            cols["violation"].append(abs(rng.normal()) / it)
            cols["active"].append(n - it // 100)
        if it % snapshot_every == 0:
            snaps.append(alpha.copy())
            snap_its.append(it)
    if snap_its[-1] != rows:
        snaps.append(alpha.copy())
        snap_its.append(rows)
    dtypes = {"iteration": np.int64, "i": np.int32, "j": np.int32, "active": np.int32}
    columns = {k: np.asarray(v, dtype=dtypes.get(k, np.float64)) for k, v in cols.items()}
    events = {"iteration": np.array([5, 50, 120], dtype=np.int64),
              "kind": np.array([3, 1, 2], dtype=np.int8),
              "value": np.array([-1e-14, 12.0, np.nan])}
    trace = Trace(solver="smo", level=level, columns=columns, events=events,
                  event_kinds=EVENT_KINDS, snapshot_iterations=np.asarray(snap_its, np.int64),
                  snapshots=np.vstack(snaps), sample_every=1 if level == "full" else 10,
                  snapshot_every=snapshot_every)
    cert = certify(problem, alpha, kkt_tol=1e-3)
    result = SolveResult(
        solver="smo", status=Status.ITERATION_LIMIT, message="stopped at the iteration limit",
        alpha=alpha.copy(), bias=cert.bias, iterations=rows, certificate=cert, seconds=0.125,
        options={"kkt_tol": 1e-3, "iteration_limit": rows, "selection": "second_order",
                 "shrinking": True,
                 "trace": level, "time_limit": None, "weights": np.array([1.0, 2.0]),
                 "tiny": 5e-324},
        trace=trace,
        extra={"curvature_fixes": 1, "loop_violation": float("inf"), "note": "synthetic",
               "per_class": {"negative": np.arange(3, dtype=np.int16)}},
    )
    data = {"fingerprint": f"{seed:064x}", "feature_names": [f"f{k}" for k in range(d)],
            "label_name": "qc", "source": "coating.csv", "warnings": ["constant column f9"],
            "n_rows": n}
    att = {
        "command": "kktrace train coating.csv --label qc",
        "explanation": {"row": np.arange(n), "alpha": alpha.copy(), "at_bound": cert.at_upper,
                        "role": np.array(["free" if a > 0 else "zero" for a in alpha])},
        "comparison": {"verdict": "agree", "max_alpha_difference": 1.5e-9,
                       "objective_gap": float("nan")},
        "holdout": {"accuracy": 0.875, "confusion": [[3, 1], [0, 4]]},
    }
    if attachments is not None:
        att = attachments
    return RunRecord(problem=problem, result=result, data=data, standardiser=std,
                     attachments=att)


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    """Equal dtype, shape and bytes."""
    a, b = np.asarray(a), np.asarray(b)
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def assert_records_bitwise(a: RunRecord, b: RunRecord) -> None:
    """Every array of two records identical bit for bit, every scalar equal."""
    pa, pb = a.problem, b.problem
    for name in ("X", "y", "p", "lower", "upper"):
        assert same_bits(getattr(pa, name), getattr(pb, name)), name
    assert pa.delta == pb.delta and pa.kind == pb.kind
    assert pa.kernel.describe() == pb.kernel.describe()
    ra, rb = a.result, b.result
    assert same_bits(ra.alpha, rb.alpha)
    assert (ra.solver, ra.status, ra.message, ra.iterations) == (rb.solver, rb.status, rb.message,
                                                                 rb.iterations)
    assert np.float64(ra.bias).tobytes() == np.float64(rb.bias).tobytes()
    assert ra.seconds == rb.seconds
    ca, cb = ra.certificate, rb.certificate
    for k, v in ca.to_dict().items():
        w = cb.to_dict()[k]
        assert (v == w) or (isinstance(v, float) and np.isnan(v) and np.isnan(w)), k
    for name in ("kkt_residual", "at_lower", "at_upper"):
        assert same_bits(getattr(ca, name), getattr(cb, name)), name
    assert same_bits(a.standardiser.centre, b.standardiser.centre)
    assert same_bits(a.standardiser.scale, b.standardiser.scale)
    ta, tb = ra.trace, rb.trace
    assert (ta is None) == (tb is None)
    if ta is not None:
        assert (ta.solver, ta.level, ta.sample_every, ta.snapshot_every) == (
            tb.solver, tb.level, tb.sample_every, tb.snapshot_every)
        assert list(ta.columns) == list(tb.columns)
        for c in ta.columns:
            assert same_bits(ta.columns[c], tb.columns[c]), c
        assert list(ta.events) == list(tb.events)
        for c in ta.events:
            assert same_bits(ta.events[c], tb.events[c]), c
        assert dict(ta.event_kinds) == dict(tb.event_kinds)
        assert same_bits(ta.snapshot_iterations, tb.snapshot_iterations)
        assert same_bits(ta.snapshots, tb.snapshots)


def test_synthetic_record_is_feasible_and_snapshots_match_rows() -> None:
    rec = synthetic_record(3)
    p, a = rec.problem, rec.result.alpha
    assert np.all(a >= p.lower) and np.all(a <= p.upper)
    assert abs(float(p.y @ a)) < 1e-9
    tr = rec.result.trace
    assert tr.snapshot_iterations[0] == 0 and tr.snapshot_iterations[-1] == rec.result.iterations
    assert same_bits(tr.snapshots[-1], a)


def save_loop(root: str, rows: int, count: int, seed: int, log: str) -> None:
    """Writer process body: save two synthetic runs alternately, logging each run id.

    Writes ``ready`` once the records are built, then one run id per completed save
    (``count`` saves, or forever when ``count`` ≤ 0).
    """
    from solver.store import RunStore

    store = RunStore(root)
    recs = [synthetic_record(seed + s, rows=rows) for s in range(2)]
    with open(log, "a", encoding="ascii") as fh:
        fh.write("ready\n")
        fh.flush()
        k = 0
        while count <= 0 or k < count:
            fh.write(store.save(recs[k % 2]) + "\n")
            fh.flush()
            k += 1
