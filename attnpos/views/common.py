"""Shared pieces of the views: role palette, the map colour ramp, keys, escaping, number formatting, PNG.

Everything here is plain Python + numpy so that the static renderings (report, ``_repr_html_``) and the
widgets agree on colours, labels and keys.
"""

from __future__ import annotations

import base64
import html
import math
import struct
import warnings
import zlib
from typing import Any, Iterable

import numpy as np

from ..core import columns, roles as core_roles
from ..core.protocol import json_safe

# ------------------------------------------------------------------ roles
# Everything about a role — order, colour, short word, code — comes from its spec in attnpos.core.roles, so a role
# registered there appears in every view. The role name is always written beside the colour, so colour is never the
# only carrier of the role.
UNKNOWN_COLOUR = "#D9D6CF"
INK = "#1B1F24"
PAPER = "#FBFAF7"


def roles_now() -> tuple[str, ...]:
    """Role names in precedence order (the order of every legend and palette)."""
    return core_roles.names()


def role_colours() -> dict[str, str]:
    return {s.name: s.colour for s in core_roles.specs()}


def role_shorts() -> dict[str, str]:
    return {s.name: s.short for s in core_roles.specs()}


def role_codes() -> dict[str, str]:
    return {s.name: s.code for s in core_roles.specs()}


def part_colours() -> dict[str, str]:
    """Colours of the parts of the score split (muted, distinct from the role palette's meaning)."""
    return {p.name: p.colour for p in columns.SPLIT_PARTS}


def role_index(role: Any) -> int:
    """0 for a missing/unknown role, else 1 + position in :func:`roles_now`."""
    names = roles_now()
    return names.index(str(role)) + 1 if role is not None and str(role) in names else 0


def role_colour(role: Any) -> str:
    spec = core_roles.get(str(role)) if role is not None else None
    return spec.colour if spec is not None else UNKNOWN_COLOUR


def _hex_rgb(h: str) -> tuple[int, int, int]:
    h = h.lstrip("#")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)


def tint(colour: str, amount: float = 0.35) -> str:
    """Mix a colour with white (amount = share of white)."""
    r, g, b = _hex_rgb(colour)
    mix = [round(c + (255 - c) * amount) for c in (r, g, b)]
    return "#%02X%02X%02X" % tuple(mix)


def ink_on(colour: str) -> str:
    """Dark or light text for a background, by relative luminance (WCAG formula, common practice)."""
    def lin(c: float) -> float:
        c /= 255
        return c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4
    r, g, b = _hex_rgb(colour)
    lum = 0.2126 * lin(r) + 0.7152 * lin(g) + 0.0722 * lin(b)
    return INK if lum > 0.22 else "#FFFFFF"


def role_palette() -> list[dict]:
    """What the JS side needs to draw roles: one dict per role id (id 0 = unknown), in precedence order."""
    out = [{"role": "", "colour": UNKNOWN_COLOUR, "fill": UNKNOWN_COLOUR, "ink": INK, "short": "?", "code": "?",
            "about": "not measured"}]
    for spec in core_roles.specs():
        fill = tint(spec.colour, 0.35)
        out.append({"role": spec.name, "colour": spec.colour, "fill": fill, "ink": ink_on(fill),
                    "short": spec.short, "code": spec.code, "about": spec.about})
    return out


# ------------------------------------------------------------------ colour ramp for weight maps
# Control points of a perceptually uniform sequential map: viridis sampled at 10 evenly spaced stops
# (van der Walt & Smith's published colormap; values from memory). We interpolate them in OKLab
# (Ottosson 2020 matrices) to a 256-entry ramp of our own.
_RAMP_STOPS = ["#440154", "#482878", "#3E4989", "#31688E", "#26828E",
               "#1F9E89", "#35B779", "#6ECE58", "#B5DE2B", "#FDE725"]


def _srgb_to_linear(c: np.ndarray) -> np.ndarray:
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _linear_to_srgb(c: np.ndarray) -> np.ndarray:
    c = np.clip(c, 0, 1)
    return np.where(c <= 0.0031308, 12.92 * c, 1.055 * np.power(c, 1 / 2.4) - 0.055)


