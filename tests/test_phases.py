"""Phase timings of a fit (solver/phases.py): recorded per run, printed by train --json,
shown in the report."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from solver.phases import PHASES, PhaseClock


def test_clock_accumulates_and_refuses_unknown_phases():
    clock = PhaseClock()
    with clock.phase("load"):
        pass
    with clock.phase("load"):
        sum(range(1000))
    own = clock.copy()
    with own.phase("solve"):
        pass
    assert list(clock.to_dict()) == ["load"] and list(own.to_dict()) == ["load", "solve"]
    assert own.to_dict()["load"] == clock.to_dict()["load"] > 0
    with pytest.raises(ValueError, match="unknown phase"):
        with clock.phase("lunch"):
            pass


def _csv(path: Path) -> Path:
    rng = np.random.default_rng(5)
    X = rng.standard_normal((300, 3))
    y = np.where(X[:, 0] + 0.3 * rng.standard_normal(300) > 0, "pass", "fail")
    lines = ["a,b,c,label"] + [",".join(repr(float(v)) for v in r) + f",{lab}"
                               for r, lab in zip(X, y, strict=True)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_train_records_prints_and_reports_every_phase(tmp_path):
    data = _csv(tmp_path / "d.csv")
    store = tmp_path / "st"
    run = subprocess.run([sys.executable, "-m", "solver.cli", "train", str(data), "--label",
                          "label", "--store", str(store), "--json", "--quiet"],
                         capture_output=True, text=True, timeout=900)
    assert run.returncode == 0, run.stderr
    summary = json.loads(run.stdout)
    phases = summary["phase_seconds"]
    assert list(phases) == [p for p in PHASES if p in phases]
    assert {"load", "standardise", "audit", "solve", "explanation", "save"} <= set(phases)
    assert all(v >= 0 for v in phases.values())
    # the solve phase holds the solver's own call (compile or cache loading included)
    assert phases["solve"] >= summary["solve_seconds"]
    from solver.store import RunStore

    rec = RunStore(store).load(summary["run_id"])
    assert rec.attachments["phases"] == {k: v for k, v in phases.items() if k != "save"}
    rep = subprocess.run([sys.executable, "-m", "solver.cli", "report", summary["run_id"],
                          "--store", str(store), "--format", "json,html", "--out",
                          str(tmp_path / "rep")], capture_output=True, text=True, timeout=900)
    assert rep.returncode == 0, rep.stderr
    got = json.loads((tmp_path / "rep" / "report.json").read_text())
    runs = got["runs"]
    assert runs[0]["termination"]["phase_seconds"]["audit"] == phases["audit"]
    assert "phases of the fit (s)" in (tmp_path / "rep" / "report.html").read_text()
