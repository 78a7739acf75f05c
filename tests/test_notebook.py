"""The example notebook of docs/python.md runs from top to bottom in a real Jupyter kernel
(nbclient + ipykernel), on this test's warehouse (SQLite, or PostgreSQL with BLOCKYARD_TEST_URL),
and fails on any error a cell raises."""
from __future__ import annotations

from pathlib import Path

NOTEBOOK = Path(__file__).resolve().parents[1] / "docs" / "python-example.ipynb"


def test_the_example_notebook_runs_in_a_kernel(location, monkeypatch, tmp_path):
    import nbclient  # test dependencies (pyproject's `test` extra): no skip when missing
    import nbformat

    monkeypatch.setenv("BLOCKYARD_WAREHOUSE", location)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=300, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError on the first failing cell
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    shown = [o["data"]["text/html"] for o in outputs if o.get("output_type") == "execute_result"
             and "text/html" in o.get("data", {})]
    assert any("Read these first" in h for h in shown)  # a result's cautions come first in its view
