"""Pictures of the views, drawn with matplotlib (the Agg canvas; pyplot and the notebook's backend are never
touched): the atlas, a head card, the curves — for the display bundle of every view (``image/png``,
``image/svg+xml``, so a saved, untrusted or exported notebook still shows them), for ``view.save("atlas.pdf")``
and for ``attnpos scan … --figures DIR``.

One source of truth: every picture is drawn from what :mod:`attnpos.views.data` hands the widgets (the same cells,
roles, codes, profile, slope line, map codes and colour ramp), never from the scan directly. Roles are written as
their code (or short word) in every mark, beside the colour, so a picture survives greyscale printing; the role
colours are the colour-blind-safe set of :mod:`attnpos.core.roles`.

Example::

    >>> from attnpos.views.synthetic import synthetic_scan
    >>> from attnpos.views import figures
    >>> fig = figures.atlas_figure(synthetic_scan(2, 3, seed=1))
    >>> figures.png_bytes(fig)[:4]
    b'\\x89PNG'
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np

from ..core.columns import PART_NAMES
from . import data as _data
from .common import INK, PAPER, RAMP, colourise, fmt, part_colours, role_palette

MUTED = "#5A5F66"
BLUE = "#3F6E9A"
RUST = "#B8613F"
DPI = 100
FORMATS = ("png", "svg", "pdf")


def _figure(width_px: float, height_px: float):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_px / DPI, height_px / DPI), dpi=DPI, facecolor=PAPER)
    return fig


def _pt(px: float) -> float:
    """Pixels (at the figure's DPI) to points, for font sizes given in screen pixels."""
    return px * 72 / DPI


# ------------------------------------------------------------------ output
def _rc():
    import matplotlib

    # text stays text in SVG (small files, searchable); PDF fonts embedded as TrueType (editable in papers)
    return matplotlib.rc_context({"svg.fonttype": "none", "pdf.fonttype": 42, "font.family": "DejaVu Sans",
                                  "svg.hashsalt": "attnpos"})


def render(fig, fmt_: str) -> bytes:
    """The figure as PNG, SVG or PDF bytes (the Agg canvas for PNG; matplotlib's own SVG and PDF writers)."""
    if fmt_ not in FORMATS:
        raise ValueError(f"a figure is written as {', '.join(FORMATS)}, not {fmt_!r}")
    buf = io.BytesIO()
    with _rc():
        fig.savefig(buf, format=fmt_, dpi=DPI, facecolor=fig.get_facecolor(),
                    metadata={"Creator": "attnpos"} if fmt_ in ("pdf", "svg") else None)
    return buf.getvalue()


def png_bytes(fig) -> bytes:
    return render(fig, "png")


def svg_text(fig) -> str:
    return render(fig, "svg").decode("utf-8")


def save(fig, path) -> Path:
    """Write ``fig`` to ``path``; the suffix (``.png``, ``.svg``, ``.pdf``) chooses the format. Atomic."""
    from ..errors import AttnposError
    from ..files import write_atomic

    path = Path(path)
    kind = path.suffix.lower().lstrip(".")
    if kind not in FORMATS:
        raise AttnposError(f"Cannot tell the picture format of {path.name!r}: end the file name in .png, .svg or "
                           ".pdf.")
    return write_atomic(path, render(fig, kind))


# ------------------------------------------------------------------ atlas
def atlas_figure(scan, marks: dict | None = None, selected: str | None = None, keep=None, title: str | None = None):
    """The atlas of ``scan`` as a figure: layers as rows, heads as columns, each head a mark in its role's colour
    with the role's code (or short word) written in it — the same cells, words and legend as the widget.

    ``keep`` (a boolean array over the heads of :func:`attnpos.views.data.atlas_data`) fades the heads a filter
    leaves out. Sized to fit one 1400 × 900 screen up to about 40 × 40 heads."""
    data = _data.atlas_data(scan)
    return atlas_figure_from(data, scan.model or {}, marks=marks, selected=selected, keep=keep, title=title,
                             counts=scan.heads["role"].value_counts().to_dict() if len(scan.heads) else {})


def atlas_figure_from(data: dict, model: dict, marks=None, selected=None, keep=None, title=None, counts=None):
    from matplotlib.collections import LineCollection, PatchCollection
    from matplotlib.patches import Patch, Rectangle

    marks = marks or {}
    rows, n_cols = data["rows"], max(1, data["n_cols"])
    n_rows = max(1, len(rows))
    lay = data["layout"]
    pal = role_palette()
    # the same cell geometry as the widget, in pixels
    cw, ch, gap = lay["cw"], lay["ch"], lay["gap"]
    grid_w, grid_h = n_cols * (cw + gap), n_rows * (ch + gap)
    left, right, top, bottom = 70, 16, 74, 34
    n_legend = len(pal) - 1
    legend_cols = min(n_legend, max(2, int((grid_w + left) // 150)))
    legend_rows = math.ceil(n_legend / legend_cols)
    top += 18 * (legend_rows - 1)
    W, H = max(left + grid_w + right, 760), top + grid_h + bottom
    fig = _figure(W, H)
    ax = fig.add_axes([left / W, bottom / H, grid_w / W, grid_h / H])
    ax.set_xlim(0, grid_w)
    ax.set_ylim(grid_h, 0)
    ax.set_facecolor(PAPER)
    for side in ax.spines.values():
        side.set_visible(False)
    n = len(data["keys"])
    keep = np.ones(n, bool) if keep is None else np.asarray(keep, bool)
    rects, faces, edges, widths = [], [], [], []
    fs = _pt(11 if lay["label"] == "short" else 9.5)
    spark = data["spark"]
    n_sp = spark.shape[1] if spark.ndim == 2 else 0
    lines, line_colours = [], []
    fields = list(data.get("fields") or [])
    unsure = (np.asarray(data["numbers"])[:, fields.index("faded")] == 1.0 if "faded" in fields
              else np.zeros(n, bool))       # role not sure across bootstrap resamples (drawn lighter, as in the widget)
    for i, key in enumerate(data["keys"]):
        r, c = divmod(int(data["cells"][i]), n_cols)
        x, y = c * (cw + gap), r * (ch + gap)
        p = pal[int(data["roles"][i])]
        rects.append(Rectangle((x, y), cw, ch))
        alpha = (0.45 if unsure[i] else 1.0) if keep[i] else 0.18
        faces.append(_rgba(p["fill"], alpha))
        edges.append(INK if key == selected else _rgba(p["colour"], alpha))
        widths.append(2.2 if key == selected else 0.8)
        word = _data.cell_label(p, lay)
        if lay.get("spark", True):
            ax.text(x + 3, y + 3, word, fontsize=fs, color=_rgba(p["ink"], alpha), fontweight="bold",
                    ha="left", va="top")
        else:
            ax.text(x + cw / 2, y + ch / 2, word, fontsize=fs, color=_rgba(p["ink"], alpha), fontweight="bold",
                    ha="center", va="center")
        if n_sp and lay.get("spark", True):
            y0, y1 = y + 5 + fs * DPI / 72 + 2, y + ch - 3
            pts = []
            for k in range(n_sp):
                v = int(spark[i, k])
                if v == 255:
                    if len(pts) > 1:
                        lines.append(pts)
                        line_colours.append(_rgba(p["ink"], 0.8 * alpha))
                    pts = []
                    continue
                pts.append((x + 3 + (cw - 6) * k / max(1, n_sp - 1), y1 - (y1 - y0) * v / 254))
            if len(pts) > 1:
                lines.append(pts)
                line_colours.append(_rgba(p["ink"], 0.8 * alpha))
        m = marks.get(key)
        if m:
            tri = [(x + cw - 10, y + 1), (x + cw - 1, y + 1), (x + cw - 1, y + 10)]
            ax.fill([t[0] for t in tri], [t[1] for t in tri], color=INK if m.get("fresh") else PAPER,
                    edgecolor=INK, linewidth=0.6, linestyle="-" if m.get("fresh") else "--")
    ax.add_collection(PatchCollection(rects, facecolors=faces, edgecolors=edges, linewidths=widths))
    if lines:
        ax.add_collection(LineCollection(lines, colors=line_colours, linewidths=0.9))
    # row and column labels (every one when they fit, else every few)
    row_step = 1 if ch >= 11 else 2
    ax.set_yticks([r * (ch + gap) + ch / 2 for r in range(0, n_rows, row_step)])
    ax.set_yticklabels([rows[r]["label"] for r in range(0, n_rows, row_step)], fontsize=_pt(11 if ch >= 14 else 9))
    col_step = 1 if cw >= 24 else 2 if cw >= 14 else 4
    ax.xaxis.tick_top()
    ax.set_xticks([c * (cw + gap) + cw / 2 for c in range(0, n_cols, col_step)])
    ax.set_xticklabels([f"H{c}" for c in range(0, n_cols, col_step)], fontsize=_pt(10))
    ax.tick_params(length=0, colors=MUTED, pad=2)
    name = model.get("name") or model.get("path") or "model"
    fig.text(8 / W, 1 - 8 / H, title or f"Atlas — role of every head · {name} · scheme {model.get('scheme') or '—'}"
             f" · {n_rows} layer rows × {data['n_cols']} heads", fontsize=_pt(14), fontweight="bold", color=INK,
             ha="left", va="top")
    counts = counts or {}
    handles = [Patch(facecolor=p["fill"], edgecolor=p["colour"],
                     label=f"{_data.cell_label(p, lay)} = {p['role']} ({counts.get(p['role'], 0)})") for p in pal[1:]]
    fig.legend(handles=handles, loc="upper left", bbox_to_anchor=(4 / W, 1 - 28 / H), ncol=legend_cols,
               frameon=False, fontsize=_pt(11.5), handlelength=1.0, handleheight=1.0, columnspacing=1.2,
               borderaxespad=0, labelcolor=INK)
    fig.text(8 / W, 6 / H, "rows: layers · columns: heads · each mark: role colour and written role"
             + (" · sparkline: distance profile (δ small → large)" if n_sp and lay.get("spark", True) else "")
             + (" · lighter: role not sure across resamples" if unsure.any() else "")
             + (" · faded: left out by the filter" if not keep.all() else ""), fontsize=_pt(10.5), color=MUTED,
             ha="left", va="bottom")
    return fig


def _rgba(hex_colour: str, alpha: float = 1.0) -> tuple:
    h = hex_colour.lstrip("#")
    return (int(h[0:2], 16) / 255, int(h[2:4], 16) / 255, int(h[4:6], 16) / 255, alpha)


# ------------------------------------------------------------------ card
def _symlog(d):
    d = np.asarray(d, dtype=float)
    return np.sign(d) * np.log2(1 + np.abs(d))


def card_figure(scan, key: str, text: int | None = None, title: str | None = None):
    """One head as a figure: its weight map on a text (with a colour bar), its distance profile (90% band, slope
    line, labelled axes) and its score split (shares with 90% whiskers) — the card's three pictures."""
    h = _data.head_info(scan, key)
    info = h["info"]
    avail = _data.texts_with_map(scan, key)
    if text is None or text not in avail:
        text = avail[0] if avail else None
    mp = _data.map_payload(scan, key, text) if text is not None else None
    W, H = 1240, 400
    fig = _figure(W, H)
    role = info.get("role") or "no role"
    tags = ", ".join(info.get("tags") or [])
    fig.text(8 / W, 1 - 8 / H, title or f"Head {key} · {role}" + (f" · tags: {tags}" if tags else ""),
             fontsize=_pt(15), fontweight="bold", color=INK,
             ha="left", va="top")
    sub = [f"slope {fmt(info.get('slope'), 3)} score/token", f"shift test {info.get('shift_verdict') or '—'} "
           f"({info.get('shift_how') or '—'})", f"induction {fmt(info.get('induction'))}",
           f"entropy ratio {fmt(info.get('entropy_ratio'))}"]
    if info.get("anchor_like"):
        sub.append(f"anchor slot {fmt(info.get('anchor_slot'), 0)} (weight {fmt(info.get('anchor_weight'))})")
    fig.text(8 / W, 1 - 32 / H, " · ".join(sub), fontsize=_pt(11.5), color=MUTED, ha="left", va="top")
    top = 1 - 64 / H
    bottom = 56 / H
    # weight map
    ax = fig.add_axes([52 / W, bottom, 280 / W, top - bottom])
    if mp is not None:
        from matplotlib.colors import ListedColormap, Normalize

        rgb = colourise(mp["q"])
        ext = (mp["k0"] - 0.5, mp["k1"] - 0.5, mp["q1"] - 0.5, mp["q0"] - 0.5)
        ax.imshow(rgb, extent=ext, interpolation="nearest", aspect="auto")
        ax.set_xlabel("key position", fontsize=_pt(11), color=MUTED)
        ax.set_ylabel("query position", fontsize=_pt(11), color=MUTED)
        tname = scan.texts[text].get("name", f"text {text}") if text is not None else ""
        ax.set_title(f"Weight map · {tname}"[:60], fontsize=_pt(12), color=INK, loc="left")
        cax = fig.add_axes([340 / W, bottom, 10 / W, top - bottom])
        from matplotlib.colorbar import ColorbarBase

        cb = ColorbarBase(cax, cmap=ListedColormap(RAMP / 255.0), norm=Normalize(0, mp["vmax"]))
        cb.set_label("attention weight" + (" (top: 99th pct.)" if mp.get("clipped") else ""),
                     fontsize=_pt(10.5), color=MUTED)
        cax.tick_params(labelsize=_pt(9.5), colors=MUTED)
    else:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "No weight map was kept\nfor this head", ha="center", va="center", fontsize=_pt(12),
                color=MUTED, transform=ax.transAxes)
    _style(ax)
    # distance profile
    ax = fig.add_axes([480 / W, bottom, 360 / W, top - bottom])
    d, v, lo, hi = h["distance"], h["value"], h["low"], h["high"]
    if len(d) and np.isfinite(v).any():
        xs = _symlog(d)
        ok = np.isfinite(lo) & np.isfinite(hi)
        if ok.sum() > 1:
            ax.fill_between(xs[ok], lo[ok], hi[ok], color=BLUE, alpha=0.32, linewidth=0.6, edgecolor=BLUE,
                            label="90% interval")
        ax.plot(xs, v, color=BLUE, linewidth=1.8, label="profile", gid="profile")
        allv = np.concatenate([v[np.isfinite(v)], lo[ok], hi[ok]])
        span = float(allv.max() - allv.min()) or 1.0
        ld, ly = h["slope_line"]
        if len(ld):
            ax.plot(_symlog(ld), ly, color=RUST, linewidth=1.5, linestyle=(0, (4, 3)), label="slope", gid="slope")
        # the profile and its band set the range; the slope line is cut at its edges (as in the widget)
        ax.set_ylim(float(allv.min()) - 0.06 * span, float(allv.max()) + 0.06 * span)
        ticks = [t for t in (-256, -64, -16, -4, -1, 0, 1, 4, 16, 64, 256, 1024, 4096) if d.min() <= t <= d.max()]
        ax.set_xticks(_symlog(ticks))
        ax.set_xticklabels([str(t) for t in ticks])
        ax.set_xlabel("distance δ = query − key (log scale)", fontsize=_pt(11), color=MUTED)
        ax.set_ylabel("score (logit), 0 at δ = 0", fontsize=_pt(11), color=MUTED)
        ax.legend(fontsize=_pt(10), frameon=False, loc="best")
    else:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "No distance profile was measured", ha="center", va="center", fontsize=_pt(12),
                color=MUTED, transform=ax.transAxes)
    ax.set_title("Distance profile", fontsize=_pt(12), color=INK, loc="left")
    _style(ax)
    # score split
    ax = fig.add_axes([970 / W, bottom, 200 / W, top - bottom])
    parts = list(PART_NAMES)
    cols = part_colours()
    vals = [info.get(f"share_{p}") for p in parts]
    ys = np.arange(len(parts))
    ax.barh(ys, [x if x is not None else 0 for x in vals], color=[cols[p] for p in parts], height=0.6)
    for k, p in enumerate(parts):
        a, b = info.get(f"share_{p}_lo"), info.get(f"share_{p}_hi")
        if a is not None and b is not None:
            ax.errorbar([(a + b) / 2], [k], xerr=[[(b - a) / 2]], color=INK, capsize=3, linewidth=1)
        val = vals[k]
        ax.text(1.02, k, "—" if val is None else f"{val:.3f}", va="center", ha="left", fontsize=_pt(10.5),
                color=INK, transform=ax.get_yaxis_transform())
    ax.set_yticks(ys)
    ax.set_yticklabels(parts, fontsize=_pt(11))
    ax.set_ylim(len(parts) - 0.5, -0.5)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of within-row score variance", fontsize=_pt(11), color=MUTED)
    ax.set_title("Score split (whiskers: 90% interval)", fontsize=_pt(12), color=INK, loc="left")
    _style(ax)
    return fig


def _style(ax) -> None:
    ax.tick_params(labelsize=_pt(10), colors=MUTED)
    for name, side in ax.spines.items():
        side.set_color("#CFC8BC")
        if name in ("top", "right"):
            side.set_visible(False)


# ------------------------------------------------------------------ curves
PROBE_SERIES = [("r2", "probe R²", BLUE, "-"), ("control_r2", "control (shuffled labels)", RUST, "--"),
                ("untrained_r2", "untrained copy", "#6C8C4F", ":")]


def curves_figure(scan):
    """What was measured of the curves (probe R² per layer; loss per position and attention entropy past the
    training length) as a figure, or None when nothing was (no empty picture)."""
    c = _data.curves_data(scan)
    panels = []
    pr = c["probe"]
    if pr is not None and np.isfinite(pr["r2"]).any():
        panels.append("probe")
    ln = c["length"]
    if ln is not None and "loss" in ln and np.isfinite(ln["loss"]).any():
        panels.append("loss")
    en = c["entropy"]
    if en is not None and np.isfinite(en["entropy"]).any():
        panels.append("entropy")
    if not panels:
        return None
    W, H = 420 * len(panels) + 40, 330
    fig = _figure(W, H)
    fig.text(8 / W, 1 - 8 / H, "Curves — position probes and behaviour past the training length",
             fontsize=_pt(14), fontweight="bold", color=INK, ha="left", va="top")
    for k, what in enumerate(panels):
        ax = fig.add_axes([(60 + 420 * k) / W, 56 / H, 340 / W, (H - 56 - 62) / H])
        if what == "probe":
            for key, label, colour, style in PROBE_SERIES:
                if np.isfinite(pr[key]).any():
                    ax.plot(pr["layer"], pr[key], color=colour, linestyle=style, marker="o", markersize=3.5,
                            label=label)
            from matplotlib.ticker import MaxNLocator

            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.set_ylim(min(0.0, float(np.nanmin(pr["r2"]))), 1.0)
            ax.set_xlabel("layer (0 = embeddings)", fontsize=_pt(11), color=MUTED)
            ax.set_ylabel("held-out R²", fontsize=_pt(11), color=MUTED)
            ax.set_title("Probe for absolute position", fontsize=_pt(12), color=INK, loc="left")
            ax.legend(fontsize=_pt(10), frameon=False)
        elif what == "loss":
            x = ln["position"]
            if "loss_lo" in ln and "loss_hi" in ln:
                ok = np.isfinite(ln["loss_lo"]) & np.isfinite(ln["loss_hi"])
                if ok.sum() > 1:
                    ax.fill_between(x[ok], ln["loss_lo"][ok], ln["loss_hi"][ok], color=BLUE, alpha=0.3,
                                    label="90% interval")
            ax.plot(x, ln["loss"], color=BLUE, linewidth=1.6, label="loss")
            _training_line(ax, ln.get("training_length"))
            ax.set_xlabel("position (tokens)", fontsize=_pt(11), color=MUTED)
            ax.set_ylabel("next-token loss (nats)", fontsize=_pt(11), color=MUTED)
            ax.set_title("Loss per position", fontsize=_pt(12), color=INK, loc="left")
            ax.legend(fontsize=_pt(10), frameon=False)
        else:
            ax.plot(en["position"], en["entropy"], color="#6C8C4F", marker="o", markersize=3.5)
            _training_line(ax, en.get("training_length"))
            ax.set_xlabel("query position (tokens)", fontsize=_pt(11), color=MUTED)
            ax.set_ylabel("entropy ratio (1 = uniform)", fontsize=_pt(11), color=MUTED)
            ax.set_title("Attention entropy (mean over heads)", fontsize=_pt(12), color=INK, loc="left")
        _style(ax)
    return fig


def _training_line(ax, tl) -> None:
    if tl is not None and np.isfinite(float(tl)):
        ax.axvline(float(tl), color=INK, linestyle=(0, (3, 3)), linewidth=1)
        ax.text(float(tl), 0.98, f" training length {int(tl)}", transform=ax.get_xaxis_transform(), fontsize=_pt(10),
                color=INK, va="top", ha="left")


# ------------------------------------------------------------------ a folder of figures
def write_figures(scan, folder, formats: tuple[str, ...] = FORMATS, heads: list[str] | None = None,
                  marks: dict | None = None) -> list[Path]:
    """Write the atlas, a card per head (default: the notable heads, the strongest few per role) and the curves
    (if measured) into ``folder`` as ``atlas.pdf``, ``card-L0-H1.png``, … in each of ``formats``. Returns the
    paths written."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    keys = heads if heads is not None else _data.notable_heads(scan)
    figs = [("atlas", atlas_figure(scan, marks=marks))]
    figs += [(f"card-{k.replace(':', '-').replace('.', '-')}", card_figure(scan, k)) for k in keys]
    curves = curves_figure(scan)
    if curves is not None:
        figs.append(("curves", curves))
    out = []
    for name, fig in figs:
        for kind in formats:
            out.append(save(fig, folder / f"{name}.{kind}"))
    return out


# ------------------------------------------------------------------ several at once
def stack(figs: list, gap: int = 12):
    """Several figures one above the other as one PNG (for the survey's picture): rendered, then joined."""
    from .common import png_bytes as encode

    arrays = []
    for f in figs:
        if f is None:
            continue
        arrays.append(_rgb_of(f))
    if not arrays:
        return b""
    width = max(a.shape[1] for a in arrays)
    paper = np.array(_rgba(PAPER)[:3]) * 255
    out = []
    for a in arrays:
        pad = np.empty((a.shape[0], width, 3), np.uint8)
        pad[:] = paper.astype(np.uint8)
        pad[:, :a.shape[1]] = a
        out.append(pad)
        sep = np.empty((gap, width, 3), np.uint8)
        sep[:] = paper.astype(np.uint8)
        out.append(sep)
    return encode(np.concatenate(out[:-1], axis=0))


def _rgb_of(fig) -> np.ndarray:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    with _rc():
        canvas.draw()
    return np.asarray(canvas.buffer_rgba())[..., :3].copy()


__all__ = ["atlas_figure", "card_figure", "curves_figure", "render", "png_bytes", "svg_text", "save", "stack",
           "write_figures"]
