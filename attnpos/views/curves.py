"""The curves widget: position probes per layer and behaviour past the training length."""

from __future__ import annotations

import anywidget
import numpy as np
import traitlets as t

from . import common as _common, data as _data, static
from ._base import StaticFallback, css, esm


class Curves(StaticFallback, anywidget.AnyWidget):
    """Probe R² per layer with the shuffled-label control and the untrained copy (an attached probe result,
    ``scan.attach(attnpos.probes.probe(...))``), the loss per position with its interval band and the training
    length, and the mean attention entropy by query position (an attached length result). What was not measured
    says "not measured".

    ``series`` describes the columns (``{"probe": {"fields": [...], "n": n}, "length": {...}, "entropy": {...}}``,
    None when absent); ``probe_values`` / ``length_values`` / ``entropy_values`` hold them as float32 buffers, one
    column after another.

    Example::

        Curves(scan)
    """

    _esm = esm("curves.js")
    _css = css("curves.css")

    series = t.Dict().tag(sync=True)
    probe_values = t.Bytes(b"").tag(sync=True)
    length_values = t.Bytes(b"").tag(sync=True)
    entropy_values = t.Bytes(b"").tag(sync=True)
    caution = t.Unicode("").tag(sync=True)

    def __init__(self, scan, **kwargs):
        super().__init__(**kwargs)
        self.scan = scan
        self.refresh()

    def refresh(self) -> None:
        """Re-read the scan's attached results (e.g. after a probe was attached)."""
        c = _data.curves_data(self.scan)
        series: dict = {"probe": None, "length": None, "entropy": None}
        pv, lv, ev = b"", b"", b""
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
        if c["entropy"] is not None:
            en = c["entropy"]
            tl = en.get("training_length")
            series["entropy"] = {"fields": ["position", "entropy"], "n": int(len(en["position"])),
                                 "training_length": float(tl) if _common.finite(tl) else None}
            ev = np.concatenate([en["position"], en["entropy"]]).astype("<f4").tobytes()
        with self.hold_sync():
            self.series = series
            self.probe_values = pv
            self.length_values = lv
            self.entropy_values = ev
            self.caution = self.scan.caution or ""

    def column(self, part: str, field: str) -> np.ndarray:
        """One synced column decoded back (``part`` is "probe", "length" or "entropy")."""
        meta = self.series.get(part)
        if not meta:
            raise KeyError(f"{part} was not measured")
        buf = np.frombuffer({"probe": self.probe_values, "length": self.length_values,
                             "entropy": self.entropy_values}[part], "<f4")
        k = meta["fields"].index(field)
        return buf[k * meta["n"]:(k + 1) * meta["n"]]

    def to_html(self) -> str:
        return static.curves_html(self.scan)

    def figure(self):
        """What was measured, as a matplotlib figure; None when nothing was (no empty picture)."""
        from . import figures
        return figures.curves_figure(self.scan)

    def summary(self):
        return _data.curves_summary(self.scan)
