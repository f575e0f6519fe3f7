"""Turn the measurements into the head table: one row per head, a primary role, every role that holds, and evidence.

The roles themselves — their checks, precedence, rule text and colours — are specs in :mod:`attnpos.core.roles`
(thresholds in :mod:`attnpos.core.thresholds`, where each value is justified); the columns are the schema in
:mod:`attnpos.core.columns`. This module only fills the rows.

**Support.** With a bootstrap (the split's resamples over texts), every role's criterion is checked again on each
resample — the weight statistics, shares and slope recomputed from the resampled texts, the induction score from
resampled random sequences, the shift test held as measured — and ``tag_support`` says in what share of resamples
each criterion holds. The primary role is the most specific role that holds in at least ROLE_SUPPORT of them
(``role_support`` is that share); when none does, the head keeps its point-estimate role and ``role_between`` names
the two roles it gets most often across resamples. The criteria are checked for all heads and resamples at once
(:func:`attnpos.core.roles.criteria_arrays`, each role's ``holds``), with the same outcome as row by row.

Roles describe where weight goes, which is evidence, not explanation; the shift test (an intervention) is shown
beside each role.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from .core import columns, roles
from .core import thresholds as th
from .reducers import weight_summary


def _weight_values(r: dict, ws: dict, si: int, h: int) -> None:
    for m in ("previous", "next", "first", "self"):
        r[f"mass_{m}"] = float(ws["mass"][m][si, h])
    r["entropy_ratio"] = float(ws["entropy_ratio"][si, h])
    r["anchor_slot"] = float(ws["anchor_slot"][si, h])
    r["anchor_weight"] = float(ws["anchor_weight"][si, h])


def weight_rows(subject, weights: dict) -> list[dict]:
    """Per head, the columns that come from weight statistics alone (:class:`~attnpos.reducers.WeightStats`)."""
    rows = []
    for si, key in enumerate(weights["keys"]):
        for h in range(subject.n_heads):
            r: dict = {"stack": key[0], "layer": key[1], "head": h}
            _weight_values(r, weights, si, h)
            rows.append(r)
    return rows


def _resampled_columns(weights: dict, fit, induction, seed: int = 1) -> dict | None:
    """The columns each bootstrap resample recomputes, as (resamples, sites, heads) arrays: the weight statistics
    from the resampled texts, the split's shares and slope, and the induction score of resampled random sequences
    (drawn with ``seed``, one draw per resample). None without resamples."""
    if fit is None or getattr(fit, "boot_weights", None) is None or "per_text" not in weights:
        return None
    per_seq = getattr(induction, "per_sequence", None) or {}
    rng = np.random.default_rng(seed)
    keys = weights["keys"]
    per_text = {k: v for k, v in weights["per_text"].items()}
    per_text["slot_w"] = per_text["slot_w"].astype(np.float64)          # once, not once per resample
    W = np.asarray(fit.boot_weights, dtype=np.float64)
    # resamples in chunks: the slot means of a chunk are (chunk, sites, heads, slots)
    step = max(1, (64 * 2 ** 20) // max(1, per_text["slot_w"][0].size * 8 * 3))
    cols: dict[str, list] = {}
    for b0 in range(0, len(W), step):
        ws = weight_summary(per_text, W[b0:b0 + step])
        for m in ("previous", "next", "first", "self"):
            cols.setdefault(f"mass_{m}", []).append(ws["mass"][m])
        for c in ("entropy_ratio", "anchor_slot", "anchor_weight"):
            cols.setdefault(c, []).append(ws[c])
    out = {c: np.concatenate(v).astype(np.float64) for c, v in cols.items()}
    if per_seq:
        R = len(next(iter(per_seq.values())))
        ind = []
        for _ in range(len(W)):                       # one draw per resample, as the support always drew them
            pick = rng.integers(0, R, R)
            ind.append(np.stack([per_seq[k][pick].mean(0) for k in keys]))
        out["induction"] = np.stack(ind).astype(np.float64)
    for k, part in enumerate(columns.PART_NAMES):
        out[f"share_{part}"] = np.asarray(fit.boot_shares[..., k], dtype=np.float64)
    out["slope"] = np.asarray(fit.boot_slope, dtype=np.float64)
    return out


class _Columns(Mapping):
    """The head table's columns for every resample and head: a resampled column as (resamples, heads), any other
    as the point estimate of each head (1, heads) — what a resample holds as measured (the shift test)."""

    def __init__(self, rows: list[dict], resampled: dict):
        self.rows, self.resampled, self._point = rows, resampled, {}

    def __getitem__(self, key):
        if key in self.resampled:
            return self.resampled[key]
        if key not in self._point:
            if not self.rows or key not in self.rows[0]:
                raise KeyError(key)
            self._point[key] = np.array([r.get(key) for r in self.rows] + [None], dtype=object)[None, :-1]
        return self._point[key]

    def __iter__(self):
        return iter(set(self.resampled) | set(self.rows[0] if self.rows else ()))

    def __len__(self):
        return len(set(self))

    def row(self, b: int, n: int) -> dict:
        r = dict(self.rows[n])
        for c, v in self.resampled.items():
            r[c] = v[b, n]
        return r


def _support(rows: list[dict], causal: np.ndarray, resampled: dict | None) -> None:
    """Fill role, tags, evidence, role_support, role_between and tag_support of every row: the point estimate's
    role, then each criterion checked on every resample of every head at once."""
    for r, c in zip(rows, causal):
        role, tags, ev = roles.assign(r, bool(c))
        r["role"], r["tags"], r["evidence"] = role, tags, ev
        r["role_support"], r["role_between"], r["tag_support"] = np.nan, [], {}
    if resampled is None or not rows:
        return
    flat = {c: v.reshape(v.shape[0], -1) for c, v in resampled.items()}     # (B, sites·heads): the rows' order
    B = next(iter(flat.values())).shape[0]
    cols = _Columns(rows, flat)
    causal_bn = np.broadcast_to(np.asarray(causal, dtype=bool)[None, :], (B, len(rows)))
    checked, holds = roles.criteria_arrays(cols, causal_bn, row_at=lambda idx: cols.row(*idx))
    none = ~holds.any(-1)                                                  # (B, N): the fallback
    first = np.where(none, len(checked), holds.argmax(-1))                 # the primary role's index
    n_hold = holds.sum(0)                                                  # (N, roles)
    n_none = none.sum(0)
    n_first = np.stack([(first == i).sum(0) for i in range(len(checked) + 1)], axis=-1)   # (N, roles + 1)
    names = checked + [roles.FALLBACK]
    for n, r in enumerate(rows):
        count = {name: int(n_hold[n, i]) for i, name in enumerate(checked)}
        count[roles.FALLBACK] = int(n_none[n])
        primaries = {name: int(n_first[n, i]) for i, name in enumerate(names) if n_first[n, i]}
        settle(r, count, primaries, B, bool(causal[n]))


def settle(r: dict, count: dict, primaries: dict, B: int, causal: bool) -> None:
    """A head's role from its resamples: ``count`` — resamples in which each criterion holds (the fallback's:
    none holds), ``primaries`` — resamples in which each role comes first, of ``B``. A role holding in at least
    ROLE_SUPPORT of them becomes the head's role (with its point-estimate evidence, or the share of resamples);
    otherwise the point estimate's role stays, with its support and the two roles the resamples chose most."""
    order = roles.names()
    role, tags = r["role"], r["tags"]
    support = {name: count.get(name, 0) / B for name in order if count.get(name, 0) or name in tags}
    r["tag_support"] = support
    sure = next((name for name in order if support.get(name, 0.0) >= th.ROLE_SUPPORT), None)
    if sure is not None:
        if sure != role:
            point = roles.criteria(r, causal)
            r["evidence"] = point.get(sure) or f"criterion holds in {support[sure]:.0%} of resamples"
            r["role"] = sure
            if sure not in r["tags"]:
                r["tags"] = [sure] + [t for t in r["tags"] if t != roles.FALLBACK]
            else:
                r["tags"] = [sure] + [t for t in r["tags"] if t != sure]
        r["role_support"] = support[sure]
        return
    r["role_support"] = support.get(role, 0.0)
    top = sorted(primaries.items(), key=lambda kv: (-kv[1], order.index(kv[0])))[:2]
    r["role_between"] = sorted((name for name, _ in top), key=order.index)


