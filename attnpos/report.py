"""The standalone report: one self-contained HTML file (inline CSS and SVG, images as data URIs, no script,
no network) with the atlas, cards of notable heads, the curves, the findings, the caution, and the facts,
versions and fingerprint of what was scanned.

Example::

    >>> import attnpos                                            # doctest: +SKIP
    >>> from attnpos.report import write_report                   # doctest: +SKIP
    >>> scan = attnpos.scan("ref:rope")                           # doctest: +SKIP
    >>> write_report(scan, "rope-report.html", findings="attnpos-findings.json")   # doctest: +SKIP
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from .views import data as _data, static
from .core.keys import head_key
from .errors import AttnposError
from .files import write_atomic
from .core.protocol import json_safe
from .views.common import esc, esc_plain, fmt, part_colours, role_palette, shift_how

REPORT_CSS = """
body{margin:0;background:#F3F1EC;color:#1B1F24;font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif}
main{max-width:1500px;margin:0 auto;padding:18px 22px 40px}
header.rp-head h1{font-size:20px;margin:0 0 2px;font-weight:700}
header.rp-head p{margin:0;color:#5A5F66;font-size:13px}
section{margin-top:18px}
section>h2{font-size:15px;margin:0 0 8px;font-weight:700;border-bottom:2px solid #E3DED4;padding-bottom:3px}
.rp-caution{padding:8px 12px;border-left:5px solid #B8613F;background:#F6EFE6;font-size:13px;margin-top:12px}
.rp-facts{display:flex;flex-wrap:wrap;gap:18px;align-items:flex-start}
.rp-facts table{border-collapse:collapse;font-size:12.5px;background:#FBFAF7;border:1px solid #E3DED4}
.rp-facts td,.rp-facts th{padding:3px 10px;text-align:left;border-bottom:1px solid #EFEBE3;vertical-align:top}
.rp-facts th{color:#5A5F66;font-weight:600}
.rp-cards .apx{margin-bottom:12px}
.rp-lazy{margin-top:10px}
.apx-cell.apx-out{opacity:.15}
.apx-legend span.apx-off{opacity:.4;text-decoration:line-through}
.apx-filters{display:flex;flex-wrap:wrap;gap:6px;align-items:center;font-size:12px;margin:0 0 6px}
.apx-filters .apx-sub{margin:0}
tr:target td{background:#F1E3C8}
details.rp-table{font-size:12px}
details.rp-table table{border-collapse:collapse;background:#FBFAF7}
details.rp-table td,details.rp-table th{padding:2px 8px;border-bottom:1px solid #EFEBE3;text-align:right}
details.rp-table td.l,details.rp-table th.l{text-align:left}
footer{margin-top:24px;color:#77706A;font-size:12px}
"""

# Nothing may be fetched, and no script may run but the report's own one, pinned by its SHA-256 (W3C CSP Level 3
# hash source): it draws the card of any head clicked in the atlas from the JSON block in the page. An injected
# script, or a changed one, does not match the hash and is blocked.
CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src {hash}; base-uri 'none'; "
       "form-action 'none'")

# Above this many heads the report stays small (≤ 1 MB for 32 × 32): fewer static cards, smaller map images.
BIG_MODEL_HEADS = 256

TABLE_COLUMNS = ["role", "share_distance", "share_slot", "share_content", "share_pair", "share_residual", "slope",
                 "entropy_ratio", "mass_previous", "mass_first", "induction", "shift_verdict"]


def _facts_table(rows: list[tuple[str, Any]], caption: str) -> str:
    body = "".join(f"<tr><th>{esc_plain(k)}</th><td>{esc_plain(v)}</td></tr>" for k, v in rows)
    return f"<table><caption style='text-align:left;font-weight:600;padding:4px 0'>{esc_plain(caption)}</caption>{body}</table>"


def _texts_table(scan) -> str:
    """One row per source text; the windows a long text was split into are counted, not listed one by one."""
    groups: dict = {}
    for i, t in enumerate(scan.texts):
        key = (t.get("source", ""), t.get("name", "").split("#")[0] if t.get("window") else t.get("name", ""))
        n = t.get("n_tokens", len(scan.tokens[i]) if i < len(scan.tokens) else 0)
        g = groups.setdefault(key, {"first": i, "units": 0, "tokens": 0})
        g["units"] += 1
        g["tokens"] += n or 0
    rows = []
    for (source, name), g in groups.items():
        last = g["first"] + g["units"] - 1
        idx = f"{g['first']}" if g["units"] == 1 else f"{g['first']}–{last}"
        rows.append(f"<tr><td>{idx}</td><td>{esc(name)}</td><td>{esc(source)}</td>"
                    f"<td>{esc_plain(g['tokens'])}</td><td>{esc_plain(g['units'])}</td></tr>")
    return ("<table><caption style='text-align:left;font-weight:600;padding:4px 0'>texts</caption>"
            "<tr><th>#</th><th>name</th><th>source</th><th>tokens</th><th>windows</th></tr>" + "".join(rows)
            + "</table>")


def _head_table(scan) -> str:
    t = scan.heads.reset_index(drop=True)
    shift = _shift_heading(scan)
    names = [shift if c == "shift_verdict" else c for c in TABLE_COLUMNS]
    head = "<tr><th class='l'>head</th>" + "".join(
        f"<th class='{'l' if c in ('role', 'shift_verdict') else ''}'>{esc_plain(n)}</th>"
        for c, n in zip(TABLE_COLUMNS, names)) + "</tr>"
    rows = []
    for _, r in t.iterrows():
        cells = []
        for c in TABLE_COLUMNS:
            v = r.get(c)
            if c in ("role", "shift_verdict"):
                cells.append(f"<td class=l>{esc_plain(v if isinstance(v, str) else '—')}")
            else:
                cells.append(f"<td>{fmt(v, 3)}")
        key = head_key(r["stack"], r["layer"], r["head"])
        # the row is the head's anchor: without the page's script, a click in the atlas lands here. (Cells and
        # rows are left unclosed, as HTML allows: a 1024-head table is a quarter of the report otherwise.)
        rows.append(f"<tr id={esc_plain(static.head_anchor(key))}><td class=l>{esc_plain(key)}{''.join(cells)}")
    return (f"<details class='rp-table'><summary>The full head table ({len(t)} heads)</summary>"
            f"<table>{head}{''.join(rows)}</table></details>")


def _shift_heading(scan) -> str:
    """The shift column's heading names which shift ran (position ids moved, or a neutral prefix)."""
    sh = (scan.extra or {}).get("shift") or {}
    t = scan.heads
    kind = sh.get("kind") or (t["shift_kind"].dropna().iloc[0] if "shift_kind" in t and t["shift_kind"].notna().any()
                              else None)
    offset = sh.get("offset") if sh.get("offset") is not None else (
        t["shift_offset"].dropna().iloc[0] if "shift_offset" in t and t["shift_offset"].notna().any() else None)
    return "shift test" + (f" ({shift_how(kind, offset)})" if kind else "")


def _cards_script(scan, rows: list[dict]) -> tuple[str, str]:
    """The JSON block every head's card is drawn from, and the script that draws it (with its CSP hash)."""
    payload = _data.all_cards_payload(scan, shared=True)
    payload["palette"] = role_palette()
    payload["parts"] = part_colours()
    payload["findings"] = rows
    # "<" written as its JSON escape: no user string can close the block or open a tag
    block = json.dumps(json_safe(payload), ensure_ascii=False, separators=(",", ":")).replace("<", "\\u003c")
    code = static.widget_script("card.js", "report_cards.js")
    digest = base64.b64encode(hashlib.sha256(code.encode("utf-8")).digest()).decode("ascii")
    return (f"<script type='application/json' id='rp-heads'>{block}</script><script>{code}</script>",
            f"'sha256-{digest}'")


def report_html(scan, findings=None, title: str | None = None, per_role: int = 2, max_cards: int | None = None) -> str:
    """The report as one HTML string (see :func:`write_report`)."""
    store = _data.open_store(findings)
    rows = _data.finding_rows(store, scan) if store is not None else []
    marks = _data.marks_from(rows)
    m = scan.model or {}
    name = m.get("name") or m.get("path") or "model"
    title = title or f"attnpos report — {name}"
    big = len(scan.heads) > BIG_MODEL_HEADS
    if max_cards is None:
        max_cards = 8 if big else 14
    keys = _data.notable_heads(scan, per_role=1 if big else per_role, limit=max_cards)
    # findings' heads get a card too (after the notable ones), so a reader can see what a note is about
    for r in rows:
        try:
            if r["target"].count(".H") == 1 and r["target"] not in keys and len(keys) < max_cards + 6:
                _data.head_index(scan, r["target"])
                keys.append(r["target"])
        except (KeyError, ValueError, AttnposError):
            pass
    # the caution once, at the top: the views below leave theirs out
    cards = "".join(static.card_html(scan, k, findings=rows, with_style=False, anchor=True, caution=False,
                                     map_side=128 if big else 256) for k in keys)
    versions = [(k, v) for k, v in (scan.versions or {}).items()]
    generated = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    counts = scan.heads["role"].value_counts().to_dict() if len(scan.heads) else {}
    summary = ", ".join(f"{n} {r}" for r, n in sorted(counts.items(), key=lambda kv: -kv[1]))
    curves = _data.curves_data(scan)
    measured = any(v is not None for v in curves.values())
    data_script, digest = _cards_script(scan, rows)
    parts = [
        "<!doctype html>\n<html lang='en'><head><meta charset='utf-8'>",
        f"<meta http-equiv='Content-Security-Policy' content=\"{CSP.format(hash=digest)}\">",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<meta name='generator' content='attnpos {esc_plain((scan.versions or {}).get('attnpos', ''))}'>",
        f"<title>{esc_plain(title)}</title><style>{static.STYLE}{static.widget_css('card.css')}{REPORT_CSS}</style></head><body><main>",
        f"<header class='rp-head'><h1>{esc_plain(title)}</h1><p>{len(scan.heads)} heads · {esc_plain(summary)} · "
        f"generated {esc_plain(generated)}</p></header>",
        f"<div class='rp-caution'><b>Caution.</b> {esc_plain(scan.caution)}</div>",
        "<section id='facts'><h2>What was scanned</h2><div class='rp-facts'>",
        _facts_table(_data.model_facts(scan), "model"),
        _facts_table(versions or [("versions", "—")], "versions"),
        _texts_table(scan),
        "</div></section>",
        "<section id='atlas'><h2>Atlas — role of every head</h2>",
        static.atlas_html(scan, marks, with_style=False, caution=False, heading=False, link_all=True),
        "<div id='rp-card' class='rp-lazy' hidden></div>",
        "</section>",
        f"<section id='cards' class='rp-cards'><h2>Notable heads ({len(keys)}: the strongest "
        f"{'one' if big else 'few'} per role, and heads with findings; with their weight maps)</h2>",
        cards or "<p class='apx-none'>No heads.</p>",
        "</section>",
    ]
    if measured:
        parts += ["<section id='curves'><h2>Curves — position probes and behaviour past the training length</h2>",
                  static.curves_html(scan, with_style=False, caution=False, heading=False), "</section>"]
    parts += [
        "<section id='findings'><h2>Findings</h2>",
        static.findings_table_html(rows, str(getattr(store, "path", "")) or None, with_style=False, heading=False),
        "</section>",
        "<section id='table'><h2>Head table</h2>", _head_table(scan), "</section>",
        f"<footer>Written by attnpos {esc_plain((scan.versions or {}).get('attnpos', ''))} · model fingerprint "
        f"{esc_plain(m.get('fingerprint') or '—')} · texts hash {esc_plain(scan.texts_hash or '—')}. This file is "
        "self-contained: it loads nothing, and runs only its own script (pinned by its hash), which draws the card "
        "of a head clicked in the atlas.</footer>",
        data_script,
        "</main></body></html>\n",
    ]
    return "".join(parts)


def write_report(scan, path: str | os.PathLike, findings=None, title: str | None = None) -> Path:
    """Write the standalone HTML report of ``scan`` to ``path`` and return the path.

    Args:
        scan: a :class:`attnpos.Scan`.
        path: the ``.html`` file to write (its folder must exist).
        findings: a findings store, the path of its JSON file, or None for no findings section content.
        title: the page title (default ``attnpos report — <model name>``).
    """
    return write_atomic(Path(path), report_html(scan, findings=findings, title=title))


__all__ = ["write_report", "report_html"]
