"""The standalone report of a stretch (:func:`attnpos.stretching.stretch`): one self-contained HTML file (inline CSS
and SVG, no script, no network) with the loss curves of every variant, the heads × variants break grid whose rows
link to each head's distance profiles, the loss at multiples of the training length, the RoPE bands verdict, the
rope parameters of each variant, the notes and the caution.

Example::

    >>> from attnpos.stretching import stretch                        # doctest: +SKIP
    >>> write_stretch_report(stretch("ref:rope", to=512), "stretch.html")   # doctest: +SKIP
"""

from __future__ import annotations

import html
import json
import os
from datetime import datetime, timezone
from pathlib import Path

from .files import write_atomic
from .views.stretch import STYLE, stretch_html

# No script may run and nothing may be fetched: the page needs inline styles only.
CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; form-action 'none'"

PAGE_CSS = """
body{margin:0;background:#F3F1EC;color:#1B1F24;font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif}
main{max-width:1200px;margin:0 auto;padding:18px 22px 40px}
h1{font-size:20px;margin:0 0 2px}
header p{margin:0;color:#5A5F66;font-size:13px}
section{margin-top:18px}
section>h2{font-size:15px;margin:0 0 8px;border-bottom:2px solid #E3DED4;padding-bottom:3px}
table.sr{border-collapse:collapse;font-size:12.5px;background:#FBFAF7;border:1px solid #E3DED4}
table.sr td,table.sr th{padding:3px 10px;text-align:left;border-bottom:1px solid #EFEBE3;vertical-align:top}
table.sr th{color:#5A5F66;font-weight:600}
code{font-size:11.5px}
footer{margin-top:24px;color:#77706A;font-size:12px}
"""


def _e(x) -> str:
    return html.escape("—" if x is None else str(x), quote=True)


def _num(x, nd=3) -> str:
    return "—" if x is None else f"{x:.{nd}f}"


def _loss_rows(result) -> str:
    mult = list((result.variants[0].get("loss_at") or {}))
    head = "<tr><th>variant</th><th>source</th>" + "".join(f"<th>loss at {_e(k)}</th>" for k in mult) + \
           "<th>heads broken</th></tr>"
    rows = []
    for v in result.variants:
        la, li = v.get("loss_at") or {}, v.get("loss_at_interval") or {}
        cells = "".join(f"<td>{_num(la.get(k))} <small>[{_num((li.get(k) or [None])[0], 2)}, "
                        f"{_num((li.get(k) or [None, None])[1], 2)}]</small></td>" for k in mult)
        rows.append(f"<tr><td><b>{_e(v['name'])}</b></td><td>{_e(v.get('source'))}</td>{cells}"
                    f"<td>{_e(v.get('broken'))} of {len(result.heads)}</td></tr>")
    return f"<table class='sr'>{head}{''.join(rows)}</table>"


def _params_rows(result) -> str:
    rows = []
    for v in result.variants:
        rp = v.get("rope_parameters")
        err = v.get("frequency_error")
        err_text = "—" if err is None else f"{err:.1e}"
        rows.append(f"<tr><td><b>{_e(v['name'])}</b></td><td><code>{_e(json.dumps(rp) if rp else 'as trained')}</code></td>"
                    f"<td>{_e(v.get('max_position_embeddings'))}</td><td>{_num(v.get('attention_factor'), 4)}</td>"
                    f"<td>{_e(err_text)}</td></tr>")
    return ("<table class='sr'><tr><th>variant</th><th>rope_parameters given to transformers</th>"
            "<th>max_position_embeddings</th><th>attention factor</th><th>model's frequencies vs formula "
            "(max relative difference)</th></tr>" + "".join(rows) + "</table>")


def _bands_rows(result) -> str:
    word = {True: "breaks follow the bands", False: "breaks do not follow the bands", None: "cannot tell"}
    rows = "".join(f"<tr><td><b>{_e(n)}</b></td><td>{_e(word[(result.band_verdict.get(n) or {}).get('follows')])}</td>"
                   f"<td>{_e((result.band_verdict.get(n) or {}).get('why'))}</td></tr>" for n in result.variant_names)
    return f"<table class='sr'><tr><th>variant</th><th>verdict</th><th>why</th></tr>{rows}</table>"


def stretch_report_html(result, title: str | None = None) -> str:
    m = result.model or {}
    name = m.get("name") or "model"
    title = title or f"attnpos stretch — {name}"
    s = result.settings
    generated = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    facts = [("model", name), ("architecture", m.get("architecture")), ("fingerprint", m.get("fingerprint")),
             ("training length", f"{result.training_length} ({result.training_length_source})"),
             ("sequences", f"{s.get('n_sequences')} of {result.to} tokens, read by every variant"),
             ("reference of each head", s.get("reference")), ("measured", s.get("measured")),
             ("a head breaks when", s.get("break")), ("thresholds", json.dumps(s.get("thresholds")))]
    facts_html = "<table class='sr'>" + "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in facts) + "</table>"
    notes = "".join(f"<li>{_e(n)}</li>" for n in result.notes)
    return "".join([
        "<!doctype html>\n<html lang='en'><head><meta charset='utf-8'>",
        f"<meta http-equiv='Content-Security-Policy' content=\"{CSP}\">",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{STYLE}{PAGE_CSS}</style></head><body><main>",
        f"<header><h1>{_e(title)}</h1><p>{_e(result.headline())} · generated {_e(generated)}</p></header>",
        f"<section id='board'><h2>Loss curves and the break grid</h2>{stretch_html(result, with_style=False)}</section>",
        f"<section id='loss'><h2>Loss at multiples of the training length</h2>{_loss_rows(result)}</section>",
        "<section id='bands'><h2>RoPE bands (Barbero et al. 2025)</h2><p>Heads that rely on the slow, low-frequency "
        "rotary pairs are the ones interpolation is expected to disturb; per variant, whether the measured breaks "
        f"follow that.</p>{_bands_rows(result)}</section>",
        f"<section id='variants'><h2>The variants</h2>{_params_rows(result)}</section>",
        f"<section id='facts'><h2>What was measured</h2>{facts_html}</section>",
        f"<section id='notes'><h2>Notes</h2><ul>{notes or '<li>none</li>'}</ul></section>",
        "<footer>Written by attnpos. This file is self-contained: it loads nothing and runs no script.</footer>",
        "</main></body></html>\n"])


def write_stretch_report(result, path: str | os.PathLike, title: str | None = None) -> Path:
    """Write the standalone HTML report of a :class:`~attnpos.results.stretch.StretchResult` and return the path."""
    return write_atomic(Path(path), stretch_report_html(result, title=title))


__all__ = ["write_stretch_report", "stretch_report_html"]
