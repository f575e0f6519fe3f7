"""Turn the measurements into a head table: one row per head, a primary role, every role that holds, and evidence.

Roles (criteria in :mod:`attnpos.thresholds`, where each value is justified):

=================  ==================================================================================
previous-token     at least half the weight on the token just before
next-token         at least half the weight on the token just after (encoders)
local              scores fall with distance (slope) and distance explains much of the variance
anchor             a large share of weight on one fixed slot whatever the query (first token, template slot)
counting           near-uniform over the causal prefix — the architecture's default; compare with an
                   untrained copy (:mod:`attnpos.probes`) before calling it learned
content            position explains little; key content and query–key interaction explain most
induction          copies: attends to the token after the earlier copy of the current token
mixed              none of the above
=================  ==================================================================================

Roles describe where weight goes, which is evidence, not explanation; the shift test (an intervention) is shown
beside each role.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import thresholds as th
from .result import HEAD_COLUMNS


def _fmt(x: float, nd: int = 2) -> str:
    return "—" if x is None or not np.isfinite(x) else f"{x:.{nd}f}"


def criteria(row: dict, causal: bool) -> dict[str, str]:
    """The roles whose criterion holds for one head, each with the evidence sentence that decided it."""
    out: dict[str, str] = {}
    g = lambda k: row.get(k, np.nan)  # noqa: E731
    fin = lambda x: x is not None and np.isfinite(x)  # noqa: E731
    if fin(g("induction")) and g("induction") >= th.INDUCTION_SCORE:
        out["induction"] = f"induction score {_fmt(g('induction'))} ≥ {th.INDUCTION_SCORE}"
    if fin(g("mass_previous")) and g("mass_previous") >= th.NEIGHBOUR_MASS:
        out["previous-token"] = f"mass.previous {_fmt(g('mass_previous'))} ≥ {th.NEIGHBOUR_MASS}"
    if fin(g("mass_next")) and g("mass_next") >= th.NEIGHBOUR_MASS:
        out["next-token"] = f"mass.next {_fmt(g('mass_next'))} ≥ {th.NEIGHBOUR_MASS}"
    if fin(g("anchor_weight")) and g("anchor_weight") >= th.ANCHOR_WEIGHT:
        out["anchor"] = (f"mean weight {_fmt(g('anchor_weight'))} ≥ {th.ANCHOR_WEIGHT} on slot "
                         f"{int(g('anchor_slot'))}")
    if (fin(g("slope")) and g("slope") >= th.LOCAL_SLOPE and fin(g("share_distance"))
            and g("share_distance") >= th.LOCAL_SHARE):
        out["local"] = (f"slope {_fmt(g('slope'), 3)} ≥ {th.LOCAL_SLOPE}, distance share "
                        f"{_fmt(g('share_distance'))} ≥ {th.LOCAL_SHARE}")
    if causal and fin(g("entropy_ratio")) and g("entropy_ratio") >= th.COUNTING_ENTROPY:
        out["counting"] = (f"entropy {_fmt(g('entropy_ratio'))} × log(visible keys) ≥ {th.COUNTING_ENTROPY} "
                           "(the untrained default: compare with an untrained copy)")
    pos = g("share_distance") + g("share_slot")
    cont = g("share_content") + g("share_residual")
    if fin(pos) and fin(cont) and pos < th.CONTENT_MAX_POSITIONAL and cont >= th.CONTENT_MIN_SHARE:
        out["content"] = (f"distance+slot {_fmt(pos)} < {th.CONTENT_MAX_POSITIONAL}, content+residual "
                          f"{_fmt(cont)} ≥ {th.CONTENT_MIN_SHARE}")
    return out


def assign(row: dict, causal: bool) -> tuple[str, list[str], str]:
    found = criteria(row, causal)
    tags = [r for r in th.ROLE_ORDER if r in found]
    if not tags:
        parts = (f"prev {_fmt(row.get('mass_previous'))}, first {_fmt(row.get('mass_first'))}, "
                 f"entropy {_fmt(row.get('entropy_ratio'))}, slope {_fmt(row.get('slope'), 3)}")
        return "mixed", ["mixed"], f"no criterion holds ({parts})"
    return tags[0], tags, found[tags[0]]


def head_table(subject, weights: dict, fit=None, shift: dict | None = None, induction: dict | None = None) -> pd.DataFrame:
    """Build the head table (columns :data:`attnpos.result.HEAD_COLUMNS`) from the stages' results."""
    rows = []
    keys = weights["keys"]
    H = subject.n_heads
    causal_of = {(s.stack, s.layer): s.causal for s in subject.sites}
    for si, key in enumerate(keys):
        for h in range(H):
            r: dict = {c: np.nan for c in HEAD_COLUMNS}
            r.update(stack=key[0], layer=key[1], head=h)
            for m in ("previous", "next", "first", "self"):
                r[f"mass_{m}"] = weights["mass"][m][si, h]
            r["entropy_ratio"] = weights["entropy_ratio"][si, h]
            r["anchor_slot"] = weights["anchor_slot"][si, h]
            r["anchor_weight"] = weights["anchor_weight"][si, h]
            if fit is not None:
                for k, part in enumerate(("distance", "slot", "content", "residual")):
                    r[f"share_{part}"] = fit.shares[si, h, k]
                    r[f"share_{part}_lo"] = fit.shares_lo[si, h, k]
                    r[f"share_{part}_hi"] = fit.shares_hi[si, h, k]
                r["slope"], r["slope_lo"], r["slope_hi"] = fit.slope[si, h], fit.slope_lo[si, h], fit.slope_hi[si, h]
            if induction is not None and key in induction:
                r["induction"] = induction[key][h]
            r["shift_kind"], r["shift_verdict"] = None, None
            if shift is not None and shift.get("change") is not None:
                c = float(shift["change"][key][h])
                r["shift_kind"], r["shift_offset"] = shift["kind"], shift["offset"]
                r["shift_change"], r["shift_verdict"] = c, shift["verdict"][key][h]
            role, tags, ev = assign(r, causal_of.get(key, subject.causal))
            r["role"], r["tags"], r["evidence"] = role, tags, ev
            rows.append(r)
    return pd.DataFrame(rows, columns=HEAD_COLUMNS)
