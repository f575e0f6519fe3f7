"""The head card widget: one head in depth."""

from __future__ import annotations

import anywidget
import numpy as np
import traitlets as t

from . import data as _data, static
from ._base import StaticFallback, css, esm
from ..core.keys import head_key, layer_key, parse_key
from .common import RAMP, clean, part_colours, role_palette


class HeadCard(StaticFallback, anywidget.AnyWidget):
    """One head in depth: weight map (canvas; hover for tokens, drag to zoom), profile with interval band and
    slope line, the score split, shift test, induction score, top keys, findings, caution.

    ``head`` is the head's key (``"L3.H2"``); setting it (or selecting in a linked :class:`Atlas`) reloads
    the card. ``text`` picks the text whose kept map is shown; ``window`` (``[q0, q1, k0, k1]`` in tokens,
    empty = whole text) zooms; the kernel cuts and block-averages the map to at most 256 × 256.

    Example::

        card = HeadCard(scan, head="L1.H0")
        card.head = "L2.H3"
    """

    _esm = esm("card.js")
    _css = css("card.css")

    head = t.Unicode("").tag(sync=True)
    info = t.Dict().tag(sync=True)
    profile = t.Bytes(b"").tag(sync=True)
    texts = t.List(t.Dict()).tag(sync=True)
    text = t.Int(-1).tag(sync=True)
    window = t.List(t.Int()).tag(sync=True)
    map_codes = t.Bytes(b"").tag(sync=True)
    map_meta = t.Dict().tag(sync=True)
    row_labels = t.List(t.Unicode()).tag(sync=True)
    col_labels = t.List(t.Unicode()).tag(sync=True)
    top_keys = t.List(t.Dict()).tag(sync=True)
    lut = t.Bytes(b"").tag(sync=True)
    # not "style": ipywidgets' DOMWidgetView reads a trait of that name as a child style widget and tries to
    # create a view of it (a TypeError in create_child_view on every render)
    colours = t.Dict().tag(sync=True)
    findings = t.List(t.Dict()).tag(sync=True)
    caution = t.Unicode("").tag(sync=True)

    def __init__(self, scan, head: str | None = None, text: int | None = None, findings=None, **kwargs):
        super().__init__(**kwargs)
        self.scan = scan
        self.store = _data.open_store(findings)
        self._rows: list[dict] = []
        self.lut = np.ascontiguousarray(RAMP, dtype=np.uint8).tobytes()
        self.colours = {"palette": role_palette(), "parts": part_colours()}
        self.caution = scan.caution or ""
        self.observe(self._on_head, "head")
        self.observe(self._on_map, ["text", "window"])
        self.refresh_findings()
        if text is not None:
            self.text = int(text)
        if head is None and len(scan.heads):
            r = scan.heads.iloc[0]
            head = head_key(r["stack"], r["layer"], r["head"])
        if head:
            self.head = head

    # ---------------------------------------------------------------- loading
    def _on_head(self, change=None) -> None:
        key = self.head
        if not key:
            self.info = {}
            return
        h = _data.head_info(self.scan, key)
        avail = _data.texts_with_map(self.scan, key)
        with self.hold_sync():
            self.info = clean(h["info"])
            nb = len(h["distance"])
            arr = np.concatenate([h["distance"], h["value"], h["low"], h["high"]]) if nb else np.zeros(0)
            self.profile = arr.astype("<f4").tobytes()
            self.texts = [{"index": i, "name": str(self.scan.texts[i].get("name", f"text {i}"))} for i in avail]
            self._set_findings()
            if self.text not in avail:
                # a new text: whole-text window; otherwise keep the zoom so heads can be compared in place
                self.window = []
                self.text = avail[0] if avail else -1
            self._load_map()

    def _on_map(self, change=None) -> None:
        if change is not None and change["name"] == "text" and change["old"] != change["new"]:
            if self.window:
                self.window = []        # triggers _on_map again
                return
        self._load_map()

    def _load_map(self) -> None:
        mp = _data.map_payload(self.scan, self.head, self.text, self.window or None) if self.head else None
        with self.hold_sync():
            if mp is None:
                self.map_codes, self.map_meta, self.row_labels, self.col_labels, self.top_keys = b"", {}, [], [], []
                return
            self.map_codes = np.ascontiguousarray(mp["q"], dtype=np.uint8).tobytes()
            self.map_meta = {k: clean(mp[k]) for k in ("rows", "cols", "vmax", "max", "clipped", "q0", "q1", "k0",
                                                      "k1", "step_q", "step_k", "T")}
            self.row_labels = mp["row_labels"]
            self.col_labels = mp["col_labels"]
            self.top_keys = [clean(k) for k in mp["top_keys"]]

    # ---------------------------------------------------------------- findings
    def refresh_findings(self, rows: list[dict] | None = None) -> None:
        """Re-read findings (``rows`` from :func:`_data.finding_rows`, else from the store)."""
        self._rows = rows if rows is not None else _data.finding_rows(self.store, self.scan)
        self._set_findings()

    def _set_findings(self) -> None:
        key = self.head
        if not key:
            self.findings = []
            return
        stack, layer, _ = parse_key(key)
        mine = {key, layer_key(stack, layer), "model"}
        # the head's own findings first, then its layer's and the model's
        order = {key: 0, layer_key(stack, layer): 1, "model": 2}
        self.findings = sorted((r for r in self._rows if r["target"] in mine), key=lambda r: order[r["target"]])

    def map_array(self) -> np.ndarray:
        """The map codes currently sent to the browser as a (rows, cols) uint8 array."""
        m = self.map_meta
        if not m:
            return np.zeros((0, 0), np.uint8)
        return np.frombuffer(self.map_codes, np.uint8).reshape(m["rows"], m["cols"])

    def figure(self):
        """The card as a matplotlib figure: weight map with colour bar, profile with band and slope line, split."""
        if not self.head:
            return None
        from . import figures
        return figures.card_figure(self.scan, self.head, self.text if self.text >= 0 else None)

    def summary(self):
        if not self.head:
            return "Head card", ["no head selected"]
        return _data.card_summary(self.scan, self.head)

    def to_html(self) -> str:
        if not self.head:
            return static.style_tag() + '<div class="apx"><p class="apx-none">No head selected.</p></div>'
        return static.card_html(self.scan, self.head, self.text if self.text >= 0 else None, self._rows)