_M1 = np.array([[0.4122214708, 0.5363325363, 0.0514459929],
                [0.2119034982, 0.6806995451, 0.1073969566],
                [0.0883024619, 0.2817188376, 0.6299787005]])
_M2 = np.array([[0.2104542553, 0.7936177850, -0.0040720468],
                [1.9779984951, -2.4285922050, 0.4505937099],
                [0.0259040371, 0.7827717662, -0.8086757660]])


def srgb_to_oklab(rgb: np.ndarray) -> np.ndarray:
    """sRGB in [0, 1] (..., 3) to OKLab (..., 3) (Ottosson 2020)."""
    lms = _srgb_to_linear(np.asarray(rgb, float)) @ _M1.T
    return np.cbrt(lms) @ _M2.T


def oklab_to_srgb(lab: np.ndarray) -> np.ndarray:
    lms = (np.asarray(lab, float) @ np.linalg.inv(_M2).T) ** 3
    return _linear_to_srgb(lms @ np.linalg.inv(_M1).T)


def _make_ramp(n: int = 256) -> np.ndarray:
    stops = np.array([_hex_rgb(h) for h in _RAMP_STOPS], float) / 255
    lab = srgb_to_oklab(stops)
    xs = np.linspace(0, 1, len(stops))
    t = np.linspace(0, 1, n)
    out = np.stack([np.interp(t, xs, lab[:, k]) for k in range(3)], axis=1)
    return np.round(oklab_to_srgb(out) * 255).astype(np.uint8)


RAMP = _make_ramp()          # (256, 3) uint8
MISSING_RGB = (226, 222, 214)


def ramp_colour(x: float) -> str:
    if x is None or not np.isfinite(x):
        return "#%02X%02X%02X" % MISSING_RGB
    r, g, b = RAMP[int(round(min(max(x, 0.0), 1.0) * 255))]
    return "#%02X%02X%02X" % (int(r), int(g), int(b))


# ------------------------------------------------------------------ text
_CTRL = {"\n": "\\n", "\t": "\\t", "\r": "\\r"}


def show_token(s: Any) -> str:
    """A token as visible text: control characters become backslash escapes (``\\n``, ``\\x1b``), as do
    C1 controls, bidi overrides and zero-width characters (``\\u202e``); an all-space token shows as ␣.
    This is *display* only; HTML escaping is :func:`esc`'s job. The JS side (``_shared.js``) does the same."""
    if s is None:
        return "—"
    s = str(s)
    out = []
    for ch in s:
        o = ord(ch)
        if ch in _CTRL:
            out.append(_CTRL[ch])
        elif o < 0x20 or o == 0x7F or 0x80 <= o < 0xA0:
            out.append("\\x%02x" % o)
        elif 0x200B <= o <= 0x200F or 0x202A <= o <= 0x202E or 0x2066 <= o <= 0x2069 \
                or o == 0xFEFF or 0xD800 <= o <= 0xDFFF or o in (0xFFFE, 0xFFFF):
            out.append("\\u%04x" % o)
        else:
            out.append(ch)
    t = "".join(out)
    if t and t.strip(" ") == "":
        t = "\u2423" * len(t)
    return t


def esc(s: Any) -> str:
    """Escape any user-derived string for HTML/SVG text or attribute (quotes included)."""
    return html.escape(show_token(s), quote=True)


def esc_plain(s: Any) -> str:
    """Escape free text (finding bodies, evidence): control characters other than newline/tab become
    backslash escapes, then HTML escaping (quotes included)."""
    if s is None:
        return "—"
    out = []
    for ch in str(s):
        o = ord(ch)
        if ch in "\n\t":
            out.append(ch)
        elif o < 0x20 or o == 0x7F or 0x80 <= o < 0xA0:
            out.append("\\x%02x" % o)
        elif 0x202A <= o <= 0x202E or 0x2066 <= o <= 0x2069:
            out.append("\\u%04x" % o)
        else:
            out.append(ch)
    return html.escape("".join(out), quote=True)


