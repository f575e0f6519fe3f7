"""In a real browser: the standalone report opens from file://, renders the atlas, logs no error, and shows
hostile tokens as text."""

from __future__ import annotations

import pytest

from attnpos.report import write_report
from attnpos.views.synthetic import synthetic_scan

pytestmark = pytest.mark.browser

HOSTILE = "<script>alert(1)</script>"
HOSTILE_IMG = "\"><img src=x onerror=alert(1)>"


def _open(browser, path, **viewport):
    page = browser.new_page(viewport=viewport or {"width": 1400, "height": 1400})
    events = {"console": [], "errors": [], "dialogs": [], "requests": []}
    page.on("console", lambda m: events["console"].append((m.type, m.text)))
    page.on("pageerror", lambda e: events["errors"].append(str(e)))
    page.on("dialog", lambda d: (events["dialogs"].append(d.message), d.dismiss()))
    page.on("request", lambda r: events["requests"].append(r.url))
    page.goto(path.as_uri(), wait_until="load")
    return page, events


def test_report_of_a_real_scan_renders_offline(browser, real_scan, artifacts, tmp_path):
    scan, _source = real_scan
    findings_mod = pytest.importorskip("attnpos.findings")
    store = findings_mod.Findings(tmp_path / "notes.json")
    first = scan.heads.iloc[0]
    store.add(f"L{first['layer']}.H{first['head']}", "a note written before the report",
              status="open", fingerprint=scan.model["fingerprint"], texts_hash=scan.texts_hash)
    out = write_report(scan, tmp_path / "report.html", findings=store)
    page, ev = _open(browser, out)
    try:
        cells = page.locator("svg.apx-atlas g.apx-cell")
        assert cells.count() == len(scan.heads)
        assert page.locator("svg.apx-atlas").first.bounding_box()["width"] > 100
        assert page.locator(".apx-card").count() >= 1
        assert page.locator("img.apx-map").count() >= 1
        # Chromium's own PNG decoder is an independent check of our encoder (W3C PNG specification): the data-URI
        # image decodes to a non-empty picture
        assert page.locator("img.apx-map").first.evaluate("i => i.complete && i.naturalWidth > 0")
        assert page.get_by_text("Attention weights are evidence, not explanation").count() >= 1
        assert page.get_by_text("a note written before the report").count() == 2     # its card + the table
        assert [e for e in ev["console"] if e[0] == "error"] == [] and ev["errors"] == []
        assert all(u.startswith(("file:", "data:")) for u in ev["requests"]), ev["requests"]
        page.screenshot(path=str(artifacts / "report.png"))
    finally:
        page.close()


def test_report_shows_hostile_tokens_as_text(browser, tmp_path):
    scan = synthetic_scan(3, 3, seed=21, hostile=True)
    findings_mod = pytest.importorskip("attnpos.findings")
    store = findings_mod.Findings(tmp_path / "notes.json")
    store.add("L1.H1", f"note {HOSTILE} {HOSTILE_IMG}", fingerprint=scan.model["fingerprint"],
              texts_hash=scan.texts_hash)
    out = write_report(scan, tmp_path / "hostile.html", findings=store)
    page, ev = _open(browser, out)
    try:
        assert page.locator("svg.apx-atlas g.apx-cell").count() == 9
        # the literal strings are in the DOM as text ...
        body = page.locator("body").inner_text()
        assert HOSTILE in body and HOSTILE_IMG.strip() in body and "text-0<b>" in body
        assert "\\x00\\x1b[31m\\x07" in body
        # ... and nothing was injected or run (Chromium's HTML parser as the reference: WHATWG HTML parsing of the
        # escaped text creates no elements or event-handler attributes)
        # only the report's own two script elements: its JSON data and its hash-pinned script
        assert page.locator("script").count() == 2
        assert page.locator("img[src='x']").count() == 0
        # the card drawn in the page for a clicked head shows the hostile note as text, and runs nothing
        page.locator("a[data-head='L1.H1']").click()
        page.locator("#rp-card .ap-card-findings li").wait_for(timeout=10_000)
        assert HOSTILE in page.locator("#rp-card .ap-card-findings").inner_text()
        assert page.locator("img[src='x']").count() == 0 and page.locator("script").count() == 2
        assert page.evaluate("() => [...document.querySelectorAll('*')].filter(e => e.getAttributeNames()"
                             ".some(a => a.startsWith('on'))).length") == 0
        assert ev["dialogs"] == [] and ev["errors"] == []
        assert [e for e in ev["console"] if e[0] == "error"] == []
    finally:
        page.close()
