"""Report sections asked of the ε-regression and one-class tasks (HTML, PDF, JSON).

Runs are trained with :func:`solver.api.train` into a temporary store and loaded back, so
the report sees what a store holds.  The section's figures are checked against numbers
recomputed here from the stored problem and multipliers (not against the section itself).
"""

from __future__ import annotations

import csv
from dataclasses import replace
from pathlib import Path

import jsonschema
import numpy as np
import pytest

from solver import api, smo
from solver.errors import ConvergenceWarning
from solver.kernels import RBFKernel
from solver.measures import nu_property, regression_measures
from solver.model import Standardiser, model_from_solution
from solver.problem import one_class
from solver.reporting import build_report_content, write_report
from solver.reporting.html import render_html
from solver.reporting.pdf import plan_pages
from solver.reporting.summary import load_schema, summary_dict
from solver.run import RunRecord
from solver.store import RunStore
from solver.tasks import get_task, task_for_kind


def _csv(path: Path, header: list[str], rows: np.ndarray) -> Path:
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        for r in rows:
            w.writerow([f"{v:.6g}" for v in r])
    return path


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict:
    d = tmp_path_factory.mktemp("report_kinds")
    rng = np.random.default_rng(11)
    X = rng.normal(size=(70, 2))
    t = np.sin(2 * X[:, 0]) + 0.5 * X[:, 1] + 0.1 * rng.normal(size=70)
    Xh = rng.normal(size=(25, 2))
    known = (np.abs(Xh).max(axis=1) > 2.0).astype(float)
    Xh[:3] += 5.0
    known[:3] = 1.0
    reg = _csv(d / "reg.csv", ["speed", "temp", "thickness"], np.c_[X, t])
    oc = _csv(d / "oc.csv", ["speed", "temp"], X)
    oc_hold = _csv(d / "oc_hold.csv", ["speed", "temp", "unusual"], np.c_[Xh, known])
    store = d / "store"
    r = api.train(str(reg), task="regression", target="thickness", epsilon=0.2, C=5.0,
                  kkt_tol=1e-6, solver="both", store=str(store))
    o = api.train(str(oc), task="one-class", nu=0.2, kkt_tol=1e-6, solver="both",
                  holdout=str(oc_hold), outlier_column="unusual", store=str(store))
    st = RunStore(store)
    return {"dir": d, "store": st, "reg": [st.load(i) for i in r.run_ids],
            "oc": [st.load(i) for i in o.run_ids]}


def test_tasks_of_both_kinds_are_registered() -> None:
    assert task_for_kind("epsilon_regression").name == "regression"
    assert task_for_kind("one_class").name == "one-class"
    assert get_task("binary").report_section(None, []) is None  # classification: no section


def test_regression_section_has_the_fit_the_tube_and_the_support_vectors(runs) -> None:
    rec = runs["reg"][0]
    c = build_report_content(runs["reg"])
    ts = c.runs[0].task_section
    assert ts is not None and ts.task == "regression" and "thickness" in ts.title
    # recomputed from the stored problem: f at the training rows, t from p = (ε − t, ε + t)
    p = rec.problem
    m = p.X.shape[0]
    t = 0.5 * (p.p[m:] - p.p[:m])
    f = model_from_solution(p, rec.result).values(p.X, standardised=True)
    facts = dict(ts.facts)
    ref = regression_measures(t, f, epsilon=0.2)
    assert facts["training RMSE"] == pytest.approx(ref["rmse"], rel=1e-9)
    cover = facts["tube coverage: share of rows with |t − f(x)| ≤ ε"]
    assert cover == pytest.approx(ref["tube_coverage"])
    figs = {fd.kind: fd for fd in ts.figures}
    assert set(figs) == {"fit_tube", "residuals"}
    tube = figs["fit_tube"].data
    assert np.allclose(tube["actual"], t) and np.allclose(tube["fitted"], f, atol=1e-9)
    assert tube["epsilon"] == 0.2
    # support vectors marked: rows with α⁺ or α⁻ > 0 are exactly the rows not "inside"
    sv = (rec.result.alpha[:m] > 0) | (rec.result.alpha[m:] > 0)
    inside = np.asarray(tube["category"]) == "inside the tube"
    assert np.array_equal(~inside, sv)
    assert facts["support vectors (rows with α⁺ or α⁻ > 0)"] == int(sv.sum())
    res = figs["residuals"].data
    assert np.allclose(res["residual"], t - f, atol=1e-9)
    # every row inside the tube by its multipliers has |r| ≤ ε up to the tolerance
    assert np.all(np.abs(t - f)[inside] <= 0.2 + 1e-5)


def test_one_class_section_shows_rho_and_the_nu_property(runs) -> None:
    rec = runs["oc"][0]
    c = build_report_content(runs["oc"])
    ts = c.runs[0].task_section
    assert ts is not None and ts.task == "one-class"
    facts = dict(ts.facts)
    p, res = rec.problem, rec.result
    rho = -res.bias
    assert facts["ρ (threshold on Σ αⱼK(xⱼ, x), this scaling: eᵀα = νn)"] == pytest.approx(rho)
    assert facts["ρ in the paper's scaling (eᵀα = 1): ρ / (νn)"] == pytest.approx(
        rho / (0.2 * p.n))
    f = model_from_solution(p, res).values(p.X, standardised=True)
    check = nu_property(p, res.alpha, f, kkt_tol=res.certificate.kkt_tol)
    assert check["holds"]
    assert facts["ν-property: outlier share ≤ ν ≤ support-vector share"] is True
    assert facts["outlier share (score < −kkt_tol)"] <= 0.2 <= facts[
        "support-vector share (α > 0)"]
    figs = {fd.kind: fd for fd in ts.figures}
    assert set(figs) == {"score_distribution", "nu_shares"}
    g = figs["score_distribution"].data["expansion"]
    # g(x) = Σ αⱼ K(xⱼ, x) = f(x) + ρ, recomputed from the kernel
    K = p.kernel_block(slice(None), slice(None))
    assert np.allclose(g, K @ res.alpha, atol=1e-9)
    assert figs["score_distribution"].data["rho"] == pytest.approx(rho)
    # the held-out confusion against the known-outlier column is shown
    conf = rec.attachments["holdout"]["confusion"]
    table = ts.tables[-1]
    assert table.rows[0][1:] == (conf["flagged_known"], conf["missed"])
    assert sum(v for row in table.rows for v in row[1:]) == 25
    assert not [f for f in c.flags if f.code == "nu_property_fails"]


