"""Reports (HTML, PDF, JSON) built from real stored runs.

Runs are trained with :func:`solver.api.train` into a temporary store and loaded back with
:class:`solver.store.RunStore`, so the report sees exactly what a validator's store holds.
Training data are random rings (seeded); one column is named like a script tag.
"""

from __future__ import annotations

import csv
import json
import re
import shutil
import subprocess
import warnings
from dataclasses import replace
from pathlib import Path

import jsonschema
import numpy as np
import pytest

from solver import api
from solver.errors import InvalidInputError
from solver.reporting import build_report_content, write_report
from solver.reporting._series import replay_pairs
from solver.reporting.content import CAUTION
from solver.reporting.html import render_html
from solver.reporting.pdf import plan_pages
from solver.reporting.summary import load_schema, summary_dict, summary_json
from solver.smo import replay_alpha
from solver.store import RunStore

EVIL = "<script>alert(1)</script>"
ESCAPED = "&lt;script&gt;alert(1)&lt;/script&gt;"
NOTES = 'Prepared for <b>review</b> & "sign" \n second line'


def _write_csv(path: Path, X: np.ndarray, labels: np.ndarray, names: list[str]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow([*names, "outcome"])
        for row, lab in zip(X, labels, strict=True):
            w.writerow([f"{v:.5f}" for v in row] + [lab])
    return path


def _ring(seed: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    g = np.random.default_rng(seed)
    X = g.normal(size=(n, 2)) * [1.0, 4000.0]  # second column on a far larger scale
    r2 = X[:, 0] ** 2 + (X[:, 1] / 4000.0) ** 2 + 0.4 * g.normal(size=n)
    return X, np.where(r2 > 1.2, "reject", "release")


def _train(csv_path: Path, store: Path, **kw: object) -> list:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = api.train(str(csv_path), label="outcome", store=str(store), **kw)
    st = RunStore(store)
    return [st.load(i) for i in out.run_ids]


@pytest.fixture(scope="module")
def work(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("report")
    X, lab = _ring(7, 220)
    X[1] = X[0]  # identical features ...
    lab[1] = "reject" if lab[0] == "release" else "release"  # ... with conflicting labels
    names = [EVIL, "dose $mg"]
    train = _write_csv(root / "train.csv", X[:160], lab[:160], names)
    hold = _write_csv(root / "hold.csv", X[160:], lab[160:], names)
    store = root / "store"
    pair = _train(train, store, solver="both", holdout=str(hold), C=10.0)
    limited = _train(train, store, solver="smo", iteration_limit=5)
    return {"root": root, "train": train, "store": store, "pair": pair, "limited": limited,
            "names": names}


@pytest.fixture(scope="module")
def written(work: dict) -> dict:
    out = work["root"] / "out"
    paths = write_report(work["pair"], out, notes=NOTES)
    content = build_report_content(work["pair"], notes=NOTES)
    return {"paths": paths, "content": content}


# --------------------------------------------------------------------------- content


def test_content_carries_each_runs_certificate(work: dict, written: dict) -> None:
    content = written["content"]
    assert [r.solver for r in content.runs] == ["smo", "qp"]
    for rc, rec in zip(content.runs, work["pair"], strict=True):
        c = rec.result.certificate
        t = rc.termination
        assert t["status"] == rec.result.status.label
        assert t["iterations"] == rec.result.iterations
        assert t["duality_gap"] == c.duality_gap and t["max_violation"] == c.max_violation
        assert t["n_support"] == c.n_support and t["n_bounded"] == c.n_bounded
        assert rc.run_id == rec.run_id
        assert sum(rc.categories.values()) == rec.problem.n
        # categories come from the stored explanation: same counts as its table
        cats = np.asarray(rec.attachments["explanation"]["category"])
        for name, count in rc.categories.items():
            assert count == int(np.sum(cats == name))
        ident = dict(rc.identity)
        assert ident["data fingerprint"] == rec.data["fingerprint"]
        assert rc.reproduce_command and "kktrace train" in rc.reproduce_command
    assert content.caution == CAUTION
    assert content.comparison is not None
    assert content.comparison["verdict"] == work["pair"][1].attachments["comparison"]["verdict"]
    names = {m["name"] for m in content.comparison["measures"]}
    assert names == set(work["pair"][1].attachments["comparison"]["measures"])
    assert all(m["tolerance"] is not None for m in content.comparison["measures"])


def test_figures_per_solver(written: dict) -> None:
    smo, qp = written["content"].runs
    assert [f.key for f in smo.figures] == ["violation", "objective", "sets", "trajectories",
                                            "selection"]
    assert [f.key for f in qp.figures] == ["objective", "gap", "sets"]
    assert smo.decision_map is not None and qp.decision_map is not None
    assert "lower_y" in qp.figures[0].data  # interior-point lower bound drawn


def test_replay_agrees_with_the_solvers_own_replay(work: dict, written: dict) -> None:
    rec = work["pair"][0]
    tr = rec.result.trace
    cols = tr.columns
    rep = replay_pairs(cols["iteration"], cols["i"], cols["j"], cols["alpha_i"],
                       cols["alpha_j"], np.asarray(tr.snapshots[0]), rec.problem.lower,
                       rec.problem.upper)
    assert np.array_equal(rep.final_alpha, rec.result.alpha)
    mid = int(cols["iteration"][len(cols["iteration"]) // 2])
    ref = replay_alpha(tr, mid)  # solver.smo's own loop-based replay
    thr = rec.problem.upper * 1e-8
    assert rep.support_size[mid] == int(np.sum(ref > thr))
    t = written["content"].runs[0].termination
    assert t["replay_reproduced"] is True and t["replay_max_difference"] == 0.0
    sets = written["content"].runs[0].figures[2].data
    assert sets["support"][1][-1] == rec.result.certificate.n_support


def test_decision_map_regions_match_the_model(work: dict, written: dict) -> None:
    """Grid values interpolated at the training points classify like the model itself."""
    from scipy.interpolate import RegularGridInterpolator

    from solver.model import model_from_solution

    rec = work["pair"][0]
    d = written["content"].runs[0].decision_map.data
    interp = RegularGridInterpolator((d["gy"], d["gx"]), d["values"])
    z = rec.problem.X
    grid_sign = np.sign(interp(np.column_stack((z[:, 1], z[:, 0]))))
    f = model_from_solution(rec.problem, rec.result).values(z, standardised=True)
    clear = np.abs(f) > 0.2  # away from the boundary, where the grid resolution matters
    assert clear.sum() > 100
    assert np.mean(grid_sign[clear] == np.sign(f[clear])) > 0.98
    assert d["xlabel"].startswith(EVIL) and "(standardised)" in d["xlabel"]


def test_flags(work: dict, written: dict) -> None:
    codes = {f.code for f in written["content"].flags}
    assert "conflicting_duplicates" in codes
    assert "unscaled_features" in codes  # intake warning; standardised, so only a note
    note = next(f for f in written["content"].flags if f.code == "unscaled_features")
    assert note.severity == "note" and "standardised the features" in note.message
    # the duplicated pair has zero curvature; the audit found the RBF Gram PSD, so only a note
    curv = next(f for f in written["content"].flags if f.code == "curvature_fixes")
    assert curv.severity == "note" and "duplicate" in curv.message
    verdict = written["content"].comparison["verdict"]
    if verdict == "agree":
        assert not codes & {"solvers_disagree", "solvers_agree_loosely"}
    else:
        assert codes & {"solvers_disagree", "solvers_agree_loosely"}
    limited = build_report_content(work["limited"])
    first = limited.flags[0]
    assert (first.code, first.severity) == ("not_converged", "stop")
    assert "iteration_limit" in first.message
    assert not limited.converged


def test_non_converged_run_is_reported_prominently(work: dict) -> None:
    html = render_html(build_report_content(work["limited"]))
    banner = html[html.index('<section class="banner"'):html.index("</section>")]
    assert "NOT CONVERGED" in banner and "iteration_limit" in banner
    assert 'class="state bad"' in banner
    assert html.index("NOT CONVERGED") < html.index('id="run-1"')


def test_many_bounded_and_indefinite_kernel_flags(work: dict) -> None:
    store = work["store"]
    tiny_c = _train(work["train"], store, solver="smo", C=0.01)
    codes = {f.code for f in build_report_content(tiny_c).flags}
    assert "many_bounded" in codes
    # tanh(x·z − 1) has K(x, x) < 0 for |x| < 1, so the Gram matrix cannot be PSD
    sig = _train(work["train"], store, solver="smo", kernel="sigmoid", gamma=1.0, offset=-1.0,
                 iteration_limit=2000)
    assert sig[0].attachments["audit"]["psd"] is False  # precondition from the real audit
    content = build_report_content(sig)
    flag = next(f for f in content.flags if f.code == "indefinite_kernel")
    assert "smallest eigenvalue" in flag.message
    assert content.runs[0].audit_verdict.startswith("PSD verdict: INDEFINITE")


def test_missing_attachments_and_trace_say_not_available(work: dict) -> None:
    rec = work["pair"][0]
    bare = replace(rec, attachments={}, result=replace(rec.result, trace=None), manifest=None)
    content = build_report_content([bare])
    html = render_html(content)
    for text in ("Kernel audit not available", "Held-out outcomes not available",
                 "Leave-one-out figures not available", "Challenger comparison not available",
                 "No command line was recorded", "convergence figures not available",
                 "Environment not available", "Explanation attachment not available"):
        assert text in html, text
    assert content.runs[0].figures == ()
    assert content.runs[0].categories_source.startswith("certificate")
    assert jsonschema.Draft202012Validator(load_schema()).is_valid(summary_dict(content))


def test_sampled_and_off_traces(work: dict) -> None:
    sampled = _train(work["train"], work["store"], solver="smo", trace="sampled")
    rc = build_report_content(sampled).runs[0]
    sets = next(f for f in rc.figures if f.key == "sets")
    assert sets.data["support_source"] == "counted at stored snapshots"
    assert "trajectories" not in [f.key for f in rc.figures]  # needs every iteration
    off = _train(work["train"], work["store"], solver="smo", trace="off")
    rc = build_report_content(off).runs[0]
    assert rc.figures == () and "not available" in rc.figure_notes[0]


def test_projection_for_more_than_two_features(tmp_path: Path) -> None:
    # scikit-learn's bundled breast cancer data (Wisconsin diagnostic), 30 features
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer()
    X, y = data.data[:150], np.where(data.target[:150] == 1, "benign", "malignant")
    path = _write_csv(tmp_path / "bc.csv", X, y, [str(n) for n in data.feature_names])
    recs = _train(path, tmp_path / "store", solver="smo")
    rc = build_report_content(recs).runs[0]
    d = rc.decision_map
    assert d is not None and "principal components" in d.caption
    share = float(re.search(r"\(([0-9.]+) % of the variance\)", d.caption).group(1))
    assert 0.0 < share <= 100.0
    assert d.data["xlabel"] == "principal component 1 (standardised)"
    assert d.data["z"].shape == (150, 2)


# --------------------------------------------------------------------------- HTML


def test_html_is_self_contained(written: dict) -> None:
    html = written["paths"]["html"].read_text(encoding="utf-8")
    low = html.lower()
    for bad in ("<script", "http://", "https://", "@import", "<link", " src=",
                "<iframe", "<object", "<img", "<embed", "<base"):
        assert bad not in low, bad
    assert not re.search(r"url\((?!#)", low)  # only in-document references (SVG clip paths)
    assert "content-security-policy" in low and "default-src 'none'" in low
    n_fig = sum(len(r.figures) + (r.decision_map is not None) for r in written["content"].runs)
    n_fig += written["content"].overlay is not None  # the runs side by side
    assert low.count("<svg") == n_fig == low.count("<figcaption>")
    assert CAUTION in html
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids))  # figure ids are prefixed, never shared


def test_html_escapes_user_text(written: dict) -> None:
    html = written["paths"]["html"].read_text(encoding="utf-8")
    assert EVIL not in html
    assert ESCAPED in html
    svgs = re.findall(r"<svg.*?</svg>", html, flags=re.S)
    assert any(ESCAPED in s for s in svgs)  # the axis label inside the figure, escaped
    assert "Prepared for &lt;b&gt;review&lt;/b&gt; &amp; &quot;sign&quot;" in html
    assert "dose $mg" in html  # a dollar in a column name is text, not mathematics


def test_html_shows_verdict_and_every_measure(written: dict) -> None:
    html = written["paths"]["html"].read_text(encoding="utf-8")
    comp = written["content"].comparison
    section = html[html.index('id="challenger"'):]
    assert comp["verdict"] in section
    for m in comp["measures"]:
        assert f"<td class=\"txt\">{m['name']}</td>" in section


# --------------------------------------------------------------------------- PDF


def _pdf_pages_text(path: Path) -> list[str]:
    if shutil.which("pdftotext"):
        out = subprocess.run(["pdftotext", "-layout", str(path), "-"], capture_output=True,
                             text=True, check=True).stdout
        return out.split("\f")[:-1] if out.endswith("\f") else out.split("\f")
    from pypdf import PdfReader

    return [p.extract_text() for p in PdfReader(str(path)).pages]


def test_pdf_pages_and_text(written: dict) -> None:
    from pypdf import PdfReader

    path = written["paths"]["pdf"]
    plan = plan_pages(written["content"])
    assert len(PdfReader(str(path)).pages) == len(plan)
    pages = _pdf_pages_text(path)
    assert len(pages) == len(plan)
    for k, (page, text) in enumerate(zip(plan, pages, strict=True), start=1):
        assert page.heading.split(" — ")[0][:40] in text, (k, page.heading)
        assert f"page {k} of {len(plan)}" in text
    # one figure page per two convergence figures, per run
    for rc in written["content"].runs:
        n = sum(1 for p in plan if any(f in rc.figures for f in p.figures))
        assert n == (len(rc.figures) + 1) // 2
    everything = "\n".join(pages)
    for rc in written["content"].runs:
        t = rc.termination
        assert f"status {t['status']}" in everything
        from solver.reporting.pdf import pdf_num

        gap = pdf_num(t["duality_gap"])
        assert gap in everything
    assert f"Verdict: {written['content'].comparison['verdict']}" in everything
    assert "validation sign-off" in everything


# --------------------------------------------------------------------------- JSON


def test_json_summary_validates_and_matches(work: dict, written: dict) -> None:
    doc = json.loads(written["paths"]["json"].read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(load_schema())
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)
    for run, rec in zip(doc["runs"], work["pair"], strict=True):
        assert run["run_id"] == rec.run_id
        assert run["termination"]["status"] == rec.result.status.label
        assert run["termination"]["duality_gap"] == rec.result.certificate.duality_gap
        assert run["counts"]["support"] == rec.result.certificate.n_support
        assert run["data"]["feature_names"] == work["names"]
        assert len(run["series"]["dual_objective"]["low"]) <= 200
    assert doc["comparison"]["verdict"] == written["content"].comparison["verdict"]
    assert doc["caution"] == CAUTION


def test_schema_rejects_broken_summaries(written: dict) -> None:
    schema = load_schema()
    good = summary_dict(written["content"])
    v = jsonschema.Draft202012Validator(schema)
    assert v.is_valid(good)
    bad = json.loads(json.dumps(good))
    bad["runs"][0]["termination"]["status"] = "finished"
    assert not v.is_valid(bad)
    bad = json.loads(json.dumps(good))
    del bad["caution"]
    assert not v.is_valid(bad)
    bad = json.loads(json.dumps(good))
    bad["flags"].append({"code": "x", "severity": "fatal", "message": "m"})
    assert not v.is_valid(bad)


def test_non_finite_numbers_become_null(written: dict) -> None:
    rc = written["content"].runs[0]
    odd = replace(rc, termination={**rc.termination, "primal_objective": float("nan"),
                                   "relative_gap": float("inf")})
    content = replace(written["content"], runs=(odd,))
    text = summary_json(content)  # allow_nan=False: would raise on NaN
    doc = json.loads(text)
    assert doc["runs"][0]["termination"]["primal_objective"] is None
    assert doc["runs"][0]["termination"]["relative_gap"] is None
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)


# --------------------------------------------------------------------------- writing


def test_write_report_rejects_bad_requests(work: dict, tmp_path: Path) -> None:
    runs = work["limited"]
    with pytest.raises(InvalidInputError, match="unknown report format"):
        write_report(runs, tmp_path, formats=("html", "docx"))
    with pytest.raises(InvalidInputError, match="plain file name"):
        write_report(runs, tmp_path, stem="../up")
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(InvalidInputError, match="not a folder"):
        write_report(runs, blocker)
    with pytest.raises(InvalidInputError, match="at least one run"):
        build_report_content([])
    with pytest.raises(InvalidInputError, match="not a RunRecord"):
        build_report_content(["run-id"])


def test_failed_render_leaves_no_files(work: dict, tmp_path: Path,
                                       monkeypatch: pytest.MonkeyPatch) -> None:
    from solver.reporting import pdf as pdf_mod  # (solver.reporting is also a function name)

    def boom(*_a: object, **_k: object) -> int:
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(pdf_mod, "render_pdf", boom)
    out = tmp_path / "reports"
    with pytest.raises(RuntimeError):
        write_report(work["limited"], out)
    assert not out.exists() or not any(out.iterdir())
    paths = write_report(work["limited"], out, formats=("html", "json"), stem="only")
    assert sorted(p.name for p in out.iterdir()) == ["only.html", "only.json"]
    assert set(paths) == {"html", "json"}
    assert paths["html"].stat().st_mode & 0o044  # ordinary readable file, not 0600


def test_leave_one_out_attachment_is_shown(work: dict) -> None:
    from solver.explanation import leave_one_out

    rec = work["pair"][0]
    loo = leave_one_out(rec.problem, rec.result)
    attached = replace(rec, attachments={**rec.attachments,
                                         "leave_one_out": {**loo.to_dict(), **loo.to_columns()}})
    rc = build_report_content([attached]).runs[0]
    scalars = dict(rc.loo_facts)
    assert scalars["errors"] == loo.errors and scalars["method"] == loo.method
    # every row is shown by its display label with its meaning, never by its key
    shown = {row[0] for row in rc.loo.rows}
    assert "leave-one-out errors" in shown and "errors" not in shown
    assert all(row[2] for row in rc.loo.rows)
    fig = rc.loo_figure
    assert fig is not None and int(np.sum(fig.data["wrong"])) == loo.errors
    # plotted values are signed: a leave-one-out error is a point with y·f₋ᵢ(xᵢ) ≤ 0
    assert np.all(fig.data["y"][fig.data["wrong"]] <= 0)
    # the object itself works too (scalars from to_dict, per-point columns from to_columns)
    rc2 = build_report_content([replace(rec, attachments={"leave_one_out": loo})]).runs[0]
    assert rc2.loo_figure is not None and rc2.loo is not None
    html = render_html(build_report_content([attached]))
    assert "leave-one-out decision values" in html


def test_stored_trace_is_not_modified(work: dict) -> None:
    rec = work["pair"][0]
    before = {k: np.array(v, copy=True) for k, v in rec.result.trace.columns.items()}
    alpha = rec.result.alpha.copy()
    build_report_content([rec])
    for k, v in rec.result.trace.columns.items():
        assert np.array_equal(v, before[k]), k
    assert np.array_equal(rec.result.alpha, alpha)


def _in_memory(problem, **solve_opts: object):
    from solver.model import Standardiser
    from solver.run import RunRecord
    from solver.smo import solve_smo

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = solve_smo(problem, **solve_opts)
    d = problem.X.shape[1]
    return RunRecord(problem=problem, result=result,
                     data={"feature_names": [f"f{k}" for k in range(d)], "n_rows": problem.n},
                     standardiser=Standardiser.identity(d))


def test_unusual_problems_render(rng: np.random.Generator) -> None:
    from solver.kernels import LinearKernel, PrecomputedKernel, RBFKernel
    from solver.problem import binary_classification, index_features

    X = rng.normal(size=(60, 3))
    y = np.where(X[:, 0] > 0, 1, -1)
    gram = RBFKernel(gamma=0.5).gram(X)
    pre = binary_classification(index_features(60), y, kernel=PrecomputedKernel(gram_matrix=gram))
    one = binary_classification(X[:, :1] * 1000.0, y, kernel=LinearKernel())
    for rec, expected in ((_in_memory(pre), "kernel is precomputed"),
                          (_in_memory(one), "fewer than two features")):
        content = build_report_content([rec])
        rc = content.runs[0]
        assert rc.decision_map is None and expected in rc.decision_note
        assert rc.run_id is None and "not stored" in dict(rc.identity)["run id"]
        assert "binary_classification(X, labels" in rc.reproduce_code  # in-memory recipe
        html = render_html(content)
        assert expected in html
        assert jsonschema.Draft202012Validator(load_schema()).is_valid(summary_dict(content))


def test_the_point_tables_decision_values_say_where_they_come_from(work: dict,
                                                                   written: dict) -> None:
    """The SMO run's explanation read its decision values off the solver's gradient after
    the spot check; the report's termination facts (HTML, PDF and JSON alike) say so."""
    smo_run, qp_run = (r for r in written["content"].runs)
    assert "solver's final gradient, checked against the exact product on" in \
        smo_run.termination["decision_values_from"]
    note = work["pair"][0].attachments["explanation_values"]
    assert note["source"] == "solver_gradient" and note["largest_relative_difference"] <= 1e-9
    qp_note = work["pair"][1].attachments["explanation_values"]
    assert qp_run.termination["decision_values_from"] == qp_note["reason"]
    assert qp_note["source"] == "kernel_product"  # the QP challenger keeps no gradient
    html = written["paths"]["html"].read_text(encoding="utf-8")
    assert "decision values of the point table" in html
    summary = json.loads(written["paths"]["json"].read_text(encoding="utf-8"))
    assert any(r["termination"].get("decision_values_from") for r in summary["runs"])
