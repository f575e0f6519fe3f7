"""`SweepResult`: a training run's timeline — every head's role and key statistics at every swept checkpoint, the
step from which each role holds, and the training loss curve on the same step axis.

Made by :func:`attnpos.sweeping.sweep` (or :func:`attnpos.sweeping.timeline` from a store). Roles are the scan's
point roles (``role`` the primary one, ``tags`` every role whose criterion holds); a role *emerges* at the first
swept step from which its criterion holds at every later swept step, up to the last one.

>>> import pandas as pd
>>> rows = [dict(step=s, key="L0.H0", stack="main", layer=0, head=0, role=r, tags=[r], mass_previous=m)
...         for s, r, m in [(10, "mixed", 0.2), (20, "previous-token", 0.6), (30, "mixed", 0.4),
...                         (40, "previous-token", 0.7), (50, "previous-token", 0.8)]]
>>> res = SweepResult(points=[{"step": s, "status": "ok"} for s in (10, 20, 30, 40, 50)], heads=pd.DataFrame(rows))
>>> res.emergence()[["head", "role", "emerged", "first_seen"]].values.tolist()
[['L0.H0', 'previous-token', 40, 20]]
>>> res.role_emergence()["previous-token"]["step"]
40
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import roles
from ..core.protocol import CAUTION, Result

STATS = ("mass_previous", "mass_next", "mass_first", "mass_self", "entropy_ratio", "induction", "slope",
         "share_distance", "share_slot", "share_content", "share_residual", "anchor_weight")
"""The head-table statistics the timeline keeps per head and step."""

ID = ("step", "key", "stack", "layer", "head", "role", "tags")


def _num(x) -> float:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return math.nan
    return x


@dataclass(repr=False, eq=False)
class SweepResult(Result):
    """The result of :func:`attnpos.sweeping.sweep`.

    Attributes:
        points: one dict per swept checkpoint, in step order: ``name``, ``source``, ``step``, ``step_from`` (where
            the step came from: the folder name, ``trainer_state.json``, the training record, or the order given),
            ``status`` (``ok``, ``failed`` or ``missing`` — not scanned yet), ``error``, ``key`` (the store entry).
        heads: the long table: one row per checkpoint × head with ``step``, ``key`` (the head key), ``stack``,
            ``layer``, ``head``, ``role``, ``tags`` and the statistics :data:`STATS`.
        loss: training loss curves by run: ``{run: {"source": ..., "unit": ..., "step": [...], "loss": [...]}}``.
        model: facts about the last scanned checkpoint (name, architecture, scheme, layers, heads).
        settings: the texts' hash and the scan settings of the sweep; ``store``: where its results are.
    """

    result_kind = "sweep"
    version = 1

    points: list
    heads: pd.DataFrame
    loss: dict = field(default_factory=dict)
    model: dict = field(default_factory=dict)
    settings: dict = field(default_factory=dict)
    caution: str = CAUTION

    def __post_init__(self):
        h = self.heads.copy() if self.heads is not None else pd.DataFrame(columns=list(ID))
        for c in ID:
            if c not in h.columns:
                h[c] = None
        for c in STATS:
            h[c] = h[c].map(_num).astype(float) if c in h.columns else np.nan
        h["tags"] = [list(t) if isinstance(t, (list, tuple, np.ndarray)) else [] for t in h["tags"]]
        for c in ("step", "layer", "head"):
            h[c] = h[c].astype(int) if len(h) else h[c]
        self.heads = h[list(ID) + list(STATS)].sort_values(["step", "stack", "layer", "head"], kind="stable") \
            .reset_index(drop=True)

    @classmethod
    def from_scans(cls, scans, loss: dict | None = None) -> "SweepResult":
        """A timeline of scans already in memory: ``scans`` is a list of ``(step, Scan)``; ``loss`` as
        :attr:`loss`. (A sweep builds the same from its store.)"""
        from ..core import keys

        rows, points, model = [], [], {}
        for step, scan in sorted(scans, key=lambda sc: sc[0]):
            t = scan.heads.copy()
            t["key"] = [keys.head_key(s, la, h) for s, la, h in zip(t["stack"], t["layer"], t["head"])]
            t["step"] = int(step)
            rows.append(t)
            m = scan.model or {}
            points.append({"name": m.get("name"), "source": m.get("path"), "step": int(step), "step_from": "given",
                           "status": "ok", "error": None, "key": m.get("fingerprint")})
            model = {k: m.get(k) for k in ("name", "architecture", "scheme", "layers", "heads", "fingerprint")}
        heads = pd.concat(rows, ignore_index=True) if rows else None
        th = scans[-1][1].texts_hash if scans else ""
        return cls(points=points, heads=heads, loss=dict(loss or {}), model=model, settings={"texts_hash": th})

    # ---------------------------------------------------------------- access
    def steps(self) -> list[int]:
        """The steps of the scanned checkpoints, ascending."""
        return sorted({int(s) for s in self.heads["step"]})

    def head_keys(self) -> list[str]:
        """Head keys in table order (stack, layer, head)."""
        t = self.heads.drop_duplicates("key").sort_values(["stack", "layer", "head"], kind="stable")
        return list(t["key"])

    def grid(self, value: str = "role") -> pd.DataFrame:
        """Heads × steps: the primary role (or any statistic of :data:`STATS`) of each head at each step."""
        g = self.heads.pivot(index="key", columns="step", values=value)
        return g.reindex(index=self.head_keys(), columns=self.steps())

    def history(self, head: str) -> pd.DataFrame:
        """One head across steps: its role, tags and statistics."""
        t = self.heads[self.heads["key"] == head]
        if t.empty:
            from ..errors import AttnposError

            raise AttnposError(f"No head {head!r} in this sweep; its heads are {', '.join(self.head_keys()[:8])}…")
        return t.drop(columns=["key", "stack", "layer", "head"]).set_index("step")

    def emergence(self) -> pd.DataFrame:
        """Per head, every role that holds at the last step: ``emerged`` (the first step from which it holds to
        the end), ``first_seen`` (the first step it held at all), ``steps_held`` and whether it is the head's
        primary role at the end."""
        rows = []
        steps = self.steps()
        for key in self.head_keys():
            g = self.heads[self.heads["key"] == key].sort_values("step")
            tags = list(g["tags"])
            if not tags:
                continue
            at = list(g["step"])
            for role in tags[-1]:
                flags = [role in t for t in tags]
                broken = max((i for i, f in enumerate(flags) if not f), default=-1)
                rows.append({"head": key, "role": role, "primary": role == g["role"].iloc[-1],
                             "emerged": int(at[broken + 1]), "first_seen": int(at[flags.index(True)]),
                             "steps_held": int(sum(flags)), "steps": len(steps)})
        return pd.DataFrame(rows, columns=["head", "role", "primary", "emerged", "first_seen", "steps_held", "steps"])

    def role_emergence(self) -> dict:
        """Per role that some head holds at the last step: ``step`` — the first step from which at least one head
        holds it to the end — and the ``heads`` that hold it at the end (earliest first)."""
        e = self.emergence()
        out = {}
        order = {name: i for i, name in enumerate(roles.names())}
        for role, g in sorted(e.groupby("role"), key=lambda kv: order.get(kv[0], 99)):
            g = g.sort_values(["emerged", "head"])
            out[role] = {"step": int(g["emerged"].iloc[0]), "heads": list(g["head"])}
        return out

    def curve(self, run: str | None = None) -> pd.DataFrame:
        """The training loss curve of one run (the first one by default) as a table: step, loss."""
        if not self.loss:
            return pd.DataFrame(columns=["step", "loss"])
        c = self.loss[run] if run is not None else next(iter(self.loss.values()))
        return pd.DataFrame({"step": c["step"], "loss": c["loss"]})

    def failed(self) -> list[dict]:
        return [p for p in self.points if p.get("status") == "failed"]

    # ---------------------------------------------------------------- protocol
    def table(self) -> pd.DataFrame:
        """The emergence table (see :meth:`emergence`)."""
        return self.emergence()

    def headline(self) -> str:
        ok = sum(p.get("status") == "ok" for p in self.points)
        steps = self.steps()
        span = f"steps {steps[0]}–{steps[-1]}" if steps else "no step scanned"
        name = (self.model or {}).get("name")
        return (f"sweep{' of ' + str(name) if name else ''}: {ok} of {len(self.points)} checkpoints scanned ({span}), "
                f"{len(self.head_keys())} heads")

    def text(self) -> str:
        lines = [self.headline()]
        re_ = self.role_emergence()
        for role, info in re_.items():
            if role == roles.FALLBACK:
                continue
            heads = ", ".join(info["heads"][:6]) + (" …" if len(info["heads"]) > 6 else "")
            lines.append(f"  {role:<15} holds from step {info['step']} to the end ({heads})")
        if not [r for r in re_ if r != roles.FALLBACK]:
            lines.append("  no role but 'mixed' holds at the last step")
        for p in self.failed():
            lines.append(f"  failed: {p.get('name')} (step {p.get('step')}): {p.get('error')}")
        missing = [p for p in self.points if p.get("status") == "missing"]
        if missing:
            lines.append(f"  not scanned yet: {len(missing)} checkpoints (run the sweep again to finish)")
        for run, c in self.loss.items():
            if c.get("step"):
                lines.append(f"  loss curve of {run}: {len(c['step'])} points from {c.get('source')}")
        with pd.option_context("display.width", 120, "display.max_rows", 60):
            lines.append(self.emergence().to_string(index=False))
        lines.append("note: " + self.caution)
        return "\n".join(lines)

    def payload(self) -> dict:
        heads = []
        for r in self.heads.to_dict("records"):
            heads.append({**{k: r[k] for k in ID}, **{k: r[k] for k in STATS}})
        return {"points": self.points, "heads": heads, "loss": self.loss, "model": self.model,
                "settings": self.settings, "emergence": self.emergence().to_dict("records"),
                "caution": self.caution}

    @classmethod
    def from_payload(cls, data: dict) -> "SweepResult":
        points = data["points"]
        if not isinstance(points, list) or not all(isinstance(p, dict) for p in points):
            raise ValueError("points must be a list of objects")
        heads = data["heads"]
        if not isinstance(heads, list):
            raise ValueError("heads must be a list")
        for h in heads:
            if not isinstance(h, dict) or not isinstance(h.get("key"), str) or not isinstance(h.get("role"), str):
                raise ValueError("each head row needs a key and a role")
            if not isinstance(h.get("tags"), list):
                raise ValueError("each head row needs its tags (a list)")
        loss = data.get("loss") or {}
        for run, c in loss.items():
            if len(c.get("step") or []) != len(c.get("loss") or []):
                raise ValueError(f"the loss curve of {run} has steps and losses of different lengths")
        return cls(points=[dict(p) for p in points], heads=pd.DataFrame(heads, columns=list(ID) + list(STATS)),
                   loss=dict(loss), model=dict(data.get("model") or {}), settings=dict(data.get("settings") or {}),
                   caution=str(data.get("caution") or CAUTION))
