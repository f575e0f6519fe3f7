"""Run a subject on texts and hand every self-attention layer's scores and weights to reducers, layer by layer.

Two capture paths:

* **registry** — where the architecture calls transformers' attention-function registry (Llama, Mistral, Qwen2,
  GPT-2, GPT-NeoX, SmolLM3, BERT, T5, …), attnpos registers its own attention function for the duration of the
  run. It computes the pre-softmax **scores** (q·k scaled, plus any bias the model adds: T5's relative bias, the
  mask) itself, so reducers see true scores. A mask function is registered under the same name, otherwise
  transformers would hand over no causal mask at all.
* **eager-weights** — where the architecture computes attention inside its own module (e.g. Bloom), the model
  runs eagerly with ``output_attentions`` and a forward hook on each attention module takes the weights as the
  layer finishes and drops them from the output, so at most one layer's maps exist at a time. Scores are then
  **log-weights** (they differ from true scores by a per-row constant, which the split absorbs).

Both paths restore the model exactly (attention implementation, registry, hooks), also when a run raises.

Example::

    >>> rec = attnpos.record(subject, ["The ferry left at nine."], reducers=[MyReducer()])   # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import functools
import sys
import warnings
from dataclasses import dataclass, field
from typing import Any, Iterable, Sequence

import numpy as np
import torch

from . import sizes
from .core import progress as _progress
from .errors import AttnposError
from .subject import AttentionSite, Subject
from .texts import TextUnit, as_raw, prepare

FUNCTION_NAME = "attnpos_capture"

# bytes one chunk of (heads, T, T) float32 may take; heads are processed in chunks to bound memory (the capture
# holds two such buffers, a reducer may hold a third). Fewer, larger chunks mean fewer tensor operations, which
# matters most on a busy machine, where every parallel operation waits for its threads.
CHUNK_BYTES = sizes.CAPTURE_CHUNK_BYTES

# rows per block of a causal layer: block r0:r1 only forms keys < r1, so q·kᵀ, the softmax, weights·v and the
# reducers' sums touch about (1 + 1/blocks)/2 of the (T, T) pairs, and one block's rows stay in cache between steps
ROW_BLOCK = 256


def causal_blocks(T: int, rows: int | None = None) -> tuple[tuple[int, int, int], ...]:
    """Row blocks ``(r0, r1, k1)`` of a causal (T, T) layer: rows r0:r1 allow keys < k1 = r1 only."""
    rows = rows or ROW_BLOCK
    return tuple((r0, min(T, r0 + rows), min(T, r0 + rows)) for r0 in range(0, T, rows))


class LayerCapture:
    """What a reducer sees: one attention layer, one text, a chunk of heads.

    ``scores`` and ``weights`` are ``(n, T, T)`` float32 tensors for heads ``head0 … head0+n-1``; disallowed pairs
    hold ``-inf`` scores and zero weight. ``allowed`` is the ``(T, T)`` boolean mask of pairs the model lets the
    query see. ``offset`` is the number of neutral prefix tokens placed before the text (shift test); rows and
    columns before it are not part of the text.

    Reducers read these tensors and must not modify or keep them: the capture reuses their memory for the next
    chunk (copy what you keep). For sums over the allowed pairs, :meth:`zeroed_scores` gives the same scores with
    0 on disallowed pairs. The registry path computes that form anyway and passes it as ``zeroed`` with
    ``scores=None``; ``scores`` (with ``-inf``) is then built only if a reducer reads it.

    ``row_blocks`` (see :meth:`blocks`) says where the allowed pairs lie: rows r0:r1 allow keys < k1 only, so a
    sum over the allowed pairs may read ``x[:, r0:r1, :k1]`` block by block instead of the whole tensor (about half
    of it in a causal layer). Everything beyond holds 0 weight and 0 zeroed score all the same.

    On the registry path ``query`` and ``key`` hold the chunk's queries and keys as the model hands them to
    attention — after any rotation, key/value heads repeated for grouped-query attention — as float32 ``(n, T, d)``,
    and ``rotary`` the ``(cos, sin)`` tables the model passed to the attention module (None when it passes none).
    On the eager-weights path they are None.
    """

    __slots__ = ("site", "text", "unit", "head0", "n_heads", "_scores", "weights", "allowed", "score_kind",
                 "offset", "zeroed", "row_blocks", "query", "key", "rotary")

    def __init__(self, site: AttentionSite, text: int, unit: TextUnit, head0: int, n_heads: int,
                 scores: torch.Tensor | None, weights: torch.Tensor, allowed: torch.Tensor, score_kind: str,
                 offset: int = 0, zeroed: torch.Tensor | None = None, row_blocks: tuple | None = None,
                 query: torch.Tensor | None = None, key: torch.Tensor | None = None, rotary: tuple | None = None):
        self.site, self.text, self.unit, self.head0, self.n_heads = site, text, unit, head0, n_heads
        self._scores, self.weights, self.allowed, self.score_kind = scores, weights, allowed, score_kind
        self.offset, self.zeroed, self.row_blocks = offset, zeroed, row_blocks
        self.query, self.key, self.rotary = query, key, rotary

    @property
    def scores(self) -> torch.Tensor:
        """(n, T, T) scores, -inf on disallowed pairs (built from ``zeroed`` when first read)."""
        if self._scores is None:
            self._scores = self.zeroed.masked_fill(~self.allowed, float("-inf"))
        return self._scores

    @scores.setter
    def scores(self, value: torch.Tensor) -> None:
        """A reducer that replaces the scores (for the reducers after it) drops the zeroed form with them."""
        self._scores = value
        self.zeroed = None

    def with_unit(self, unit: TextUnit) -> "LayerCapture":
        """The same capture seen through another text unit (e.g. one whose ``special`` mask leaves out some
        queries); the tensors are shared, not copied."""
        return LayerCapture(self.site, self.text, unit, self.head0, self.n_heads, self._scores, self.weights,
                            self.allowed, self.score_kind, self.offset, self.zeroed, self.row_blocks, self.query,
                            self.key, self.rotary)

    def blocks(self) -> tuple[tuple[int, int, int], ...]:
        """Row blocks ``(r0, r1, k1)`` covering all rows; rows r0:r1 have no allowed key at or beyond k1."""
        if self.row_blocks is not None:
            return self.row_blocks
        q, k = self.weights.shape[-2:]
        return ((0, q, k),)

    def zeroed_scores(self) -> torch.Tensor:
        """The scores with 0 instead of ``-inf`` on disallowed pairs (read-only)."""
        if self.zeroed is None:
            self.zeroed = torch.where(self.allowed, self._scores, torch.zeros((), dtype=self._scores.dtype))
        return self.zeroed


class CaptureNotice(UserWarning):
    """The model was set to an attention implementation that exposes no scores (SDPA, flash); attnpos records
    through its own eager-equivalent path instead and puts the implementation back afterwards."""


class Reducer:
    """Base class: keep statistics from each :class:`LayerCapture`; ``result()`` is stored in the recording."""

    name = "reducer"
    # True: the reducer takes its captures in any order of texts (several texts may share one forward pass, so
    # layer l of texts 0, 1, 2 comes before layer l + 1 of text 0). Texts are batched only when every reducer says so
    # (read after ``begin``, which may decide it from the units).
    any_order = False

    def begin(self, subject: Subject, units: Sequence[TextUnit]) -> None:  # noqa: D401
        pass

    def update(self, cap: LayerCapture) -> None:
        raise NotImplementedError

    def result(self) -> Any:
        return None


@dataclass
class Recording:
    """What one pass of :func:`record` kept."""

    subject: Subject
    units: list[TextUnit]
    capture: str                      # "registry" or "eager-weights"
    score_kind: str                   # "scores" or "log-weights"
    results: dict[str, Any] = field(default_factory=dict)
    maps: dict = field(default_factory=dict)          # (text, stack, layer, head) -> (T,T) float32 weights
    score_maps: dict = field(default_factory=dict)    # same keys, scores
    hidden: list = field(default_factory=list)        # per text: (layers+1, T, d) float32, if asked
    token_loss: list = field(default_factory=list)    # per text: (T-1,) nats, next-token loss, if asked
    position_offset: int = 0
    prefix: list[int] = field(default_factory=list)


# ------------------------------------------------------------------------------------------------- the run


class _Run:
    def __init__(self, subject, units, reducers, keep, keep_scores, score_kind, offset):
        self.subject = subject
        self.units = units
        self.reducers = reducers
        self.keep = keep
        self.keep_scores = keep_scores
        self.score_kind = score_kind
        self.offset = offset
        self.sites_of: dict[int, list[AttentionSite]] = {}   # id(module) → its sites, one per application
        for site in subject.sites:
            self.sites_of.setdefault(id(site.module), []).append(site)
        self.calls: dict[int, int] = {}                 # id(module) → times called in this forward pass
        self.text = 0
        self.batch_row = 0
        self.batch: tuple[tuple[int, int], ...] = ((0, 0),)   # (text, length) of each row of the forward pass
        self.seen: set = set()                          # (stack, layer) of the sites delivered in this forward
        self.maps: dict = {}
        self.score_maps: dict = {}
        self.nonfinite: set = set()
        self._buffers: dict[str, torch.Tensor] = {}
        self._zero_outside: dict[str, tuple] = {}       # buffer name → (shape, blocks) it is known to be 0 outside
        self._masks: dict[tuple, tuple] = {}
        self.rotary: dict[int, tuple] = {}              # id(attention module) → (cos, sin) it was handed this forward

    def mask_facts(self, attention_mask, q_len: int, k_len: int, causal: bool, row: int | None = None) -> tuple:
        """:func:`_mask_facts`, once per mask: transformers hands every layer of a forward the same mask tensor, so
        its layers share one ``allowed`` tensor (reducers may cache what they derive from it). The entry keeps a
        reference to the mask, so the identity test cannot match a different tensor at a reused address. ``row``:
        a batched pass's row, whose text takes the mask's first ``q_len`` queries and ``k_len`` keys."""
        key = (id(attention_mask), q_len, k_len, causal, row)
        hit = self._masks.get(key)
        if hit is None or hit[0] is not attention_mask:
            if len(self._masks) >= 8 + 2 * len(self.batch):
                self._masks.clear()
            m = attention_mask
            if row is not None and m is not None:
                m = _row_mask(m, row, q_len, k_len)
            hit = self._masks[key] = (attention_mask, _mask_facts(m, q_len, k_len, causal))
        return hit[1]

    def start_text(self, t: int) -> None:
        self.start_batch(((t, 0),))

    def start_batch(self, rows) -> None:
        """A forward pass over the texts ``rows`` ((text, length incl. any prefix) per batch row, right-padded)."""
        self.batch = tuple(rows)
        self.text = self.batch[0][0]
        self.seen = set()
        self.calls = {}

    def site_for(self, module) -> AttentionSite | None:
        """The site of this call of ``module`` (the next application of a shared module), or None for a module
        attnpos does not record (cross-attention). A module called more often than it has sites would mix several
        applications into one layer: refused."""
        sites = self.sites_of.get(id(module))
        if sites is None:
            return None
        n = self.calls.get(id(module), 0)
        self.calls[id(module)] = n + 1
        if n >= len(sites):
            raise AttnposError(
                f"The attention module {sites[0].name} ran {n + 1} times in one forward pass, but attnpos expected "
                f"{len(sites)}: the model shares it across depth in a way attnpos does not know, and recording it "
                "would mix its applications into one layer. Please report the architecture.")
        return sites[n]

    def buffer(self, name: str, shape: tuple[int, ...], blocks: tuple | None = None) -> torch.Tensor:
        """A float32 work tensor of ``shape``, reused across chunks, layers and texts of this run (fresh pages for
        every chunk would cost about as much as the arithmetic). With ``blocks`` (row blocks ``(r0, r1, k1)``) the
        caller writes only ``[:, r0:r1, :k1]`` and the rest is 0: zeroed here once, kept while the buffer serves
        the same shape and blocks."""
        n = int(np.prod(shape))
        buf = self._buffers.get(name)
        if buf is None or buf.numel() < n:
            self._buffers[name] = buf = torch.empty(n, dtype=torch.float32)
            self._zero_outside.pop(name, None)
        view = buf[:n].view(shape)
        if blocks is None:
            self._zero_outside.pop(name, None)
        elif self._zero_outside.get(name) != (shape, blocks):
            _zero_outside(view, blocks)
            self._zero_outside[name] = (shape, blocks)
        return view

    def deliver(self, site: AttentionSite, scores: torch.Tensor | None, weights: torch.Tensor,
                allowed: torch.Tensor, head0: int, *, zeroed: torch.Tensor | None = None,
                weights_checked: bool = False, blocks: tuple | None = None, finite: bool | None = None,
                query: torch.Tensor | None = None, key: torch.Tensor | None = None) -> None:
        """Hand one chunk of heads to the reducers. Give ``scores`` (-inf on disallowed pairs) or ``zeroed`` (0
        there); ``weights_checked`` says the weights are finite whenever the scores are (a softmax of them);
        ``blocks``: row blocks outside which every pair is disallowed (see :class:`LayerCapture`); ``finite``:
        the caller has already checked the zeroed scores for NaN and ±inf (the result); ``query``/``key``: the
        chunk's (n, T, d) queries and keys (registry path)."""
        self.seen.add((site.stack, site.layer))
        n = weights.shape[0]
        # NaN anywhere, or ±inf on an allowed pair (the capture function turns NaN weights of such rows into 0, so
        # the scores are what shows an overflow or a NaN weight); min and max propagate NaN and show ±inf
        if finite is not None:
            ok = finite
        elif zeroed is not None:
            ok = _all_finite(zeroed)
        else:
            ok = bool((torch.isfinite(scores) | ~allowed).all())
        if not (ok and (weights_checked or _all_finite(weights))):
            self.nonfinite.add((site.stack, site.layer))
        unit = self.units[self.text]
        if site.stack == "decoder":
            unit = _decoder_view(self.subject, unit)
        rotary = self.rotary.get(id(site.module))
        if rotary is not None and len(self.batch) > 1:      # this text's row and positions of a batched pass
            T = weights.shape[-1]
            rotary = tuple(r[min(self.batch_row, r.shape[0] - 1)][None, :T] if r.dim() == 3 else r[..., :T, :]
                           for r in rotary)
        cap = LayerCapture(site=site, text=self.text, unit=unit, head0=head0, n_heads=n,
                           scores=scores, weights=weights, allowed=allowed, score_kind=self.score_kind,
                           offset=self.offset, zeroed=zeroed, row_blocks=blocks, query=query, key=key,
                           rotary=rotary)
        for r in self.reducers:
            r.update(cap)
        if self.keep is not None:
            for h in range(n):
                key = (self.text, site.stack, site.layer, head0 + h)
                if self.keep(key):
                    self.maps[key] = weights[h].detach().to(torch.float32).numpy().copy()
                    if self.keep_scores:
                        self.score_maps[key] = cap.scores[h].detach().to(torch.float32).numpy().copy()


