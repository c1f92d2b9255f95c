"""The worked examples in notebooks/ run from top to bottom without error.

They are stored as jupytext percent-format .py files (readable diffs) and executed here with
nbclient in a fresh kernel, on the shared demo run's factor set (conftest.demo_run), so no
notebook refits: each loads the saved factor set named by CALIB_NOTEBOOK_FACTORS.
"""

from __future__ import annotations

from pathlib import Path

import pytest

NOTEBOOKS = sorted((Path(__file__).resolve().parent.parent / "notebooks").glob("*.py"))


def test_one_notebook_per_user():
    names = [p.stem for p in NOTEBOOKS]
    assert names == ["01_data_manager_merging_partners", "02_analyst_legacy_records",
                     "03_scientist_artifact_or_trend"]


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs(path, demo_run, tmp_path, monkeypatch):
    jupytext = pytest.importorskip("jupytext")
    nbclient = pytest.importorskip("nbclient")
    monkeypatch.setenv("CALIB_NOTEBOOK_FACTORS", str(demo_run["out"] / "factors"))
    monkeypatch.setenv("CALIB_NOTEBOOK_OUT", str(tmp_path))
    monkeypatch.setenv("MPLBACKEND", "Agg")
    notebook = jupytext.read(path)
    assert sum(c.cell_type == "markdown" for c in notebook.cells) >= 4  # it explains, not only runs
    nbclient.NotebookClient(notebook, timeout=600, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}}).execute()
    outputs = [o for c in notebook.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    text = "".join(o.get("text", "") for o in outputs if o.get("output_type") == "stream")
    assert "Nothing was written" not in text
    written = {p.name for p in tmp_path.rglob("*") if p.is_file()}
    expected = {"01_data_manager_merging_partners": {"report.html", "records.parquet", "rejected.csv"},
                "02_analyst_legacy_records": {"legacy_hauls.csv", "records.parquet", "rejected.csv"},
                "03_scientist_artifact_or_trend": {"trend.csv", "summary.md"}}[path.stem]
    assert expected <= written
