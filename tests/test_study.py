"""Studies (issue 20): grid × stratified seeded folds, every fit a stored run, the study a
parent record with member digests, the results table, best cell and one-standard-error
choice, idempotent re-runs, Dask execution and the bad-input errors."""

from __future__ import annotations

import io
import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import solver
from solver.demo import DEMO_LABEL, shipped_data
from solver.errors import InvalidInputError
from solver.studies import make_grid, study, study_folds
from solver.studies.table import aggregate, choose

TRAIN_CSV, _ = shipped_data()


def _demo(n: int | None = None):
    ds = solver.load_table(TRAIN_CSV, label=DEMO_LABEL)
    if n is None:
        return ds
    return solver.from_arrays(ds.X[:n], ds.labels[:n], feature_names=ds.feature_names,
                              label_name=ds.label_name, source="demo head")


def kk(*args: object, cwd: Path | None = None, timeout: float = 300
       ) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("KKTRACE_STORE",
                                                            "KKTRACE_SCHEDULER")}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=timeout)


# ----------------------------------------------------------------------------- grid, folds


def test_grid_axes_are_validated_and_sorted():
    g = make_grid("rbf", "10,0.1,1", [0.5, 0.05])
    assert g.C == (0.1, 1.0, 10.0) and g.gamma == (0.05, 0.5)
    assert [c.label for c in g.cells()][:3] == ["C=0.1 gamma=0.05", "C=1 gamma=0.05",
                                                "C=10 gamma=0.05"]
    assert make_grid("poly", [1], [0.1], "2,3").degree == (2, 3)
    assert make_grid("linear", [1, 2]).gamma == (None,)
    for bad, words in [(("rbf", "", [0.1]), "empty"), (("rbf", [], [0.1]), "empty"),
                       (("rbf", [1], None), "gamma is empty"),
                       (("rbf", "0,1", [0.1]), "not > 0"), (("rbf", [1], [-0.1]), "not > 0"),
                       (("rbf", [1, 1], [0.1]), "repeats"), (("rbf", "1,x", [0.1]), "'x'"),
                       (("rbf", [float("nan")], [0.1]), "finite"),
                       (("linear", [1], [0.1]), "no gamma"),
                       (("poly", [1], [0.1], [2.5]), "whole number")]:
        with pytest.raises(InvalidInputError, match=words):
            make_grid(*bad)


def test_study_folds_are_stratified_seeded_and_refuse_a_small_class():
    labels = np.array(["a"] * 12 + ["b"] * 7)
    f = study_folds(labels, 3, 5)
    assert np.array_equal(f, study_folds(labels, 3, 5))
    for k in range(3):
        assert abs(np.sum((f == k) & (labels == "b")) - 7 / 3) < 1
    with pytest.raises(InvalidInputError, match=r"class 'b' has 7 rows, fewer than the 8 folds"):
        study_folds(labels, 8, 0)


def test_one_standard_error_rule_picks_the_most_parsimonious_cell_within_one_se():
    # hand-made fold scores: best cell C=10 (mean 0.90, se 0.02); C=1 within, C=0.1 not
    rows = []
    for C, scores in [(0.1, [0.80, 0.82, 0.84]), (1.0, [0.87, 0.89, 0.88]),
                      (10.0, [0.86, 0.90, 0.94])]:
        for k, s in enumerate(scores):
            rows.append({"cell": f"C={C:g}", "C": C, "gamma": 0.1, "degree": None, "fold": k,
                         "score": s, "accuracy": s, "balanced_accuracy": s, "iterations": 10,
                         "seconds": 0.1, "status": "converged", "converged": True,
                         "max_violation": 1e-4, "duality_gap": 1e-5, "support_share": 0.3,
                         "bounded_share": 0.1, "curvature_fixes": 0, "shrink_events": 0,
                         "n_small_values": 0})
    cells = aggregate(rows)
    ch = choose(cells, "accuracy")
    assert ch["best"] == "C=10" and ch["one_se"] == "C=1"
    assert ch["best_se"] == pytest.approx(np.std([0.86, 0.90, 0.94], ddof=1) / np.sqrt(3))
    assert "7.10" in ch["rule"] and "Hastie" in ch["rule"]