def _zero_outside(x: torch.Tensor, blocks: tuple) -> None:
    """Set ``x[:, r0:r1, k1:]`` to 0 for every row block."""
    for r0, r1, k1 in blocks:
        x[:, r0:r1, k1:].zero_()


def _row_mask(mask: torch.Tensor, row: int, q_len: int, k_len: int) -> torch.Tensor:
    """Batch row ``row`` of a (batch, heads, q, k) mask, cut to a text's first ``q_len`` queries and ``k_len`` keys
    (texts are right-padded, so a text's queries and keys come first)."""
    m = mask[min(row, mask.shape[0] - 1)][None] if mask.dim() == 4 else mask
    return m[..., :q_len, :k_len]


def _all_finite(x: torch.Tensor) -> bool:
    if x.numel() == 0:
        return True
    lo, hi = torch.aminmax(x)
    return bool(torch.isfinite(lo) and torch.isfinite(hi))


_ACTIVE: list[_Run] = []


def _decoder_start(subject) -> int:
    start = getattr(subject.model.config, "decoder_start_token_id", None)
    return 0 if start is None else int(start)


def _decoder_view(subject, unit: TextUnit) -> TextUnit:
    """The decoder of an encoder-decoder model reads the text shifted right behind its start token."""
    start = _decoder_start(subject)
    special = np.concatenate([[True], unit.special[:-1]])
    return TextUnit(name=unit.name, source=unit.source, ids=[start] + list(unit.ids[:-1]),
                    tokens=["<start>"] + list(unit.tokens[:-1]), special=special, window=unit.window)


