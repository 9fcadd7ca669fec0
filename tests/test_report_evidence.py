"""Issue 13 (items 5, 6, 8, 9, 10, 20): the report ties itself to the stored evidence.

End-to-end through the ``kktrace`` command on a small invented two-feature data set:
leave-one-out figures are kept as a child record and shown by the report; one
vocabulary for the per-point table; placeholders and ranking; manifest digests and the
verification done while writing; the PDF's pages checked as rendered.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

from solver import api
from solver.store import RunStore


def kk(*args: object, cwd: Path | None = None) -> subprocess.CompletedProcess:
    """Run ``kktrace ARGS`` in a fresh interpreter."""
    env = {k: v for k, v in os.environ.items() if k != "KKTRACE_STORE"}
    return subprocess.run([sys.executable, "-m", "solver.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, env=env, timeout=300)


def _csv(path: Path, n: int, seed: int) -> Path:
    g = np.random.default_rng(seed)
    X = g.normal(size=(n, 2))
    r2 = X[:, 0] ** 2 + X[:, 1] ** 2 + 0.5 * g.normal(size=n)
    lab = np.where(r2 > 1.3, "reject", "release")
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["coating_um", "hardness_n", "outcome"])
        for row, y in zip(X, lab, strict=True):
            w.writerow([f"{row[0]:.5f}", f"{row[1]:.5f}", y])
    return path


@pytest.fixture(scope="module")
def work(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("evidence")
    train = _csv(root / "train.csv", 120, 3)
    store = root / "store"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = api.train(str(train), label="outcome", store=str(store), solver="both", C=1.0)
    return {"root": root, "store": store, "smo": out.run_ids[0], "qp": out.run_ids[1]}


# --------------------------------------------------------------------------- item 5


def test_leave_one_out_is_kept_as_a_verified_child_record_and_reported(work: dict) -> None:
    """Item 5: ``explain --leave-one-out`` stores its figures (child record, digests and
    parent link) and the report of the run shows them, by label and meaning."""
    st = RunStore(work["store"])
    before = set(st.run_ids())
    out = kk("explain", work["smo"], "--store", work["store"], "--leave-one-out")
    assert out.returncode == 0, out.stderr
    (child,) = set(st.run_ids()) - before
    assert f"stored as child record {child}" in out.stdout
    assert "leave-one-out errors" in out.stdout and "xi_alpha" not in out.stdout
    rec = st.load(child)  # verified on load, parent link included
    assert rec.parent_id == work["smo"] and "leave_one_out" in rec.attachments
    assert st.verify(child).chain == [child, work["smo"]]
    loo = api.leave_one_out(work["smo"], store=work["store"])
    rep = kk("report", work["smo"], "--store", work["store"], "--out", work["root"] / "r5",
             "--format", "json,html")
    assert rep.returncode == 0, rep.stderr
    summary = json.loads((work["root"] / "r5" / "report.json").read_text(encoding="utf-8"))
    facts = summary["runs"][0]["leave_one_out"]
    assert facts["errors"] == loo.errors and facts["kept_as"] == child
    assert facts["support_vector_bound"] == pytest.approx(loo.support_vector_bound)
    html = (work["root"] / "r5" / "report.html").read_text(encoding="utf-8")
    assert "Leave-one-out figures not available" not in html
    assert f"child record {child}" in html and "slack bound (ξα-estimate)" in html
    # a changed attachment is refused: the report does not print unverified figures
    path = st.run_dir(child) / "leave_one_out.json"
    path.write_text(path.read_text(encoding="utf-8").replace('"errors": ', '"errors": 1'),
                    encoding="utf-8")
    bad = kk("report", work["smo"], "--store", work["store"], "--out", work["root"] / "r5b",
             "--format", "json")
    assert bad.returncode != 0 and "Traceback" not in bad.stderr
    assert "leave_one_out.json" in bad.stderr
    assert not (work["root"] / "r5b").exists()
    import shutil

    shutil.rmtree(st.run_dir(child))
    st.rebuild_catalog()


def test_every_leave_one_out_key_has_a_label_and_a_meaning(work: dict) -> None:
    """Item 5: the stored keys are our own readable names, each explained in words."""
    from solver.vocabulary import LEAVE_ONE_OUT

    loo = api.leave_one_out(work["smo"], store=work["store"])
    keys = set(api.loo_attachment(loo)) - {"per_point"}
    assert keys <= set(LEAVE_ONE_OUT), keys - set(LEAVE_ONE_OUT)
    assert not {k for k in keys if k.startswith("xi_") or k == "reference_seconds"}
    for k in keys:
        assert LEAVE_ONE_OUT[k].label != k or " " not in k
        assert len(LEAVE_ONE_OUT[k].definition) > 8


# --------------------------------------------------------------------------- items 8, 9


@pytest.fixture(scope="module")
def written(work: dict) -> dict:
    out = work["root"] / "r8"
    paths = api.report([work["smo"], work["qp"]], store=work["store"], out_dir=out)
    summary = json.loads(paths["json"].read_text(encoding="utf-8"))
    return {"paths": paths, "summary": summary,
            "html": paths["html"].read_text(encoding="utf-8")}


def _pdf_text(path: Path, *extra: str) -> str:
    return subprocess.run(["pdftotext", *extra, str(path), "-"], capture_output=True,
                          text=True, check=True).stdout


def test_untraced_columns_say_why_instead_of_minus_one(work: dict, written: dict) -> None:
    """Item 8: the interior-point run's trace columns read "n/a (interior-point solver)"
    in the CLI, HTML and PDF (null in the JSON, with what null means), never −1."""
    smo, qp = (r["influential"] for r in written["summary"]["runs"])
    traced = ("times_selected", "first_nonzero_iteration", "last_change_iteration")
    for key in traced:
        k = qp["columns"].index(key)
        assert all(row[k] is None for row in qp["rows"])
        k = smo["columns"].index(key)
        assert all(isinstance(row[k], int) and row[k] >= 0 for row in smo["rows"])
    assert qp["null_means"] == "n/a (interior-point solver)" and smo["null_means"] is None
    assert written["html"].count("n/a (interior-point solver)") >= 3 * len(qp["rows"])
    pdf = _pdf_text(written["paths"]["pdf"], "-layout")
    assert pdf.count("n/a (interior-point solver)") >= 3 * len(qp["rows"])
    out = kk("explain", work["qp"], "--store", work["store"])
    assert out.returncode == 0, out.stderr
    body = out.stdout.splitlines()[1:]
    # three trace columns per row (a −1 may still appear as a decision value f(x) = −1)
    assert all(ln.count("n/a (interior-point solver)") == 3 for ln in body)


def test_points_table_ranks_by_a_stated_key_and_both_runs_agree(written: dict) -> None:
    """Item 8: ranked by y·f(x), then KKT residual, then row — stated beside the table —
    so the SMO and QP runs list the same rows in the same order (no unstated tie-break
    among the many points at α = C)."""
    smo, qp = (r["influential"] for r in written["summary"]["runs"])
    rows = [[row[t["columns"].index("row_id")] for row in t["rows"]] for t in (smo, qp)]
    assert rows[0] == rows[1] and len(rows[0]) == 15
    m = [row[smo["columns"].index("margin")] for row in smo["rows"]]
    assert m == sorted(m)
    ratio = [row[smo["columns"].index("alpha_ratio")] for row in smo["rows"]]
    assert sum(r == pytest.approx(1.0) for r in ratio) >= 10  # many ties at α = C here
    assert "ordered as follows: support vectors ordered by y·f(x)" in smo["order"]
    assert "then by KKT residual" in written["html"]


def test_one_label_per_column_in_cli_html_pdf_and_one_key_in_json(work: dict,
                                                                   written: dict) -> None:
    """Item 9: the per-point table has one heading per column, from solver.vocabulary,
    in the CLI, HTML and PDF; the JSON uses the keys; no key is shown as a heading."""
    import re

    from solver.vocabulary import POINT_COLUMNS

    cols = written["summary"]["runs"][0]["influential"]["columns"]
    assert set(cols) <= set(POINT_COLUMNS) and all(" " not in c for c in cols)
    want = [POINT_COLUMNS[c].label for c in cols if c != "reason"]
    heads = re.findall(r'<table class="grid points">.*?<thead><tr>(.*?)</tr>',
                       written["html"], re.S)[0]
    import html as _html

    assert [_html.unescape(h) for h in re.findall(r'<th scope="col">(.*?)</th>', heads)] == want
    pdf = _pdf_text(written["paths"]["pdf"])
    for lab in want:
        assert lab in pdf
    cli = kk("explain", work["smo"], "--store", work["store"]).stdout.splitlines()[0]
    for key in ("row_id", "alpha_ratio", "times_selected", "kkt_residual",
                "first_nonzero_iteration"):
        assert key not in cli and key not in heads and key not in pdf
        assert POINT_COLUMNS[key].label in cli


# --------------------------------------------------------------------------- item 10


def test_report_prints_each_runs_manifest_digest_and_its_verification(work: dict,
                                                                      written: dict) -> None:
    """Item 10: each run's manifest SHA-256 (equal to the stored manifest's bytes) and the
    verification done while writing, in the JSON, HTML and PDF."""
    import hashlib

    st = RunStore(work["store"])
    pdf = _pdf_text(written["paths"]["pdf"], "-layout")
    for run, rid in zip(written["summary"]["runs"], (work["smo"], work["qp"]), strict=True):
        ev = run["evidence"]
        digest = hashlib.sha256((st.run_dir(rid) / "manifest.json").read_bytes()).hexdigest()
        assert ev["manifest_sha256"] == digest == st.verify(rid).manifest_sha256
        assert ev["verified"] is True and ev["checked_at"].endswith("Z")
        assert ev["files_checked"] >= 5 and ev["parent_chain"][0] == rid
        assert digest in written["html"] and digest in pdf
    assert written["summary"]["runs"][1]["evidence"]["parent_chain"] == [work["qp"], work["smo"]]
    assert "verified while writing this report" in written["html"]
    # one timestamp form (Z) for the report's own time and the check's
    assert written["summary"]["generated"].endswith("Z")


def test_report_states_decision_rule_scaling_and_label_mapping(work: dict,
                                                               written: dict) -> None:
    """Item 10: sign convention, the label at f = 0, the label mapping and the
    standardiser's centre and scale are in the report (not only in model.json)."""
    rec = RunStore(work["store"]).load(work["smo"])
    neg, pos = rec.problem.labels
    run = written["summary"]["runs"][0]
    rule = run["decision_rule"]
    assert rule["label_at_f_0"].startswith(repr(neg))
    assert repr(pos) in rule["label_mapping"] and repr(neg) in rule["label_mapping"]
    assert "f(x) > 0" in rule["sign_convention"]
    std = run["standardiser"]
    assert std["features"] == ["coating_um", "hardness_n"]
    assert std["centre"] == rec.standardiser.centre.tolist()
    assert std["scale"] == rec.standardiser.scale.tolist()
    pdf = _pdf_text(written["paths"]["pdf"], "-layout")
    for text in ("label at f = 0", "Decision rule and scaling", "label mapping"):
        assert text in written["html"] and text in pdf


