"""Signed runs (Ed25519, ``cryptography``) and the hash-chained audit log of the store."""

from __future__ import annotations

import json
import stat

import numpy as np
import pytest
from test_store_support import synthetic_record

import solver
from solver.store import RunStore
from solver.store.auditlog import EVENTS, LOG_FILE, check_log
from solver.store.signing import SIGNING_KEY_ENV, load_public_key


@pytest.fixture()
def keys(tmp_path):
    kdir = tmp_path / "keys"
    kdir.mkdir()
    qa = solver.new_signing_keys("qa-lead", kdir)
    other = solver.new_signing_keys("someone-else", kdir)
    return qa, other


def test_key_pair_files(keys) -> None:
    (priv, pub), _ = keys
    assert priv.name == "qa-lead.private.pem" and pub.name == "qa-lead.public.pem"
    assert stat.S_IMODE(priv.stat().st_mode) == 0o600
    assert b"BEGIN PRIVATE KEY" in priv.read_bytes() and b"BEGIN PUBLIC KEY" in pub.read_bytes()
    with pytest.raises(solver.InvalidInputError, match="never overwritten"):
        solver.new_signing_keys("qa-lead", priv.parent)
    with pytest.raises(solver.InvalidInputError, match="key name"):
        solver.new_signing_keys("../x", priv.parent)


def test_signed_run_verifies_with_the_right_key_only(tmp_path, keys) -> None:
    (priv, pub), (opriv, opub) = keys
    store = RunStore(tmp_path / "s", signing_key=priv)
    rid = store.save(synthetic_record(1, rows=40))
    assert (store.run_dir(rid) / "manifest.sig").is_file()
    v = solver.verify(rid, store=store, trusted=pub)
    assert v.ok and v.integrity.trusted and v.integrity.signer.startswith("qa-lead (key sha256")
    # without --trusted the signature is still checked for damage, and the note says so
    v0 = RunStore(tmp_path / "s").verify(rid)
    assert v0.ok and not v0.trusted and any("not checked against a trusted key" in n
                                            for n in v0.notes)
    # another key: refused, naming the signer and the trusted key
    v1 = solver.verify(rid, store=store, trusted=opub)
    assert not v1.ok and "which is not a trusted key" in v1.integrity.problems[0]
    assert solver.verify(rid, store=store, trusted=[opub, pub]).ok


def test_any_byte_change_breaks_a_signed_run(tmp_path, keys) -> None:
    (priv, pub), _ = keys
    store = RunStore(tmp_path / "s", signing_key=priv)
    rid = store.save(synthetic_record(2, rows=30))
    d = store.run_dir(rid)
    rng = np.random.default_rng(7)
    for name in ("manifest.sig", "manifest.json", "manifest.sha256", "solution.npz"):
        data = (d / name).read_bytes()
        for pos in sorted(set(rng.integers(0, len(data), size=12).tolist()) | {0, len(data) - 1}):
            bad = bytearray(data)
            bad[pos] ^= 0x01
            (d / name).write_bytes(bytes(bad))
            v = store.verify(rid, trusted=[load_public_key(pub)])
            assert not v.ok, (name, pos)
            (d / name).write_bytes(data)
    assert store.verify(rid, trusted=[load_public_key(pub)]).ok


def test_removed_or_replaced_signature_is_refused_with_trusted(tmp_path, keys) -> None:
    (priv, pub), (opriv, _) = keys
    store = RunStore(tmp_path / "s", signing_key=priv)
    rid = store.save(synthetic_record(3, rows=30))
    sig = store.run_dir(rid) / "manifest.sig"
    good = sig.read_bytes()
    sig.unlink()
    assert RunStore(tmp_path / "s").verify(rid).ok  # unsigned is fine without --trusted
    v = solver.verify(rid, store=tmp_path / "s", trusted=pub)
    assert not v.ok and v.integrity.problems[0].startswith("manifest.sig: missing; the run is "
                                                           "unsigned")
    # a forger re-signs the same digest with a key of their own
    from solver.store.signing import load_private_key, signature_file

    key, _ = load_private_key(opriv)
    digest = store.verify(rid).manifest_sha256
    sig.write_bytes(signature_file(key, "qa-lead", digest, "2026-01-01T00:00:00.000000Z"))
    v = solver.verify(rid, store=tmp_path / "s", trusted=pub)
    assert not v.ok and "not a trusted key" in v.integrity.problems[0]
    sig.write_bytes(good)
    assert solver.verify(rid, store=tmp_path / "s", trusted=pub).ok


