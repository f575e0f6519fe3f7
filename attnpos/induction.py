"""The induction test (Olsson et al. 2022): random tokens repeated twice.

On a sequence ``x_1 … x_n x_1 … x_n`` an induction head, at the second copy of token ``x_t``, attends to the
token that followed its first copy, ``x_{t+1}``. The score of a head is the mean weight on that key over the
second copy's queries, averaged over :data:`attnpos.core.settings.INDUCTION_SEQUENCES` random sequences (fixed
seed) of ordinary tokens (:func:`ordinary_pool`: printable, not special), with the standard error of that mean
over the sequences. Random tokens carry no meaning, so only copying explains a high score. The sequences have one
length and run as one batch through the model's own eager attention (:mod:`attnpos._batch`; one recording per
sequence where that does not apply).

Example::

    >>> import attnpos
    >>> res = induction_scores(attnpos.load("ref:rope"))
    >>> res.scores[("main", 0)].shape, list(res.table().columns)
    ((4,), ['key', 'stack', 'layer', 'head', 'induction', 'induction_se'])
    >>> bool((res.stderr[("main", 0)] <= 0.02).all())
    True
"""

from __future__ import annotations

import re
import weakref

import numpy as np
import torch

from . import _batch
from .capture import LayerCapture, Reducer, record
from .core import settings
from .results.induction import InductionResult
from .texts import TextUnit, display_tokens, template


class _Induction(Reducer):
    name = "induction"

    def __init__(self, n: int, start: int):
        self.n, self.start = n, start

    def begin(self, subject, units):
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        R = len(units)
        self.sum = {k: np.zeros((R, subject.n_heads)) for k in self.keys}
        self.count = {k: np.zeros(R) for k in self.keys}

    def update(self, cap: LayerCapture):
        n, a = self.n, self.start
        T = cap.weights.shape[-1]
        q = torch.arange(a + n + 1, min(a + 2 * n, T))          # second copy, from its second token
        target = q - n + 1                                       # the key after the first copy
        ok = cap.allowed[q, target]
        vals = cap.weights[:, q[ok], target[ok]]
        k = (cap.site.stack, cap.site.layer)
        self.sum[k][cap.text, cap.head0:cap.head0 + cap.n_heads] += vals.sum(-1).double().numpy()
        if cap.head0 == 0:
            self.count[k][cap.text] += int(ok.sum())

    def result(self):
        """Per site: the score of each sequence (R, heads)."""
        return {k: self.sum[k] / np.maximum(self.count[k], 1)[:, None] for k in self.keys}


def _recorded(subject, units, n: int, start: int) -> dict:
    """Per site, the score of each sequence (R, heads), from a recording (one sequence per forward pass)."""
    return record(subject, units=units, reducers=[_Induction(n, start)], progress=False).results["induction"]


def _batched(subject, units, n: int, start: int) -> dict | None:
    """The same as :func:`_recorded` from batched forward passes of the model's own eager attention (the
    sequences have one length), or None where that pass does not apply (:mod:`attnpos._batch`)."""
    keys = [(s.stack, s.layer) for s in subject.sites]
    R, H = len(units), subject.n_heads
    total = {k: np.zeros((R, H)) for k in keys}
    count = {k: np.zeros(R) for k in keys}

    def on_layer(site, index, w, mask):
        T = w.shape[-1]
        q = torch.arange(start + n + 1, min(start + 2 * n, T))   # second copy, from its second token
        target = q - n + 1                                       # the key after the first copy
        allowed = _batch.allowed_pairs(mask, T, T)
        if allowed is not None:
            ok = allowed[q, target]
            q, target = q[ok], target[ok]
        vals = w[:, :, q, target].sum(-1).double().numpy()      # (batch, heads)
        k = (site.stack, site.layer)
        total[k][index] += vals
        count[k][index] += len(q)

    if not _batch.run(subject, [u.ids for u in units], on_layer):
        return None
    return {k: total[k] / np.maximum(count[k], 1)[:, None] for k in keys}


