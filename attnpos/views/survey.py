"""The survey: atlas, head card, findings panel and curves, linked."""

from __future__ import annotations

from pathlib import Path

import ipywidgets

from . import data as _data, static
from ._base import StaticFallback
from .atlas import Atlas
from .card import HeadCard
from .curves import Curves
from .findings_panel import FindingsPanel

DEFAULT_FINDINGS = "attnpos-findings.json"


class Survey(StaticFallback, ipywidgets.VBox):
    """Atlas + head card + findings panel + curves for one scan, linked: selecting a head in the atlas opens
    it in the card and points the findings panel at it; a finding written in the panel marks the atlas and
    the card at once.

    Args:
        scan: a :class:`attnpos.Scan`.
        findings: a findings store, a path to its JSON file, or None for ``attnpos-findings.json`` beside the
            notebook (the kernel's working directory); ``False`` for no findings panel.
        head: the head to open first (default: the first head of the table).
        text: the text whose weight maps the card shows first.

    Example::

        from attnpos.views import Survey
        Survey(scan)                           # last expression of a notebook cell
    """

    def __init__(self, scan, findings=None, head: str | None = None, text: int | None = None,
                 author: str | None = None, **kwargs):
        self.scan = scan
        if findings is None:
            findings = Path(DEFAULT_FINDINGS)
        self.store = _data.open_store(findings) if findings is not False else None
        self.atlas = Atlas(scan, findings=self.store, selected=head)
        if not self.atlas.selected and self.atlas.head_keys:
            self.atlas.selected = self.atlas.head_keys[0]
        self.card = HeadCard(scan, head=self.atlas.selected or None, text=text, findings=self.store)
        self.panel = (FindingsPanel(self.store, scan=scan, head=self.atlas.selected, author=author)
                      if self.store is not None else None)
        self.curves = Curves(scan)
        self.atlas.observe(self._on_select, "selected")
        if self.panel is not None:
            self.panel.observe(self._on_findings, "version")
        children = [self.atlas, self.card] + ([self.panel] if self.panel is not None else []) + [self.curves]
        super().__init__(children=children, **kwargs)
        self.add_class("ap-survey")

    def _on_select(self, change) -> None:
        key = change["new"]
        if not key:
            return
        self.card.head = key
        if self.panel is not None:
            self.panel.head = key

    def _on_findings(self, change=None) -> None:
        rows = self.panel.rows
        self.atlas.refresh_marks(rows)
        self.card.refresh_findings(rows)

    def select(self, key: str) -> None:
        self.atlas.select(key)

    def figure(self):
        """The atlas as a matplotlib figure (``survey.card.figure()`` and ``survey.curves.figure()`` are the
        others)."""
        return self.atlas.figure()

    def _pictures(self):
        # one picture of everything the survey shows: the atlas, the open card and the curves (if measured)
        from . import figures
        return figures.stack([self.atlas.figure(), self.card.figure(), self.curves.figure()]), ""

    def summary(self):
        title, lines = self.atlas.summary()
        parts = [title] + lines
        if self.card.head:
            t, ls = self.card.summary()
            parts += [t + ":"] + ls
        if self.panel is not None:
            t, ls = self.panel.summary()
            parts += [t + ":"] + ls
        t, ls = self.curves.summary()
        return "Survey — atlas, head card, findings and curves", parts + ls

    def to_html(self) -> str:
        rows = self.panel.rows if self.panel is not None else []
        # the caution once, at the end (each view alone carries its own)
        parts = [static.atlas_html(self.scan, self.atlas.marks, self.atlas.selected or None, caution=False),
                 static.card_html(self.scan, self.card.head, self.card.text if self.card.text >= 0 else None, rows,
                                  with_style=False, caution=False) if self.card.head else ""]
        if self.panel is not None:
            parts.append(static.findings_table_html(rows, self.panel.path or None, with_style=False))
        parts.append(static.curves_html(self.scan, with_style=False, caution=False))
        parts.append(static.caution_html(self.scan.caution))
        return "".join(parts)


def survey(scan, findings=None, head: str | None = None, text: int | None = None) -> Survey:
    """Shorthand for :class:`Survey`."""
    return Survey(scan, findings=findings, head=head, text=text)
