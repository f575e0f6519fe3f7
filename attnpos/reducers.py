"""Statistics kept during capture, one layer (and chunk of heads) at a time.

* :class:`WeightStats` — per head: mass on the previous / next / first token and on itself, entropy relative to
  the uniform spread over the allowed keys, mean weight per slot (for anchors), mean weight per distance.
* :class:`SplitStats` — per text and head, the sufficient statistics of the score split (see :mod:`attnpos.split`):
  row-centred score sums per distance and per key (slot and token), and the within-row sum of squares. With
  these, the least-squares split is solved exactly without ever holding the pairs. For the position-pair part it
  also keeps each text's row-centred scores on the first :data:`PAIR_MAX` × :data:`PAIR_MAX` (query, key)
  positions, from which the split forms the per-(i, j) products across texts.

Both are vectorised over heads and pairs; neither keeps a map. "Per text" means per resampling unit: past
:data:`BOOT_UNITS` windows, a block of consecutive windows whose sums are added up (:func:`windows_per_unit`), so
what they keep does not grow with the input.
"""

from __future__ import annotations

import contextlib
import functools
from typing import Sequence

import numpy as np
import torch

from .capture import LayerCapture, Reducer
from .core.thresholds import ANCHOR_MIN_DISTANCE
from .texts import TextUnit

EXACT = 16          # distances / slots below this are their own bucket
PER_OCTAVE = 4      # log-spaced buckets per doubling beyond EXACT
TOP_TOKENS = 48     # key tokens with their own content term; the rest share one
NEAR = 32           # weight-by-distance kept for |δ| ≤ NEAR
# the position-pair part is estimated on queries and keys at positions below PAIR_MAX: each text keeps its
# row-centred scores there (PAIR_MAX² floats per head and text — 4 kB; 32 keeps a scan of 270 heads on 64 texts
# under 300 MB), and the first positions are where texts overlap most (every text has them)
PAIR_MAX = 32
# the bootstrap resamples at most this many units: with more windows than this, consecutive windows are summed into
# blocks (``windows_per_unit``) and the blocks are resampled — a block bootstrap, legitimate for the consecutive
# windows of one long text — so the statistics kept per unit, and the memory of a scan, stay the same whatever the
# length of the input. With at most this many windows every window is its own unit (nothing is summed).
BOOT_UNITS = 64


