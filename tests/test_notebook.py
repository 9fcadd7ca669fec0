"""The notebooks execute from top to bottom without error (so they cannot rot): the audit
walkthrough, and the study walkthrough (issue 20: a verifying study, the chosen cell with
its rule, the stability verdict and the maps).

The kernel runs on the interpreter running pytest: a private kernelspec pointing at
``sys.executable`` is written to a temporary Jupyter path, so the test does not depend on
which ``python3`` kernel happens to be installed system-wide.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

NOTEBOOKS = Path(__file__).resolve().parents[1] / "notebooks"
NAMES = ["audit_walkthrough.ipynb", "study_walkthrough.ipynb"]


@pytest.mark.parametrize("name", NAMES)
def test_committed_notebook_has_no_outputs(name):
    nb = json.loads((NOTEBOOKS / name).read_text(encoding="utf-8"))
    for cell in nb["cells"]:
        if cell["cell_type"] == "code":
            assert cell.get("outputs") == [] and cell.get("execution_count") is None


def _execute(name: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> list:
    """Run the notebook in a private kernel; returns every code cell's outputs in order
    (raises CellExecutionError on the first failing cell)."""
    spec_dir = tmp_path / "jupyter" / "kernels" / "kktrace-test"
    spec_dir.mkdir(parents=True)
    (spec_dir / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "kktrace test kernel", "language": "python",
    }))
    monkeypatch.setenv("JUPYTER_PATH", str(tmp_path / "jupyter"))
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    # iopub_timeout: on a loaded machine a cell's printed output can reach the client after
    # its execute reply; nbclient then waits this long for it (default 4 s, after which
    # the output is dropped without an error)
    client = nbclient.NotebookClient(nb, kernel_name="kktrace-test", timeout=600,
                                     iopub_timeout=60,
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    return [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]


def _text(outputs: list) -> str:
    return "\n".join(o.get("text", "") for o in outputs)


@pytest.mark.slow
def test_notebook_executes(tmp_path, monkeypatch):
    text = _text(_execute("audit_walkthrough.ipynb", tmp_path, monkeypatch))
    assert "verdict" in text and "files intact: True" in text


@pytest.mark.slow
def test_study_notebook_executes(tmp_path, monkeypatch):
    outputs = _execute("study_walkthrough.ipynb", tmp_path, monkeypatch)
    text = _text(outputs)
    assert "study and every member verify: True" in text
    assert "one-standard-error rule" in text and "same optimum" in text
    assert "regression score: rmse" in text and "one-class score: nu_gap" in text
    assert "both studies verify: True" in text
    shown = [o for o in outputs if "image/svg+xml" in o.get("data", {})]
    assert shown, "the maps were not displayed"
