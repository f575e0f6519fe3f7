r"""RoPE frequency bands: which rotary frequencies carry each head's scores.

RoPE (Su et al., RoFormer) rotates each pair of query/key dimensions by an angle proportional to the position,
with its own frequency θ_m per pair; a head's score is the sum over pairs of the pairs' dot products,

    q_i · k_j = Σ_m  c_ij^(m),      c_ij^(m) = q_i^(m) · k_j^(m)   (rotated 2-d pieces, before the 1/√d scaling).

Fast pairs (large θ, short wavelength 2π/θ) turn many times within the context and can express fine position;
slow pairs barely turn and behave like position-free channels (Barbero et al. 2025, "Round and Round We Go!").

**Energy.** For head h and pair m, the energy is the mean over the allowed pairs (i, j) of all texts of
``(c_ij^(m))²``; a pair's **share** is its energy over the sum of all pairs' energies (plus the energy of the
unrotated dimensions when only part of the head is rotated, reported as ``unrotated_share``). Shares are
non-negative and sum to 1. Squared contributions are used (rather than signed ones, which can cancel across
pairs) so that a pair that moves the scores a lot in either direction counts as carrying them.

**Bands.** Pairs are ordered from the fastest to the slowest frequency; the fastest third is the *high* band and
the slowest third the *low* band. A head is ``high`` (position-like) when at least half its energy is in the high
band, ``low`` when at least half is in the low band, else ``spread``. ``beyond_context_share`` is the energy in
pairs whose wavelength is longer than the longest text: they never complete a turn, whatever the position.

How: q and k are taken *after* rotation from inside the model's own attention call (attnpos registers an attention
function in transformers' registry for the run, as :mod:`attnpos.capture` does), so the model's own projections,
norms and rotary variant are used. The rotary layout (rotate-half or interleaved pairs) and each pair's frequency
are read from the cos/sin the model hands to the attention module.

Example::

    >>> out = rope_bands(attnpos.load("ref:rope"), ["some text ...", "more text ..."])   # doctest: +SKIP
    >>> out["heads"][0]["shares"], out["heads"][0]["band"]                                # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import math

import numpy as np
import torch

from .errors import AttnposError

FUNCTION_NAME = "attnpos_bands"
#: share of a head's energy in the high (or low) band from which the head is said to rely on that band
BAND_MAJORITY = 0.5

CAUTION = ("Energy shares say which rotary frequencies carry a head's scores on these texts, which is evidence, "
           "not explanation: confirm with an intervention (e.g. zeroing the pairs of one band and re-running).")


class _Run:
    def __init__(self, subject):
        self.site_of = {id(s.module): s for s in subject.sites if s.scheme == "rope"}
        self.rope: dict[int, tuple[torch.Tensor, torch.Tensor]] = {}
        self.energy: dict[tuple, np.ndarray] = {}     # (stack, layer) -> (H, P + 1) sums of squared contributions
        self.count: dict[tuple, float] = {}
        self.layout: str | None = None
        self.theta: np.ndarray | None = None
        self.rotary_dims: int | None = None
        self.head_dim: int | None = None
        self.notes: list[str] = []
        self.max_t = 0


_ACTIVE: list[_Run] = []


def _layout(cos: torch.Tensor, sin: torch.Tensor) -> tuple[str, np.ndarray]:
    """('half' | 'interleaved', θ per pair) from the cos/sin at position 1 (θ = atan2(sin, cos) there)."""
    c = cos.reshape(-1, cos.shape[-1]).float()
    s = sin.reshape(-1, sin.shape[-1]).float()
    rd = c.shape[-1]
    row_c, row_s = (c[1], s[1]) if c.shape[0] > 1 else (c[0], s[0])
    half = rd // 2
    if torch.allclose(row_c[:half], row_c[half:], atol=1e-5) and torch.allclose(row_s[:half], row_s[half:], atol=1e-5):
        layout, cc, ss = "half", row_c[:half], row_s[:half]
    elif torch.allclose(row_c[0::2], row_c[1::2], atol=1e-5):
        layout, cc, ss = "interleaved", row_c[0::2], row_s[0::2]
    else:
        raise AttnposError("The rotary cos/sin the model passes to attention follow neither the rotate-half nor the "
                           "interleaved layout, so attnpos cannot tell which dimensions form a pair.")
    theta = torch.atan2(ss, cc).double().numpy()
    if c.shape[0] > 1:
        return layout, np.abs(theta)
    return layout, np.full(half, np.nan)


def _pairs(layout: str, rd: int) -> list[tuple[int, int]]:
    half = rd // 2
    return [(m, m + half) for m in range(half)] if layout == "half" else [(2 * m, 2 * m + 1) for m in range(half)]


def _bands_attention(module, query, key, value, attention_mask, scaling=None, dropout=0.0, **kwargs):
    from .capture import _capture_attention

    run = _ACTIVE[-1] if _ACTIVE else None
    site = run.site_of.get(id(module)) if run else None
    if site is not None:
        _accumulate(run, site, module, query, key, attention_mask)
    return _capture_attention(module, query, key, value, attention_mask, scaling=scaling, dropout=dropout, **kwargs)


def _accumulate(run: _Run, site, module, query, key, attention_mask) -> None:
    from .capture import _allowed_from_mask

    q = query[0].float()
    k = key[0].float()
    H, T, d = q.shape
    if k.shape[0] != H:
        k = k.repeat_interleave(H // k.shape[0], dim=0)
    allowed = _allowed_from_mask(attention_mask, T, k.shape[1], site.causal if attention_mask is None else False)
    cs = run.rope.get(id(module))
    if cs is not None:
        rd = cs[0].shape[-1]
        layout, theta = _layout(*cs)
    else:
        rd, layout, theta = d, "half", None
        msg = ("The model did not pass cos/sin to its attention modules; the rotate-half layout over the whole "
               "head was assumed and frequencies are unknown.")
        if msg not in run.notes:
            run.notes.append(msg)
    if run.layout is None:
        run.layout, run.rotary_dims, run.head_dim = layout, rd, d
        run.theta = theta
    elif run.theta is None and theta is not None:
        run.theta = theta
    pairs = _pairs(layout, rd)
    P = len(pairs)
    A = allowed.float()
    key_ = (site.stack, site.layer)
    acc = run.energy.setdefault(key_, np.zeros((H, P + 1)))
    for m, (a, b) in enumerate(pairs):
        c = q[:, :, a, None] * k[:, None, :, a] + q[:, :, b, None] * k[:, None, :, b]      # (H, T, T)
        acc[:, m] += ((c * c) * A).sum((-1, -2)).double().numpy()
    if rd < d:
        c = q[:, :, rd:] @ k[:, :, rd:].transpose(-1, -2)
        acc[:, P] += ((c * c) * A).sum((-1, -2)).double().numpy()
    run.count[key_] = run.count.get(key_, 0.0) + float(A.sum())
    run.max_t = max(run.max_t, T)


@contextlib.contextmanager
def _installed(subject, run: _Run):
    """The bands attention function installed (see :func:`attnpos.capture.attention_function`), plus a pre-hook
    on every RoPE attention module that keeps the cos/sin tables it is handed."""
    from .capture import attention_function

    handles = []

    def pre_hook(module, args, kwargs):
        pe = kwargs.get("position_embeddings")
        if isinstance(pe, (tuple, list)) and len(pe) == 2 and all(isinstance(t, torch.Tensor) for t in pe):
            run.rope[id(module)] = (pe[0].detach(), pe[1].detach())
        return None

    _ACTIVE.append(run)
    try:
        with attention_function(subject, _bands_attention, FUNCTION_NAME):
            for s in subject.sites:
                if s.scheme == "rope":
                    handles.append(s.module.register_forward_pre_hook(pre_hook, with_kwargs=True))
            yield
    finally:
        for h in handles:
            h.remove()
        if _ACTIVE and _ACTIVE[-1] is run:
            _ACTIVE.pop()


def rope_bands(subject, texts=None, *, units=None, max_tokens: int | None = None) -> dict:
    """Per RoPE head, the share of q·k energy carried by each rotary frequency pair (JSON-safe dict).

    Args:
        subject: a :class:`~attnpos.subject.Subject`, folder or ``"ref:<scheme>"``.
        texts: strings, Paths, RawTexts or None (bundled samples); or pass prepared ``units``.
        max_tokens: split texts into windows of at most this many tokens.
    Returns:
        ``{"heads": [{"stack","layer","head","shares","unrotated_share","high_share","low_share",
        "beyond_context_share","dominant_pair","dominant_wavelength","band"}], "pairs": [{"pair","dims","theta",
        "wavelength","band"}], "layout", "rotary_dims", "head_dim", "context", "energy", "summary", "caution"}``.
    """
    from .capture import _forward
    from .result import json_safe
    from .subject import Subject, load
    from .texts import as_raw, prepare

    if not isinstance(subject, Subject):
        subject = load(subject)
    rope_sites = [s for s in subject.sites if s.scheme == "rope"]
    if not rope_sites:
        raise AttnposError(f"{subject.name} has no RoPE layers (schemes: {', '.join(sorted(set(subject.schemes)))}); "
                           "frequency bands only exist for rotary position embeddings.")
    if units is None:
        units = prepare(subject, as_raw(texts), max_tokens=max_tokens, warn=False)
    units = [u for u in units if len(u) >= 2]
    if not units:
        raise AttnposError("The bands need texts of at least two tokens.")
    run = _Run(subject)
    with _installed(subject, run), torch.no_grad():
        for u in units:
            _forward(subject, list(u.ids), offset=0, want_weights=False, hidden=False)
    if not run.energy:
        raise AttnposError(f"No RoPE attention call of {subject.architecture} reached attnpos (the architecture does "
                           "not use transformers' attention-function registry), so the bands cannot be measured.")
    P = len(_pairs(run.layout, run.rotary_dims))
    theta = run.theta if run.theta is not None else np.full(P, np.nan)
    wavelength = np.where(theta > 0, 2 * math.pi / np.where(theta > 0, theta, 1.0), np.inf)
    order = np.argsort(-np.nan_to_num(theta, nan=0.0), kind="stable") if np.isfinite(theta).all() else np.arange(P)
    third = max(1, P // 3)
    high = set(order[:third].tolist())
    low = set(order[P - third:].tolist())
    pairs = []
    for m, (a, b) in enumerate(_pairs(run.layout, run.rotary_dims)):
        pairs.append({"pair": m, "dims": [a, b], "theta": float(theta[m]), "wavelength": float(wavelength[m]),
                      "band": "high" if m in high else "low" if m in low else "middle"})
    context = run.max_t
    beyond = np.array([w > context for w in wavelength])
    heads = []
    summary: dict[str, list[str]] = {"high": [], "low": [], "spread": []}
    for s in rope_sites:
        key = (s.stack, s.layer)
        e = run.energy[key] / max(run.count[key], 1.0)
        tot = e.sum(1, keepdims=True)
        shares = e / np.where(tot > 0, tot, np.nan)
        for h in range(shares.shape[0]):
            sh = shares[h]
            hi = float(sh[sorted(high)].sum())
            lo = float(sh[sorted(low)].sum())
            band = "high" if hi >= BAND_MAJORITY else "low" if lo >= BAND_MAJORITY else "spread"
            dom = int(np.nanargmax(sh[:P])) if np.isfinite(sh[:P]).any() else None
            heads.append({"stack": s.stack, "layer": s.layer, "head": h, "shares": sh[:P],
                          "unrotated_share": float(sh[P]) if run.rotary_dims < run.head_dim else None,
                          "high_share": hi, "low_share": lo, "beyond_context_share": float(sh[:P][beyond].sum()),
                          "dominant_pair": dom, "dominant_wavelength": float(wavelength[dom]) if dom is not None else None,
                          "band": band})
            name = (f"{s.stack[:3]}:" if s.stack != "main" else "") + f"L{s.layer}.H{h}"
            summary[band].append(name)
    return json_safe({
        "heads": heads, "pairs": pairs, "layout": run.layout, "rotary_dims": run.rotary_dims,
        "head_dim": run.head_dim, "context": context, "n_texts": len(units),
        "energy": ("share of pair m = mean over allowed (i, j) of (q_i^(m)·k_j^(m))², rotated pieces, "
                   "over the sum across pairs (and unrotated dimensions)"),
        "bands": {"high": "fastest third of the pairs", "low": "slowest third of the pairs",
                  "rule": f"a head is high/low when at least {BAND_MAJORITY} of its energy is in that band"},
        "summary": summary, "notes": run.notes, "source": "Barbero et al. 2025", "caution": CAUTION,
    })


def summary_lines(bands: dict) -> list[str]:
    """Terminal lines for a bands result."""
    s = bands["summary"]
    pairs = bands["pairs"]
    hi = [p for p in pairs if p["band"] == "high"]
    lo = [p for p in pairs if p["band"] == "low"]
    fmt = lambda ps: (f"pairs {ps[0]['pair']}–{ps[-1]['pair']}, wavelengths "   # noqa: E731
                      f"{min(p['wavelength'] for p in ps):.3g}–{max(p['wavelength'] for p in ps):.3g} tokens"
                      if ps else "—")
    out = [f"RoPE bands ({len(pairs)} pairs per head, {bands['layout']} layout; energy = mean squared pair "
           "contribution to q·k):",
           f"  high band ({fmt(hi)}): {', '.join(s['high']) or 'no head'}",
           f"  low band ({fmt(lo)}): {', '.join(s['low']) or 'no head'}",
           f"  spread: {', '.join(s['spread']) or 'no head'}"]
    return out
