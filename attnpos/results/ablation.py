"""`AblationResult`: heads ablated one at a time (or together) and what the model lost — the change of next-token
loss with a 90% bootstrap interval over texts and the change of the final hidden states (see
:mod:`attnpos.ablation` for the method)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import keys
from ..core.protocol import Result

CAUTION = ("An ablation measures what the model loses on these texts when a head's output is replaced; a small "
           "change can mean the head is unused here, or that other heads make up for it (ablate them together to "
           "see). Mean ablation keeps the head's average output, zero ablation does not: compare both before "
           "concluding.")

COLUMNS = ["key", "stack", "layer", "head", "heads", "how", "delta_loss", "delta_loss_lo", "delta_loss_hi",
           "output_change"]


@dataclass(repr=False, eq=False)
class AblationResult(Result):
    """``rows``: one row per ablated head (or group), sorted by ``delta_loss`` (else ``output_change``), largest
    first; ``clean_loss`` the mean loss without ablation (None for models without a language-model head)."""

    result_kind = "ablation"
    version = 1

    model: dict
    rows: pd.DataFrame
    how: str
    together: bool = False
    clean_loss: float | None = None
    n_texts: int = 0
    n_tokens: int = 0
    n_boot: int = 0
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION

    def table(self) -> pd.DataFrame:
        return self.rows

    def row(self, key: str) -> pd.Series:
        """The row of one head (or group ``"L0.H1+L0.H2"``)."""
        want = "+".join(str(keys.parse_head(k)) for k in key.split("+"))
        hit = self.rows[self.rows["key"] == want]
        if hit.empty:
            raise KeyError(f"{key} was not ablated here")
        return hit.iloc[0]

    def headline(self) -> str:
        m = self.model or {}
        at_once = "the heads together" if self.together else "one head at a time"
        clean = f"; clean loss {self.clean_loss:.4f} nats/token" if self.clean_loss is not None else ""
        return (f"{m.get('name')} ({m.get('architecture')}): {self.how} ablation, {at_once}, on {self.n_texts} "
                f"texts ({self.n_tokens} tokens){clean}")

    def text(self) -> str:
        lines = [self.headline()]
        width = max([14] + [len(k) + 1 for k in self.rows["key"]])
        hdr = f"{'head':<{width}} {'Δ loss':>9} {'90% interval':>21}  {'output change':>13}"
        lines += [hdr, "-" * len(hdr)]

        def f(x, nd=4):
            return "—" if x is None or x != x else f"{x:+.{nd}f}"

        for _, r in self.rows.iterrows():
            has_iv = r["delta_loss_lo"] == r["delta_loss_lo"]
            iv = f"[{f(r['delta_loss_lo'])}, {f(r['delta_loss_hi'])}]" if has_iv else "—"
            lines.append(f"{r['key']:<{width}} {f(r['delta_loss']):>9} {iv:>21}  {r['output_change']:>13.4f}")
        lines += ["note: " + n for n in self.notes] + ["note: " + self.caution]
        return "\n".join(lines)

    def payload(self) -> dict:
        heads = []
        for _, r in self.rows.iterrows():
            parts = [dict(zip(("stack", "layer", "head"), keys.parse_head(k))) for k in r["key"].split("+")]
            heads.append({"key": r["key"], "heads": parts,
                          "delta_loss": {"value": r["delta_loss"], "low": r["delta_loss_lo"], "high": r["delta_loss_hi"]},
                          "output_change": r["output_change"]})
        return {"model": self.model, "how": self.how, "together": bool(self.together), "clean_loss": self.clean_loss,
                "n_texts": self.n_texts, "n_tokens": self.n_tokens, "n_boot": self.n_boot, "heads": heads,
                "notes": self.notes}

    @classmethod
    def from_payload(cls, data: dict) -> "AblationResult":
        rows = []
        num = lambda v: np.nan if v is None else float(v)  # noqa: E731
        for e in data["heads"]:
            parts = e["heads"]
            single = parts[0] if len(parts) == 1 else {"stack": None, "layer": None, "head": None}
            key = "+".join(keys.head_key(p["stack"], p["layer"], p["head"]) for p in parts)
            dl = e.get("delta_loss") or {}
            rows.append({"key": key, "stack": single["stack"], "layer": single["layer"], "head": single["head"],
                         "heads": len(parts), "how": data["how"], "delta_loss": num(dl.get("value")),
                         "delta_loss_lo": num(dl.get("low")), "delta_loss_hi": num(dl.get("high")),
                         "output_change": num(e.get("output_change"))})
        clean = data.get("clean_loss")
        return cls(model=dict(data.get("model") or {}), rows=pd.DataFrame(rows, columns=COLUMNS), how=str(data["how"]),
                   together=bool(data.get("together")), clean_loss=None if clean is None else float(clean),
                   n_texts=int(data.get("n_texts") or 0), n_tokens=int(data.get("n_tokens") or 0),
                   n_boot=int(data.get("n_boot") or 0), notes=list(data.get("notes") or []),
                   caution=data.get("caution", CAUTION))
