"""Batched passes for the stages that keep only a few numbers per head and layer: the shift test's shifted pass and
the induction test.

:func:`attnpos.record` runs one text per forward pass and hands every layer's full maps to reducers — what the
scan's own statistics need. The shift test's shifted pass and the induction test read the weights of each layer
and reduce them to a handful of numbers per head; their sequences have (mostly) equal lengths, so they can run as
one batch. Here the model runs its **own** eager attention (``eager_attention_forward`` of its modelling file,
registered for the pass with :func:`attnpos.capture.attention_function`, which restores the model on exit), so the
outputs are those of a plain eager run; every call's weights go to a callback and are dropped.

Only where this is exactly the same measurement as a recording: the registry path, float32 weights (in bfloat16
the eager weights would be rounded, where a recording computes them in float32), a decoder-only or encoder-only
model whose attention modules each serve one site, and a modelling file with an eager attention function. Anything
else returns ``False`` and the caller records as before. ``tests/test_split_roles.py`` compares both paths.
"""

from __future__ import annotations

import sys
from typing import Callable, Sequence

import torch

from .capture import attention_function

# bytes of one layer's (batch, heads, T, T) float32 weights a batch may take (eager attention holds about three
# such tensors at once: scores, weights and their copy in the output's dtype)
BATCH_BYTES = 64 * 2 ** 20


def _eager_of(module):
    fn = getattr(sys.modules.get(type(module).__module__), "eager_attention_forward", None)
    return fn if callable(fn) else None


def usable(subject) -> bool:
    """Whether a batched pass measures exactly what a recording would (see the module doc)."""
    if subject.capture_path == "eager-weights" or getattr(subject, "is_encoder_decoder", False):
        return False
    if subject.dtype != "float32" or subject.excluded:
        return False
    modules = [s.module for s in subject.sites]
    if len({id(m) for m in modules}) != len(modules):
        return False
    return all(_eager_of(m) is not None for m in modules)


def allowed_pairs(mask, q_len: int, k_len: int) -> torch.Tensor | None:
    """The (q_len, k_len) pairs the first sequence's mask allows (None: no mask, every pair)."""
    if mask is None:
        return None
    m = mask
    while m.dim() > 2:
        m = m[0]
    m = m[-q_len:, :k_len]
    return m.clone() if m.dtype == torch.bool else m > torch.finfo(m.dtype).min / 2


def batches(lengths: Sequence[int], heads: int) -> list[list[int]]:
    """Indices of sequences grouped by equal length, each group cut so one layer's weights stay under BATCH_BYTES."""
    groups: dict[int, list[int]] = {}
    for i, n in enumerate(lengths):
        groups.setdefault(n, []).append(i)
    out = []
    for n, idx in groups.items():
        per = max(1, BATCH_BYTES // max(1, heads * n * n * 4))
        out += [idx[i:i + per] for i in range(0, len(idx), per)]
    return out


def run(subject, sequences: Sequence[Sequence[int]], on_layer: Callable, *, position_offset: int = 0) -> bool:
    """Run ``sequences`` (token ids) in batches of equal length through the model's own eager attention and call
    ``on_layer(site, index, weights, mask)`` for every recorded site and batch: ``index`` lists the batch's
    sequences, ``weights`` is the (batch, heads, T, T) float32 tensor the model computed (read it, do not keep it),
    ``mask`` the mask the model handed to the layer. Returns False — having called nothing — when the pass does not
    apply (:func:`usable`), and False after a batch in which some site never called attention (then the caller
    must not use what ``on_layer`` gathered)."""
    if not usable(subject):
        return False
    site_of = {id(s.module): s for s in subject.sites}
    state: dict = {"index": None, "seen": set(), "ok": True}

    def attend(module, query, key, value, attention_mask, *args, **kwargs):
        out, w = _eager_of(module)(module, query, key, value, attention_mask, *args, **kwargs)
        site = site_of.get(id(module))
        if site is not None:
            if w is None or w.dtype != torch.float32 or (attention_mask is None and site.causal):
                state["ok"] = False
            else:
                state["seen"].add((site.stack, site.layer))
                on_layer(site, state["index"], w, attention_mask)
        return out, None

    # the stack without its head: the attention layers are the same modules, and no pass here reads the logits
    # (a vocabulary-sized product per token — a fifth of a forward pass of a small model with a large vocabulary)
    model = getattr(subject.model, "base_model", None) or subject.model
    with attention_function(subject, attend), torch.no_grad():
        for idx in batches([len(s) for s in sequences], subject.n_heads):
            state["index"], state["seen"] = idx, set()
            x = torch.tensor([list(sequences[i]) for i in idx], dtype=torch.long)
            kw = {"input_ids": x, "attention_mask": torch.ones_like(x), "use_cache": False}
            if position_offset:
                kw["position_ids"] = torch.arange(position_offset, position_offset + x.shape[1]).expand_as(x)
            try:
                model(**kw)
            except TypeError as exc:
                if "use_cache" not in str(exc):
                    raise
                kw.pop("use_cache")
                model(**kw)
            if not state["ok"] or len(state["seen"]) != len(subject.sites):
                return False
    return True
