"""The standalone HTML report: one self-contained file with the atlas, notable cards, findings, caution, facts."""

from __future__ import annotations

import base64
import hashlib
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from attnpos.report import report_html, write_report
from attnpos.core.protocol import CAUTION
from attnpos.results.scan import Scan
from attnpos.views.common import role_shorts
from attnpos.views.synthetic import synthetic_scan


class _Doc(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self._hidden = 0          # inside <script> or <style>: code, not text a reader sees

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag in ("script", "style"):
            self._hidden += 1

    def handle_endtag(self, tag):
        if tag in ("script", "style"):
            self._hidden -= 1

    def handle_data(self, data):
        if not self._hidden:
            self.text.append(data)


def parse(html: str) -> _Doc:
    """Parse with Python's own HTML parser (html.parser, the standard library's reference tokenizer): what it
    reads as tags and as text is what a browser would, for the checks below."""
    d = _Doc()
    d.feed(html)
    return d


def test_report_is_one_self_contained_file(tmp_path):
    scan = synthetic_scan(4, 4, seed=1)
    out = write_report(scan, tmp_path / "r.html")
    assert out == tmp_path / "r.html" and out.is_file()
    html = out.read_text(encoding="utf-8")
    doc = parse(html)
    tags = [t for t, _ in doc.tags]
    assert "link" not in tags and "iframe" not in tags
    # two script elements: the JSON the cards are drawn from (never run) and the report's own script, which the
    # CSP allows by its SHA-256 only (W3C CSP Level 3, hash-source: base64 of the SHA-256 of the script's text)
    scripts = [a for t, a in doc.tags if t == "script"]
    assert [a.get("type") for a in scripts] == ["application/json", None]
    code = html.split("<script>", 1)[1].split("</script>", 1)[0]
    digest = base64.b64encode(hashlib.sha256(code.encode("utf-8")).digest()).decode("ascii")
    for t, a in doc.tags:
        for k in ("src", "href"):
            v = a.get(k)
            if v is not None:
                assert v.startswith(("data:", "#")), (t, k, v[:60])
    # the only URLs are XML namespace names, which are never fetched
    urls = set(re.findall(r"https?://[^\s\"'<>]+", html))
    assert urls <= {"http://www.w3.org/2000/svg"}, urls
    # W3C Content Security Policy Level 3: a <meta http-equiv="Content-Security-Policy"> element delivers the
    # policy in a document opened from a file, where no HTTP header exists
    csp = [a for t, a in doc.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]["content"]
    assert f"script-src 'sha256-{digest}'" in csp[0]["content"] and "unsafe-inline" not in csp[0]["content"].split(
        "script-src", 1)[1].split(";")[0]
    assert "src=" not in html.split("<script>", 1)[1].split(">", 1)[0]


def test_report_holds_atlas_cards_facts_and_caution(tmp_path):
    scan = synthetic_scan(4, 4, seed=2)
    html = write_report(scan, tmp_path / "r.html").read_text(encoding="utf-8")
    doc = parse(html)
    cells = [a for t, a in doc.tags if t == "g" and "apx-cell" in a.get("class", "")]
    assert len(cells) == len(scan.heads)
    for role in set(scan.heads["role"]):
        assert f">{role_shorts()[role]}</text>" in html and role in html
    cards = [a["id"] for t, a in doc.tags if a.get("id", "").startswith("card-")]
    roles_present = set(scan.heads["role"])
    assert len(roles_present) <= len(cards) <= 2 * len(roles_present)
    # every atlas cell is clickable (the report's script draws the head's card); without the script the link lands
    # on the head's row of the head table
    links = [a for t, a in doc.tags if t == "a" and a.get("data-head")]
    assert len(links) == len(scan.heads)
    ids = {a.get("id") for _, a in doc.tags}
    assert all(a["href"][1:] in ids for a in links)
    text = " ".join(doc.text)
    # the caution once, and each section heading once
    assert text.count(CAUTION[:60]) == 1
    for h in ("Atlas", "Findings", "Curves"):
        assert len(re.findall(rf"<h[23]>{h}\b", html)) == 1, h
    assert scan.model["fingerprint"] in text and scan.texts_hash in text
    for k, v in scan.versions.items():
        assert k in text and v in text
    assert "Probe for absolute position" in text and "training length 64" in text


def test_report_escapes_hostile_tokens_and_text_names(tmp_path):
    scan = synthetic_scan(3, 3, seed=3, hostile=True)
    html = write_report(scan, tmp_path / "r.html").read_text(encoding="utf-8")
    doc = parse(html)
    assert not [a for t, a in doc.tags if t == "img" and a.get("src") == "x"]
    assert not [a for _, a in doc.tags if any(k.startswith("on") for k in a)]
    assert "<script>alert" not in html and "<img src=x" not in html
    # the JSON the cards are drawn from holds the hostile strings, with every "<" escaped
    block = html.split("id='rp-heads'>", 1)[1].split("</script>", 1)[0]
    assert "<" not in block
    text = "".join(doc.text)
    # HTML escaping (common practice; WHATWG HTML, character references): markup in user text reaches the
    # parser as text, never as tags
    assert "<script>alert(1)</script>" in text                # shown as text
    assert "\"><img src=x onerror=alert(1)>" in text
    assert "text-0<b>" in text
    assert not any(ch in html for ch in "\x00\x1b\x07\u202e")


findings_mod = pytest.importorskip("attnpos.findings")


def test_report_lists_findings_with_stale_ones_marked(tmp_path):
    scan = synthetic_scan(3, 3, seed=4)
    store = findings_mod.Findings(tmp_path / "notes.json")
    store.add("L2.H1", "fresh note <b>bold?</b>", status="supported", fingerprint=scan.model["fingerprint"],
              texts_hash=scan.texts_hash)
    store.add("L0", "from another checkpoint", fingerprint="deadbeef")
    html = write_report(scan, tmp_path / "r.html", findings=tmp_path / "notes.json").read_text(encoding="utf-8")
    doc = parse(html)
    text = " ".join(doc.text)
    assert "fresh note <b>bold?</b>" in text           # the body is text, not markup
    block = html.split("id='rp-heads'>", 1)[1].split("</script>", 1)[0]
    assert "fresh note \\u003cb>bold?\\u003c/b>" in block   # in the cards' JSON, with "<" escaped
    assert "from another checkpoint" in text and "stale" in text
    assert "supported" in text
    # the head with a finding gets a card and a mark in the atlas
    assert any(a.get("id") == "card-L2-H1" for _, a in doc.tags)
    assert 'class="apx-mark"' in html
    assert "L0 ◆" in text                                      # the layer's finding marks its row


def test_report_survives_missing_numbers_and_a_bare_scan(tmp_path):
    scan = synthetic_scan(2, 2, seed=5, extra=False, keep_maps=0)
    scan.heads.loc[:, ["slope", "share_distance", "induction"]] = np.nan
    scan.profile = {}
    html = report_html(scan)
    text = "".join(parse(html).text)
    assert "—" in text and not re.search(r"\bnan\b", text, re.I)
    assert "id='curves'" not in html                          # nothing measured: no empty Curves section
    assert "No weight map was kept" in text
    # a scan reloaded from its JSON (no kept maps) still writes
    again = Scan.from_json(synthetic_scan(2, 2, seed=6).to_json())
    out = write_report(again, tmp_path / "again.html")
    assert "apx-atlas" in out.read_text(encoding="utf-8")
