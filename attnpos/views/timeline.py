"""The timeline widget: a sweep's heads × steps coloured by role, the training loss curve above on the same step
axis, and a clicked head's statistics over time.

Its own ``timeline.js`` (after the views' shared helpers) / ``timeline.css``, its drawing data and its static
rendering in this file; it reads a :class:`~attnpos.results.sweep.SweepResult` and the role specs of :mod:`attnpos.core.roles`.

Example::

    from attnpos.views import Timeline
    tl = attnpos.sweep("runs/rope", out="runs/rope-sweep")
    Timeline(tl)                              # click a row: tl's statistics of that head over the steps below
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import anywidget
import numpy as np
import traitlets as t

from ..core import roles as core_roles
from ..core.protocol import CAUTION
from ._base import StaticFallback, esm

HERE = Path(__file__).parent

#: the statistics drawn in a head's panel (each a line over the steps), with their labels
PANEL = (("mass_previous", "weight on the previous token"), ("mass_first", "weight on the first token"),
         ("entropy_ratio", "entropy / log(visible keys)"), ("induction", "induction score"),
         ("share_distance", "distance share of the score split"), ("share_content", "content share"))

# layout of the static drawing (the widget draws the same in JavaScript)
LEFT, RIGHT, ROW, LOSS_H, TOP = 86, 16, 16, 92, 8


def _ink(hex_colour: str) -> str:
    """Black or white text on a fill, by relative luminance (WCAG 2.x formula; common practice)."""
    c = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    lin = [x / 12.92 if x <= 0.04045 else ((x + 0.055) / 1.055) ** 2.4 for x in c]
    lum = 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]
    return "#000000" if lum > 0.25 else "#FFFFFF"


def palette() -> list[dict]:
    """Role id → role, colour, text colour and code; id 0 is "not scanned"."""
    out = [{"role": "", "colour": "#FFFFFF", "ink": "#5A5F66", "code": "·", "about": "not scanned"}]
    for s in core_roles.specs():
        out.append({"role": s.name, "colour": s.colour, "ink": _ink(s.colour), "code": s.code, "about": s.about})
    return out


def timeline_data(result) -> dict:
    """What the view draws: heads, steps, the role grid (uint8, heads × steps), the panel statistics (float32,
    heads × steps × stats), the loss curve and the emergence steps."""
    heads, steps = result.head_keys(), result.steps()
    pal = palette()
    code = {p["role"]: i for i, p in enumerate(pal)}
    grid = np.zeros((len(heads), len(steps)), dtype=np.uint8)
    stats = np.full((len(heads), len(steps), len(PANEL)), np.nan, dtype=np.float32)
    hi = {k: i for i, k in enumerate(heads)}
    si = {s: j for j, s in enumerate(steps)}
    for r in result.heads.to_dict("records"):
        i, j = hi[r["key"]], si[int(r["step"])]
        grid[i, j] = code.get(r["role"], code.get(core_roles.FALLBACK, 0))
        for k, (name, _) in enumerate(PANEL):
            v = r.get(name)
            stats[i, j, k] = np.nan if v is None else float(v)
    curve = result.curve()
    loss = {"step": [float(s) for s in curve["step"]], "loss": [float(v) for v in curve["loss"]]}
    if loss["step"]:
        run, c = next(iter(result.loss.items()))
        loss["source"] = str(c.get("source") or run)
        loss["unit"] = str(c.get("unit") or "")
    emerged = {}
    for r in result.emergence().to_dict("records"):
        if r["role"] != core_roles.FALLBACK:
            emerged.setdefault(r["head"], {})[r["role"]] = int(r["emerged"])
    return {"heads": heads, "steps": steps, "palette": pal, "grid": grid, "stats": stats,
            "stat_names": [n for n, _ in PANEL], "stat_labels": [lab for _, lab in PANEL], "loss": loss,
            "emerged": emerged, "role_emergence": {k: v for k, v in result.role_emergence().items()
                                                  if k != core_roles.FALLBACK},
            "failed": [{"name": p.get("name"), "step": p.get("step"), "error": p.get("error")}
                       for p in result.failed()],
            "title": result.headline(), "caution": result.caution or CAUTION}


class Timeline(StaticFallback, anywidget.AnyWidget):
    """A sweep's timeline: heads (rows) × checkpoint steps (columns) coloured by role, each cell also writing the
    role's code; the training loss curve above, on the same step axis; click a row (or focus the grid and use the
    up/down arrows) to see that head's statistics over the steps. ``selected`` holds the head key.

    Numbers travel as binary buffers: ``roles`` (uint8 heads × steps, index into ``meta["palette"]``, 0 = not
    scanned), ``numbers`` (float32 heads × steps × ``meta["stat_names"]``, NaN = not measured), ``loss_values``
    (float32: the loss curve's steps, then its losses).
    """

    _esm = esm("timeline.js")
    _css = (HERE / "timeline.css").read_text(encoding="utf-8")

    meta = t.Dict().tag(sync=True)
    roles = t.Bytes(b"").tag(sync=True)
    numbers = t.Bytes(b"").tag(sync=True)
    loss_values = t.Bytes(b"").tag(sync=True)
    selected = t.Unicode("").tag(sync=True)

    def __init__(self, result, head: str | None = None, **kwargs):
        super().__init__(**kwargs)
        self.result = result
        d = timeline_data(result)
        self._d = d
        meta = {k: d[k] for k in ("heads", "steps", "palette", "stat_names", "stat_labels", "emerged",
                                  "role_emergence", "failed", "title", "caution")}
        meta["loss"] = {k: v for k, v in d["loss"].items() if k in ("source", "unit")} if d["loss"]["step"] else None
        meta["n_loss"] = len(d["loss"]["step"])
        with self.hold_sync():
            self.meta = meta
            self.roles = d["grid"].astype(np.uint8).tobytes()
            self.numbers = d["stats"].astype("<f4").tobytes()
            self.loss_values = np.asarray(d["loss"]["step"] + d["loss"]["loss"], dtype="<f4").tobytes()
            self.selected = head or (d["heads"][0] if d["heads"] else "")

    def to_html(self) -> str:
        return timeline_html(self.result, self.selected or None, data=self._d)


# ------------------------------------------------------------------------------------------------ static rendering

def step_axis(steps: list[int], left: float, right: float):
    """``(x, columns)``: the step → pixel map and each checkpoint's column ``(x0, x1)``. A column spans half-way to
    its neighbours; the first and last are as wide as their one gap, so the axis runs from half a gap before the
    first step to half a gap after the last (the widget draws the same)."""
    n = len(steps)
    g0 = steps[1] - steps[0] if n > 1 else 1
    g1 = steps[-1] - steps[-2] if n > 1 else 1
    lo, hi = (steps[0] - g0 / 2, steps[-1] + g1 / 2) if n else (0, 1)

    def x(s):
        return left + (float(s) - lo) / ((hi - lo) or 1) * (right - left)

    cols = [(x((steps[j - 1] + s) / 2 if j else lo), x((steps[j + 1] + s) / 2 if j + 1 < n else hi))
            for j, s in enumerate(steps)]
    return x, cols, (lo, hi)


def _num(x: float, nd: int = 3) -> str:
    return "—" if x is None or not math.isfinite(float(x)) else f"{float(x):.{nd}f}"


def timeline_svg(d: dict, width: int = 760) -> str:
    steps, heads, grid, pal = d["steps"], d["heads"], d["grid"], d["palette"]
    inner = width - LEFT - RIGHT
    pad = 14
    x0, cols, (s_lo, s_hi) = step_axis(steps, LEFT + pad, LEFT + pad + inner - 2 * pad)
    top = TOP + (LOSS_H + 18 if d["loss"]["step"] else 0)
    height = top + ROW * len(heads) + 34
    e = html.escape
    out = [f"<svg class='apt-svg' xmlns='http://www.w3.org/2000/svg' width='{width}' height='{height}' "
           f"viewBox='0 0 {width} {height}' role='img' aria-label='{e(d['title'])}'>"]
    if d["loss"]["step"]:
        ls, lv = d["loss"]["step"], d["loss"]["loss"]
        fin = [v for v in lv if math.isfinite(v)]
        lo, hi = (min(fin), max(fin)) if fin else (0, 1)
        span = (hi - lo) or 1
        y = lambda v: TOP + 4 + (hi - v) / span * (LOSS_H - 8)  # noqa: E731
        pts = " ".join(f"{x0(s):.1f},{y(v):.1f}" for s, v in zip(ls, lv)
                       if math.isfinite(v) and s_lo <= s <= s_hi) if steps else ""
        out.append(f"<rect x='{LEFT + pad}' y='{TOP}' width='{inner - 2 * pad}' height='{LOSS_H}' "
                   "fill='#F7F5F0' stroke='#D6D2C8'/>")
        out.append(f"<text x='{LEFT + pad - 6}' y='{TOP + 10}' text-anchor='end' font-size='10'>{hi:.3g}</text>")
        out.append(f"<text x='{LEFT + pad - 6}' y='{TOP + LOSS_H}' text-anchor='end' font-size='10'>{lo:.3g}</text>")
        out.append(f"<text x='{pad}' y='{TOP + LOSS_H / 2}' font-size='11'>training loss</text>")
        if pts:
            out.append(f"<polyline class='apt-loss' points='{pts}' fill='none' stroke='#1B1F24' stroke-width='1.5'/>")
    for i, key in enumerate(heads):
        yy = top + i * ROW
        out.append(f"<g class='apt-row' data-head='{e(key)}'><text x='{LEFT + pad - 6}' y='{yy + ROW - 4}' "
                   f"text-anchor='end' font-size='11'>{e(key)}</text>")
        for j, (a, b) in enumerate(cols):
            p = pal[int(grid[i, j])]
            out.append(f"<rect class='apt-cell' x='{a:.1f}' y='{yy}' width='{max(1.0, b - a - 1):.1f}' "
                       f"height='{ROW - 1}' fill='{p['colour']}' stroke='#D6D2C8' stroke-width='0.5'>"
                       f"<title>{e(key)} at step {steps[j]}: {e(p['role'] or 'not scanned')}</title></rect>")
            if b - a >= 14:
                out.append(f"<text x='{(a + b) / 2:.1f}' y='{yy + ROW - 4}' text-anchor='middle' font-size='9' "
                           f"fill='{p['ink']}'>{e(p['code'])}</text>")
        out.append("</g>")
    yb = top + ROW * len(heads) + 14
    ticks = steps if len(steps) <= 12 else steps[:: max(1, len(steps) // 12)]
    for s in ticks:
        out.append(f"<text x='{x0(s):.1f}' y='{yb}' text-anchor='middle' font-size='10'>{s}</text>")
    out.append(f"<text x='{(LEFT + width) / 2:.0f}' y='{yb + 16}' text-anchor='middle' font-size='11'>"
               "training step</text></svg>")
    return "".join(out)


def timeline_html(result, head: str | None = None, data: dict | None = None) -> str:
    """The static timeline: the drawing, the legend, when each role appeared, the failed checkpoints, one head's
    statistics over the steps (``head``, default the first), and the caution."""
    d = data or timeline_data(result)
    e = html.escape
    used = {int(v) for v in np.unique(d["grid"])} if d["grid"].size else set()
    legend = "".join(f"<span class='apt-key'><span class='apt-swatch' style='background:{p['colour']};color:{p['ink']}'>"
                     f"{e(p['code'])}</span>{e(p['role'] or 'not scanned')}</span>"
                     for i, p in enumerate(d["palette"]) if i in used)
    re_rows = "".join(f"<tr><td>{e(r)}</td><td>{v['step']}</td><td>{e(', '.join(v['heads']))}</td></tr>"
                      for r, v in d["role_emergence"].items())
    roles_part = (f"<table class='apt-table'><tr><th>role</th><th>holds from step</th><th>heads (earliest first)"
                  f"</th></tr>{re_rows}</table>" if re_rows else "<p>No role but 'mixed' holds at the last step.</p>")
    failed = "".join(f"<li>{e(str(f['name']))} (step {f['step']}): {e(str(f['error']))}</li>" for f in d["failed"])
    head = head if head in d["heads"] else (d["heads"][0] if d["heads"] else None)
    panel = ""
    if head is not None:
        i = d["heads"].index(head)
        cells = "".join(f"<th>{lab}</th>" for lab in d["stat_labels"])
        rows = []
        for j, s in enumerate(d["steps"]):
            p = d["palette"][int(d["grid"][i, j])]
            vals = "".join(f"<td>{_num(v)}</td>" for v in d["stats"][i, j])
            rows.append(f"<tr><td>{s}</td><td>{e(p['role'] or 'not scanned')}</td>{vals}</tr>")
        em = d["emerged"].get(head) or {}
        since = ", ".join(f"{e(r)} from step {s}" for r, s in em.items()) or "no role but 'mixed' at the end"
        panel = (f"<div class='apt-panel'><b>{e(head)}</b> over the steps — {since}<table class='apt-table'>"
                 f"<tr><th>step</th><th>role</th>{cells}</tr>{''.join(rows)}</table></div>")
    loss_note = (f"<p class='apt-note'>Loss: {e(d['loss'].get('unit', ''))} — from {e(d['loss'].get('source', ''))}"
                 "</p>" if d["loss"]["step"] else "<p class='apt-note'>No training loss curve was found.</p>")
    style = (HERE / "timeline.css").read_text(encoding="utf-8")
    return (f"<div class='apt-timeline apt-static'><style>{style}</style><div class='apt-title'>{e(d['title'])}</div>"
            f"{timeline_svg(d)}<div class='apt-legend'>{legend}</div>{loss_note}{roles_part}"
            f"{'<ul class=apt-failed>' + failed + '</ul>' if failed else ''}{panel}"
            f"<p class='apt-caution'><b>Caution.</b> {e(d['caution'])}</p></div>")
