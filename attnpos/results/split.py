"""`SplitResult`: the score split of every head — shares of distance, slot, content and residual, the distance
profile and its slope, with bootstrap intervals (see :mod:`attnpos.split` for the method)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..core import columns, keys
from ..core.protocol import CAUTION, Result
from . import _sites


@dataclass(repr=False, eq=False)
class SplitResult(Result):
    """Arrays over (site, head): ``shares`` (S, H, parts) in :data:`attnpos.core.columns.PART_NAMES` order,
    ``profile`` (S, H, nb), ``slope`` (S, H), with ``*_lo`` / ``*_hi`` bootstrap bounds (NaN with fewer than two
    texts). ``distance`` holds the representative δ of each profile bucket; ``keys`` the (stack, layer) of each
    site."""

    result_kind = "split"
    version = 1

    keys: list
    distance: np.ndarray
    shares: np.ndarray
    shares_lo: np.ndarray
    shares_hi: np.ndarray
    profile: np.ndarray
    profile_lo: np.ndarray
    profile_hi: np.ndarray
    slope: np.ndarray
    slope_lo: np.ndarray
    slope_hi: np.ndarray
    n_texts: int
    n_boot: int
    parts: tuple = columns.PART_NAMES
    caution: str = CAUTION
    #: the bootstrap's resamples, kept in memory for the roles' support (not saved): text weights (B, n_texts),
    #: shares (B, S, H, parts) and slopes (B, S, H); None without a bootstrap or in a loaded file
    boot_weights: np.ndarray | None = None
    boot_shares: np.ndarray | None = None
    boot_slope: np.ndarray | None = None

    _ARRAYS = ("shares", "shares_lo", "shares_hi", "profile", "profile_lo", "profile_hi", "slope", "slope_lo",
               "slope_hi")

    def headline(self) -> str:
        S, H = self.slope.shape
        return (f"score split of {S} layers × {H} heads on {self.n_texts} texts "
                f"({self.n_boot} bootstrap resamples)")

    def table(self) -> pd.DataFrame:
        rows = []
        for si, (stack, layer) in enumerate(self.keys):
            for h in range(self.slope.shape[1]):
                r = {"key": keys.head_key(stack, layer, h), "stack": stack, "layer": int(layer), "head": h}
                for k, p in enumerate(self.parts):
                    r[f"share_{p}"] = self.shares[si, h, k]
                    r[f"share_{p}_lo"], r[f"share_{p}_hi"] = self.shares_lo[si, h, k], self.shares_hi[si, h, k]
                r["slope"], r["slope_lo"], r["slope_hi"] = self.slope[si, h], self.slope_lo[si, h], self.slope_hi[si, h]
                rows.append(r)
        return pd.DataFrame(rows)

    def payload(self) -> dict:
        return {"sites": [[s, int(l)] for s, l in self.keys], "parts": list(self.parts), "distance": self.distance,
                **{k: getattr(self, k) for k in self._ARRAYS}, "n_texts": self.n_texts, "n_boot": self.n_boot}

    @classmethod
    def from_payload(cls, data: dict) -> "SplitResult":
        arr = lambda v: np.array(_sites.nan_for_none(v), dtype=float)  # noqa: E731
        out = {k: arr(data[k]) for k in cls._ARRAYS}
        S = len(data["sites"])
        for k, v in out.items():
            if v.shape[:1] != (S,):
                raise ValueError(f"{k} has {v.shape[:1]} sites, not {S}")
        return cls(keys=[(keys.normal_stack(s), int(l)) for s, l in data["sites"]], distance=arr(data["distance"]),
                   n_texts=int(data["n_texts"]), n_boot=int(data["n_boot"]), parts=tuple(data["parts"]),
                   caution=data.get("caution", CAUTION), **out)