def finite(x: Any) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def fmt(x: Any, digits: int = 2) -> str:
    """A number for display; missing (None/NaN/not a number) is an em dash."""
    if not finite(x):
        return "—"
    x = float(x)
    if x != 0 and abs(x) < 10 ** (-digits):
        return f"{x:.1e}"
    return f"{x:.{digits}f}"


def fmt_interval(lo: Any, hi: Any, digits: int = 2) -> str:
    if not finite(lo) or not finite(hi):
        return ""
    return f"[{fmt(lo, digits)}, {fmt(hi, digits)}]"


SHIFT_KINDS = {"position-ids": "position ids moved by {offset}", "prefix": "a neutral prefix of {offset} tokens"}


def shift_how(kind: Any, offset: Any) -> str:
    """Which shift ran, in words: ``position ids moved by 32`` or ``a neutral prefix of 32 tokens``."""
    off = fmt(offset, 0)
    k = text_of(kind)
    return SHIFT_KINDS[k].format(offset=off) if k in SHIFT_KINDS else (f"{k} {off}" if k else "—")


def is_anchor_like(role: Any, tags: Any) -> bool:
    """Whether a head's anchor numbers mean anything: its role or one of its tags is ``anchor`` (the anchor
    criterion of :mod:`attnpos.core.roles` holds). For every other head the most-weighted slot is noise."""
    return str(role) == "anchor" or "anchor" in tags_of(tags)


def num(x: Any) -> float:
    """A float, NaN for missing or non-numeric."""
    try:
        return float(x) if x is not None else float("nan")
    except (TypeError, ValueError):
        return float("nan")


clean = json_safe   # the same JSON-safe conversion the scan files use


def text_of(x: Any) -> str:
    """Evidence / tags cells may be str, dict, list or missing: one display string."""
    if x is None:
        return ""
    if isinstance(x, float) and not math.isfinite(x):
        return ""
    if isinstance(x, dict):
        return "; ".join(f"{k}={fmt(v, 3) if isinstance(v, (int, float, np.number)) else v}" for k, v in x.items())
    if isinstance(x, (list, tuple, np.ndarray)):
        return ", ".join(str(v) for v in x)
    return str(x)


def tags_of(x: Any) -> list[str]:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return []
    if isinstance(x, str):
        return [t.strip() for t in x.split(",") if t.strip()]
    if isinstance(x, Iterable):
        return [str(t) for t in x]
    return [str(x)]


# ------------------------------------------------------------------ PNG (static map images)
def png_bytes(rgb: np.ndarray) -> bytes:
    """Encode an (h, w, 3) uint8 array as PNG (no dependencies: zlib + CRC chunks per the PNG spec)."""
    rgb = np.ascontiguousarray(rgb, dtype=np.uint8)
    h, w, _ = rgb.shape
    raw = b"".join(b"\x00" + rgb[y].tobytes() for y in range(h))

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def png_data_uri(rgb: np.ndarray) -> str:
    return "data:image/png;base64," + base64.b64encode(png_bytes(rgb)).decode("ascii")


def colourise(q: np.ndarray) -> np.ndarray:
    """uint8 codes (0..254 value, 255 missing) -> (h, w, 3) RGB via :data:`RAMP`."""
    q = np.asarray(q, dtype=np.uint8)
    scaled = np.round(q.astype(np.float32) * (255 / 254)).clip(0, 255).astype(np.uint8)
    rgb = RAMP[scaled]
    rgb[q == 255] = MISSING_RGB
    return rgb


# ------------------------------------------------------------------ maps
MAP_MAX_SIDE = 256


