"""`ShiftResult`: the shift test of every head (see :mod:`attnpos.shift`): which shift ran, by how much, the change
of each head's weights and the verdict."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import pandas as pd

from ..core.protocol import CAUTION, Result
from . import _sites


@dataclass(repr=False, eq=False)
class ShiftResult(Result):
    """``shift_kind`` (``"position-ids"`` or ``"prefix"``), ``offset``, ``change`` (``{(stack, layer): (heads,)}``
    mean total-variation change, None when the test could not run), ``verdict`` (same keys, a word per head) and
    ``note`` (why it did not run, or what to keep in mind)."""

    result_kind = "shift"
    version = 1

    shift_kind: str
    offset: int
    change: dict | None
    verdict: dict = field(default_factory=dict)
    note: str | None = None
    n_texts: int = 0
    max_tokens: int = 0
    caution: str = CAUTION

    @property
    def measured(self) -> bool:
        return self.change is not None

    def change_of(self, site: tuple, head: int) -> float:
        if not self.measured or site not in self.change:
            return math.nan
        return float(self.change[site][head])

    def verdict_of(self, site: tuple, head: int) -> str | None:
        if not self.measured or site not in self.verdict:
            return None
        return self.verdict[site][head]

    def headline(self) -> str:
        if not self.measured:
            return f"shift test ({self.shift_kind} by {self.offset}) not run: {self.note}"
        return f"shift test: {self.shift_kind} moved by {self.offset} on {self.n_texts} texts"

    def table(self) -> pd.DataFrame:
        if not self.measured:
            return pd.DataFrame(columns=["key", "stack", "layer", "head", "change", "verdict", "shift_kind", "offset"])
        t = _sites.long_table(self.change, "change", {"shift_kind": self.shift_kind, "offset": self.offset})
        t.insert(5, "verdict", [self.verdict_of((s, l), h) for s, l, h in zip(t["stack"], t["layer"], t["head"])])
        return t

    def payload(self) -> dict:
        out = {"shift_kind": self.shift_kind, "offset": self.offset, "note": self.note, "n_texts": self.n_texts,
               "max_tokens": self.max_tokens, "change": None, "verdict": None}
        if self.measured:
            out["change"] = _sites.encode(self.change)
            out["verdict"] = [self.verdict[k] for k in self.change]
        return out

    @classmethod
    def from_payload(cls, data: dict) -> "ShiftResult":
        change = verdict = None
        if data.get("change") is not None:
            change = _sites.decode(data["change"])
            verdict = {k: list(v) for k, v in zip(change, data["verdict"])}
        return cls(shift_kind=str(data["shift_kind"]), offset=int(data["offset"]), change=change,
                   verdict=verdict or {}, note=data.get("note"), n_texts=int(data.get("n_texts") or 0),
                   max_tokens=int(data.get("max_tokens") or 0), caution=data.get("caution", CAUTION))
