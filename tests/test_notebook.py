"""The walkthrough notebook executes from top to bottom without error (so it cannot rot).

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

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "audit_walkthrough.ipynb"


def test_committed_notebook_has_no_outputs():
    nb = json.loads(NOTEBOOK.read_text(encoding="utf-8"))
    for cell in nb["cells"]:
        if cell["cell_type"] == "code":
            assert cell.get("outputs") == [] and cell.get("execution_count") is None


@pytest.mark.slow
def test_notebook_executes(tmp_path, monkeypatch):
    spec_dir = tmp_path / "jupyter" / "kernels" / "kktrace-test"
    spec_dir.mkdir(parents=True)
    (spec_dir / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "kktrace test kernel", "language": "python",
    }))
    monkeypatch.setenv("JUPYTER_PATH", str(tmp_path / "jupyter"))
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(
        nb, kernel_name="kktrace-test", timeout=600,
        resources={"metadata": {"path": str(tmp_path)}},
    )
    client.execute()  # raises CellExecutionError on the first failing cell
    text = "\n".join(
        o.get("text", "") for c in nb.cells if c.cell_type == "code" for o in c.outputs
    )
    assert "verdict" in text and "files intact: True" in text
