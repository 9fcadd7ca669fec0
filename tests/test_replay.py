"""Replay (α, certificate and decision values at any recorded iteration) and reproduce."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from test_store_support import same_bits, synthetic_record

from solver.certificate import certify
from solver.data import from_arrays
from solver.errors import ConvergenceWarning, InvalidInputError
from solver.kernels import LinearKernel, RBFKernel
from solver.model import Standardiser, model_from_solution
from solver.problem import binary_classification
from solver.run import RunRecord
from solver.store import RunStore, replay, reproduce
from solver.store.replay import replayable_iterations

# ----------------------------------------------------------------------------- helpers


def _dataset(rng: np.random.Generator, n: int = 80, d: int = 3, noise: float = 0.8):
    X = rng.normal(size=(n, d)) * np.array([1.0, 10.0, 0.1])[:d] + 5.0
    score = (X[:, 0] - 5.0) + 0.1 * (X[:, 1] - 5.0)
    lab = np.where(score + noise * rng.normal(size=n) > 0, "release", "reject")
    return from_arrays(X, lab, feature_names=[f"m{k}" for k in range(d)], label_name="decision",
                       source="batches.csv")


def _smo_run(ds, *, kernel=None, C: float = 5.0, store=None, **options):
    from solver.smo import solve_smo

    std = Standardiser.fit(ds.X)
    prob = binary_classification(std.transform(ds.X), ds.labels, kernel=kernel or RBFKernel(),
                                 C=C, class_weight=options.pop("class_weight", None),
                                 sample_weight=options.pop("sample_weight", None))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        res = solve_smo(prob, **options)
    rec = RunRecord(problem=prob, result=res, data=ds.describe(), standardiser=std)
    if store is None:
        return rec
    return store.load(store.save(rec))


@pytest.fixture(scope="module")
def smo_loaded(tmp_path_factory):
    rng = np.random.default_rng(77)
    ds = _dataset(rng, n=120)
    store = RunStore(tmp_path_factory.mktemp("replay"))
    return _smo_run(ds, store=store, kkt_tol=1e-8, snapshot_every=25), ds, store


# ----------------------------------------------------------------------------- replay


def test_synthetic_replay_rebuilds_every_snapshot_bitwise() -> None:
    rec = synthetic_record(21, rows=450, snapshot_every=50)
    tr = rec.result.trace
    snaps = tr.snapshot_iterations
    for m in range(1, snaps.shape[0]):
        st = replay(rec, int(snaps[m]), base=int(snaps[m - 1]))
        assert st.deltas_applied == snaps[m] - snaps[m - 1]
        assert same_bits(st.alpha, tr.snapshots[m])
    st = replay(rec, rec.result.iterations, base=0)
    assert same_bits(st.alpha, rec.result.alpha) and st.deltas_applied == 450


def test_real_smo_replay_is_bitwise_against_snapshots(smo_loaded) -> None:
    rec, _, _ = smo_loaded
    tr = rec.result.trace
    snaps = tr.snapshot_iterations
    assert snaps.shape[0] >= 4 and tr.level == "full"
    for m in range(1, snaps.shape[0]):
        st = replay(rec, int(snaps[m]), base=int(snaps[m - 1]))
        assert same_bits(st.alpha, tr.snapshots[m]), int(snaps[m])
    final = replay(rec, rec.result.iterations, base=0)
    assert same_bits(final.alpha, rec.result.alpha)


def test_replayed_certificate_recomputes_the_gradient(smo_loaded) -> None:
    rec, _, _ = smo_loaded
    k = int(rec.result.trace.snapshot_iterations[2]) + 7
    st = replay(rec, k)
    ref = certify(rec.problem, st.alpha, kkt_tol=rec.result.certificate.kkt_tol)
    assert st.certificate.max_violation == ref.max_violation
    assert st.certificate.dual_objective == ref.dual_objective
    # the objective the solver tracked incrementally agrees with the recomputed one
    row = st.recorded
    assert row is not None and row["iteration"] == k
    assert row["objective"] == pytest.approx(st.certificate.dual_objective, rel=1e-9, abs=1e-9)
    # at the final iteration the replayed certificate matches the stored one
    fin = replay(rec, rec.result.iterations)
    c0 = rec.result.certificate
    assert fin.certificate.max_violation == pytest.approx(c0.max_violation, abs=1e-9)
    assert fin.certificate.n_support == c0.n_support
    assert fin.certificate.bias == pytest.approx(c0.bias, abs=1e-9)


def test_replayed_decision_values(smo_loaded) -> None:
    rec, ds, store = smo_loaded
    fin = replay(rec, rec.result.iterations)
    stored = store.load_model(rec.run_id)
    f_replay = fin.values(ds.X)
    f_stored = stored.values(ds.X)
    np.testing.assert_allclose(f_replay, f_stored, rtol=0, atol=1e-9)
    # an early iteration gives a different, cruder decision function
    early = replay(rec, 5)
    assert early.model.support_rows.shape[0] <= 10
    assert not np.allclose(early.values(ds.X), f_stored)
    m = model_from_solution(rec.problem, rec.result, rec.standardiser)
    assert same_bits(m.support_rows, fin.model.support_rows)


def test_replayable_iterations_and_refusals(smo_loaded) -> None:
    rec, _, _ = smo_loaded
    its = replayable_iterations(rec)
    assert its[0] == 0 and its[-1] == rec.result.iterations
    assert its.shape[0] == rec.result.iterations + 1  # full trace: every iteration
    with pytest.raises(InvalidInputError, match="outside"):
        replay(rec, rec.result.iterations + 1)
    with pytest.raises(InvalidInputError, match="not a snapshot"):
        replay(rec, 30, base=3)
    with pytest.raises(InvalidInputError, match="integer"):
        replay(rec, 2.5)
    sampled = synthetic_record(4, rows=300, level="sampled", snapshot_every=100)
    assert replayable_iterations(sampled).tolist() == [0, 100, 200, 300]
    assert same_bits(replay(sampled, 200).alpha, sampled.result.trace.snapshots[2])
    with pytest.raises(InvalidInputError, match="does not hold every iteration"):
        replay(sampled, 150)


def test_qp_replay_only_at_snapshots(tmp_path, rng) -> None:
    from solver.qp import solve_qp

    ds = _dataset(rng, n=30)
    prob = binary_classification(ds.X, ds.labels, kernel=LinearKernel(), C=1.0)
    res = solve_qp(prob)
    rec = RunRecord(problem=prob, result=res, data=ds.describe(),
                    standardiser=Standardiser.identity(3))
    tr = res.trace
    k = int(tr.snapshot_iterations[1])
    st = replay(rec, k)
    assert same_bits(st.alpha, tr.snapshots[1]) and st.deltas_applied == 0
    gaps = np.setdiff1d(np.arange(res.iterations + 1), tr.snapshot_iterations)
    if gaps.size:
        with pytest.raises(InvalidInputError, match="snapshot iterations only"):
            replay(rec, int(gaps[0]))


# ----------------------------------------------------------------------------- reproduce


def test_reproduce_is_bitwise_on_the_same_machine(smo_loaded) -> None:
    rec, ds, store = smo_loaded
    rp = reproduce(rec, ds)
    assert rp.agreement == "bitwise" and rp.bitwise and rp.max_abs_difference == 0.0
    assert rp.problem_identical and rp.iterations[0] == rp.iterations[1]
    assert rp.status == ("converged", "converged") and rp.dropped_options == ()
    rid = store.save(rp.record)
    back = store.load(rid)
    assert back.parent_id == rec.run_id and store.verify(rid).chain == [rid, rec.run_id]
    assert back.attachments["reproduction_of"]["agreement"] == "bitwise"


def test_reproduce_from_a_data_file(tmp_path, rng) -> None:
    """The usual path: the data come back from a CSV file, not from memory."""
    from solver.data import load_table

    ds = _dataset(rng, n=50)
    path = tmp_path / "batches.csv"
    with path.open("w") as fh:
        fh.write("m0,m1,m2,decision\n")
        for row, lab in zip(ds.X.tolist(), ds.labels.tolist(), strict=True):
            fh.write(",".join(repr(v) for v in row) + f",{lab}\n")
    from_file = load_table(path, label="decision")
    store = RunStore(tmp_path / "s")
    rec = _smo_run(from_file, store=store, kkt_tol=1e-6)
    rp = reproduce(rec, load_table(path, label="decision"))
    assert rp.bitwise
    # an edited data file is refused, naming the fingerprint
    lines = path.read_text().splitlines()
    first = lines[1].split(",")
    first[0] = repr(float(first[0]) + 1e-9)
    lines[1] = ",".join(first)
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InvalidInputError, match="fingerprint"):
        reproduce(rec, load_table(path, label="decision"))


def test_reproduce_warm_start_and_weights(tmp_path, rng) -> None:
    from solver.smo import solve_smo

    ds = _dataset(rng, n=60)
    store = RunStore(tmp_path)
    std = Standardiser.fit(ds.X)
    sw = np.linspace(0.5, 1.5, 60)
    weighted = binary_classification(std.transform(ds.X), ds.labels, kernel=RBFKernel(), C=2.0,
                                     class_weight={"reject": 2.0}, sample_weight=sw)
    a0 = solve_smo(weighted, kkt_tol=1e-1).alpha  # a rough, feasible warm start
    rec = _smo_run(ds, C=2.0, store=store, kkt_tol=1e-7, alpha0=a0,
                   class_weight={"reject": 2.0}, sample_weight=sw)
    assert rec.result.options["warm_start"] is True
    rp = reproduce(rec, ds)
    assert rp.bitwise and rp.problem_identical
    assert any("warm start" in n for n in rp.notes)
    assert any("sample weights" in n for n in rp.notes)


def test_reproduce_reports_a_difference_within_and_beyond_tolerance(smo_loaded) -> None:
    rec, ds, _ = smo_loaded
    looser = reproduce(rec, ds, options={"kkt_tol": 1e-3})
    assert not looser.bitwise and looser.agreement in ("within_tolerance", "different")
    assert looser.max_abs_difference > 0
    assert any("overridden" in n for n in looser.notes)
    wide = reproduce(rec, ds, options={"kkt_tol": 1e-3}, tolerance=1e6)
    assert wide.agreement == "within_tolerance" and wide.within_tolerance
    tight = reproduce(rec, ds, options={"kkt_tol": 1e-3}, tolerance=0.0)
    assert tight.agreement == "different" and not tight.within_tolerance


def test_reproduce_qp_run(tmp_path, rng) -> None:
    from solver.qp import solve_qp

    ds = _dataset(rng, n=40)
    std = Standardiser.fit(ds.X)
    prob = binary_classification(std.transform(ds.X), ds.labels, kernel=RBFKernel(), C=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        res = solve_qp(prob, callback=lambda state: None)
    store = RunStore(tmp_path)
    rec = store.load(store.save(RunRecord(problem=prob, result=res, data=ds.describe(),
                                          standardiser=std)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        rp = reproduce(rec, ds)
    assert rp.problem_identical and rp.within_tolerance
    assert "callback" not in rp.options and "alpha0" not in rp.options
    assert rp.agreement == "bitwise"  # cvxopt is deterministic on one machine


def test_reproduce_rejects_wrong_data(smo_loaded, rng) -> None:
    rec, ds, _ = smo_loaded
    other = _dataset(np.random.default_rng(1), n=120)
    with pytest.raises(InvalidInputError, match="batches.csv.*fingerprint"):
        reproduce(rec, other)
    with pytest.raises(InvalidInputError, match="Dataset"):
        reproduce(rec, ds.X)