def test_signing_key_from_the_environment(tmp_path, keys, monkeypatch) -> None:
    (priv, pub), _ = keys
    monkeypatch.setenv(SIGNING_KEY_ENV, str(priv))
    store = RunStore(tmp_path / "s")
    rid = store.save(synthetic_record(4, rows=20))
    assert store.verify(rid, trusted=[load_public_key(pub)]).ok


def _entries(root):
    return [json.loads(line) for line in (root / LOG_FILE).read_text().splitlines()]


def test_audit_log_chains_every_event(tmp_path) -> None:
    store = RunStore(tmp_path / "s")
    a = store.save(synthetic_record(1, rows=20))
    b = store.save(synthetic_record(2, rows=20), parent=a)
    solver.verify(b, store=store)
    store.rebuild_catalog()
    (store.root / f".tmp-{a}-999999999").mkdir()
    store.clean_temp()
    es = _entries(store.root)
    assert [e["event"] for e in es] == ["run_created", "run_created", "run_verified",
                                        "catalog_rebuilt", "temp_removed"]
    assert [e["seq"] for e in es] == [1, 2, 3, 4, 5]
    assert es[0]["prev_sha256"] == "0" * 64
    assert es[1]["details"]["parent"] == a
    assert es[0]["details"]["manifest_sha256"] == store.verify(a).manifest_sha256
    assert set(e["event"] for e in es) <= set(EVENTS)
    assert check_log(store.root)[0] == []


@pytest.mark.parametrize("edit", ["delete", "reorder", "change", "drop created"])
def test_audit_log_tampering_is_detected(tmp_path, edit) -> None:
    store = RunStore(tmp_path / "s")
    ids = [store.save(synthetic_record(k, rows=20)) for k in range(3)]
    solver.verify(ids[0], store=store)
    log = store.root / LOG_FILE
    lines = log.read_bytes().splitlines(keepends=True)
    assert len(lines) == 4
    if edit == "delete":
        del lines[1]
    elif edit == "reorder":
        lines[1], lines[2] = lines[2], lines[1]
    elif edit == "change":
        lines[0] = lines[0].replace(b'"run_created"', b'"run_verified"')
    else:  # remove the last run's entry and re-chain nothing after it: the run lacks it
        lines = lines[:2]
    log.write_bytes(b"".join(lines))
    problems, _, _ = check_log(store.root)
    if edit == "drop created":
        assert problems == []  # a cut tail leaves a valid chain ...
        v = store.verify(ids[2])  # ... but a run created after the log began lacks its entry
        assert not v.ok and "holds no run_created entry for run" in v.problems[0]
    else:
        assert problems and "audit-log.jsonl: line" in problems[0]
        v = store.verify(ids[0])
        assert not v.ok and any(p.startswith("audit-log.jsonl: line") for p in v.problems)


def test_concurrent_appends_keep_one_chain(tmp_path) -> None:
    import subprocess
    import sys
    from pathlib import Path

    root = tmp_path / "s"
    root.mkdir()
    top = str(Path(__file__).resolve().parent.parent)
    code = (f"import sys; sys.path.insert(0, {top!r}); from pathlib import Path; "
            "from solver.store.auditlog import append\n"
            "for k in range(50): assert append(Path(sys.argv[1]), 'run_verified', None, "
            "{'k': k}) is None")
    procs = [subprocess.Popen([sys.executable, "-c", code, str(root)]) for _ in range(4)]
    assert all(p.wait(timeout=120) == 0 for p in procs)
    assert check_log(root)[0] == []
    assert len(_entries(root)) == 200
