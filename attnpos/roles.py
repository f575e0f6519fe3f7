"""Turn the measurements into the head table: one row per head, a primary role, every role that holds, and evidence.

The roles themselves — their checks, precedence, rule text and colours — are specs in :mod:`attnpos.core.roles`
(thresholds in :mod:`attnpos.core.thresholds`, where each value is justified); the columns are the schema in
:mod:`attnpos.core.columns`. This module only fills the rows.

Roles describe where weight goes, which is evidence, not explanation; the shift test (an intervention) is shown
beside each role.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .core import columns, roles


def weight_rows(subject, weights: dict) -> list[dict]:
    """Per head, the columns that come from weight statistics alone (:class:`~attnpos.reducers.WeightStats`)."""
    rows = []
    for si, key in enumerate(weights["keys"]):
        for h in range(subject.n_heads):
            r: dict = {"stack": key[0], "layer": key[1], "head": h}
            for m in ("previous", "next", "first", "self"):
                r[f"mass_{m}"] = float(weights["mass"][m][si, h])
            r["entropy_ratio"] = float(weights["entropy_ratio"][si, h])
            r["anchor_slot"] = float(weights["anchor_slot"][si, h])
            r["anchor_weight"] = float(weights["anchor_weight"][si, h])
            rows.append(r)
    return rows


def head_table(subject, weights: dict, fit=None, shift=None, induction=None) -> pd.DataFrame:
    """Build the head table (columns :func:`attnpos.core.columns.names`) from the stages' results: weight
    statistics, a :class:`~attnpos.results.split.SplitResult`, a :class:`~attnpos.results.shift.ShiftResult` and
    an :class:`~attnpos.results.induction.InductionResult` (each optional but the first)."""
    causal_of = {(s.stack, s.layer): s.causal for s in subject.sites}
    parts = columns.PART_NAMES
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
        r["shift_kind"], r["shift_verdict"] = None, None
        if shift is not None and shift.measured:
            r["shift_kind"], r["shift_offset"] = shift.shift_kind, shift.offset
            r["shift_change"], r["shift_verdict"] = shift.change_of(key, h), shift.verdict_of(key, h)
        role, tags, ev = roles.assign(r, causal_of.get(key, subject.causal))
        r["role"], r["tags"], r["evidence"] = role, tags, ev
        out.append(r)
    return pd.DataFrame(out, columns=columns.names())
