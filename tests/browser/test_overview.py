"""In a real browser: a big model's overview fits one 1400 × 900 screen — the atlas widget (its own ES module, run
in a plain page) and the standalone report — for a 30 × 9 and a 32 × 32 model (synthetic scans); the report opens
the card of any head clicked; screenshots are checked (size, not blank).

External check: Chromium's layout gives the boxes; its PNG decoder reads the screenshots (matplotlib's reader).
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from widgetpage import write_widget_page  # noqa: E402  (tests/browser is on sys.path)

from attnpos.report import write_report
from attnpos.views import Atlas
from attnpos.views.synthetic import synthetic_scan

pytestmark = pytest.mark.browser
SCREEN = {"width": 1400, "height": 900}
SIZES = [(30, 9), (32, 32)]


def _spread(png: bytes) -> float:
    from matplotlib.image import imread

    return float(np.asarray(imread(io.BytesIO(png), format="png"))[..., :3].std())


def _events(page):
    ev = {"errors": [], "console": []}
    page.on("pageerror", lambda e: ev["errors"].append(str(e)))
    page.on("console", lambda m: ev["console"].append(m.text) if m.type == "error" else None)
    return ev


@pytest.mark.parametrize("layers, heads", SIZES, ids=[f"{a}x{b}" for a, b in SIZES])
def test_the_atlas_widget_fits_one_screen(browser, artifacts, tmp_path, layers, heads):
    atlas = Atlas(synthetic_scan(layers, heads, seed=7, keep_maps=0, n_texts=1))
    page = browser.new_page(viewport=SCREEN)
    ev = _events(page)
    try:
        page.goto(write_widget_page(atlas, tmp_path / "atlas.html").as_uri(), wait_until="load")
        page.wait_for_function("() => window.apReady === true", timeout=30_000)
        assert page.locator(".ap-atlas .ap-cell").count() == layers * heads
        box = page.locator(".ap-atlas").bounding_box()
        assert box["width"] <= SCREEN["width"] and box["height"] <= SCREEN["height"], box
        # no part of the grid hides behind a scroll bar
        assert page.locator(".ap-atlas .ap-gridwrap").evaluate(
            "e => e.scrollWidth <= e.clientWidth && e.scrollHeight <= e.clientHeight")
        # every mark writes its role's code
        assert all(t.strip() for t in page.locator(".ap-atlas .ap-cell text").all_text_contents())
        # the filters: a role from the legend, a layer range
        page.locator(".ap-legend-item[data-role='previous-token']").click()
        n_prev = int((atlas.scan.heads["role"] == "previous-token").sum())
        assert page.locator(".ap-cell.ap-out").count() == n_prev
        page.locator(".ap-filters button.ap-clear").click()
        page.locator(".ap-layer-lo").fill("2")
        page.locator(".ap-layer-hi").fill("4")
        page.locator(".ap-layer-hi").dispatch_event("change")
        assert page.locator(".ap-cell:not(.ap-out)").count() == 3 * heads
        page.locator(".ap-filters button.ap-clear").click()
        shot = page.screenshot(path=str(artifacts / f"overview-widget-{layers}x{heads}.png"))
        assert _spread(shot) > 0.1
        assert ev["errors"] == [] and ev["console"] == []
    finally:
        page.close()


@pytest.mark.parametrize("layers, heads", SIZES, ids=[f"{a}x{b}" for a, b in SIZES])
def test_the_report_overview_fits_one_screen_and_opens_any_head(browser, artifacts, tmp_path, layers, heads):
    scan = synthetic_scan(layers, heads, seed=8, n_texts=2, text_length=200, hostile=True)
    out = write_report(scan, tmp_path / "report.html")
    assert out.stat().st_size <= 1_000_000
    page = browser.new_page(viewport=SCREEN)
    ev = _events(page)
    try:
        page.goto(out.as_uri(), wait_until="load")
        atlas = page.locator("#atlas .apx-atlas-view")
        atlas.scroll_into_view_if_needed()
        box = atlas.bounding_box()
        assert box["width"] <= SCREEN["width"] and box["height"] <= SCREEN["height"], box
        shot = page.screenshot(path=str(artifacts / f"overview-report-{layers}x{heads}.png"))
        assert _spread(shot) > 0.1
        # the report's filters: a role from the legend, a layer range
        page.locator("#atlas .apx-legend span[data-role='previous-token']").click()
        n_prev = int((scan.heads["role"] == "previous-token").sum())
        assert page.locator("#atlas g.apx-cell.apx-out").count() == n_prev
        page.locator("#atlas .apx-filters button").click()
        page.locator("#atlas .apx-filters input[type=number]").first.fill("1")
        page.locator("#atlas .apx-filters input[type=number]").nth(1).fill("2")
        page.locator("#atlas .apx-filters input[type=number]").nth(1).dispatch_event("change")
        assert page.locator("#atlas g.apx-cell:not(.apx-out)").count() == 2 * heads
        page.locator("#atlas .apx-filters button").click()
        # a head without a static card: clicking it draws its card in the page (the report's own script)
        last = f"L{layers - 1}.H{heads - 1}"
        page.locator(f"a[data-head='{last}']").click()
        title = page.locator("#rp-card .ap-card-title")
        title.wait_for(timeout=10_000)
        assert last in title.inner_text()
        assert page.locator("#rp-card .ap-profile").count() == 1
        card = page.locator("#rp-card")
        card.scroll_into_view_if_needed()
        card.screenshot(path=str(artifacts / f"report-card-{layers}x{heads}.png"))
        assert ev["errors"] == [] and ev["console"] == [], ev
    finally:
        page.close()
