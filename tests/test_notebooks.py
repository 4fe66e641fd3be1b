"""The notebooks run top to bottom (nbclient) on a small demo set."""

from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

NOTEBOOKS = Path(__file__).resolve().parent.parent / "notebooks"


@pytest.mark.parametrize("name", ["quickstart.ipynb", "walkthrough.ipynb", "pooled_map.ipynb"])
def test_notebook_runs(name, demo_dir, monkeypatch):
    monkeypatch.setenv("DRIFTSPEC_DEMO", str(demo_dir / "fixes.parquet"))
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    assert all(not c.get("outputs") for c in nb.cells if c.cell_type == "code"), "outputs must be stripped in git"
    client = NotebookClient(nb, timeout=600, kernel_name="python3", resources={"metadata": {"path": str(NOTEBOOKS)}})
    client.execute()
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
    if name == "quickstart.ipynb":
        # the dashboard displayed inline: a Panel/Bokeh bundle in the outputs
        shown = [o for c in nb.cells for o in c.get("outputs", []) if o.output_type == "display_data"]
        assert any("application/vnd.holoviews_load.v0+json" in o.get("data", {}) or
                   "application/vnd.bokehjs_exec.v0+json" in o.get("data", {}) or "text/html" in o.get("data", {})
                   for o in shown)