def map_view(w: np.ndarray, window: Iterable[int] | None = None, max_side: int = MAP_MAX_SIDE) -> dict:
    """Cut a window out of a (T, T) weight map and block-average it down to at most ``max_side`` per side.

    Returns ``{"q": uint8 codes (rows, cols), "vmax", "q0", "q1", "k0", "k1", "step_q", "step_k",
    "rows", "cols"}``; codes are value/vmax*254 rounded, 255 where missing (NaN).
    """
    w = np.asarray(w, dtype=np.float32)
    T_q, T_k = w.shape
    if window and len(list(window)) == 4:
        q0, q1, k0, k1 = (int(v) for v in window)
    else:
        q0, q1, k0, k1 = 0, T_q, 0, T_k
    q0, k0 = max(0, min(q0, T_q - 1)), max(0, min(k0, T_k - 1))
    q1, k1 = max(q0 + 1, min(q1, T_q)), max(k0 + 1, min(k1, T_k))
    sub = w[q0:q1, k0:k1]
    sq = max(1, math.ceil(sub.shape[0] / max_side))
    sk = max(1, math.ceil(sub.shape[1] / max_side))
    rows, cols = math.ceil(sub.shape[0] / sq), math.ceil(sub.shape[1] / sk)
    pad = np.full((rows * sq, cols * sk), np.nan, dtype=np.float32)
    pad[:sub.shape[0], :sub.shape[1]] = sub
    blocks = pad.reshape(rows, sq, cols, sk)
    with np.errstate(invalid="ignore"):
        cnt = np.isfinite(blocks).sum(axis=(1, 3))
        tot = np.nansum(blocks, axis=(1, 3))
        mean = np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan)
    # Colour scale: up to the 99th percentile of the positive cells, not the maximum. In a causal map the first
    # query has weight 1 on the first key; scaling to that would leave every other cell dark.
    finite_vals = mean[np.isfinite(mean)]
    pos = finite_vals[finite_vals > 0]
    top = float(finite_vals.max()) if len(finite_vals) else 0.0
    vmax = float(np.quantile(pos, 0.99)) if len(pos) else top
    if vmax <= 0:
        vmax = top
    scale = vmax if vmax > 0 else 1.0
    q = np.where(np.isfinite(mean), np.round(np.clip(mean / scale, 0, 1) * 254), 255).astype(np.uint8)
    return {"q": q, "vmax": vmax, "max": top, "clipped": bool(top > vmax * (1 + 1e-6)), "q0": q0, "q1": q1,
            "k0": k0, "k1": k1, "step_q": sq, "step_k": sk, "rows": rows, "cols": cols, "T": T_q}


def block_labels(tokens: list[str], start: int, stop: int, step: int) -> list[str]:
    """Display label of each block of ``step`` tokens in [start, stop): ``#12 'tok'`` or ``#12–15 'a'…'d'``."""
    out = []
    for a in range(start, stop, step):
        b = min(a + step, stop) - 1
        ta = show_token(tokens[a]) if a < len(tokens) else "?"
        if a == b:
            out.append(f"#{a} {ta}")
        else:
            tb = show_token(tokens[b]) if b < len(tokens) else "?"
            out.append(f"#{a}\u2013{b} {ta} \u2026 {tb}")
    return out


def top_keys(w: np.ndarray, tokens: list[str], k: int = 8) -> list[dict]:
    """Keys with the highest mean weight received per query (mean over all queries of the text)."""
    w = np.asarray(w, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        col = np.nanmean(w, axis=0)
    col = np.where(np.isfinite(col), col, -np.inf)
    order = np.argsort(-col, kind="stable")[:k]
    return [{"slot": int(j), "token": tokens[j] if j < len(tokens) else "?", "weight": float(col[j])}
            for j in order if np.isfinite(col[j])]


def spark_codes(values: np.ndarray, n_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Downsample profiles (n_heads, nb) to ``n_points`` by averaging groups of buckets and quantise each row
    to uint8 (0..254, min..max of that row; 255 = missing). Returns (codes (n_heads, n_points), index groups)."""
    values = np.asarray(values, dtype=np.float64)
    n, nb = values.shape
    m = min(nb, n_points)
    groups = np.array_split(np.arange(nb), m) if m else []
    if m == 0:
        return np.zeros((n, 0), np.uint8), np.zeros(0)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        g = np.stack([np.nanmean(values[:, idx], axis=1) for idx in groups], axis=1)
        lo = np.nanmin(g, axis=1, keepdims=True)
        hi = np.nanmax(g, axis=1, keepdims=True)
    span = np.where((hi - lo) > 0, hi - lo, 1.0)
    codes = np.where(np.isfinite(g), np.round((g - lo) / span * 254), 255)
    codes = np.where(np.isfinite(codes), codes, 255).astype(np.uint8)
    return codes, np.array([int(idx[0]) for idx in groups])
