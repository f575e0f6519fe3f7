"""The atlas widget: every head at once, role colour + written role, profile sparkline, finding marks."""

from __future__ import annotations

import anywidget
import numpy as np
import traitlets as t

from . import data as _data, static
from ._base import StaticFallback, css, esm
from .common import role_palette


class Atlas(StaticFallback, anywidget.AnyWidget):
    """All heads of a scan as a layers × heads grid.

    Hover a cell for its evidence numbers; click it (or focus the grid, move with the arrow keys and press
    Enter) to select it: ``atlas.selected`` holds the head's key (``"L3.H2"``, ``"decoder:L1.H0"``).

    Example::

        atlas = Atlas(scan)
        atlas.observe(lambda ch: print(ch["new"]), "selected")
        atlas                       # in a notebook cell

    Numbers travel as binary buffers: ``cells`` (int32 cell number per head = row × n_cols + head),
    ``roles`` (uint8: 0 unknown, 1.. the role in :func:`attnpos.core.roles.names` order), ``numbers`` (float32, heads ×
    ``grid["fields"]``, NaN = not measured), ``spark`` (uint8 heads × points, the distance profile scaled to
    0..254 per head, 255 = missing).
    """

    _esm = esm("atlas.js")
    _css = css("atlas.css")

    grid = t.Dict().tag(sync=True)
    cells = t.Bytes(b"").tag(sync=True)
    roles = t.Bytes(b"").tag(sync=True)
    numbers = t.Bytes(b"").tag(sync=True)
    spark = t.Bytes(b"").tag(sync=True)
    evidence = t.List(t.Unicode()).tag(sync=True)
    tags = t.List(t.Unicode()).tag(sync=True)
    verdicts = t.List(t.Unicode()).tag(sync=True)
    cell_keys = t.List(t.Unicode()).tag(sync=True)
    marks = t.Dict().tag(sync=True)
    selected = t.Unicode("").tag(sync=True)
    strength = t.Bytes(b"").tag(sync=True)
    layer_of = t.Bytes(b"").tag(sync=True)
    filters = t.Dict().tag(sync=True)
    caution = t.Unicode("").tag(sync=True)

    def __init__(self, scan, findings=None, selected: str | None = None, **kwargs):
        super().__init__(**kwargs)
        self.scan = scan
        self.store = _data.open_store(findings)
        self._load(scan)
        self.refresh_marks()
        if selected:
            self.selected = selected

    # ---------------------------------------------------------------- data
    def _load(self, scan) -> None:
        d = _data.atlas_data(scan)
        self._data = d
        self._keys = d["keys"]
        m = scan.model or {}
        title = f'{m.get("name") or m.get("path") or "model"} · scheme {m.get("scheme") or "—"}'
        with self.hold_sync():
            self.grid = {"rows": d["rows"], "n_cols": d["n_cols"], "fields": d["fields"], "layout": d["layout"],
                         "palette": role_palette(), "title": title,
                         "spark_distance": [float(x) for x in d["spark_distance"]]}
            self.cells = d["cells"].astype("<i4").tobytes()
            self.roles = d["roles"].astype(np.uint8).tobytes()
            self.numbers = d["numbers"].astype("<f4").tobytes()
            self.spark = np.ascontiguousarray(d["spark"], dtype=np.uint8).tobytes()
            self.evidence = d["evidence"]
            self.tags = d["tags"]
            self.verdicts = d["verdicts"]
            self.cell_keys = list(d["keys"])
            self.strength = d["strength"].astype("<f4").tobytes()
            self.layer_of = d["layers"].astype("<i4").tobytes()
            self.caution = scan.caution or ""

    @property
    def head_keys(self) -> list[str]:
        """Head keys in the order of ``scan.heads`` (and of the binary buffers)."""
        return list(self._keys)

    def decoded(self) -> dict:
        """The synced buffers decoded back into numpy arrays (what the browser sees)."""
        n = len(self._keys)
        return {"cells": np.frombuffer(self.cells, "<i4"), "roles": np.frombuffer(self.roles, np.uint8),
                "numbers": np.frombuffer(self.numbers, "<f4").reshape(n, -1),
                "spark": np.frombuffer(self.spark, np.uint8).reshape(n, -1) if n else np.zeros((0, 0), np.uint8)}

    def refresh_marks(self, rows: list[dict] | None = None) -> None:
        """Recompute the finding marks (from ``rows`` of :func:`_data.finding_rows`, else from the store)."""
        if rows is None:
            rows = _data.finding_rows(self.store, self.scan)
        self.marks = _data.marks_from(rows)

    def filter(self, roles=None, layers=None, strength=None) -> None:
        """Fade the heads that do not match (in the widget and in its picture): ``roles`` a list of role names,
        ``layers`` a ``(first, last)`` range, ``strength`` the least value of each role's own strength column
        (e.g. ``mass_previous`` for previous-token heads). ``atlas.filter()`` clears the filter."""
        f = {}
        if roles is not None:
            f["roles"] = [str(r) for r in ([roles] if isinstance(roles, str) else roles)]
        if layers is not None:
            lo, hi = layers
            f["layers"] = [int(lo), int(hi)]
        if strength is not None:
            f["strength"] = float(strength)
        self.filters = f

    def kept(self):
        """Which heads the current filter keeps (a boolean per head, in the order of :attr:`head_keys`)."""
        return _data.atlas_keep(self._data, self.filters)

    def select(self, key: str) -> None:
        if key not in self._keys:
            raise KeyError(f"no head {key} in this scan")
        self.selected = key

    def to_html(self) -> str:
        return static.atlas_html(self.scan, self.marks, self.selected or None)

    def figure(self):
        """The atlas as a matplotlib figure (the same cells, words and legend; heads the filter leaves out are
        faded)."""
        from . import figures
        return figures.atlas_figure(self.scan, self.marks, self.selected or None, keep=self.kept())

    def summary(self):
        return _data.atlas_summary(self.scan, self.marks)
