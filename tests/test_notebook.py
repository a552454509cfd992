"""The notebook in notebooks/ (the Python API on the demo survey) runs from top to bottom,
executed with nbclient, and draws its figures."""

from pathlib import Path

import pytest

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "tour.ipynb"


def test_tour_notebook_executes(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    notebook = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(notebook, timeout=300, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = [o for cell in notebook.cells if cell.cell_type == "code" for o in cell.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    text = "".join(o.get("text", "") for o in outputs if o.output_type == "stream")
    # One step of the walkthrough per line: footprint, tally, completeness, counts,
    # luminosity function, cosmic variance, totals, a claim, a plan.
    for expected in ("Footprint(area_deg2=39.58", "in footprint", "sources in 50 bins", "m50 =",
                     "slope_faint", "m_star", "a cap of 400 deg²", "whole sky", "verdict:",
                     "1 % precision needs"):
        assert expected in text, expected
    figures = [o for o in outputs if o.output_type == "display_data"
               and "image/png" in o.get("data", {})]
    assert len(figures) >= 7  # footprint, tally, completeness, counts, LF, variance, plan
