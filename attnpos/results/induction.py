"""`InductionResult`: the repeated-random-tokens test of every head (Olsson et al. 2022; see
:mod:`attnpos.induction`)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import pandas as pd

from ..core.protocol import CAUTION, Result
from . import _sites


@dataclass(repr=False, eq=False)
class InductionResult(Result):
    """``scores``: ``{(stack, layer): (heads,) array}``, the mean weight on the induction target; ``settings``:
    how the sequences were made (length, repeats, seed)."""

    result_kind = "induction"
    version = 1

    scores: dict
    settings: dict = field(default_factory=dict)
    caution: str = CAUTION

    def score_of(self, site: tuple, head: int) -> float:
        arr = self.scores.get(site)
        return math.nan if arr is None else float(arr[head])

    def headline(self) -> str:
        s = self.settings
        return (f"induction test: {s.get('repeats')} random sequences of {s.get('length')} tokens, each repeated "
                "twice")

    def table(self) -> pd.DataFrame:
        return _sites.long_table(self.scores, "induction")

    def payload(self) -> dict:
        return {"scores": _sites.encode(self.scores), "settings": self.settings}

    @classmethod
    def from_payload(cls, data: dict) -> "InductionResult":
        return cls(scores=_sites.decode(data["scores"]), settings=dict(data.get("settings") or {}),
                   caution=data.get("caution", CAUTION))
