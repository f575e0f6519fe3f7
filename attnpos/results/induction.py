"""`InductionResult`: the repeated-random-tokens test of every head (Olsson et al. 2022; see
:mod:`attnpos.induction`)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core.protocol import CAUTION, Result
from . import _sites


@dataclass(repr=False, eq=False)
class InductionResult(Result):
    """``scores``: ``{(stack, layer): (heads,) array}``, the mean weight on the induction target over the random
    sequences; ``stderr``: the same keys, the standard error of that mean (NaN with one sequence, or in files of
    version 1); ``per_sequence``: ``{(stack, layer): (sequences, heads)}`` each sequence's score (empty in files
    of version 1); ``settings``: how the sequences were made (length, repeats, seed, pool size)."""

    result_kind = "induction"
    version = 2

    scores: dict
    settings: dict = field(default_factory=dict)
    caution: str = CAUTION
    stderr: dict = field(default_factory=dict)
    per_sequence: dict = field(default_factory=dict)

    def score_of(self, site: tuple, head: int) -> float:
        arr = self.scores.get(site)
        return math.nan if arr is None else float(arr[head])

    def stderr_of(self, site: tuple, head: int) -> float:
        arr = self.stderr.get(site)
        return math.nan if arr is None else float(arr[head])

    def max_stderr(self) -> float:
        vals = [np.nanmax(v) for v in self.stderr.values() if np.isfinite(v).any()]
        return float(max(vals)) if vals else math.nan

    def headline(self) -> str:
        s = self.settings
        se = self.max_stderr()
        tail = f" (standard error ≤ {se:.3f})" if math.isfinite(se) else ""
        return (f"induction test: {s.get('repeats')} random sequences of {s.get('length')} tokens, each repeated "
                f"twice{tail}")

    def table(self) -> pd.DataFrame:
        t = _sites.long_table(self.scores, "induction")
        t["induction_se"] = [self.stderr_of((s, l), h) for s, l, h in zip(t["stack"], t["layer"], t["head"])]
        return t

    def payload(self) -> dict:
        return {"scores": _sites.encode(self.scores), "stderr": _sites.encode(self.stderr) if self.stderr else None,
                "per_sequence": _sites.encode(self.per_sequence) if self.per_sequence else None,
                "settings": self.settings}

    @classmethod
    def upgrade(cls, data: dict, version: int) -> dict:
        if version != 1:
            return super().upgrade(data, version)
        data["stderr"] = data["per_sequence"] = None        # induction/1: the mean alone
        return data

    @classmethod
    def from_payload(cls, data: dict) -> "InductionResult":
        return cls(scores=_sites.decode(data["scores"]), settings=dict(data.get("settings") or {}),
                   caution=data.get("caution", CAUTION),
                   stderr=_sites.decode(data["stderr"]) if data.get("stderr") else {},
                   per_sequence=_sites.decode(data["per_sequence"]) if data.get("per_sequence") else {})
