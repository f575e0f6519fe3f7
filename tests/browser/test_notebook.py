"""In a real browser: JupyterLab runs a notebook that scans the RoPE reference model and shows the linked atlas,
card and findings panel; we click, type and check what a person would see.

External check: JupyterLab's own widget manager and Chromium (layout, events, console) run the widgets as a user's
notebook does; the numbers shown are checked in the stage tests."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser
REPO = Path(__file__).resolve().parents[2]

nbformat = pytest.importorskip("nbformat")

SETUP = '''\
import os, sys
sys.path[:0] = [{repo!r}, {helpers!r}]
os.environ["HF_HUB_OFFLINE"] = "1"
from attnpos.views import Survey, HeadCard
from attnpos.views.synthetic import synthetic_scan
from scanning import build_real_scan
scan, source = build_real_scan()
print("scanned", source, len(scan.heads), "heads")
'''

SHOW = '''\
survey = Survey(scan, findings="notes.json", head="L0.H0")
survey
'''

HOSTILE = '''\
hostile = HeadCard(synthetic_scan(2, 2, seed=3, hostile=True), head="L0.H0")
hostile
'''

BIG = '''\
from attnpos.views import Atlas
Atlas(synthetic_scan(32, 32, seed=4, keep_maps=0, n_texts=1))
'''


def _notebook(root, repo) -> str:
    nb = nbformat.v4.new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.cells = [nbformat.v4.new_code_cell(SETUP.format(repo=str(repo), helpers=str(repo / "tests" / "browser"))), nbformat.v4.new_code_cell(SHOW),
                nbformat.v4.new_code_cell(HOSTILE), nbformat.v4.new_code_cell(BIG)]
    nbformat.write(nb, root / "survey.ipynb")
    return "survey.ipynb"


def test_atlas_click_updates_card_in_jupyterlab(jupyterlab, browser, artifacts):
    url, token, root = jupyterlab
    name = _notebook(root, REPO)
    page = browser.new_page(viewport={"width": 1440, "height": 1300})
    dialogs, errors = [], []
    page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
    page.on("pageerror", lambda e: errors.append(str(e) + " " + str(e.stack)))
    console = []
    page.on("console", lambda m: console.append((m.type, m.text, m.location)) if m.type in ("error", "warning") else None)
    try:
        page.goto(f"{url}/lab/tree/{name}?token={token}", wait_until="domcontentloaded", timeout=90_000)
        page.wait_for_selector(".jp-Notebook .jp-Cell", timeout=90_000)
        # if JupyterLab still asks for a kernel, take the preferred one
        try:
            page.wait_for_selector(".jp-Dialog", timeout=3_000)
            page.locator(".jp-Dialog button.jp-mod-accept").click()
        except Exception:
            pass
        # wait for the kernel, then Run ▸ Run All Cells from the menu, as a person would
        page.wait_for_function("() => document.body.textContent.includes('Python 3 (ipykernel) | Idle')",
                               timeout=90_000)
        page.locator(".lm-MenuBar-itemLabel", has_text="Run").first.click()
        page.locator(".lm-Menu-itemLabel", has_text="Run All Cells").first.click()
        page.wait_for_selector(".ap-atlas .ap-cell[data-key='L3.H3']", timeout=120_000)
        page.wait_for_selector(".ap-card .ap-card-title", timeout=30_000)
        card = page.locator(".ap-survey .ap-card").first
        atlas = page.locator(".ap-survey .ap-atlas").first
        assert atlas.locator(".ap-cell").count() == 16
        # every cell writes its role (a code or short word) beside the colour
        labels = atlas.locator(".ap-cell text").all_text_contents()
        assert len(labels) == 16 and all(t.strip() for t in labels)
        assert "L0.H0" in card.locator(".ap-card-title").inner_text()
        before_slope = card.locator(".ap-fact-slope").inner_text()

        # click a cell: the card follows
        atlas.locator(".ap-cell[data-key='L2.H1']").click()
        page.wait_for_function(
            "() => document.querySelector('.ap-survey .ap-card .ap-card-title').textContent.includes('L2.H1')",
            timeout=30_000)
        assert atlas.locator(".ap-cell.ap-selected").get_attribute("data-key") == "L2.H1"
        assert card.locator("canvas.ap-map").count() == 1
        assert card.locator(".ap-profile .ap-profile-line").count() >= 1
        after_slope = card.locator(".ap-fact-slope").inner_text()
        assert (before_slope, "L0.H0") != (after_slope, "L2.H1")
        # the drawn slope line goes the way the slope says: down where scores fall with distance (slope > 0;
        # SVG y grows downwards), up otherwise
        slope = float(after_slope.split()[0])
        pts = card.locator(".ap-profile .ap-slope").first.get_attribute("points").split()
        (x0, y0), (x1, y1) = [tuple(map(float, p.split(","))) for p in (pts[0], pts[-1])]
        assert x1 > x0 and (y1 - y0) * slope > 0, (slope, pts[0], pts[-1])

        # hover: the evidence numbers
        atlas.locator(".ap-cell[data-key='L1.H2']").hover()
        tip = atlas.locator(".ap-tip")
        tip.wait_for(state="visible", timeout=5_000)
        assert "L1.H2" in tip.inner_text() and "shares" in tip.inner_text()

        # keyboard: arrows + Enter move the selection
        atlas.locator("svg.ap-grid").focus()
        page.keyboard.press("ArrowRight")
        page.keyboard.press("Enter")
        page.wait_for_function(
            "() => document.querySelector('.ap-survey .ap-card .ap-card-title').textContent.includes('L2.H2')",
            timeout=30_000)

        # zoom: drag a window on the map; the kernel sends the cut-out back
        axes_before = card.locator(".ap-axes").inner_text()
        box = card.locator("canvas.ap-map").bounding_box()
        page.mouse.move(box["x"] + box["width"] * 0.2, box["y"] + box["height"] * 0.2)
        page.mouse.down()
        page.mouse.move(box["x"] + box["width"] * 0.6, box["y"] + box["height"] * 0.6, steps=5)
        page.mouse.up()
        page.wait_for_function(
            "(b) => document.querySelector('.ap-survey .ap-card .ap-axes').textContent !== b", arg=axes_before,
            timeout=30_000)
        card.locator("canvas.ap-map").hover()
        assert "query" in card.locator(".ap-hover").inner_text()

        # a finding written in the panel lands in the file and marks the atlas cell
        panel = page.locator(".ap-survey .ap-findings").first
        body = "looks back one step <img src=x onerror=alert(1)>"
        panel.locator("textarea.ap-body").fill(body)
        panel.locator("select.ap-statussel").select_option("supported")
        panel.locator("button.ap-save").click()
        page.wait_for_selector(".ap-survey .ap-atlas .ap-cell[data-key='L2.H2'] .ap-mark", timeout=30_000)
        assert panel.locator("td.ap-fbody").first.inner_text() == body
        assert card.locator(".ap-card-findings li").count() == 1
        deadline = time.time() + 10
        while time.time() < deadline and not (root / "notes.json").exists():
            time.sleep(0.2)
        stored = json.loads((root / "notes.json").read_text())
        assert [(f["target"], f["body"], f["status"]) for f in stored["findings"]] == [("L2.H2", body, "supported")]

        # hostile tokens in a card show as text; nothing was injected, no alert ran
        hostile = page.locator(".ap-card").nth(1)
        hostile.wait_for(timeout=60_000)
        keys = hostile.locator(".ap-topkeys").inner_text()
        assert "<script>alert(1)</script>" in keys and "onerror=alert(1)>" in keys and "\\x1b[31m" in keys
        options = hostile.locator("select.ap-textsel option").all_text_contents()
        assert "text-0<b>" in options
        assert page.locator("img[src='x']").count() == 0
        assert dialogs == []

        # what was not measured says so
        assert page.locator(".ap-survey .ap-curves .ap-probe-none").count() == 1

        # a 32 x 32 atlas renders every head
        big = page.locator(".ap-atlas").nth(1)
        big.locator(".ap-cell[data-key='L31.H31']").wait_for(state="attached", timeout=60_000)
        assert big.locator(".ap-cell").count() == 1024

        atlas.scroll_into_view_if_needed()
        page.locator(".ap-survey").first.evaluate("e => e.scrollIntoView({block: 'start'})")
        page.screenshot(path=str(artifacts / "atlas.png"))
        # no uncaught error at all, and no console error but JupyterLab's own probe of a language-server
        # extension that this server does not have (a 404 on /lsp/status)
        assert errors == [], errors
        others = [(t, m, loc) for t, m, loc in console if t == "error" and "/lsp/" not in loc.get("url", "")]
        assert others == [], others
    except Exception:
        page.screenshot(path=str(artifacts / "atlas-failure.png"))
        raise
    finally:
        page.close()
