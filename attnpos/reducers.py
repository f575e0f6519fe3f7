"""Statistics kept during capture, one layer (and chunk of heads) at a time.

* :class:`WeightStats` — per head: mass on the previous / next / first token and on itself, entropy relative to
  the uniform spread over the allowed keys, mean weight per slot (for anchors), mean weight per distance.
* :class:`SplitStats` — per text and head, the sufficient statistics of the score split (see :mod:`attnpos.split`):
  row-centred score sums per distance and per key (slot and token), and the within-row sum of squares. With
  these, the least-squares split is solved exactly without ever holding the pairs.

Both are vectorised over heads and pairs; neither keeps a map.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import torch

from .capture import LayerCapture, Reducer
from .texts import TextUnit

EXACT = 16          # distances / slots below this are their own bucket
PER_OCTAVE = 4      # log-spaced buckets per doubling beyond EXACT
TOP_TOKENS = 48     # key tokens with their own content term; the rest share one
NEAR = 32           # weight-by-distance kept for |δ| ≤ NEAR


def bucket(x: np.ndarray) -> np.ndarray:
    """Bucket of a non-negative distance or slot: exact below EXACT, PER_OCTAVE log-spaced buckets per doubling."""
    x = np.asarray(x, dtype=np.int64)
    out = x.copy()
    big = x >= EXACT
    out[big] = EXACT + np.floor(PER_OCTAVE * np.log2(x[big] / EXACT) + 1e-9).astype(np.int64)
    return out


def _site_key(cap: LayerCapture) -> tuple[str, int]:
    return (cap.site.stack, cap.site.layer)


class _PerHead:
    """Accumulators indexed by site (stack, layer) → arrays over heads."""

    def __init__(self, subject):
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.index = {k: i for i, k in enumerate(self.keys)}
        self.n_heads = subject.n_heads


class WeightStats(Reducer):
    """Masses, entropy ratio, anchor slot and weight-by-distance per head (weights only)."""

    name = "weights"

    def begin(self, subject, units: Sequence[TextUnit]) -> None:
        self.ph = _PerHead(subject)
        S, H = len(self.ph.keys), self.ph.n_heads
        self.max_t = max(len(u) for u in units)
        z = lambda *shape: np.zeros(shape, dtype=np.float64)  # noqa: E731
        self.mass = {k: z(S, H) for k in ("previous", "next", "first", "self")}
        self.mass_n = {k: z(S) for k in ("previous", "next", "first", "self")}
        self.ent = z(S, H)
        self.ent_n = z(S)
        self.slot_w = z(S, H, self.max_t)
        self.slot_n = z(S, self.max_t)
        self.near_w = z(S, H, 2 * NEAR + 1)
        self.near_n = z(S, 2 * NEAR + 1)
        self._counted: set = set()

    def update(self, cap: LayerCapture) -> None:
        o = cap.offset
        w = cap.weights[:, o:, o:]
        A = cap.allowed[o:, o:]
        if o:  # renormalise over the text's own keys
            w = w / w.sum(-1, keepdim=True).clamp_min(1e-30)
        T = w.shape[-1]
        si = self.ph.index[_site_key(cap)]
        hs = slice(cap.head0, cap.head0 + cap.n_heads)
        ordinary = torch.from_numpy(~cap.unit.special[:T])
        first_chunk = (si, cap.text) not in self._counted
        if first_chunk:
            self._counted.add((si, cap.text))
        idx = torch.arange(T)
        # previous / next / self / first: gathers, averaged over ordinary queries that may see that key
        for name, d in (("previous", -1), ("next", 1), ("self", 0)):
            if abs(d) >= T:
                continue
            q = idx[max(0, -d): T - max(0, d)]
            ok = ordinary[q] & A[q, q + d]
            vals = torch.diagonal(w, offset=d, dim1=-2, dim2=-1)[:, ok]
            self.mass[name][si, hs] += vals.sum(-1).double().numpy()
            if first_chunk:
                self.mass_n[name][si] += int(ok.sum())
        okf = ordinary & A[:, 0]
        if T > 1:
            okf[0] = False  # the first token looking at itself is `self`, not `first`
        self.mass["first"][si, hs] += w[:, okf, 0].sum(-1).double().numpy()
        if first_chunk:
            self.mass_n["first"][si] += int(okf.sum())
        # entropy relative to log(number of allowed keys), queries with at least 4 keys
        n_allowed = A.sum(-1)
        qe = ordinary & (n_allowed >= 4)
        if qe.any():
            ent = torch.special.entr(w[:, qe]).sum(-1) / torch.log(n_allowed[qe].double()).float()
            self.ent[si, hs] += ent.sum(-1).double().numpy()
            if first_chunk:
                self.ent_n[si] += int(qe.sum())
        # weight per slot over queries at least two tokens away (so previous-token heads are not anchors)
        far = A & ((idx[:, None] - idx[None, :]).abs() >= 2) & ordinary[:, None]
        self.slot_w[si, hs, :T] += (w * far).sum(-2).double().numpy()
        if first_chunk:
            self.slot_n[si, :T] += far.sum(0).double().numpy()
        # mean weight by distance, |δ| ≤ NEAR
        for d in range(-NEAR, NEAR + 1):
            if abs(d) >= T:
                continue
            q = idx[max(0, d): T - max(0, -d)]
            ok = ordinary[q] & A[q, q - d]
            if not ok.any():
                continue
            vals = torch.diagonal(w, offset=-d, dim1=-2, dim2=-1)[:, ok]
            self.near_w[si, hs, d + NEAR] += vals.sum(-1).double().numpy()
            if first_chunk:
                self.near_n[si, d + NEAR] += int(ok.sum())

    def result(self) -> dict:
        div = lambda a, n: a / np.where(n > 0, n, np.nan)  # noqa: E731
        mass = {k: div(self.mass[k], self.mass_n[k][:, None]) for k in self.mass}
        slot_mean = div(self.slot_w, self.slot_n[:, None, :])
        # anchor: the slot with the highest mean weight among slots seen by at least 8 queries
        enough = self.slot_n >= 8
        masked = np.where(enough[:, None, :], slot_mean, -np.inf)
        anchor_slot = masked.argmax(-1).astype(float)
        anchor_weight = np.take_along_axis(masked, anchor_slot.astype(int)[..., None], -1)[..., 0]
        anchor_slot[~np.isfinite(anchor_weight)] = np.nan
        anchor_weight[~np.isfinite(anchor_weight)] = np.nan
        return {
            "keys": self.ph.keys, "mass": mass, "entropy_ratio": div(self.ent, self.ent_n[:, None]),
            "slot_mean": slot_mean, "slot_n": self.slot_n, "anchor_slot": anchor_slot,
            "anchor_weight": anchor_weight, "near_distance": np.arange(-NEAR, NEAR + 1),
            "near_mean": div(self.near_w, self.near_n[:, None, :]),
        }


# ------------------------------------------------------------------------------------------------ split stats

class Design:
    """The split's feature layout, fixed from the text units before the run (head-independent).

    Features of an allowed pair (i, j), δ = i − j:
      distance group: one-hot distance bucket (separate buckets for δ < 0) + the linear term δ;
      slot group: one-hot slot bucket of j;
      content group: one-hot key token (the TOP_TOKENS most frequent keys; the rest share one).
    """

    def __init__(self, units: Sequence[TextUnit]):
        max_t = max(len(u) for u in units)
        self.max_t = max_t
        d = np.arange(max_t)
        self.dist_b = bucket(d)                       # δ ≥ 0
        self.n_pos = int(self.dist_b.max()) + 1
        self.n_dist = 2 * self.n_pos                  # δ < 0 use n_pos + bucket(-δ)
        self.slot_b = bucket(d)
        self.n_slot = int(self.slot_b.max()) + 1
        counts: dict[int, int] = {}
        for u in units:
            for t in u.ids:
                counts[t] = counts.get(t, 0) + 1
        top = [t for t, _ in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))[:TOP_TOKENS]]
        self.top_tokens = top
        self.tok_index = {t: k for k, t in enumerate(top)}
        self.n_tok = len(top) + 1
        # column layout
        self.i_dist = np.arange(self.n_dist)
        self.i_lin = self.n_dist
        self.i_slot = self.n_dist + 1 + np.arange(self.n_slot)
        self.i_tok = self.n_dist + 1 + self.n_slot + np.arange(self.n_tok)
        self.p = self.n_dist + 1 + self.n_slot + self.n_tok

    def delta_features(self, T: int) -> np.ndarray:
        """(2T−1, n_dist+1): features of δ = −(T−1) … T−1 (row δ + T − 1)."""
        deltas = np.arange(-(T - 1), T)
        F = np.zeros((2 * T - 1, self.n_dist + 1))
        b = np.where(deltas >= 0, self.dist_b[np.abs(deltas)], self.n_pos + self.dist_b[np.abs(deltas)])
        F[np.arange(2 * T - 1), b] = 1.0
        F[:, self.n_dist] = deltas
        return F

    def key_features(self, unit: TextUnit, T: int) -> np.ndarray:
        """(T, n_slot+n_tok): features of key j."""
        F = np.zeros((T, self.n_slot + self.n_tok))
        F[np.arange(T), self.slot_b[:T]] = 1.0
        tk = np.array([self.tok_index.get(t, self.n_tok - 1) for t in unit.ids[:T]])
        F[np.arange(T), self.n_slot + tk] = 1.0
        return F

    def bucket_delta(self) -> np.ndarray:
        """Representative δ of each distance bucket (the pair-weighted mean is computed in the split)."""
        reps = np.full(self.n_dist, np.nan)
        d = np.arange(self.max_t)
        for b in range(self.n_pos):
            sel = d[self.dist_b == b]
            if len(sel):
                reps[b] = sel.mean()
                reps[self.n_pos + b] = -sel.mean()
        return reps


def _skew_sums(x: torch.Tensor) -> torch.Tensor:
    """Sums along every diagonal of (n, T, T): out[:, δ + T − 1] = Σ_i x[:, i, i − δ]."""
    n, T, _ = x.shape
    flipped = x.flip(-1)
    padded = torch.nn.functional.pad(flipped, (0, T))
    skew = padded.reshape(n, 2 * T * T)[:, : T * (2 * T - 1)].reshape(n, T, 2 * T - 1)
    return skew.sum(1)


def gram_for(design: Design, unit: TextUnit, allowed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Head-independent within-row Gram matrix X_wᵀX_w of one text, and the pair count per distance bucket."""
    A = allowed.astype(np.float64)
    T = A.shape[0]
    FD = design.delta_features(T)                 # (2T−1, pD)
    FJ = design.key_features(unit, T)             # (T, pJ)
    diag_n = _skew_sums(torch.from_numpy(A)[None])[0].numpy()   # pairs per δ
    col_n = A.sum(0)
    # skewed mask: M[δ, j] = A[j + δ, j]
    i = np.arange(T)
    Msk = np.zeros((2 * T - 1, T))
    for_j = np.arange(T)
    for dlt in range(-(T - 1), T):
        ii = for_j + dlt
        ok = (ii >= 0) & (ii < T)
        Msk[dlt + T - 1, ok] = A[ii[ok], for_j[ok]]
    G_DD = FD.T @ (diag_n[:, None] * FD)
    G_JJ = FJ.T @ (col_n[:, None] * FJ)
    G_DJ = FD.T @ Msk @ FJ
    # row term: per row, counts of each feature
    # row-skewed: R[i, δ + T − 1] = A[i, i − δ]
    R = np.zeros((T, 2 * T - 1))
    jj = i[:, None] - np.arange(-(T - 1), T)[None, :]
    ok = (jj >= 0) & (jj < T)
    R[ok] = A[np.broadcast_to(i[:, None], jj.shape)[ok], jj[ok]]
    C = np.concatenate([R @ FD, A @ FJ], axis=1)   # (T, p)
    n_i = A.sum(1)
    keep = n_i > 0
    C, n_i = C[keep], n_i[keep]
    G = np.block([[G_DD, G_DJ], [G_DJ.T, G_JJ]]) - C.T @ (C / n_i[:, None])
    return G, np.diag(G_DD)[: design.n_dist].copy()