def test_a_run_where_the_nu_property_fails_is_flagged() -> None:
    """A run stopped after one iteration is not at the optimum; the section recomputes the
    check from its multipliers and raises a caution (it does not trust a stored verdict)."""
    rng = np.random.default_rng(5)
    X = rng.normal(size=(40, 2))
    prob = one_class(X, kernel=RBFKernel(gamma=0.5), nu=0.3)
    with pytest.warns(ConvergenceWarning):
        res = smo.solve_smo(prob, kkt_tol=1e-6, iteration_limit=1, trace="off")
    f = model_from_solution(prob, res).values(X, standardised=True)
    check = nu_property(prob, res.alpha, f, kkt_tol=1e-6)
    assert not check["holds"], check  # this seeded start breaks it
    rec = RunRecord(problem=prob, result=res, data={"n_rows": 40, "feature_names": ["a", "b"]},
                    standardiser=Standardiser.identity(2),
                    attachments={"nu_property": {**check, "holds": True}})
    c = build_report_content([rec])
    codes = [f.code for f in c.flags]
    assert "nu_property_fails" in codes
    facts = dict(c.runs[0].task_section.facts)
    assert facts["ν-property: outlier share ≤ ν ≤ support-vector share"] is False
    assert facts["ν-property as stored with the run"] is True


@pytest.mark.parametrize("kind", ["reg", "oc"])
def test_html_pdf_json_carry_the_section(runs, kind, tmp_path) -> None:
    c = build_report_content(runs[kind])
    ts = c.runs[0].task_section
    html = render_html(c)
    assert ts.title in html or ts.title.replace("'", "&#x27;") in html
    for fd in ts.figures:
        assert fd.title in html
    pages = plan_pages(c)
    fig_titles = [fd.title for pg in pages for fd in (pg.figures or ())]
    assert all(fd.title in fig_titles for fd in ts.figures)
    doc = summary_dict(c)
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)
    sec = doc["runs"][0]["task_section"]
    assert sec["task"] == ts.task and sec["facts"]
    keys = {f["key"] for f in doc["runs"][0]["figures"]}
    assert {fd.key for fd in ts.figures} <= keys
    # the challenger (QP) run has its own section too
    assert c.runs[1].task_section is not None
    paths = write_report(runs[kind], tmp_path, formats=("html", "pdf", "json"))
    assert all(p.stat().st_size > 0 for p in paths.values())


def test_classification_reports_have_no_task_section(runs, tmp_path) -> None:
    rng = np.random.default_rng(2)
    X = rng.normal(size=(40, 2))
    lab = np.where(X[:, 0] + 0.3 * rng.normal(size=40) > 0, "pass", "fail")
    path = tmp_path / "c.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["a", "b", "outcome"])
        for row, lb in zip(X, lab, strict=True):
            w.writerow([f"{row[0]:.5f}", f"{row[1]:.5f}", lb])
    out = api.train(str(path), label="outcome", store=str(tmp_path / "s"))
    rec = RunStore(tmp_path / "s").load(out.run_ids[0])
    c = build_report_content([replace(rec)])
    assert c.runs[0].task_section is None and c.runs[0].task_note == ""
    assert summary_dict(c)["runs"][0]["task_section"] is None


def _pdf_words(pdf: Path) -> list[tuple[int, float, float, float, str]]:
    """(page, page width, xMin, xMax, word) of every word, from ``pdftotext -bbox``."""
    import re
    import subprocess

    out = subprocess.run(["pdftotext", "-bbox", str(pdf), "-"], capture_output=True,
                         text=True, check=True).stdout
    words, page, width = [], 0, 0.0
    for line in out.splitlines():
        m = re.search(r'<page width="([0-9.]+)"', line)
        if m:
            page, width = page + 1, float(m[1])
            continue
        m = re.search(r'<word xMin="([-0-9.]+)" yMin="[-0-9.]+" xMax="([-0-9.]+)"', line)
        if m:
            words.append((page, width, float(m[1]), float(m[2]), line))
    return words


@pytest.mark.parametrize("kind", ["reg", "oc"])
def test_pdf_pages_of_the_section_keep_their_text_inside_the_page(runs, kind, tmp_path) -> None:
    """The section's text and figure pages: no word outside the text margins (the rule of
    the report's own PDF layout test)."""
    import shutil
    import subprocess

    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) not installed")
    from solver.reporting.pdf import LEFT

    c = build_report_content(runs[kind])
    title = c.runs[0].task_section.title
    pdf = write_report(runs[kind], tmp_path, formats=("pdf",))["pdf"]
    pages = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True,
                           check=True).stdout.split("\f")
    mine = {k for k, text in enumerate(pages, start=1) if title in text}
    assert len(mine) >= 2  # the text page(s) and the figure page of each run
    for page, width, x0, x1, line in _pdf_words(pdf):
        if page in mine:
            assert x0 >= 0.8 * LEFT * width and x1 <= (1 - 0.8 * LEFT) * width, (page, line)
