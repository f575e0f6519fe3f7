"""Past the training length: per-position loss, attention entropy and first-token weight, and role drift.

The texts are joined and cut into sequences of exactly ``to`` tokens (special tokens included, e.g. a leading
``<bos>``), and the model reads each sequence once. Three things are measured:

* **per-position loss** — the next-token cross-entropy (nats) of the prediction made after reading ``p`` tokens,
  for p = 1 … to − 1 (so position ``p`` predicts the token at index ``p``), averaged over the sequences, with 90%
  bootstrap intervals (sequences resampled). Averaged over positions it is exactly the loss the model reports
  for the same sequences (``labels=`` in transformers): the same cross-entropy, split by position.
* **per head, as functions of the query position** (binned): the entropy of the weights relative to the uniform
  spread over the visible keys (``entropy``; 1 = uniform) and in nats (``entropy_nats``), and the weight on the
  first token (``first_weight``; slot 0, usually ``<bos>``/``[CLS]``, where attention sinks form, Xiao et al. 2024).
* **role drift** — each head's role from weight statistics (:mod:`attnpos.roles`: previous-token, next-token,
  anchor, counting, mixed; local/content need the score split of ``attnpos scan``) computed on the queries
  inside the training length and, separately, on the queries beyond it.

The training length comes from ``training_length=`` (CLI ``--training-length``), else the subject (reference
models record it), else the model config (``original_max_position_embeddings`` of a RoPE scaling, then
``max_position_embeddings``/``n_positions`` — a guess, said so in the notes).

A learned or fixed position *table* (learned-absolute, sinusoidal GPT-2 style) has one row per position: such a
model cannot read positions past its table, and asking for more raises :class:`~attnpos.errors.AttnposError`.

Press, Smith & Lewis 2022 (ALiBi) measure exactly this curve: loss per position past the training length.

Example::

    >>> res = length(attnpos.load("ref:alibi"), to=512)          # doctest: +SKIP
    >>> res.summary["loss_at"]                                     # doctest: +SKIP

Command line: ``attnpos length ref:alibi --to 512 --json length.json``.
"""

from __future__ import annotations

import dataclasses
import json
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .capture import LayerCapture, Reducer
from .errors import AttnposError


CAUTION = (
    "Attention weights are evidence, not explanation (Jain & Wallace 2019; Wiegreffe & Pinter 2019): a head whose "
    "entropy or role changes past the training length is a lead, to be confirmed with an intervention (the shift "
    "test, or ablating the head). Per-position loss is measured on these texts only."
)

#: sequences cut from the texts (at most)
SEQUENCES = 16
#: about this many query-position bins
BINS = 16
#: bootstrap resamples (over sequences) for the loss intervals
BOOT = 200
#: "loss at k×" = mean loss over the positions (k·L − L/4, k·L]
LOSS_AT = (1, 2, 4)
#: generated documents (not part of the reference models' training corpus) are drawn with this seed
CORPUS_SEED_OFFSET = 1


# --------------------------------------------------------------------------------------------------- result

