"""The demo notebooks run top to bottom (offline, no network) and are stored without outputs.

No external check here: the demo notebooks run top to bottom; their numbers are checked in the stage tests.
"""

import os
import shutil
from pathlib import Path

import nbformat
import pytest

NB_DIR = Path(__file__).resolve().parent.parent / "demo_notebooks"
NOTEBOOKS = sorted(NB_DIR.glob("*.ipynb"))


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_is_stored_without_outputs(path):
    nb = nbformat.read(path, as_version=4)
    for cell in nb.cells:
        if cell.cell_type == "code":
            assert not cell.outputs and cell.execution_count is None, f"{path.name}: strip outputs before committing"


@pytest.mark.slow
@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs(path, tmp_path):
    from nbclient import NotebookClient

    work = tmp_path / path.stem
    work.mkdir()
    shutil.copy(path, work / path.name)
    nb = nbformat.read(work / path.name, as_version=4)
    env_before = os.environ.get("HF_HUB_OFFLINE")
    os.environ["HF_HUB_OFFLINE"] = "1"
    os.environ["ATTNPOS_DEMO_QUICK"] = "1"       # notebooks that train (06) run a tiny schedule in the suite
    try:
        client = NotebookClient(nb, timeout=600, kernel_name="python3", resources={"metadata": {"path": str(work)}})
        client.execute()
    finally:
        os.environ.pop("ATTNPOS_DEMO_QUICK", None)
        if env_before is None:
            os.environ.pop("HF_HUB_OFFLINE", None)
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
    nbformat.write(nb, work / ("executed-" + path.name))
