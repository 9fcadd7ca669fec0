"""Run store under faults: writers killed mid-save, failing I/O steps, eight concurrent writers."""

from __future__ import annotations

import multiprocessing
import os
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
from test_store_support import save_loop, synthetic_record

import solver.store.store as store_mod
from solver.store import RunStore, is_run_id
from solver.store.catalog import Catalog

TESTS = str(Path(__file__).resolve().parent)
ROOT = str(Path(__file__).resolve().parent.parent)

WRITER = """
import sys
sys.path[:0] = [{tests!r}, {root!r}]
from test_store_support import save_loop, synthetic_record
from solver.store import RunStore, is_run_id
store = RunStore(sys.argv[1])
rows, count, seed = int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
recs = [synthetic_record(seed + s, rows=rows) for s in range(2)]
print("ready", flush=True)
k = 0
while count <= 0 or k < count:
    print(store.save(recs[k % 2]), flush=True)
    k += 1
"""


def _writer(root: Path, rows: int, count: int, seed: int) -> subprocess.Popen:
    code = WRITER.format(tests=TESTS, root=ROOT)
    return subprocess.Popen([sys.executable, "-c", code, str(root), str(rows), str(count),
                             str(seed)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def _check_store(store: RunStore, must_have: set[str]) -> None:
    """No half run is visible; the catalog never lists a missing folder; rebuild agrees."""
    folders = set(store.run_ids())
    listed_before = set(Catalog(store.root).digests()) if store.catalog_path.exists() else set()
    assert listed_before <= folders  # rows are written only after the rename
    assert must_have <= folders
    listed = {r["run_id"] for r in store.runs()}
    assert listed == folders
    for rid in folders - must_have:  # the run completed but was not yet reported
        assert store.verify(rid).ok, store.verify(rid).problems
    assert store.rebuild_catalog() == len(folders)
    assert {r["run_id"] for r in store.runs()} == folders


def _log_lines(log: Path) -> list[str]:
    return log.read_text().split("\n")[:-1] if log.exists() else []  # complete lines only


def _wait_lines(log: Path, n: int, proc, timeout: float = 60.0) -> list[str]:
    deadline = time.monotonic() + timeout
    while len(lines := _log_lines(log)) < n:
        assert proc.is_alive(), f"writer died: exit code {proc.exitcode}"
        assert time.monotonic() < deadline, "writer too slow"
        time.sleep(0.002)
    return lines


def test_killed_writers_never_leave_a_half_run(tmp_path) -> None:
    """30 writer processes killed (SIGKILL) at seeded random moments while saving runs.

    Writers are forked from a fork server that has the store imported, so each starts in
    milliseconds.  The delay before a kill is a seeded fraction (0 … 1.5) of the time
    the writer took for its second save (the first pays one-off costs), so the kill lands
    at a random phase of a later save whatever the machine's load.
    """
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["test_store_support", "solver.store"])
    store = RunStore(tmp_path / "s")
    sched = np.random.default_rng(2024)
    reported: set[str] = set()
    for rep in range(30):
        log = tmp_path / f"writer{rep}.log"
        p = ctx.Process(target=save_loop, args=(str(store.root), 600, 0, rep, str(log)))
        p.start()
        _wait_lines(log, 2, p)
        t0 = time.monotonic()
        _wait_lines(log, 3, p)
        took = time.monotonic() - t0
        time.sleep(float(sched.uniform(0.0, 1.5)) * took)
        p.kill()
        p.join()
        reported |= {s for s in _log_lines(log) if is_run_id(s)}
        _check_store(store, reported)
    ids = store.run_ids()
    assert len(ids) >= 10  # the schedule let saves complete between kills
    assert all(store.verify(r).ok for r in ids)
    assert len(store.temp_folders()) > 0  # some kills landed mid-write …
    store.clean_temp()  # … and maintenance removes what they left
    assert store.temp_folders() == []
    assert len(store.runs()) == len(ids)


_TARGETS = {"write": "solver.store.store._write_durable",
            "fsync_dir": "solver.store.store._fsync_dir", "rename": "os.rename"}


@pytest.mark.parametrize("step", sorted(_TARGETS))
def test_failing_io_step_leaves_nothing(tmp_path, monkeypatch, step) -> None:
    """Fail the k-th call of one I/O step (k = 1, 2, …) until a save gets through."""
    store = RunStore(tmp_path)
    keep = store.save(synthetic_record(1, rows=20))
    rec = synthetic_record(2, rows=20)
    real = {"write": store_mod._write_durable, "fsync_dir": store_mod._fsync_dir,
            "rename": os.rename}[step]
    failures = 0
    for fail_at in range(1, 30):
        calls = {"n": 0}

        def flaky(*args, fail_at=fail_at, calls=calls):
            calls["n"] += 1
            if calls["n"] == fail_at:
                raise OSError(28, "No space left on device (injected)")
            return real(*args)

        monkeypatch.setattr(_TARGETS[step], flaky)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                rid = store.save(rec)
            except OSError:
                rid = None
        monkeypatch.undo()
        assert store.temp_folders() == []
        ids = set(store.run_ids())
        if rid is None:
            failures += 1
            assert ids == {keep}
            assert {r["run_id"] for r in store.runs()} == {keep}
            continue
        assert ids == {keep, rid} and store.verify(rid).ok
        # only the sync of the store folder after the rename may fail and still save
        # (the run is complete); the caller is warned
        assert (calls["n"] >= fail_at) == (step == "fsync_dir")
        assert bool(caught) == (step == "fsync_dir")
        break
    else:
        pytest.fail("no save got through")
    assert failures == {"write": 13, "fsync_dir": 1, "rename": 1}[step]
    assert {r["run_id"] for r in store.runs()} == set(store.run_ids())


def test_eight_concurrent_writers_lose_nothing(tmp_path) -> None:
    store = RunStore(tmp_path / "shared")
    procs = [_writer(store.root, rows=300, count=4, seed=10 * k) for k in range(8)]
    outs = [p.communicate(timeout=120) for p in procs]
    assert all(p.returncode == 0 for p in procs), [e for _, e in outs]
    ids = {line for out, _ in outs for line in out.split() if line != "ready"}
    assert len(ids) == 32
    # every writer's catalog row landed (no lost insert under contention)
    assert set(Catalog(store.root).digests()) == ids
    assert {r["run_id"] for r in store.runs()} == ids
    for rid in ids:
        v = store.verify(rid)
        assert v.ok, v.problems
    assert store.temp_folders() == []


ZYGOTE = r"""
import contextlib, io, os, sys, time
sys.path[:0] = [{root!r}]
os.environ["KKTRACE_THREADS"] = "1"
import solver.cli
data, store, scratch = sys.argv[1], sys.argv[2], sys.argv[3]
argv = ["train", data, "--label", "y", "--solver", "both", "--quiet", "--store"]
with contextlib.redirect_stdout(io.StringIO()):
    solver.cli.main(argv + [scratch])  # compile and load everything once, before any fork
print("ready", flush=True)
for line in sys.stdin:
    cmd = line.split()
    if cmd[0] == "go":
        t0 = time.monotonic()
        pid = os.fork()
        if pid == 0:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, 1)
            os.dup2(devnull, 2)
            os._exit(solver.cli.main(argv + [store]))
        print(pid, flush=True)
    elif cmd[0] == "wait":
        _, status = os.waitpid(int(cmd[1]), 0)
        sig = os.WTERMSIG(status) if os.WIFSIGNALED(status) else 0
        print(sig, time.monotonic() - t0, flush=True)
"""


def _small_csv(path: Path, rng: np.random.Generator, n: int = 120) -> Path:
    X = rng.normal(size=(n, 3))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] + 0.3 * rng.normal(size=n) > 0, "pass", "fail")
    lines = ["a,b,c,y"] + [f"{r[0]:.6f},{r[1]:.6f},{r[2]:.6f},{lab}" for r, lab in zip(X, y,
                                                                                    strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_sigkilled_train_both_leaves_verifiable_runs_and_cleanable_temps(tmp_path) -> None:
    """>= 50 SIGKILLs at seeded random moments of ``kktrace train --solver both``.

    A warmed-up parent forks one ``train`` per round (so every round is the same few
    tenths of a second of work); the kill lands at a uniform fraction 0 … 1.2 of the
    measured duration of an unkilled round.  Afterwards every listed run verifies (digests
    and the run against itself), every SMO run either has its QP challenger or is listed
    as missing it, the audit log's chain is intact, and ``clean`` leaves no ``.tmp-*``.
    """
    import signal

    from solver.store.auditlog import check_log

    rng = np.random.default_rng(20261202)
    data = _small_csv(tmp_path / "batches.csv", rng)
    store = tmp_path / "store"
    z = subprocess.Popen([sys.executable, "-c", ZYGOTE.format(root=ROOT), str(data), str(store),
                          str(tmp_path / "scratch")], stdin=subprocess.PIPE,
                         stdout=subprocess.PIPE, text=True)

    def ask(line: str) -> str:
        z.stdin.write(line + "\n")
        z.stdin.flush()
        return z.stdout.readline().strip()

    try:
        assert z.stdout.readline().strip() == "ready"
        took = []
        for _ in range(3):  # unkilled rounds: how long one train takes here, now
            pid = ask("go")
            sig, secs = ask(f"wait {pid}").split()
            assert sig == "0"
            took.append(float(secs))
        span = float(np.median(took))
        kills = rounds = 0
        while kills < 50:
            rounds += 1
            assert rounds < 200, f"only {kills} kills landed in {rounds} rounds"
            pid = ask("go")
            time.sleep(float(rng.uniform(0.0, 1.2)) * span)
            os.kill(int(pid), signal.SIGKILL)
            sig, _ = ask(f"wait {pid}").split()
            kills += sig == str(int(signal.SIGKILL))
    finally:
        z.stdin.close()
        z.wait(timeout=60)
    st = RunStore(store)
    listing = st.listing()
    ids = [r["run_id"] for r in listing.rows]
    assert len(ids) >= 6  # unkilled rounds and late kills saved complete runs
    for rid in ids:
        v = st.verify(rid)
        assert v.ok, (rid, v.problems)
    qp_parents = {r["parent_id"] for r in listing.rows if r["solver"] == "qp"}
    missing = {m["run_id"] for m in listing.missing_challengers}
    for r in listing.rows:
        if r["solver"] == "smo":
            assert (r["run_id"] in qp_parents) != (r["run_id"] in missing), r["run_id"]
    assert check_log(store)[0] == []
    assert all(not t["writer_running"] for t in listing.temp_folders)
    st.clean_temp()
    assert st.temp_folders() == []
    assert [r["run_id"] for r in st.runs()] == ids
