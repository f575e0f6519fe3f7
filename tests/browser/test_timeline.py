"""In a real browser: the sweep timeline's widget module renders a real sweep's timeline (heads × steps, the loss
curve above), a click on a row shows that head's statistics over the steps, hostile names stay text; the static
rendering (the notebook's fallback) shows the same grid.

The widget's ES module runs in a plain page with a small stand-in for the widget model (get / set / on /
save_changes), so the drawing code is the one a notebook runs. The JupyterLab path is tested for the survey in
test_notebook.py; the timeline's saved-notebook rendering in tests/test_notebooks.py.

External check: Chromium's own HTML parser, SVG renderer and JavaScript engine draw and run the module (what a
notebook's browser would do); the sweep under it is checked against scans by hand in tests/test_sweep.py.
"""

from __future__ import annotations

import base64
import json

import pytest

from attnpos.results.sweep import SweepResult
from attnpos.views.timeline import Timeline

pytestmark = pytest.mark.browser

HOSTILE = "<img src=x onerror=alert(1)>"

PAGE = """<!doctype html><html><head><meta charset="utf-8"><style>{css}</style></head><body><div id="host"></div>
<script type="module">
const state = {state};
const b64 = (s) => Uint8Array.from(atob(s), (c) => c.charCodeAt(0));
for (const k of ["roles", "numbers", "loss_values"]) state[k] = new DataView(b64(state[k]).buffer);
const handlers = {{}};
const model = {{
  get: (k) => state[k],
  set: (k, v) => {{ state[k] = v; (handlers["change:" + k] || []).forEach((f) => f()); }},
  on: (ev, f) => {{ (handlers[ev] = handlers[ev] || []).push(f); }},
  off: () => {{}}, save_changes: () => {{ window.saved = (window.saved || 0) + 1; }},
}};
const mod = await import("data:text/javascript;base64,{esm}");
mod.default.render({{ model, el: document.getElementById("host") }});
window.model = model;
window.ready = true;
</script></body></html>"""


def _timeline(hostile: bool = False) -> SweepResult:
    """A timeline of a real (tiny) training run, scanned in this process (no cluster needed to draw it)."""
    import tempfile

    import attnpos
    from attnpos.reference.train import train

    out = tempfile.mkdtemp(prefix="attnpos-tl-")
    train("rope", out, steps=6, save_every=2, log_every=1, batch=2, context=32, corpus_bytes=60_000, n_layers=2,
          hidden=32, heads=2, val_windows=4, progress=False)
    text = "The ferry to the north island leaves at nine and returns at four, unless the wind turns."
    scans = [(s, attnpos.scan(f"{out}/checkpoint-{s}" if s < 6 else out, [text], n_boot=0, progress=False))
             for s in (2, 4, 6)]
    import json as _json

    hist = _json.loads(open(f"{out}/config.json").read())["attnpos_training"]["train_loss_history"]
    loss = {"run": {"source": "config.json", "unit": "nats per byte", "step": [h[0] for h in hist],
                    "loss": [h[1] for h in hist]}}
    res = SweepResult.from_scans(scans, loss=loss)
    if hostile:
        res.points[0]["status"], res.points[0]["error"], res.points[0]["name"] = "failed", HOSTILE, HOSTILE
    return res


def _open(browser, tmp_path, widget):
    state = {"meta": widget.meta, "selected": widget.selected,
             **{k: base64.b64encode(getattr(widget, k)).decode() for k in ("roles", "numbers", "loss_values")}}
    page_html = PAGE.format(css=widget._css, state=json.dumps(state),
                            esm=base64.b64encode(widget._esm.encode()).decode())
    path = tmp_path / "timeline.html"
    path.write_text(page_html, encoding="utf-8")
    page = browser.new_page(viewport={"width": 900, "height": 1000})
    events = {"errors": [], "dialogs": []}
    page.on("pageerror", lambda e: events["errors"].append(str(e)))
    page.on("dialog", lambda d: (events["dialogs"].append(d.message), d.dismiss()))
    page.goto(path.as_uri(), wait_until="load")
    page.wait_for_function("() => window.ready === true", timeout=30_000)
    return page, events


def test_timeline_widget_draws_and_a_click_shows_a_head_over_time(browser, tmp_path, artifacts):
    res = _timeline()
    w = Timeline(res)
    page, ev = _open(browser, tmp_path, w)
    try:
        rows = page.locator(".apt-live g.apt-row")
        assert rows.count() == len(res.head_keys()) == 4
        assert page.locator(".apt-live rect.apt-cell").count() == 4 * 3
        assert page.locator(".apt-live polyline.apt-loss").count() == 1
        # the cells' colours are the roles' colours at each step, in the grid's order
        fills = page.locator(".apt-live g.apt-row").first.locator("rect.apt-cell").evaluate_all(
            "rs => rs.map(r => r.getAttribute('fill'))")
        pal = {p["role"]: p["colour"] for p in w.meta["palette"]}
        assert fills == [pal[r] for r in res.grid().iloc[0]]
        last = res.head_keys()[-1]
        page.locator(f".apt-live g.apt-row[data-head='{last}']").click()
        assert page.evaluate("() => window.model.get('selected')") == last
        assert page.locator(".apt-live .apt-panel-title").inner_text().startswith(last)
        assert page.locator(".apt-live .apt-panel svg.apt-chart").count() == len(w.meta["stat_names"])
        assert page.locator(f".apt-live g.apt-row.apt-selected[data-head='{last}']").count() == 1
        # keyboard: focus the grid, arrow up selects the head above
        page.locator(".apt-live svg.apt-svg").focus()
        page.keyboard.press("ArrowUp")
        assert page.evaluate("() => window.model.get('selected')") == res.head_keys()[-2]
        assert page.get_by_text("Attention weights are evidence, not explanation").count() >= 1
        assert ev["errors"] == [] and ev["dialogs"] == []
        page.screenshot(path=str(artifacts / "timeline.png"))
    finally:
        page.close()


def test_timeline_static_rendering_and_hostile_names(browser, tmp_path):
    res = _timeline(hostile=True)
    w = Timeline(res)
    page, ev = _open(browser, tmp_path, w)
    try:
        assert page.locator(".apt-failed li").first.inner_text().count(HOSTILE) == 2      # shown as text
        assert page.locator("img").count() == 0
    finally:
        page.close()
    static = tmp_path / "static.html"
    static.write_text(f"<!doctype html><meta charset='utf-8'><body>{w.to_html()}</body>", encoding="utf-8")
    page = browser.new_page()
    errors = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    try:
        page.goto(static.as_uri(), wait_until="load")
        assert page.locator(".apt-static rect.apt-cell").count() == len(res.head_keys()) * len(res.steps())
        assert page.locator(".apt-static polyline.apt-loss").count() == 1
        assert page.locator("img").count() == 0 and errors == []
        assert page.get_by_text(HOSTILE).count() >= 1
    finally:
        page.close()
