"""In a real browser: a notebook executed and saved (no widget state, not trusted — what a colleague receives) still
shows the atlas and a card, as pictures, in the readers people use: JupyterLab (which sanitises an untrusted
notebook's HTML and strips its SVG and styles) and the HTML that ``jupyter nbconvert --to html`` writes (what a
repository's notebook preview renders, too). Screenshots are checked: the expected size, and not blank.

External check: Chromium's own PNG decoder (W3C PNG specification) decodes the inline pictures.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

pytestmark = pytest.mark.browser

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

CELLS = [
    "from attnpos.views import Atlas, HeadCard\nfrom attnpos.views.synthetic import synthetic_scan\n"
    "scan = synthetic_scan(4, 4, seed=5, hostile=True)",
    "Atlas(scan)",
    'HeadCard(scan, head="L1.H2")',
]


@pytest.fixture(scope="module")
def saved_notebook(tmp_path_factory):
    """Executed by a kernel and saved the way JupyterLab saves by default (no widget state); never trusted."""
    work = tmp_path_factory.mktemp("saved")
    nb = nbformat.v4.new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.cells = [nbformat.v4.new_code_cell(c) for c in CELLS]
    nbclient.NotebookClient(nb, timeout=180, kernel_name="python3", store_widget_state=False,
                            resources={"metadata": {"path": str(work)}}).execute()
    path = work / "shared.ipynb"
    nbformat.write(nb, path)
    return path


def _not_blank(png: bytes) -> float:
    """Spread of grey levels in a screenshot (decoded by matplotlib's PNG reader): 0 for a blank page."""
    import io

    from matplotlib.image import imread

    img = imread(io.BytesIO(png), format="png")
    return float(np.asarray(img)[..., :3].std())


def _check_pictures(page, n: int, artifacts, name: str) -> None:
    imgs = page.locator("img[alt^='Atlas'], img[alt^='Head L1.H2']")
    imgs.first.wait_for(state="visible", timeout=60_000)
    assert imgs.count() == n
    for k in range(n):
        # decoded by Chromium, and drawn at a readable size
        assert imgs.nth(k).evaluate("i => i.complete && i.naturalWidth >= 600 && i.naturalHeight >= 300")
        box = imgs.nth(k).bounding_box()
        assert box["width"] >= 300 and box["height"] >= 150
    imgs.first.scroll_into_view_if_needed()
    shot = page.screenshot(path=str(artifacts / f"{name}.png"))
    assert _not_blank(shot) > 0.05
    # the atlas picture itself is not blank either (its own pixels, not the page around it)
    assert _not_blank(imgs.first.screenshot()) > 0.1


def test_an_untrusted_saved_notebook_shows_the_atlas_and_card_in_jupyterlab(jupyterlab, browser, saved_notebook,
                                                                             artifacts):
    url, token, root = jupyterlab
    (root / "shared.ipynb").write_bytes(saved_notebook.read_bytes())
    page = browser.new_page(viewport={"width": 1400, "height": 900})
    errors = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    try:
        page.goto(f"{url}/lab/tree/shared.ipynb?token={token}", wait_until="domcontentloaded", timeout=90_000)
        page.wait_for_selector(".jp-Notebook .jp-Cell", timeout=90_000)
        _check_pictures(page, 2, artifacts, "saved-notebook-jupyterlab")
        # the summary is text beside the picture, hostile names included as text only
        assert page.locator("text=Atlas — role of every head").count() >= 1
        assert page.locator("img[src='x']").count() == 0
    finally:
        page.close()


def test_the_nbconvert_html_export_shows_the_atlas_and_card(browser, saved_notebook, artifacts, tmp_path):
    out = tmp_path / "shared.html"
    subprocess.run([sys.executable, "-m", "jupyter", "nbconvert", "--to", "html", str(saved_notebook), "--output",
                    str(out)], check=True, capture_output=True, timeout=180)
    page = browser.new_page(viewport={"width": 1400, "height": 900})
    errors = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    try:
        page.goto(out.as_uri(), wait_until="load")
        _check_pictures(page, 2, artifacts, "saved-notebook-nbconvert")
        assert page.locator("img[src='x']").count() == 0 and errors == []
    finally:
        page.close()
