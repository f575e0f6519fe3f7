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

**Use, by intervention.** Energy measures magnitude, not use: a slow pair that adds nearly the same amount to every
key of a row carries energy and changes no weight (softmax ignores a row constant). So for every head and band the
reducer also removes that band's pairs from the scores — s'_ij = s_ij − α Σ_{m ∈ band} c_ij^(m), α the head's
score scale fitted on the allowed pairs (1/√d for the usual scaled dot product) — recomputes the weights and
records the mean total-variation distance ½·Σ_j |w'_ij − w_ij| over ordinary queries, and the change of the head's
role statistics (mass on the previous and on the first token). The band a head **uses** (``used_band``) is the one
whose removal changes its weights most, none when no removal reaches the shift test's SHIFT_RELATIVE (the same
total-variation scale) (Barbero et al. 2025 draw this distinction between what a frequency
carries and what the head relies on). This assumes scores = α·q·k + mask; soft-capped scores are not separable.

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
from .core import thresholds as th
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


BANDS = ("high", "middle", "low")


def band_of_pairs(theta: np.ndarray) -> list[str]:
    """The band of each pair: the fastest third ``high``, the slowest third ``low``, the rest ``middle`` (pairs in
    their own order when the frequencies are unknown)."""
    P = len(theta)
    order = np.argsort(-np.nan_to_num(theta, nan=0.0), kind="stable") if np.isfinite(theta).all() else np.arange(P)
    third = max(1, P // 3)
    high = set(order[:third].tolist())
    low = set(order[P - third:].tolist())
    return ["high" if m in high else "low" if m in low else "middle" for m in range(P)]


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
        # band removal: per site, (heads, bands) sums of the total-variation change and of the change of the mass on
        # the previous and on the first token, with their query counts
        self.removal: dict[tuple, np.ndarray] = {}
        self.removal_n: dict[tuple, np.ndarray] = {}

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
        member = band_of_pairs(theta if theta is not None else np.full(P, np.nan))
        energy, parts = self._pair_terms(q, k, pairs, member, A)
        acc[hs, :P] += energy
        self._remove(cap, key_, hs, q, k, parts, A)
        if rd < d:
            c = q[:, :, rd:] @ k[:, :, rd:].transpose(-1, -2)
            acc[hs, P] += ((c * c) * A).sum((-1, -2)).double().numpy()
        if cap.head0 == 0:
            self.count[key_] = self.count.get(key_, 0.0) + float(A.sum())
        self.max_t = max(self.max_t, T)

    @staticmethod
    def _pair_terms(q: torch.Tensor, k: torch.Tensor, pairs, member, A: torch.Tensor):
        """Per head and rotary pair m, Σ_ij A_ij (q_i^(m)·k_j^(m))² as an (n, P) float64 array, and per band the
        (n, T, T) sum over its pairs of q_i^(m)·k_j^(m).

        Σ_ij A_ij (q_ia k_ja + q_ib k_jb)² = Σ_i [q_ia² (A k_a²)_i + 2 q_ia q_ib (A k_a k_b)_i + q_ib² (A k_b²)_i]:
        one (T, T) @ (T, 3P) product per head instead of a (T, T) tensor per pair (in float64); a band's part is one
        product over its dimensions."""
        n, T, _ = q.shape
        P = len(pairs)
        ia = torch.tensor([a for a, _ in pairs])
        ib = torch.tensor([b for _, b in pairs])
        qa, qb, ka, kb = q[..., ia].double(), q[..., ib].double(), k[..., ia].double(), k[..., ib].double()
        ak = A.double() @ torch.cat([ka * ka, ka * kb, kb * kb], -1)                             # (n, T, 3P)
        energy = (qa * qa * ak[..., :P] + 2 * qa * qb * ak[..., P:2 * P] + qb * qb * ak[..., 2 * P:]).sum(1)
        parts = {}
        for band in BANDS:
            dims = [d_ for m, (a, b) in enumerate(pairs) if member[m] == band for d_ in (a, b)]
            parts[band] = (q[..., dims] @ k[..., dims].transpose(-1, -2) if dims else torch.zeros(n, T, T))
        return energy.numpy(), parts

    def _remove(self, cap: LayerCapture, key_, hs, q, k, parts: dict, A: torch.Tensor) -> None:
        """Remove each band's pairs from the scores and record how the weights change (see the module doc)."""
        n, T, _ = q.shape
        s0 = cap.zeroed_scores().float()
        w = cap.weights.float()
        g = (q @ k.transpose(-1, -2)) * A                                   # raw q·k on allowed pairs
        alpha = (s0 * g).sum((-1, -2)) / (g * g).sum((-1, -2)).clamp_min(1e-30)      # (n,)
        T_ = min(T, len(cap.unit.special))
        ordinary = torch.from_numpy(~np.asarray(cap.unit.special[:T_], dtype=bool))
        if T_ < T:
            ordinary = torch.cat([ordinary, torch.zeros(T - T_, dtype=torch.bool)])
        later = ordinary.clone()
        later[0] = False                                                    # queries with a previous token
        out = self.removal.setdefault(key_, np.zeros((self.H, len(BANDS), 3)))
        cnt = self.removal_n.setdefault(key_, np.zeros(2))
        idx = torch.arange(1, T)
        for bi, band in enumerate(BANDS):
            s2 = (s0 - alpha[:, None, None] * parts[band]).masked_fill(~cap.allowed, float("-inf"))
            w2 = torch.softmax(s2, -1)
            tv = 0.5 * (w2 - w).abs().sum(-1)                               # (n, T)
            out[hs, bi, 0] += tv[:, ordinary].sum(-1).double().numpy()
            dprev = (w2[:, idx, idx - 1] - w[:, idx, idx - 1])[:, later[1:]]
            dfirst = (w2[:, idx, 0] - w[:, idx, 0])[:, later[1:]]
            out[hs, bi, 1] += dprev.sum(-1).double().numpy()
            out[hs, bi, 2] += dfirst.sum(-1).double().numpy()
        if cap.head0 == 0:
            cnt += [float(ordinary.sum()), float(later.sum())]

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
    rope_sites_of(subject)
    if units is None:
        units = prepare(subject, as_raw(texts), max_tokens=max_tokens, warn=False)
    units = [u for u in units if len(u) >= 2]
    if not units:
        raise AttnposError("The bands need texts of at least two tokens.")
    run = record(subject, units=units, reducers=[BandEnergy()], progress=False).results["bands"]
    return bands_from(subject, run, len(units))


def rope_sites_of(subject) -> list:
    """The subject's RoPE attention sites; a clear error when it has none."""
    rope_sites = [s for s in subject.sites if s.scheme == "rope"]
    if not rope_sites:
        raise AttnposError(f"{subject.name} has no RoPE layers (schemes: {', '.join(sorted(set(subject.schemes)))}); "
                           "frequency bands only exist for rotary position embeddings.")
    return rope_sites


def bands_from(subject, run: BandEnergy, n_texts: int) -> BandsResult:
    """The bands result of a :class:`BandEnergy` reducer that a recording of ``n_texts`` texts (each of two
    tokens or more) has filled — for a stage that records those texts anyway and adds the reducer to its own
    recording (the probe) instead of calling :func:`rope_bands`."""
    if not run.energy:
        raise AttnposError(f"No RoPE attention call of {subject.architecture} reached attnpos (the architecture does "
                           "not use transformers' attention-function registry), so the bands cannot be measured.")
    return _bands(subject, run, rope_sites_of(subject), n_texts)


def _bands(subject, run: BandEnergy, rope_sites, n_texts: int) -> BandsResult:
    P = len(pairs_of(run.layout, run.rotary_dims))
    theta = run.theta if run.theta is not None else np.full(P, np.nan)
    wavelength = np.where(theta > 0, 2 * math.pi / np.where(theta > 0, theta, 1.0), np.inf)
    member = band_of_pairs(theta)
    high = {m for m, b in enumerate(member) if b == "high"}
    low = {m for m, b in enumerate(member) if b == "low"}
    pairs = []
    for m, (a, b) in enumerate(pairs_of(run.layout, run.rotary_dims)):
        pairs.append({"pair": m, "dims": [a, b], "theta": float(theta[m]), "wavelength": float(wavelength[m]),
                      "band": member[m]})
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
            removal, used = {}, None
            if key in run.removal:
                nq, nl = run.removal_n[key]
                r = run.removal[key][h]
                removal = {b: {"tv": float(r[bi, 0] / max(nq, 1)), "previous": float(r[bi, 1] / max(nl, 1)),
                               "first": float(r[bi, 2] / max(nl, 1))}
                           for bi, b in enumerate(BANDS) if any(m == b for m in member)}
                if removal:
                    used = max(removal, key=lambda b: removal[b]["tv"])
                    if removal[used]["tv"] < th.SHIFT_RELATIVE:     # no band's removal moves the weights
                        used = None
            heads.append({"stack": s.stack, "layer": s.layer, "head": h, "shares": sh[:P].tolist(),
                          "unrotated_share": float(sh[P]) if run.rotary_dims < run.head_dim else None,
                          "high_share": hi, "low_share": lo, "beyond_context_share": float(sh[:P][beyond].sum()),
                          "dominant_pair": dom, "dominant_wavelength": float(wavelength[dom]) if dom is not None else None,
                          "band": band, "removal": removal, "used_band": used})
    definitions = {
        "energy": ("share of pair m = mean over allowed (i, j) of (q_i^(m)·k_j^(m))², rotated pieces, "
                   "over the sum across pairs (and unrotated dimensions)"),
        "bands": {"high": "fastest third of the pairs", "low": "slowest third of the pairs",
                  "rule": f"a head is high/low when at least {BAND_MAJORITY} of its energy is in that band"},
        "removal": ("per band: the band's pairs removed from the scores (s − α·Σ c^(m)), weights recomputed; tv = mean "
                    "total-variation change over ordinary queries, previous / first = change of the mean weight on "
                    "the previous / first token; used_band = the band whose removal changes the weights most")}
    return BandsResult(heads=heads, pairs=pairs, layout=run.layout, rotary_dims=int(run.rotary_dims),
                       head_dim=int(run.head_dim), context=int(run.max_t), n_texts=n_texts, model=subject.describe(),
                       definitions=definitions, notes=list(run.notes))
