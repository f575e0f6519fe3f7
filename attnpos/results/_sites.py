"""Per-site arrays (one row of values per attention layer, keyed by ``(stack, layer)``) in JSON and in tables."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from ..core import keys


def encode(per_site: dict) -> dict:
    """``{(stack, layer): (heads, …) array}`` → ``{"sites": [[stack, layer], …], "values": [[…], …]}``."""
    sites = list(per_site)
    return {"sites": [[s, int(l)] for s, l in sites], "values": [np.asarray(per_site[k]).tolist() for k in sites]}


def decode(data: dict) -> dict:
    sites, values = data["sites"], data["values"]
    if len(sites) != len(values):
        raise ValueError("sites and values differ in length")
    out = {}
    for (s, l), v in zip(sites, values):
        out[(keys.normal_stack(s), int(l))] = np.array(nan_for_none(v), dtype=float)
    return out


def nan_for_none(v: Any) -> Any:
    """Nested lists with None (JSON's missing number) → the same with NaN, for ``np.array(…, dtype=float)``."""
    if isinstance(v, list):
        return [nan_for_none(x) for x in v]
    return np.nan if v is None else v


def long_table(per_site: dict, name: str, extra: dict[str, Any] | None = None) -> pd.DataFrame:
    """One row per head: stack, layer, head, ``name`` (+ constant columns ``extra``)."""
    rows = []
    for (s, l), arr in per_site.items():
        for h, v in enumerate(np.asarray(arr, dtype=float).ravel()):
            rows.append({"key": keys.head_key(s, l, h), "stack": s, "layer": int(l), "head": h, name: v,
                         **(extra or {})})
    return pd.DataFrame(rows, columns=["key", "stack", "layer", "head", name, *(extra or {})])
