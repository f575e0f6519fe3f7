"""`BandsResult`: per RoPE head, the share of q·k energy carried by each rotary frequency pair (see
:mod:`attnpos.bands` for the method)."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from ..core import keys
from ..core.protocol import Result

CAUTION = ("Energy shares say which rotary frequencies carry a head's scores on these texts, which is evidence, "
           "not explanation: confirm with an intervention (e.g. zeroing the pairs of one band and re-running).")


@dataclass(repr=False, eq=False)
class BandsResult(Result):
    """``heads``: one dict per RoPE head (``stack``, ``layer``, ``head``, ``shares`` per pair, ``unrotated_share``,
    ``high_share``, ``low_share``, ``beyond_context_share``, ``dominant_pair``, ``dominant_wavelength``, ``band`` —
    by energy —, ``removal`` ``{band: {"tv", "previous", "first"}}`` and ``used_band`` — by intervention; files of
    version 1 lack the last two);
    ``pairs``: one dict per rotary pair (``pair``, ``dims``, ``theta``, ``wavelength``, ``band``); ``layout``
    (``"half"`` or ``"interleaved"``), ``rotary_dims``, ``head_dim``, ``context`` (the longest text), and how
    energy and bands are defined."""

    result_kind = "bands"
    version = 1

    heads: list[dict]
    pairs: list[dict]
    layout: str
    rotary_dims: int
    head_dim: int
    context: int
    n_texts: int
    model: dict = field(default_factory=dict)
    definitions: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    source: str = "Barbero et al. 2025"
    caution: str = CAUTION

    def by_band(self) -> dict[str, list[str]]:
        """Head keys per band (``high``, ``low``, ``spread``)."""
        out: dict[str, list[str]] = {"high": [], "low": [], "spread": []}
        for h in self.heads:
            out.setdefault(h["band"], []).append(keys.head_key(h["stack"], h["layer"], h["head"]))
        return out

    def by_use(self) -> dict[str, list[str]]:
        """Head keys per band the head uses (whose removal changes its weights most; ``high``, ``middle``, ``low``)."""
        out: dict[str, list[str]] = {"high": [], "middle": [], "low": []}
        for h in self.heads:
            if h.get("used_band"):
                out.setdefault(h["used_band"], []).append(keys.head_key(h["stack"], h["layer"], h["head"]))
        return out

    def headline(self) -> str:
        counts = ", ".join(f"{b} {len(v)}" for b, v in self.by_band().items())
        return f"RoPE frequency bands of {len(self.heads)} heads ({len(self.pairs)} pairs each): {counts}"

    def table(self) -> pd.DataFrame:
        cols = ["key", "stack", "layer", "head", "band", "high_share", "low_share", "beyond_context_share",
                "dominant_pair", "dominant_wavelength", "unrotated_share", "used_band"]
        removal = [f"removal_{b}_{m}" for b in ("high", "middle", "low") for m in ("tv", "previous", "first")]
        rows = []
        for h in self.heads:
            r = {"key": keys.head_key(h["stack"], h["layer"], h["head"]), **{c: h.get(c) for c in cols[1:]}}
            for b, d in (h.get("removal") or {}).items():
                for m, v in d.items():
                    r[f"removal_{b}_{m}"] = v
            rows.append(r)
        return pd.DataFrame(rows, columns=cols + removal)

    def summary_lines(self) -> list[str]:
        """Terminal lines: the bands and the heads in each (listed compactly, per layer)."""
        s = self.by_band()
        hi = [p for p in self.pairs if p["band"] == "high"]
        lo = [p for p in self.pairs if p["band"] == "low"]
        fmt = lambda ps: (f"pairs {ps[0]['pair']}–{ps[-1]['pair']}, wavelengths "   # noqa: E731
                          f"{min(p['wavelength'] for p in ps):.3g}–{max(p['wavelength'] for p in ps):.3g} tokens"
                          if ps else "—")
        out = [f"RoPE bands ({len(self.pairs)} pairs per head, {self.layout} layout; energy = mean squared pair "
               "contribution to q·k):"]
        for name, what in (("high", f"high band ({fmt(hi)})"), ("low", f"low band ({fmt(lo)})"),
                           ("spread", "spread")):
            out += _listed(what, list(s[name]))
        u = self.by_use()
        if any(u.values()):
            out.append("used, by intervention (the band whose removal changes a head's weights most):")
            for b, v in u.items():
                out += _listed(b, list(v))
        return out

    def text(self) -> str:
        return "\n".join(self.summary_lines() + [f"notice: {n}" for n in self.notes] + [f"note: {self.caution}"])

    def payload(self) -> dict:
        return {"model": self.model, "heads": self.heads, "pairs": self.pairs, "layout": self.layout,
                "rotary_dims": self.rotary_dims, "head_dim": self.head_dim, "context": self.context,
                "n_texts": self.n_texts, "definitions": self.definitions, "notes": self.notes, "source": self.source}

    legacy_keys = frozenset({"pairs", "layout", "heads"})

    @classmethod
    def from_v0(cls, data: dict) -> dict:
        data["definitions"] = {"energy": data.pop("energy", None), "bands": data.pop("bands", None)}
        data.pop("summary", None)
        return data

    @classmethod
    def from_payload(cls, data: dict) -> "BandsResult":
        heads = [dict(h) for h in data["heads"]]
        for h in heads:
            h["stack"] = keys.normal_stack(h["stack"])
            int(h["layer"]), int(h["head"])
        return cls(heads=heads, pairs=[dict(p) for p in data["pairs"]], layout=str(data["layout"]),
                   rotary_dims=int(data["rotary_dims"]), head_dim=int(data["head_dim"]), context=int(data["context"]),
                   n_texts=int(data.get("n_texts") or 0), model=dict(data.get("model") or {}),
                   definitions=dict(data.get("definitions") or {}), notes=list(data.get("notes") or []),
                   source=str(data.get("source") or "Barbero et al. 2025"), caution=data.get("caution", CAUTION))


def _listed(what: str, ks: list) -> list[str]:
    """A short list of heads on the line itself; a long one (hundreds of heads) wrapped, a layer never split."""
    if not ks:
        return [f"  {what}: no head"]
    lines = keys.compact_lines(ks)
    if len(lines) == 1 and len(lines[0]) + len(what) < 90:
        return [f"  {what}: {lines[0].strip()}"]
    return [f"  {what}: {len(ks)} heads", *lines]
