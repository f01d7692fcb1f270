"""The worked notebook runs end to end, so it cannot rot."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK = ROOT / "notebooks" / "walkthrough.ipynb"


@pytest.mark.slow
def test_walkthrough_notebook_runs(tmp_path: Path) -> None:
    """Every code cell of notebooks/walkthrough.ipynb runs without error in a fresh python3 kernel."""
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    env = dict(os.environ)
    # the kernel imports this working tree's pipeprobe, whatever is installed
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    env["TMPDIR"] = str(tmp_path)  # the notebook's run folders land here and are cleaned up
    client = nbclient.NotebookClient(nb, kernel_name="python3", timeout=120,
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute(env=env)
    code = [c for c in nb.cells if c.cell_type == "code"]
    errors = [o for c in code for o in c.get("outputs", []) if o.get("output_type") == "error"]
    assert [] == errors
    images = [o for c in code for o in c.get("outputs", []) if "image/png" in o.get("data", {})]
    assert 8 <= len(images)  # timeline, zoom, stall, durations, overview, ceilings, sweep, before/after
    text = "".join(o.get("text", "") for c in code for o in c.get("outputs", []))
    assert "predicted" in text and "measured" in text
    assert next(tmp_path.glob("pipeprobe-walkthrough-*/report.html")).stat().st_size > 10_000
