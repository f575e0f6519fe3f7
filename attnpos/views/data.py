"""From a :class:`~attnpos.results.scan.Scan` (and a findings store) to what the views draw.

One function per view; the widgets send the results to the browser (numbers as binary buffers) and the
static renderings turn the same results into HTML/SVG, so the two never disagree.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..core import roles as core_roles
from ..core.columns import PART_NAMES
from ..core.keys import compact, head_key, layer_key, parse_key
from .common import (block_labels, clean, fmt, fmt_interval, is_anchor_like, map_view, num, role_index, shift_how, spark_codes, tags_of,
                     text_of, top_keys)

# Numbers per head that the atlas sends (float32, NaN = missing) and shows on hover.
ATLAS_FIELDS = [
    "share_distance", "share_distance_lo", "share_distance_hi",
    "share_slot", "share_slot_lo", "share_slot_hi",
    "share_content", "share_content_lo", "share_content_hi",
    "share_pair", "share_pair_lo", "share_pair_hi",
    "share_residual", "share_residual_lo", "share_residual_hi",
    "slope", "slope_lo", "slope_hi", "entropy_ratio",
    "mass_previous", "mass_next", "mass_first", "mass_self",
    "anchor_slot", "anchor_weight", "induction", "shift_offset", "shift_change",
    "role_support", "faded",
]
SPARK_POINTS = 24
STATUS_ORDER = ("open", "supported", "ruled-out")


def uncertain_roles(t: pd.DataFrame) -> np.ndarray:
    """1.0 for heads whose primary role holds in fewer than ROLE_SUPPORT of the resamples (or that sit between two
    roles), else 0.0: the atlas draws them faded."""
    from ..core.thresholds import ROLE_SUPPORT

    sup = pd.to_numeric(t["role_support"], errors="coerce").to_numpy(dtype=float) if "role_support" in t else \
        np.full(len(t), np.nan)
    between = [isinstance(v, list) and len(v) > 0 for v in (t["role_between"] if "role_between" in t else [None] * len(t))]
    return ((np.isfinite(sup) & (sup < ROLE_SUPPORT)) | np.array(between, dtype=bool)).astype(np.float32)


# The overview must fit one 1400 × 900 screen (inside JupyterLab, beside its file browser) for models up to about
# 40 layers × 40 heads: the grid gets at most this many pixels, and cells shrink to fit (the sparkline goes first,
# the written role code stays).
GRID_MAX_WIDTH = 980
GRID_MAX_HEIGHT = 640


def atlas_layout(n_cols: int, n_rows: int = 0) -> dict:
    """Cell geometry shared by the widget (JS), the static SVG and the pictures: roomy cells with the role's short
    word and a sparkline for small models; small marks with the role's code for big ones, so that the whole grid
    fits about GRID_MAX_WIDTH × GRID_MAX_HEIGHT pixels (one screen with the legend and the filters around it)."""
    if n_cols <= 12:
        cw, ch, label = 66, 44, "short"
    elif n_cols <= 16:
        cw, ch, label = 54, 42, "short"
    elif n_cols <= 32:
        cw, ch, label = 34, 32, "code"
    else:
        cw, ch, label = 26, 26, "code"
    gap, left, top = 2, 74, 20
    if n_cols:
        cw = max(12, min(cw, (GRID_MAX_WIDTH - left) // n_cols - gap))
    if n_rows:
        ch = max(12, min(ch, (GRID_MAX_HEIGHT - top) // n_rows - gap))
    if label == "short" and cw < 48:
        label = "code"
    # a sparkline needs room under the written role
    spark = ch >= 30 and cw >= 26
    return {"cw": cw, "ch": ch, "gap": gap, "left": left, "top": top, "label": label, "spark": spark}


def cell_label(palette_entry: dict, layout: dict) -> str:
    """The word a cell writes for its role (the legend writes the same word)."""
    return palette_entry["short"] if layout["label"] == "short" else palette_entry["code"]


def _str_col(t: pd.DataFrame, c: str) -> list[str]:
    if c not in t.columns:
        return [""] * len(t)
    return [text_of(v) for v in t[c].tolist()]


def scan_rows(scan) -> list[dict]:
    """Grid rows of the atlas: one per (stack, layer), in the order of the head table."""
    t = scan.heads
    seen, rows = set(), []
    for s, L in zip(t["stack"].tolist(), t["layer"].tolist()):
        k = (s, int(L))
        if k not in seen:
            seen.add(k)
            rows.append({"stack": s if s else "main", "layer": int(L), "key": layer_key(s, int(L)),
                         "label": (f"{s[:3]}·L{int(L)}" if s not in (None, "", "main") else f"L{int(L)}")})
    return rows


def profile_order(prof: dict) -> np.ndarray:
    """Column order of the profile arrays for drawing: by distance ascending, leaving out distances that no
    head has a value for (e.g. δ < 0 in a causal model)."""
    dist = np.asarray(prof.get("distance", []), dtype=float)
    if not len(dist):
        return np.zeros(0, dtype=int)
    vals = np.asarray(prof["value"], dtype=float) if "value" in prof else np.zeros((0, len(dist)))
    keep = np.isfinite(dist) & (np.isfinite(vals).any(axis=0) if len(vals) else True)
    order = np.argsort(dist, kind="stable")
    return order[keep[order]]


def atlas_data(scan, spark_points: int | None = None) -> dict:
    """Everything the atlas draws, with numbers as numpy arrays (the widget turns them into bytes).

    The sparkline keeps about one point per two pixels of cell width (at most ``SPARK_POINTS``)."""
    t = scan.heads.reset_index(drop=True)
    n = len(t)
    rows = scan_rows(scan)
    row_of = {(r["stack"], r["layer"]): i for i, r in enumerate(rows)}
    heads = t["head"].astype(int).to_numpy() if n else np.zeros(0, int)
    n_cols = int(heads.max()) + 1 if n else 0
    layout = atlas_layout(n_cols, len(rows))
    if spark_points is None:
        spark_points = int(min(SPARK_POINTS, max(8, (layout["cw"] - 6) // 2)))
    cell = np.array([row_of[(s if s else "main", int(L))] * n_cols + int(h)
                     for s, L, h in zip(t["stack"], t["layer"], t["head"])], dtype=np.int32)
    roles = np.array([role_index(r) for r in t["role"].tolist()], dtype=np.uint8)
    numbers = np.full((n, len(ATLAS_FIELDS)), np.nan, dtype=np.float32)
    for k, c in enumerate(ATLAS_FIELDS):
        if c in t.columns:
            numbers[:, k] = pd.to_numeric(t[c], errors="coerce").to_numpy(dtype=np.float64)
    numbers[:, ATLAS_FIELDS.index("faded")] = uncertain_roles(t)
    prof = scan.profile or {}
    if "value" in prof and np.asarray(prof["value"]).shape[0] == n:
        order = profile_order(prof)
        spark, groups = spark_codes(np.asarray(prof["value"], dtype=float)[:, order], spark_points)
        dist = np.asarray(prof["distance"], dtype=float)[order]
        spark_d = dist[groups] if len(groups) else np.zeros(0)
    else:
        spark, spark_d = np.zeros((n, 0), np.uint8), np.zeros(0)
    keys = [head_key(s, L, h) for s, L, h in zip(t["stack"], t["layer"], t["head"])]
    strength = np.full(n, np.nan, dtype=np.float32)
    for i, r in enumerate(t["role"].tolist()):
        spec = core_roles.get(str(r)) if r is not None else None
        if spec is not None and spec.strength and spec.strength in t.columns:
            strength[i] = num(t[spec.strength].iloc[i])
    return {"rows": rows, "strength": strength, "layers": t["layer"].astype(int).to_numpy() if n else np.zeros(0, int), "n_cols": n_cols, "cells": cell, "roles": roles, "numbers": numbers,
            "fields": list(ATLAS_FIELDS), "spark": spark, "spark_distance": spark_d.astype(np.float32),
            "evidence": _str_col(t, "evidence"), "tags": [", ".join(tags_of(v)) for v in t["tags"].tolist()],
            "verdicts": _str_col(t, "shift_verdict"), "keys": keys,
            "layout": layout}


def atlas_keep(data: dict, filters: dict | None) -> np.ndarray:
    """Which heads a filter keeps (boolean per head of :func:`atlas_data`). ``filters`` may hold ``roles`` (role
    names to keep), ``layers`` (``[first, last]``, inclusive) and ``strength`` (keep heads whose role's strength
    column — :attr:`attnpos.core.roles.RoleSpec.strength` — is at least this; heads without one are kept). The
    widget applies the same rule in the browser to the same numbers."""
    n = len(data["keys"])
    keep = np.ones(n, bool)
    f = filters or {}
    if f.get("roles") is not None:
        names = set(f["roles"])
        all_roles = core_roles.names()
        keep &= np.array([bool(r) and all_roles[r - 1] in names for r in data["roles"].tolist()], bool)
    if f.get("layers"):
        lo, hi = f["layers"]
        keep &= (data["layers"] >= int(lo)) & (data["layers"] <= int(hi))
    if f.get("strength") is not None:
        s = data["strength"]
        with np.errstate(invalid="ignore"):
            keep &= ~(s < float(f["strength"]))
    return keep


def model_facts(scan) -> list[tuple[str, str]]:
    m = scan.model or {}
    scheme = m.get("scheme")
    if isinstance(scheme, (list, tuple)):
        scheme = ", ".join(str(s) for s in scheme)
    facts = [("model", m.get("name") or m.get("path")), ("architecture", m.get("architecture")),
             ("position scheme", scheme), ("layers × heads", f"{m.get('layers', '—')} × {m.get('heads', '—')}"),
             ("causal", m.get("causal")), ("context limit", m.get("context_limit")),
             ("training length", m.get("training_length")), ("capture", m.get("capture")),
             ("score kind", m.get("score_kind")), ("fingerprint", m.get("fingerprint")),
             ("texts", len(scan.texts)), ("texts hash", scan.texts_hash)]
    return [(k, "—" if v is None or v == "" else str(v)) for k, v in facts]


# ------------------------------------------------------------------ card
def head_index(scan, key: str) -> int:
    stack, layer, head = parse_key(key)
    t = scan.heads.reset_index(drop=True)
    sel = (t["layer"] == layer) & (t["head"] == head) & (t["stack"].fillna("main").replace("", "main") == stack)
    idx = np.flatnonzero(sel.to_numpy())
    if len(idx) == 0:
        raise KeyError(f"no head {key} in this scan")
    return int(idx[0])


def texts_with_map(scan, key: str) -> list[int]:
    stack, layer, head = parse_key(key)
    return [i for i in range(len(scan.texts)) if scan.weight_map(i, layer, head, stack) is not None]


def head_info(scan, key: str, row: int | None = None, table: pd.DataFrame | None = None) -> dict:
    """The head table row of one head as JSON-safe numbers (None = missing) plus its profile arrays.

    ``row`` (the head's index in the table) and ``table`` (``scan.heads.reset_index(drop=True)``) spare the look-up
    when every head is wanted."""
    i = head_index(scan, key) if row is None else row
    r = (scan.heads.reset_index(drop=True) if table is None else table).iloc[i]
    info: dict[str, Any] = {"key": key, "stack": r["stack"], "layer": int(r["layer"]), "head": int(r["head"]),
                            "role": r["role"] if isinstance(r["role"], str) else None,
                            "tags": tags_of(r["tags"]), "evidence": text_of(r["evidence"]),
                            "shift_kind": text_of(r.get("shift_kind")), "shift_verdict": text_of(r.get("shift_verdict")),
                            "role_between": " / ".join(tags_of(r.get("role_between"))) or None}
    for c in ATLAS_FIELDS:
        info[c] = clean(num(r.get(c)))
    info["shift_how"] = shift_how(info["shift_kind"], info.get("shift_offset"))
    info["anchor_like"] = is_anchor_like(info["role"], info["tags"])
    prof = scan.profile or {}
    out = {"info": info, "distance": np.zeros(0), "value": np.zeros(0), "low": np.zeros(0), "high": np.zeros(0)}
    if "value" in prof and np.asarray(prof["value"]).shape[0] > i:
        order = profile_order(prof)
        out["distance"] = np.asarray(prof["distance"], dtype=np.float64)[order]
        for k in ("value", "low", "high"):
            if k in prof:
                out[k] = np.asarray(prof[k], dtype=np.float64)[i][order]
            else:
                out[k] = np.full(len(out["distance"]), np.nan)
    info["intercept"], line = slope_line(out["distance"], out["value"], info.get("slope"))
    info["slope_line"] = [[float(a), float(b)] for a, b in zip(*line)]
    out["slope_line"] = line
    return out


def slope_line(distance: np.ndarray, value: np.ndarray, slope, n: int = 48) -> tuple:
    """The slope as a line to draw over a profile: ``y = b − slope·δ`` over δ ≥ 0 (the slope is positive when
    scores fall with distance, :mod:`attnpos.split`), with ``b`` the least-squares intercept on the profile's
    points at δ ≥ 0. Returns (intercept or None, (δ values, y values)) — sampled at ``n`` points, because the views
    draw δ on a log scale, where a straight line in δ is a curve."""
    d = np.asarray(distance, dtype=float)
    v = np.asarray(value, dtype=float)
    empty = (None, (np.zeros(0), np.zeros(0)))
    if slope is None or not np.isfinite(slope) or not len(v):
        return empty
    ok = np.isfinite(v) & np.isfinite(d) & (d >= 0)
    if ok.sum() < 2:
        return empty
    b = float(np.mean(v[ok]) + slope * np.mean(d[ok]))
    lo, hi = float(d[ok].min()), float(d[ok].max())
    xs = np.unique(np.concatenate([np.linspace(lo, hi, n), np.geomspace(max(lo, 1.0), max(hi, 1.0), n)]))
    xs = xs[(xs >= lo) & (xs <= hi)]
    return b, (xs, b - slope * xs)


def map_payload(scan, key: str, text: int, window=None, max_side: int = 256) -> dict | None:
    stack, layer, head = parse_key(key)
    if text is None or text < 0 or text >= len(scan.texts):
        return None
    w = scan.weight_map(text, layer, head, stack)
    if w is None:
        return None
    mv = map_view(w, window, max_side)
    toks = scan.tokens[text] if text < len(scan.tokens) else []
    mv["row_labels"] = block_labels(toks, mv["q0"], mv["q1"], mv["step_q"])
    mv["col_labels"] = block_labels(toks, mv["k0"], mv["k1"], mv["step_k"])
    mv["top_keys"] = top_keys(w, toks)
    return mv


# ------------------------------------------------------------------ curves
def curves_data(scan) -> dict:
    """The curves: the attached probe result (R² per layer) and length result (loss per position, and the mean
    entropy of every head per query-position bin)."""
    att = getattr(scan, "attached", None) or {}
    out: dict[str, Any] = {"probe": None, "length": None, "entropy": None}
    pr = att.get("probe")
    if pr is not None and pr.layers:
        rows = sorted((e for e in pr.layers if isinstance(e, dict) and isinstance(e.get("layer"), (int, float))
                       and not isinstance(e.get("layer"), bool)), key=lambda e: e["layer"])
        if rows:
            out["probe"] = {k: np.array([num(e.get(k)) for e in rows], dtype=np.float64)
                            for k in ("layer", "r2", "r2_log", "control_r2", "selectivity", "mae", "untrained_r2")}
    ln = att.get("length")
    if ln is not None:
        pos = np.asarray(ln.position, dtype=np.float64)
        if ln.loss is not None:
            res = {"position": pos, "training_length": ln.training_length}
            for k in ("loss", "loss_lo", "loss_hi"):
                v = getattr(ln, k)
                if v is not None and len(v) == len(pos):
                    res[k] = np.asarray([num(x) for x in v], dtype=np.float64)
            out["length"] = res
        ent = ln.entropy_curve()
        if ent is not None:
            out["entropy"] = {**ent, "training_length": ln.training_length}
    return out


# ------------------------------------------------------------------ findings
def open_store(findings: Any):
    """A findings store from a store object, a path, or None."""
    if findings is None:
        return None
    if isinstance(findings, (str, Path)):
        from ..findings import Findings  # a later stage; imported only when asked for
        return Findings(findings)
    return findings


def finding_rows(store, scan=None) -> list[dict]:
    """All findings as JSON-safe dicts with a ``stale`` flag (against the scan's fingerprint and texts hash)."""
    if store is None:
        return []
    if scan is not None:
        fp = (scan.model or {}).get("fingerprint")
        pairs = store.check(fp, scan.texts_hash)
    else:
        pairs = [(f, False) for f in store.all()]
    rows = []
    for f, stale in pairs:
        rows.append({"id": str(f.id), "target": str(f.target), "status": str(f.status),
                     "body": "" if f.body is None else str(f.body), "stale": bool(stale),
                     "created": text_of(getattr(f, "created", "")), "updated": text_of(getattr(f, "updated", "")),
                     "author": text_of(getattr(f, "author", "")) or ""})
    return rows


def marks_from(rows: list[dict]) -> dict:
    """Per target key: how many findings, their statuses and whether any is stale."""
    marks: dict[str, dict] = {}
    for r in rows:
        m = marks.setdefault(r["target"], {"n": 0, "statuses": [], "stale": 0, "fresh": 0})
        m["n"] += 1
        if r["status"] not in m["statuses"]:
            m["statuses"].append(r["status"])
        if r["stale"]:
            m["stale"] += 1
        else:
            m["fresh"] += 1
    return marks


def notable_heads(scan, per_role: int = 2, limit: int = 14) -> list[str]:
    """A few strong heads per role for the report: the strongest by that role's own strength column (its spec)."""
    t = scan.heads.reset_index(drop=True)
    keys = []
    for spec in core_roles.specs():
        sub = t[t["role"] == spec.name]
        if sub.empty:
            continue
        col = spec.strength
        score = (pd.to_numeric(sub[col], errors="coerce").fillna(-np.inf) if col and col in sub
                 else pd.Series(0, sub.index))
        take = 1 if spec.name == core_roles.FALLBACK else per_role
        for i in score.sort_values(ascending=False, kind="stable").index[:take]:
            r = t.loc[i]
            keys.append(head_key(r["stack"], r["layer"], r["head"]))
    return keys[:limit]


# ------------------------------------------------------------------ summaries (the static bundle's words)
def atlas_summary(scan, marks: dict | None = None) -> tuple[str, list[str]]:
    m = scan.model or {}
    rows = scan_rows(scan)
    counts = scan.heads["role"].value_counts().to_dict() if len(scan.heads) else {}
    order = [r for r in core_roles.names() if counts.get(r)]
    lines = [f"{m.get('name') or m.get('path') or 'model'} · scheme {m.get('scheme') or '—'} · "
             f"{len(rows)} layer rows × {m.get('heads', '—')} heads ({len(scan.heads)} heads)",
             "roles: " + (", ".join(f"{counts[r]} {r}" for r in order) or "none")]
    for r in order:
        sub = scan.heads[scan.heads["role"] == r]
        keys = [head_key(s, L, h) for s, L, h in zip(sub["stack"], sub["layer"], sub["head"])]
        if r != core_roles.FALLBACK:
            lines.append(f"{r}: {compact(keys)}")
    n_marked = sum(1 for k in (marks or {}) if k != "model")
    if n_marked:
        lines.append(f"{n_marked} heads or layers carry findings")
    return "Atlas — role of every head", lines


def card_summary(scan, key: str) -> tuple[str, list[str]]:
    info = head_info(scan, key)["info"]
    lines = [f"role {info['role'] or '—'}" + (f" (tags: {', '.join(info['tags'])})" if info["tags"] else ""),
             f"slope {fmt(info.get('slope'), 3)} {fmt_interval(info.get('slope_lo'), info.get('slope_hi'), 3)} "
             "score/token (positive: scores fall with distance)".replace("  ", " "),
             f"shares {' / '.join(PART_NAMES)}: " + " / ".join(fmt(info.get(f"share_{p}"), 3) for p in PART_NAMES),
             f"shift test: {info.get('shift_verdict') or '—'} (change {fmt(info.get('shift_change'), 3)}; "
             f"{info['shift_how']})",
             f"induction {fmt(info.get('induction'))} · entropy ratio {fmt(info.get('entropy_ratio'))}"]
    if info["anchor_like"]:
        lines.append(f"anchor: slot {fmt(info.get('anchor_slot'), 0)}, weight {fmt(info.get('anchor_weight'))}")
    if info["evidence"]:
        lines.append(f"evidence: {info['evidence']}")
    return f"Head {key}", lines


def curves_summary(scan) -> tuple[str, list[str]]:
    c = curves_data(scan)
    lines = []
    pr = c["probe"]
    if pr is not None and np.isfinite(pr["r2"]).any():
        k = int(np.nanargmax(pr["r2"]))
        lines.append(f"probe for absolute position: best layer {fmt(pr['layer'][k], 0)}, held-out R² "
                     f"{fmt(pr['r2'][k], 3)} (control {fmt(pr['control_r2'][k], 3)}, untrained copy "
                     f"{fmt(pr['untrained_r2'][k], 3)})")
    else:
        lines.append("probe: not measured (attach a probe result: scan.attach(attnpos.probes.probe(...)))")
    ln = c["length"]
    if ln is not None and "loss" in ln and np.isfinite(ln["loss"]).any():
        lines.append(f"loss per position over {len(ln['position'])} positions, training length "
                     f"{ln.get('training_length') or '—'}: first {fmt(ln['loss'][0], 3)}, last {fmt(ln['loss'][-1], 3)}")
    else:
        lines.append("length: not measured (attach a length result: scan.attach(attnpos.length.length(...)))")
    return "Curves — position probes and behaviour past the training length", lines


def findings_summary(rows: list[dict], path: str | None = None) -> tuple[str, list[str]]:
    lines = [f"store: {path}"] if path else []
    if not rows:
        lines.append("no findings recorded")
    for r in rows:
        body = r["body"] if len(r["body"]) <= 160 else r["body"][:157] + "…"
        lines.append(f"{r['target']} · {r['status']}{' · stale' if r['stale'] else ''}: {body}")
    return f"Findings ({len(rows)})", lines


# ------------------------------------------------------------------ the report's cards of every head
def json_key(v) -> str:
    import json as _json
    return _json.dumps(v, ensure_ascii=False)


def all_cards_payload(scan, shared: bool = False) -> dict:
    """What the standalone report needs to draw the card of *any* head when it is clicked (drawn in the page by
    the card widget's own ES module, so the report's card and the notebook's are one renderer): per head the
    numbers of :func:`head_info` (float32, base64), its words, and its profile quantised to uint8 per head (0..254
    between the head's own low and high, 255 missing; a few hundred bytes a head, so a 32 × 32 model's report stays
    under 1 MB). Weight maps are not included: the notable heads' static cards carry them."""
    import base64
    import json

    t = scan.heads.reset_index(drop=True)
    n = len(t)
    fields = [f for f in ATLAS_FIELDS if f != "faded"] + ["intercept"]     # the card reads role_support itself
    numbers = np.full((n, len(fields)), np.nan, dtype=np.float32)
    words = {k: [] for k in ("keys", "roles", "tags", "evidence", "shift_kind", "shift_verdict", "shift_how",
                             "anchor_like")}
    dist = np.zeros(0)
    codes, lows, spans = [], np.zeros(n, np.float32), np.zeros(n, np.float32)
    for i in range(n):
        key = head_key(t["stack"].iloc[i], t["layer"].iloc[i], t["head"].iloc[i])
        h = head_info(scan, key, row=i, table=t)
        info = h["info"]
        for k, f in enumerate(fields):
            v = info.get(f)
            numbers[i, k] = np.nan if v is None else v
        words["keys"].append(key)
        words["roles"].append(info["role"] or "")
        words["tags"].append(list(info["tags"]))
        words["evidence"].append(info["evidence"])
        for w in ("shift_kind", "shift_verdict", "shift_how"):
            words[w].append(info.get(w) or "")
        words["anchor_like"].append(1 if info["anchor_like"] else 0)
        dist = h["distance"]
        arr = np.stack([h["value"], h["low"], h["high"]]) if len(dist) else np.zeros((3, 0))
        fin = arr[np.isfinite(arr)]
        lo, hi = (float(fin.min()), float(fin.max())) if len(fin) else (0.0, 0.0)
        span = hi - lo if hi > lo else 1.0
        q = np.where(np.isfinite(arr), np.round((arr - lo) / span * 254), 255).astype(np.uint8)
        codes.append(q)
        lows[i], spans[i] = lo, span
    nb = len(dist)
    prof = np.stack(codes) if n and nb else np.zeros((n, 3, 0), np.uint8)
    ad = atlas_data(scan)            # the filters' numbers, as the atlas widget gets them (atlas_keep's rule)
    b64 = lambda a: base64.b64encode(np.ascontiguousarray(a).tobytes()).decode("ascii")   # noqa: E731
    if shared:
        # words that repeat from head to head (roles, tags, the shift test's wording) as an index into one list
        # of distinct values: ``words["values"][words[name][i]]``
        values: dict[str, int] = {}
        for name in ("roles", "tags", "shift_kind", "shift_verdict", "shift_how"):
            words[name] = [values.setdefault(json_key(v), len(values)) for v in words[name]]
        words["values"] = [json.loads(v) for v in values]
        for name in ("shift_kind", "shift_verdict", "shift_how"):
            if n and len(set(words[name])) == 1:
                words[name] = words[name][0]          # the same for every head: one index (report_cards.js reads it)
    return {"fields": fields, "n": n, "nb": nb, "distance": [float(x) for x in dist],
            "numbers": b64(numbers.astype("<f4")), "profile": b64(prof.astype(np.uint8)),
            "profile_low": b64(lows.astype("<f4")), "profile_span": b64(spans.astype("<f4")),
            "strength": b64(ad["strength"].astype("<f4")), "layer": [int(x) for x in ad["layers"]], **words}
