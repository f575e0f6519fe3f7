"""The induction test (Olsson et al. 2022): random tokens repeated twice.

On a sequence ``x_1 … x_n x_1 … x_n`` an induction head, at the second copy of token ``x_t``, attends to the
token that followed its first copy, ``x_{t+1}``. The score of a head is the mean weight on that key over the
second copy's queries, averaged over a few random sequences (fixed seed). Random tokens carry no meaning, so
only copying explains a high score.

Example::

    >>> import attnpos
    >>> res = induction_scores(attnpos.load("ref:rope"))
    >>> res.scores[("main", 0)].shape, list(res.table().columns)
    ((4,), ['key', 'stack', 'layer', 'head', 'induction'])
"""

from __future__ import annotations

import numpy as np
import torch

from .capture import LayerCapture, Reducer, record
from .results.induction import InductionResult
from .texts import TextUnit, display_tokens, template


class _Induction(Reducer):
    name = "induction"

    def __init__(self, n: int, start: int):
        self.n, self.start = n, start

    def begin(self, subject, units):
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.sum = {k: np.zeros(subject.n_heads) for k in self.keys}
        self.count = {k: 0 for k in self.keys}

    def update(self, cap: LayerCapture):
        n, a = self.n, self.start
        T = cap.weights.shape[-1]
        q = torch.arange(a + n + 1, min(a + 2 * n, T))          # second copy, from its second token
        target = q - n + 1                                       # the key after the first copy
        ok = cap.allowed[q, target]
        vals = cap.weights[:, q[ok], target[ok]]
        k = (cap.site.stack, cap.site.layer)
        self.sum[k][cap.head0:cap.head0 + cap.n_heads] += vals.sum(-1).double().numpy()
        if cap.head0 == 0:
            self.count[k] += int(ok.sum())

    def result(self):
        return {k: self.sum[k] / max(self.count[k], 1) for k in self.keys}


def _ordinary_ids(tokenizer, rng: np.random.Generator, n: int) -> list[int]:
    special = set(getattr(tokenizer, "all_special_ids", []) or [])
    vocab = len(tokenizer)
    pool = [i for i in range(min(vocab, 50000)) if i not in special]
    # prefer ids that decode to printable text (avoids unused slots in some vocabularies)
    return [int(x) for x in rng.choice(pool, size=n, replace=False)]


def induction_scores(subject, *, length: int = 48, repeats: int = 4, seed: int = 0) -> InductionResult:
    """Mean weight on the induction target per head (an :class:`~attnpos.results.induction.InductionResult`)."""
    rng = np.random.default_rng(seed)
    prefix, suffix = template(subject.tokenizer)
    if subject.context_limit:
        length = min(length, (subject.context_limit - len(prefix) - len(suffix)) // 2)
    units = []
    for r in range(repeats):
        body = _ordinary_ids(subject.tokenizer, rng, length)
        ids = prefix + body + body + suffix
        special = np.zeros(len(ids), dtype=bool)
        special[: len(prefix)] = True
        if suffix:
            special[-len(suffix):] = True
        units.append(TextUnit(name=f"random-repeat-{r}", source="<induction test>", ids=ids,
                              tokens=display_tokens(subject.tokenizer, ids), special=special))
    red = _Induction(length, len(prefix))
    rec = record(subject, units=units, reducers=[red], progress=False)
    return InductionResult(scores=rec.results["induction"], settings={"length": length, "repeats": repeats,
                                                                     "seed": seed})
