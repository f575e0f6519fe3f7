"""Static HTML/SVG renderings of every view: no JavaScript, no network, every user string escaped.

They are what a saved, exported or previewed notebook shows without a kernel (the widgets' ``text/html``
fallback) and the building blocks of the standalone report (:mod:`attnpos.report`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..core.columns import PART_NAMES
from . import data as _data
from .common import (INK, UNKNOWN_COLOUR, colourise, part_colours, role_codes, role_colours, roles_now,
                      esc, esc_plain, finite, fmt, fmt_interval, ink_on, is_anchor_like, png_data_uri, ramp_colour,
                      role_palette, shift_how, tint)

STYLE = """
.apx{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1B1F24;background:#FBFAF7;
 font-size:13px;line-height:1.35;padding:10px 12px;border:1px solid #E3DED4;border-radius:6px;max-width:100%;
 box-sizing:border-box;overflow-x:auto}
.apx h3{font-size:14px;margin:0 0 6px;font-weight:650;letter-spacing:.01em}
.apx h4{font-size:12px;margin:10px 0 4px;font-weight:650;letter-spacing:.02em;color:#5A5F66}
.apx .apx-sub{color:#5A5F66;font-size:12px;margin:0 0 8px}
.apx .apx-legend{display:flex;flex-wrap:wrap;gap:4px 12px;margin:4px 0 8px;font-size:12px}
.apx .apx-legend span{display:inline-flex;align-items:center;gap:4px;white-space:nowrap}
.apx .apx-sw{display:inline-block;width:12px;height:12px;border-radius:2px;border:1px solid rgba(0,0,0,.25)}
.apx .apx-caution{margin-top:8px;padding:6px 9px;border-left:4px solid #B8613F;background:#F6EFE6;font-size:12px}
.apx table{border-collapse:collapse;font-size:12px}
.apx td,.apx th{padding:2px 8px 2px 0;text-align:left;vertical-align:top}
.apx th{color:#5A5F66;font-weight:600}
.apx .apx-num{font-variant-numeric:tabular-nums;text-align:right}
.apx .apx-cols{display:flex;flex-wrap:wrap;gap:14px;align-items:flex-start}
.apx .apx-tok{font-family:ui-monospace,SFMono-Regular,Menlo,Consolas,monospace;background:#EFEBE3;padding:0 3px;
 border-radius:3px;white-space:pre}
.apx .apx-stale{color:#8A5A00;font-weight:600}
.apx .apx-status{display:inline-block;padding:0 6px;border-radius:8px;border:1px solid #B9B2A6;font-size:11px}
.apx .apx-none{color:#77706A;font-style:italic}
.apx img.apx-map{image-rendering:pixelated;border:1px solid #CFC8BC}
.apx svg text{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif}
"""


def widget_script(*names: str) -> str:
    """The widgets' ES modules as one classic script, for a page that runs them itself (the standalone report)."""
    from ._base import script
    return script(*names)


def widget_css(name: str) -> str:
    """A widget's CSS (with the shared rules), for a page that shows its markup outside a notebook."""
    from ._base import css
    return css(name)


def style_tag() -> str:
    return f"<style>{STYLE}</style>"


def caution_html(text: str) -> str:
    return f'<div class="apx-caution"><b>Caution.</b> {esc_plain(text)}</div>'


def legend_html(counts: dict | None = None, layout: dict | None = None) -> str:
    """The role legend, writing each role with the same word its cells write (``layout["label"]``: the short word
    in roomy cells, the code in small ones), then the role's name."""
    parts = []
    lay = layout or {"label": "code"}
    for p in role_palette()[1:]:
        r = p["role"]
        c = "" if counts is None else f" ({counts.get(r, 0)})"
        parts.append(f'<span data-role="{esc_plain(r)}"><i class="apx-sw" style="background:{p["fill"]};border-color:{p["colour"]}"></i>'
                     f'<b>{esc(_data.cell_label(p, lay))}</b> = {r}{c}</span>')
    return f'<div class="apx-legend">{"".join(parts)}</div>'


def _tooltip(data: dict, i: int) -> str:
    """Plain-text hover of one atlas cell (escaped by the caller)."""
    f = dict(zip(data["fields"], data["numbers"][i].tolist()))
    role = roles_now()[data["roles"][i] - 1] if data["roles"][i] else "—"
    lines = [f"{data['keys'][i]} {role}"]
    if data["tags"][i]:
        lines.append(f"tags: {data['tags'][i]}")
    if data["evidence"][i]:
        lines.append(f"evidence: {data['evidence'][i]}")
    lines.append(f"shares {'/'.join(p[0] for p in PART_NAMES)}: " + " / ".join(fmt(f.get(f'share_{p}')) for p in PART_NAMES))
    lines.append(f"slope {fmt(f['slope'], 3)} {fmt_interval(f['slope_lo'], f['slope_hi'], 3)}".rstrip())
    lines.append(f"mass prev {fmt(f['mass_previous'])} · next {fmt(f['mass_next'])} · first {fmt(f['mass_first'])}"
                 f" · self {fmt(f['mass_self'])}")
    lines.append(f"entropy ratio {fmt(f['entropy_ratio'])} · induction {fmt(f['induction'])}")
    lines.append(f"shift: {data['verdicts'][i] or '—'} (change {fmt(f['shift_change'], 3)})")
    return "\n".join(lines)


def _faded(data: dict, i: int) -> bool:
    fields = list(data.get("fields") or [])
    if "faded" not in fields:
        return False
    return float(np.asarray(data["numbers"])[i, fields.index("faded")]) == 1.0


def head_anchor(key: str) -> str:
    """The fragment id of a head in the report (``L3.H2`` → ``head-L3-H2``)."""
    return "head-" + key.replace(":", "-").replace(".", "-")


def atlas_svg(data: dict, marks: dict | None = None, selected: str | None = None,
              link_cards: set | None = None, link_all: bool = False) -> str:
    """The atlas as SVG. ``link_cards``: heads whose cell links to their static card (``#card-…``);
    ``link_all``: every cell links to the head's own anchor (``#head-…``: the report draws that head's card)."""
    marks = marks or {}
    lay = data["layout"]
    cw, ch, gap, left, top = lay["cw"], lay["ch"], lay["gap"], lay["left"], lay["top"]
    rows, n_cols = data["rows"], data["n_cols"]
    W = left + n_cols * (cw + gap) + 4
    H = top + len(rows) * (ch + gap) + 4
    pal = role_palette()
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" class="apx-atlas" width="{W}" height="{H}" '
           f'viewBox="0 0 {W} {H}" role="img" aria-label="atlas of {len(data["keys"])} heads">']
    fs = 11 if lay["label"] == "short" else 9.5
    out.append("<style>.apx-cell text{font-size:%spx;font-weight:600}" % fs + "".join(
        f".apx-r{k}>rect{{fill:{q['fill']};stroke:{q['colour']};stroke-width:1}}.apx-r{k}>.apx-strip{{fill:{q['colour']};"
        f"stroke:none}}.apx-r{k}>text{{fill:{q['ink']}}}" for k, q in enumerate(pal)) + "</style>")
    step = 1 if n_cols <= 16 else 4
    for c in range(0, n_cols, step):
        x = left + c * (cw + gap) + cw / 2
        out.append(f'<text x="{x:.1f}" y="{top - 6}" font-size="10" text-anchor="middle" fill="#5A5F66">H{c}</text>')
    for r, row in enumerate(rows):
        y = top + r * (ch + gap) + ch / 2 + 4
        lm = marks.get(row["key"])
        mark = " ◆" if lm else ""
        title = f'<title>{esc_plain(row["key"])}: {lm["n"]} finding(s)</title>' if lm else ""
        out.append(f'<text x="{left - 6}" y="{y:.1f}" font-size="11" text-anchor="end" fill="{INK}">'
                   f'{title}{esc_plain(row["label"])}{mark}</text>')
    sp = data["spark"]
    n_sp = sp.shape[1] if sp.ndim == 2 else 0
    for i, key in enumerate(data["keys"]):
        cell = int(data["cells"][i])
        r, c = divmod(cell, n_cols)
        x, y = left + c * (cw + gap), top + r * (ch + gap)
        p = pal[int(data["roles"][i])]
        label = p["short"] if lay["label"] == "short" else p["code"]
        sel = key == selected
        faded = ' opacity="0.45"' if _faded(data, i) else ""          # role not sure across resamples
        # a big model's report stays small: one line of hover text per head (its card has the rest)
        tip = _tooltip(data, i) if len(data["keys"]) <= 256 else _tooltip(data, i).split("\n")[0]
        # colours come from the role's class (one <style> rule per role above), so a big atlas stays small
        rid = int(data["roles"][i])
        box = (f'<rect width="{cw}" height="{ch}" rx="3" style="stroke:{INK};stroke-width:2.5"/>' if sel
               else f'<rect width="{cw}" height="{ch}" rx="3"/>')
        # linked cells (the report) carry their key once, on the link (a 32 × 32 report stays under 1 MB)
        key_attr = "" if link_all else f' data-key="{esc_plain(key)}"'
        parts = [f'<g class="apx-cell apx-r{rid}"{key_attr} transform="translate({x},{y})"{faded}>',
                 f'<title>{esc_plain(tip)}</title>', box, f'<rect class="apx-strip" width="{cw}" height="3"/>']
        fs = 11 if lay["label"] == "short" else 9.5
        ty = 3 + fs if lay.get("spark", True) else (ch + 3) / 2 + fs * 0.36     # centred in a small mark
        parts.append(f'<text x="3" y="{ty:.1f}">{esc_plain(label)}</text>')
        if n_sp and lay.get("spark", True):
            y0, y1 = 5 + fs + 2, ch - 3
            d, pen, last = [], False, (0.0, 0.0)
            for k in range(n_sp):
                v = int(sp[i, k])
                if v == 255:
                    pen = False
                    continue
                px = round(3 + (cw - 6) * (k / max(1, n_sp - 1)), 1)
                py = round(y1 - (y1 - y0) * v / 254, 1)
                if pen:
                    d.append(f"l{px - last[0]:.1f} {py - last[1]:.1f}".replace(".0 ", " ").replace(" -0.0", " 0"))
                else:
                    d.append(f"M{px:.1f} {py:.1f}")
                last, pen = (px, py), True
            if d:
                parts.append(f'<path d="{"".join(d)}" fill="none" stroke="{p["ink"]}" stroke-width="1.1" '
                             f'stroke-opacity=".8"/>')
        m = marks.get(key)
        if m:
            tx = cw - 1
            if m.get("fresh"):
                parts.append(f'<path class="apx-mark" d="M{tx - 11},1 L{tx},1 L{tx},12 Z" fill="{INK}"/>')
            else:
                parts.append(f'<path class="apx-mark apx-mark-stale" d="M{tx - 11},1.5 L{tx - 0.5},1.5 L{tx - 0.5},12 Z" '
                             f'fill="#FBFAF7" stroke="{INK}" stroke-dasharray="2,1.5"/>')
        parts.append("</g>")
        g = "".join(parts)
        if link_all:
            g = f'<a href="#{esc_plain(head_anchor(key))}" data-head="{esc_plain(key)}">{g}</a>'
        elif link_cards and key in link_cards:
            g = f'<a href="#card-{esc_plain(key.replace(":", "-").replace(".", "-"))}">{g}</a>'
        out.append(g)
    out.append("</svg>")
    return "".join(out)


def atlas_html(scan, marks: dict | None = None, selected: str | None = None, link_cards: set | None = None,
               with_style: bool = True, caution: bool = True, heading: bool = True, link_all: bool = False) -> str:
    data = _data.atlas_data(scan)
    m = scan.model or {}
    counts = scan.heads["role"].value_counts().to_dict() if len(scan.heads) else {}
    n_marked = sum(1 for k in (marks or {}) if k in set(data["keys"]))
    sub = (f'{esc_plain(m.get("name") or m.get("path") or "model")} · scheme {esc_plain(m.get("scheme"))} · '
           f'{len(data["rows"])} layer rows × {data["n_cols"]} heads · {len(data["keys"])} heads'
           + (f" · {n_marked} with findings (▲; dashed = stale)" if n_marked else ""))
    how = ("Each cell: role colour, written role, distance profile sparkline (δ from small to large)"
           if data["layout"]["spark"] else "Each mark: one head, role colour and written role code; rows are layers")
    body = (f'<div class="apx apx-atlas-view">{"<h3>Atlas — role of every head</h3>" if heading else ""}'
            f'<p class="apx-sub">{sub}. {how}; hover for its evidence'
            f'{", click for its card" if link_cards or link_all else ""}.</p>'
            f'{legend_html(counts, data["layout"])}{atlas_svg(data, marks, selected, link_cards, link_all)}'
            f'{caution_html(scan.caution) if caution else ""}</div>')
    return (style_tag() if with_style else "") + body


# ------------------------------------------------------------------ plots
def _plot_frame(width: int, height: int, margins: tuple, xr: tuple, yr: tuple, attrs: str):
    """Data → pixel maps for a plot area inside ``margins`` (left, right, top, bottom), and the opening of its
    SVG (root element with ``attrs``, plot-area background) as a list to append to."""
    ml, mr, mt, mb = margins
    (x_lo, x_hi), (y_lo, y_hi) = xr, yr

    def X(x):
        return ml + (width - ml - mr) * (x - x_lo) / (x_hi - x_lo)

    def Y(y):
        return mt + (height - mt - mb) * (1 - (y - y_lo) / (y_hi - y_lo))

    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" {attrs}>',
           f'<rect x="{ml}" y="{mt}" width="{width - ml - mr}" height="{height - mt - mb}" fill="#FFFFFF" '
           'stroke="#E3DED4"/>']
    return X, Y, out


# ------------------------------------------------------------------ card pieces
def _symlog(d: float) -> float:
    return math.copysign(math.log2(1 + abs(d)), d)


def profile_svg(h: dict, width: int = 340, height: int = 170) -> str:
    d, v, lo, hi = h["distance"], h["value"], h["low"], h["high"]
    info = h["info"]
    if len(d) == 0 or not np.isfinite(v).any():
        return '<p class="apx-none">No distance profile was measured for this head.</p>'
    ml, mr, mt, mb = 52, 8, 10, 28
    xs = np.array([_symlog(x) for x in d])
    allv = np.concatenate([v[np.isfinite(v)], lo[np.isfinite(lo)], hi[np.isfinite(hi)]])
    y_lo, y_hi = float(allv.min()), float(allv.max())
    if y_hi - y_lo < 1e-9:
        y_lo, y_hi = y_lo - 1, y_hi + 1
    x_lo, x_hi = float(xs.min()), float(xs.max())
    if x_hi - x_lo < 1e-9:
        x_lo, x_hi = x_lo - 1, x_hi + 1

    X, Y, out = _plot_frame(width, height, (ml, mr, mt, mb), (x_lo, x_hi), (y_lo, y_hi),
                            'class="apx-profile" role="img" aria-label="distance profile"')
    band = [(X(x), Y(a), Y(b)) for x, a, b in zip(xs, lo, hi) if np.isfinite(a) and np.isfinite(b)]
    if len(band) > 1:
        pts = " ".join(f"{x:.1f},{a:.1f}" for x, a, _ in band) + " " + \
              " ".join(f"{x:.1f},{b:.1f}" for x, _, b in reversed(band))
        out.append(f'<polygon class="apx-band" points="{pts}" fill="#3F6E9A" fill-opacity=".32" stroke="#3F6E9A" '
                   f'stroke-opacity=".5" stroke-width=".6"/>')
    seg = []
    for x, y in zip(xs, v):
        if np.isfinite(y):
            seg.append(f"{X(x):.1f},{Y(y):.1f}")
        elif seg:
            out.append(f'<polyline points="{" ".join(seg)}" fill="none" stroke="#3F6E9A" stroke-width="1.6"/>')
            seg = []
    if seg:
        out.append(f'<polyline points="{" ".join(seg)}" fill="none" stroke="#3F6E9A" stroke-width="1.6"/>')
    # the slope line: y = b − slope·δ over δ ≥ 0 (data.slope_line), the points the widget and the picture draw
    seg = []
    line_d, line_y = h.get("slope_line", (np.zeros(0), np.zeros(0)))
    for g, yv in list(zip(line_d, line_y)) + [(None, None)]:
        y = Y(yv) if g is not None else None
        if y is not None and mt - 0.5 <= y <= height - mb + 0.5:
            seg.append(f"{X(_symlog(g)):.1f},{y:.1f}")
            continue
        if len(seg) > 1:
            out.append(f'<polyline class="apx-slope" points="{" ".join(seg)}" fill="none" stroke="#B8613F" '
                       f'stroke-width="1.4" stroke-dasharray="4,3"/>')
        seg = []
    for t in [-256, -64, -16, -4, -1, 0, 1, 4, 16, 64, 256, 1024]:
        if d.min() <= t <= d.max():
            x = X(_symlog(t))
            out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{height - mb}" y2="{height - mb + 3}" stroke="#5A5F66"/>'
                       f'<text x="{x:.1f}" y="{height - mb + 13}" font-size="9" text-anchor="middle" fill="#5A5F66">{t}</text>')
    for yv in (y_lo, (y_lo + y_hi) / 2, y_hi):
        out.append(f'<text x="{ml - 4}" y="{Y(yv) + 3:.1f}" font-size="9" text-anchor="end" fill="#5A5F66">{fmt(yv, 1)}</text>')
    out.append(f'<text x="{(ml + width - mr) / 2:.0f}" y="{height - 3}" font-size="10" text-anchor="middle" '
               f'fill="#5A5F66">distance δ (log scale) · band: 90% interval · dashed: slope</text>')
    cy = (mt + height - mb) / 2
    out.append(f'<text x="10" y="{cy:.0f}" font-size="9.5" text-anchor="middle" fill="#5A5F66" '
               f'transform="rotate(-90 10 {cy:.0f})">score (logit), 0 at δ = 0</text>')
    out.append("</svg>")
    return "".join(out)


def _share(x) -> str:
    """A share in [0, 1] with three decimals and never in scientific notation (it must fit beside its bar)."""
    return f"{float(x):.3f}" if finite(x) else "—"


def share_text(v, lo, hi) -> str:
    return _share(v) + (f" [{_share(lo)}, {_share(hi)}]" if finite(lo) and finite(hi) else "")


def shares_svg(info: dict, width: int = 360) -> str:
    parts = PART_NAMES
    rowh, ml, mr = 20, 64, 132
    height = rowh * len(parts) + 16
    bw = width - ml - mr
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" class="apx-shares" '
           f'role="img" aria-label="shares of the score split">']
    for k, p in enumerate(parts):
        y = 4 + k * rowh
        v, lo, hi = info.get(f"share_{p}"), info.get(f"share_{p}_lo"), info.get(f"share_{p}_hi")
        out.append(f'<text x="{ml - 6}" y="{y + 12}" font-size="11" text-anchor="end" fill="{INK}">{p}</text>'
                   f'<rect x="{ml}" y="{y + 2}" width="{bw}" height="12" fill="#EFEBE3"/>')
        if finite(v):
            out.append(f'<rect x="{ml}" y="{y + 2}" width="{bw * min(max(v, 0), 1):.1f}" height="12" fill="{part_colours()[p]}"/>')
        if finite(lo) and finite(hi):
            a, b = ml + bw * min(max(lo, 0), 1), ml + bw * min(max(hi, 0), 1)
            out.append(f'<line x1="{a:.1f}" x2="{b:.1f}" y1="{y + 8}" y2="{y + 8}" stroke="{INK}" stroke-width="1.2"/>'
                       f'<line x1="{a:.1f}" x2="{a:.1f}" y1="{y + 4}" y2="{y + 12}" stroke="{INK}"/>'
                       f'<line x1="{b:.1f}" x2="{b:.1f}" y1="{y + 4}" y2="{y + 12}" stroke="{INK}"/>')
        iv = f" [{_share(lo)}, {_share(hi)}]" if finite(lo) and finite(hi) else ""
        out.append(f'<text x="{ml + bw + 5}" y="{y + 12}" font-size="10.5" fill="{INK}">{_share(v)}'
                   f'<tspan fill="#5A5F66">{iv}</tspan></text>')
    out.append(f'<text x="2" y="{height - 1}" font-size="9.5" fill="#5A5F66">share of within-row score variance; '
               f'whiskers: 90% bootstrap interval</text></svg>')
    return "".join(out)


def facts_table(info: dict) -> str:
    rows = [
        ("slope", f"{fmt(info.get('slope'), 3)} {fmt_interval(info.get('slope_lo'), info.get('slope_hi'), 3)}"
                  " score/token (positive: falls with distance)"),
        ("shift test", f"{info.get('shift_verdict') or '—'} · change {fmt(info.get('shift_change'), 3)} · "
                       f"{shift_how(info.get('shift_kind'), info.get('shift_offset'))}"),
        ("role support", fmt(info.get("role_support")) + (f" · between {info['role_between']}"
                                                           if info.get("role_between") else "")),
        ("induction score", fmt(info.get("induction"))),
    ]
    if is_anchor_like(info.get("role"), info.get("tags")):
        rows.append(("anchor", f"slot {fmt(info.get('anchor_slot'), 0)} · weight {fmt(info.get('anchor_weight'))}"))
    rows += [
        ("entropy ratio", fmt(info.get("entropy_ratio"))),
        ("mass", f"prev {fmt(info.get('mass_previous'))} · next {fmt(info.get('mass_next'))} · "
                 f"first {fmt(info.get('mass_first'))} · self {fmt(info.get('mass_self'))}"),
    ]
    if info.get("evidence"):
        rows.append(("evidence", info["evidence"]))
    return "<table>" + "".join(f"<tr><th>{esc_plain(k)}</th><td>{esc_plain(v)}</td></tr>" for k, v in rows) + "</table>"


def map_img(mp: dict | None, scale_to: int = 256) -> str:
    if mp is None:
        return '<p class="apx-none">No weight map was kept for this head (the scan keeps maps for some heads only).</p>'
    rgb = colourise(mp["q"])
    px = max(1, scale_to // max(mp["rows"], mp["cols"]))
    w, h = mp["cols"] * px, mp["rows"] * px
    note = (f"queries {mp['q0']}–{mp['q1'] - 1} ↓ × keys {mp['k0']}–{mp['k1'] - 1} →; colour 0 … {fmt(mp['vmax'], 3)}"
            + (f" (brightest = 99th percentile; max {fmt(mp['max'], 3)})" if mp.get("clipped") else "")
            + (f"; each pixel averages {mp['step_q']}×{mp['step_k']} pairs" if mp["step_q"] > 1 or mp["step_k"] > 1 else ""))
    return (f'<figure style="margin:0;max-width:{max(w, 260)}px"><img class="apx-map" alt="weight map" width="{w}" height="{h}" '
            f'src="{png_data_uri(rgb)}"/>{colour_bar_html(mp)}<figcaption class="apx-sub">{esc_plain(note)}</figcaption>'
            '</figure>')


def colour_bar_html(mp: dict, width: int = 160) -> str:
    """The map's colour scale: the ramp from weight 0 to the map's top value, labelled at both ends."""
    ramp = np.repeat(colourise(np.arange(255, dtype=np.uint8)[None, :]), 8, axis=0)     # codes 0..254, 255 = missing
    top = ("≥ " if mp.get("clipped") else "") + fmt(mp["vmax"], 3)
    return (f'<div class="apx-cbar" style="display:flex;align-items:center;gap:4px;font-size:10.5px;color:#5A5F66;'
            f'margin:3px 0">weight 0<img alt="colour scale" width="{width}" height="8" '
            f'style="border:1px solid #CFC8BC;image-rendering:auto" src="{png_data_uri(ramp)}"/>{esc_plain(top)}</div>')


def top_keys_table(tk: list[dict]) -> str:
    if not tk:
        return '<p class="apx-none">—</p>'
    rows = "".join(f'<tr><td class="apx-num">{k["slot"]}</td><td><span class="apx-tok">{esc(k["token"])}</span></td>'
                   f'<td class="apx-num">{fmt(k["weight"], 3)}</td></tr>' for k in tk)
    return f"<table><tr><th>slot</th><th>token</th><th>mean weight</th></tr>{rows}</table>"


def findings_list(rows: list[dict]) -> str:
    if not rows:
        return '<p class="apx-none">No findings on this head yet.</p>'
    return "<ul>" + "".join(
        f'<li><span class="apx-status">{esc_plain(r["status"])}</span> '
        f'{"<span class=apx-stale>stale</span> " if r["stale"] else ""}{esc_plain(r["body"])}</li>' for r in rows) + "</ul>"


def role_badge(role: Any) -> str:
    col = role_colours().get(str(role), UNKNOWN_COLOUR)
    fill = tint(col, 0.35) if str(role) in role_colours() else UNKNOWN_COLOUR
    return (f'<span style="display:inline-block;padding:1px 7px;border-radius:3px;background:{fill};'
            f'border:1px solid {col};color:{ink_on(fill)};font-weight:600">{esc_plain(role or "no role")}</span>')


def card_html(scan, key: str, text: int | None = None, findings: list[dict] | None = None,
              with_style: bool = True, anchor: bool = False, caution: bool = True, map_side: int = 256) -> str:
    h = _data.head_info(scan, key)
    info = h["info"]
    avail = _data.texts_with_map(scan, key)
    if text is None or text not in avail:
        text = avail[0] if avail else None
    mp = _data.map_payload(scan, key, text, max_side=map_side) if text is not None else None
    tname = scan.texts[text].get("name", f"text {text}") if text is not None else ""
    tags = ", ".join(info["tags"])
    aid = f' id="card-{esc_plain(key.replace(":", "-").replace(".", "-"))}"' if anchor else ""
    mine = [r for r in (findings or []) if r["target"] == key]
    body = (f'<div class="apx apx-card"{aid}><h3>Head {esc_plain(key)} · {role_badge(info["role"])}'
            f'{(" <span class=apx-sub>tags: " + esc_plain(tags) + "</span>") if tags else ""}</h3>'
            f'<div class="apx-cols"><div><h4>Weight map{(" · " + esc(tname)) if tname else ""}</h4>{map_img(mp)}</div>'
            f'<div><h4>Distance profile</h4>{profile_svg(h)}<h4>Score split</h4>{shares_svg(info)}</div>'
            f'<div><h4>Evidence</h4>{facts_table(info)}<h4>Top keys</h4>'
            f'{top_keys_table(mp["top_keys"] if mp else [])}</div></div>'
            f'<h4>Findings</h4>{findings_list(mine)}{caution_html(scan.caution) if caution else ""}</div>')
    return (style_tag() if with_style else "") + body


# ------------------------------------------------------------------ curves
def _line_chart(series: list[dict], x: np.ndarray, width: int, height: int, xlabel: str, ylabel: str,
                vline: float | None = None, vlabel: str = "", ylim: tuple | None = None) -> str:
    ml, mr, mt, mb = 44, 10, 10, 32
    ys = [s["y"] for s in series] + [s[k] for s in series for k in ("lo", "hi") if s.get(k) is not None]
    allv = np.concatenate([np.asarray(y)[np.isfinite(y)] for y in ys]) if ys else np.zeros(0)
    if ylim is None:
        ylim = (float(allv.min()), float(allv.max())) if len(allv) else (0.0, 1.0)
    y_lo, y_hi = ylim
    if y_hi - y_lo < 1e-9:
        y_lo, y_hi = y_lo - 1, y_hi + 1
    xf = x[np.isfinite(x)]
    x_lo, x_hi = (float(xf.min()), float(xf.max())) if len(xf) else (0.0, 1.0)
    if vline is not None and finite(vline):
        x_hi = max(x_hi, float(vline))
    if x_hi - x_lo < 1e-9:
        x_lo, x_hi = x_lo - 0.5, x_hi + 0.5

    X, Y, out = _plot_frame(width, height, (ml, mr, mt, mb), (x_lo, x_hi), (y_lo, y_hi),
                            f'role="img" aria-label="{esc_plain(ylabel)} by {esc_plain(xlabel)}"')
    for s in series:
        lo, hi = s.get("lo"), s.get("hi")
        if lo is not None and hi is not None:
            ok = np.isfinite(lo) & np.isfinite(hi) & np.isfinite(x)
            if ok.sum() > 1:
                pts = [f"{X(a):.1f},{Y(b):.1f}" for a, b in zip(x[ok], lo[ok])] + \
                      [f"{X(a):.1f},{Y(b):.1f}" for a, b in zip(x[ok][::-1], hi[ok][::-1])]
                out.append(f'<polygon points="{" ".join(pts)}" fill="{s["colour"]}" fill-opacity=".18"/>')
        ok = np.isfinite(s["y"]) & np.isfinite(x)
        pts = " ".join(f"{X(a):.1f},{Y(b):.1f}" for a, b in zip(x[ok], s["y"][ok]))
        dash = f' stroke-dasharray="{s["dash"]}"' if s.get("dash") else ""
        out.append(f'<polyline points="{pts}" fill="none" stroke="{s["colour"]}" stroke-width="1.6"{dash}/>')
        if s.get("dots"):
            out.extend(f'<circle cx="{X(a):.1f}" cy="{Y(b):.1f}" r="2.4" fill="{s["colour"]}"/>'
                       for a, b in zip(x[ok], s["y"][ok]))
    if vline is not None and finite(vline):
        vx = X(float(vline))
        out.append(f'<line x1="{vx:.1f}" x2="{vx:.1f}" y1="{mt}" y2="{height - mb}" stroke="{INK}" stroke-dasharray="3,3"/>'
                   f'<text x="{vx + 3:.1f}" y="{mt + 10}" font-size="10" fill="{INK}">{esc_plain(vlabel)}</text>')
    integer_x = len(xf) > 0 and np.all(xf == np.round(xf)) and (x_hi - x_lo) <= 40
    xticks = np.arange(math.ceil(x_lo), math.floor(x_hi) + 1, max(1, int(math.ceil((x_hi - x_lo) / 8)))) \
        if integer_x else np.linspace(x_lo, x_hi, 5)
    for t in xticks:
        out.append(f'<text x="{X(t):.1f}" y="{height - mb + 13}" font-size="9.5" text-anchor="middle" fill="#5A5F66">{t:.0f}</text>')
    for t in np.linspace(y_lo, y_hi, 3):
        out.append(f'<text x="{ml - 4}" y="{Y(t) + 3:.1f}" font-size="9.5" text-anchor="end" fill="#5A5F66">{fmt(t, 2)}</text>')
    out.append(f'<text x="{(ml + width - mr) / 2:.0f}" y="{height - 4}" font-size="10.5" text-anchor="middle" '
               f'fill="#5A5F66">{esc_plain(xlabel)}</text>'
               f'<text x="10" y="{(mt + height - mb) / 2:.0f}" font-size="10.5" text-anchor="middle" fill="#5A5F66" '
               f'transform="rotate(-90 10 {(mt + height - mb) / 2:.0f})">{esc_plain(ylabel)}</text></svg>')
    return "".join(out)


def _key_html(items: list[tuple[str, str, str]]) -> str:
    return '<div class="apx-legend">' + "".join(
        f'<span><svg width="22" height="8"><line x1="0" x2="22" y1="4" y2="4" stroke="{c}" stroke-width="2" '
        f'{("stroke-dasharray=" + chr(34) + d + chr(34)) if d else ""}/></svg>{esc_plain(n)}</span>'
        for n, c, d in items) + "</div>"


PROBE_SERIES = [("r2", "probe R²", "#3F6E9A", ""), ("control_r2", "control (shuffled labels)", "#B8613F", "5,3"),
                ("untrained_r2", "untrained copy", "#6C8C4F", "2,3")]


def curves_html(scan, with_style: bool = True, caution: bool = True, heading: bool = True) -> str:
    c = _data.curves_data(scan)
    parts = ['<div class="apx apx-curves">'
             + ("<h3>Curves — position probes and behaviour past the training length</h3>" if heading else ""),
             '<div class="apx-cols">']
    pr = c["probe"]
    parts.append("<div><h4>Probe for absolute position, per layer</h4>")
    if pr is not None and np.isfinite(pr["r2"]).any():
        series = [{"y": pr[k], "colour": col, "dash": dash, "dots": True} for k, _, col, dash in PROBE_SERIES
                  if np.isfinite(pr[k]).any()]
        lo = min(0.0, float(np.nanmin(np.concatenate([s["y"] for s in series]))))
        parts.append(_line_chart(series, pr["layer"], 340, 190, "layer", "R²", ylim=(lo, 1.0)))
        parts.append(_key_html([(n, col, dash) for k, n, col, dash in PROBE_SERIES if np.isfinite(pr[k]).any()]))
    else:
        parts.append('<p class="apx-none">Probe: not measured in this scan.</p>')
    parts.append("</div><div><h4>Loss per position</h4>")
    ln = c["length"]
    if ln is not None and "loss" in ln and np.isfinite(ln["loss"]).any():
        tl = ln.get("training_length")
        parts.append(_line_chart([{"y": ln["loss"], "lo": ln.get("loss_lo"), "hi": ln.get("loss_hi"),
                                   "colour": "#3F6E9A"}], ln["position"], 380, 190, "position", "loss",
                                 vline=tl, vlabel=f"training length {tl}" if tl is not None else ""))
    else:
        parts.append('<p class="apx-none">Length: not measured in this scan.</p>')
    en = c["entropy"]
    if en is not None and np.isfinite(en["entropy"]).any():
        parts.append("<h4>Attention entropy by query position (mean over heads; 1 = uniform)</h4>")
        parts.append(_line_chart([{"y": en["entropy"], "colour": "#6C8C4F", "dots": True}], en["position"], 380, 160,
                                 "query position", "entropy ratio", vline=en.get("training_length"),
                                 vlabel="training length"))
    parts.append("</div></div>" + (caution_html(scan.caution) if caution else "") + "</div>")
    return (style_tag() if with_style else "") + "".join(parts)


# ------------------------------------------------------------------ findings
def findings_table_html(rows: list[dict], path: str | None = None, with_style: bool = True,
                        caution: str | None = None, heading: bool = True) -> str:
    head = '<div class="apx apx-findings">' + ("<h3>Findings</h3>" if heading else "")
    if path:
        head += f'<p class="apx-sub">store: {esc_plain(path)}</p>'
    if not rows:
        table = '<p class="apx-none">No findings recorded.</p>'
    else:
        trs = "".join(
            f'<tr><td>{esc_plain(r["target"])}</td><td><span class="apx-status">{esc_plain(r["status"])}</span></td>'
            f'<td>{"<span class=apx-stale>stale</span>" if r["stale"] else "current"}</td>'
            f'<td style="white-space:pre-wrap">{esc_plain(r["body"])}</td><td>{esc_plain(r["updated"] or r["created"])}</td>'
            f'<td>{esc_plain(r.get("author") or "")}</td></tr>' for r in rows)
        table = (f"<table><tr><th>target</th><th>status</th><th>against this scan</th><th>note</th><th>updated</th>"
                 f"<th>author</th></tr>{trs}</table><p class='apx-sub'>stale = made on another checkpoint "
                 f"(fingerprint) or other texts; shown, not applied.</p>")
    tail = caution_html(caution) if caution else ""
    return (style_tag() if with_style else "") + head + table + tail + "</div>"
