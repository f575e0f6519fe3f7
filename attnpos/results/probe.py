"""`ProbeResult`: ridge probes for absolute position per hidden layer, with a shuffled control and an untrained
copy, the counting check and (RoPE models) the frequency bands — see :mod:`attnpos.probes` for the method."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..core.protocol import Result, legacy_model
from .bands import BandsResult

CAUTION = (
    "A probe shows that position can be decoded from a layer's hidden states, not that the model uses it "
    "(Hewitt & Liang 2019: compare with the control and the untrained copy). Attention weights, used in the "
    "counting check, are evidence, not explanation (Jain & Wallace 2019; Wiegreffe & Pinter 2019); back a reading "
    "with an intervention such as the shift test or ablating a head."
)


@dataclass(repr=False, eq=False)
class ProbeResult(Result):
    """What :func:`probe` found. ``layers`` holds one dict per hidden-state layer (keys ``layer``, ``r2``,
    ``r2_log``, ``control_r2``, ``selectivity``, ``mae``, ``untrained_r2``, ``alpha``); ``positions`` the range
    of positions covered and the tokens per position; ``counting`` the counting check (causal models);
    ``bands`` the RoPE frequency bands (:func:`attnpos.bands.rope_bands`) when the model has RoPE layers."""

    result_kind = "probe"
    version = 1

    model: dict
    layers: list[dict]
    positions: dict
    settings: dict
    counting: dict | None = None
    bands: BandsResult | None = None
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION

    def payload(self) -> dict:
        out: dict[str, Any] = {"model": self.model, "layers": self.layers, "positions": self.positions,
                               "settings": self.settings}
        if self.counting is not None:
            out["counting"] = self.counting
        if self.bands is not None:
            out["bands"] = self.bands.to_json()
        out["notes"] = self.notes
        out["caution"] = self.caution
        return out

    legacy_keys = frozenset({"layers", "positions", "settings"})
    from_v0 = staticmethod(legacy_model)

    @classmethod
    def from_payload(cls, data: dict) -> "ProbeResult":
        layers = [dict(r) for r in data["layers"]]
        for r in layers:
            int(r["layer"])
        bands = data.get("bands")
        return cls(model=dict(data["model"]), layers=layers, positions=dict(data.get("positions") or {}),
                   settings=dict(data.get("settings") or {}), counting=data.get("counting"),
                   bands=BandsResult.from_json(bands) if bands else None, notes=list(data.get("notes") or []),
                   caution=data.get("caution", CAUTION))

    def table(self) -> pd.DataFrame:
        """One row per hidden-state layer: R² of position and log-position, the control, selectivity, MAE, the
        untrained copy's R² and the chosen penalty."""
        cols = ["layer", "r2", "r2_log", "control_r2", "selectivity", "mae", "untrained_r2", "alpha"]
        return pd.DataFrame([{c: r.get(c) for c in cols} for r in self.layers], columns=cols)

    def headline(self) -> str:
        m = self.model or {}
        return f"position probes of {m.get('name')} ({len(self.layers)} hidden layers)"

    def text(self) -> str:
        """The terminal table."""
        m, p, s = self.model, self.positions, self.settings
        scheme = m["scheme"] if isinstance(m.get("scheme"), str) else ",".join(m.get("scheme") or [])
        lines = [
            f"{m.get('name')}  {m.get('architecture')}  scheme={scheme}  causal={m.get('causal')}",
            f"texts {s['n_texts']} ({s['n_units']} windows), {s['n_tokens']} ordinary tokens; positions "
            f"{p['min']}–{p['max']}, {p['tokens_per_position_min']}–{p['tokens_per_position_max']} tokens per "
            f"position (median {p['tokens_per_position_median']:g}); {s['folds']}-fold split by text",
            "",
            f"{'layer':>5}  {'R² pos':>7}  {'R² log':>7}  {'control':>7}  {'select.':>7}  {'MAE':>7}  "
            f"{'untrained':>9}",
        ]
        lines.append("-" * len(lines[-1]))

        def f(x, w=7, nd=3):
            return ("—" if x is None or not np.isfinite(x) else f"{x:.{nd}f}").rjust(w)

        for r in self.layers:
            lines.append(f"{r['layer']:>5}  {f(r['r2'])}  {f(r['r2_log'])}  {f(r['control_r2'])}  "
                         f"{f(r['selectivity'])}  {f(r['mae'], 7, 1)}  {f(r.get('untrained_r2'), 9)}")
        lines.append("layer 0 = embeddings output; R² is held out by text; control = positions shuffled within "
                     "each text; untrained = same architecture, fresh random weights")
        if self.counting:
            lines.append("")
            lines.append("counting check: " + self.counting["summary"])
        if self.bands:
            lines.append("")
            lines.extend(self.bands.summary_lines())
        for n in self.notes:
            lines.append("notice: " + n)
        lines.append("note: " + self.caution)
        return "\n".join(lines)
