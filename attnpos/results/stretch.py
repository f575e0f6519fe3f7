"""`StretchResult`: a RoPE checkpoint rerun under context-extension variants — per-position loss of each variant,
and per head whether it keeps its job past the training length (see :mod:`attnpos.stretching` for the method)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import keys
from ..core.protocol import Result

CAUTION = (
    "Attention weights are evidence, not explanation (Jain & Wallace 2019; Wiegreffe & Pinter 2019): a head that "
    "'breaks' under a scaling attends differently past the training length; whether the model needed what it did "
    "takes an intervention (ablating the head: attnpos ablate). These variants are applied without fine-tuning, "
    "on these texts only."
)


@dataclass(repr=False, eq=False)
class StretchResult(Result):
    """What :func:`attnpos.stretching.stretch` measured.

    ``variants``: one dict per variant, the unscaled model first (``name``, ``kind``, ``factor``, ``source``,
    ``rope_parameters``, ``attention_factor``, ``loss``/``loss_lo``/``loss_hi`` per position, ``loss_at`` multiples
    of the training length, ``bin_loss``, ``broken`` head count). ``heads``: one dict per head (``key``, ``band``,
    ``reference`` statistics with intervals, role and profile, and per variant name: ``stats``, ``intervals``,
    ``role``, ``broken``, ``reasons``, ``exposure``, ``unseen_share``, ``profile``; ``n_broken`` over the scaled
    variants). ``pairs``: the rotary pairs with each variant's frequency ratio and unseen angles. ``band_verdict``:
    per variant, whether breaks follow the bands."""

    result_kind = "stretch"
    version = 1

    model: dict
    training_length: int
    training_length_source: str
    to: int
    position: list[int]
    variants: list[dict]
    heads: list[dict]
    profile_edges: list[int]
    pairs: list[dict]
    band_verdict: dict
    settings: dict
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION

    def payload(self) -> dict:
        return {"model": self.model, "training_length": self.training_length,
                "training_length_source": self.training_length_source, "to": self.to, "position": self.position,
                "variants": self.variants, "heads": self.heads, "profile_edges": self.profile_edges,
                "pairs": self.pairs, "band_verdict": self.band_verdict, "settings": self.settings,
                "notes": self.notes, "caution": self.caution}

    @classmethod
    def from_payload(cls, data: dict) -> "StretchResult":
        position = [int(p) for p in data["position"]]
        variants = [dict(v) for v in data["variants"]]
        for v in variants:
            str(v["name"])
            for k in ("loss", "loss_lo", "loss_hi"):
                if v.get(k) is not None and len(v[k]) != len(position):
                    raise ValueError(f"{v['name']}: {k} has {len(v[k])} values for {len(position)} positions")
        heads = [dict(h) for h in data["heads"]]
        names = [v["name"] for v in variants]
        for h in heads:
            h["stack"] = keys.normal_stack(h["stack"])
            int(h["layer"]), int(h["head"])
            if sorted(h["variants"]) != sorted(names):
                raise ValueError(f"head {h.get('key')} lacks variants")
        return cls(model=dict(data.get("model") or {}), training_length=int(data["training_length"]),
                   training_length_source=str(data.get("training_length_source") or "unknown"), to=int(data["to"]),
                   position=position, variants=variants, heads=heads,
                   profile_edges=[int(e) for e in data["profile_edges"]], pairs=[dict(p) for p in data["pairs"]],
                   band_verdict=dict(data.get("band_verdict") or {}), settings=dict(data.get("settings") or {}),
                   notes=list(data.get("notes") or []), caution=data.get("caution", CAUTION))

    # ------------------------------------------------------------------ views of the numbers
    @property
    def variant_names(self) -> list[str]:
        return [v["name"] for v in self.variants]

    def variant(self, name: str) -> dict:
        for v in self.variants:
            if v["name"] == name:
                return v
        raise KeyError(f"no variant {name!r} (measured: {', '.join(self.variant_names)})")

    def ranked(self) -> list[dict]:
        """Heads, most often broken first (then by layer and head)."""
        return sorted(self.heads, key=lambda h: (-h["n_broken"], h["layer"], h["head"]))

    def headline(self) -> str:
        m = self.model or {}
        scaled = [v for v in self.variants if v["kind"] != "none"]
        return (f"stretch of {m.get('name')} from {self.training_length} to {self.to} tokens under "
                f"{', '.join(v['name'] for v in scaled)}: {len(self.heads)} heads")

    def table(self) -> pd.DataFrame:
        """One row per head, most often broken first: band, role at the training length, how many scaled variants
        break it, and break/keep per variant (the unscaled model included)."""
        rows = []
        for h in self.ranked():
            r = {"key": h["key"], "band": h.get("band"), "role": h["reference"]["role"], "n_broken": h["n_broken"]}
            for name in self.variant_names:
                r[name] = "break" if h["variants"][name]["broken"] else "keep"
            rows.append(r)
        return pd.DataFrame(rows, columns=["key", "band", "role", "n_broken", *self.variant_names])

    def loss_table(self) -> pd.DataFrame:
        """One row per position, one loss column per variant."""
        data = {"position": self.position}
        for v in self.variants:
            data[v["name"]] = v["loss"] if v.get("loss") is not None else [None] * len(self.position)
        return pd.DataFrame(data).astype(float)

    def rotation_table(self) -> pd.DataFrame:
        """One row per rotary pair (fastest first): its band and wavelength, and per variant the ratio of its
        frequency to the original (1 = untouched) and whether it reaches angles never seen in training."""
        rows = []
        for p in self.pairs:
            r = {"pair": p["pair"], "band": p["band"], "wavelength": p["wavelength"]}
            for n in self.variant_names:
                r[f"{n} ratio"] = (p.get("ratio") or {}).get(n)
                r[f"{n} unseen"] = (p.get("unseen") or {}).get(n)
            rows.append(r)
        return pd.DataFrame(rows)

    def head_bands(self) -> pd.DataFrame:
        """One row per head: its band, high/low energy shares, and per variant break/keep and the energy-weighted
        change of rotation speed (octaves)."""
        rows = []
        for h in self.ranked():
            r = {"key": h["key"], "band": h.get("band"), "high_share": h.get("high_share"),
                 "low_share": h.get("low_share"), "n_broken": h["n_broken"]}
            for n in self.variant_names:
                c = h["variants"][n]
                r[n] = "break" if c["broken"] else "keep"
                r[f"{n} exposure"] = c.get("exposure")
                r[f"{n} unseen"] = c.get("unseen_share")
            rows.append(r)
        return pd.DataFrame(rows)

    def text(self) -> str:
        """The terminal report."""
        m, s, L = self.model, self.settings, self.training_length

        def f(x, nd=3):
            return "—" if x is None or not np.isfinite(x) else f"{x:.{nd}f}"

        lines = [f"{m.get('name')}  {m.get('architecture')}  scheme={m.get('scheme')}",
                 f"{s.get('n_sequences')} sequences of {self.to} tokens; training length {L} "
                 f"({self.training_length_source}); every variant reads the same sequences", ""]
        mult = [k for k in (self.variants[0].get("loss_at") or {})]
        lines.append("next-token loss (nats), mean over the last quarter-length before each multiple of the training "
                     "length, with the 90% bootstrap interval:")
        lines.append(f"{'variant':<22}" + "".join(f"{k:>22}" for k in mult) + f"{'heads broken':>14}")
        for v in self.variants:
            la, li = v.get("loss_at") or {}, v.get("loss_at_interval") or {}
            cells = []
            for k in mult:
                iv = li.get(k)
                cells.append((f"{f(la.get(k))} [{f(iv[0], 2)}, {f(iv[1], 2)}]" if iv else f(la.get(k))).rjust(22))
            broken = str(v.get("broken"))
            lines.append(f"{v['name']:<22}" + "".join(cells) + f"{broken:>14}")
        lines.append("")
        lines.append("heads, most often broken first (reference: the unscaled model inside the training length; "
                     "measured: queries past it):")
        names = self.variant_names
        lines.append(f"{'head':<10}{'band':<8}{'role':<16}{'broken':>7}  " + "  ".join(f"{n:>12}" for n in names))
        for h in self.ranked()[:30]:
            cells = "  ".join(f"{('BREAK' if h['variants'][n]['broken'] else 'keep'):>12}" for n in names)
            lines.append(f"{h['key']:<10}{str(h.get('band') or '—'):<8}{h['reference']['role']:<16}"
                         f"{h['n_broken']:>7}  {cells}")
        if len(self.heads) > 30:
            lines.append(f"… {len(self.heads) - 30} more heads in the JSON")
        shown = [h for h in self.ranked() if h["n_broken"]][:6]
        if shown:
            lines.append("")
            lines.append("why (first heads):")
            for h in shown:
                for n in names:
                    c = h["variants"][n]
                    if c["broken"]:
                        lines.append(f"  {h['key']} {n}: " + "; ".join(c["reasons"]))
        lines.append("")
        lines.append("RoPE bands (Barbero et al. 2025: heads relying on the slow, low-frequency pairs are the ones "
                     "interpolation is expected to disturb):")
        for n in names:
            bv = self.band_verdict.get(n) or {}
            word = {True: "breaks follow the bands", False: "breaks do not follow the bands",
                    None: "cannot tell"}[bv.get("follows")]
            lines.append(f"  {n}: {word} — {bv.get('why', '')}")
        for note in self.notes:
            lines.append("notice: " + note)
        lines.append("note: " + self.caution)
        return "\n".join(lines)