def windows_per_unit(n_windows: int, max_units: int = BOOT_UNITS) -> tuple[int, int]:
    """(windows summed into one resampling unit, number of units) for ``n_windows`` consecutive windows: window t
    goes to unit t // m. One window per unit up to ``max_units`` windows; beyond, the fewest windows per unit that
    keep the units at most ``max_units``.

    >>> windows_per_unit(40), windows_per_unit(64), windows_per_unit(65), windows_per_unit(1000)
    ((1, 40), (1, 64), (2, 33), (16, 63))
    """
    if max_units < 1:
        raise ValueError("max_units must be at least 1")
    if n_windows <= max_units:
        return 1, n_windows
    m = -(-n_windows // max_units)
    return m, -(-n_windows // m)


def blas_one_thread():
    """Run numpy's BLAS/LAPACK on one thread (torch's own threads are not affected). The Gram matrices and the
    split are many small products and (≈ 200 × 200) eigen-decompositions, where a second BLAS thread gains nothing
    and, on a busy machine or beside torch's threads, spin-waiting makes each one up to 100× slower (measured:
    640 ms against 6 ms for one p = 182 eigen-decomposition on 2 shared cores)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn, a dependency
        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


def bucket(x: np.ndarray) -> np.ndarray:
    """Bucket of a non-negative distance or slot: exact below EXACT, PER_OCTAVE log-spaced buckets per doubling."""
    x = np.asarray(x, dtype=np.int64)
    out = x.copy()
    big = x >= EXACT
    out[big] = EXACT + np.floor(PER_OCTAVE * np.log2(x[big] / EXACT) + 1e-9).astype(np.int64)
    return out


def _site_key(cap: LayerCapture) -> tuple[str, int]:
    return (cap.site.stack, cap.site.layer)


@functools.lru_cache(maxsize=8)
def _band_index(T: int, N: int) -> tuple[torch.Tensor, torch.Tensor]:
    i = torch.arange(T)[:, None]
    j = i - torch.arange(-N, N + 1)[None, :]
    ok = (j >= 0) & (j < T)
    return (i * T + j.clamp(0, T - 1)).reshape(-1), ok.to(torch.float32)


def band(x: torch.Tensor, N: int) -> torch.Tensor:
    """The diagonals |δ| ≤ N of a float (n, T, T) tensor as (n, T, 2N+1): ``out[:, i, N + d] = x[:, i, i − d]``,
    zero where key i − d is outside the text. One gather of (2N+1)·T elements per head."""
    n, T, _ = x.shape
    idx, ok = _band_index(T, N)
    return x.reshape(n, T * T).index_select(1, idx).view(n, T, 2 * N + 1) * ok.to(x.dtype)


def _far_column_sums(x: torch.Tensor, ordf: torch.Tensor, nb: torch.Tensor, blocks=None) -> torch.Tensor:
    """Σ over ordinary queries i with |i − j| ≥ ANCHOR_MIN_DISTANCE of x[:, i, j], per key j: all ordinary rows
    (a matrix-vector product per row block, see :meth:`LayerCapture.blocks`) minus the diagonals
    |δ| < ANCHOR_MIN_DISTANCE, read from the band ``nb`` (``band(x, NEAR)``). Near queries are left out so that a
    head that looks a few tokens back is not mistaken for one that looks at a fixed slot."""
    T = x.shape[-1]
    col = x.new_zeros(x.shape[0], T)               # (n, T)
    for r0, r1, k1 in blocks or ((0, T, T),):
        col[:, :k1] += torch.matmul(ordf[r0:r1], x[:, r0:r1, :k1])
    b = nb * ordf[None, :, None]
    for d in range(-(ANCHOR_MIN_DISTANCE - 1), ANCHOR_MIN_DISTANCE):
        if abs(d) >= T:
            continue
        if d >= 0:                                 # key j = i − d for queries i = d … T−1
            col[:, :T - d] -= b[:, d:, NEAR + d]
        else:                                      # key j = i + |d| for queries i = 0 … T−1−|d|
            col[:, -d:] -= b[:, :T + d, NEAR + d]
    return col


# a weight at least this large gives the row's log-normaliser to float32 precision (softmax weights carry a
# relative error of a few ulp wherever they are normal floats)
_NORMAL_WEIGHT = 1e-30


def row_entropy(w: torch.Tensor, s0: torch.Tensor, near: torch.Tensor | None = None, blocks=None) -> torch.Tensor:
    """Entropy −Σ_j w_ij log w_ij of every row of (n, T, T) weights (0·log 0 = 0), as (n, T), given the scores
    ``s0`` (0 on disallowed pairs) that the weights are a softmax of.

    On its allowed keys a row has log w_ij = s_ij − L_i, with L_i the row's log-normaliser, so
    H_i = L_i·Σ_j w_ij − Σ_j w_ij s_ij: a sum and a batched dot product per row instead of a logarithm per pair (the
    logarithms cost more than the rest of the weight statistics together). L_i = s_ij − log w_ij at any key whose
    weight is a normal float; we take the largest weight within |δ| ≤ NEAR (``near``: :func:`band` of w, already at
    hand) and search the whole row only where that is too small. The error is that of float32 sums of w·s: about
    1e-7 × the row's largest |score| × a small factor (measured: 1e-4 with scores near 150; the per-pair logarithm
    gives 1e-6) — far below anything the roles read from entropy. ``blocks``: row blocks beyond which w is 0
    (:meth:`LayerCapture.blocks`); the sums read only inside them.
    """
    n, T, _ = w.shape
    if near is not None:
        top, k = near.max(-1)                      # (n, T): best key i − (k − N) within the band
        j = torch.arange(T)[None, :] - (k - (near.shape[-1] // 2))
        far = top < _NORMAL_WEIGHT
        if bool(far.any()):
            h, i = far.nonzero(as_tuple=True)
            top_far, j_far = w[h, i].max(-1)
            top[h, i], j[h, i] = top_far, j_far
    else:
        top, j = w.max(-1)
    L = s0.gather(-1, j.clamp(0, T - 1)[..., None])[..., 0].double() - torch.log(top.double())
    whole = blocks is None or tuple(blocks) == ((0, T, T),)
    if whole and w.is_contiguous() and s0.is_contiguous():      # one batched dot product per row (fastest)
        dot = torch.bmm(w.view(n * T, 1, T), s0.view(n * T, T, 1)).view(n, T)
        mass = w.sum(-1)
    else:
        dot, mass = w.new_empty(n, T), w.new_empty(n, T)
        for r0, r1, k1 in blocks or ((0, T, T),):
            wb = w[:, r0:r1, :k1]
            dot[:, r0:r1] = torch.linalg.vecdot(wb, s0[:, r0:r1, :k1])
            mass[:, r0:r1] = wb.sum(-1)
    return (L * mass.double() - dot.double()).float()


def _skew_accumulate(v: torch.Tensor, a: int, T: int, out: torch.Tensor, lower: bool) -> None:
    """Add to ``out`` (n, 2T) the diagonal sums held by skew rows a … a + rows − 1 (``v``: (n, rows, T + 1)).

    Skew row i is a T × T matrix's elements (i, i), (i, i + 1), …, (i, T − 1), (i + 1, 0), …, (i + 1, i): in a
    contiguous matrix, rows of T + 1 elements starting at (i, i). Column k holds diagonal δ = −k in rows i < T − k
    and δ = T + 1 − k in the rows below (``out[:, δ + T − 1]``; the spare last entry takes δ = T, always 0).
    ``lower=True``: the matrix is zero above its diagonal, so each column holds one diagonal and the rows read
    only the columns that reach below it.
    """
    r1 = a + v.shape[1]
    if lower:
        # column 0: δ = 0; column k ≥ 2: δ = T + 1 − k, from matrix row i + 1 at key i + k − T, which is inside
        # the matrix (and may be non-zero) only for k ≥ T − i: rows i < r1 need columns k ≥ T + 1 − r1 alone
        k0 = max(2, T + 1 - r1)
        out[:, T - 1] += v[:, :, 0].sum(1)
        out[:, T:2 * T - k0 + 1] += v[:, :, k0:].sum(1).flip(-1)
        return
    # columns k ≤ T − r1: every row is above the boundary → δ = −k (out index T − 1 − k)
    out[:, r1 - 1:T] += v[:, :, :T - r1 + 1].sum(1).flip(-1)
    # columns k ≥ T − a: every row is below → δ = T + 1 − k (out index 2T − k)
    out[:, T:T + a + 1] += v[:, :, T - a:].sum(1).flip(-1)
    # columns in between: split row by row
    k = torch.arange(T - r1 + 1, T - a)
    if len(k):
        part = v[:, :, T - r1 + 1:T - a]
        above = (torch.arange(a, r1)[:, None] < (T - k)[None, :]).to(v.dtype)
        up = (part * above).sum(1)
        out[:, T - 1 - k] += up
        out[:, 2 * T - k] += part.sum(1) - up


def diagonal_sums(x: torch.Tensor, lower: bool = False) -> torch.Tensor:
    """Sums along every diagonal of (n, T, T): ``out[:, δ + T − 1] = Σ_i x[:, i, i − δ]``, in one read of x.

    Laid out in rows of T + 1 elements, the first T² − 1 elements of a T × T matrix are its skew rows 0 … T − 2
    (a strided view, no copy; see :func:`_skew_accumulate`); the last element (δ = 0) is added on its own.
    ``lower=True`` says x is zero above the main diagonal (causal).
    """
    n, T, _ = x.shape
    x = x.contiguous()
    out = x.new_zeros(n, 2 * T)
    out[:, T - 1] = x[:, T - 1, T - 1]
    if T > 1:
        v = x.as_strided((n, T - 1, T + 1), (T * T, T + 1, 1), x.storage_offset())
        step = 256 if lower else 512
        for a in range(0, T - 1, step):
            _skew_accumulate(v[:, a:a + step], a, T, out, lower)
    return out[:, :2 * T - 1]


# the fast path of centred_sums holds while Σ n·m² (row means) ≤ this × Σ (s − m)² (spread) for every head: float32
# sums of the raw scores then lose at most about this factor × float32's 6e-8 (≲ 1e-5) to the row constants
ROW_CONSTANT_RATIO = 64.0


def centred_sums(s0: torch.Tensor, allowed: torch.Tensor, kind: str, n_i: torch.Tensor, rows_c: torch.Tensor,
                 scratch: torch.Tensor | None = None, blocks=None):
    """Sums of the row-centred scores over the allowed pairs, per head.

    With m_i the mean of row i over its allowed keys and c_ij = s_ij − m_i on allowed pairs (0 elsewhere), returns
    float64 ``(ssw, (diag, col), correction)``: ``ssw`` (n,) = Σ c², and the split's feature sums Σ_ij c_ij x_ij =
    [diag @ FD, col @ FJ] − correction, from ``diag`` (n, 2T − 1) and ``col`` (n, T), the diagonal and column sums,
    and ``correction`` (n, p) (None when the sums are already centred). ``kind`` is the mask's layout
    (``"causal"``, ``"none"`` disallowed, or ``"general"``), ``n_i`` (T,) its allowed keys per row (float64).

    Fast path (row means small against the spread, the usual case): sums of the zeroed scores ``s0`` themselves,
    one read each, centred afterwards in float64 — Σ c² = Σ s² − n·m² per row, and the per-row feature counts
    ``rows_c`` (T, p) turn raw feature sums into centred ones (Xᵀc = Xᵀs − Cᵀm). Where a head's row constants
    are large (ALiBi's −m·i, log-weights, an offset key bias), float32 sums of raw scores would lose the spread, so
    the scores are centred first into ``scratch`` and summed from there. ``blocks``: row blocks beyond which s0 is
    0 (:meth:`LayerCapture.blocks`); the row and column sums read only inside them.
    """
    lower = kind == "causal"
    n, T, _ = s0.shape
    rows, sq, col = s0.new_empty(n, T), s0.new_empty(n, T), s0.new_zeros(n, T)
    for r0, r1, k1 in blocks or ((0, T, T),):
        sb = s0[:, r0:r1, :k1]
        rows[:, r0:r1] = sb.sum(-1)
        sq[:, r0:r1] = torch.linalg.vector_norm(sb, dim=-1)
        col[:, :k1] += sb.sum(-2)
    rows = rows.double()
    m = rows / n_i.clamp_min(1.0)
    ssw = (sq.double() ** 2 - rows * m).sum(-1)
    if bool(((rows * m).sum(-1) <= ROW_CONSTANT_RATIO * ssw).all()):
        diag = diagonal_sums(s0, lower).double()
        return ssw, (diag, col.double()), m @ rows_c
    c = torch.sub(s0, m.float()[..., None], out=scratch)
    if lower:
        c.tril_()
    elif kind == "general":
        c.masked_fill_(~allowed, 0.0)
    ssw = torch.linalg.vector_norm(c, dim=(-2, -1)).double() ** 2
    return ssw, (diagonal_sums(c, lower).double(), c.sum(-2).double()), None


class _PerHead:
    """Accumulators indexed by site (stack, layer) → arrays over heads."""

    def __init__(self, subject):
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.index = {k: i for i, k in enumerate(self.keys)}
        self.n_heads = subject.n_heads


class WeightStats(Reducer):
    """Masses, entropy ratio, anchor slot and weight-by-distance per head (weights only)."""

    name = "weights"
    any_order = True

    def __init__(self, max_units: int = BOOT_UNITS):
        self.max_units = max_units

    def begin(self, subject, units: Sequence[TextUnit]) -> None:
        self.ph = _PerHead(subject)
        S, H = len(self.ph.keys), self.ph.n_heads
        # masses, entropy and slot weights are kept per resampling unit (first axis: a text, or a block of
        # consecutive windows past BOOT_UNITS, see windows_per_unit), so the roles can be resampled like the split
        self.per_unit, n = windows_per_unit(len(units), self.max_units)
        self.max_t = max(len(u) for u in units)
        z = lambda *shape: np.zeros(shape, dtype=np.float64)  # noqa: E731
        self.mass = {k: z(n, S, H) for k in ("previous", "next", "first", "self")}
        self.mass_n = {k: z(n, S) for k in ("previous", "next", "first", "self")}
        self.ent = z(n, S, H)
        self.ent_n = z(n, S)
        slot_dtype = np.float32 if self.per_unit == 1 else np.float64    # a block's sums: float64
        self.slot_w = np.zeros((n, S, H, self.max_t), dtype=slot_dtype)
        self.slot_n = np.zeros((n, S, self.max_t), dtype=slot_dtype)
        self.near_w = z(S, H, 2 * NEAR + 1)
        self.near_n = z(S, 2 * NEAR + 1)
        self._masks: dict = {}
        self._mask = None

    def update(self, cap: LayerCapture) -> None:
        o = cap.offset
        w, A, s0 = cap.weights, cap.allowed, cap.zeroed_scores()
        blocks = cap.blocks()
        if o:  # renormalise over the text's own keys
            w = w[:, o:, o:]
            w = w / w.sum(-1, keepdim=True).clamp_min(1e-30)
            A, s0 = A[o:, o:], s0[:, o:, o:]
            blocks = None
        T = w.shape[-1]
        si = self.ph.index[_site_key(cap)]
        hs = slice(cap.head0, cap.head0 + cap.n_heads)
        ordf, n_allowed, qe, okf = self._queries(cap, A)
        if cap.head0 == 0:                         # head-independent counts, once per layer and text (the
            self._add_counts(si, cap.text // self.per_unit, A, ordf, qe, okf)   # first chunk of heads; any order)
        # mean weight by distance, |δ| ≤ NEAR, over ordinary queries (weights are 0 on disallowed pairs); the
        # previous / next / self masses are its δ = 1, −1, 0 entries
        nb = band(w, NEAR)                          # (n, T, 2·NEAR+1)
        near = torch.matmul(ordf, nb).double().numpy()
        self.near_w[si, hs] += near
        t = cap.text // self.per_unit              # the text's resampling unit (itself up to BOOT_UNITS texts)
        for name, d in (("previous", 1), ("next", -1), ("self", 0)):
            self.mass[name][t, si, hs] += near[:, NEAR + d]
        self.mass["first"][t, si, hs] += w[:, okf, 0].sum(-1).double().numpy()
        # entropy relative to log(number of allowed keys)
        if qe.any():
            ent = row_entropy(w, s0, nb, blocks)[:, qe] / torch.log(n_allowed[qe].double()).float()
            self.ent[t, si, hs] += ent.sum(-1).double().numpy()
        # weight per slot over queries at least ANCHOR_MIN_DISTANCE tokens away (local heads are not anchors)
        self.slot_w[t, si, hs, :T] += _far_column_sums(w, ordf, nb, blocks).numpy()

    def _queries(self, cap: LayerCapture, A: torch.Tensor) -> tuple:
        """Which queries enter each statistic: ordinary ones (as 0/1 floats), the allowed keys per query, entropy
        queries (≥ 4 keys), first-token queries. Kept while the capture hands over the same mask tensor (every
        chunk and layer of a text); the reference held keeps the identity test sound."""
        key = (cap.text, cap.site.stack, cap.offset)
        hit = self._masks.get(key)
        if hit is None or hit[0] is not cap.allowed:
            if len(self._masks) >= 64:
                self._masks.clear()
            T = A.shape[-1]
            ordinary = torch.from_numpy(~np.asarray(cap.unit.special[:T], dtype=bool))
            n_allowed = A.sum(-1)
            qe = ordinary & (n_allowed >= 4)       # entropy: queries with at least 4 keys
            okf = ordinary & A[:, 0]               # first: ordinary queries that see slot 0 …
            if T > 1:
                okf[0] = False                     # … except the first token looking at itself (that is `self`)
            hit = self._masks[key] = [cap.allowed, key, (ordinary.to(torch.float32), n_allowed, qe, okf), None]
        self._mask = hit
        return hit[2]

    def _add_counts(self, si: int, t: int, A: torch.Tensor, ordf: torch.Tensor, qe: torch.Tensor,
                    okf: torch.Tensor) -> None:
        """Add the counts of this layer and text (:meth:`_count`); every layer handed the same mask tensor shares
        them, so they are computed once per mask."""
        hit = self._mask                           # the entry _queries just returned
        if hit[3] is None:
            hit[3] = self._count(A, ordf, qe, okf)
        near_n, first_n, ent_n, slot_n = hit[3]
        T = A.shape[-1]
        self.near_n[si] += near_n
        for name, d in (("previous", 1), ("next", -1), ("self", 0)):
            self.mass_n[name][t, si] += near_n[NEAR + d]
        self.mass_n["first"][t, si] += first_n
        self.ent_n[t, si] += ent_n
        self.slot_n[t, si, :T] += slot_n

    @staticmethod
    def _count(A: torch.Tensor, ordf: torch.Tensor, qe: torch.Tensor, okf: torch.Tensor) -> tuple:
        """How many (ordinary query, allowed key) pairs enter each mean: the same sums as above, over the mask."""
        Af = A.to(ordf.dtype)[None]
        nb = band(Af, NEAR)
        near_n = torch.matmul(ordf, nb)[0].double().numpy()
        return near_n, int(okf.sum()), int(qe.sum()), _far_column_sums(Af, ordf, nb)[0].numpy()

    def result(self) -> dict:
        self._masks.clear()
        self._mask = None
        per_text = {"mass": self.mass, "mass_n": self.mass_n, "entropy": self.ent, "entropy_n": self.ent_n,
                    "slot_w": self.slot_w, "slot_n": self.slot_n}
        out = weight_summary(per_text, np.ones(len(self.ent)))
        out.update({"keys": self.ph.keys, "near_distance": np.arange(-NEAR, NEAR + 1),
                    "near_mean": self.near_w / np.where(self.near_n > 0, self.near_n, np.nan)[:, None, :],
                    "per_text": per_text})
        return out


def weight_summary(per_text: dict, w: np.ndarray) -> dict:
    """The weight statistics of :class:`WeightStats` from its per-text sums, with text weights ``w`` (ones: the
    plain means; a bootstrap resample's counts: that resample's). Returns ``mass`` (by name, (S, H)),
    ``entropy_ratio``, ``slot_mean``, ``slot_n``, ``anchor_slot`` and ``anchor_weight``. A stack of weightings
    ``w`` (B, n_texts) gives each statistic with a leading axis of B (one product for all of them)."""
    div = lambda a, n: a / np.where(n > 0, n, np.nan)  # noqa: E731
    tw = lambda a: np.tensordot(w, a, axes=(-1, 0))     # noqa: E731
    mass = {k: div(tw(per_text["mass"][k]), tw(per_text["mass_n"][k])[..., None]) for k in per_text["mass"]}
    slot_n = tw(per_text["slot_n"].astype(np.float64))
    slot_mean = div(tw(per_text["slot_w"].astype(np.float64)), slot_n[..., None, :])
    # anchor: the slot with the highest mean weight among slots seen by at least 8 queries
    enough = slot_n >= 8
    masked = np.where(enough[..., None, :], slot_mean, -np.inf)
    anchor_slot = masked.argmax(-1).astype(float)
    anchor_weight = np.take_along_axis(masked, anchor_slot.astype(int)[..., None], -1)[..., 0]
    anchor_slot[~np.isfinite(anchor_weight)] = np.nan
    anchor_weight[~np.isfinite(anchor_weight)] = np.nan
    return {"mass": mass, "entropy_ratio": div(tw(per_text["entropy"]), tw(per_text["entropy_n"])[..., None]),
            "slot_mean": slot_mean, "slot_n": slot_n, "anchor_slot": anchor_slot, "anchor_weight": anchor_weight}


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


def _ranges(buckets: np.ndarray) -> list[tuple[int, int, int]]:
    """(bucket, first, last) for a non-decreasing bucket array over 0, 1, 2, …: each bucket is one run."""
    starts = np.flatnonzero(np.r_[True, buckets[1:] != buckets[:-1]])
    ends = np.r_[starts[1:] - 1, len(buckets) - 1]
    return [(int(buckets[a]), int(a), int(e)) for a, e in zip(starts, ends)]


def _count_between(prefix: np.ndarray, lo: np.ndarray, hi: np.ndarray, axis: int) -> np.ndarray:
    """Allowed pairs with index in [lo, hi] along ``axis`` (per row or column), from a prefix count with a leading
    zero (``prefix[…, k]`` = allowed among indices < k). Empty ranges count 0."""
    n = prefix.shape[axis] - 1
    a = np.clip(lo, 0, n)
    b = np.clip(hi + 1, 0, n)
    other = np.arange(len(lo))
    if axis == 1:
        c = prefix[other, b] - prefix[other, a]
    else:
        c = prefix[b, other] - prefix[a, other]
    return np.where(b > a, c, 0).astype(np.float64)


def gram_for(design: Design, unit: TextUnit, allowed: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Head-independent quantities of one text (mask pattern): the within-row Gram matrix X_wᵀX_w, the pair count
    per distance bucket, and the per-row feature counts C (T, p) (row i: Σ_j A_ij x_ij); X_wᵀX_w = XᵀX − Σ_i
    C_iᵀC_i / n_i.

    Every count is a difference of two prefix counts of the mask (the buckets are runs of consecutive distances or
    slots), so nothing larger than the (T, T) mask's prefix counts is built.
    """
    with blas_one_thread():
        return _gram_for(design, unit, allowed)


def _gram_for(design: Design, unit: TextUnit, allowed: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    A = np.asarray(allowed, dtype=bool)
    T = A.shape[0]
    idx = np.arange(T)
    row_pre = np.zeros((T, T + 1), dtype=np.int32)     # row_pre[i, k]: allowed keys j < k of query i
    np.cumsum(A, axis=1, dtype=np.int32, out=row_pre[:, 1:])
    col_pre = np.zeros((T + 1, T), dtype=np.int32)     # col_pre[k, j]: allowed queries i < k of key j
    for i in range(T):                                 # row by row: much faster than numpy's axis-0 cumsum
        np.add(col_pre[i], A[i], out=col_pre[i + 1])
    n_i = row_pre[:, T].astype(np.float64)
    col_n = col_pre[T].astype(np.float64)
    pD = design.n_dist + 1
    row_d = np.zeros((T, pD))                          # Σ_j A_ij φ(i − j): distance features per query
    col_d = np.zeros((T, pD))                          # Σ_i A_ij φ(i − j): distance features per key
    for b, lo, hi in _ranges(design.dist_b[:T]):
        # δ in [lo, hi] → keys j in [i − hi, i − lo] of query i, queries i in [j + lo, j + hi] of key j
        row_d[:, b] += _count_between(row_pre, idx - hi, idx - lo, axis=1)
        col_d[:, b] += _count_between(col_pre, idx + lo, idx + hi, axis=0)
        lo_n = max(lo, 1)                              # δ < 0 (encoders): buckets n_pos + bucket(|δ|)
        if lo_n <= hi:
            row_d[:, design.n_pos + b] += _count_between(row_pre, idx + lo_n, idx + hi, axis=1)
            col_d[:, design.n_pos + b] += _count_between(col_pre, idx - hi, idx - lo_n, axis=0)
    # Σ_j A_ij j = Σ_k #{allowed j > k} = T·n_i − Σ_k row_pre[i, k + 1] (exact in integers); same for columns
    key_sum = T * n_i - row_pre[:, 1:].sum(1, dtype=np.int64)
    query_sum = T * col_n - col_pre[1:].sum(0, dtype=np.int64)
    row_d[:, design.n_dist] = idx * n_i - key_sum      # Σ_j A_ij (i − j)
    col_d[:, design.n_dist] = query_sum - idx * col_n  # Σ_i A_ij (i − j)
    FJ = design.key_features(unit, T)                  # (T, pJ) one-hot slot bucket + key token
    causal = bool(np.array_equal(n_i, idx + 1.0)) and not np.triu(A, 1).any()   # exactly lower-triangular
    if causal:                                         # Σ_j A_ij FJ[j] = Σ_{j ≤ i} FJ[j]
        row_j = np.cumsum(FJ, axis=0)
    else:                                              # counts: exact in float32
        row_j = (torch.from_numpy(A).to(torch.float32) @ torch.from_numpy(FJ).to(torch.float32)).double().numpy()
    # pairs per δ, then the distance block of the Gram matrix
    FD = design.delta_features(T)                      # (2T − 1, pD)
    diag_n = diagonal_sums(torch.from_numpy(A).to(torch.float32)[None], lower=causal)[0].double().numpy()
    G_DD = FD.T @ (diag_n[:, None] * FD)
    G_JJ = FJ.T @ (col_n[:, None] * FJ)
    G_DJ = col_d.T @ FJ
    C = np.concatenate([row_d, row_j], axis=1)         # (T, p)
    keep = n_i > 0
    Ck = C[keep]
    G = np.block([[G_DD, G_DJ], [G_DJ.T, G_JJ]]) - Ck.T @ (Ck / n_i[keep][:, None])
    return G, np.diag(G_DD)[: design.n_dist].copy(), C


class SplitStats(Reducer):
    """Per text, site and head: b = X_wᵀ s (row-centred score sums mapped to features), the within-row SS, and the
    row-centred scores on the pair region (queries and keys below PAIR_MAX) for the position-pair part."""

    name = "split"
    any_order = True

    def __init__(self, heads_only: set | None = None, max_units: int = BOOT_UNITS):
        self.heads_only = heads_only
        self.max_units = max_units

    def begin(self, subject, units: Sequence[TextUnit]) -> None:
        self.ph = _PerHead(subject)
        self.units = list(units)
        self.design = Design(units)
        S, H = len(self.ph.keys), self.ph.n_heads
        # axis 0 of b, ssw, gram_key (and of pair) is the resampling unit: a text, or past max_units texts a block
        # of consecutive windows whose sums are added up (see windows_per_unit and _BlockSums)
        self.per_unit, n = windows_per_unit(len(units), self.max_units)
        # blocks of windows are closed window by window: then the windows must come one after another
        self.any_order = self.per_unit == 1
        p = self.design.p
        self.b = np.zeros((n, S, H, p))
        self.ssw = np.zeros((n, S, H))
        self.gram_key = np.zeros((n, S), dtype=np.int64)   # which Gram (mask pattern) each text/site used
        self.grams: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}
        self.R = min(PAIR_MAX, self.design.max_t)
        # row-centred scores on the pair region: per text, or (blocks) the current window's, summed into _BlockSums
        self.pair = np.zeros((1 if self.per_unit > 1 else n, S, H, self.R, self.R), dtype=np.float32)
        self._blocks = _BlockSums(self, n) if self.per_unit > 1 else None
        self.regions: dict[tuple, dict] = {}                                 # per pattern: see _region
        self._rows: dict[tuple, tuple] = {}               # per pattern: layout, keys per row, row feature counts
        self._scratch: torch.Tensor | None = None         # centred scores, when row constants are large
        self._layer_gram: dict[tuple, tuple] = {}         # (text, site) → its pattern key
        self._fd: dict[int, torch.Tensor] = {}
        self._fj: dict[int, torch.Tensor] = {}

    def _features(self, cap: LayerCapture, T: int):
        fk = (cap.text, cap.site.stack)
        if fk not in self._fj:
            if len(self._fj) >= 64:                   # texts of a batched pass come layer by layer, interleaved
                self._fj.clear()
            self._fj[fk] = torch.from_numpy(self.design.key_features(cap.unit, T))
        if T not in self._fd:
            self._fd = {T: torch.from_numpy(self.design.delta_features(T))}
        return self._fd[T], self._fj[fk]

    def _pattern(self, cap: LayerCapture, si: int) -> tuple[str, torch.Tensor, torch.Tensor]:
        """Record which Gram matrix (mask pattern) this layer uses — computed once per pattern; all layers of a
        plain causal or encoder model share one per text. Returns the mask's layout for :func:`centred_sums`, its
        allowed keys per row and its per-row feature counts."""
        at = (cap.text, si)
        if cap.head0 == 0 or at not in self._layer_gram:
            a = cap.allowed.numpy()
            key = (cap.text, cap.site.stack, hash(np.packbits(a).tobytes()))
            if key not in self.grams:
                G, counts, C = gram_for(self.design, cap.unit, a)
                self.grams[key] = (G, counts)
                kind = ("none" if a.all() else "causal" if np.array_equal(a, np.tri(*a.shape, dtype=bool))
                        else "general")
                self._rows[key] = (kind, torch.from_numpy(a.sum(1).astype(np.float64)), torch.from_numpy(C))
                self.regions[key] = self._region(cap, a, C)
            if self._blocks is None:
                self.gram_key[cap.text, si] = list(self.grams).index(key)
            self._layer_gram[at] = key
        return self._rows[self._layer_gram[at]]

    def _region(self, cap: LayerCapture, a: np.ndarray, C: np.ndarray) -> dict:
        """What the split needs to evaluate a fit on the pair region (queries and keys below R = PAIR_MAX) of one
        mask pattern: the mask there, the allowed keys per row, the rows' feature counts, and the distance and key
        features of the region's pairs."""
        T = a.shape[0]
        R = min(self.R, T)
        FD = self.design.delta_features(T)[T - R:T + R - 1]       # δ = −(R − 1) … R − 1
        FJ = self.design.key_features(cap.unit, T)[:R]
        return {"R": R, "allowed": a[:R, :R].copy(), "n_i": a[:R].sum(1).astype(np.float64), "C": C[:R].copy(),
                "FD": FD, "FJ": FJ}

    def update(self, cap: LayerCapture) -> None:
        if cap.offset:
            raise ValueError("SplitStats runs on unshifted recordings only")
        si = self.ph.index[_site_key(cap)]
        hs = slice(cap.head0, cap.head0 + cap.n_heads)
        if self._blocks is not None:
            self._blocks.start(cap.text)             # a new window: the last one goes into its block
        kind, n_i, rows_c = self._pattern(cap, si)
        s0 = cap.zeroed_scores()                     # (n, T, T), 0 on disallowed pairs
        if self._scratch is None or self._scratch.numel() < s0.numel():
            self._scratch = torch.empty(s0.numel(), dtype=s0.dtype)
        ssw, (diag, col), correction = centred_sums(s0, cap.allowed, kind, n_i, rows_c,
                                                    self._scratch[:s0.numel()].view(s0.shape), cap.blocks())
        FD, FJ = self._features(cap, s0.shape[-1])
        b = torch.cat([diag @ FD, col @ FJ], dim=-1)
        if correction is not None:
            b -= correction
        if self._blocks is None:
            self.b[cap.text, si, hs] = b.numpy()
            self.ssw[cap.text, si, hs] = ssw.numpy()
        else:                                        # a block's sums over its windows
            self.b[cap.text // self.per_unit, si, hs] += b.numpy()
            self.ssw[cap.text // self.per_unit, si, hs] += ssw.numpy()
        # the pair region: row-centred scores of queries and keys below R (0 on disallowed pairs)
        T = s0.shape[-1]
        R = min(self.R, T)
        m = s0[:, :R].sum(-1, dtype=torch.float64) / n_i[:R].clamp_min(1.0)            # (n, R) row means
        A = cap.allowed[:R, :R]
        blk = (s0[:, :R, :R].double() - m[..., None]) * A.to(torch.float64)
        self.pair[0 if self._blocks is not None else cap.text, si, hs, :R, :R] = blk.numpy()

    def result(self) -> dict:
        self._scratch = None
        self._rows.clear()
        if self._blocks is not None:
            return self._blocks.result()
        grams = list(self.grams.values())
        return {"keys": self.ph.keys, "design": self.design, "b": self.b, "ssw": self.ssw,
                "gram_key": self.gram_key, "grams": [g for g, _ in grams], "dist_counts": [n for _, n in grams],
                "pair": self.pair, "regions": [self.regions[k] for k in self.grams], "n_windows": len(self.units)}


def _region_map(region: dict, p: int, pD: int) -> np.ndarray:
    """The fit on one window's pair region as a linear map of the coefficients: F (R², p) with F @ coef = the
    fitted scores (distance + key − row term, as in :meth:`attnpos.split.Split._pair_products`) on the allowed
    pairs, 0 elsewhere; so the window's residual there is c − F @ coef."""
    R = region["R"]
    i, j = np.arange(R)[:, None], np.arange(R)[None, :]
    F = np.zeros((R, R, p))
    F[:, :, :pD] = region["FD"][i - j + R - 1]
    F[:, :, pD:] += region["FJ"][None, :, :]
    F -= (region["C"] / np.maximum(region["n_i"], 1.0)[:, None])[:, None, :]
    F *= region["allowed"][:, :, None]
    return F.reshape(R * R, p)


class _BlockSums:
    """SplitStats' storage past ``max_units`` windows: every resampling unit is a block of consecutive windows.

    b and ssw are summed per block in place (SplitStats.update). The rest is summed when a window is complete:

    * Gram matrices and pair counts per block and site (sites whose windows all had the same mask patterns share
      one sum), so ``gram_key``/``grams``/``dist_counts`` keep their meaning with blocks in place of texts;
    * for the position pair, the block's windows grouped by their pair regions (same size and mask on every
      site): per group the sums of the row-centred scores c and of c², and of the region's features (so the sum
      of the windows' residuals is one linear map of the fit's coefficients), and, to leave out the products of a
      window with itself, Σ c·c, Σ Fᵀc and Σ FᵀF (a window's own Σ r² is a quadratic form of the coefficients).

    Nothing of a window is kept once it is in its block; memory is that of at most ``max_units`` blocks."""

    def __init__(self, stats: "SplitStats", n_units: int):
        self.st = stats
        self.n_units = n_units
        self.current: int | None = None
        self.open: int | None = None                  # block being filled
        self.slot: list | None = None                 # per site: index into self.bg
        self.bg: list = []                            # the open block's Gram sums [G, counts]
        self.grams: list = []                         # closed blocks' Gram sums
        self.groups: dict = {}                        # (block, region signature) → pair sums of its windows

    def start(self, text: int) -> None:
        if text != self.current:
            if self.current is not None:
                self._add_window()
            self.current = text

    @staticmethod
    def _shared(slots, keys, make, add, store):
        """Sums shared by sites: a site's new sum is its old sum (slot) plus its window's value (key); sites with
        the same old slot and key share it. Returns the sites' new slots into the new store."""
        new: dict = {}
        out = []
        for old, key in zip(slots, keys):
            sig = (old, key)
            if sig not in new:
                new[sig] = len(store)
                store.append(make(key) if old is None else add(old, key))
            out.append(new[sig])
        return out

    def _close(self) -> None:
        if self.open is not None:
            self.st.gram_key[self.open] = len(self.grams) + np.asarray(self.slot)
            self.grams.extend(self.bg)
        self.open, self.slot, self.bg = None, None, []

    def _add_window(self) -> None:
        st, t = self.st, self.current
        S = len(st.ph.keys)
        unit = t // st.per_unit
        if unit != self.open:
            self._close()
            self.open, self.slot = unit, [None] * S
        keys = [st._layer_gram[(t, si)] for si in range(S)]
        old_bg = self.bg
        self.bg = []
        self.slot = self._shared(self.slot, keys,
                                 lambda k: [st.grams[k][0].copy(), st.grams[k][1].copy()],
                                 lambda o, k: [old_bg[o][0] + st.grams[k][0], old_bg[o][1] + st.grams[k][1]],
                                 self.bg)
        # the pair region: the window joins the group of its block with the same regions on every site
        p, pD, H = st.design.p, st.design.n_dist + 1, st.ph.n_heads
        regions = [st.regions[k] for k in keys]
        sig = (unit, tuple((r["R"], np.packbits(r["allowed"]).tobytes()) for r in regions))
        g = self.groups.get(sig)
        if g is None:
            R = st.R
            g = self.groups[sig] = {"unit": unit, "m": 0, "slot": [None] * S, "regions": [],
                                    "pair": np.zeros((S, H, R, R)), "pair_sq": np.zeros((S, H, R, R)),
                                    "cc": np.zeros((S, H)), "Fc": np.zeros((S, H, p))}
        maps = {k: _region_map(st.regions[k], p, pD) for k in set(keys)}

        def make(k):
            r = st.regions[k]
            F = maps[k]
            return {"R": r["R"], "allowed": r["allowed"], "FD": r["FD"], "FJ": r["FJ"].copy(),
                    "Cn": r["C"] / np.maximum(r["n_i"], 1.0)[:, None], "FtF": F.T @ F}

        def add(o, k):
            a, r, F = old_regions[o], st.regions[k], maps[k]
            return {"R": a["R"], "allowed": a["allowed"], "FD": a["FD"], "FJ": a["FJ"] + r["FJ"],
                    "Cn": a["Cn"] + r["C"] / np.maximum(r["n_i"], 1.0)[:, None], "FtF": a["FtF"] + F.T @ F}

        old_regions = g["regions"]
        g["regions"] = []
        with blas_one_thread():
            g["slot"] = self._shared(g["slot"], keys, make, add, g["regions"])
            for si, k in enumerate(keys):
                Rt = st.regions[k]["R"]
                c = st.pair[0, si].astype(np.float64)              # (H, R, R), 0 outside the region
                g["pair"][si] += c
                g["pair_sq"][si] += c * c
                g["cc"][si] += (c * c).sum((-2, -1))
                g["Fc"][si] += c[:, :Rt, :Rt].reshape(H, -1) @ maps[k]
        g["m"] += 1
        st.pair[0] = 0.0
        # the window's own pattern data is no longer needed
        for k in set(keys):
            st.grams.pop(k, None)
            st.regions.pop(k, None)
            st._rows.pop(k, None)
        for si in range(S):
            st._layer_gram.pop((t, si), None)

    def result(self) -> dict:
        st = self.st
        if self.current is not None:
            self._add_window()
            self.current = None
        self._close()
        groups = list(self.groups.values())
        return {"keys": st.ph.keys, "design": st.design, "b": st.b, "ssw": st.ssw, "gram_key": st.gram_key,
                "grams": [g for g, _ in self.grams], "dist_counts": [n for _, n in self.grams],
                "pair_groups": groups, "n_windows": len(st.units), "windows_per_unit": st.per_unit}