# ----------------------------------------------------------------------------- the study


@pytest.fixture(scope="module")
def small_study(tmp_path_factory):
    store = tmp_path_factory.mktemp("study-store")
    table = store.parent / "results.parquet"
    ds = _demo(150)
    out = study(ds, C=[0.3, 3.0], gamma=[0.1, 0.5], folds=3, seed=2, scheduler="sequential",
                store=store, table=table)
    return ds, store, out


def test_every_fit_is_a_stored_run_and_the_study_a_verifying_parent(small_study):
    ds, store, out = small_study
    st = solver.RunStore(store)
    assert len(out.rows) == 4 * 3 and out.fitted == 12 and out.reused == 0
    parent = st.load_parent(out.study_id)  # verifies the parent and every member
    assert parent.task == "study" and solver.get_task("study").parent_record
    assert len(parent.members) == 12
    assert sorted(m.run_id for m in parent.members) == sorted(r["run_id"] for r in out.rows)
    for m in parent.manifest["members"]:
        digest = __import__("hashlib").sha256(
            (store / m["run_id"] / "manifest.json").read_bytes()).hexdigest()
        assert m["manifest_sha256"] == digest
        rec = st.load(m["run_id"])
        assert rec.manifest["trace"]["level"] == "sampled"
        assert rec.attachments["study_fit"]["key"] == rec.data["study_fit_key"]
    info = parent.info
    assert info["grid"]["C"] == [0.3, 3.0] and info["folds"]["seed"] == 2
    assert info["versions"]["kktrace"] == solver.__version__ and "dask" in info["versions"]
    # the stored folds rebuild the fold of every row
    folds = np.array(parent.attachments["folds"]["fold"])
    assert np.array_equal(folds, study_folds(ds.labels, 3, 2))
    # every fit trained on exactly the rows outside its fold
    for r in out.rows:
        rec = st.load(r["run_id"])
        assert rec.problem.n == int(np.sum(folds != r["fold"]))
        assert r["validation_rows"] == int(np.sum(folds == r["fold"]))
    with pytest.raises(InvalidInputError, match="not a model"):
        solver.get_task("study").predict([], np.zeros((1, 4)))


def test_results_table_is_stored_as_parquet_and_matches_the_rows(small_study):
    import pyarrow.parquet as pq

    _, store, out = small_study
    parent = solver.RunStore(store).load_parent(out.study_id)
    t = pq.read_table(io.BytesIO(parent.attachments["results_table"])).to_pylist()
    fits = [r for r in t if r["level"] == "fit"]
    cells = [r for r in t if r["level"] == "cell"]
    assert len(fits) == 12 and len(cells) == 4
    assert {r["run_id"] for r in fits} == {r["run_id"] for r in out.rows}
    on_disk = pq.read_table(out.table_path).to_pylist()
    assert on_disk == t
    for c in cells:  # per-cell mean is the mean of its folds' scores
        mine = [r["score"] for r in fits if r["cell"] == c["cell"]]
        assert c["mean_score"] == pytest.approx(np.mean(mine))
        assert c["iterations"] == sum(r["iterations"] for r in fits if r["cell"] == c["cell"])
    assert out.choice["one_se"] in {c["cell"] for c in cells}


def test_a_rerun_reuses_verified_fits_and_refits_a_damaged_one(small_study):
    ds, store, out = small_study
    again = study(ds, C=[0.3, 3.0], gamma=[0.1, 0.5], folds=3, seed=2,
                  scheduler="sequential", store=store)
    assert again.reused == 12 and again.fitted == 0
    assert [r["run_id"] for r in again.rows] == [r["run_id"] for r in out.rows]
    assert again.execution["mode"] == "none"
    # damage one member: the re-run notices, fits that cell again and says so
    victim = out.rows[0]["run_id"]
    f = next(p for p in (store / victim).iterdir() if p.name.startswith("trace"))
    f.write_bytes(f.read_bytes()[:-3] + b"xyz")
    third = study(ds, C=[0.3, 3.0], gamma=[0.1, 0.5], folds=3, seed=2,
                  scheduler="sequential", store=store)
    assert third.reused == 11 and third.fitted == 1
    assert any(victim in w and "not reused" in w for w in third.warnings)
    assert solver.RunStore(store).verify(third.study_id).ok
    # another seed gives other folds: nothing is reused
    other = study(ds, C=[0.3], gamma=[0.1], folds=3, seed=3, scheduler="sequential",
                  store=store)
    assert other.reused == 0 and other.fitted == 3


