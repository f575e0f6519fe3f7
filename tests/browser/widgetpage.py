"""A widget's ES module and CSS in a plain page, with a read-only stand-in for its model built from the Python
widget's synced state: the front end exactly as JupyterLab would run it, without a Jupyter server (for the
screenshot tests that need no kernel). No pytest here."""

from __future__ import annotations

import base64
import json
from pathlib import Path

PAGE = """<!doctype html><html><head><meta charset="utf-8"><style>body{{margin:0;background:#fff}}{css}</style></head>
<body><div id="root"></div>
<script type="application/json" id="state">{state}</script>
<script type="module">
const raw = JSON.parse(document.getElementById("state").textContent);
const bin = (s) => {{ const b = atob(s); const a = new Uint8Array(b.length); for (let i = 0; i < b.length; i++) a[i] = b.charCodeAt(i); return new DataView(a.buffer); }};
const state = {{}};
for (const [k, v] of Object.entries(raw)) state[k] = (v && v.__bytes__ !== undefined) ? bin(v.__bytes__) : v;
const handlers = {{}};
const model = {{
  get: (k) => state[k],
  set: (k, v) => {{ state[k] = v; (handlers["change:" + k] || []).forEach((f) => f()); }},
  save_changes() {{}}, send() {{}},
  on: (e, f) => {{ (handlers[e] = handlers[e] || []).push(f); }},
  off() {{}}, cid: "test",
}};
window.apModel = model;
const mod = await import("data:text/javascript;base64," + {esm});
mod.default.render({{ model, el: document.getElementById("root") }});
window.apReady = true;
</script></body></html>"""


def write_widget_page(widget, path: Path) -> Path:
    state = {}
    for name in widget.keys:
        if name.startswith("_") or name in ("layout", "comm", "log", "tabbable", "tooltip"):
            continue
        value = getattr(widget, name)
        if isinstance(value, (bytes, bytearray, memoryview)):
            value = {"__bytes__": base64.b64encode(bytes(value)).decode("ascii")}
        try:
            json.dumps(value)
        except TypeError:
            continue
        state[name] = value
    esm = json.dumps(base64.b64encode(widget._esm.encode("utf-8")).decode("ascii"))
    text = json.dumps(state).replace("<", "\\u003c")
    path.write_text(PAGE.format(css=widget._css, state=text, esm=esm), encoding="utf-8")
    return path
