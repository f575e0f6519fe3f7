"""`Scan`: what a full scan produced, in one object that views, the report and the JSON share.

The pipeline that fills it lives in :mod:`attnpos.pipeline`; this module holds the container and its JSON form
(schema ``attnpos.scan/3``; files of ``attnpos.scan/1`` and ``/2`` still load), so views and the report can load a saved scan
without running a model or starting torch. Other results about the same model (a probe, a length run) are attached
with :meth:`Scan.attach`, travel in the same file and are what the curves view draws.

Example (a synthetic scan stands in for ``attnpos.scan("ref:rope")``)::

    >>> from attnpos.views.synthetic import synthetic_scan
    >>> scan = synthetic_scan(2, 3, seed=1)
    >>> scan.heads[["layer", "head", "role"]].shape
    (6, 3)
    >>> again = Scan.from_json(scan.to_json())
    >>> list(again.heads["role"]) == list(scan.heads["role"]), sorted(again.attached)
    (True, ['length', 'probe'])
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import columns, keys, protocol
from ..core.protocol import CAUTION, Result
from ..errors import AttnposError


@dataclass(repr=False, eq=False)
class Scan(Result):
    """The result of :func:`attnpos.scan`.

    Attributes:
        model: facts about the subject: ``path``, ``name``, ``architecture``, ``scheme`` (one name, or a list
            per layer), ``layers``, ``heads``, ``causal``, ``fingerprint``, ``context_limit``,
            ``training_length``, ``capture`` (``"registry"`` or ``"eager-weights"``), ``score_kind``
            (``"scores"`` or ``"log-weights"``).
        texts: one dict per text unit: ``name``, ``source``, ``n_tokens``, ``window`` (``[start, end]`` in the
            source's tokens, or None).
        tokens: display strings per text unit (user text: escape before rendering). Past 64 text units only the
            units whose weight maps are kept have theirs (the others an empty list; ``extra["tokens_left_out"]``
            counts them).
        special: indices of special tokens (BOS/CLS/SEP) per text unit.
        heads: the head table (pandas DataFrame, one row per stack × layer × head, columns
            :func:`attnpos.core.columns.names`).
        profile: ``{"distance": (nb,), "value": (n_heads, nb), "low": ..., "high": ...}``; rows follow ``heads``.
        maps: kept weight maps, ``{(text, stack, layer, head): (T, T) float32 array}`` (not saved in the JSON).
        texts_hash: hash of the token ids of all texts, for findings.
        versions: library versions.
        extra: settings of the stages (split, shift) and small extras (weight by distance), JSON-safe.
        attached: other results about this model, by kind (``"probe"``, ``"length"``): see :meth:`attach`.
    """

    result_kind = "scan"
    version = 3

    model: dict
    texts: list[dict]
    tokens: list[list[str]]
    special: list[list[int]]
    heads: pd.DataFrame
    profile: dict = field(default_factory=dict)
    maps: dict = field(default_factory=dict)
    texts_hash: str = ""
    versions: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)
    caution: str = CAUTION
    attached: dict = field(default_factory=dict)

    # ---------------------------------------------------------------- access
    def head(self, layer: int | str, head: int | None = None, stack: str | None = None) -> pd.Series:
        """The head table row of one head: ``scan.head("L3.H2")`` or ``scan.head(3, 2)``."""
        if isinstance(layer, str):
            k = keys.parse_head(layer)
            stack, layer, head = k.stack, k.layer, k.head
        t = self.heads
        sel = (t["layer"] == layer) & (t["head"] == head)
        if stack is not None:
            sel &= t["stack"] == keys.normal_stack(stack)
        rows = t[sel]
        if rows.empty:
            raise AttnposError(f"No head {keys.head_key(stack, layer, head)} in this scan (it has "
                               f"{self.model.get('layers')} layers and {self.model.get('heads')} heads per layer).")
        return rows.iloc[0]

    def head_keys(self) -> list[str]:
        """The key of every head, in table order."""
        return [keys.head_key(s, l, h) for s, l, h in zip(self.heads["stack"], self.heads["layer"], self.heads["head"])]

    def head_profile(self, layer: int | str, head: int | None = None, stack: str | None = None) -> pd.DataFrame:
        """The distance profile of one head as a small table: distance, value, low, high."""
        row = self.head(layer, head, stack)
        i = int(row.name)
        out = {"distance": self.profile["distance"]}
        for k in ("value", "low", "high"):
            if k in self.profile:
                out[k] = self.profile[k][i]
        return pd.DataFrame(out)

    def weight_map(self, text: int, layer: int, head: int, stack: str = "main") -> np.ndarray | None:
        """The kept weight map (queries × keys) of one head on one text, or None if it was not kept."""
        return self.maps.get((text, stack, layer, head))

    def role_counts(self) -> dict:
        return self.heads["role"].value_counts().to_dict()

    def table(self) -> pd.DataFrame:
        """The head table."""
        return self.heads

    def headline(self) -> str:
        m = self.model or {}
        counts = ", ".join(f"{r} {n}" for r, n in sorted(self.role_counts().items(), key=lambda kv: -kv[1]))
        return (f"scan of {m.get('name')} ({m.get('architecture')}, scheme {m.get('scheme')}): {len(self.heads)} "
                f"heads on {len(self.texts)} texts — {counts}")

    def text(self) -> str:
        """The terminal table: one line per head with its key (as every command takes it), role and evidence."""
        m = self.model
        scheme = m["scheme"] if isinstance(m["scheme"], str) else ",".join(m["scheme"])
        lines = [f"{m['name']}  {m['architecture']}  scheme={scheme}  layers={m['layers']} heads={m['heads']}  "
                 f"causal={m['causal']}  capture={m.get('capture')} ({m.get('score_kind')})",
                 f"texts: {len(self.texts)} ({sum(t['n_tokens'] for t in self.texts)} tokens)  "
                 f"fingerprint {m['fingerprint'][:16]}"]
        width = max([12] + [len(k) + 1 for k in self.head_keys()])
        hdr = (f"{'head':<{width}} {'role':<15} {'sure':>4} {'prev':>5} {'next':>5} {'first':>5} {'self':>5}  {'dist':>5} "
               f"{'slot':>5} {'cont':>5} {'pair':>5} {'resid':>5}  {'slope':>7}  {'ind':>5}  shift")
        lines += [hdr, "-" * len(hdr)]

        def f(x, w=5, nd=2):
            try:
                xf = float(x)
            except (TypeError, ValueError):
                return "—".rjust(w)
            return ("—" if xf != xf else f"{xf:.{nd}f}").rjust(w)

        for key, (_, r) in zip(self.head_keys(), self.heads.iterrows()):
            shift = ("—" if r.get("shift_verdict") is None
                     else f"{r['shift_verdict']} ({float(r['shift_change']):.3f}, {r.get('shift_kind')})")
            between = r.get("role_between")
            if isinstance(between, list) and len(between) == 2:
                shift += f"  between {between[0]} / {between[1]}"
            lines.append(f"{key:<{width}} {r['role']:<15} {f(r.get('role_support'), 4)} {f(r['mass_previous'])} {f(r['mass_next'])} "
                         f"{f(r['mass_first'])} {f(r['mass_self'])}  {f(r['share_distance'])} {f(r['share_slot'])} "
                         f"{f(r['share_content'])} {f(r.get('share_pair'))} {f(r['share_residual'])}  {f(r['slope'], 7, 3)}  "
                         f"{f(r['induction'])}  {shift}")
        counts = self.role_counts()
        lines.append("roles: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items(), key=lambda kv: -kv[1])))
        lines += ["notice: " + n for n in m.get("notes") or []]     # left-out modules, shared layers, GGUF, …
        lines.append("note: " + self.caution)
        return "\n".join(lines)

    # ---------------------------------------------------------------- attached results
    def attach(self, result: Result, *, force: bool = False) -> Result:
        """Keep another result about the same model with this scan (saved in its JSON; the curves view draws a
        probe and a length result). A result of another checkpoint is refused unless ``force``."""
        if not isinstance(result, Result):
            raise AttnposError(f"attach() takes an attnpos result (a probe, length, … result), not "
                               f"{type(result).__name__}.")
        theirs = (getattr(result, "model", None) or {}).get("fingerprint") if isinstance(getattr(result, "model", None), dict) else None
        ours = (self.model or {}).get("fingerprint")
        if theirs and ours and theirs != ours and not force:
            raise AttnposError(f"This {result.result_kind} result was measured on another checkpoint (fingerprint "
                               f"{str(theirs)[:12]}, the scan's is {str(ours)[:12]}). Attach results of the scanned "
                               "model, or pass force=True if that is what you want.")
        self.attached[result.result_kind] = result
        return result

    # ---------------------------------------------------------------- JSON
    def payload(self) -> dict:
        heads = []
        prof = self.profile or {}
        for i, r in enumerate(self.heads.reset_index(drop=True).to_dict("records")):
            e = {"key": keys.head_key(r["stack"], r["layer"], r["head"]), **columns.to_entry(r)}
            if "value" in prof:
                e["profile"] = {"distance": prof["distance"], "value": prof["value"][i],
                                "low": prof["low"][i] if "low" in prof else None,
                                "high": prof["high"][i] if "high" in prof else None}
            heads.append(e)
        return {"model": self.model, "versions": self.versions, "texts": self.texts, "texts_hash": self.texts_hash,
                "tokens": self.tokens, "special": self.special, "heads": heads, "extra": self.extra,
                "attached": {k: v.to_json() for k, v in self.attached.items()}, "caution": self.caution}

    @classmethod
    def upgrade(cls, data: dict, version: int) -> dict:
        if version not in (1, 2):
            return super().upgrade(data, version)
        if version == 1:
            # scan/1: probe and length results were pasted into extra by hand; they are attached results now
            extra = dict(data.get("extra") or {})
            attached = {}
            for kind in ("probe", "length"):
                if isinstance(extra.get(kind), dict):
                    attached[kind] = extra.pop(kind)
            data["extra"], data["attached"] = extra, attached
        # scan/2 → 3: head entries gained the position-pair share, one change and verdict per shift that ran, the
        # weights' spread and the roles' support; an older entry simply lacks them (read as missing), and its
        # role, tags and evidence stay as they were decided then
        return data

    @classmethod
    def from_payload(cls, data: dict) -> "Scan":
        rows = []
        values, lows, highs, distance = [], [], [], None
        heads = data["heads"]
        if not isinstance(heads, list):
            raise ValueError("heads must be a list")
        for e in heads:
            if not isinstance(e, dict):
                raise ValueError("each head entry must be an object")
            r = columns.from_entry(e)
            r["stack"] = keys.normal_stack(r["stack"])
            rows.append(r)
            pr = e.get("profile")
            if pr:
                d = [float(x) for x in pr["distance"]]
                if distance is not None and len(d) != len(distance):
                    raise ValueError("profiles of different lengths")
                distance = d
                n = len(d)
                for out, k in ((values, "value"), (lows, "low"), (highs, "high")):
                    vals = pr.get(k) or [None] * n
                    if len(vals) != n:
                        raise ValueError(f"profile {k} has {len(vals)} values for {n} distances")
                    out.append([np.nan if v is None else float(v) for v in vals])
        seen = set()
        for r in rows:
            k = (r["stack"], r["layer"], r["head"])
            if k in seen:
                raise ValueError(f"head {keys.head_key(*k)} appears twice")
            seen.add(k)
        table = pd.DataFrame(rows, columns=columns.names())
        profile = {}
        if distance is not None and len(values) == len(rows):
            profile = {"distance": np.asarray(distance, dtype=float), "value": np.asarray(values, dtype=float),
                       "low": np.asarray(lows, dtype=float), "high": np.asarray(highs, dtype=float)}
        texts, tokens = data["texts"], data["tokens"]
        if not isinstance(texts, list) or not isinstance(tokens, list) or len(texts) != len(tokens):
            raise ValueError("texts and tokens must be lists of the same length")
        model = _checked_model(data["model"])
        _checked_texts(texts, tokens)
        special = data.get("special") or [[] for _ in texts]
        if not (isinstance(special, list) and len(special) == len(texts) and all(
                isinstance(x, list) and all(isinstance(i, int) and not isinstance(i, bool) for i in x)
                for x in special)):
            raise ValueError("special must hold one list of token indices per text")
        attached = data.get("attached") or {}
        if not isinstance(attached, dict):
            raise ValueError("attached must be an object")
        attached = {k: protocol.load(v) for k, v in attached.items()}
        return cls(model=model, texts=texts, tokens=tokens,
                   special=special, heads=table, profile=profile,
                   texts_hash=str(data.get("texts_hash", "")), versions=dict(data.get("versions") or {}),
                   extra=dict(data.get("extra") or {}), caution=str(data.get("caution") or CAUTION),
                   attached=attached)


_MODEL_FIELDS = {"name": str, "architecture": str, "layers": int, "heads": int, "causal": bool, "fingerprint": str}


def _checked_model(model) -> dict:
    """The scan's model section, with the fields every reader of a scan relies on checked (a ValueError names the
    first that is missing or of the wrong kind)."""
    if not isinstance(model, dict):
        raise ValueError("model must be an object")
    for name, kind in _MODEL_FIELDS.items():
        v = model.get(name)
        if not isinstance(v, kind) or (kind is int and (isinstance(v, bool) or v < 0)):
            raise ValueError(f"model.{name} must be {'a whole number' if kind is int else kind.__name__}, "
                             f"not {v!r}")
    sch = model.get("scheme")
    if not (isinstance(sch, str) or (isinstance(sch, list) and sch and all(isinstance(x, str) for x in sch))):
        raise ValueError(f"model.scheme must be a scheme name or a list of them, not {sch!r}")
    for name in ("capture", "score_kind", "path"):
        if model.get(name) is not None and not isinstance(model[name], str):
            raise ValueError(f"model.{name} must be text, not {model[name]!r}")
    return dict(model)


def _checked_texts(texts: list, tokens: list) -> None:
    for n, (t, toks) in enumerate(zip(texts, tokens)):
        if not isinstance(t, dict) or not isinstance(t.get("name"), str):
            raise ValueError(f"texts[{n}] must be an object with a name")
        k = t.get("n_tokens")
        if not isinstance(k, int) or isinstance(k, bool) or k < 0:
            raise ValueError(f"texts[{n}].n_tokens must be a whole number, not {k!r}")
        if t.get("source") is not None and not isinstance(t["source"], str):
            raise ValueError(f"texts[{n}].source must be text")
        w = t.get("window")
        if w is not None and not (isinstance(w, list) and len(w) == 2 and all(
                isinstance(i, int) and not isinstance(i, bool) for i in w)):
            raise ValueError(f"texts[{n}].window must be null or two whole numbers")
        if not isinstance(toks, list) or not all(isinstance(x, str) for x in toks):
            raise ValueError(f"tokens[{n}] must be a list of token strings")