def test_study_runs_on_dask_and_gives_the_sequential_results(tmp_path):
    """Against the CI cluster (KKTRACE_TEST_SCHEDULER, started by .ci/run as separate
    ``dask scheduler`` / ``dask worker`` processes) when set, else a LocalCluster."""
    where = os.environ.get("KKTRACE_TEST_SCHEDULER") or "local"
    ds = _demo(120)
    kw = {"C": [0.5, 5.0], "gamma": [0.2], "folds": 3, "seed": 1}
    seq = study(ds, scheduler="sequential", store=tmp_path / "a", **kw)
    ticks = []
    dist = study(ds, scheduler=where, store=tmp_path / "b", progress=lambda *a: ticks.append(a),
                 **kw)
    assert dist.execution["mode"] == ("scheduler" if "://" in where else "local_cluster")
    assert dist.fitted == 6 and len(ticks) == 6 and ticks[-1][:2] == (6, 6)
    for a, b in zip(seq.rows, dist.rows, strict=True):
        assert (a["cell"], a["fold"]) == (b["cell"], b["fold"])
        assert a["accuracy"] == b["accuracy"] and a["iterations"] == b["iterations"]
    assert solver.RunStore(tmp_path / "b").verify(dist.study_id).ok


def _free_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def test_a_worker_killed_mid_study_is_replaced_and_the_study_completes(tmp_path):
    """A scheduler and two workers as separate processes (``dask scheduler``,
    ``dask worker --no-nanny``); one worker gets SIGKILL after the third fit arrives.  The
    scheduler reschedules its fit on the other worker; every cell is present once and every
    member verifies."""
    import signal

    from dask.distributed import Client

    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    env = {**os.environ, "KKTRACE_THREADS": "1"}
    logs = [open(tmp_path / f"p{i}.log", "w") for i in range(3)]  # noqa: SIM115
    procs = [subprocess.Popen(["dask", "scheduler", "--host", "127.0.0.1", "--port",
                               str(port), "--no-dashboard"], env=env, stdout=logs[0],
                              stderr=subprocess.STDOUT)]
    try:
        time.sleep(1.0)
        for i in (1, 2):
            procs.append(subprocess.Popen(
                ["dask", "worker", addr, "--nthreads", "1", "--no-nanny", "--no-dashboard",
                 "--name", f"kill-test-{i}"], env=env, stdout=logs[i],
                stderr=subprocess.STDOUT))
        with Client(addr, timeout=30) as c:
            c.wait_for_workers(2, timeout=90)
        killed = []

        def tick(done, total, *_):
            if done >= 3 and not killed:
                os.kill(procs[1].pid, signal.SIGKILL)
                killed.append(done)

        ds = _demo()
        out = study(ds, C=[0.1, 1.0, 10.0], gamma=[0.05, 0.5], folds=4, seed=0,
                    scheduler=addr, store=tmp_path / "st", progress=tick)
        assert killed and procs[1].wait(timeout=30) == -signal.SIGKILL
        keys = [(r["cell"], r["fold"]) for r in out.rows]
        assert len(keys) == 24 and len(set(keys)) == 24
        st = solver.RunStore(tmp_path / "st")
        v = st.verify(out.study_id)
        assert v.ok, v.problems
        assert len(set(r["run_id"] for r in out.rows)) == 24
        # nothing duplicated in the store: 24 fits + the study
        assert len(st.run_ids()) == 25
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
        for f in logs:
            f.close()


# ----------------------------------------------------------------------------- the command


