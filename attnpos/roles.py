"""Turn the measurements into the head table: one row per head, a primary role, every role that holds, and evidence.

The roles themselves — their checks, precedence, rule text and colours — are specs in :mod:`attnpos.core.roles`
(thresholds in :mod:`attnpos.core.thresholds`, where each value is justified); the columns are the schema in
:mod:`attnpos.core.columns`. This module only fills the rows.

**Support.** With a bootstrap (the split's resamples over texts), every role's criterion is checked again on each
resample — the weight statistics, shares and slope recomputed from the resampled texts, the induction score from
resampled random sequences, the shift test held as measured — and ``tag_support`` says in what share of resamples
each criterion holds. The primary role is the most specific role that holds in at least ROLE_SUPPORT of them
(``role_support`` is that share); when none does, the head keeps its point-estimate role and ``role_between`` names
the two roles it gets most often across resamples.

Roles describe where weight goes, which is evidence, not explanation; the shift test (an intervention) is shown
beside each role.
"""

from __future__ import annotations

from collections import Counter

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


def _resampled_rows(weights: dict, fit, induction, seed: int = 1):
    """Per bootstrap resample: a function (site index, head, base row) → the row with that resample's statistics."""
    if fit is None or getattr(fit, "boot_weights", None) is None or "per_text" not in weights:
        return []
    parts = columns.PART_NAMES
    per_seq = getattr(induction, "per_sequence", None) or {}
    rng = np.random.default_rng(seed)
    out = []
    for b, w in enumerate(fit.boot_weights):
        ws = weight_summary(weights["per_text"], w)
        ind = {}
        if per_seq:
            R = len(next(iter(per_seq.values())))
            pick = rng.integers(0, R, R)
            ind = {k: v[pick].mean(0) for k, v in per_seq.items()}
        out.append((ws, fit.boot_shares[b], fit.boot_slope[b], ind))

    def row_of(sample, si, key, h, base):
        ws, shares, slope, ind = sample
        r = dict(base)
        _weight_values(r, ws, si, h)
        for k, part in enumerate(parts):
            r[f"share_{part}"] = shares[si, h, k]
        r["slope"] = slope[si, h]
        if ind:
            r["induction"] = float(ind[key][h])
        return r

    return [(s, row_of) for s in out]


def _decide(r: dict, causal: bool, samples: list, si: int, key, h: int) -> None:
    """Fill role, tags, evidence, role_support, role_between and tag_support of one row."""
    role, tags, ev = roles.assign(r, causal)
    r["role"], r["tags"], r["evidence"] = role, tags, ev
    r["role_support"], r["role_between"], r["tag_support"] = np.nan, [], {}
    if not samples:
        return
    holds: Counter = Counter()
    primaries: Counter = Counter()
    for sample, row_of in samples:
        found = roles.criteria(row_of(sample, si, key, h, r), causal)
        names = list(found) or [roles.FALLBACK]
        holds.update(names)
        primaries[names[0]] += 1
    B = len(samples)
    support = {name: holds[name] / B for name in roles.names() if holds[name] or name in tags}
    r["tag_support"] = support
    order = roles.names()
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
    samples = _resampled_rows(weights, fit, induction)
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
            r["shift_change"], r["shift_verdict"] = shift.change_of(key, h), shift.verdict_of(key, h)
            for kind, tag in (("position-ids", "ids"), ("prefix", "prefix")):
                if kind in shift.kinds:
                    r[f"shift_change_{tag}"] = shift.change_of(key, h, kind)
                    r[f"shift_verdict_{tag}"] = shift.verdict_of(key, h, kind)
            if shift.spread is not None and key in shift.spread:
                r["shift_spread"] = float(shift.spread[key][h])
        _decide(r, causal_of.get(key, subject.causal), samples, site, key, h)
        out.append(r)
    return pd.DataFrame(out, columns=columns.names())
