"""`Scan`: what a full scan produced, in one object that views, the report and the JSON share.

The pipeline that fills it lives in :mod:`attnpos.scan`; this module only holds the container and its JSON form
(schema ``attnpos.scan/1``), so that views and the report can load a saved scan without running a model.

Example::

    >>> import attnpos
    >>> scan = attnpos.scan("ref:rope")                 # doctest: +SKIP
    >>> scan.heads[["layer", "head", "role"]].head()     # doctest: +SKIP
    >>> scan.save("rope-scan.json"); again = attnpos.Scan.load("rope-scan.json")   # doctest: +SKIP
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import AttnposError

SCHEMA = "attnpos.scan/1"

CAUTION = (
    "Attention weights are evidence, not explanation: a head that looks at the previous token may not use what "
    "it reads (Jain & Wallace 2019; Wiegreffe & Pinter 2019). Back a role with an intervention (the shift test "
    "here, or ablating the head: attnpos ablate) before concluding."
)

# Columns of the head table, in order. Numeric columns hold NaN when a measurement was not made.
HEAD_COLUMNS = [
    "stack", "layer", "head", "role", "tags", "evidence",
    "mass_previous", "mass_next", "mass_first", "mass_self",
    "share_distance", "share_slot", "share_content", "share_residual",
    "share_distance_lo", "share_distance_hi", "share_slot_lo", "share_slot_hi",
    "share_content_lo", "share_content_hi", "share_residual_lo", "share_residual_hi",
    "slope", "slope_lo", "slope_hi",
    "entropy_ratio", "anchor_slot", "anchor_weight", "induction",
    "shift_kind", "shift_offset", "shift_change", "shift_verdict",
]

SHARE_PARTS = ("distance", "slot", "content", "residual")


def json_safe(x: Any) -> Any:
    """JSON-safe value (for files and widget state alike): NaN/inf become None, numpy scalars and arrays become
    Python numbers and lists, dict keys become strings."""
    if isinstance(x, (np.floating, float)):
        x = float(x)
        return None if not math.isfinite(x) else x
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    if isinstance(x, np.ndarray):
        return [json_safe(v) for v in x.tolist()]
    if isinstance(x, (list, tuple)):
        return [json_safe(v) for v in x]
    if isinstance(x, dict):
        return {str(k): json_safe(v) for k, v in x.items()}
    return x


def _num(x: Any) -> float:
    return float("nan") if x is None else float(x)


@dataclass
class Scan:
    """The result of :func:`attnpos.scan`.

    Attributes:
        model: facts about the subject: ``path``, ``name``, ``architecture``, ``scheme`` (one name, or a list
            per layer), ``layers``, ``heads``, ``causal``, ``fingerprint``, ``context_limit``,
            ``training_length``, ``capture`` (``"registry"`` or ``"eager-weights"``), ``score_kind``
            (``"scores"`` or ``"log-weights"``).
        texts: one dict per text unit: ``name``, ``source``, ``n_tokens``, ``window`` (``[start, end]`` in the
            source's tokens, or None).
        tokens: display strings per text unit (user text: escape before rendering).
        special: indices of special tokens (BOS/CLS/SEP) per text unit.
        heads: the head table (pandas DataFrame, one row per stack × layer × head, columns ``HEAD_COLUMNS``).
        profile: ``{"distance": (nb,), "value": (n_heads, nb), "low": ..., "high": ...}``; rows follow ``heads``.
        maps: kept weight maps, ``{(text, stack, layer, head): (T, T) float32 array}``.
        texts_hash: hash of the token ids of all texts, for findings.
        versions: library versions.
        extra: anything a later stage adds (e.g. probe results), JSON-safe.
    """

    model: dict
    texts: list[dict]
    tokens: list[list[str]]
    special: list[list[int]]
    heads: pd.DataFrame
    profile: dict = field(default_factory=dict)
    maps: dict = field(default_factory=dict)
    texts_hash: str = ""
    versions: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)
    caution: str = CAUTION

    # ---------------------------------------------------------------- access
    def head(self, layer: int, head: int, stack: str | None = None) -> pd.Series:
        """The head table row of one head."""
        t = self.heads
        sel = (t["layer"] == layer) & (t["head"] == head)
        if stack is not None:
            sel &= t["stack"] == stack
        rows = t[sel]
        if rows.empty:
            raise AttnposError(f"No head L{layer}.H{head} in this scan (it has {self.model.get('layers')} layers "
                               f"and {self.model.get('heads')} heads per layer).")
        return rows.iloc[0]

    def head_profile(self, layer: int, head: int, stack: str | None = None) -> pd.DataFrame:
        """The distance profile of one head as a small table: distance, value, low, high."""
        row = self.head(layer, head, stack)
        i = int(row.name)
        out = {"distance": self.profile["distance"]}
        for k in ("value", "low", "high"):
            if k in self.profile:
                out[k] = self.profile[k][i]
        return pd.DataFrame(out)

    def weight_map(self, text: int, layer: int, head: int, stack: str = "main") -> np.ndarray | None:
        """The kept weight map (queries × keys) of one head on one text, or None if it was not kept."""
        return self.maps.get((text, stack, layer, head))

    def role_counts(self) -> dict:
        return self.heads["role"].value_counts().to_dict()

    # ---------------------------------------------------------------- JSON
    def to_json(self) -> dict:
        """The scan as a JSON-safe dict (schema ``attnpos.scan/1``); kept maps are not included."""
        heads = []
        prof = self.profile or {}
        for i, r in self.heads.reset_index(drop=True).iterrows():
            e: dict[str, Any] = {
                "stack": r["stack"], "layer": int(r["layer"]), "head": int(r["head"]),
                "role": r.get("role"), "tags": list(r.get("tags") or []), "evidence": r.get("evidence"),
                "mass": {k: r.get(f"mass_{k}") for k in ("previous", "next", "first", "self")},
                "shares": {k: r.get(f"share_{k}") for k in SHARE_PARTS},
                "shares_interval": {k: [r.get(f"share_{k}_lo"), r.get(f"share_{k}_hi")] for k in SHARE_PARTS},
                "slope": r.get("slope"), "slope_interval": [r.get("slope_lo"), r.get("slope_hi")],
                "entropy_ratio": r.get("entropy_ratio"),
                "anchor": {"slot": r.get("anchor_slot"), "weight": r.get("anchor_weight")},
                "induction": r.get("induction"),
                "shift": {"kind": r.get("shift_kind"), "offset": r.get("shift_offset"),
                          "change": r.get("shift_change"), "verdict": r.get("shift_verdict")},
            }
            if "value" in prof:
                e["profile"] = {"distance": prof["distance"], "value": prof["value"][i],
                                "low": prof["low"][i] if "low" in prof else None,
                                "high": prof["high"][i] if "high" in prof else None}
            heads.append(e)
        return json_safe({
            "schema": SCHEMA,
            "model": self.model,
            "versions": self.versions,
            "texts": self.texts,
            "texts_hash": self.texts_hash,
            "tokens": self.tokens,
            "special": self.special,
            "heads": heads,
            "extra": self.extra,
            "caution": self.caution,
        })

    def save(self, path: str | Path) -> Path:
        path = Path(path)
        path.write_text(json.dumps(self.to_json(), indent=1, ensure_ascii=False), encoding="utf-8")
        return path

    @classmethod
    def from_json(cls, data: dict | str | Path) -> "Scan":
        """Rebuild a scan from its JSON (a dict, or a path to a file written by :meth:`save`)."""
        if not isinstance(data, dict):
            p = Path(data)
            try:
                data = json.loads(p.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                raise AttnposError(f"Could not read the scan file {p}: {exc}. Write it again with "
                                   "`attnpos scan MODEL --json OUT`.") from None
        if data.get("schema") != SCHEMA:
            raise AttnposError(f"This file is not an attnpos scan of schema {SCHEMA} (found "
                               f"{data.get('schema')!r}); rescan with this version of attnpos.")
        rows = []
        values, lows, highs, distance = [], [], [], None
        for e in data["heads"]:
            r = {"stack": e["stack"], "layer": e["layer"], "head": e["head"], "role": e.get("role"),
                 "tags": list(e.get("tags") or []), "evidence": e.get("evidence")}
            for k in ("previous", "next", "first", "self"):
                r[f"mass_{k}"] = _num((e.get("mass") or {}).get(k))
            for k in SHARE_PARTS:
                r[f"share_{k}"] = _num((e.get("shares") or {}).get(k))
                lo, hi = ((e.get("shares_interval") or {}).get(k) or [None, None])
                r[f"share_{k}_lo"], r[f"share_{k}_hi"] = _num(lo), _num(hi)
            r["slope"] = _num(e.get("slope"))
            lo, hi = e.get("slope_interval") or [None, None]
            r["slope_lo"], r["slope_hi"] = _num(lo), _num(hi)
            r["entropy_ratio"] = _num(e.get("entropy_ratio"))
            r["anchor_slot"] = _num((e.get("anchor") or {}).get("slot"))
            r["anchor_weight"] = _num((e.get("anchor") or {}).get("weight"))
            r["induction"] = _num(e.get("induction"))
            sh = e.get("shift") or {}
            r["shift_kind"], r["shift_offset"] = sh.get("kind"), _num(sh.get("offset"))
            r["shift_change"], r["shift_verdict"] = _num(sh.get("change")), sh.get("verdict")
            rows.append(r)
            if e.get("profile"):
                distance = e["profile"]["distance"]
                values.append([_num(v) for v in e["profile"]["value"]])
                lows.append([_num(v) for v in (e["profile"].get("low") or [None] * len(distance))])
                highs.append([_num(v) for v in (e["profile"].get("high") or [None] * len(distance))])
        heads = pd.DataFrame(rows, columns=HEAD_COLUMNS)
        profile = {}
        if distance is not None and len(values) == len(rows):
            profile = {"distance": np.asarray(distance, dtype=float), "value": np.asarray(values, dtype=float),
                       "low": np.asarray(lows, dtype=float), "high": np.asarray(highs, dtype=float)}
        return cls(model=data["model"], texts=data["texts"], tokens=data["tokens"],
                   special=data.get("special") or [[] for _ in data["texts"]], heads=heads, profile=profile,
                   texts_hash=data.get("texts_hash", ""), versions=data.get("versions", {}),
                   extra=data.get("extra", {}), caution=data.get("caution", CAUTION))

    load = from_json