def test_study_command_prints_the_choice_and_json(tmp_path):
    r = kk("study", TRAIN_CSV, "--label", DEMO_LABEL, "--C", "0.5,5", "--gamma", "0.2",
           "--folds", "3", "--scheduler", "sequential", "--store", tmp_path / "st", "--json")
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    assert s["fits"] == 6 and s["choice"]["one_se"] in {"C=0.5 gamma=0.2", "C=5 gamma=0.2"}
    assert "not a validation sign-off" in s["caution"]
    r2 = kk("study", TRAIN_CSV, "--label", DEMO_LABEL, "--C", "0.5,5", "--gamma", "0.2",
            "--folds", "3", "--scheduler", "sequential", "--store", tmp_path / "st")
    assert r2.returncode == 0, r2.stderr
    assert "6 found stored and verified" in r2.stdout
    assert "one-standard-error rule" in r2.stdout and "7.10" in r2.stdout


@pytest.mark.parametrize("case", ["empty grid", "zero C", "negative gamma", "small class",
                                  "no label"])
def test_study_command_bad_input_is_one_line_and_writes_nothing(tmp_path, case):
    small = tmp_path / "small.csv"
    small.write_text("a,b,label\n" + "".join(f"{i},{i % 5},x\n" for i in range(20))
                     + "1,1,rare\n2,2,rare\n", encoding="utf-8")
    base = ["study", TRAIN_CSV, "--label", DEMO_LABEL, "--scheduler", "sequential",
            "--store", tmp_path / "st"]
    args, words = {
        "empty grid": (base + ["--C", "", "--gamma", "0.1"], ["grid of C", "empty"]),
        "zero C": (base + ["--C", "0,1", "--gamma", "0.1"], ["grid of C", "not > 0"]),
        "negative gamma": (base + ["--C", "1", "--gamma", "-0.5"], ["gamma", "not > 0"]),
        "small class": (["study", small, "--label", "label", "--C", "1", "--gamma", "0.1",
                         "--folds", "3", "--scheduler", "sequential", "--store",
                         tmp_path / "st"], ["class 'rare'", "2 rows", "3 folds"]),
        "no label": (["study", TRAIN_CSV, "--C", "1", "--gamma", "0.1", "--store",
                      tmp_path / "st"], ["--label"]),
    }[case]
    r = kk(*args)
    assert r.returncode == 1, (r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr
    for w in words:
        assert w in lines[0], lines[0]
    assert not (tmp_path / "st").exists() or not any((tmp_path / "st").iterdir())


def test_unreachable_scheduler_is_one_line_within_the_timeout_and_writes_nothing(tmp_path):
    addr = f"tcp://127.0.0.1:{_free_port()}"  # nothing listens there
    t0 = time.monotonic()
    r = kk("study", TRAIN_CSV, "--label", DEMO_LABEL, "--C", "1", "--gamma", "0.1",
           "--scheduler", addr, "--connect-timeout", "3", "--store", tmp_path / "st")
    took = time.monotonic() - t0
    assert r.returncode == 1, r.stderr
    line = r.stderr.strip().splitlines()
    assert len(line) == 1 and addr in line[0] and "within 3 s" in line[0], r.stderr
    assert "nothing was written" in line[0]
    assert took < 3 + 25  # the stated timeout plus interpreter and import start-up
    assert not (tmp_path / "st").exists() or not any((tmp_path / "st").iterdir())


def test_study_report_has_both_maps_the_rule_the_failures_and_the_cautions(tmp_path):
    ds = _demo(150)
    # an iteration limit of 40 makes the large-C fits stop early: listed and mapped
    out = study(ds, C=[0.3, 30.0], gamma=[0.1, 1.0], folds=3, iteration_limit=40,
                scheduler="sequential", store=tmp_path / "st")
    assert out.not_converged
    paths = solver.study_report(out.study_id, store=tmp_path / "st", out_dir=tmp_path / "rep")
    text = paths["html"].read_text(encoding="utf-8")
    assert "<svg" in text and "convergence-difficulty map" in text
    assert "one-standard-error rule" in text and "7.10" in text
    assert out.choice["one_se"] in text
    for r in out.not_converged:
        assert r["run_id"] in text
    assert "not a validation sign-off" in text
    data = json.loads(paths["json"].read_text(encoding="utf-8"))
    assert len(data["not_converged"]) == len(out.not_converged)
    assert any("did not converge" in n for n in data["difficulty_notes"])
    m = data["maps"]
    assert len(m["maps"]["mean_iterations"]) == 2 and len(m["maps"]["mean_iterations"][0]) == 2
    assert paths["pdf"].read_bytes()[:5] == b"%PDF-"
    with pytest.raises(InvalidInputError, match="formats"):
        solver.study_report(out.study_id, store=tmp_path / "st", formats=["docx"])


def test_stability_evidence_for_the_chosen_cell(tmp_path):
    ds = _demo(200)
    out = study(ds, C=[1.0, 4.0], gamma=[0.2], folds=4, seed=1, stability=True,
                scheduler="sequential", store=tmp_path / "st")
    s = out.stability
    assert s["cell"] == out.choice["one_se"]
    kinds = [v["kind"] for v in s["variants"]]
    assert kinds == ["permutation"] * 3 + ["bootstrap"] * 3 + ["noise"] * 2
    # a row-order permutation is the same problem renumbered: same optimum (and said so)
    assert s["permutations_same_optimum"], s["variants"][:3]
    assert "same optimum" in s["permutation_verdict"]
    for v in s["variants"][:3]:
        assert v["support_jaccard"] == 1.0 and v["flips_held_out"] == 0
        assert v["max_drift_train"] <= 1e-2
    # bootstrap resamples change the training set: their support vectors differ
    assert s["by_kind"]["bootstrap"]["lowest_sv_jaccard"] < 1.0
    assert s["noise_levels"] == [0.01, 0.05]
    st = solver.RunStore(tmp_path / "st")
    parent = st.load_parent(out.study_id)
    roles = [m.role for m in parent.members]
    assert roles.count("stability_base") == 1 and roles.count("stability_noise") == 2
    assert parent.attachments["stability"]["base_run_id"] == s["base_run_id"]
    paths = solver.study_report(out.study_id, store=tmp_path / "st", out_dir=tmp_path / "r",
                                formats=["html"])
    assert "Stability of" in paths["html"].read_text(encoding="utf-8")


def test_a_permutation_that_moves_the_optimum_is_flagged():
    """The rule, on two hand-made fits: same support vectors and objective, but one
    training decision value moved by 0.5 > SAME_VALUE_ABS (1e-2): flagged, with the run."""
    from types import SimpleNamespace

    from solver.studies.grid import Cell
    from solver.studies.stability import SAME_VALUE_ABS, StabilityJob, VariantFit, summarise

    def fit(kind, values):
        on = np.array([True, False, True, False])
        result = SimpleNamespace(certificate=SimpleNamespace(at_lower=~on, dual_objective=-3.0),
                                 success=True, bias=0.0,
                                 status=SimpleNamespace(label="converged"))
        job = StabilityJob(kind, 0, None, 0, Cell(1.0, 0.1, None), "binary", {})
        rec = SimpleNamespace(result=result, problem=SimpleNamespace(n=4, rows=None),
                              attachments={"stability_fit": {"rows": [0, 1, 2, 3]}})
        v = np.array(values)[:, None]
        return VariantFit(job=job, members=(("model", None, rec),), rows=np.arange(4),
                          train_values=v, hold_values=v[:2],
                          train_labels=np.where(v[:, 0] > 0, "a", "b").astype(object),
                          hold_labels=np.where(v[:2, 0] > 0, "a", "b").astype(object))

    base = fit("base", [1.0, -1.0, 0.5, -0.5])
    same = fit("permutation", [1.0 + SAME_VALUE_ABS / 2, -1.0, 0.5, -0.5])
    moved = fit("permutation", [1.5, -1.0, 0.5, -0.5])
    assert summarise([base, same], ["r0", "r1"])["permutations_same_optimum"]
    s = summarise([base, moved], ["r0", "r2"])
    assert not s["permutations_same_optimum"]
    assert s["permutation_verdict"].startswith("FLAG") and "r2" in s["permutation_verdict"]


def test_an_interrupted_study_resumes_without_duplicates(tmp_path):
    """Ctrl-C (here: KeyboardInterrupt from the progress callback) after three fits: those
    three runs are complete and verify, no study record exists; the re-run reuses them,
    fits the rest and stores each fit once."""
    ds = _demo(120)
    kw = {"C": [0.5, 5.0], "gamma": [0.2, 1.0], "folds": 2, "seed": 0,
          "scheduler": "sequential", "store": tmp_path}

    def stop(done, *_):
        if done == 3:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        study(ds, progress=stop, **kw)
    st = solver.RunStore(tmp_path)
    first = st.run_ids()
    assert len(first) == 3 and not any(st.is_parent(r) for r in first)
    assert all(st.verify(r).ok for r in first)
    out = study(ds, **kw)
    assert out.reused == 3 and out.fitted == 5
    assert set(first) <= {r["run_id"] for r in out.rows}
    assert len(st.run_ids()) == 8 + 1 and not st.temp_folders()


def test_other_commands_treat_a_study_as_a_study(tmp_path):
    store = tmp_path / "st"
    out = study(_demo(90), C=[0.3, 3.0], gamma=[0.1], folds=2, scheduler="sequential",
                store=store)
    # report writes the study report; verify names a parent record; explain refuses
    paths = solver.report(out.study_id, store=store, out_dir=tmp_path / "rep")
    assert sorted(p.name for p in paths.values()) == ["study.html", "study.json", "study.pdf"]
    r = kk("verify", out.study_id, "--store", store)
    assert r.returncode == 0 and "a parent record and every member run" in r.stdout
    for args in (["explain", out.study_id], ["apply", out.study_id, TRAIN_CSV]):
        r = kk(*args, "--store", store)
        assert r.returncode == 1 and "not a model" in r.stderr, r.stderr
    r = kk("runs", "--store", store)
    assert "member runs below" in r.stdout and "  fit C=0.3 gamma=0.1 vs fold=0" in r.stdout


@pytest.mark.filterwarnings("ignore::solver.DataWarning")
def test_a_multiclass_study_stores_one_vs_one_fits_and_verifies(tmp_path):
    """Three classes (scikit-learn's bundled wine data, Forina et al., from memory): every
    fit is a one-vs-one parent over its three pair runs, the study a parent over those."""
    from sklearn.datasets import load_wine

    d = load_wine()
    ds = solver.from_arrays(d.data, np.array(["a", "b", "c"])[d.target],
                            label_name="cultivar", source="wine")
    out = study(ds, C=[1.0, 10.0], gamma=[0.05], folds=3, seed=0, scheduler="sequential",
                store=tmp_path)
    assert len(out.rows) == 6 and all(0.8 < r["accuracy"] <= 1.0 for r in out.rows)
    st = solver.RunStore(tmp_path)
    v = st.verify(out.study_id)
    assert v.ok, v.problems
    assert len(st.run_ids()) == 6 * (3 + 1) + 1  # pairs, a parent per fit, the study
    fit = st.load_parent(out.rows[0]["run_id"])
    assert fit.task == "multiclass" and len(fit.members) == 3
    assert fit.attachments["study_fit"]["fold"] == out.rows[0]["fold"]
    again = study(ds, C=[1.0, 10.0], gamma=[0.05], folds=3, seed=0, scheduler="sequential",
                  store=tmp_path)
    assert again.reused == 6 and again.fitted == 0


# ----------------------------------------------------------------------------- closing


class _Slow:
    """A client or cluster stand-in whose close takes a while (or fails)."""

    def __init__(self, log: list, name: str, fail: bool = False) -> None:
        self.log, self.name, self.fail = log, name, fail

    def close(self) -> None:
        time.sleep(0.3)
        self.log.append(self.name)
        if self.fail:
            raise OSError("cluster would not stop")


def test_a_session_closed_later_stops_while_the_caller_works_and_close_waits():
    from solver.studies.execute import StudySession

    log: list = []
    with StudySession(None, where="local",
                      connected=(_Slow(log, "client"), _Slow(log, "cluster"), None)) as s:
        s.close_later()
    assert log == []  # leaving the block did not wait for the close
    s.close()
    assert log == ["client", "cluster"]
    s.close()  # idempotent
    assert log == ["client", "cluster"]


def test_a_failed_background_close_is_raised_by_close():
    from solver.studies.execute import StudySession

    log: list = []
    s = StudySession(None, where="local",
                     connected=(_Slow(log, "client"), _Slow(log, "cluster", fail=True), None))
    s.close_later()
    with pytest.raises(OSError, match="would not stop"):
        s.close()