@dataclass
class LengthResult:
    """What :func:`length` measured (see the module doc). ``loss``/``loss_lo``/``loss_hi`` are None when the model
    has no language-model head."""

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

    def to_json(self) -> dict:
        from .result import json_safe

        return json_safe({
            "model": self.model.get("name"), "subject": self.model,
            "position": self.position, "loss": self.loss, "loss_lo": self.loss_lo, "loss_hi": self.loss_hi,
            "training_length": self.training_length, "training_length_source": self.training_length_source,
            "bins": self.bins, "heads": self.heads, "drift": self.drift, "summary": self.summary,
            "settings": self.settings, "notes": self.notes, "caution": self.caution,
        })

    def save(self, path: str | Path) -> Path:
        path = Path(path)
        path.write_text(json.dumps(self.to_json(), indent=1, ensure_ascii=False), encoding="utf-8")
        return path

    def table(self) -> str:
        m, s = self.model, self.settings
        L = self.training_length
        lines = [f"{m.get('name')}  {m.get('architecture')}  scheme={m.get('scheme')}  causal={m.get('causal')}",
                 f"{s['n_sequences']} sequences of {s['to']} tokens; training length "
                 f"{L if L else 'unknown'} ({self.training_length_source})", ""]

        def f(x, w=7, nd=3):
            return ("—" if x is None or not np.isfinite(x) else f"{x:.{nd}f}").rjust(w)

        if self.loss is not None:
            lines.append("next-token loss (nats) by position, mean over sequences, with the 90% bootstrap interval "
                         "of the bin mean (sequences resampled):")
            lines.append(f"{'positions':>13}  {'loss':>7}  {'interval':>17}")
            for r in self.summary.get("bin_loss") or []:
                a, b = r["positions"]
                mark = "  ← beyond training length" if L and a >= L else ""
                lines.append(f"{f'{a}–{b}':>13}  {f(r['loss'])}  [{f(r['lo'])}, {f(r['hi'])}]{mark}")
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
                lines.append(f"  L{r['layer']}.H{r['head']}: entropy {f(r['entropy_inside'], 0, 2)} → "
                             f"{f(r['entropy_beyond'], 0, 2)}, first {f(r['first_inside'], 0, 2)} → "
                             f"{f(r['first_beyond'], 0, 2)}")
        if self.drift is not None:
            changed = [d for d in self.drift if d["changed"]]
            lines.append(f"role drift (weight-based roles, queries inside vs beyond the training length): "
                         f"{len(changed)} of {len(self.drift)} heads change role")
            for d in changed[:12]:
                lines.append(f"  L{d['layer']}.H{d['head']}: {d['inside']['role']} → {d['beyond']['role']}")
        for n in self.notes:
            lines.append("notice: " + n)
        lines.append("note: " + self.caution)
        return "\n".join(lines)

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
            tag = (f"{stack[:3]}:" if stack != "main" else "") + f"L{layer}"
            for key, label in (("entropy", "entropy"), ("first_weight", "first")):
                arr = np.array([[np.nan if v is None else v for v in h[key]] for h in hs], dtype=float)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RuntimeWarning)
                    mean = np.nanmean(arr, axis=0)
                out.append(f"{tag + ' ' + label:<14}" + "".join(f(mean[c], 10, 2) for c in cols))
        out.append("")
        return out


# --------------------------------------------------------------------------------------------------- reducers

class PositionCurves(Reducer):
    """Per site and head, binned by query position: entropy (relative and nats) and weight on slot 0."""

    name = "position-curves"

    def __init__(self, edges: np.ndarray):
        self.edges = np.asarray(edges, dtype=float)

    def begin(self, subject, units) -> None:
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.index = {k: i for i, k in enumerate(self.keys)}
        S, H, B = len(self.keys), subject.n_heads, len(self.edges) - 1
        self.ent = np.zeros((S, H, B))
        self.nats = np.zeros((S, H, B))
        self.first = np.zeros((S, H, B))
        self.n_ent = np.zeros((S, B))
        self.n_first = np.zeros((S, B))
        self._bin_cache: dict[int, np.ndarray] = {}

    def _bins(self, T: int) -> np.ndarray:
        if T not in self._bin_cache:
            b = np.searchsorted(self.edges, np.arange(T), side="right") - 1
            b[(b < 0) | (b >= len(self.edges) - 1)] = -1
            self._bin_cache = {T: b}
        return self._bin_cache[T]

    def update(self, cap: LayerCapture) -> None:
        w, A = cap.weights, cap.allowed
        T = w.shape[-1]
        si = self.index[(cap.site.stack, cap.site.layer)]
        ordinary = ~np.asarray(cap.unit.special[:T], dtype=bool)
        n_allowed = A.sum(-1).numpy()
        b = self._bins(T)
        B = len(self.edges) - 1
        ent = torch.special.entr(w).sum(-1).double().numpy()          # (n, T) nats
        q_ent = ordinary & (n_allowed >= 2) & (b >= 0)
        rel = ent / np.log(np.maximum(n_allowed, 2))[None, :]
        first = w[:, :, 0].double().numpy()
        q_first = ordinary & A[:, 0].numpy() & (np.arange(T) >= 1) & (b >= 0)
        for arr, vals, mask in ((self.ent, rel, q_ent), (self.nats, ent, q_ent), (self.first, first, q_first)):
            idx = b[mask]
            for h in range(cap.n_heads):
                arr[si, cap.head0 + h] += np.bincount(idx, weights=vals[h, mask], minlength=B)
        if cap.head0 == 0:
            self.n_ent[si] += np.bincount(b[q_ent], minlength=B)
            self.n_first[si] += np.bincount(b[q_first], minlength=B)

    def result(self) -> dict:
        with np.errstate(invalid="ignore", divide="ignore"):
            n_e = np.where(self.n_ent > 0, self.n_ent, np.nan)[:, None, :]
            n_f = np.where(self.n_first > 0, self.n_first, np.nan)[:, None, :]
            return {"keys": self.keys, "entropy": self.ent / n_e, "entropy_nats": self.nats / n_e,
                    "first_weight": self.first / n_f}