def ordinary_pool(tokenizer, need: int = 1) -> list[int]:
    """Ids the test draws from: not special, and decoding on their own to printable, non-blank text (unused slots
    such as ``[unused7]``, control bytes and partial UTF-8 sequences are left out). Falls back to every non-special
    id if fewer than ``need`` remain.

    The decision per id is kept per tokenizer object (a second scan in the same process does not decode the
    vocabulary again), and a fast tokenizer's ids are decoded by its Rust backend in one call."""
    special = set(getattr(tokenizer, "all_special_ids", []) or [])
    special |= set(getattr(tokenizer, "added_tokens_decoder", {}) or {})
    vocab = len(tokenizer)
    ids = [i for i in range(min(vocab, 50000)) if i not in special]
    key = (vocab, tuple(sorted(special)))
    try:
        cached = _POOLS.get(tokenizer)
    except TypeError:                      # a tokenizer that cannot be weakly referenced: no cache
        cached = None
    if cached is not None and cached[0] == key:
        keep = cached[1]
    else:
        texts = _decode_each(tokenizer, ids)
        keep = [i for i, t in zip(ids, texts)
                if t.strip() and t.isprintable() and "\ufffd" not in t and not _UNUSED.match(t.strip())]
        try:
            _POOLS[tokenizer] = (key, keep)
        except TypeError:
            pass
    return list(keep) if len(keep) >= need else ids


#: per tokenizer object: (vocabulary size and special ids, the ordinary ids) — see :func:`ordinary_pool`
_POOLS: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _decode_each(tokenizer, ids: list[int]) -> list[str]:
    """Each id decoded on its own. A fast tokenizer's backend decodes them in one call (about ten times faster on a
    49k vocabulary than the tokenizer's own ``batch_decode``, whose extra step — tidying spaces before punctuation
    — cannot change whether a single token's text is blank, printable or a placeholder); others use
    ``batch_decode``."""
    backend = getattr(tokenizer, "backend_tokenizer", None)
    if backend is not None and hasattr(backend, "decode_batch"):
        try:
            return backend.decode_batch([[i] for i in ids], skip_special_tokens=False)
        except Exception:  # noqa: BLE001 - fall back to the tokenizer's own path
            pass
    return tokenizer.batch_decode([[i] for i in ids])


_UNUSED = re.compile(r"^[\[<]\s*(unused|extra_id|reserved)[^\]>]*[\]>]$", re.I)


def induction_scores(subject, *, length: int = 48, repeats: int | None = None, seed: int = 0) -> InductionResult:
    """Mean weight on the induction target per head (an :class:`~attnpos.results.induction.InductionResult`), with
    its standard error over the random sequences."""
    repeats = repeats or settings.INDUCTION_SEQUENCES
    rng = np.random.default_rng(seed)
    prefix, suffix = template(subject.tokenizer)
    if subject.context_limit:
        length = min(length, (subject.context_limit - len(prefix) - len(suffix)) // 2)
    pool = ordinary_pool(subject.tokenizer, length)
    units = []
    for r in range(repeats):
        body = [int(x) for x in rng.choice(pool, size=length, replace=len(pool) < length)]
        ids = prefix + body + body + suffix
        special = np.zeros(len(ids), dtype=bool)
        special[: len(prefix)] = True
        if suffix:
            special[-len(suffix):] = True
        units.append(TextUnit(name=f"random-repeat-{r}", source="<induction test>", ids=ids,
                              tokens=display_tokens(subject.tokenizer, ids), special=special))
    per = _batched(subject, units, length, len(prefix))
    if per is None:
        per = _recorded(subject, units, length, len(prefix))
    scores = {k: v.mean(0) for k, v in per.items()}
    stderr = {k: (v.std(0, ddof=1) / np.sqrt(len(v)) if len(v) > 1 else np.full(v.shape[1], np.nan))
              for k, v in per.items()}
    return InductionResult(scores=scores, stderr=stderr, per_sequence=per,
                           settings={"length": length, "repeats": repeats, "seed": seed, "pool": len(pool)})
