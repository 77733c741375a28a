"""The walkthrough notebook beside the recipes runs from top to bottom."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_walkthrough_notebook_executes(tmp_path, monkeypatch):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    monkeypatch.setenv("MPLBACKEND", "Agg")
    path = ROOT / "recipes" / "walkthrough.ipynb"
    nb = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=900, kernel_name="python3",
                                     resources={"metadata": {"path": str(path.parent)}})
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    text = "".join(o.get("text", "") for o in outputs if o.get("output_type") == "stream")
    assert "sentence" in text and "4.0000" in text
    html = [o for o in outputs if "text/html" in o.get("data", {})]
    assert html and "<audio" in html[0]["data"]["text/html"]
