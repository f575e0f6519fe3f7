"""The shift test: run the same text with every position moved, and see which heads move with it.

Two shifts, each an intervention:

* ``position-ids`` — every position id is offset by ``k`` (schemes that read position ids: learned absolute,
  sinusoidal, RoPE).
* ``prefix`` — ``k`` neutral tokens are placed before the text, and only the text's own rows and keys are compared
  (weights renormalised over the text's keys). This moves the absolute slots that any scheme can still find — the
  first token, a template slot — so it is informative for RoPE, ALiBi and relative-bias models too, where shifting
  ids cannot change anything (RoPE's q·k depends on the offset only, Su et al.; ALiBi and relative bias read no
  ids): a head that sinks onto the first token (Xiao et al. 2024) is ``absolute`` under the prefix shift.

By default the shifts informative for the model's schemes run (:meth:`attnpos.core.schemes.SchemeSpec.informative_shifts`);
``kinds`` chooses by hand. Per head and shift, ``change`` is the mean over the text's ordinary queries of the
total-variation distance ½·Σ_j |w'_ij − w_ij| between a query's weights before and after.

Verdicts: ``relative`` (change < SHIFT_RELATIVE: the head moved with the text), ``absolute`` (> SHIFT_ABSOLUTE:
it kept looking at the same absolute places; > SHIFT_PREFIX_ABSOLUTE for the prefix, which also changes the context
the text is read in — a trained model's later heads change somewhat under it without being tied to a slot),
``mixed`` between; ``no-position`` when the head's weights are within
SHIFT_RELATIVE of uniform over the allowed keys (in mean total variation) — then no shift could move them, so
"kept" says nothing: the head uses no position at all (an untrained head, for instance). The head's verdict over
several shifts is ``absolute`` if any says so, ``relative`` if all do, ``mixed`` otherwise. Thresholds live in
:mod:`attnpos.core.thresholds`.

**Passes.** The unshifted weights can come from a recording the caller makes anyway (the scan's own): add
:meth:`ShiftTest.base_reducer` to it and pass its result as ``run(..., base=...)``. In a causal layer a text's
first rows see only its first keys, so the first rows and keys of the whole text's weights are the weights of the
shortened text; with a non-causal layer the test runs its own unshifted pass. Each shifted pass runs the texts of
one length as one batch through the model's own eager attention (:mod:`attnpos._batch`), or one recording per text
where that does not apply.

Example::

    >>> import attnpos
    >>> from attnpos.texts import as_raw, prepare
    >>> subject = attnpos.load("ref:rope")
    >>> units = prepare(subject, as_raw(["The ferry left at nine and came back at noon, as it does every day."]))
    >>> res = ShiftTest(kinds=("position-ids", "prefix")).run(subject, units)
    >>> res.kinds, res.offset, res.changes["position-ids"][("main", 0)].shape
    (['position-ids', 'prefix'], 32, (4,))
    >>> float(res.changes["position-ids"][("main", 0)].max()) < 1e-3    # RoPE: q·k depends on the offset only (Su et al.)
    True
    >>> ShiftTest().run(subject, units).kinds                          # the informative one by default
    ['prefix']
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from . import _batch
from .core import schemes as core_schemes
from .core import thresholds as th
from .capture import LayerCapture, Reducer, record
from .results.shift import NO_POSITION, ShiftResult, combine  # noqa: F401  (combine: the verdict rule)
from .texts import TextUnit


def verdict(change: float, spread: float = np.inf, kind: str = "position-ids") -> str:
    """The word for one head and shift: ``spread`` is the mean total-variation distance of the head's unshifted
    weights from uniform (below SHIFT_RELATIVE: ``no-position``, whatever the change); the prefix's ``absolute``
    needs SHIFT_PREFIX_ABSOLUTE (the prefix also changes the context, see :mod:`attnpos.core.thresholds`)."""
    if np.isfinite(spread) and spread < th.SHIFT_RELATIVE:
        return NO_POSITION
    if not np.isfinite(change):
        return "n/a"
    if change < th.SHIFT_RELATIVE:
        return "relative"
    if change > (th.SHIFT_PREFIX_ABSOLUTE if kind == "prefix" else th.SHIFT_ABSOLUTE):
        return "absolute"
    return "mixed"


PREFIX_NOTE = ("The neutral prefix also changes the context the text is read in, so in a trained model heads of "
               "later layers change somewhat without being tied to a slot; the prefix says `absolute` only above "
               f"{th.SHIFT_PREFIX_ABSOLUTE} (heads that follow the first token or a template slot change far more).")


class _Keep(Reducer):
    """The unshifted weights (float16), and per head the mean total-variation distance from uniform over the allowed
    keys (ordinary queries).

    ``limits`` (one per text): keep only the first ``limits[t]`` queries and keys of text t, and nothing of texts
    past the list — the unshifted pass of the shift test taken from a recording of the whole texts (the scan's own).
    In a causal layer those rows see only those keys, so they are the weights of the shortened text; a layer where
    they see a later key makes the result ``shared: False`` (the test then runs its own unshifted pass)."""

    name = "shift-base"

    def __init__(self, limits: Sequence[int] | None = None):
        self.limits = None if limits is None else list(limits)

    def begin(self, subject, units):
        self.maps = {}
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.spread = {k: np.zeros(subject.n_heads) for k in self.keys}
        self.n = {k: 0 for k in self.keys}
        self.shared = True

    def update(self, cap: LayerCapture):
        w, allowed = cap.weights, cap.allowed
        if self.limits is not None:
            if cap.text >= len(self.limits) or not self.shared:
                return
            L = self.limits[cap.text]
            if cap.offset or bool(allowed[:L, L:].any()):
                self.shared = False
                self.maps = {}
                return
            w, allowed = w[:, :L, :L], allowed[:L, :L]
        key = (cap.text, cap.site.stack, cap.site.layer)
        prev = self.maps.get(key)
        self.maps[key] = w.to(torch.float16) if prev is None else torch.cat([prev, w.to(torch.float16)], 0)
        T = w.shape[-1]
        A = allowed.to(w.dtype)
        uni = A / A.sum(-1, keepdim=True).clamp_min(1.0)
        ordinary = torch.from_numpy(~np.asarray(cap.unit.special[:T], dtype=bool))
        tv = 0.5 * ((w - uni).abs() * A).sum(-1)            # (n, T)
        k = (cap.site.stack, cap.site.layer)
        self.spread[k][cap.head0:cap.head0 + cap.n_heads] += tv[:, ordinary].sum(-1).double().numpy()
        if cap.head0 == 0:
            self.n[k] += int(ordinary.sum())

    def result(self):
        spread = {k: self.spread[k] / max(self.n[k], 1) for k in self.keys}
        return {"maps": self.maps, "spread": spread, "shared": self.shared, "limits": self.limits}


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
        base = base[..., :w.shape[-2], :w.shape[-1]]
        T = w.shape[-1]
        ordinary = torch.from_numpy(~cap.unit.special[:T])
        tv = 0.5 * (w - base).abs().sum(-1)          # (n, T)
        k = (cap.site.stack, cap.site.layer)
        self.sum[k][cap.head0:cap.head0 + cap.n_heads] += tv[:, ordinary].sum(-1).double().numpy()
        if cap.head0 == 0:
            self.n[k] += int(ordinary.sum())

    def result(self):
        return {k: self.sum[k] / max(self.n[k], 1) for k in self.keys}


def _compare_batched(subject, short: Sequence[TextUnit], base: dict, *, prefix: Sequence[int] = (),
                     position_offset: int = 0) -> dict | None:
    """What :class:`_Compare` gives from a recording of the shifted texts, from batched forward passes of the
    model's own eager attention (texts of one length share a pass); None where that pass does not apply
    (:mod:`attnpos._batch`)."""
    keys = [(s.stack, s.layer) for s in subject.sites]
    total = {k: np.zeros(subject.n_heads) for k in keys}
    count = {k: 0 for k in keys}
    o = len(prefix)
    ordinary = [torch.from_numpy(~np.asarray(u.special, dtype=bool)) for u in short]

    def on_layer(site, index, w, mask):
        ws = w[:, :, o:, o:]
        if o:
            ws = ws / ws.sum(-1, keepdim=True).clamp_min(1e-30)
        k = (site.stack, site.layer)
        for b, t in enumerate(index):
            ref = base[(t, site.stack, site.layer)].float()
            T = ws.shape[-1]
            ref = ref[..., :T, :T]
            tv = 0.5 * (ws[b] - ref).abs().sum(-1)                 # (heads, T)
            total[k] += tv[:, ordinary[t][:T]].sum(-1).double().numpy()
            count[k] += int(ordinary[t][:T].sum())

    if not _batch.run(subject, [list(prefix) + list(u.ids) for u in short], on_layer,
                      position_offset=position_offset):
        return None
    return {k: total[k] / max(count[k], 1) for k in keys}


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
        kinds: which shifts to run, from ``("position-ids", "prefix")``; by default those informative for the
            model's schemes. ``kind`` (one shift) is the older spelling.
    """

    def __init__(self, offset: int | None = None, max_texts: int | None = None, max_tokens: int | None = None,
                 kind: str | None = None, kinds: Sequence[str] | None = None):
        self.offset = offset or th.SHIFT_OFFSET
        self.max_texts = max_texts or th.SHIFT_MAX_TEXTS
        self.max_tokens = max_tokens or th.SHIFT_MAX_TOKENS
        if kinds is None and kind is not None:
            kinds = (kind,)
        if kinds is not None:
            bad = [k for k in kinds if k not in core_schemes.SHIFT_KINDS]
            if bad or not kinds:
                raise ValueError(f"shift kinds are {core_schemes.SHIFT_KINDS}, not {list(kinds)}")
        self.kinds = tuple(kinds) if kinds is not None else None

    def kinds_for(self, subject) -> list[str]:
        """The shifts that run on ``subject``: as asked, or the informative ones for its schemes; the position-id
        shift only where the model takes position ids."""
        kinds = list(self.kinds or core_schemes.informative_shifts(subject.schemes))
        if "position-ids" in kinds and not subject.uses_position_ids:
            kinds.remove("position-ids")
        return kinds or ["prefix"]

    def _room(self, subject) -> int:
        room = self.max_tokens
        if subject.context_limit:
            room = min(room, subject.context_limit - self.offset)
        return room

    def _short(self, units: Sequence[TextUnit], room: int) -> list[TextUnit]:
        return [TextUnit(name=u.name, source=u.source, ids=u.ids[:room], tokens=u.tokens[:room],
                         special=u.special[:room], window=u.window) for u in list(units)[: self.max_texts]]

    def base_reducer(self, subject, units: Sequence[TextUnit]) -> Reducer | None:
        """A reducer to add to an unshifted recording of ``units`` (the scan's own) that keeps what this test
        compares with, so that :meth:`run` given its result (``base=``) needs no unshifted pass of its own; None
        where no layer could share it (a non-causal layer: its first rows read later tokens)."""
        room = self._room(subject)
        if room < 4 or not all(s.causal for s in subject.sites):
            return None
        return _Keep(limits=[len(u) for u in self._short(units, room)])

    def run(self, subject, units: Sequence[TextUnit], base: dict | None = None) -> ShiftResult:
        """The test on the first texts of ``units``. ``base``: what the reducer of :meth:`base_reducer` kept in a
        recording of the same ``units`` (used when it could share the unshifted pass, else ignored)."""
        kinds = self.kinds_for(subject)
        k = self.offset
        room = self._room(subject)
        if room < 4:
            return ShiftResult(kinds=kinds, offset=k, changes=None,
                               note=f"the context limit leaves no room to shift by {k}")
        short = self._short(units, room)
        if base is not None and base.get("shared") and base.get("limits") == [len(u) for u in short]:
            kept = base
        else:
            kept = record(subject, units=short, reducers=[_Keep()], progress=False).results["shift-base"]
        changes = {}
        for kind in kinds:
            if kind == "position-ids":
                how = {"position_offset": k}
            else:
                how = {"prefix": _neutral_prefix(subject.tokenizer, k)}
            got = _compare_batched(subject, short, kept["maps"], **how)
            if got is None:
                cmp_ = _Compare(kept["maps"], subject)
                record(subject, units=short, reducers=[cmp_], progress=False, **how)
                got = cmp_.result()
            changes[kind] = got
        spread = kept["spread"]
        verdicts = {kind: {key: [verdict(c, sp, kind) for c, sp in zip(v, spread[key])] for key, v in ch.items()}
                    for kind, ch in changes.items()}
        note = PREFIX_NOTE if "prefix" in kinds else None
        return ShiftResult(kinds=kinds, offset=k, changes=changes, verdicts=verdicts, spread=spread, note=note,
                           n_texts=len(short), max_tokens=room)