def allowed_from_mask(attention_mask, q_len: int, k_len: int, causal: bool) -> torch.Tensor:
    if attention_mask is None:
        if causal:
            return torch.ones(q_len, k_len, dtype=torch.bool).tril(k_len - q_len)
        return torch.ones(q_len, k_len, dtype=torch.bool)
    m = attention_mask
    while m.dim() > 2:
        m = m[0]
    m = m[-q_len:, :k_len]
    if m.dtype == torch.bool:
        return m.clone()
    return m > torch.finfo(m.dtype).min / 2


def _mask_facts(attention_mask, q_len: int, k_len: int, causal: bool) -> tuple:
    """What the capture needs to know about a mask: ``allowed`` (q_len, k_len); how the disallowed pairs lie —
    ``"none"`` (all allowed), ``"causal"`` (exactly above the diagonal, aligned at the end of the keys; zeroed
    without reading a mask) or ``"general"``; whether some row allows no key; and whether a float mask holds
    values other than 0 on allowed pairs (e.g. a bias folded into the mask), which are then part of the scores."""
    allowed = allowed_from_mask(attention_mask, q_len, k_len, causal if attention_mask is None else False)
    if bool(allowed.all()):
        pattern = "none"
    elif torch.equal(allowed, torch.ones(q_len, k_len, dtype=torch.bool).tril(k_len - q_len)):
        pattern = "causal"
    else:
        pattern = "general"
    empty_rows = not bool(allowed.any(-1).all())
    has_values = False
    if attention_mask is not None and attention_mask.dtype != torch.bool:
        has_values = bool((attention_mask[..., :k_len].masked_fill(~allowed, 0) != 0).any())
    return allowed, pattern, empty_rows, has_values


