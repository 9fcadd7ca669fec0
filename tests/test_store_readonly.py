"""Reading commands on a read-only store (permissions enforced) and next to a locked catalog.

Root bypasses file permissions, so the commands run with the capabilities that grant the
bypass dropped (``capsh --drop=cap_dac_override,cap_dac_read_search,cap_fowner``); as an
ordinary user they run as they are.  A write into the store is tried first under the same
conditions, so the test shows that the permissions really hold.
"""

from __future__ import annotations

import os
import shutil
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

import solver

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "solver" / "data"
DROP = "--drop=cap_dac_override,cap_dac_read_search,cap_fowner,cap_linux_immutable"


def _unprivileged_prefix() -> list[str]:
    if os.geteuid() != 0:
        return []
    capsh = shutil.which("capsh")
    if capsh:
        return [capsh, DROP, "--", "-c", 'exec "$@"', "kktrace"]
    setpriv = shutil.which("setpriv")
    if setpriv:  # drop the same capabilities from the bounding and inheritable sets
        caps = "-dac_override,-dac_read_search,-fowner"
        return [setpriv, f"--bounding-set={caps}", f"--inh-caps={caps}", "--"]
    pytest.skip("running as root without capsh or setpriv: the read-only permissions "
                "cannot be enforced on this machine")


def kk(*argv: str, unprivileged: bool = True, timeout: float = 300) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "KKTRACE_THREADS": "1"}
    prefix = _unprivileged_prefix() if unprivileged else []
    return subprocess.run([*prefix, sys.executable, "-m", "solver.cli", *argv],
                          capture_output=True, text=True, env=env, timeout=timeout)


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    base = tmp_path_factory.mktemp("ro")
    store = base / "store"
    out = solver.train(DATA / "tablet_coating.csv", label="lab_decision", C=10,
                       kkt_tol=1e-4, solver="both", holdout=DATA / "tablet_coating_holdout.csv",
                       store=store, quiet=True)
    assert solver.verify(out.run_ids[0], store=store).ok
    return base, store, out.run_ids


def _tree(root: Path) -> dict[str, tuple[int, int, int]]:
    out = {}
    for p in sorted(root.rglob("*")):
        st = p.lstat()
        out[str(p.relative_to(root))] = (st.st_size, st.st_mtime_ns, stat.S_IMODE(st.st_mode))
    return out


def _read_only(root: Path) -> None:
    for p in sorted(root.rglob("*"), reverse=True) + [root]:
        mode = p.lstat().st_mode
        os.chmod(p, 0o555 if stat.S_ISDIR(mode) else 0o444)


def _writable(root: Path) -> None:
    for p in [root, *sorted(root.rglob("*"))]:
        os.chmod(p, 0o755 if p.is_dir() else 0o644)


def _reading_commands(store: Path, smo: str, qp: str, out: Path) -> list[tuple[list[str], str]]:
    s = ["--store", str(store)]
    return [
        (["runs", *s], smo),
        (["verify", smo, *s], "files intact"),
        (["explain", smo, *s], "category"),
        (["apply", smo, str(DATA / "tablet_coating_holdout.csv"), *s], "balanced accuracy"),
        (["replay", smo, "--iteration", "5", *s], "rebuilt at iteration 5"),
        (["compare", smo, qp, *s], "verdict: agree"),
        (["report", smo, qp, "--out", str(out), "--format", "json", *s], "report for run"),
    ]


def test_every_reading_command_works_on_a_read_only_store(pair, tmp_path) -> None:
    base, src, (smo, qp) = pair
    store = tmp_path / "archive"
    shutil.copytree(src, store)
    for f in store.glob("catalog.sqlite-*"):  # an archive copied without the WAL side files
        f.unlink()
    _read_only(store)
    before = _tree(store)
    try:
        probe = subprocess.run([*_unprivileged_prefix(), "touch", str(store / "probe")],
                               capture_output=True)
        assert probe.returncode != 0 and not (store / "probe").exists(), \
            "the store is writable: the permissions are not enforced"
        for argv, expect in _reading_commands(store, smo, qp, tmp_path / "report"):
            r = kk(*argv)
            assert r.returncode == 0, (argv, r.stdout, r.stderr)
            assert expect in r.stdout, (argv, r.stdout)
        r = kk("verify", smo, "--store", str(store))
        assert "audit log not written" in r.stdout and "read-only" in r.stdout
        assert (tmp_path / "report" / "report.json").is_file()
        assert _tree(store) == before  # nothing written, nothing touched
    finally:
        _writable(store)


_LOCKER = """
import sqlite3, sys, time
con = sqlite3.connect(sys.argv[1], isolation_level=None)
con.execute("PRAGMA locking_mode = EXCLUSIVE")
con.execute("BEGIN EXCLUSIVE")
con.execute("UPDATE meta SET value = value")
print("locked", flush=True)
time.sleep(600)
"""


def test_reading_and_training_next_to_a_writer_holding_the_catalog_lock(pair, tmp_path) -> None:
    from solver.store.catalog import BUSY_TIMEOUT_S

    base, src, (smo, qp) = pair
    store = tmp_path / "busy"
    shutil.copytree(src, store)
    locker = subprocess.Popen([sys.executable, "-c", _LOCKER, str(store / "catalog.sqlite")],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert locker.stdout.readline().strip() == "locked"
        for argv, expect in _reading_commands(store, smo, qp, tmp_path / "report"):
            r = kk(*argv, unprivileged=False)
            assert r.returncode == 0, (argv, r.stdout, r.stderr)
            assert expect in r.stdout, (argv, r.stdout)
        t0 = time.monotonic()
        r = kk("train", str(DATA / "tablet_coating.csv"), "--label", "lab_decision",
               "--store", str(store), unprivileged=False)
        waited = time.monotonic() - t0
        assert r.returncode == 0, r.stderr
        assert "catalog is stale" in r.stdout and f"within {BUSY_TIMEOUT_S:g} s" in r.stdout
        assert waited >= BUSY_TIMEOUT_S
        new = r.stdout.split("primary run ")[1].split()[0]
        r = kk("runs", "--store", str(store), unprivileged=False)
        assert r.returncode == 0 and new in r.stdout and "listed from their folders" in r.stdout
    finally:
        locker.kill()
        locker.wait()
    # once the lock is gone, the next save indexes the run the catalog missed
    st = solver.open_store(store)
    from test_store_support import synthetic_record

    st.save(synthetic_record(1, rows=10))
    assert st.listing().catalog_note is None
    assert new in {r["run_id"] for r in st.runs()}


def test_a_catalog_that_is_a_directory_does_not_stop_reading_or_training(pair, tmp_path) -> None:
    base, src, (smo, qp) = pair
    store = tmp_path / "odd"
    shutil.copytree(src, store)
    for f in store.glob("catalog.sqlite*"):
        f.unlink()
    (store / "catalog.sqlite").mkdir()
    for argv, expect in _reading_commands(store, smo, qp, tmp_path / "report")[:3]:
        r = kk(*argv, unprivileged=False)
        assert r.returncode == 0 and expect in r.stdout, (argv, r.stdout, r.stderr)
    r = kk("train", str(DATA / "tablet_coating.csv"), "--label", "lab_decision",
           "--store", str(store), unprivileged=False)
    assert r.returncode == 0 and "catalog is stale" in r.stdout, r.stdout + r.stderr