class RangeWeights(Reducer):
    """:class:`~attnpos.reducers.WeightStats` twice: once on queries before ``split`` and once on the rest.

    WeightStats filters queries through the unit's ``special`` mask, so each copy sees the capture with the queries
    outside its range marked as special."""

    name = "range-weights"

    def __init__(self, split: int):
        from .reducers import WeightStats

        self.split = int(split)
        self.inside, self.beyond = WeightStats(), WeightStats()

    def begin(self, subject, units) -> None:
        self.inside.begin(subject, units)
        self.beyond.begin(subject, units)
        self._units: dict[int, tuple] = {}

    def _masked(self, cap: LayerCapture):
        if cap.text not in self._units:
            u = cap.unit
            q = np.arange(len(u))
            a = dataclasses.replace(u, special=np.asarray(u.special, dtype=bool) | (q >= self.split))
            b = dataclasses.replace(u, special=np.asarray(u.special, dtype=bool) | (q < self.split))
            self._units = {cap.text: (a, b)}
        return self._units[cap.text]

    def update(self, cap: LayerCapture) -> None:
        a, b = self._masked(cap)
        self.inside.update(dataclasses.replace(cap, unit=a))
        if cap.weights.shape[-1] > self.split:
            self.beyond.update(dataclasses.replace(cap, unit=b))

    def result(self) -> dict:
        return {"inside": self.inside.result(), "beyond": self.beyond.result()}


# --------------------------------------------------------------------------------------------------- helpers

def training_length_of(subject, given: int | None = None) -> tuple[int | None, str]:
    """(training length, where it came from)."""
    if given:
        return int(given), "given by the user"
    if subject.training_length:
        return int(subject.training_length), "recorded with the model"
    cfg = subject.model.config
    for holder in ("rope_parameters", "rope_scaling"):
        rp = getattr(cfg, holder, None)
        if isinstance(rp, dict) and rp.get("original_max_position_embeddings"):
            return int(rp["original_max_position_embeddings"]), f"config {holder}.original_max_position_embeddings"
    for name in ("max_position_embeddings", "n_positions", "seq_length"):
        v = getattr(cfg, name, None)
        if v:
            return int(v), f"config {name} (a guess: the context the model was built for)"
    return None, "unknown"


def table_limit(subject) -> int | None:
    """The number of rows of the position table, for schemes that read one (None: no hard limit)."""
    if any(s.scheme in ("learned-absolute", "sinusoidal") for s in subject.sites) and subject.context_limit:
        return int(subject.context_limit)
    return None


