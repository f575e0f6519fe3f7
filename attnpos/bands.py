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

How: a reducer (:class:`BandEnergy`) of an ordinary recording reads q and k *after* rotation as the capture
hands them over from inside the model's own attention call, so the model's own projections, norms and rotary
variant are used. The rotary layout (rotate-half or interleaved pairs) and each pair's frequency are read from the
cos/sin the model hands to the attention module.

Example::

    >>> import attnpos
    >>> out = rope_bands(attnpos.load("ref:rope"), ["The ferry left at nine and came back at noon.",
    ...                                             "Rye loaves come out of the oven first, then the buns."])
    >>> len(out.pairs), out.layout, round(sum(out.heads[0]["shares"]), 6)
    (16, 'half', 1.0)
"""

from __future__ import annotations

import math

import numpy as np
import torch

from .capture import LayerCapture, Reducer, record
from .errors import AttnposError
from .results.bands import CAUTION, BandsResult  # noqa: F401  (CAUTION is part of this stage's vocabulary)

#: share of a head's energy in the high (or low) band from which the head is said to rely on that band
BAND_MAJORITY = 0.5

NO_TABLES = ("The model did not pass cos/sin to its attention modules; the rotate-half layout over the whole head was "
             "assumed and frequencies are unknown.")


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


def pairs_of(layout: str, rd: int) -> list[tuple[int, int]]:
    """The dimension pairs a rotary layout rotates together (rotate-half: m and m + rd/2; interleaved: 2m, 2m+1)."""
    half = rd // 2
    return [(m, m + half) for m in range(half)] if layout == "half" else [(2 * m, 2 * m + 1) for m in range(half)]


class BandEnergy(Reducer):
    """Per RoPE head and rotary pair, the sum over allowed pairs (i, j) of (q_i^(m)·k_j^(m))², from the rotated
    queries and keys the capture hands over (:attr:`LayerCapture.query`, ``key``, ``rotary``)."""

    name = "bands"

    def begin(self, subject, units) -> None:
        self.rope = {(s.stack, s.layer) for s in subject.sites if s.scheme == "rope"}
        self.H = subject.n_heads
        self.energy: dict[tuple, np.ndarray] = {}
        self.count: dict[tuple, float] = {}
        self.layout: str | None = None
        self.theta: np.ndarray | None = None
        self.rotary_dims: int | None = None
        self.head_dim: int | None = None
        self.notes: list[str] = []
        self.max_t = 0

    def update(self, cap: LayerCapture) -> None:
        key_ = (cap.site.stack, cap.site.layer)
        if key_ not in self.rope or cap.query is None:
            return
        q, k = cap.query.float(), cap.key.float()
        n, T, d = q.shape
        if cap.rotary is not None:
            rd = cap.rotary[0].shape[-1]
            layout, theta = _layout(*cap.rotary)
        else:
            rd, layout, theta = d, "half", None
            if NO_TABLES not in self.notes:
                self.notes.append(NO_TABLES)
        if self.layout is None:
            self.layout, self.rotary_dims, self.head_dim, self.theta = layout, rd, d, theta
        elif self.theta is None and theta is not None:
            self.theta = theta
        pairs = pairs_of(layout, rd)
        P = len(pairs)
        A = cap.allowed.float()
        acc = self.energy.setdefault(key_, np.zeros((self.H, P + 1)))
        hs = slice(cap.head0, cap.head0 + n)
        for m, (a, b) in enumerate(pairs):
            c = q[:, :, a, None] * k[:, None, :, a] + q[:, :, b, None] * k[:, None, :, b]      # (n, T, T)
            acc[hs, m] += ((c * c) * A).sum((-1, -2)).double().numpy()
        if rd < d:
            c = q[:, :, rd:] @ k[:, :, rd:].transpose(-1, -2)
            acc[hs, P] += ((c * c) * A).sum((-1, -2)).double().numpy()
        if cap.head0 == 0:
            self.count[key_] = self.count.get(key_, 0.0) + float(A.sum())
        self.max_t = max(self.max_t, T)

    def result(self) -> "BandEnergy":
        return self


def rope_bands(subject, texts=None, *, units=None, max_tokens: int | None = None) -> BandsResult:
    """Per RoPE head, the share of q·k energy carried by each rotary frequency pair.

    Args:
        subject: a :class:`~attnpos.subject.Subject`, folder or ``"ref:<scheme>"``.
        texts: strings, Paths, RawTexts or None (bundled samples); or pass prepared ``units``.
        max_tokens: split texts into windows of at most this many tokens.
    Returns:
        a :class:`~attnpos.results.bands.BandsResult`.
    """
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
    run = record(subject, units=units, reducers=[BandEnergy()], progress=False).results["bands"]
    if not run.energy:
        raise AttnposError(f"No RoPE attention call of {subject.architecture} reached attnpos (the architecture does "
                           "not use transformers' attention-function registry), so the bands cannot be measured.")
    return _bands(subject, run, rope_sites, len(units))


def _bands(subject, run: BandEnergy, rope_sites, n_texts: int) -> BandsResult:
    P = len(pairs_of(run.layout, run.rotary_dims))
    theta = run.theta if run.theta is not None else np.full(P, np.nan)
    wavelength = np.where(theta > 0, 2 * math.pi / np.where(theta > 0, theta, 1.0), np.inf)
    order = np.argsort(-np.nan_to_num(theta, nan=0.0), kind="stable") if np.isfinite(theta).all() else np.arange(P)
    third = max(1, P // 3)
    high = set(order[:third].tolist())
    low = set(order[P - third:].tolist())
    pairs = []
    for m, (a, b) in enumerate(pairs_of(run.layout, run.rotary_dims)):
        pairs.append({"pair": m, "dims": [a, b], "theta": float(theta[m]), "wavelength": float(wavelength[m]),
                      "band": "high" if m in high else "low" if m in low else "middle"})
    beyond = np.array([w > run.max_t for w in wavelength])
    heads = []
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
            heads.append({"stack": s.stack, "layer": s.layer, "head": h, "shares": sh[:P].tolist(),
                          "unrotated_share": float(sh[P]) if run.rotary_dims < run.head_dim else None,
                          "high_share": hi, "low_share": lo, "beyond_context_share": float(sh[:P][beyond].sum()),
                          "dominant_pair": dom, "dominant_wavelength": float(wavelength[dom]) if dom is not None else None,
                          "band": band})
    definitions = {
        "energy": ("share of pair m = mean over allowed (i, j) of (q_i^(m)·k_j^(m))², rotated pieces, "
                   "over the sum across pairs (and unrotated dimensions)"),
        "bands": {"high": "fastest third of the pairs", "low": "slowest third of the pairs",
                  "rule": f"a head is high/low when at least {BAND_MAJORITY} of its energy is in that band"}}
    return BandsResult(heads=heads, pairs=pairs, layout=run.layout, rotary_dims=int(run.rotary_dims),
                       head_dim=int(run.head_dim), context=int(run.max_t), n_texts=n_texts, model=subject.describe(),
                       definitions=definitions, notes=list(run.notes))
