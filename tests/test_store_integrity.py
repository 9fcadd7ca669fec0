"""Store integrity that does not rest on the catalog: forgeries, links, sizes, catalog damage.

Every forgery below is *consistent*: the forger rewrites the file, the manifest's digest
table and ``manifest.sha256``, and deletes (or damages) the catalog, so digests alone
pass.  The run checked against itself must still name the figure that disagrees.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import solver
from solver.store import RunStore
from solver.store.format import dump_json, read_npz, read_table, write_npz, write_table

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "solver" / "data"


def cli(*argv: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "KKTRACE_THREADS": "1"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *argv], capture_output=True,
                          text=True, env=env, cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> tuple[Path, str, str]:
    """One SMO run (full trace, explanation, held-out scores) and its QP challenger."""
    store = tmp_path_factory.mktemp("trained") / "store"
    # kkt_tol 1e-5: over 1000 iterations, so the trace holds a snapshot between start and end
    out = solver.train(DATA / "tablet_coating.csv", label="lab_decision", C=10, kkt_tol=1e-5,
                       solver="both", holdout=DATA / "tablet_coating_holdout.csv",
                       store=store, quiet=True)
    assert out.converged
    return store, out.run_ids[0], out.run_ids[1]


def _copy_run(trained, dst: Path) -> tuple[Path, str]:
    store, smo, _ = trained
    dst.mkdir(parents=True)
    shutil.copytree(store / smo, dst / smo)
    return dst, smo


def _reseal(run_dir: Path, manifest: dict, changed: dict[str, bytes] | None = None) -> None:
    """Write changed files and a manifest whose digest table and digest file match them."""
    for name, data in (changed or {}).items():
        (run_dir / name).write_bytes(data)
        manifest["files"][name] = {"sha256": hashlib.sha256(data).hexdigest(),
                                   "bytes": len(data)}
    mb = dump_json(manifest)
    (run_dir / "manifest.json").write_bytes(mb)
    (run_dir / "manifest.sha256").write_text(f"{hashlib.sha256(mb).hexdigest()}  manifest.json\n")


def _npz(run_dir: Path, name: str) -> dict[str, np.ndarray]:
    return read_npz((run_dir / name).read_bytes(), name)


def _forge_certificate(d: Path, m: dict) -> None:
    m["certificate"]["duality_gap"] = 0.0
    m["certificate"]["max_violation"] = 1e-15
    _reseal(d, m)


def _forge_gamma(d: Path, m: dict) -> None:
    m["problem"]["kernel"]["params"]["gamma"] = 50.0
    _reseal(d, m)


def _forge_C(d: Path, m: dict) -> None:
    m["problem"]["info"]["C"] = 100.0
    _reseal(d, m)


def _forge_alpha(d: Path, m: dict) -> None:
    sol = _npz(d, "solution.npz")
    sol["alpha"] = sol["alpha"] * 0.5
    _reseal(d, m, {"solution.npz": write_npz(sol)})


def _forge_model(d: Path, m: dict) -> None:
    mod = _npz(d, "model.npz")
    mod["coefficients"] = -mod["coefficients"]
    _reseal(d, m, {"model.npz": write_npz(mod)})


def _forge_trace(d: Path, m: dict) -> None:
    cols = read_table((d / "trace.parquet").read_bytes(), "trace.parquet")
    keep = slice(0, len(cols["iteration"]) - 10)
    m["trace"]["rows"] -= 10
    _reseal(d, m, {"trace.parquet": write_table({k: v[keep] for k, v in cols.items()})})


def _forge_snapshot(d: Path, m: dict) -> None:
    snap = _npz(d, "snapshots.npz")
    assert snap["snapshots"].shape[0] >= 3
    snap["snapshots"][1, 0] += 0.25
    _reseal(d, m, {"snapshots.npz": write_npz(snap)})


def _forge_labels(d: Path, m: dict) -> None:
    lab = m["problem"]["info"]["labels"]
    lab["negative"], lab["positive"] = lab["positive"], lab["negative"]
    mj = json.loads((d / "model.json").read_text())
    mj["labels"] = dict(lab)
    _reseal(d, m, {"model.json": dump_json(mj)})


FORGERIES = {
    "certificate figures": (_forge_certificate, ["certificate.max_violation",
                                                 "certificate.duality_gap"]),
    "gamma": (_forge_gamma, ["model.json: kernel", "'gamma': 50.0",
                             "certificate.dual_objective"]),
    "C": (_forge_C, ["problem.info.C 100.0"]),
    "alpha scaled": (_forge_alpha, ["certificate.dual_objective",
                                    "model.npz: coefficients differs"]),
    "model negated": (_forge_model, ["model.npz: coefficients differs from the model rebuilt"]),
    "trace rows dropped": (_forge_trace, ["trace.parquet: a full trace must hold one row per "
                                          "iteration"]),
    "one snapshot altered": (_forge_snapshot, ["snapshots.npz: snapshot at iteration"]),
    "labels swapped": (_forge_labels, ["explanation.parquet: label of point",
                                       "holdout.json: labels"]),
}


@pytest.mark.parametrize("kind", sorted(FORGERIES))
def test_consistent_forgery_with_the_catalog_deleted_is_named(trained, tmp_path, kind) -> None:
    store, rid = _copy_run(trained, tmp_path / "s")  # a store without any catalog
    d = store / rid
    forge, expected = FORGERIES[kind]
    forge(d, json.loads((d / "manifest.json").read_text()))
    assert not (store / "catalog.sqlite").exists()
    digests = RunStore(store)
    assert not any("content" in p for p in digests.verify(rid).problems)  # digests all agree
    r = cli("verify", rid, "--store", str(store))
    assert r.returncode == 1, r.stdout + r.stderr
    assert "Traceback" not in r.stderr
    for text in expected:
        assert text in r.stdout, (text, r.stdout)
    # every reading command that loads the run refuses it too
    with pytest.raises(solver.IntegrityError):
        solver.load_run(rid, store=store)


@pytest.mark.parametrize("catalog", ["garbage", "row deleted", "rebuilt"])
def test_forgery_is_caught_whatever_the_catalog_says(trained, tmp_path, catalog) -> None:
    src, smo, _ = trained
    store = tmp_path / "s"
    shutil.copytree(src, store)
    d = store / smo
    _forge_certificate(d, json.loads((d / "manifest.json").read_text()))
    st = RunStore(store)
    if catalog == "garbage":
        for f in store.glob("catalog.sqlite*"):
            f.unlink()
        (store / "catalog.sqlite").write_bytes(b"not a database " * 100)
    elif catalog == "row deleted":
        con = sqlite3.connect(store / "catalog.sqlite")
        con.execute("DELETE FROM runs WHERE run_id = ?", (smo,))
        con.commit()
        con.close()
    else:
        st.rebuild_catalog()
    v = st.verify(smo)
    assert not v.ok
    assert any(p.startswith("manifest.json: certificate.max_violation: manifest says 1e-15")
               for p in v.problems), v.problems
    r = cli("verify", smo, "--store", str(store))
    assert r.returncode == 1 and "certificate.duality_gap" in r.stdout
    assert "files intact" not in r.stdout
    if catalog == "garbage":  # reading set nothing aside: the damaged catalog is as it was
        assert (store / "catalog.sqlite").read_bytes() == b"not a database " * 100


def test_untouched_runs_verify_with_every_semantic_check(trained) -> None:
    store, smo, qp = trained
    for rid in (smo, qp):
        v = RunStore(store).verify(rid)
        assert v.ok, v.problems


def test_manifest_fields_are_checked_against_the_spec(trained, tmp_path) -> None:
    """1e400 parses as infinity and "yesterday" is no time: both are named."""
    cases = [
        (lambda m: m["problem"]["info"].__setitem__("C", "__INF__"), "problem.info.C"),
        (lambda m: m.__setitem__("created", "yesterday"), "field created 'yesterday'"),
        (lambda m: m["solver"].__setitem__("name", "magic"), "solver.name 'magic'"),
        (lambda m: m["certificate"].__setitem__("bias_from", "guess"), "certificate.bias_from"),
        (lambda m: m["problem"]["kernel"]["params"].__setitem__("gamma_source", "oracle"),
         "gamma_source"),
    ]
    for k, (edit, text) in enumerate(cases):
        store, rid = _copy_run(trained, tmp_path / f"s{k}")
        d = store / rid
        m = json.loads((d / "manifest.json").read_text())
        edit(m)
        mb = dump_json(m).replace(b'"__INF__"', b"1e400")
        (d / "manifest.json").write_bytes(mb)
        (d / "manifest.sha256").write_text(f"{hashlib.sha256(mb).hexdigest()}  manifest.json\n")
        v = RunStore(store).verify(rid)
        assert not v.ok and any(text in p for p in v.problems), (text, v.problems)


def test_symlinks_and_hard_links_are_refused(trained, tmp_path) -> None:
    src, smo, _ = trained
    # the whole run folder a link to an identical copy outside the store
    store = tmp_path / "s1"
    store.mkdir()
    outside = tmp_path / "elsewhere"
    shutil.copytree(src / smo, outside)
    (store / smo).symlink_to(outside, target_is_directory=True)
    v = RunStore(store).verify(smo)
    assert not v.ok and "is a symbolic link" in v.problems[0]
    r = cli("verify", smo, "--store", str(store))
    assert r.returncode == 1 and "symbolic link" in r.stdout
    r = cli("explain", smo, "--store", str(store))
    assert r.returncode == 1 and "symbolic link" in r.stderr
    # one file a link to an identical copy
    store2, rid = _copy_run(trained, tmp_path / "s2")
    f = store2 / rid / "model.npz"
    copy = tmp_path / "model-copy.npz"
    shutil.copy(f, copy)
    f.unlink()
    f.symlink_to(copy)
    v = RunStore(store2).verify(rid)
    assert not v.ok and v.problems == [
        "model.npz: is a symbolic link (a run file must be a regular file in the folder)"]
    # a hard link: the file can be changed through its other name
    store3, rid = _copy_run(trained, tmp_path / "s3")
    os.link(store3 / rid / "solution.npz", tmp_path / "other-name.npz")
    v = RunStore(store3).verify(rid)
    assert not v.ok and v.problems[0].startswith("solution.npz: has 2 hard links")


def test_sizes_are_compared_before_hashing(trained, tmp_path) -> None:
    """A 64 GiB (sparse) file in place of trace.parquet is refused from its size alone."""
    store, rid = _copy_run(trained, tmp_path / "s")
    f = store / rid / "trace.parquet"
    with open(f, "r+b") as fh:
        fh.truncate(64 << 30)
    v = RunStore(store).verify(rid)
    assert not v.ok
    assert v.problems[0].startswith(f"trace.parquet: content changed (size {64 << 30} vs "
                                    "recorded") and "not hashed" in v.problems[0]


def test_semantic_check_uses_only_support_vector_columns(trained, monkeypatch) -> None:
    """Q·α is formed from K[:, S] with S the support set, never an n × n product."""
    from solver.problem import DualProblem

    store, smo, _ = trained
    rec = RunStore(store).load(smo)
    n_support = int(np.sum(rec.result.alpha != 0))
    assert n_support < rec.problem.n
    widths = []
    real = DualProblem.kernel_block

    def spy(self, rows, cols):
        widths.append(np.asarray(cols).shape[0] if not isinstance(cols, slice) else self.n)
        return real(self, rows, cols)

    monkeypatch.setattr(DualProblem, "kernel_block", spy)
    assert RunStore(store).verify(smo).ok
    assert widths and max(widths) == n_support
