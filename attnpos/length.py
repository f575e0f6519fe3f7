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

    >>> import attnpos
    >>> res = length(attnpos.load("ref:alibi"), to=256, n_sequences=4, n_boot=20)
    >>> res.training_length, sorted(res.summary["loss_at"]), res.table().shape
    (128, ['1x', '2x', '4x'], (255, 4))

Command line: ``attnpos length ref:alibi --to 512 --json length.json``.
"""

from __future__ import annotations

import dataclasses
import warnings
from typing import Any

import numpy as np
import torch

from .capture import LayerCapture, Reducer
from . import sizes
from .core import progress as _progress
from .core import schemes, settings
from .errors import AttnposError
from .results.length import CAUTION, LengthResult  # noqa: F401  (CAUTION: this stage's caution)


SEQUENCES = settings.LENGTH_SEQUENCES
BINS = settings.LENGTH_BINS
BOOT = settings.LENGTH_BOOT
#: "loss at k×" = mean loss over the positions (k·L − L/4, k·L]
LOSS_AT = (1, 2, 4)
#: generated documents (not part of the reference models' training corpus) are drawn with this seed
CORPUS_SEED_OFFSET = 1


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
        self.inside.update(cap.with_unit(a))
        if cap.weights.shape[-1] > self.split:
            self.beyond.update(cap.with_unit(b))

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
    if schemes.table_schemes([s.scheme for s in subject.sites]) and subject.context_limit:
        return int(subject.context_limit)
    return None


def bin_edges(to: int, L: int | None, n_bins: int) -> np.ndarray:
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


def sequences(subject, texts, to: int, n_sequences: int = SEQUENCES, intervals: bool = True) -> tuple[list, list[str]]:
    """Cut the joined texts into at most ``n_sequences`` token sequences of exactly ``to`` tokens."""
    from .texts import TextUnit, display_tokens, template, as_raw

    tok = subject.tokenizer
    prefix, suffix = template(tok)
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
        notes.append(f"The texts gave {n} sequence{'s' if n > 1 else ''} of {to} tokens (asked for {n_sequences})"
                     + ("; intervals are wider" if n > 1 and intervals else "") + ". Pass longer texts for more.")
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
        units.append(TextUnit(name=f"sequence{k + 1}", source="<length>", ids=ids, tokens=display_tokens(tok, ids),
                              special=special))
    return units, notes


def loss_table(units, token_loss) -> np.ndarray | None:
    """(sequences, to − 1) per-position next-token losses, NaN where the target is a special token (None when a
    sequence has no loss)."""
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


def role_rows(subject, weights: dict) -> list[dict]:
    """Per head, the weight-based statistics and the role they give (:mod:`attnpos.core.roles`)."""
    from .core import roles
    from .roles import weight_rows

    causal_of = {(s.stack, s.layer): s.causal for s in subject.sites}
    out = []
    for r in weight_rows(subject, weights):
        role, tags, evidence = roles.assign(r, causal_of.get((r["stack"], r["layer"]), subject.causal))
        stats = {k: v for k, v in r.items() if k not in ("stack", "layer", "head")}
        stats.update(role=role, tags=tags, evidence=evidence)
        out.append({"stack": r["stack"], "layer": r["layer"], "head": r["head"], "stats": stats})
    return out


# --------------------------------------------------------------------------------------------------- the steps

def resolve_to(subject, to: int | None, L: int | None) -> tuple[int, list[str]]:
    """The sequence length to use (default 4× the training length, capped by a position table), checked against
    the table; with the notes it calls for."""
    notes: list[str] = []
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
        scheme = ", ".join(schemes.table_schemes([s.scheme for s in subject.sites]))
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
    return to, notes


def _mean(x, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(x, axis=axis)


def loss_summary(loss_tab: np.ndarray, edges: np.ndarray, to: int, L: int | None, n_boot: int,
                 seed: int, at=LOSS_AT) -> tuple[list, list, list, dict, list[str]]:
    """Per-position mean loss with its 90% interval, the loss at multiples ``at`` of the training length and per
    bin of positions; with the notes it calls for."""
    notes, summary = [], {}
    mean = _mean(loss_tab, axis=0)
    boot = _bootstrap(loss_tab, n_boot, seed)
    lo_a, hi_a = _interval(boot)
    if lo_a is None:
        lo_a = hi_a = np.full(len(mean), np.nan)
        notes.append("Only one sequence: no intervals (pass longer texts for more sequences)."
                     if loss_tab.shape[0] < 2 else "No bootstrap resamples (--boot 0): no intervals.")
    summary["loss_mean"] = float(np.nanmean(loss_tab))
    pos = np.arange(1, to)
    if L:
        w = max(1, L // 4)
        la, la_int = {}, {}
        for k in at:
            sel = (pos > k * L - w) & (pos <= k * L)
            if k * L <= to and sel.any():
                la[f"{k}x"] = float(_mean(mean[sel]))
                a, b = _interval(boot, sel)
                la_int[f"{k}x"] = None if a is None else [float(a), float(b)]
            else:
                la[f"{k}x"] = la_int[f"{k}x"] = None
        summary["loss_at"] = la
        summary["loss_at_interval"] = la_int
        summary["loss_at_window"] = (f"mean over positions (k·L − {w}, k·L] (k·L ≤ to; position to − 1 is the "
                                     f"last), L = {L}")
    summary["bin_loss"] = []
    for a_, b_ in [[int(edges[i]), int(edges[i + 1]) - 1] for i in range(len(edges) - 1)]:
        sel = (pos >= max(a_, 1)) & (pos <= b_)
        if not sel.any():
            continue
        a, b = _interval(boot, sel)
        summary["bin_loss"].append({"positions": [max(a_, 1), b_], "loss": float(_mean(mean[sel])),
                                    "lo": None if a is None else float(a), "hi": None if b is None else float(b)})
    return mean.tolist(), np.asarray(lo_a).tolist(), np.asarray(hi_a).tolist(), summary, notes


def head_curves(curves: dict, n_heads: int) -> list[dict]:
    """Per head, entropy (relative and nats) and first-token weight per query-position bin."""
    heads = []
    for si, key in enumerate(curves["keys"]):
        for h in range(n_heads):
            heads.append({"stack": key[0], "layer": key[1], "head": h, "entropy": curves["entropy"][si, h],
                          "entropy_nats": curves["entropy_nats"][si, h], "first_weight": curves["first_weight"][si, h]})
    return heads


DRIFT_STATS = ("role", "tags", "mass_previous", "mass_next", "mass_first", "mass_self", "entropy_ratio",
               "anchor_slot", "anchor_weight")


def role_drift(subject, range_weights: dict, heads: list[dict], bins: list[list[int]], L: int) -> tuple[list, dict]:
    """Each head's weight-based role inside and beyond the training length, and the heads whose curves change most
    between the bins inside and beyond it."""
    ins, bey = role_rows(subject, range_weights["inside"]), role_rows(subject, range_weights["beyond"])
    drift = [{"stack": a["stack"], "layer": a["layer"], "head": a["head"],
              "inside": {k: a["stats"][k] for k in DRIFT_STATS}, "beyond": {k: b["stats"][k] for k in DRIFT_STATS},
              "changed": a["stats"]["role"] != b["stats"]["role"]} for a, b in zip(ins, bey)]
    inside_bins = np.array([e[1] < L for e in bins])
    changes = []
    for hd in heads:
        e, fw = np.asarray(hd["entropy"], float), np.asarray(hd["first_weight"], float)
        ei, eb = _mean(e[inside_bins]), _mean(e[~inside_bins])
        fi, fb = _mean(fw[inside_bins]), _mean(fw[~inside_bins])
        changes.append({"stack": hd["stack"], "layer": hd["layer"], "head": hd["head"], "entropy_inside": ei,
                        "entropy_beyond": eb, "first_inside": fi, "first_beyond": fb,
                        "change": float(np.nansum([abs(eb - ei), abs(fb - fi)]))})
    changes.sort(key=lambda r: -r["change"])
    return drift, {"drift_changed": int(sum(d["changed"] for d in drift)), "head_changes": changes}


def _no_loss_note(subject, want_loss: bool) -> str:
    if not want_loss and not subject.is_encoder_decoder:
        return "the model is not causal (an encoder): it has no next-token loss"
    if subject.is_encoder_decoder:
        return "encoder-decoder models: the decoder's loss is not a per-position loss of the text"
    return "the model has no language-model head (an encoder or a base model without logits)"


# --------------------------------------------------------------------------------------------------- main

def length(subject, texts=None, *, to: int | None = None, training_length: int | None = None,
           n_sequences: int = SEQUENCES, bins: int = BINS, n_boot: int = BOOT, seed: int = 0,
           progress: bool | None = None) -> LengthResult:
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
        progress: show a progress bar over the sequences (default: in a terminal or a notebook, see
            :mod:`attnpos.core.progress`).

    Returns a :class:`~attnpos.results.length.LengthResult`.
    """
    from .capture import record
    from .subject import Subject, load

    if not isinstance(subject, Subject):
        subject = load(subject)
    L, source = training_length_of(subject, training_length)
    to, notes = resolve_to(subject, to, L)
    sizes.refuse_long_sequence(subject.model.config.to_dict(), to, f"Measuring {subject.name} past its training length")
    want_loss = subject.causal and not subject.is_encoder_decoder
    # one notice about intervals, never two that disagree: "wider" only when there will be intervals at all
    units, snotes = sequences(subject, texts, to, n_sequences, intervals=want_loss and n_boot > 0)
    notes += snotes
    edges = bin_edges(to, L, bins)
    reducers: list[Reducer] = [PositionCurves(edges)]
    drift_on = L is not None and L < to
    if drift_on:
        reducers.append(RangeWeights(L))
    elif L is not None:
        notes.append(f"--to {to} does not go past the training length {L}: nothing to compare beyond it.")
    # every sequence is long (often past the training length): a bar even for a few of them
    show = _progress.wanted(progress)
    rec = record(subject, units=units, reducers=reducers, token_loss=want_loss, progress=show)
    loss_tab = loss_table(units, rec.token_loss) if want_loss else None
    summary: dict[str, Any] = {}
    if loss_tab is None:
        loss = lo = hi = None
        summary["loss_note"] = _no_loss_note(subject, want_loss)
        notes.append("Per-position loss is not available: " + summary["loss_note"] + ". Entropy, first-token weight "
                     "and role drift are reported.")
    else:
        loss, lo, hi, part, lnotes = loss_summary(loss_tab, edges, to, L, n_boot, seed)
        summary.update(part)
        notes += lnotes
    heads = head_curves(rec.results["position-curves"], subject.n_heads)
    bins_list = [[int(edges[i]), int(edges[i + 1]) - 1] for i in range(len(edges) - 1)]
    drift = None
    if drift_on:
        drift, part = role_drift(subject, rec.results["range-weights"], heads, bins_list, L)
        summary.update(part)
    settings = {"to": to, "n_sequences": len(units), "bins": len(bins_list), "n_boot": n_boot, "seed": seed,
                "position": "p = tokens read before the prediction = index of the predicted token (1 … to − 1)",
                "entropy": "entropy of a query's weights / log(number of visible keys); 1 = uniform",
                "first_weight": "weight on slot 0 (the first token), queries at index ≥ 1",
                "drift_roles": "weight-based roles only (previous-token, next-token, anchor, counting, mixed)"}
    return LengthResult(model=subject.describe(), position=list(range(1, to)), loss=loss, loss_lo=lo, loss_hi=hi,
                        training_length=L, training_length_source=source, bins=bins_list, heads=heads, drift=drift,
                        summary=summary, settings=settings, notes=notes)
