"""The report's probability-calibration section: how the probabilities were obtained (folds,
seed, A, B, Newton steps, gradient norm, weights) and the evidence (reliability bins with
counts, Brier score, log-loss, ECE with its binning, the sigmoid, disagreements), on held-out
rows when given, else on the cross-validated values, labelled as such."""

from __future__ import annotations

import io
import os
from dataclasses import replace

import jsonschema
import numpy as np
import pytest

import solver
from solver.calibration import Calibration, calibration_evidence
from solver.reporting import build_report_content, render_report
from solver.reporting._calibration import CROSS_VALIDATED, HELD_OUT
from solver.reporting.pdf import plan_pages
from solver.reporting.summary import load_schema, summary_dict

DATA = os.path.join(os.path.dirname(__file__), "..", "solver", "data")
TRAIN = os.path.join(DATA, "tablet_coating.csv")
HOLD = os.path.join(DATA, "tablet_coating_holdout.csv")


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    store = tmp_path_factory.mktemp("store")
    with_hold = solver.train(TRAIN, label="lab_decision", holdout=HOLD, probabilities=True,
                             calibration_seed=3, store=store, trace="off", explain=False)
    without = solver.train(TRAIN, label="lab_decision", probabilities=True, calibration_folds=4,
                           store=store, trace="off", explain=False)
    plain = solver.train(TRAIN, label="lab_decision", store=store, trace="off", explain=False)
    return with_hold.records[0], without.records[0], plain.records[0]


def test_section_on_held_out_rows(runs):
    rec = runs[0]
    content = build_report_content([rec])
    cal = content.runs[0].calibration
    facts = dict(cal.facts)
    stored = Calibration.from_attachment(rec.attachments["calibration"])
    assert facts["fold seed"] == 3 and facts["calibration folds"] == 5
    assert facts["A (slope)"] == stored.A and facts["B (offset)"] == stored.B
    assert facts["Newton steps"] == stored.fit.newton_steps
    assert facts["evidence on"].startswith(HELD_OUT)
    # the evidence is recomputed from the stored held-out values with the stored sigmoid
    hv = np.asarray(stored.holdout["values"])
    ev = calibration_evidence(stored.probabilities(hv)[:, 1], stored.holdout["positive"], hv)
    assert facts["Brier score"] == ev["brier_score"] and facts["log-loss"] == ev["log_loss"]
    assert sum(row[1] for row in cal.bins.rows) == hv.size == 120
    assert "equal-width bins" in facts["binning"]
    assert {f.kind for f in cal.figures} == {"reliability", "sigmoid"}
    assert any("most probable class differs" in n for n in cal.notes)
    assert len(cal.folds.rows) == 5


def test_section_on_cross_validated_values_is_labelled(runs):
    rec = runs[1]
    cal = build_report_content([rec]).runs[0].calibration
    facts = dict(cal.facts)
    assert facts["evidence on"] == CROSS_VALIDATED
    stored = Calibration.from_attachment(rec.attachments["calibration"])
    assert facts["rows in the evidence"] == stored.cv_values.size
    assert facts["calibration folds"] == 4 and len(cal.folds.rows) == 4


def test_run_without_probabilities_has_no_section(runs):
    content = build_report_content([runs[2]])
    assert content.runs[0].calibration is None
    assert "Probability calibration" not in render_report(content, "html").decode()
    assert summary_dict(content)["runs"][0]["calibration"] is None


def test_failed_fit_is_reported_without_probabilities(runs):
    rec = runs[1]
    att = {**rec.attachments["calibration"], "status": "degenerate_values",
           "message": "fit failed: the cross-validated decision values do not separate"}
    bad = replace(rec, attachments={**rec.attachments, "calibration": att})
    cal = build_report_content([bad]).runs[0].calibration
    assert cal.evidence is None and cal.figures == ()
    assert any("No probabilities" in n and "does not make up" in n for n in cal.notes)


def test_all_three_formats_carry_the_section(runs):
    content = build_report_content([runs[0]])
    html = render_report(content, "html").decode()
    assert "Probability calibration" in html and "Reliability of P(release)" in html
    assert "Fitted sigmoid over the decision values" in html
    doc = summary_dict(content)
    jsonschema.validate(doc, load_schema(), cls=jsonschema.Draft202012Validator)
    ev = doc["runs"][0]["calibration"]["evidence"]
    assert ev["rows"] == 120 and len(ev["bins"]) == 10
    assert doc["runs"][0]["calibration"]["facts"]["fold seed"] == 3
    headings = [p.heading for p in plan_pages(content)]
    assert any("probability calibration" in h for h in headings)
    from pypdf import PdfReader

    text = "".join(pg.extract_text() for pg in
                   PdfReader(io.BytesIO(render_report(content, "pdf"))).pages)
    assert "Probability calibration" in text and "Brier score" in text