@functools.lru_cache(maxsize=4)
def _upper(n: int) -> torch.Tensor:
    """(n, n) boolean: True strictly above the diagonal."""
    return torch.ones(n, n, dtype=torch.bool).triu(1)


def capture_attention(module, query, key, value, attention_mask, scaling=None, dropout=0.0, **kwargs):
    """Eager attention that also hands scores and weights to the active run (registered in the registry).

    Per chunk of heads, in two reused buffers: scores = scaling·q·kᵀ (+ bias, softcap, a mask's finite values), set
    to 0 on disallowed pairs in place (the form the reducers sum over); weights = softmax over the allowed keys,
    computed in place in the second buffer; out = weights·v. A causal layer is computed in row blocks
    (:func:`causal_blocks`) that form only the keys each block may see, each in a contiguous scratch tensor and
    copied into the two buffers, which hold 0 beyond the blocks.
    """
    run = _ACTIVE[-1] if _ACTIVE else None
    site = run.site_for(module) if run else None
    if kwargs.get("s_aux") is not None or kwargs.get("sinks") is not None:
        raise AttnposError("This model uses attention sinks (learned extra logits); attnpos cannot capture it yet.")
    bsz, n_heads, q_len, d = query.shape
    # weights kept in bfloat16/float16: the model's own eager attention computes the output it passes on (with its
    # own rounding), and attnpos computes the scores and weights the reducers see in float32 beside it
    own = _own_eager(module) if query.dtype != torch.float32 else None
    given = (query, key, value, attention_mask, scaling)
    if key.shape[1] <= 0 or n_heads % key.shape[1]:
        raise AttnposError(f"An attention module hands over {n_heads} query heads and {key.shape[1]} key/value heads; "
                           "grouped-query attention needs the key/value heads to divide the query heads, and "
                           "transformers' own attention rejects this too. Fix the config's head counts.")
    n_rep = n_heads // key.shape[1]
    if n_rep > 1:  # grouped-query attention: repeat key/value heads as the model's eager path does
        key = key.repeat_interleave(n_rep, dim=1)
        value = value.repeat_interleave(n_rep, dim=1)
    k_len = key.shape[-2]
    if scaling is None:
        scaling = d ** -0.5
    bias = kwargs.get("position_bias")
    softcap = kwargs.get("softcap")
    # a module attnpos does not record (cross-attention) gets exactly eager attention: the model's mask, no other
    causal = site.causal if site is not None else False
    # several texts in one pass (right-padded): each row is computed on its own text's queries and keys only
    rows = run.batch if run is not None and len(run.batch) > 1 and len(run.batch) == bsz else None
    out = None
    if own is None:
        out = (torch.zeros if rows is not None else torch.empty)(bsz, n_heads, q_len, value.shape[-1],
                                                                  dtype=value.dtype)
    neg_inf = torch.tensor(float("-inf"))
    for b in range(bsz):
        if rows is not None:
            run.text, run.batch_row = rows[b][0], b
            ql = kl = rows[b][1] if site is not None else None
            if ql is None or ql > q_len or q_len != k_len:
                ql, kl = q_len, k_len
            facts = run.mask_facts(attention_mask, ql, kl, causal, row=b)
        else:
            ql, kl = q_len, k_len
            facts = (run.mask_facts if run is not None else _mask_facts)(attention_mask, q_len, k_len, causal)
        allowed, pattern, empty_rows, has_values = facts
        not_allowed = ~allowed if pattern == "general" else None
        per_head = ql * kl * 4
        n_chunks = -(-n_heads // max(1, min(n_heads, CHUNK_BYTES // max(per_head, 1))))
        chunk = -(-n_heads // n_chunks)          # equal chunks: 12 heads in 3 × 4 rather than 5 + 5 + 2
        # causal and square (the usual case): row blocks, each forming only the keys it may see
        blocks = causal_blocks(ql) if pattern == "causal" and ql == kl else None
        pb = ma = None
        if bias is not None:
            pb = bias[min(b, bias.shape[0] - 1)][..., :ql, :kl]
        if has_values:
            ma = (attention_mask[min(b, attention_mask.shape[0] - 1)][..., :kl] if rows is None else
                  _row_mask(attention_mask, b, ql, kl)[0])
        for h0 in range(0, n_heads, chunk):
            h1 = min(n_heads, h0 + chunk)
            shape = (h1 - h0, ql, kl)
            if run is not None:
                s, w = run.buffer("scores", shape, blocks), run.buffer("weights", shape, blocks)
            else:
                s, w = torch.zeros(shape), torch.zeros(shape)
            qb, kb, vb = query[b, h0:h1, :ql].float(), key[b, h0:h1, :kl].float(), value[b, h0:h1, :kl]
            pbh = None if pb is None else (pb[h0:h1] if pb.shape[0] > 1 else pb)
            mah = None if ma is None else (ma[h0:h1] if ma.shape[0] > 1 else ma)
            finite = True
            for r0, r1, k1 in blocks or ((0, ql, kl),):
                # c: this block's scores, in a contiguous scratch when blocked (a strided view of s would slow
                # the softmax below), then the weights in place
                if blocks is None:
                    c = s
                else:
                    bshape = (h1 - h0, r1 - r0, k1)
                    c = run.buffer("block", bshape) if run is not None else torch.empty(bshape)
                torch.baddbmm(c, qb[:, r0:r1], kb[:, :k1].transpose(-1, -2), beta=0.0, alpha=scaling, out=c)
                if pbh is not None:
                    c += pbh[..., r0:r1, :k1].float()
                if softcap:
                    c.div_(softcap).tanh_().mul_(softcap)
                if mah is not None:
                    c += mah[..., r0:r1, :k1].float()
                # scores with 0 on disallowed pairs (only the block's diagonal square has any when blocked)
                if blocks is not None:
                    c[:, :, r0:r1].tril_()
                elif pattern == "causal":
                    c.tril_(kl - ql)
                elif pattern == "general":
                    c.masked_fill_(not_allowed, 0.0)
                # NaN anywhere, or ±inf on an allowed pair (min and max propagate NaN and show ±inf)
                finite = finite and _all_finite(c)
                # weights: softmax over the allowed keys (-inf elsewhere), in place
                if blocks is not None:
                    s[:, r0:r1, :k1].copy_(c)
                    c[:, :, r0:r1].masked_fill_(_upper(r1 - r0), float("-inf"))
                    wb = c
                elif pattern == "none":
                    wb = w.copy_(s)
                else:
                    wb = torch.where(allowed, s, neg_inf, out=w)
                torch.softmax(wb, dim=-1, out=wb)
                if empty_rows:
                    wb.nan_to_num_(nan=0.0)  # rows with no allowed key
                if blocks is not None:
                    w[:, r0:r1, :k1].copy_(wb)
                if own is None:
                    torch.matmul(wb.to(value.dtype), vb[:, :k1], out=out[b, h0:h1, r0:r1])
            if site is not None and (b == 0 or rows is not None):
                run.deliver(site, None, w, allowed, h0, zeroed=s, weights_checked=True, blocks=blocks,
                            finite=finite, query=qb, key=kb)
    if own is not None:
        q0, k0, v0, m0, sc0 = given
        return own(module, q0, k0, v0, m0, scaling=sc0, dropout=0.0, **kwargs)[0], None
    return out.transpose(1, 2).contiguous(), None


def _own_eager(module):
    """The eager attention function of the module's own modelling file (transformers' ``eager_attention_forward``),
    or None where the architecture has none (the capture's float32 computation then produces the output)."""
    fn = getattr(sys.modules.get(type(module).__module__), "eager_attention_forward", None)
    return fn if callable(fn) else None


@contextlib.contextmanager
def hooked(pairs, *, pre: bool = True, with_kwargs: bool = False):
    """Register a forward hook (``pre=True``: a forward pre-hook) per ``(module, hook)`` pair for the block, and
    remove every one of them on exit, also on error or Ctrl-C.

    The removal does not rely on handles: a hook is remembered *before* it is registered, and on exit every entry
    holding that hook object is taken out of its module's hook tables, so an interrupt that lands between a
    registration and the bookkeeping after it still leaves no hook behind. A user's own hooks are never touched.
    """
    placed: list[tuple[torch.nn.Module, Any]] = []
    try:
        for m, h in pairs:
            placed.append((m, h))
            if pre:
                m.register_forward_pre_hook(h, with_kwargs=with_kwargs)
            else:
                m.register_forward_hook(h, with_kwargs=with_kwargs)
        yield
    finally:
        for m, h in placed:
            table = m._forward_pre_hooks if pre else m._forward_hooks
            extras = ((m._forward_pre_hooks_with_kwargs,) if pre else
                      (m._forward_hooks_with_kwargs, getattr(m, "_forward_hooks_always_called", {})))
            for key in [k for k, v in table.items() if v is h]:
                table.pop(key, None)
                for extra in extras:
                    extra.pop(key, None)


@contextlib.contextmanager
def attention_function(subject: Subject, fn, name: str = FUNCTION_NAME):
    """Run ``subject`` through the attention function ``fn`` for the duration of the block.

    ``fn`` is registered under ``name`` in transformers' attention-function registry together with the eager mask
    function (without it transformers would hand over no causal mask), and every config of the model is switched
    to it. On exit, also on error, each config's implementation and both registry entries are put back exactly as
    they were (an entry of the same name, e.g. from an enclosing run, is restored). Used by :func:`record` and by
    :mod:`attnpos.bands`.
    """
    from transformers import AttentionInterface
    from transformers.masking_utils import AttentionMaskInterface, eager_mask

    configs = _all_configs(subject.model)
    saved = [(c, c.__dict__.get("_attn_implementation_internal", None)) for c in configs]
    missing = object()
    had_fn = AttentionInterface._global_mapping.get(name, missing)
    had_mask = AttentionMaskInterface._global_mapping.get(name, missing)
    try:
        AttentionInterface.register(name, fn)
        AttentionMaskInterface.register(name, eager_mask)
        for c in configs:
            c._attn_implementation_internal = name
        yield
    finally:
        for c, v in saved:
            c._attn_implementation_internal = v
        for mapping, prev in ((AttentionInterface._global_mapping, had_fn),
                              (AttentionMaskInterface._global_mapping, had_mask)):
            if prev is missing:
                mapping.pop(name, None)
            else:
                mapping[name] = prev


@contextlib.contextmanager
def _registry_path(subject: Subject, run: "_Run | None" = None):
    """Switch the model to the capture function for the duration of a run, with a pre-hook on every attention
    module that keeps the rotary (cos, sin) tables it is handed (for reducers that read rotated pairs)."""
    def keep_rotary(module, args, kwargs):
        refuse_cross_call(run, module, kwargs)
        pe = kwargs.get("position_embeddings")
        if isinstance(pe, (tuple, list)) and len(pe) == 2 and all(isinstance(t, torch.Tensor) for t in pe):
            run.rotary[id(module)] = (pe[0], pe[1])
        return None

    modules = _site_modules(subject) if run is not None else ()
    with attention_function(subject, capture_attention), \
            hooked(((m, keep_rotary) for m in modules), pre=True, with_kwargs=True):
        yield


CROSS_INPUTS = ("key_value_states", "encoder_hidden_states", "cross_attention_states")
"""Keyword arguments that make an attention module attend to another sequence (transformers' names)."""


def refuse_cross_call(run, module, kwargs) -> None:
    """A module recorded as self-attention that is handed another sequence's states is cross-attention attnpos
    failed to recognise by name: stop rather than take it for self-attention."""
    if any(kwargs.get(k) is not None for k in CROSS_INPUTS):
        sites = run.sites_of.get(id(module)) if run is not None else None
        name = sites[0].name if sites else type(module).__name__
        raise AttnposError(f"The attention module {name} attends to another sequence (it is cross-attention), but "
                           "attnpos took it for self-attention. Please report the architecture; attnpos will not "
                           "record cross-attention as self-attention.")


def _site_modules(subject: Subject) -> list:
    """Each recorded attention module once (a shared module serves several sites)."""
    return list({id(s.module): s.module for s in subject.sites}.values())


def _all_configs(model) -> list:
    seen: dict[int, Any] = {}
    stack = [model.config]
    for m in model.modules():
        if hasattr(m, "config") and hasattr(m.config, "_attn_implementation"):
            stack.append(m.config)
    while stack:
        c = stack.pop()
        if id(c) in seen or c is None:
            continue
        seen[id(c)] = c
        for k in getattr(c, "sub_configs", {}) or {}:
            stack.append(getattr(c, k, None))
    return list(seen.values())


@contextlib.contextmanager
def _weights_path(subject: Subject, run_ref: list):
    """Eager output_attentions + a forward hook per attention module that takes and drops the weights."""
    configs = _all_configs(subject.model)
    saved = [(c, c.__dict__.get("_attn_implementation_internal", None)) for c in configs]

    def pre_hook(module, args, kwargs):
        refuse_cross_call(run_ref[-1], module, kwargs)

    def make_hook():
        def hook(module, args, kwargs, output):
            run = run_ref[-1]
            site = run.site_for(module)
            if not isinstance(output, tuple):
                return output
            for k, o in enumerate(output):
                if isinstance(o, torch.Tensor) and o.dim() == 4 and o.shape[-1] == o.shape[-2]:
                    w = o[0].float()
                    T = w.shape[-1]
                    allowed = (torch.ones(T, T, dtype=torch.bool).tril() if site.causal
                               else torch.ones(T, T, dtype=torch.bool))
                    if site.causal and bool((w.triu(1) > 0).any()):
                        raise AttnposError(
                            f"{site.stack}:L{site.layer} ({site.name}) gives weight to later tokens, but attnpos "
                            "took the model for a causal one. Please report the architecture; attnpos will not "
                            "mask weights the model uses.")
                    s = torch.log(w.clamp_min(1e-30)).masked_fill(~allowed, float("-inf"))
                    run.deliver(site, s, w.masked_fill(~allowed, 0.0), allowed, 0,
                                blocks=causal_blocks(T) if site.causal else None)
                    return tuple(None if j == k else x for j, x in enumerate(output))
            return output
        return hook

    try:
        for c in configs:
            c._attn_implementation_internal = "eager"
        modules = _site_modules(subject)
        with hooked(((m, pre_hook) for m in modules), pre=True, with_kwargs=True), \
                hooked(((m, make_hook()) for m in modules), pre=False, with_kwargs=True):
            yield
    finally:
        for c, v in saved:
            c._attn_implementation_internal = v


@functools.lru_cache(maxsize=64)
def _takes_logits_to_keep(cls) -> bool:
    import inspect

    try:
        return "logits_to_keep" in inspect.signature(cls.forward).parameters
    except (TypeError, ValueError):
        return False


def forward(subject: Subject, ids: list[int], *, offset: int, want_weights: bool, hidden: bool,
            logits: bool = True):
    """One forward pass of ``subject`` over ``ids``. ``logits=False``: the caller reads no logits, so a model whose
    forward takes ``logits_to_keep`` (transformers' causal LMs) computes them for the last position only — the
    output head is skipped for the others (on a 49k-token vocabulary that is about a sixth of a small model's
    forward pass); everything before it, attention included, runs exactly as in a plain call."""
    model = subject.model
    rows = [list(r) for r in ids] if len(ids) and isinstance(ids[0], (list, tuple)) else [list(ids)]
    T = max(len(r) for r in rows)
    if len(rows) == 1:
        x = torch.tensor(rows, dtype=torch.long)
        mask = torch.ones_like(x)
    else:   # several texts: right-padded (any token id; the mask hides it)
        x = torch.zeros(len(rows), T, dtype=torch.long)
        mask = torch.zeros(len(rows), T, dtype=torch.long)
        for i, r in enumerate(rows):
            x[i, :len(r)] = torch.tensor(r, dtype=torch.long)
            mask[i, :len(r)] = 1
    kw: dict[str, Any] = {"input_ids": x, "attention_mask": mask}
    if subject.is_encoder_decoder:
        kw["decoder_input_ids"] = torch.tensor([[_decoder_start(subject)] + ids[:-1]], dtype=torch.long)
    else:
        kw["use_cache"] = False
    if offset:
        limit = subject.context_limit
        if limit and T + offset > limit and any(s.scheme == "learned-absolute" for s in subject.sites):
            raise AttnposError(f"Offsetting positions by {offset} needs {T + offset} positions, more than the "
                               f"model's table of {limit}. Use a smaller offset or shorter texts.")
        kw["position_ids"] = torch.arange(offset, offset + T).unsqueeze(0).expand(len(rows), T).contiguous()
    if want_weights:
        kw["output_attentions"] = True
    if not logits and not subject.is_encoder_decoder and _takes_logits_to_keep(type(model)):
        kw["logits_to_keep"] = 1
    if hidden:
        kw["output_hidden_states"] = True
    try:
        return model(**kw)
    except TypeError as exc:
        if "use_cache" in str(exc):
            kw.pop("use_cache", None)
            return model(**kw)
        raise


def next_token_loss(outputs, ids: list[int]) -> np.ndarray | None:
    logits = getattr(outputs, "logits", None)
    if logits is None or logits.shape[-1] < 2 or len(ids) < 2:
        return None
    lp = torch.log_softmax(logits[0, :-1].float(), dim=-1)
    tgt = torch.tensor(ids[1:], dtype=torch.long)
    return (-lp.gather(1, tgt[:, None])[:, 0]).numpy()


BATCH_TOKENS = 2048
"""Padded tokens per forward pass when texts are batched (rows × longest text): enough for the model's matrix
products to run at full speed on a CPU, while its activations stay small (the capture's own buffers do not grow
with the batch: it computes one text at a time inside each attention call)."""

BATCH_PADDING = 0.75
"""A text joins a batch only if it is at least this fraction of the batch's longest text (padded tokens are
computed by the model's projections and MLPs for nothing)."""


def batches(lengths: Sequence[int], budget: int | None = None) -> list[list[int]]:
    """Group texts (by index) into forward passes: longest first, each pass of texts no shorter than
    :data:`BATCH_PADDING` × its longest and at most ``budget`` (:data:`BATCH_TOKENS`) padded tokens."""
    budget = budget or BATCH_TOKENS
    order = sorted(range(len(lengths)), key=lambda i: (-lengths[i], i))
    out: list[list[int]] = []
    for i in order:
        if out:
            cur = out[-1]
            top = lengths[cur[0]]
            if (len(cur) + 1) * top <= budget and lengths[i] >= BATCH_PADDING * top:
                cur.append(i)
                continue
        out.append([i])
    return out


def record(subject: Subject, texts=None, reducers: Iterable[Reducer] = (), *, keep=None, keep_scores: bool = False,
           position_offset: int = 0, prefix: Sequence[int] | None = None, hidden_states: bool = False,
           token_loss: bool = False, max_tokens: int | None = None, units: Sequence[TextUnit] | None = None,
           progress: bool | None = None, path: str | None = None, batch: bool | None = None) -> Recording:
    """Run ``subject`` on ``texts`` and feed every self-attention layer to ``reducers``.

    Args:
        texts: strings, Paths, RawTexts, or None (bundled samples); or pass prepared ``units``.
        reducers: objects with ``begin``/``update``/``result`` (see :class:`Reducer`).
        keep: which weight maps to keep whole: a predicate on ``(text, stack, layer, head)``, a set of such keys,
            ``"all"``, or None. Only these are held; everything else is reduced on the fly.
        position_offset: add this to every position id (shift test; schemes with position ids).
        prefix: token ids placed before every text (shift test; schemes without position ids). Reducers see
            ``offset = len(prefix)``.
        hidden_states / token_loss: also keep per-text hidden states and next-token losses.
        path: force ``"registry"`` or ``"eager-weights"``; by default the registry path is tried first.
        batch: run texts of similar length together in one forward pass (right-padded, see :func:`batches`);
            by default (None) wherever it applies: the registry path, a model without a decoder stack, no hidden
            states or token losses asked for, and every reducer taking its captures in any order
            (:attr:`Reducer.any_order`). Each reducer still gets one capture per text, layer and chunk of heads,
            computed on that text's own tokens only, so the statistics are those of one text per pass.
    """
    if units is None:
        units = prepare(subject, as_raw(texts), max_tokens=max_tokens)
    units = list(units)
    reducers = list(reducers)
    prefix = list(prefix or [])
    if keep == "all":
        keep_fn = lambda k: True  # noqa: E731
    elif isinstance(keep, (set, frozenset, list, tuple)):
        ks = set(keep)
        keep_fn = ks.__contains__
    else:
        keep_fn = keep
    chosen = path or subject.capture_path or "registry"
    impl = getattr(subject.model.config, "_attn_implementation", None)
    if impl not in (None, "eager", FUNCTION_NAME):
        msg = (f"{subject.name} is set to the {impl!r} attention implementation, which exposes no scores or "
               "weights; attnpos records through its own eager-equivalent attention for each run and puts "
               f"{impl!r} back afterwards.")
        if msg not in subject.notes:
            subject.notes.append(msg)
            warnings.warn(msg, CaptureNotice, stacklevel=2)
    kind = "scores" if chosen == "registry" else "log-weights"
    for r in reducers:
        r.begin(subject, units)
    run = _Run(subject, units, reducers, keep_fn, keep_scores, kind, len(prefix))
    rec = Recording(subject=subject, units=units, capture=chosen, score_kind=kind, position_offset=position_offset,
                    prefix=prefix)
    # a bar for more than a few texts (a terminal or a notebook; core.progress), or when asked for
    show = progress if progress is not None else (len(units) > 3 and _progress.wanted())
    together = (batch is not False and chosen == "registry" and not subject.is_encoder_decoder
                and not hidden_states and not token_loss and all(getattr(r, "any_order", False) for r in reducers))
    if batch and not together:
        raise AttnposError("Texts can be batched only on the registry path, for a model without a decoder stack, "
                           "without hidden states or token losses, and with reducers that take any order of texts.")
    passes = batches([len(prefix) + len(u) for u in units]) if together else [[t] for t in range(len(units))]
    iterator = _progress.bar(passes, desc=f"recording {subject.name}", unit="pass", show=show)
    try:
        _ACTIVE.append(run)
        ctx = _registry_path(subject, run) if chosen == "registry" else _weights_path(subject, _ACTIVE)
        with ctx, torch.no_grad():
            for n_pass, texts_of_pass in enumerate(iterator):
                t = texts_of_pass[0]
                rows = [prefix + list(units[i].ids) for i in texts_of_pass]
                run.start_batch([(i, len(r)) for i, r in zip(texts_of_pass, rows)])
                ids = rows[0] if len(rows) == 1 else rows
                out = forward(subject, ids, offset=position_offset, want_weights=(chosen != "registry"),
                               hidden=hidden_states, logits=token_loss)
                missing = [s for s in subject.sites if (s.stack, s.layer) not in run.seen]
                if missing:
                    if chosen == "registry" and n_pass == 0 and len(missing) == len(subject.sites) and path is None:
                        # the architecture does not call the registry: switch paths for this subject
                        subject.capture_path = "eager-weights"
                        _ACTIVE.pop()
                        return record(subject, units=units, reducers=reducers, keep=keep, keep_scores=keep_scores,
                                      position_offset=position_offset, prefix=prefix, hidden_states=hidden_states,
                                      token_loss=token_loss, progress=progress, path="eager-weights",
                                      batch=False if batch is False else None)
                    names = ", ".join(f"{s.stack}:L{s.layer}" for s in missing[:4])
                    raise AttnposError(f"The capture saw no attention for {len(missing)} layers ({names}) of "
                                       f"{subject.architecture}. This architecture computes attention in a way "
                                       "attnpos does not reach; please report it.")
                if hidden_states:
                    hs = getattr(out, "hidden_states", None) or getattr(out, "encoder_hidden_states", None)
                    rec.hidden.append(np.stack([h[0, len(prefix):].float().numpy() for h in hs]))
                if token_loss:
                    tl = next_token_loss(out, ids)
                    rec.token_loss.append(tl[len(prefix):] if tl is not None else None)
                del out
        subject.capture_path = chosen
    finally:
        if _ACTIVE and _ACTIVE[-1] is run:
            _ACTIVE.pop()
    if run.nonfinite:
        bad = ", ".join(f"{s}:L{l}" for s, l in sorted(run.nonfinite)[:4])
        raise AttnposError(f"The model produced NaN or infinite attention weights in {len(run.nonfinite)} layers "
                           f"({bad}). Check the checkpoint for NaN/inf weights (attnpos.subject."
                           "has_nonfinite_weights) before scanning.")
    rec.maps = run.maps
    rec.score_maps = run.score_maps
    for r in reducers:
        rec.results[r.name] = r.result()
    return rec
