"""The stretch board: what a context-extension what-if (:func:`attnpos.stretching.stretch`) found, as one widget.

* the per-position loss of every variant on one plot (90% bands, the training length marked);
* the heads × variants grid, each cell coloured break or keep (heads most often broken first);
* a click on a head (a row of the grid) shows its distance profile under each variant next to its profile at the
  training length, and why each variant broke it.

The widget (anywidget) and its static rendering (:func:`stretch_html`, the ``text/html`` fallback, the report) draw
the same numbers, from :func:`stretch_data`. Numbers travel to JavaScript as float32 buffers; head keys, roles and
reasons as JSON strings, shown with ``textContent`` there and ``html.escape`` here.

Example::

    from attnpos.stretching import stretch
    from attnpos.views.stretch import StretchBoard
    StretchBoard(stretch("ref:rope", to=512, scalings=["linear:4", "yarn:4"]))
"""

from __future__ import annotations

import html
import math
from pathlib import Path

import anywidget
import numpy as np
import traitlets as t

from ._base import StaticFallback

HERE = Path(__file__).parent

#: line colours of the variants, by kind (the unscaled model in ink)
KIND_COLOURS = {"none": "#30343A", "linear": "#C2571A", "dynamic": "#2C7F6E", "yarn": "#6A4FB3", "llama3": "#A87B12"}
EXTRA_COLOURS = ("#3D6FB6", "#B0417A", "#5B8C2A", "#8A5A44")
BREAK, KEEP, REFERENCE = "#C4473A", "#E3EEE6", "#8D9096"


def _finite(x) -> bool:
    return x is not None and isinstance(x, (int, float, np.floating)) and math.isfinite(float(x))


def _fmt(x, nd: int = 3) -> str:
    return f"{float(x):.{nd}g}" if _finite(x) else "—"


def _esc(x) -> str:
    return html.escape(str(x), quote=True)


def variant_colours(result) -> dict[str, str]:
    out, used = {}, set()
    extra = iter(EXTRA_COLOURS)
    for v in result.variants:
        c = KIND_COLOURS.get(v["kind"], "#555")
        if c in used:
            c = next(extra, "#777")
        used.add(c)
        out[v["name"]] = c
    return out


def stretch_data(result) -> dict:
    """What the board draws: ``position``; per variant ``loss``/``lo``/``hi`` arrays and a colour; heads (most often
    broken first) with ``key``, ``band``, ``role``, ``n_broken``, per variant ``broken``/``reasons``/``role``; the
    profiles (heads, 1 + variants, buckets: the reference first) and the bucket labels."""
    names = result.variant_names
    colours = variant_colours(result)
    nan = lambda v: np.array([np.nan if x is None else x for x in v], float) if v is not None else None  # noqa: E731
    variants = []
    for v in result.variants:
        variants.append({"name": v["name"], "kind": v["kind"], "colour": colours[v["name"]], "loss": nan(v.get("loss")),
                         "lo": nan(v.get("loss_lo")), "hi": nan(v.get("loss_hi")), "broken": v.get("broken"),
                         "loss_at": v.get("loss_at") or {}, "source": v.get("source", "")})
    heads = result.ranked()
    edges = result.profile_edges
    labels = []
    for a, b in zip(edges[:-1], edges[1:]):
        labels.append(str(a) if b - a == 1 else f"{a}–{b - 1}")
    ticks = [str(a) for a in edges[:-1]]
    prof = np.full((len(heads), 1 + len(names), len(edges) - 1), np.nan)
    for i, h in enumerate(heads):
        prof[i, 0] = nan(h["reference"]["profile"])
        for k, n in enumerate(names):
            prof[i, 1 + k] = nan(h["variants"][n]["profile"])
    rows = [{"key": h["key"], "band": h.get("band") or "—", "role": h["reference"]["role"], "n_broken": h["n_broken"],
             "cells": [{"broken": bool(h["variants"][n]["broken"]), "role": h["variants"][n]["role"],
                        "reasons": list(h["variants"][n]["reasons"])} for n in names]} for h in heads]
    return {"position": np.asarray(result.position, float), "variants": variants, "heads": rows, "profiles": prof,
            "bucket_labels": labels, "bucket_ticks": ticks, "training_length": result.training_length, "to": result.to,
            "names": names, "caution": result.caution}


# --------------------------------------------------------------------------------------------- static SVG

