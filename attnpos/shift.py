"""The shift test: run the same text with every position moved, and see which heads move with it.

* Schemes with position ids (learned absolute, sinusoidal, RoPE): every position id is offset by ``k``.
* Schemes without (no encoding, ALiBi, relative bias): ``k`` neutral tokens are placed before the text, and only
  the text's own rows and keys are compared (weights renormalised over the text's keys).

A head that attends by relative offset or by content keeps the same weights (``relative``); a head tied to
absolute slots changes (``absolute``). Per head, ``change`` is the mean over the text's ordinary queries of the
total-variation distance ½·Σ_j |w'_ij − w_ij| between a query's weights before and after. Thresholds live in
:mod:`attnpos.core.thresholds`.

RoPE makes q·k depend only on the offset between positions (Su et al., RoFormer), so a RoPE model's scores do not
change at all under the position-id shift — a check in the tests.

Example::

    >>> import attnpos
    >>> from attnpos.texts import as_raw, prepare
    >>> subject = attnpos.load("ref:rope")
    >>> units = prepare(subject, as_raw(["The ferry left at nine and came back at noon, as it does every day."]))
    >>> res = ShiftTest().run(subject, units)
    >>> res.shift_kind, res.offset, res.change[("main", 0)].shape
    ('position-ids', 32, (4,))
    >>> float(res.change[("main", 0)].max()) < 1e-3       # RoPE: q·k depends on the offset only (Su et al.)
    True
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from .core import thresholds as th
from .capture import LayerCapture, Reducer, record
from .results.shift import ShiftResult
from .texts import TextUnit


def verdict(change: float) -> str:
    if not np.isfinite(change):
        return "n/a"
    if change < th.SHIFT_RELATIVE:
        return "relative"
    if change > th.SHIFT_ABSOLUTE:
        return "absolute"
    return "mixed"


class _Keep(Reducer):
    name = "shift-base"

    def begin(self, subject, units):
        self.maps = {}

    def update(self, cap: LayerCapture):
        key = (cap.text, cap.site.stack, cap.site.layer)
        w = cap.weights.to(torch.float16)
        prev = self.maps.get(key)
        self.maps[key] = w if prev is None else torch.cat([prev, w], 0)

    def result(self):
        return self.maps


class _Compare(Reducer):
    name = "shift-compare"

    def __init__(self, base: dict, subject):
        self.base = base
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.H = subject.n_heads

    def begin(self, subject, units):
        self.sum = {k: np.zeros(self.H) for k in self.keys}
        self.n = {k: 0 for k in self.keys}

    def update(self, cap: LayerCapture):
        o = cap.offset
        w = cap.weights[:, o:, o:]
        if o:
            w = w / w.sum(-1, keepdim=True).clamp_min(1e-30)
        base = self.base[(cap.text, cap.site.stack, cap.site.layer)][cap.head0:cap.head0 + cap.n_heads].float()
        T = w.shape[-1]
        ordinary = torch.from_numpy(~cap.unit.special[:T])
        tv = 0.5 * (w - base).abs().sum(-1)          # (n, T)
        k = (cap.site.stack, cap.site.layer)
        self.sum[k][cap.head0:cap.head0 + cap.n_heads] += tv[:, ordinary].sum(-1).double().numpy()
        if cap.head0 == 0:
            self.n[k] += int(ordinary.sum())

    def result(self):
        return {k: self.sum[k] / max(self.n[k], 1) for k in self.keys}


def _neutral_prefix(tokenizer, k: int) -> list[int]:
    ids = tokenizer(". " * (k + 4), add_special_tokens=False)["input_ids"]
    if len(ids) < k:
        ids = (ids or [0]) * (k // max(len(ids), 1) + 1)
    return list(ids[:k])


class ShiftTest:
    """Run the shift test on (the first tokens of) a few text units.

    Args:
        offset: how far to shift (default :data:`attnpos.core.thresholds.SHIFT_OFFSET`).
        max_texts / max_tokens: how much text to use (the test keeps one set of maps in memory).
        kind: ``"position-ids"`` or ``"prefix"``; by default position ids where the scheme has them.
    """

    def __init__(self, offset: int | None = None, max_texts: int | None = None, max_tokens: int | None = None,
                 kind: str | None = None):
        self.offset = offset or th.SHIFT_OFFSET
        self.max_texts = max_texts or th.SHIFT_MAX_TEXTS
        self.max_tokens = max_tokens or th.SHIFT_MAX_TOKENS
        self.kind = kind

    def run(self, subject, units: Sequence[TextUnit]) -> ShiftResult:
        kind = self.kind or ("position-ids" if subject.uses_position_ids else "prefix")
        k = self.offset
        room = self.max_tokens
        if subject.context_limit:
            room = min(room, subject.context_limit - k)
        if room < 4:
            return ShiftResult(shift_kind=kind, offset=k, change=None,
                               note=f"the context limit leaves no room to shift by {k}")
        short = [TextUnit(name=u.name, source=u.source, ids=u.ids[:room], tokens=u.tokens[:room],
                          special=u.special[:room], window=u.window) for u in list(units)[: self.max_texts]]
        base = record(subject, units=short, reducers=[_Keep()], progress=False).results["shift-base"]
        cmp_ = _Compare(base, subject)
        if kind == "position-ids":
            record(subject, units=short, reducers=[cmp_], position_offset=k, progress=False)
        else:
            record(subject, units=short, reducers=[cmp_], prefix=_neutral_prefix(subject.tokenizer, k),
                   progress=False)
        change = cmp_.result()
        return ShiftResult(shift_kind=kind, offset=k, change=change,
                           verdict={key: [verdict(c) for c in v] for key, v in change.items()},
                           n_texts=len(short), max_tokens=room)
