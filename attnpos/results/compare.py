"""`CompareResult`: two checkpoints head by head — which heads changed role, score-split shares or slope beyond
their intervals (see :mod:`attnpos.compare` for the rule)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import keys
from ..core.protocol import CAUTION as SCAN_CAUTION, Result

CAUTION = ("A changed role or share says the attention pattern moved on these texts, which is evidence, not "
           "explanation; " + SCAN_CAUTION.split(": ", 1)[-1])

RULE = "changed = role differs, or a share's / the slope's 90% bootstrap intervals do not overlap"

COLUMNS = ["key", "stack", "layer", "head", "role_a", "role_b", "role_changed", "changed_shares", "slope_a", "slope_b",
           "slope_changed", "changed", "detail"]


@dataclass(repr=False, eq=False)
class CompareResult(Result):
    """``rows``: every head (columns :data:`COLUMNS`); :meth:`table` gives the changed ones (all with
    ``all_heads``); ``a`` and ``b`` the two models' facts; ``summary`` the counts."""

    result_kind = "compare"
    version = 1

    a: dict
    b: dict
    rows: pd.DataFrame
    summary: dict
    notes: list[str] = field(default_factory=list)
    all_heads: bool = False
    caution: str = CAUTION

    def table(self) -> pd.DataFrame:
        t = self.rows if self.all_heads else self.rows[self.rows["changed"]]
        return t.reset_index(drop=True)

    def headline(self) -> str:
        s = self.summary
        return (f"{s.get('changed', 0)} of {s.get('heads', 0)} heads changed between {self.a.get('name')} and "
                f"{self.b.get('name')}")

    def text(self) -> str:
        a, b, s = self.a, self.b, self.summary
        lines = [f"A: {a.get('name')} ({a.get('architecture')}, fingerprint {str(a.get('fingerprint'))[:12]})",
                 f"B: {b.get('name')} ({b.get('architecture')}, fingerprint {str(b.get('fingerprint'))[:12]})",
                 f"{s.get('changed', 0)} of {s.get('heads', 0)} heads changed (role {s.get('role_changed', 0)}, "
                 f"shares {s.get('shares_changed', 0)}, slope {s.get('slope_changed', 0)}; a share or slope counts as "
                 "changed when the two 90% intervals do not overlap)"]
        shown = self.rows[self.rows["changed"]]
        if len(shown):
            hdr = f"{'head':<16} {'role A':<15} {'role B':<15} {'shares changed':<34} {'slope A':>8} {'slope B':>8}"
            lines += [hdr, "-" * len(hdr)]
            sl = lambda x: "—" if not np.isfinite(x) else f"{x:.3f}"  # noqa: E731
            for _, r in shown.iterrows():
                mark = "*" if r["slope_changed"] else " "
                lines.append(f"{r['key']:<16} {r['role_a']:<15} {r['role_b']:<15} "
                             f"{', '.join(r['changed_shares']) or '—':<34} {sl(r['slope_a']):>8} {sl(r['slope_b']):>7}{mark}")
            lines.append("(* slope changed beyond its intervals)")
        lines += ["notice: " + n for n in self.notes] + ["note: " + self.caution]
        return "\n".join(lines)

    def payload(self) -> dict:
        heads = []
        for _, r in self.table().iterrows():          # the heads the table shows (changed ones, or all)
            heads.append({"key": r["key"], "stack": r["stack"], "layer": int(r["layer"]), "head": int(r["head"]),
                          "role": {"a": r["role_a"], "b": r["role_b"], "changed": bool(r["role_changed"])},
                          "changed_shares": list(r["changed_shares"]),
                          "slope": {"a": r["slope_a"], "b": r["slope_b"], "changed": bool(r["slope_changed"])},
                          "changed": bool(r["changed"]), "detail": r["detail"]})
        return {"a": self.a, "b": self.b, "summary": self.summary, "rule": RULE, "all_heads": self.all_heads,
                "heads": heads, "notes": self.notes}

    legacy_keys = frozenset({"a", "b", "rule", "heads"})

    @classmethod
    def from_v0(cls, data: dict) -> dict:
        data["all_heads"] = True          # an old file lists what it listed; show all of it
        return data

    @classmethod
    def from_payload(cls, data: dict) -> "CompareResult":
        num = lambda v: np.nan if v is None else float(v)  # noqa: E731
        rows = []
        for e in data["heads"]:
            stack = keys.normal_stack(e["stack"])
            rows.append({"key": keys.head_key(stack, e["layer"], e["head"]), "stack": stack, "layer": int(e["layer"]),
                         "head": int(e["head"]), "role_a": e["role"]["a"], "role_b": e["role"]["b"],
                         "role_changed": bool(e["role"]["changed"]), "changed_shares": list(e["changed_shares"]),
                         "slope_a": num(e["slope"]["a"]), "slope_b": num(e["slope"]["b"]),
                         "slope_changed": bool(e["slope"]["changed"]), "changed": bool(e["changed"]),
                         "detail": str(e.get("detail") or "")})
        return cls(a=dict(data["a"] or {}), b=dict(data["b"] or {}), rows=pd.DataFrame(rows, columns=COLUMNS),
                   summary=dict(data.get("summary") or {}), notes=list(data.get("notes") or []),
                   all_heads=bool(data.get("all_heads")), caution=data.get("caution", CAUTION))
