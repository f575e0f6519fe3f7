"""Synthetic scans for trying and testing the views without running a model.

The numbers are random but shaped like a real scan (a role per head, shares that sum to about one, a profile
that fits the role, kept weight maps whose pattern follows the role). Nothing here is a measurement: use
:func:`attnpos.scan` for that.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core import columns
from ..results.scan import Scan
from .common import roles_now

HOSTILE_TOKENS = ["<script>alert(1)</script>", "\"><img src=x onerror=alert(1)>", "\x00\x1b[31m\x07", "\u202eevil",
                  "&amp;", "'", "  "]


def _distances(max_distance: int, causal: bool) -> np.ndarray:
    exact = list(range(0, 16))
    logb = [int(round(x)) for x in np.geomspace(16, max(17, max_distance), 12)]
    pos = sorted(set(exact + logb))
    if causal:
        return np.array(pos, dtype=float)
    return np.array(sorted(set([-d for d in pos] + pos)), dtype=float)


def _profile_for(role: str, d: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    base = rng.normal(0, 0.15, d.shape)
    ad = np.abs(d)
    if role == "previous-token":
        v = np.where(d == 1, 4.0, -0.3 * np.log1p(ad))
    elif role == "next-token":
        v = np.where(d == -1, 4.0, -0.3 * np.log1p(ad))
    elif role == "local":
        v = -rng.uniform(0.1, 0.6) * np.minimum(ad, 32)
    elif role == "counting":
        v = np.zeros_like(d)
    else:
        v = -rng.uniform(0, 0.2) * np.log1p(ad)
    return v + base


def _map_for(role: str, T: int, causal: bool, rng: np.random.Generator) -> np.ndarray:
    i = np.arange(T)[:, None]
    j = np.arange(T)[None, :]
    s = rng.normal(0, 0.5, (T, T))
    if role == "previous-token":
        s += np.where(i - j == 1, 6.0, 0.0)
    elif role == "next-token":
        s += np.where(j - i == 1, 6.0, 0.0)
    elif role == "local":
        s += -0.5 * np.abs(i - j)
    elif role == "anchor":
        s += np.where(j == 0, 6.0, 0.0)
    elif role == "counting":
        s *= 0.05
    elif role == "induction":
        s += np.where(i - j == T // 2 - 1, 5.0, 0.0)
    if causal:
        s = np.where(j <= i, s, -np.inf)
    s = s - s.max(axis=1, keepdims=True)
    w = np.exp(s)
    return (w / w.sum(axis=1, keepdims=True)).astype(np.float32)


def synthetic_scan(layers: int = 4, heads: int = 4, *, seed: int = 0, causal: bool = True,
                   stacks: tuple[str, ...] = ("main",), n_texts: int = 2, text_length: int = 24,
                   keep_maps: str | int = "all", hostile: bool = True, extra: bool = True,
                   missing: float = 0.05, max_distance: int = 256) -> Scan:
    """A :class:`~attnpos.results.scan.Scan` with plausible random numbers.

    Args:
        keep_maps: ``"all"`` keeps a map for every head on every text; an int keeps maps for that many heads.
        hostile: put hostile strings (``<script>``, ``onerror``, control characters) among the tokens.
        missing: share of numeric cells set to NaN (views must show them as "—").
    """
    rng = np.random.default_rng(seed)
    d = _distances(max_distance, causal)
    rows, values, lows, highs = [], [], [], []
    for stack in stacks:
        for L in range(layers):
            for H in range(heads):
                names = roles_now()
                role = names[int(rng.integers(0, len(names)))]
                if not causal and role == "induction":
                    role = "content"
                if causal and role == "next-token":
                    role = "previous-token"
                sh = rng.dirichlet([3, 1, 1.5, 1] if role in ("previous-token", "next-token", "local")
                                   else [1, 3, 1, 1] if role == "anchor" else [1, 1, 3, 1.5])
                r = {"stack": stack, "layer": L, "head": H, "role": role,
                     "tags": [role] + (["anchor"] if role != "anchor" and rng.random() < 0.2 else []),
                     "evidence": f"{role}: synthetic evidence, mass {rng.uniform(0.3, 0.95):.2f}"}
                for k in ("previous", "next", "first", "self"):
                    r[f"mass_{k}"] = float(rng.uniform(0, 0.4))
                if role == "previous-token":
                    r["mass_previous"] = float(rng.uniform(0.6, 0.98))
                if role == "anchor":
                    r["mass_first"] = float(rng.uniform(0.6, 0.98))
                for k, v in zip(("distance", "slot", "content", "residual"), sh):
                    w = float(rng.uniform(0.01, 0.08))
                    r[f"share_{k}"] = float(v)
                    r[f"share_{k}_lo"], r[f"share_{k}_hi"] = max(0.0, float(v) - w), min(1.0, float(v) + w)
                # the slope as attnpos.split defines it: positive when scores fall with distance
                slope = float(rng.uniform(0.01, 0.6)) if role in ("local", "previous-token") else float(rng.normal(0, 0.005))
                r["slope"], r["slope_lo"], r["slope_hi"] = slope, slope - 0.03, slope + 0.03
                r["entropy_ratio"] = float(rng.uniform(0.85, 1.0) if role == "counting" else rng.uniform(0.1, 0.7))
                r["anchor_slot"] = 0.0 if role == "anchor" else float("nan")
                r["anchor_weight"] = r["mass_first"] if role == "anchor" else float("nan")
                r["induction"] = float(rng.uniform(0.5, 0.9) if role == "induction" else rng.uniform(0, 0.1))
                r["shift_kind"] = "position-ids"
                r["shift_offset"] = 17.0
                r["shift_change"] = float(rng.uniform(0, 0.05) if role != "anchor" else rng.uniform(0.3, 0.8))
                r["shift_verdict"] = "moves (slot)" if role == "anchor" else "stays (relative)"
                for c in columns.names():
                    if c.startswith(("share_", "mass_", "slope", "entropy", "induction")) and rng.random() < missing:
                        r[c] = float("nan")
                rows.append(r)
                v = _profile_for(role, d, rng)
                if rng.random() < missing:
                    v[rng.integers(0, len(v))] = np.nan
                values.append(v)
                band = rng.uniform(0.05, 0.3, v.shape) * (1 + np.log1p(np.abs(d)) / 3)
                lows.append(v - band)
                highs.append(v + band)
    table = pd.DataFrame(rows, columns=columns.names())
    words = ["the", " quiet", " harbour", " lamp", " at", " dusk", " and", " a", " red", " kite",
             " over", " the", " field", ".", "\n", " it", " rose", " again"]
    tokens, texts, special = [], [], []
    for t in range(n_texts):
        toks = ["<bos>"] + [words[int(k)] for k in rng.integers(0, len(words), text_length - 1)]
        if hostile and t == 0:
            for k, h in enumerate(HOSTILE_TOKENS):
                if 1 + 2 * k < len(toks):
                    toks[1 + 2 * k] = h
        tokens.append(toks)
        texts.append({"name": f"text-{t}" + ("<b>" if hostile and t == 0 else ""), "source": f"synthetic:{t}",
                      "n_tokens": len(toks), "window": None})
        special.append([0])
    maps = {}
    keep = list(range(len(table))) if keep_maps == "all" else list(range(min(int(keep_maps), len(table))))
    for idx in keep:
        r = table.iloc[idx]
        for t in range(n_texts):
            maps[(t, r["stack"], int(r["layer"]), int(r["head"]))] = _map_for(r["role"], len(tokens[t]), causal, rng)
    model = {"path": "synthetic", "name": "synthetic-" + "x".join(map(str, (layers, heads))),
             "architecture": "SyntheticForCausalLM" if causal else "SyntheticEncoder",
             "scheme": "rope", "layers": layers, "heads": heads, "causal": causal,
             "fingerprint": "f" * 16, "context_limit": 128, "training_length": 64,
             "capture": "registry", "score_kind": "scores"}
    scan = Scan(model=model, texts=texts, tokens=tokens, special=special, heads=table,
                profile={"distance": d, "value": np.array(values), "low": np.array(lows), "high": np.array(highs)},
                maps=maps, texts_hash="a" * 16, versions={"attnpos": "0.1.0", "synthetic": "yes"})
    if extra:
        _attach_synthetic_curves(scan, layers, rng)
    return scan


def _attach_synthetic_curves(scan: Scan, layers: int, rng: np.random.Generator) -> None:
    """Synthetic probe and length results (labelled synthetic in their settings), attached to the scan."""
    from ..results.length import LengthResult
    from ..results.probe import ProbeResult

    probe_layers = [{"layer": L, "r2": float(min(1, 0.3 + 0.15 * L + rng.normal(0, 0.03))),
                     "r2_log": float(min(1, 0.4 + 0.12 * L)), "control_r2": float(rng.uniform(0, 0.15)),
                     "selectivity": None, "mae": float(rng.uniform(1, 5)),
                     "untrained_r2": float(rng.uniform(0.0, 0.3))} for L in range(layers)]
    for e in probe_layers:
        e["selectivity"] = e["r2"] - e["control_r2"]
    pos = np.arange(1, 129)
    loss = 2.0 + 0.3 * np.exp(-pos / 10) + np.where(pos > 64, 0.02 * (pos - 64), 0) + rng.normal(0, 0.03, pos.shape)
    scan.attach(ProbeResult(model=scan.model, layers=probe_layers, positions={}, settings={"synthetic": "yes"}))
    scan.attach(LengthResult(model=scan.model, position=pos.tolist(), loss=loss.tolist(),
                             loss_lo=(loss - 0.08).tolist(), loss_hi=(loss + 0.08).tolist(), training_length=64,
                             training_length_source="synthetic", bins=[], heads=[], drift=None, summary={},
                             settings={"synthetic": "yes"}))
