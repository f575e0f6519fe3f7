"""The curves widget: position probes per layer and behaviour past the training length."""

from __future__ import annotations

import anywidget
import numpy as np
import traitlets as t

from . import _common, _data, static
from ._base import StaticFallback, css, esm


class Curves(StaticFallback, anywidget.AnyWidget):
    """Probe R² per layer with the shuffled-label control and the untrained copy (``scan.extra["probe"]``),
    and the loss per position with its interval band and the training length (``scan.extra["length"]``).
    What was not measured says "not measured".

    ``series`` describes the columns (``{"probe": {"fields": [...], "n": n}, "length": {...}}``, None when
    absent); ``probe_values`` / ``length_values`` hold them as float32 buffers, one column after another.

    Example::

        Curves(scan)
    """

    _esm = esm("curves.js")
    _css = css("curves.css")

    series = t.Dict().tag(sync=True)
    probe_values = t.Bytes(b"").tag(sync=True)
    length_values = t.Bytes(b"").tag(sync=True)
    caution = t.Unicode("").tag(sync=True)

    def __init__(self, scan, **kwargs):
        super().__init__(**kwargs)
        self.scan = scan
        self.refresh()

    def refresh(self) -> None:
        """Re-read ``scan.extra`` (e.g. after probes were added to the scan)."""
        c = _data.curves_data(self.scan)
        series: dict = {"probe": None, "length": None}
        pv, lv = b"", b""
        if c["probe"] is not None:
            fields = list(c["probe"])
            series["probe"] = {"fields": fields, "n": int(len(c["probe"]["layer"]))}
            pv = np.concatenate([c["probe"][f] for f in fields]).astype("<f4").tobytes()
        if c["length"] is not None:
            ln = c["length"]
            fields = [k for k in ln if k != "training_length"]
            tl = ln.get("training_length")
            series["length"] = {"fields": fields, "n": int(len(ln["position"])),
                                "training_length": float(tl) if _common.finite(tl) else None}
            lv = np.concatenate([ln[f] for f in fields]).astype("<f4").tobytes()
        with self.hold_sync():
            self.series = series
            self.probe_values = pv
            self.length_values = lv
            self.caution = self.scan.caution or ""

    def column(self, part: str, field: str) -> np.ndarray:
        """One synced column decoded back (``part`` is "probe" or "length")."""
        meta = self.series.get(part)
        if not meta:
            raise KeyError(f"{part} was not measured")
        buf = np.frombuffer(self.probe_values if part == "probe" else self.length_values, "<f4")
        k = meta["fields"].index(field)
        return buf[k * meta["n"]:(k + 1) * meta["n"]]

    def to_html(self) -> str:
        return static.curves_html(self.scan)