def _polyline(xs, ys, X, Y) -> str:
    pts = [f"{X(x):.1f},{Y(y):.1f}" for x, y in zip(xs, ys) if _finite(x) and _finite(y)]
    return " ".join(pts)


def loss_svg(d: dict, width: int = 640, height: int = 260) -> str:
    """The loss curves of every variant on one plot, the training length as a dashed line."""
    ml, mr, mt, mb = 48, 12, 12, 34
    x = d["position"]
    k_s = max(1, len(x) // 64)
    sm = {(v["name"], k): _smooth(v[k], k_s) for v in d["variants"] for k in ("lo", "hi", "loss") if v[k] is not None}
    ys = list(sm.values())
    finite = np.concatenate([a[np.isfinite(a)] for a in ys]) if ys else np.array([0.0, 1.0])
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    lo = min(0.0, lo)
    if hi - lo < 1e-9:
        hi = lo + 1
    x0, x1 = float(x.min()) if len(x) else 0.0, float(x.max()) if len(x) else 1.0
    X = lambda v: ml + (width - ml - mr) * (v - x0) / max(x1 - x0, 1e-9)  # noqa: E731
    Y = lambda v: mt + (height - mt - mb) * (1 - (v - lo) / (hi - lo))  # noqa: E731
    out = [f"<svg class='st-loss' width='{width}' height='{height}' viewBox='0 0 {width} {height}' role='img' "
           f"aria-label='next-token loss by position, one line per variant'>",
           f"<rect x='{ml}' y='{mt}' width='{width - ml - mr}' height='{height - mt - mb}' fill='#FFFFFF' "
           "stroke='#DDD8CE'/>"]
    step = max(1, len(x) // 300)                     # at most ~300 points per line in the static picture
    for v in d["variants"]:
        if v["loss"] is None:
            continue
        if v["lo"] is not None and v["hi"] is not None:
            lo_s, hi_s = sm[(v["name"], "lo")], sm[(v["name"], "hi")]
            sel = np.arange(0, len(x), step)
            ok = [k for k in sel if np.isfinite(lo_s[k]) and np.isfinite(hi_s[k])]
            if len(ok) > 1:
                pts = [f"{X(x[k]):.1f},{Y(lo_s[k]):.1f}" for k in ok] + \
                      [f"{X(x[k]):.1f},{Y(hi_s[k]):.1f}" for k in reversed(ok)]
                out.append(f"<polygon points='{' '.join(pts)}' fill='{v['colour']}' fill-opacity='0.14'/>")
        line = sm[(v["name"], "loss")]
        out.append(f"<polyline class='st-line' data-variant='{_esc(v['name'])}' points='{_polyline(x[::step], line[::step], X, Y)}' "
                   f"fill='none' stroke='{v['colour']}' stroke-width='1.7'/>")
    L = d["training_length"]
    if _finite(L):
        vx = X(L)
        out.append(f"<line class='st-train' x1='{vx:.1f}' x2='{vx:.1f}' y1='{mt}' y2='{height - mb}' stroke='#30343A' "
                   "stroke-dasharray='4,3'/>")
        out.append(f"<text x='{vx + 4:.1f}' y='{mt + 11}' font-size='10.5' fill='#30343A'>training length {int(L)}</text>")
    for k in range(5):
        v = x0 + (x1 - x0) * k / 4
        out.append(f"<text x='{X(v):.1f}' y='{height - mb + 14}' font-size='10' text-anchor='middle' "
                   f"fill='#6B6F75'>{v:.0f}</text>")
    for k in range(3):
        v = lo + (hi - lo) * k / 2
        out.append(f"<text x='{ml - 5}' y='{Y(v) + 3:.1f}' font-size='10' text-anchor='end' fill='#6B6F75'>{v:.2g}</text>")
    out.append(f"<text x='{(ml + width - mr) / 2:.0f}' y='{height - 4}' font-size='11' text-anchor='middle' "
               "fill='#6B6F75'>position (tokens read)</text>")
    cy = (mt + height - mb) / 2
    out.append(f"<text x='12' y='{cy:.0f}' font-size='11' text-anchor='middle' fill='#6B6F75' "
               f"transform='rotate(-90 12 {cy:.0f})'>loss (nats)</text>")
    out.append("</svg>")
    return "".join(out)


def _smooth(y: np.ndarray, k: int) -> np.ndarray:
    """A centred running mean over k positions (NaN-aware), so the picture shows the trend, not token noise."""
    if k <= 1:
        return y
    ok = np.isfinite(y)
    v = np.where(ok, y, 0.0)
    kern = np.ones(k)
    num = np.convolve(v, kern, mode="same")
    den = np.convolve(ok.astype(float), kern, mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / den, np.nan)


def profile_svg(d: dict, i: int, width: int = 330, height: int = 170) -> str:
    """One head's distance profile (mean weight per key, log scale) under each variant, the reference dashed."""
    ml, mr, mt, mb = 44, 8, 8, 30
    prof = d["profiles"][i]
    B = prof.shape[-1]
    vals = prof[np.isfinite(prof) & (prof > 0)]
    if not vals.size:
        return "<p class='st-none'>no profile measured</p>"
    lo, hi = math.log10(max(float(vals.min()), 1e-6)), math.log10(float(vals.max()))
    if hi - lo < 1e-6:
        lo -= 1
    X = lambda b: ml + (width - ml - mr) * b / max(B - 1, 1)  # noqa: E731
    Y = lambda v: mt + (height - mt - mb) * (1 - (math.log10(max(v, 1e-6)) - lo) / (hi - lo))  # noqa: E731
    out = [f"<svg class='st-profile' width='{width}' height='{height}' viewBox='0 0 {width} {height}' role='img' "
           f"aria-label='distance profile of {_esc(d['heads'][i]['key'])}'>",
           f"<rect x='{ml}' y='{mt}' width='{width - ml - mr}' height='{height - mt - mb}' fill='#FFFFFF' stroke='#DDD8CE'/>"]
    series = [("training length", REFERENCE, "4,3", prof[0])] + \
             [(v["name"], v["colour"], None, prof[1 + k]) for k, v in enumerate(d["variants"])]
    for name, colour, dash, y in series:
        pts = " ".join(f"{X(b):.1f},{Y(y[b]):.1f}" for b in range(B) if np.isfinite(y[b]) and y[b] > 0)
        extra = f" stroke-dasharray='{dash}'" if dash else ""
        out.append(f"<polyline points='{pts}' fill='none' stroke='{colour}' stroke-width='1.6'{extra}>"
                   f"<title>{_esc(name)}</title></polyline>")
    for b in range(0, B, max(1, B // 6)):
        out.append(f"<text x='{X(b):.1f}' y='{height - mb + 13}' font-size='9.5' text-anchor='middle' "
                   f"fill='#6B6F75'>{_esc(d['bucket_ticks'][b])}</text>")
    for v in (lo, hi):
        out.append(f"<text x='{ml - 4}' y='{Y(10 ** v) + 3:.1f}' font-size='9.5' text-anchor='end' "
                   f"fill='#6B6F75'>{10 ** v:.2g}</text>")
    out.append(f"<text x='{(ml + width - mr) / 2:.0f}' y='{height - 3}' font-size='10' text-anchor='middle' "
               "fill='#6B6F75'>distance (tokens, bucket start)</text>")
    out.append("</svg>")
    return "".join(out)


def _legend(d: dict) -> str:
    items = "".join(f"<span class='st-key'><i style='background:{v['colour']}'></i>{_esc(v['name'])}</span>"
                    for v in d["variants"])
    return f"<div class='st-legend'>{items}</div>"


def _anchor(key: str) -> str:
    return "st-" + "".join(ch if ch.isalnum() else "-" for ch in key)


def grid_html(d: dict, link: bool = True) -> str:
    """The heads × variants table: a cell is break (with the reasons as a tooltip) or keep."""
    head = "<tr><th>head</th><th>band</th><th>role at L</th><th>broken</th>" + "".join(
        f"<th><span class='st-swatch' style='background:{v['colour']}'></span>{_esc(v['name'])}</th>"
        for v in d["variants"]) + "</tr>"
    rows = []
    for h in d["heads"]:
        key = _esc(h["key"])
        name = f"<a href='#{_anchor(h['key'])}'>{key}</a>" if link else key
        cells = []
        for c in h["cells"]:
            tip = _esc("; ".join(c["reasons"]) if c["reasons"] else f"keeps its job (role {c['role']})")
            cls, word = ("st-break", "break") if c["broken"] else ("st-keep", "keep")
            cells.append(f"<td class='{cls}' title='{tip}'>{word}</td>")
        rows.append(f"<tr><td class='st-head'>{name}</td><td>{_esc(h['band'])}</td><td>{_esc(h['role'])}</td>"
                    f"<td class='st-n'>{h['n_broken']}</td>{''.join(cells)}</tr>")
    return f"<table class='st-grid'>{head}{''.join(rows)}</table>"


def head_html(d: dict, i: int) -> str:
    h = d["heads"][i]
    why = "".join(f"<li><b>{_esc(v['name'])}</b>: " + (_esc("; ".join(c["reasons"])) if c["broken"] else "keeps")
                  + "</li>" for v, c in zip(d["variants"], h["cells"]))
    return (f"<div class='st-card' id='{_anchor(h['key'])}'><h4>{_esc(h['key'])} <small>{_esc(h['role'])} at the "
            f"training length · band {_esc(h['band'])} · broken by {h['n_broken']}</small></h4>"
            f"{profile_svg(d, i)}<ul class='st-why'>{why}</ul></div>")


STYLE = (HERE / "stretch.css").read_text(encoding="utf-8")


def stretch_html(result, with_style: bool = True, max_cards: int = 32) -> str:
    """The board as static HTML (no script): loss curves, the grid (rows link to the heads' profiles), the profiles."""
    d = stretch_data(result)
    cards = "".join(head_html(d, i) for i in range(min(len(d["heads"]), max_cards)))
    more = (f"<p class='st-note'>{len(d['heads']) - max_cards} more heads in the JSON.</p>"
            if len(d["heads"]) > max_cards else "")
    style = f"<style>{STYLE}</style>" if with_style else ""
    return (f"{style}<div class='st-board'>"
            f"<div class='st-title'>per-position loss, every variant (lines and 90% bands as running means over "
            f"{max(1, len(d['position']) // 64)} positions)</div>{_legend(d)}{loss_svg(d)}"
            f"<div class='st-title'>heads × variants: break or keep past the training length (most often broken "
            f"first; click a head for its profiles)</div>{grid_html(d)}"
            f"<div class='st-title'>distance profiles: mean weight per key at each distance, past the training "
            f"length under each variant; dashed grey: the unscaled model inside it</div>"
            f"<div class='st-cards'>{cards}</div>{more}"
            f"<p class='st-caution'><b>Caution.</b> {_esc(d['caution'])}</p></div>")


# --------------------------------------------------------------------------------------------- the widget

class StretchBoard(StaticFallback, anywidget.AnyWidget):
    """Loss curves of every variant, the heads × variants break grid, and a clicked head's profiles.

    ``meta`` holds the names, colours, the training length, the heads (key, band, role, cells with reasons) and the
    bucket labels; ``loss_values`` the loss, lo, hi of every variant (float32, variant after variant);
    ``profile_values`` the profiles (heads × (1 + variants) × buckets, float32); ``selected`` the head shown."""

    _esm = (HERE / "stretch.js").read_text(encoding="utf-8")
    _css = STYLE

    meta = t.Dict().tag(sync=True)
    loss_values = t.Bytes(b"").tag(sync=True)
    profile_values = t.Bytes(b"").tag(sync=True)
    selected = t.Unicode("").tag(sync=True)
    caution = t.Unicode("").tag(sync=True)

    def __init__(self, result, **kwargs):
        super().__init__(**kwargs)
        self.result = result
        d = stretch_data(result)
        n = len(d["position"])
        blank = np.full(n, np.nan)
        loss = [np.asarray(v[k] if v[k] is not None else blank, float) for v in d["variants"] for k in ("loss", "lo", "hi")]
        with self.hold_sync():
            self.meta = {"names": d["names"], "colours": [v["colour"] for v in d["variants"]],
                         "training_length": d["training_length"], "to": d["to"], "n": n,
                         "first_position": float(d["position"][0]) if n else 1.0,
                         "heads": d["heads"], "bucket_labels": d["bucket_labels"], "bucket_ticks": d["bucket_ticks"],
                         "reference_colour": REFERENCE, "break_colour": BREAK, "keep_colour": KEEP}
            self.loss_values = np.concatenate(loss).astype("<f4").tobytes() if loss else b""
            self.profile_values = d["profiles"].astype("<f4").tobytes()
            self.selected = d["heads"][0]["key"] if d["heads"] else ""
            self.caution = d["caution"]

    def to_html(self) -> str:
        return stretch_html(self.result)


__all__ = ["StretchBoard", "stretch_data", "stretch_html", "loss_svg", "profile_svg", "grid_html"]
