r"""The score split: how much of each head's scores follows distance, slot, key content, or none of these.

For one head, over the allowed pairs (i, j) of all texts,

    s_ij = a_i + d(δ) + g(j) + c(tok_j) + r_ij,      δ = i − j,

where a_i is a free per-row constant (it absorbs softmax's row constant, so log-weights work as well as true
scores), d is a free function of distance (exact for |δ| < 16, four log-spaced buckets per doubling beyond, plus a
linear term so a straight ALiBi-like line is fitted exactly), g a free function of the slot j (same buckets), c a
free function of the key token (the 48 most frequent keys; the rest share one term), and r what is left — the
query–key content interaction.

**Identifiability.** Within a row, j = i − δ, so a linear trend in j is the same as a linear trend in δ. Our
convention: *linear trends belong to distance*. The slot and key-token features are projected (in the within-row
metric) to be orthogonal to the linear term, so g and c keep only what is not a straight line in j. (Without this,
with few texts a token that occurs at one place can stand in for its position and claim a distance trend.)

**Shares.** Each part's share of the within-row variance is its Shapley value over the three named parts (the
average gain in R² from adding that part, over the orders in which parts can be added); ``residual`` is
1 − R² of the full fit. Shares lie in [0, 1] and sum to 1. A part that two explanations share (e.g. slot 0 is
always the BOS token) is split evenly between them — the shift test tells them apart.

**Fit.** Exact least squares from sufficient statistics collected during capture (:class:`~attnpos.reducers.SplitStats`):
per text the head-independent Gram matrix of the within-row-centred features, and per head the feature sums of
the row-centred scores. Nothing the size of the pairs is ever held.

**Intervals.** 90% percentile intervals from a bootstrap over texts (texts resampled with replacement; needs ≥ 2).

Example::

    >>> import attnpos
    >>> from attnpos.reducers import SplitStats
    >>> subject = attnpos.load("ref:rope")
    >>> rec = attnpos.record(subject, ["The ferry left at nine and came back at noon.",
    ...                                "Rye loaves come out of the oven first, then the buns."], [SplitStats()])
    >>> fit = Split(n_boot=20).fit(rec)
    >>> fit.shares.shape              # (layers, heads, parts): distance, slot, content, residual
    (4, 4, 4)
    >>> bool(np.allclose(fit.shares.sum(-1), 1.0))
    True
    >>> fit.table().loc[1, ["key", "share_distance", "slope"]].shape
    (3,)
"""

from __future__ import annotations

from itertools import combinations

import numpy as np

from .core import columns
from .reducers import Design, blas_one_thread
from .results.split import SplitResult

PARTS = columns.PART_NAMES
_SUBSETS = [frozenset(c) for r in (1, 2, 3) for c in combinations(range(3), r)]


def _nan_percentiles(arr: np.ndarray, qs) -> list[np.ndarray]:
    """``np.nanpercentile(arr, q, axis=0)`` (linear interpolation) for each q, vectorised: numpy falls back to a
    per-element Python loop when NaNs are present, which took longer than the whole bootstrap. All-NaN → NaN."""
    a = np.sort(arr, axis=0)                                # NaNs sort last
    n = (~np.isnan(arr)).sum(0)
    out = []
    for q in qs:
        pos = np.maximum(n - 1, 0) * (q / 100.0)
        i0 = np.floor(pos).astype(np.int64)
        i1 = np.minimum(i0 + 1, np.maximum(n - 1, 0))
        v0 = np.take_along_axis(a, i0[None], 0)[0]
        v1 = np.take_along_axis(a, i1[None], 0)[0]
        with np.errstate(invalid="ignore"):
            val = v0 + (pos - i0) * (v1 - v0)
        out.append(np.where(n > 0, np.where(pos == i0, v0, val), np.nan))
    return out


def _pinv_solve(G: np.ndarray, B: np.ndarray, rtol: float = 1e-9) -> np.ndarray:
    """Minimum-norm solution of G x = B for symmetric PSD G (eigen-decomposition with a relative cutoff)."""
    if G.shape[0] == 0:
        return np.zeros((0,) + B.shape[1:])
    w, V = np.linalg.eigh(G)
    cut = rtol * max(float(w.max()), 1e-300)
    inv = np.where(w > cut, 1.0 / np.where(w > cut, w, 1.0), 0.0)
    return V @ (inv[:, None] * (V.T @ B))