def _bin_edges(to: int, L: int | None, n_bins: int) -> np.ndarray:
    """Edges over query positions 0 … to; when L is known, L (and its multiples) fall on edges."""
    if L and L < to:
        m = max(1, round(n_bins * L / to))
        width = L / m
    else:
        width = to / n_bins
    width = max(width, 1.0)
    edges = np.arange(0.0, to + width, width)
    edges = np.unique(np.round(edges).astype(int))
    edges = edges[edges <= to]
    if edges[-1] < to:
        edges = np.append(edges, to)
    return edges


def _default_text(tokenizer, need_tokens: int) -> list[str]:
    """Freshly generated documents of the reference corpus scenarios (a seed the training corpus does not use)."""
    from .reference import corpus

    seed = corpus.CORPUS_SEED + CORPUS_SEED_OFFSET
    probe_docs = corpus.generate_documents(seed=seed, target_bytes=4000)
    sample = "\n".join(probe_docs)
    per_byte = max(len(tokenizer(sample, add_special_tokens=False, verbose=False)["input_ids"]) / max(len(sample.encode()), 1), 0.05)
    target = int(need_tokens / per_byte * 1.15) + 2000
    return corpus.generate_documents(seed=seed, target_bytes=target)


def sequences(subject, texts, to: int, n_sequences: int = SEQUENCES) -> tuple[list, list[str]]:
    """Cut the joined texts into at most ``n_sequences`` token sequences of exactly ``to`` tokens."""
    from .texts import TextUnit, _display, _template, as_raw

    tok = subject.tokenizer
    prefix, suffix = _template(tok)
    room = to - len(prefix) - len(suffix)
    notes: list[str] = []
    if room < 1:
        raise AttnposError(f"--to {to} leaves no room for text after the special tokens the tokenizer adds "
                           f"({len(prefix) + len(suffix)}); use a larger --to.")
    if texts is None:
        raw_strings = _default_text(tok, room * n_sequences)
        notes.append("Texts: freshly generated documents in the reference corpus scenarios "
                     "(attnpos.reference.corpus, a seed the training corpus does not use).")
    else:
        raw_strings = [r.text for r in as_raw(texts)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        body = list(tok("\n\n".join(raw_strings), add_special_tokens=False, verbose=False)["input_ids"])
    n = min(n_sequences, len(body) // room)
    if n < 1:
        raise AttnposError(f"The texts hold {len(body)} tokens, fewer than one sequence of {room} text tokens "
                           f"(--to {to}). Pass longer texts with --text, or leave --text out to use generated "
                           "documents.")
    if n < n_sequences:
        notes.append(f"The texts gave {n} sequences of {to} tokens (asked for {n_sequences}); intervals are wider. "
                     "Pass longer texts for more.")
    special_ids = set(getattr(tok, "all_special_ids", []) or [])
    units = []
    for k in range(n):
        ids = prefix + body[k * room:(k + 1) * room] + suffix
        special = np.zeros(len(ids), dtype=bool)
        special[:len(prefix)] = True
        if suffix:
            special[len(ids) - len(suffix):] = True
        if special_ids:
            special |= np.isin(np.asarray(ids), list(special_ids))
        units.append(TextUnit(name=f"sequence{k + 1}", source="<length>", ids=ids, tokens=_display(tok, ids),
                              special=special))
    return units, notes


def _loss_table(units, token_loss) -> np.ndarray | None:
    if not token_loss or any(t is None for t in token_loss):
        return None
    rows = []
    for u, tl in zip(units, token_loss):
        tl = np.asarray(tl, dtype=float).copy()
        tl[np.asarray(u.special[1:len(tl) + 1], dtype=bool)] = np.nan     # no special targets
        rows.append(tl)
    return np.stack(rows)                                                 # (n, to − 1)


def _bootstrap(loss: np.ndarray, n_boot: int, seed: int) -> np.ndarray | None:
    """(n_boot, positions): per-position mean loss of each resample of the sequences (None with < 2 sequences)."""
    n = loss.shape[0]
    if n < 2 or not n_boot:
        return None
    rng = np.random.default_rng(seed)
    means = np.empty((n_boot, loss.shape[1]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for b in range(n_boot):
            means[b] = np.nanmean(loss[rng.integers(0, n, n)], axis=0)
    return means


def _interval(boot: np.ndarray | None, sel=None) -> tuple[Any, Any]:
    """90% percentile interval of the mean over the selected positions (all positions separately if sel is None)."""
    if boot is None:
        return (None, None) if sel is not None else (None, None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        x = boot if sel is None else np.nanmean(boot[:, sel], axis=1)
        return np.nanpercentile(x, 5, axis=0), np.nanpercentile(x, 95, axis=0)


def _role_rows(subject, weights: dict) -> list[dict]:
    from .roles import assign

    out = []
    causal_of = {(s.stack, s.layer): s.causal for s in subject.sites}
    for si, key in enumerate(weights["keys"]):
        for h in range(subject.n_heads):
            r = {f"mass_{m}": float(weights["mass"][m][si, h]) for m in ("previous", "next", "first", "self")}
            r.update(entropy_ratio=float(weights["entropy_ratio"][si, h]),
                     anchor_slot=float(weights["anchor_slot"][si, h]),
                     anchor_weight=float(weights["anchor_weight"][si, h]))
            role, tags, evidence = assign(r, causal_of.get(key, subject.causal))
            r.update(role=role, tags=tags, evidence=evidence)
            out.append({"stack": key[0], "layer": key[1], "head": h, **{"stats": r}})
    return out


# --------------------------------------------------------------------------------------------------- main

def length(subject, texts=None, *, to: int | None = None, training_length: int | None = None,
           n_sequences: int = SEQUENCES, bins: int = BINS, n_boot: int = BOOT, seed: int = 0) -> LengthResult:
    """Measure behaviour from position 1 to ``to``, which may exceed the training length.

    Args:
        subject: a :class:`~attnpos.subject.Subject`, a model folder or ``"ref:<scheme>"``.
        texts: strings, Paths or RawTexts, joined and cut into sequences of exactly ``to`` tokens; None uses freshly
            generated documents of the reference corpus scenarios.
        to: sequence length in tokens (default: 4× the training length, capped by a position table).
        training_length: the context the model was trained on, when the model does not record it.
        n_sequences: at most this many sequences.
        bins: about this many query-position bins for the per-head curves.
        n_boot: bootstrap resamples (over sequences) for the loss intervals.
    """
    from .capture import record
    from .subject import Subject, load

    if not isinstance(subject, Subject):
        subject = load(subject)
    notes: list[str] = []
    L, source = training_length_of(subject, training_length)
    limit = table_limit(subject)
    if to is None:
        if L is None:
            raise AttnposError("Give the sequence length with --to N: the training length of this model is unknown, "
                               "so no default can be derived (or give --training-length).")
        to = 4 * L if limit is None else min(4 * L, limit)
    to = int(to)
    if to < 4:
        raise AttnposError(f"--to {to} is too short; use at least 4 tokens.")
    if limit is not None and to > limit:
        scheme = ", ".join(sorted({s.scheme for s in subject.sites if s.scheme in ('learned-absolute', 'sinusoidal')}))
        raise AttnposError(
            f"{subject.name} reads its positions from a {scheme} table of {limit} rows (positions 0 … {limit - 1}), "
            f"so it cannot read a sequence of {to} tokens: there is no row for position {limit} or later, and no "
            f"way to extrapolate a table. Use --to {limit} or less"
            + (f" (positions past the training length {L} up to {limit - 1} exist in the table but were never "
               "trained)" if L and L < limit else "") + ".")
    if L is not None and limit is not None and L < to and any(s.scheme == "learned-absolute" for s in subject.sites):
        notes.append(f"Positions {L} … {to - 1} have rows in the learned table but were not seen in training "
                     f"(training length {L}); their rows hold whatever initialisation and weight decay left.")
    if L is None:
        notes.append("The training length is unknown: no inside/beyond split (role drift) and no loss at multiples "
                     "of it. Give it with training_length= (CLI --training-length).")
    units, snotes = sequences(subject, texts, to, n_sequences)
    notes += snotes
    edges = _bin_edges(to, L, bins)
    reducers: list[Reducer] = [PositionCurves(edges)]
    drift_on = L is not None and L < to
    if drift_on:
        reducers.append(RangeWeights(L))
    elif L is not None:
        notes.append(f"--to {to} does not go past the training length {L}: nothing to compare beyond it.")
    want_loss = subject.causal and not subject.is_encoder_decoder
    rec = record(subject, units=units, reducers=reducers, token_loss=want_loss, progress=False)
    loss_tab = _loss_table(units, rec.token_loss) if want_loss else None
    position = list(range(1, to))
    summary: dict[str, Any] = {}
    if loss_tab is None:
        loss = lo = hi = None
        summary["loss_note"] = ("the model has no language-model head (an encoder or a base model without logits)"
                                if not subject.is_encoder_decoder else
                                "encoder-decoder models: the decoder's loss is not a per-position loss of the text")
        if not want_loss and not subject.is_encoder_decoder:
            summary["loss_note"] = "the model is not causal (an encoder): it has no next-token loss"
        notes.append("Per-position loss is not available: " + summary["loss_note"] + ". Entropy, first-token weight "
                     "and role drift are reported.")
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            mean = np.nanmean(loss_tab, axis=0)
        boot = _bootstrap(loss_tab, n_boot, seed)
        lo_a, hi_a = _interval(boot)
        if lo_a is None:
            lo_a = hi_a = np.full(len(mean), np.nan)
            notes.append("Only one sequence: no intervals.")
        loss, lo, hi = mean.tolist(), np.asarray(lo_a).tolist(), np.asarray(hi_a).tolist()
        summary["loss_mean"] = float(np.nanmean(loss_tab))
        if L:
            w = max(1, L // 4)
            pos = np.arange(1, to)
            la, la_int = {}, {}
            for k in LOSS_AT:
                sel = (pos > k * L - w) & (pos <= k * L)
                if k * L <= to and sel.any():
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore", RuntimeWarning)
                        la[f"{k}x"] = float(np.nanmean(mean[sel]))
                    a, b = _interval(boot, sel)
                    la_int[f"{k}x"] = None if a is None else [float(a), float(b)]
                else:
                    la[f"{k}x"] = None
                    la_int[f"{k}x"] = None
            summary["loss_at"] = la
            summary["loss_at_interval"] = la_int
            summary["loss_at_window"] = (f"mean over positions (k·L − {w}, k·L] (k·L ≤ to; position to − 1 is the "
                                         f"last), L = {L}")
        if boot is not None:
            summary["bin_loss"] = []
            pos = np.arange(1, to)
            for a_, b_ in [[int(edges[i]), int(edges[i + 1]) - 1] for i in range(len(edges) - 1)]:
                sel = (pos >= max(a_, 1)) & (pos <= b_)
                if not sel.any():
                    continue
                a, b = _interval(boot, sel)
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", RuntimeWarning)
                    summary["bin_loss"].append({"positions": [max(a_, 1), b_], "loss": float(np.nanmean(mean[sel])),
                                                "lo": float(a), "hi": float(b)})
    curves = rec.results["position-curves"]
    heads = []
    for si, key in enumerate(curves["keys"]):
        for h in range(subject.n_heads):
            heads.append({"stack": key[0], "layer": key[1], "head": h, "entropy": curves["entropy"][si, h],
                          "entropy_nats": curves["entropy_nats"][si, h],
                          "first_weight": curves["first_weight"][si, h]})
    bins_list = [[int(edges[i]), int(edges[i + 1]) - 1] for i in range(len(edges) - 1)]
    drift = None
    if drift_on:
        rw = rec.results["range-weights"]
        ins, bey = _role_rows(subject, rw["inside"]), _role_rows(subject, rw["beyond"])
        drift = []
        keep = ("role", "tags", "mass_previous", "mass_next", "mass_first", "mass_self", "entropy_ratio",
                "anchor_slot", "anchor_weight")
        for a, b in zip(ins, bey):
            drift.append({"stack": a["stack"], "layer": a["layer"], "head": a["head"],
                          "inside": {k: a["stats"][k] for k in keep}, "beyond": {k: b["stats"][k] for k in keep},
                          "changed": a["stats"]["role"] != b["stats"]["role"]})
        summary["drift_changed"] = int(sum(d["changed"] for d in drift))
        # the heads whose curves change most between the bins inside and beyond the training length
        inside_bins = np.array([e[1] < L for e in bins_list])
        changes = []
        for hd in heads:
            e, fw = np.asarray(hd["entropy"], float), np.asarray(hd["first_weight"], float)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                ei, eb = np.nanmean(e[inside_bins]), np.nanmean(e[~inside_bins])
                fi, fb = np.nanmean(fw[inside_bins]), np.nanmean(fw[~inside_bins])
            changes.append({"stack": hd["stack"], "layer": hd["layer"], "head": hd["head"], "entropy_inside": ei,
                            "entropy_beyond": eb, "first_inside": fi, "first_beyond": fb,
                            "change": float(np.nansum([abs(eb - ei), abs(fb - fi)]))})
        changes.sort(key=lambda r: -r["change"])
        summary["head_changes"] = changes
    settings = {"to": to, "n_sequences": len(units), "bins": len(bins_list), "n_boot": n_boot, "seed": seed,
                "position": "p = tokens read before the prediction = index of the predicted token (1 … to − 1)",
                "entropy": "entropy of a query's weights / log(number of visible keys); 1 = uniform",
                "first_weight": "weight on slot 0 (the first token), queries at index ≥ 1",
                "drift_roles": "weight-based roles only (previous-token, next-token, anchor, counting, mixed)"}
    return LengthResult(model=subject.describe(), position=position, loss=loss, loss_lo=lo, loss_hi=hi,
                        training_length=L, training_length_source=source, bins=bins_list, heads=heads, drift=drift,
                        summary=summary, settings=settings, notes=notes)


# --------------------------------------------------------------------------------------------------- CLI

def add_arguments(p) -> None:
    from .cli import add_model_arguments

    add_model_arguments(p)
    p.add_argument("--to", type=int, required=True, metavar="N",
                   help="sequence length in tokens (may exceed the training length)")
    p.add_argument("--text", action="append", type=Path, default=None, metavar="PATH",
                   help="a .txt file or a folder of them, joined and cut into sequences of N tokens; repeatable; "
                        "default: freshly generated documents of the reference corpus scenarios")
    p.add_argument("--training-length", type=int, default=None, metavar="L",
                   help="the context length the model was trained on (default: recorded with the model or config)")
    p.add_argument("--sequences", type=int, default=SEQUENCES, metavar="K", help=f"at most K sequences ({SEQUENCES})")
    p.add_argument("--bins", type=int, default=BINS, help=f"about this many query-position bins ({BINS})")
    p.add_argument("--boot", type=int, default=BOOT, help=f"bootstrap resamples for loss intervals ({BOOT})")
    p.add_argument("--json", type=Path, default=None, metavar="OUT", help="write the results as JSON")


def run(args) -> int:
    from .cli import load_subject
    from .texts import read

    subject = load_subject(args)
    texts = read(args.text) if args.text else None
    res = length(subject, texts, to=args.to, training_length=args.training_length, n_sequences=args.sequences,
                 bins=args.bins, n_boot=args.boot)
    print(res.table(), file=sys.stdout)
    if args.json:
        res.save(args.json)
        print(f"wrote {args.json}")
    return 0
