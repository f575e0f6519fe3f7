"""The findings panel widget: notes on a head, its layer or the model, written through the findings store."""

from __future__ import annotations

import getpass

import anywidget
import traitlets as t

from . import data as _data, static
from ._base import StaticFallback, css, esm
from ..core.keys import layer_key, parse_key

DEFAULT_STATUSES = ("open", "supported", "ruled-out")


def _statuses() -> tuple[str, ...]:
    try:
        from ..findings import STATUSES
        return tuple(STATUSES)
    except ImportError:  # the store module is a later stage; the panel still draws
        return DEFAULT_STATUSES


class FindingsPanel(StaticFallback, anywidget.AnyWidget):
    """Add, edit and remove findings; every change is written through the store at once (atomic, locked),
    so it survives a kernel restart and another kernel's writes. Findings stamped with another fingerprint or
    texts hash are listed as stale.

    ``head`` is the selected head (a linked :class:`Atlas` sets it); a new note goes to that head, its layer
    or the model. From Python::

        panel = FindingsPanel("attnpos-findings.json", scan=scan, head="L1.H0")
        panel.add("previous-token; shift test says relative", status="supported")            # on L1.H0
        panel.add("layer 1 is mostly local", scope="layer")                                   # on L1
    """

    _esm = esm("findings.js")
    _css = css("findings.css")

    rows = t.List(t.Dict()).tag(sync=True)
    head = t.Unicode("").tag(sync=True)
    targets = t.Dict().tag(sync=True)
    statuses = t.List(t.Unicode()).tag(sync=True)
    path = t.Unicode("").tag(sync=True)
    message = t.Unicode("").tag(sync=True)
    version = t.Int(0).tag(sync=True)

    def __init__(self, findings, scan=None, head: str | None = None, author: str | None = None, **kwargs):
        super().__init__(**kwargs)
        self.store = _data.open_store(findings)
        if self.store is None:
            raise ValueError("FindingsPanel needs a findings store or a path to one")
        self.scan = scan
        self.author = author if author is not None else _default_author()
        self.statuses = list(_statuses())
        self.path = str(getattr(self.store, "path", "") or "")
        self.observe(self._on_head, "head")
        self.on_msg(self._on_msg)
        self.head = head or ""
        self._on_head()
        self.refresh()

    # ---------------------------------------------------------------- state
    def _on_head(self, change=None) -> None:
        targets: dict = {"model": "model"}
        if self.head:
            stack, layer, _ = parse_key(self.head)
            targets["head"] = self.head
            targets["layer"] = layer_key(stack, layer)
        self.targets = targets

    def refresh(self) -> None:
        """Re-read the store (another kernel may have written) and tell linked views."""
        self.rows = _data.finding_rows(self.store, self.scan)
        self._ids = {str(f.id): f.id for f in self.store.all()}
        self.version += 1

    def target_for(self, scope: str) -> str:
        if scope in ("head", "layer") and not self.head:
            raise ValueError("no head selected: select one in the atlas, or use scope='model'")
        if scope == "head":
            return self.head
        if scope == "layer":
            return self.targets["layer"]
        if scope == "model":
            return "model"
        parse_key(scope)        # an explicit key such as "L3.H2" or "L3"
        return scope

    # ---------------------------------------------------------------- actions
    def add(self, body: str, status: str = "open", scope: str = "head"):
        """Add a finding on the selected head (``scope="head"``), its layer, the model, or an explicit key."""
        if status not in self.statuses:
            raise ValueError(f"status must be one of {', '.join(self.statuses)}, not {status!r}")
        target = self.target_for(scope)
        m = (self.scan.model or {}) if self.scan is not None else {}
        f = self.store.add(target, body, status=status, fingerprint=m.get("fingerprint"),
                           texts_hash=getattr(self.scan, "texts_hash", None) or None, author=self.author)
        self.refresh()
        return f

    def edit(self, id, body: str | None = None, status: str | None = None):
        if status is not None and status not in self.statuses:
            raise ValueError(f"status must be one of {', '.join(self.statuses)}, not {status!r}")
        kw = {k: v for k, v in (("body", body), ("status", status)) if v is not None}
        f = self.store.update(self._ids.get(str(id), id), **kw)
        self.refresh()
        return f

    def remove(self, id) -> None:
        self.store.remove(self._ids.get(str(id), id))
        self.refresh()

    def _on_msg(self, _widget, content, _buffers) -> None:
        try:
            action = content.get("action")
            if action == "add":
                self.add(str(content.get("body", "")), status=str(content.get("status") or self.statuses[0]),
                         scope=str(content.get("scope") or "head"))
            elif action == "edit":
                self.edit(content.get("id"), body=content.get("body"), status=content.get("status"))
            elif action == "remove":
                self.remove(content.get("id"))
            elif action == "refresh":
                self.refresh()
            else:
                raise ValueError(f"unknown action {action!r}")
            self.message = ""
        except Exception as exc:  # shown in the panel; the kernel keeps running
            self.message = f"could not {content.get('action', 'do that')}: {exc}"

    def to_html(self) -> str:
        return static.findings_table_html(self.rows, self.path or None)

    def figure(self):
        return None          # a table of notes: its static form is the text

    def summary(self):
        return _data.findings_summary(self.rows, self.path or None)


def _default_author() -> str | None:
    try:
        return getpass.getuser()
    except Exception:
        return None
