"""In a real browser: the stretch report opens from file:// with its loss curves and break grid and no error, a
head's link jumps to its profiles, and the board's ES module renders and selects a head on click.

External check: Chromium's own HTML parser, SVG renderer and JavaScript engine."""

from __future__ import annotations

import base64
import json

import pytest

import tiny

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def small_result():
    from attnpos.reference import corpus
    from attnpos.stretching import stretch

    text = corpus.generate_documents(seed=corpus.CORPUS_SEED + 43, target_bytes=2500)
    return stretch(tiny.reference("rope"), text, to=192, scalings=["linear:2", "yarn:2"], n_sequences=2, n_boot=10)


def test_stretch_report_renders_offline(browser, small_result, artifacts, tmp_path):
    from attnpos.stretch_report import write_stretch_report

    out = write_stretch_report(small_result, tmp_path / "stretch.html")
    page = browser.new_page(viewport={"width": 1300, "height": 1200})
    errors, requests = [], []
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("request", lambda r: requests.append(r.url))
    try:
        page.goto(out.as_uri(), wait_until="load")
        assert page.locator("svg.st-loss polyline.st-line").count() == 3
        assert page.locator("svg.st-loss line.st-train").count() == 1
        assert page.locator("svg.st-loss").first.bounding_box()["width"] > 300
        cells = page.locator("table.st-grid td.st-break").count() + page.locator("table.st-grid td.st-keep").count()
        assert cells == 16 * 3
        key = small_result.ranked()[-1]["key"]
        anchor = "st-" + key.replace(".", "-")
        page.click(f"a[href='#{anchor}']")
        assert page.evaluate("location.hash") == f"#{anchor}"
        assert page.locator(f"#{anchor} svg.st-profile").count() == 1
        assert errors == [] and all(u.startswith(("file:", "data:")) for u in requests), (errors, requests)
        page.screenshot(path=str(artifacts / "stretch-report.png"))
    finally:
        page.close()


def test_board_module_renders_and_selects_on_click(browser, small_result, tmp_path):
    # the widget's own ES module, driven by a stand-in for anywidget's model (get / set / on / save_changes)
    from attnpos.views.stretch import StretchBoard

    board = StretchBoard(small_result)
    state = {"meta": board.meta, "selected": board.selected, "caution": board.caution,
             "loss_values": base64.b64encode(board.loss_values).decode(),
             "profile_values": base64.b64encode(board.profile_values).decode()}
    page_html = f"""<!doctype html><html><head><meta charset='utf-8'><style>{board._css}</style></head><body>
<div id='root'></div><script type='module'>
const S = {json.dumps(state)};
const dec = (s) => {{ const b = atob(s), u = new Uint8Array(b.length); for (let i = 0; i < b.length; i++) u[i] = b.charCodeAt(i); return new DataView(u.buffer); }};
const vals = {{ meta: S.meta, selected: S.selected, caution: S.caution, loss_values: dec(S.loss_values), profile_values: dec(S.profile_values) }};
const handlers = {{}};
const model = {{ get: (k) => vals[k], set: (k, v) => {{ vals[k] = v; (handlers["change:" + k] || []).forEach((f) => f()); }},
  save_changes: () => {{}}, on: (e, f) => {{ (handlers[e] = handlers[e] || []).push(f); }}, off: () => {{}} }};
const mod = await import(URL.createObjectURL(new Blob([{json.dumps(board._esm)}], {{ type: "text/javascript" }})));
mod.default.render({{ model, el: document.getElementById("root") }});
window.stModel = model; window.stReady = true;
</script></body></html>"""
    path = tmp_path / "board.html"
    path.write_text(page_html, encoding="utf-8")
    page = browser.new_page(viewport={"width": 1100, "height": 1000})
    errors = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    try:
        page.goto(path.as_uri(), wait_until="load")
        page.wait_for_function("window.stReady === true", timeout=10000)
        assert page.locator("svg.st-loss polyline.st-line").count() == 3
        last = small_result.ranked()[-1]["key"]
        page.locator("td.st-head", has_text=last).click()
        assert page.evaluate("window.stModel.get('selected')") == last
        assert page.locator(".st-live h4").first.text_content().startswith(last)
        assert page.locator(".st-live svg.st-profile polyline").count() == 1 + 3
        assert errors == []
    finally:
        page.close()