def test_title_names_the_runs_by_label(written: dict) -> None:
    """Item 10: the title names the runs by label, not "… and 1 further run(s)"."""
    title = written["summary"]["title"]
    assert title.endswith("run A (smo) and run B (qp, challenger of run A)")
    assert "further run" not in written["html"]


def test_in_memory_records_say_they_were_not_verified(work: dict) -> None:
    """Item 10: a report built from records in memory does not claim a verification."""
    from solver.reporting import build_report_content

    rec = RunStore(work["store"]).load(work["smo"])
    rc = build_report_content([rec]).runs[0]
    assert rc.evidence_facts["verified"] is None
    assert "not done" in dict(rc.evidence)["verification while writing"]


# --------------------------------------------------------------------------- item 6


def test_demo_settings_do_not_flag_themselves(work: dict) -> None:
    """Item 6: the demo's own fit (invented tablet-coating data, DEMO_SETTINGS) raises no
    "C may be too small" flag, though most of its support vectors sit at C: the revised
    rule (stated with BOUNDED_SHARE) counts only correctly classified points held at C
    inside the margin; a far too small C is still flagged."""
    from solver.demo import DEMO_LABEL, DEMO_SETTINGS, shipped_data
    from solver.reporting import build_report_content

    train, _ = shipped_data()
    st = RunStore(work["store"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        demo = api.train(str(train), label=DEMO_LABEL, store=str(work["store"]), solver="smo",
                         **DEMO_SETTINGS)
        small = api.train(str(train), label=DEMO_LABEL, store=str(work["store"]), solver="smo",
                          kernel="rbf", C=0.05, kkt_tol=1e-5)
    rec = st.load(demo.run_ids[0])
    cert = rec.result.certificate
    assert cert.n_bounded / cert.n_support >= 0.5  # the old rule fired here (69 of 103)
    content = build_report_content([rec])
    assert "many_bounded" not in {f.code for f in content.flags}
    flagged = build_report_content([st.load(small.run_ids[0])]).flags
    msg = next(f.message for f in flagged if f.code == "many_bounded")
    assert "correctly classified points held at the upper bound C inside the margin" in msg
    assert "our heuristic" in msg


# --------------------------------------------------------------------------- item 20


def _words(pdf: Path) -> list[tuple[int, float, float, float, float, float, float, str]]:
    """(page, page width, page height, xMin, yMin, xMax, yMax, word) of every word, from
    ``pdftotext -bbox`` (poppler)."""
    import html as _html
    import re

    out = subprocess.run(["pdftotext", "-bbox", str(pdf), "-"], capture_output=True,
                         text=True, check=True).stdout
    words = []
    for k, page in enumerate(re.findall(r"<page (.*?)</page>", out, re.S), start=1):
        w, h = (float(v) for v in re.findall(r'(?:width|height)="([0-9.]+)"', page)[:2])
        for m in re.finditer(r'<word xMin="([-0-9.]+)" yMin="([-0-9.]+)" xMax="([-0-9.]+)" '
                             r'yMax="([-0-9.]+)">(.*?)</word>', page):
            x0, y0, x1, y1 = (float(v) for v in m.groups()[:4])
            words.append((k, w, h, x0, y0, x1, y1, _html.unescape(m.group(5))))
    return words


def _page_images(pdf: Path, out: Path) -> list[np.ndarray]:
    """Every page rendered by pdftoppm as a grey image (values 0–255)."""
    out.mkdir(exist_ok=True)
    subprocess.run(["pdftoppm", "-r", "30", "-gray", str(pdf), str(out / "p")], check=True)
    images = []
    for f in sorted(out.glob("p-*.pgm")):
        data = f.read_bytes()
        parts = data.split(maxsplit=4)  # P5, width, height, maxval, pixels
        w, h = int(parts[1]), int(parts[2])
        images.append(np.frombuffer(parts[4][: w * h], np.uint8).reshape(h, w))
    return images


def test_pdf_pages_keep_their_text_inside_the_page(work: dict, written: dict) -> None:
    """Item 20: every rendered page: no word outside the page's text margins, no ink at the
    page edge, no cut cell ("…"), the title on page 1 in full, the scope sentence once per
    page."""
    import re

    from solver.reporting import CAUTION
    from solver.reporting.pdf import LEFT

    pdf = written["paths"]["pdf"]
    words = _words(pdf)
    assert words
    figure_pages = {k for k, text in enumerate(_pdf_text(pdf).split("\f"), start=1)
                    if re.search(r"^Figure [0-9]+\. ", text, re.M)}
    assert figure_pages
    for k, w, h, x0, y0, x1, y1, text in words:
        # text pages: inside the text margins; figure pages (tick labels): 12 pt clear
        inset = 12.0 if k in figure_pages else 0.8 * LEFT * w
        assert x0 >= inset and x1 <= w - inset, (k, text, x0, x1)
        assert y0 >= 0 and y1 <= h, (k, text)
        assert not (len(text) > 1 and text.endswith("…")), (k, text)  # a cut cell
    images = _page_images(pdf, work["root"] / "pages")
    assert len(images) == max(wd[0] for wd in words)
    for k, img in enumerate(images, start=1):
        edge = max(2, img.shape[1] // 50)
        border = np.concatenate([img[:, :edge].ravel(), img[:, -edge:].ravel(),
                                 img[:edge].ravel(), img[-edge:].ravel()])
        assert border.min() > 200, f"ink at the edge of page {k}"
    pages = _pdf_text(pdf).split("\f")
    title = written["summary"]["title"]
    first = " ".join(pages[0].split())
    assert all(part in first for part in title.split(" — "))
    start = " ".join(CAUTION.split()[:8])
    for k, page in enumerate(pages[:-1], start=1):
        assert " ".join(page.split()).count(start) == 1, k
    # the top table's cells appear whole: every row id and category of the QP run's table
    qp = written["summary"]["runs"][1]["influential"]
    text = " ".join(" ".join(pages).split())
    for row in qp["rows"]:
        assert row[qp["columns"].index("category")] in text


def test_no_raw_key_is_shown_as_a_label_and_json_keys_have_one_style(written: dict) -> None:
    """Item 9: name / value rows show labels (no n_rows, psd_scope, python_implementation,
    …); the JSON's keys are all of one style (no spaces); the PSD tolerance has one sign."""
    import re

    heads = re.findall(r'<th scope="row">(.*?)</th>', written["html"])
    raw = sorted({h for h in heads if re.fullmatch(r"[a-z][a-z0-9]*(_[a-z0-9]+)+", h)})
    assert raw == [] or raw == ["kkt_tol"], raw  # kkt_tol: the option's own name (--kkt-tol)
    pdf = _pdf_text(written["paths"]["pdf"], "-layout")
    for key in ("n_rows", "psd_scope", "python_implementation", "cpu_model", "psd_tol",
                "iteration_limit", "row_cache_mb", "feature_map_terms"):
        assert not re.search(rf"^{key}\b", pdf, re.M), key
        assert key not in heads

    def keys(obj: object, path: str = "") -> list[str]:
        if isinstance(obj, dict):
            out = []
            for k, v in obj.items():
                if path.endswith((".categories", ".class_counts", ".packages")):
                    continue  # values' own names (category codes, labels, package names)
                out += [f"{path}.{k}"] + keys(v, f"{path}.{k}")
            return out
        if isinstance(obj, list):
            return [k for v in obj for k in keys(v, path + "[]")]
        return []

    spaced = [k for k in keys(written["summary"]) if " " in k.rsplit(".", 1)[-1]]
    assert spaced == [], spaced[:5]
    assert "tolerance −" not in written["html"]  # the tolerance is positive; the bound is −tol


def test_runs_json_and_report_json_agree_on_types(work: dict, written: dict) -> None:
    """Item 9: ``runs --json`` gives ``converged`` as a boolean, like the report's JSON."""
    out = kk("runs", "--store", work["store"], "--json")
    assert out.returncode == 0, out.stderr
    rows = {r["run_id"]: r for r in json.loads(out.stdout)}
    for run in written["summary"]["runs"]:
        mine = rows[run["run_id"]]
        assert mine["converged"] is run["termination"]["converged"] is True
        assert mine["status"] == run["termination"]["status"]


def test_pdf_has_the_htmls_section_and_figure_numbers_and_no_near_empty_page(
        written: dict) -> None:
    """Item 10: the PDF numbers its sections and figures as the HTML does; no page is
    near empty; figure legends name categories in words, not by their codes."""
    import html as _html
    import re

    page_texts = _pdf_text(written["paths"]["pdf"]).split("\f")[:-1]
    flat = "\n".join(page_texts)
    sections = re.findall(r'<span class="subno">([0-9.]+)</span>([^<]*)</h3>', written["html"])
    assert len(sections) >= 20
    for num, title in sections:
        assert re.search(rf"(^|and ){re.escape(num)} +{re.escape(_html.unescape(title))}",
                         flat, re.M), (num, title)
    figs = re.findall(r'class="figno">Figure ([0-9]+)</span> <span class="figtitle">([^<]*)\.<',
                      written["html"])
    assert len(figs) >= 8
    for num, title in figs:
        assert f"Figure {num}. {_html.unescape(title)}" in flat, (num, title)
    for k, text in enumerate(page_texts, start=1):
        lines = [ln for ln in text.splitlines() if ln.strip()]
        assert len(lines) >= 12, f"page {k} is near empty: {lines}"
    svg = " ".join(re.findall(r"<svg.*?</svg>", written["html"], re.S))
    assert "at bound, in margin" in svg and "not a support vector" in svg
    for code in ("bounded_inside_margin", "margin_support", "non_support"):
        assert code not in svg, code