def head_table(subject, weights: dict, fit=None, shift=None, induction=None) -> pd.DataFrame:
    """Build the head table (columns :func:`attnpos.core.columns.names`) from the stages' results: weight
    statistics, a :class:`~attnpos.results.split.SplitResult`, a :class:`~attnpos.results.shift.ShiftResult` and
    an :class:`~attnpos.results.induction.InductionResult` (each optional but the first). With the split's
    bootstrap resamples, each role gets its support (see the module doc)."""
    causal_of = {(s.stack, s.layer): s.causal for s in subject.sites}
    parts = columns.PART_NAMES
    resampled = _resampled_columns(weights, fit, induction)
    if shift is not None and shift.measured:
        change, verdict = shift.change, shift.verdict
    out = []
    for base in weight_rows(subject, weights):
        r: dict = {c: np.nan for c in columns.names()}
        r.update(base)
        key, h = (r["stack"], r["layer"]), r["head"]
        site = weights["keys"].index(key)
        if fit is not None:
            for k, part in enumerate(parts):
                r[f"share_{part}"] = fit.shares[site, h, k]
                r[f"share_{part}_lo"] = fit.shares_lo[site, h, k]
                r[f"share_{part}_hi"] = fit.shares_hi[site, h, k]
            r["slope"], r["slope_lo"], r["slope_hi"] = fit.slope[site, h], fit.slope_lo[site, h], fit.slope_hi[site, h]
        if induction is not None:
            r["induction"] = induction.score_of(key, h)
            r["induction_se"] = induction.stderr_of(key, h) if hasattr(induction, "stderr_of") else np.nan
        for c in ("shift_kind", "shift_verdict", "shift_verdict_ids", "shift_verdict_prefix"):
            r[c] = None
        if shift is not None and shift.measured:
            r["shift_kind"], r["shift_offset"] = shift.shift_kind, shift.offset
            # what ShiftResult.change_of / verdict_of give without a kind, from the combined tables formed once
            # (those properties combine every head's verdicts on each call)
            r["shift_change"] = float(change[key][h]) if change is not None and key in change else np.nan
            r["shift_verdict"] = verdict[key][h] if key in verdict else None
            for kind, tag in (("position-ids", "ids"), ("prefix", "prefix")):
                if kind in shift.kinds:
                    r[f"shift_change_{tag}"] = shift.change_of(key, h, kind)
                    r[f"shift_verdict_{tag}"] = shift.verdict_of(key, h, kind)
            if shift.spread is not None and key in shift.spread:
                r["shift_spread"] = float(shift.spread[key][h])
        out.append(r)
    causal = np.array([bool(causal_of.get((r["stack"], r["layer"]), subject.causal)) for r in out], dtype=bool)
    # weight_rows runs site by site, head by head: the resamples' (B, sites, heads) arrays flatten to that order
    _support(out, causal, resampled)
    return pd.DataFrame(out, columns=columns.names())
