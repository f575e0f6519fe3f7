"""`ShiftResult`: the shift test of every head (see :mod:`attnpos.shift`): which shifts ran, by how much, the change
of each head's weights under each shift, and the verdicts."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core.protocol import CAUTION, Result
from . import _sites

NO_POSITION = "no-position"


def combine(words) -> str:
    """One head's verdict over several shifts: no-position if the head is near-uniform, absolute if any shift says
    so, relative if all do, else mixed."""
    words = [w for w in words if w and w != "n/a"]
    if not words:
        return "n/a"
    if NO_POSITION in words:
        return NO_POSITION
    if "absolute" in words:
        return "absolute"
    if all(w == "relative" for w in words):
        return "relative"
    return "mixed"


@dataclass(repr=False, eq=False)
class ShiftResult(Result):
    """``kinds`` (the shifts that ran, from ``position-ids`` and ``prefix``), ``offset``, ``changes``
    (``{kind: {(stack, layer): (heads,)}}`` mean total-variation change, None when the test could not run),
    ``verdicts`` (``{kind: {(stack, layer): [word per head]}}``), ``spread`` (``{(stack, layer): (heads,)}``: mean
    total-variation distance of the unshifted weights from uniform; None in files of version 1) and ``note``.

    ``change`` and ``verdict`` are the per-head summary over the shifts: the largest change, and the combined verdict
    (absolute if any shift says so, relative if all do, no-position for near-uniform heads, else mixed)."""

    result_kind = "shift"
    version = 2

    kinds: list
    offset: int
    changes: dict | None
    verdicts: dict = field(default_factory=dict)
    spread: dict | None = None
    note: str | None = None
    n_texts: int = 0
    max_tokens: int = 0
    caution: str = CAUTION

    def __post_init__(self):
        self.kinds = list(self.kinds)

    @property
    def measured(self) -> bool:
        return self.changes is not None

    @property
    def shift_kind(self) -> str:
        """The shifts that ran, as the head table writes them (``prefix``, ``position-ids+prefix``)."""
        return "+".join(self.kinds)

    @property
    def change(self) -> dict | None:
        """Per site, the largest change over the shifts that ran."""
        if not self.measured:
            return None
        sites = list(next(iter(self.changes.values()))) if self.changes else []
        return {s: np.max(np.stack([np.asarray(self.changes[k][s], dtype=float) for k in self.changes]), 0)
                for s in sites}

    @property
    def verdict(self) -> dict:
        """Per site, the combined verdict of each head."""
        if not self.measured:
            return {}
        out = {}
        for s in (self.change or {}):
            per = [self.verdicts.get(k, {}).get(s) or [] for k in self.changes]
            H = len(self.change[s])
            out[s] = [combine([v[h] if h < len(v) else None for v in per]) for h in range(H)]
        return out

    def change_of(self, site: tuple, head: int, kind: str | None = None) -> float:
        if not self.measured:
            return math.nan
        src = self.change if kind is None else self.changes.get(kind)
        if src is None or site not in src:
            return math.nan
        return float(src[site][head])

    def verdict_of(self, site: tuple, head: int, kind: str | None = None) -> str | None:
        if not self.measured:
            return None
        src = self.verdict if kind is None else self.verdicts.get(kind, {})
        if site not in src:
            return None
        return src[site][head]

    def headline(self) -> str:
        if not self.measured:
            return f"shift test ({self.shift_kind} by {self.offset}) not run: {self.note}"
        return f"shift test: {' and '.join(self.kinds)} moved by {self.offset} on {self.n_texts} texts"

    def table(self) -> pd.DataFrame:
        cols = ["key", "stack", "layer", "head", "change", "verdict", "shift_kind", "offset"]
        if not self.measured:
            return pd.DataFrame(columns=cols)
        t = _sites.long_table(self.change, "change", {"shift_kind": self.shift_kind, "offset": self.offset})
        t.insert(5, "verdict", [self.verdict_of((s, l), h) for s, l, h in zip(t["stack"], t["layer"], t["head"])])
        for kind in self.kinds:
            t[f"change_{kind}"] = [self.change_of((s, l), h, kind) for s, l, h in zip(t["stack"], t["layer"], t["head"])]
            t[f"verdict_{kind}"] = [self.verdict_of((s, l), h, kind)
                                    for s, l, h in zip(t["stack"], t["layer"], t["head"])]
        return t

    def payload(self) -> dict:
        out = {"kinds": list(self.kinds), "offset": self.offset, "note": self.note, "n_texts": self.n_texts,
               "max_tokens": self.max_tokens, "changes": None, "verdicts": None, "spread": None}
        if self.measured:
            out["changes"] = {k: _sites.encode(v) for k, v in self.changes.items()}
            out["verdicts"] = {k: [self.verdicts[k][s] for s in self.changes[k]] for k in self.changes}
        if self.spread is not None:
            out["spread"] = _sites.encode(self.spread)
        return out

    @classmethod
    def upgrade(cls, data: dict, version: int) -> dict:
        if version != 1:
            return super().upgrade(data, version)
        # shift/1: one shift (shift_kind) with its change and verdict; no spread
        kind = str(data.get("shift_kind"))
        data["kinds"] = [kind]
        data["changes"] = None if data.get("change") is None else {kind: data["change"]}
        data["verdicts"] = None if data.get("verdict") is None else {kind: data["verdict"]}
        data["spread"] = None
        return data

    @classmethod
    def from_payload(cls, data: dict) -> "ShiftResult":
        changes = None
        verdicts: dict = {}
        if data.get("changes") is not None:
            changes = {str(k): _sites.decode(v) for k, v in data["changes"].items()}
            for k, ch in changes.items():
                words = (data.get("verdicts") or {})[k]
                if len(words) != len(ch):
                    raise ValueError(f"the {k} verdicts have {len(words)} sites, not {len(ch)}")
                verdicts[k] = {s: [str(w) for w in v] for s, v in zip(ch, words)}
        spread = _sites.decode(data["spread"]) if data.get("spread") is not None else None
        return cls(kinds=[str(k) for k in data["kinds"]], offset=int(data["offset"]), changes=changes,
                   verdicts=verdicts, spread=spread, note=data.get("note"), n_texts=int(data.get("n_texts") or 0),
                   max_tokens=int(data.get("max_tokens") or 0), caution=data.get("caution", CAUTION))