class SplitStats(Reducer):
    """Per text, site and head: b = X_wᵀ s (row-centred score sums mapped to features) and the within-row SS."""

    name = "split"

    def __init__(self, heads_only: set | None = None):
        self.heads_only = heads_only

    def begin(self, subject, units: Sequence[TextUnit]) -> None:
        self.ph = _PerHead(subject)
        self.units = list(units)
        self.design = Design(units)
        S, H, n = len(self.ph.keys), self.ph.n_heads, len(units)
        p = self.design.p
        self.b = np.zeros((n, S, H, p))
        self.ssw = np.zeros((n, S, H))
        self.gram_key = np.zeros((n, S), dtype=np.int64)   # which Gram (mask pattern) each text/site used
        self.grams: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}
        self._fd: dict[int, torch.Tensor] = {}
        self._fj: dict[int, torch.Tensor] = {}

    def _features(self, cap: LayerCapture, T: int):
        fk = (cap.text, cap.site.stack)
        if fk not in self._fj:
            self._fj = {fk: torch.from_numpy(self.design.key_features(cap.unit, T)).float()}
        if T not in self._fd:
            self._fd = {T: torch.from_numpy(self.design.delta_features(T)).float()}
        return self._fd[T], self._fj[fk]

    def update(self, cap: LayerCapture) -> None:
        if cap.offset:
            raise ValueError("SplitStats runs on unshifted recordings only")
        s, A = cap.scores, cap.allowed
        T = s.shape[-1]
        si = self.ph.index[_site_key(cap)]
        hs = slice(cap.head0, cap.head0 + cap.n_heads)
        Af = A.to(s.dtype)
        n_i = Af.sum(-1).clamp_min(1.0)
        s0 = torch.where(A, s, torch.zeros((), dtype=s.dtype))
        rowmean = s0.sum(-1) / n_i
        sc = torch.where(A, s0 - rowmean[..., None], torch.zeros((), dtype=s.dtype))
        del s0
        ssw = (sc * sc).sum((-1, -2))
        col = sc.sum(-2)                         # (n, T)
        diag = _skew_sums(sc)                    # (n, 2T−1)
        del sc
        FD, FJ = self._features(cap, T)
        b = torch.cat([diag @ FD, col @ FJ], dim=-1)
        self.b[cap.text, si, hs] = b.double().numpy()
        self.ssw[cap.text, si, hs] = ssw.double().numpy()
        if cap.head0 == 0:
            # mask pattern → Gram (cached; all layers of a plain causal/encoder model share one per text)
            a = A.numpy()
            key = (cap.text, cap.site.stack, hash(np.packbits(a).tobytes()))
            if key not in self.grams:
                self.grams[key] = gram_for(self.design, cap.unit, a)
            gi = list(self.grams).index(key)
            self.gram_key[cap.text, si] = gi

    def result(self) -> dict:
        grams = list(self.grams.values())
        return {"keys": self.ph.keys, "design": self.design, "b": self.b, "ssw": self.ssw,
                "gram_key": self.gram_key, "grams": [g for g, _ in grams], "dist_counts": [n for _, n in grams]}

