"""The study notebook (issue 20) executes from top to bottom without error and shows a
verifying study, the chosen cell with its rule, the stability verdict and the maps."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "study_walkthrough.ipynb"


def test_committed_study_notebook_has_no_outputs():
    nb = json.loads(NOTEBOOK.read_text(encoding="utf-8"))
    for cell in nb["cells"]:
        if cell["cell_type"] == "code":
            assert cell.get("outputs") == [] and cell.get("execution_count") is None


@pytest.mark.slow
def test_study_notebook_executes(tmp_path, monkeypatch):
    spec_dir = tmp_path / "jupyter" / "kernels" / "kktrace-test"
    spec_dir.mkdir(parents=True)
    (spec_dir / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "kktrace test kernel", "language": "python",
    }))
    monkeypatch.setenv("JUPYTER_PATH", str(tmp_path / "jupyter"))
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(nb, kernel_name="kktrace-test", timeout=600,
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    text = "\n".join(o.get("text", "") for c in nb.cells if c.cell_type == "code"
                     for o in c.outputs)
    assert "study and every member verify: True" in text
    assert "one-standard-error rule" in text and "same optimum" in text
    shown = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs
             if "image/svg+xml" in o.get("data", {})]
    assert shown, "the maps were not displayed"