class Split:
    """Estimator: fit the score split on a recording made with :class:`~attnpos.reducers.SplitStats`.

    Args:
        n_boot: bootstrap resamples over texts for the intervals (0 to skip).
        seed: seed of the bootstrap.
    """

    def __init__(self, n_boot: int = 100, seed: int = 0):
        self.n_boot = n_boot
        self.seed = seed

    # ------------------------------------------------------------------------------------------- core
    @staticmethod
    def _transform(design: Design, G: np.ndarray) -> np.ndarray:
        """Tm such that slot and key-token features become orthogonal to the linear δ term: X' = X Tm."""
        p = design.p
        Tm = np.eye(p)
        L = design.i_lin
        gll = G[L, L]
        if gll > 0:
            keyside = np.concatenate([design.i_slot, design.i_tok])
            Tm[L, keyside] = -G[L, keyside] / gll
        return Tm

    @staticmethod
    def _solve(design: Design, G: np.ndarray, B: np.ndarray, ssw: np.ndarray, dist_counts: np.ndarray):
        """One fit: G (p, p), B (p, m) feature sums for m heads, ssw (m,). Returns shares (m, 4), profile
        (m, n_dist), slope (m,)."""
        Tm = Split._transform(design, G)
        Gp = Tm.T @ G @ Tm
        Bp = Tm.T @ B
        groups = [np.concatenate([design.i_dist, [design.i_lin]]), design.i_slot, design.i_tok]
        r2 = {}
        safe = np.where(ssw > 0, ssw, np.nan)
        for S in _SUBSETS:
            idx = np.concatenate([groups[g] for g in sorted(S)])
            x = _pinv_solve(Gp[np.ix_(idx, idx)], Bp[idx])
            r2[S] = np.clip(np.einsum("pm,pm->m", Bp[idx], x) / safe, 0.0, 1.0)
            if len(S) == 3:
                full = x
                full_idx = idx
        r2[frozenset()] = np.zeros(B.shape[1])
        shares = np.zeros((B.shape[1], 4))
        for g in range(3):
            others = [o for o in range(3) if o != g]
            acc = np.zeros(B.shape[1])
            for r in range(3):
                for c in combinations(others, r):
                    S = frozenset(c)
                    wt = {0: 1 / 3, 1: 1 / 6, 2: 1 / 3}[r]
                    acc += wt * np.maximum(r2[S | {g}] - r2[S], 0.0)
            shares[:, g] = acc
        total = np.clip(r2[frozenset(range(3))], 0.0, 1.0)
        sums = shares[:, :3].sum(1)
        scale = np.where(sums > 0, total / np.where(sums > 0, sums, 1.0), 0.0)
        shares[:, :3] *= scale[:, None]
        shares[:, 3] = 1.0 - shares[:, :3].sum(1)
        shares[~np.isfinite(ssw) | (ssw <= 0)] = np.nan
        # profile: distance-bucket coefficients + linear term × representative δ, anchored at δ = 0
        coef = np.zeros((design.p, B.shape[1]))
        coef[full_idx] = full
        reps = design.bucket_delta()
        prof = coef[design.i_dist].T + coef[design.i_lin][:, None] * reps[None, :]
        prof = prof - prof[:, [0]]
        seen = dist_counts > 0
        prof[:, ~seen] = np.nan
        # slope over δ ≥ 0, weighted by pair counts; positive when scores fall with distance
        causal = np.arange(design.n_dist) < design.n_pos
        sel = causal & seen
        wts = dist_counts[sel]
        xs = reps[sel]
        if sel.sum() >= 2 and wts.sum() > 0:
            xm = np.average(xs, weights=wts)
            ys = prof[:, sel]
            ym = (ys * wts).sum(1) / wts.sum()
            cov = ((xs - xm) * (ys - ym[:, None]) * wts).sum(1)
            var = ((xs - xm) ** 2 * wts).sum()
            slope = -cov / var if var > 0 else np.full(B.shape[1], np.nan)
        else:
            slope = np.full(B.shape[1], np.nan)
        slope[~np.isfinite(ssw) | (ssw <= 0)] = np.nan
        return shares, prof, slope

    def _fit_weights(self, res: dict, w: np.ndarray):
        """Fit every site with text weights w (n_texts,). Sites that share a mask pattern share one solve."""
        design: Design = res["design"]
        b, ssw, gk = res["b"], res["ssw"], res["gram_key"]
        grams, counts = res["grams"], res["dist_counts"]
        S, H = b.shape[1], b.shape[2]
        shares = np.zeros((S, H, 4))
        prof = np.zeros((S, H, design.n_dist))
        slope = np.zeros((S, H))
        groups: dict = {}
        for si in range(S):
            groups.setdefault(tuple(gk[:, si]), []).append(si)
        for sig, sites in groups.items():
            G = sum(w[t] * grams[sig[t]] for t in range(len(w)) if w[t])
            dc = sum(w[t] * counts[sig[t]] for t in range(len(w)) if w[t])
            B = np.concatenate([np.tensordot(w, b[:, si], axes=(0, 0)) for si in sites])   # (len*H, p)
            ss = np.concatenate([w @ ssw[:, si] for si in sites])
            sh, pr, sl = self._solve(design, G, B.T, ss, dc)
            for k, si in enumerate(sites):
                part = slice(k * H, (k + 1) * H)
                shares[si], prof[si], slope[si] = sh[part], pr[part], sl[part]
        return shares, prof, slope

    def fit(self, recording) -> SplitResult:
        res = recording.results["split"] if hasattr(recording, "results") else recording
        with blas_one_thread():
            return self._fit(res)

    def _fit(self, res: dict) -> SplitResult:
        n = res["b"].shape[0]
        shares, prof, slope = self._fit_weights(res, np.ones(n))
        lo = lambda a: np.full_like(a, np.nan)  # noqa: E731
        out = dict(shares_lo=lo(shares), shares_hi=lo(shares), profile_lo=lo(prof), profile_hi=lo(prof),
                   slope_lo=lo(slope), slope_hi=lo(slope))
        if self.n_boot > 0 and n >= 2:
            rng = np.random.default_rng(self.seed)
            bs = {"shares": [], "profile": [], "slope": []}
            seen: dict[bytes, tuple] = {}        # a resample drawn again (likely with few texts) is not refitted
            for _ in range(self.n_boot):
                w = np.bincount(rng.integers(0, n, n), minlength=n).astype(float)
                key = w.tobytes()
                if key not in seen:
                    seen[key] = self._fit_weights(res, w)
                s_, p_, l_ = seen[key]
                bs["shares"].append(s_)
                bs["profile"].append(p_)
                bs["slope"].append(l_)
            for k, stack in bs.items():
                arr = np.stack(stack)
                out[f"{k}_lo"], out[f"{k}_hi"] = _nan_percentiles(arr, (5, 95))
        design: Design = res["design"]
        return SplitResult(keys=res["keys"], distance=design.bucket_delta(), shares=shares, profile=prof, slope=slope,
                        n_texts=n, n_boot=max(self.n_boot, 0) if n >= 2 else 0, **out)
