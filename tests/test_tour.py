"""The README's five-minute tour, run as written (issue 13, Must show): every command
succeeds, and train, compare, replay and the report's JSON tell one story about the same
runs — the same status and the same figures to the precision each one prints.

The commands are read from README.md (the bash block under "From the terminal"), with
SMO_RUN / QP_RUN replaced by the run ids ``train`` prints; the store is chosen with the
``KKTRACE_STORE`` variable the README names.  The data are the shipped demo CSVs
(invented, used only to exercise the workflow).
"""

from __future__ import annotations

import json
import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def tour_commands() -> list[list[str]]:
    """The tour's kktrace commands from README.md, continuation lines joined."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = text.split("### From the terminal", 1)[1].split("```bash", 1)[1].split("```", 1)[0]
    block = block.replace("\\\n", " ")
    cmds = []
    for line in block.splitlines():
        line = line.strip()
        if line.startswith("kktrace "):
            cmds.append(shlex.split(line, comments=True))
    return cmds


def run(argv: list[str], store: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "KKTRACE_STORE": str(store)}
    return subprocess.run([sys.executable, "-m", "solver.cli", *argv[1:]], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=1200)


_FROM_SUPERSCRIPT = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")


def printed_value(printed: str) -> float:
    """The float a printed figure stands for (``2.072×10⁻⁵``, ``0.190685``, ``1e-05``)."""
    text = printed.replace("\u2009", "").replace("−", "-")
    if "×10" in text:
        m, e = text.split("×10", 1)
        return float(f"{m}e{e.translate(_FROM_SUPERSCRIPT)}")
    return float(text)


def same_to_printed_precision(printed: str, exact: float) -> bool:
    """True when ``exact`` rounds to ``printed`` at the digits ``printed`` shows."""
    mant = re.split(r"[eE×]", printed)[0].lstrip("+-−").replace(".", "").lstrip("0")
    sig = max(1, len(mant))
    return float(f"{exact:.{sig - 1}e}") == float(f"{printed_value(printed):.{sig - 1}e}")


@pytest.fixture(scope="module")
def tour(tmp_path_factory):
    store = tmp_path_factory.mktemp("tour") / "traces"
    cmds = tour_commands()
    assert [c[1] for c in cmds] == ["train", "runs", "compare", "explain", "explain",
                                    "explain", "replay", "verify", "apply", "report"]
    train = run(cmds[0], store)
    assert train.returncode == 0, train.stderr
    ids = re.findall(r"^(?:primary|challenger) run (\S+)", train.stdout, re.M)
    assert len(ids) == 2, train.stdout
    outs = {"train": train}
    for k, argv in enumerate(cmds[1:], start=1):
        argv = [ids[0] if a == "SMO_RUN" else ids[1] if a == "QP_RUN" else a for a in argv]
        proc = run(argv, store)
        assert proc.returncode == 0, (argv, proc.stderr)
        assert "Traceback" not in proc.stderr
        outs[f"{k}:{argv[1]}"] = proc
    return {"store": store, "ids": ids, "outs": outs}


def _train_figures(text: str, role: str) -> dict[str, str]:
    block = text.split(f"{role} run", 1)[1].split(" run ", 1)[0]
    pick = {
        "status": r"^\s*\S+\s+\[\w+\]\s+(\S+)",
        "max_violation": r"violation\s+(\S+)",
        "dual_objective": r"dual \(minimised\) (\S+),",
        "primal_objective": r"primal (\S+)\n",
        "duality_gap": r"duality gap\s+(\S+)",
        "bias": r"bias (\S+)",
    }
    return {k: re.search(p, block, re.M).group(1) for k, p in pick.items()}


def test_every_tour_command_ran(tour):
    assert len(tour["outs"]) == 10


def test_train_compare_replay_and_report_agree(tour):
    smo, qp = tour["ids"]
    store = tour["store"]
    outs = tour["outs"]
    train_text = outs["train"].stdout
    figs = {smo: _train_figures(train_text, "primary"), qp: _train_figures(train_text,
                                                                          "challenger")}
    report_json = next(Path(store, "reports", smo).glob("*.json"))
    rep = {r["run_id"]: r["termination"] for r in json.loads(report_json.read_text())["runs"]}
    comp = json.loads(run(["kktrace", "compare", smo, qp, "--json"], store).stdout)
    comp_runs = {r["run_id"]: r for r in comp["runs"]}
    comp_text = outs["2:compare"].stdout
    for rid in (smo, qp):
        t = rep[rid]
        # one status everywhere
        assert figs[rid]["status"] == t["status"] == comp_runs[rid]["status"] == "converged"
        line = next(ln for ln in comp_text.splitlines() if f"run_id {rid}" in ln)
        assert "status converged" in line
        final = json.loads(run(["kktrace", "replay", rid, "--iteration", str(t["iterations"]),
                                "--json"], store).stdout)
        assert final["run_status"] == t["status"]
        # the same figures to the printed precision: train's text, the report's JSON, the
        # compare command's text and the replay of the last iteration
        for key in ("max_violation", "dual_objective", "primal_objective", "duality_gap",
                    "bias"):
            assert same_to_printed_precision(figs[rid][key], t[key]), (rid, key)
            assert same_to_printed_precision(figs[rid][key], final["certificate"][key]), (
                rid, key)
        for key in ("max_violation", "duality_gap", "bias"):
            printed = re.search(rf"\b{key} (\S+?),", line).group(1)
            assert same_to_printed_precision(printed, t[key]), (rid, key)
            assert comp_runs[rid][key] == pytest.approx(t[key], rel=1e-12, abs=1e-15)
    # the verdict train printed is the one compare gives and the report holds
    verdict = re.search(r"solver agreement: (\S+)", train_text).group(1)
    assert verdict == comp["verdict"] == re.search(r"verdict: (\S+)", comp_text).group(1)
    doc = json.loads(report_json.read_text())
    assert doc["comparison"]["verdict"] == verdict and doc["all_converged"] is True


def test_replay_in_the_tour_names_its_figures(tour):
    text = tour["outs"]["6:replay"].stdout
    assert "run status    converged" in text
    assert "maximal violation" in text and "violation before the step" in text


def test_one_number_form_in_terminal_html_and_pdf(tour):
    """Issue 13 item 9: train prints the tolerance, the violation and the duality gap in the
    very form the report's HTML and PDF show them (one formatter,
    solver.vocabulary.figure_text), not 1.0e-05 in one place and 1.000×10⁻⁵ in another."""
    import html as html_module
    import shutil

    smo, _qp = tour["ids"]
    block = tour["outs"]["train"].stdout.split("primary run", 1)[1].split(" run ", 1)[0]
    shown = {"kkt_tol": re.search(r"\(kkt_tol (\S+?)\)", block).group(1),
             "max_violation": re.search(r"violation\s+(\S+)", block).group(1),
             "duality_gap": re.search(r"duality gap\s+(\S+)", block).group(1)}
    assert "e-" not in "".join(shown.values()), shown
    reports = Path(tour["store"], "reports", smo)
    page = next(reports.glob("*.html")).read_text(encoding="utf-8")
    sup = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
    text = html_module.unescape(re.sub(r"<sup>(-?\d+)</sup>",
                                       lambda m: m.group(1).translate(sup), page))
    for key, value in shown.items():
        assert value in text, (key, value)
    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (poppler-utils) is not installed")
    pdf = subprocess.run(["pdftotext", "-layout", str(next(reports.glob("*.pdf"))), "-"],
                         capture_output=True, text=True, check=True).stdout
    for key, value in shown.items():
        assert value in pdf, (key, value)
