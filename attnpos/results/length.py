"""`LengthResult`: behaviour past the training length — per-position loss with intervals, per-head entropy and
first-token weight by query position, role drift (see :mod:`attnpos.length` for the method)."""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import keys
from ..core.protocol import Result, legacy_model

CAUTION = (
    "Attention weights are evidence, not explanation (Jain & Wallace 2019; Wiegreffe & Pinter 2019): a head whose "
    "entropy or role changes past the training length is a lead, to be confirmed with an intervention (the shift "
    "test, or ablating the head). Per-position loss is measured on these texts only."
)


@dataclass(repr=False, eq=False)
class LengthResult(Result):
    """What :func:`length` measured (see the module doc). ``loss``/``loss_lo``/``loss_hi`` are None when the model
    has no language-model head."""

    result_kind = "length"
    version = 1

    model: dict
    position: list[int]
    loss: list[float] | None
    loss_lo: list[float] | None
    loss_hi: list[float] | None
    training_length: int | None
    training_length_source: str
    bins: list[list[int]]
    heads: list[dict]
    drift: list[dict] | None
    summary: dict
    settings: dict
    notes: list[str] = field(default_factory=list)
    caution: str = CAUTION

    def payload(self) -> dict:
        return {"model": self.model, "position": self.position, "loss": self.loss, "loss_lo": self.loss_lo,
                "loss_hi": self.loss_hi, "training_length": self.training_length,
                "training_length_source": self.training_length_source, "bins": self.bins, "heads": self.heads,
                "drift": self.drift, "summary": self.summary, "settings": self.settings, "notes": self.notes,
                "caution": self.caution}

    legacy_keys = frozenset({"position", "bins", "drift"})
    from_v0 = staticmethod(legacy_model)

    @classmethod
    def from_payload(cls, data: dict) -> "LengthResult":
        num = lambda v: None if v is None else [None if x is None else float(x) for x in v]  # noqa: E731
        position = [int(p) for p in data["position"]]
        loss = num(data.get("loss"))
        for k in ("loss", "loss_lo", "loss_hi"):
            v = data.get(k)
            if v is not None and len(v) != len(position):
                raise ValueError(f"{k} has {len(v)} values for {len(position)} positions")
        tl = data.get("training_length")
        return cls(model=dict(data.get("model") or {}), position=position, loss=loss,
                   loss_lo=num(data.get("loss_lo")), loss_hi=num(data.get("loss_hi")),
                   training_length=None if tl is None else int(tl),
                   training_length_source=str(data.get("training_length_source") or "unknown"),
                   bins=[list(b) for b in data.get("bins") or []], heads=list(data.get("heads") or []),
                   drift=data.get("drift"), summary=dict(data.get("summary") or {}),
                   settings=dict(data.get("settings") or {}), notes=list(data.get("notes") or []),
                   caution=data.get("caution", CAUTION))

    def headline(self) -> str:
        m = self.model or {}
        return (f"past the training length: {m.get('name')}, {len(self.position) + 1}-token sequences, training "
                f"length {self.training_length or 'unknown'}")

    def table(self) -> pd.DataFrame:
        """One row per position: the next-token loss of the prediction made there, with its 90% interval."""
        n = len(self.position)
        col = lambda v: v if v is not None else [None] * n  # noqa: E731
        return pd.DataFrame({"position": self.position, "loss": col(self.loss), "loss_lo": col(self.loss_lo),
                             "loss_hi": col(self.loss_hi)}).astype(float)

    def entropy_curve(self) -> dict | None:
        """Mean over every head of the entropy ratio per query-position bin: ``{"position": bin centres,
        "entropy": …}`` (None when no head curves were kept)."""
        if not self.heads or not self.bins:
            return None
        arr = np.array([[np.nan if v is None else v for v in h["entropy"]] for h in self.heads], dtype=float)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            mean = np.nanmean(arr, axis=0)
        centres = [(a + b) / 2 for a, b in self.bins]
        return {"position": np.asarray(centres, dtype=float), "entropy": mean}

    def text(self) -> str:
        """The terminal report."""
        m, s = self.model, self.settings
        L = self.training_length
        lines = [f"{m.get('name')}  {m.get('architecture')}  scheme={m.get('scheme')}  causal={m.get('causal')}",
                 f"{s['n_sequences']} sequences of {s['to']} tokens; training length "
                 f"{L if L else 'unknown'} ({self.training_length_source})", ""]

        def f(x, w=7, nd=3):
            return ("—" if x is None or not np.isfinite(x) else f"{x:.{nd}f}").rjust(w)

        if self.loss is not None:
            rows = self._loss_rows()
            intervals = any(r.get("lo") is not None and np.isfinite(r["lo"]) for r in rows)
            if intervals:
                lines.append("next-token loss (nats) by position, mean over sequences, with the 90% bootstrap "
                             "interval of the bin mean (sequences resampled):")
                lines.append(f"{'positions':>13}  {'loss':>7}  {'interval':>17}")
            else:
                lines.append("next-token loss (nats) by position, mean over sequences (no intervals: they need at "
                             "least two sequences and bootstrap resamples):")
                lines.append(f"{'positions':>13}  {'loss':>7}")
            for r in rows:
                a, b = r["positions"]
                mark = "  ← beyond training length" if L and a >= L else ""
                iv = f"  [{f(r['lo'])}, {f(r['hi'])}]" if intervals else ""
                lines.append(f"{f'{a}–{b}':>13}  {f(r['loss'])}{iv}{mark}")
            la = self.summary.get("loss_at") or {}
            lines.append("loss at multiples of the training length (mean over the last quarter-length before it): "
                         + ", ".join(f"{k} {f(v, 0)}" for k, v in la.items()))
        else:
            lines.append("loss: not available (" + self.summary.get("loss_note", "no language-model head") + ")")
        lines.append("")
        lines.extend(self._curve_lines(f))
        ch = self.summary.get("head_changes") or []
        if ch:
            lines.append("heads whose attention changes most beyond the training length (entropy / first-token "
                         "weight, inside → beyond):")
            for r in ch[:8]:
                lines.append(f"  {keys.head_key(r.get('stack'), r['layer'], r['head'])}: entropy {f(r['entropy_inside'], 0, 2)} → "
                             f"{f(r['entropy_beyond'], 0, 2)}, first {f(r['first_inside'], 0, 2)} → "
                             f"{f(r['first_beyond'], 0, 2)}")
        if self.drift is not None:
            changed = [d for d in self.drift if d["changed"]]
            lines.append(f"role drift (weight-based roles, queries inside vs beyond the training length): "
                         f"{len(changed)} of {len(self.drift)} heads change role")
            for d in changed[:12]:
                lines.append(f"  {keys.head_key(d.get('stack'), d['layer'], d['head'])}: {d['inside']['role']} → {d['beyond']['role']}")
        for n in self.notes:
            lines.append("notice: " + n)
        lines.append("note: " + self.caution)
        return "\n".join(lines)

    def _loss_rows(self) -> list[dict]:
        """The loss table's rows: the binned losses the stage computed, or — when a file carries none — bins of the
        per-position losses themselves (about 16 of them), so the table never prints a header without rows."""
        rows = [r for r in (self.summary.get("bin_loss") or []) if r.get("loss") is not None]
        if rows or not self.loss:
            return rows
        pos = np.asarray(self.position, dtype=float)
        loss = np.asarray([np.nan if v is None else v for v in self.loss], dtype=float)
        edges = np.unique(np.linspace(0, len(pos), min(16, len(pos)) + 1).round().astype(int))
        out = []
        for a, b in zip(edges[:-1], edges[1:]):
            part = loss[a:b]
            if b > a and np.isfinite(part).any():
                out.append({"positions": [int(pos[a]), int(pos[b - 1])], "loss": float(np.nanmean(part)),
                            "lo": None, "hi": None})
        return out

    def _curve_lines(self, f) -> list[str]:
        """Per layer, mean over its heads of entropy and first-token weight in a few query-position bins."""
        nb = len(self.bins)
        if not nb or not self.heads:
            return []
        cols = sorted(set(np.linspace(0, nb - 1, min(nb, 6)).round().astype(int).tolist()))
        L = self.training_length
        names = [f"{self.bins[c][0]}–{self.bins[c][1]}" + ("*" if L and self.bins[c][0] >= L else "") for c in cols]
        out = ["attention by query position (mean over each layer's heads; entropy 1 = uniform over the visible "
               "keys; first = weight on the first token" + ("; * beyond the training length" if L else "") + "):",
               f"{'queries':<14}" + "".join(f"{n:>10}" for n in names)]
        groups: dict[tuple, list[dict]] = {}
        for h in self.heads:
            groups.setdefault((h["stack"], h["layer"]), []).append(h)
        for (stack, layer), hs in groups.items():
            tag = keys.layer_key(stack, layer)
            for key, label in (("entropy", "entropy"), ("first_weight", "first")):
                arr = np.array([[np.nan if v is None else v for v in h[key]] for h in hs], dtype=float)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RuntimeWarning)
                    mean = np.nanmean(arr, axis=0)
                out.append(f"{tag + ' ' + label:<14}" + "".join(f(mean[c], 10, 2) for c in cols))
        out.append("")
        return out
