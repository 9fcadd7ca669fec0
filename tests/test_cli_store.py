"""End-to-end: keys / train --sign / verify --trusted, output paths, runs leftovers, clean."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "solver" / "data"


def kk(*argv: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "KKTRACE_THREADS": "1"}
    env.pop("KKTRACE_SIGNING_KEY", None)
    return subprocess.run([sys.executable, "-m", "solver.cli", *argv], capture_output=True,
                          text=True, env=env, timeout=300)


def test_signed_training_verified_with_trusted_key_and_outputs_guarded(tmp_path) -> None:
    keys = tmp_path / "keys"
    keys.mkdir()
    r = kk("keys", "new", "qa-lead", "--dir", str(keys))
    assert r.returncode == 0 and "qa-lead.private.pem" in r.stdout
    assert kk("keys", "new", "other", "--dir", str(keys)).returncode == 0
    store = str(tmp_path / "s")
    r = kk("train", str(DATA / "tablet_coating.csv"), "--label", "lab_decision", "--solver",
           "both", "--store", store, "--sign", str(keys / "qa-lead.private.pem"))
    assert r.returncode == 0, r.stderr
    smo = r.stdout.split("primary run ")[1].split()[0]
    qp = r.stdout.split("challenger run ")[1].split()[0]
    r = kk("verify", smo, "--store", store, "--trusted", str(keys / "qa-lead.public.pem"))
    assert r.returncode == 0 and "signed by qa-lead" in r.stdout and "a trusted key" in r.stdout
    r = kk("verify", smo, "--store", store, "--trusted", str(keys / "other.public.pem"))
    assert r.returncode == 1 and "not a trusted key" in r.stdout
    (Path(store) / smo / "manifest.sig").unlink()
    r = kk("verify", smo, "--store", store, "--trusted", str(keys / "qa-lead.public.pem"))
    assert r.returncode == 1 and "the run is unsigned" in r.stdout
    # output options never write into a run folder or over the catalog
    run_dir = Path(store) / qp
    before = sorted(p.name for p in run_dir.iterdir())
    for argv in (["apply", qp, str(DATA / "tablet_coating_holdout.csv"), "--out",
                  str(run_dir / "manifest.json")],
                 ["report", qp, "--out", str(run_dir)],
                 ["explain", qp, "--out", str(run_dir / "tables")],
                 ["apply", qp, str(DATA / "tablet_coating_holdout.csv"), "--out",
                  str(Path(store) / "catalog.sqlite")]):
        r = kk(*argv, "--store", store)
        assert r.returncode == 1, (argv, r.stderr)
        assert r.stderr.count("\n") == 1 and "kktrace: error:" in r.stderr
        assert f"inside run {qp}" in r.stderr or "catalog.sqlite" in r.stderr
    assert sorted(p.name for p in run_dir.iterdir()) == before
    assert kk("verify", qp, "--store", store).returncode == 0


def test_runs_reports_leftovers_and_clean_removes_dead_temps(tmp_path) -> None:
    store = tmp_path / "s"
    r = kk("train", str(DATA / "tablet_coating.csv"), "--label", "lab_decision", "--solver",
           "both", "--store", str(store))
    assert r.returncode == 0
    qp = r.stdout.split("challenger run ")[1].split()[0]
    smo = r.stdout.split("primary run ")[1].split()[0]
    import shutil

    shutil.rmtree(store / qp)  # as if the writer was killed between the two saves
    dead = store / f".tmp-{qp}-999999999"
    dead.mkdir()
    r = kk("runs", "--store", str(store))
    assert r.returncode == 0
    assert f"leftover: temporary folder {dead.name}" in r.stdout and "no longer running" in r.stdout
    assert f"incomplete: SMO run {smo}" in r.stdout
    r = kk("clean", "--store", str(store))
    assert r.returncode == 0 and f"removed {dead.name}" in r.stdout
    assert not dead.exists() and (store / smo).is_dir()
    r = kk("runs", "--store", str(store))
    assert "leftover" not in r.stdout and smo in r.stdout
