r"""The score split: how much of each head's scores follows distance, slot, key content, both positions, or none.

For one head, over the allowed pairs (i, j) of all texts,

    s_ij = a_i + d(δ) + g(j) + c(tok_j) + P(i, j) + r_ij,      δ = i − j,

where a_i is a free per-row constant (it absorbs softmax's row constant, so log-weights work as well as true
scores), d is a free function of distance (exact for |δ| < 16, four log-spaced buckets per doubling beyond, plus a
linear term so a straight ALiBi-like line is fitted exactly), g a free function of the slot j (same buckets), c a
free function of the key token (the 48 most frequent keys; the rest share one term), P the position pair — an
interaction of the two absolute positions, such as p_iᵀ W p_j from a learned absolute table — and r what is left:
the query–key content interaction.

**Identifiability.** Within a row, j = i − δ, so a linear trend in j is the same as a linear trend in δ. Our
convention: *linear trends belong to distance*. The slot and key-token features are projected (in the within-row
metric) to be orthogonal to the linear term, so g and c keep only what is not a straight line in j. (Without this,
with few texts a token that occurs at one place can stand in for its position and claim a distance trend.)

**The position pair (convention).** d and g are functions of (i, j) too, so P is defined as what they leave:
*the part of the three-part fit's residual that is the same across texts at the same (i, j)*. Content differs
from text to text; what two different texts share at one (query position, key position) can only come from the
positions. Its share is the cross-text covariance of the residual over the within-row variance,

    share_pair = Σ_{t≠u} Σ_ij r^t_ij r^u_ij  /  Σ_{t≠u} ½ Σ_ij ((c^t_ij)² + (c^u_ij)²)

(c: row-centred scores; sums over the pairs (i, j) both texts have, with query and key positions below
:data:`attnpos.reducers.PAIR_MAX`; t ≠ u over *different* texts, so a text's own noise never counts as shared),
clipped to [0, residual]; the residual keeps the rest. With fewer than two texts nothing can be shared and the pair
share is 0. A planted head with scores p_iᵀ W p_j only puts ≥ 0.9 there, an ALiBi head ≈ 0 (distance takes it).

**Shares.** Each of distance, slot and content has its Shapley value over the three (the average gain in R² from
adding that part, over the orders in which parts can be added); ``pair`` is defined above, ``residual`` is
1 − R² of the three-part fit minus ``pair``. Shares lie in [0, 1] and sum to 1. A part that two explanations share
(e.g. slot 0 is always the BOS token) is split evenly between them — the shift test tells them apart.

**Fit.** Exact least squares from sufficient statistics collected during capture (:class:`~attnpos.reducers.SplitStats`):
per text the head-independent Gram matrix of the within-row-centred features, and per head the feature sums of
the row-centred scores; for the pair part, each text's row-centred scores on the first PAIR_MAX × PAIR_MAX
positions, whose products across texts (per head, one n_texts × n_texts matrix) give it exactly for any weighting
of the texts. Nothing the size of a text's pairs is ever held.

**Intervals.** 90% percentile intervals from a bootstrap over texts (texts resampled with replacement; needs ≥ 2).
Each resample refits the three named parts; the pair part of a resample reuses the full-data fit's residuals (its
cross-text products are weighted by the resample, copies of one text never paired with each other). Past
:data:`attnpos.reducers.BOOT_UNITS` windows the units resampled are blocks of consecutive windows (a block
bootstrap; :func:`attnpos.reducers.windows_per_unit`), and the pair part's products are still those of different
windows (:meth:`Split._pair_products_blocks`).

Example::

    >>> import attnpos
    >>> from attnpos.reducers import SplitStats
    >>> subject = attnpos.load("ref:rope")
    >>> rec = attnpos.record(subject, ["The ferry left at nine and came back at noon.",
    ...                                "Rye loaves come out of the oven first, then the buns."], [SplitStats()])
    >>> fit = Split(n_boot=20).fit(rec)
    >>> fit.shares.shape              # (layers, heads, parts): distance, slot, content, pair, residual
    (4, 4, 5)
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


def _pinv_solve(G: np.ndarray, B: np.ndarray, rtol: float = 1e-9, solution: bool = True):
    """Minimum-norm solutions x of G x = B for a stack of symmetric PSD G (U, k, k) and B (U, k, m) (eigen-
    decomposition with a relative cutoff per matrix), and the explained sums Bᵀx per column (U, m). Without
    ``solution`` only the explained sums (x is None): Bᵀ G⁺ B = Σ_k (v_kᵀ B)² / λ_k needs no second product."""
    if G.shape[-1] == 0:
        return (np.zeros(B.shape) if solution else None), np.zeros((B.shape[0], B.shape[2]))
    w, V = np.linalg.eigh(G)
    cut = rtol * np.maximum(w.max(-1), 1e-300)[:, None]
    inv = np.where(w > cut, 1.0 / np.where(w > cut, w, 1.0), 0.0)
    y = V.transpose(0, 2, 1) @ B                                # (U, k, m)
    if not solution:
        return None, np.einsum("uk,ukm->um", inv, y * y)
    x = V @ (inv[..., None] * y)
    return x, np.einsum("ukm,ukm->um", B, x)


# resamples solved together: small enough that one chunk's arrays stay in cache, several chunks for the threads
_CHUNK = 8


def _workers() -> int:
    """Threads for the bootstrap's solves: LAPACK and BLAS release the GIL, and each runs on one BLAS thread
    (:func:`attnpos.reducers.blas_one_thread`), so two threads use two cores without spin-waiting BLAS threads."""
    import os

    import torch

    return max(1, min(2, os.cpu_count() or 1, torch.get_num_threads()))


class Split:
    """Estimator: fit the score split on a recording made with :class:`~attnpos.reducers.SplitStats`.

    Args:
        n_boot: bootstrap resamples over texts for the intervals (0 to skip).
        seed: seed of the bootstrap.

    Axis 0 of the recording's arrays (``b``, ``ssw``, ``pair``, ``gram_key``) is what the bootstrap resamples
    (texts); nothing else is assumed of it.
    """

    def __init__(self, n_boot: int = 100, seed: int = 0):
        self.n_boot = n_boot
        self.seed = seed

    # ------------------------------------------------------------------------------------------- core
    @staticmethod
    def _transform(design: Design, G: np.ndarray) -> np.ndarray:
        """Tm (U, p, p) such that slot and key-token features become orthogonal to the linear δ term: X' = X Tm,
        for a stack of Gram matrices G (U, p, p)."""
        U, p = G.shape[0], design.p
        Tm = np.broadcast_to(np.eye(p), (U, p, p)).copy()
        L = design.i_lin
        gll = G[:, L, L]
        keyside = np.concatenate([design.i_slot, design.i_tok])
        pos = gll > 0
        Tm[np.ix_(np.flatnonzero(pos), [L], keyside)] = \
            (-G[pos][:, L, keyside] / gll[pos][:, None])[:, None, :]
        return Tm

    @staticmethod
    def _solve(design: Design, G: np.ndarray, B: np.ndarray, ssw: np.ndarray, dist_counts: np.ndarray,
               reps: np.ndarray | None = None):
        """Fits of a stack of U weightings at once: G (U, p, p), B (U, p, m) feature sums for m heads, ssw (U, m),
        dist_counts (U, n_dist). Returns shares (U, m, 4: the three named parts and what they leave), profile
        (U, m, n_dist), slope (U, m) and the full fit's coefficients (U, p, m) on the original features."""
        U, m = B.shape[0], B.shape[2]
        Tm = Split._transform(design, G)
        TmT = Tm.transpose(0, 2, 1)
        Gp = TmT @ G @ Tm
        Bp = TmT @ B
        groups = [np.concatenate([design.i_dist, [design.i_lin]]), design.i_slot, design.i_tok]
        r2 = {}
        safe = np.where(ssw > 0, ssw, np.nan)
        for S in _SUBSETS:
            idx = np.concatenate([groups[g] for g in sorted(S)])
            x, explained = _pinv_solve(Gp[:, idx][:, :, idx], Bp.take(idx, axis=1), solution=len(S) == 3)
            r2[S] = np.clip(explained / safe, 0.0, 1.0)
            if len(S) == 3:
                full = x
                full_idx = idx
        r2[frozenset()] = np.zeros((U, m))
        shares = np.zeros((U, m, 4))
        for g in range(3):
            others = [o for o in range(3) if o != g]
            acc = np.zeros((U, m))
            for r in range(3):
                for c in combinations(others, r):
                    S = frozenset(c)
                    wt = {0: 1 / 3, 1: 1 / 6, 2: 1 / 3}[r]
                    acc += wt * np.maximum(r2[S | {g}] - r2[S], 0.0)
            shares[..., g] = acc
        total = np.clip(r2[frozenset(range(3))], 0.0, 1.0)
        sums = shares[..., :3].sum(-1)
        scale = np.where(sums > 0, total / np.where(sums > 0, sums, 1.0), 0.0)
        shares[..., :3] *= scale[..., None]
        shares[..., 3] = 1.0 - shares[..., :3].sum(-1)
        bad = ~np.isfinite(ssw) | (ssw <= 0)
        shares[bad] = np.nan
        # profile: distance-bucket coefficients + linear term × representative δ, anchored at δ = 0
        coef = np.zeros((U, design.p, m))
        coef[:, full_idx] = full
        if reps is None:
            reps = design.bucket_delta()
        prof = coef[:, design.i_dist].transpose(0, 2, 1) + coef[:, design.i_lin][:, :, None] * reps[None, None, :]
        prof = prof - prof[..., [0]]
        slope = np.full((U, m), np.nan)
        causal = np.arange(design.n_dist) < design.n_pos
        for u in range(U):
            seen = dist_counts[u] > 0
            prof[u][:, ~seen] = np.nan
            # slope over δ ≥ 0, weighted by pair counts; positive when scores fall with distance
            sel = causal & seen
            wts = dist_counts[u][sel]
            xs = reps[sel]
            if sel.sum() >= 2 and wts.sum() > 0:
                xm = np.average(xs, weights=wts)
                ys = prof[u][:, sel]
                ym = (ys * wts).sum(1) / wts.sum()
                cov = ((xs - xm) * (ys - ym[:, None]) * wts).sum(1)
                var = ((xs - xm) ** 2 * wts).sum()
                if var > 0:
                    slope[u] = -cov / var
        slope[bad] = np.nan
        return shares, prof, slope, Tm @ coef

    def _fit_weights(self, res: dict, w: np.ndarray):
        """Fit every site with unit weights w (U, n_units): one fit per row of w. Sites that share a mask
        pattern share one solve. Returns shares of the three named parts and what they leave (U, S, H, 4),
        profile (U, S, H, n_dist), slope (U, S, H), and the full fit's coefficients (U, S, p, H)."""
        design: Design = res["design"]
        b, ssw, gk = res["b"], res["ssw"], res["gram_key"]
        grams, counts = np.stack(res["grams"]), np.stack(res["dist_counts"])
        w = np.atleast_2d(np.asarray(w, dtype=np.float64))
        U = w.shape[0]
        S, H = b.shape[1], b.shape[2]
        shares = np.zeros((U, S, H, 4))
        prof = np.zeros((U, S, H, design.n_dist))
        slope = np.zeros((U, S, H))
        coef = np.zeros((U, S, design.p, H))
        reps = design.bucket_delta()
        groups: dict = {}
        for si in range(S):
            groups.setdefault(tuple(gk[:, si]), []).append(si)
        for sig, sites in groups.items():
            sig = np.asarray(sig)
            G = np.tensordot(w, grams[sig], axes=(1, 0))                          # (U, p, p)
            dc = np.tensordot(w, counts[sig], axes=(1, 0))                        # (U, n_dist)
            m = len(sites) * H
            bs, ws = b[:, sites], ssw[:, sites]

            def chunk(u0, G=G, dc=dc, bs=bs, ws=ws, m=m):
                wu = w[u0:u0 + _CHUNK]
                Bm = np.tensordot(wu, bs, axes=(1, 0)).reshape(len(wu), m, design.p)   # (U, len·H, p)
                ss = np.tensordot(wu, ws, axes=(1, 0)).reshape(len(wu), m)
                return u0, self._solve(design, G[u0:u0 + _CHUNK], Bm.transpose(0, 2, 1), ss, dc[u0:u0 + _CHUNK],
                                       reps)

            starts = range(0, U, _CHUNK)
            n_workers = min(_workers(), len(starts))
            if n_workers > 1:
                from concurrent.futures import ThreadPoolExecutor

                with ThreadPoolExecutor(n_workers) as pool:
                    done = list(pool.map(chunk, starts))
            else:
                done = [chunk(u0) for u0 in starts]
            for u0, (sh, pr, sl, co) in done:
                us = slice(u0, u0 + sh.shape[0])
                for k, si in enumerate(sites):
                    part = slice(k * H, (k + 1) * H)
                    shares[us, si], prof[us, si], slope[us, si] = sh[:, part], pr[:, part], sl[:, part]
                    coef[us, si] = co[:, :, part]
        return shares, prof, slope, coef

    @staticmethod
    def _pair_products(res: dict, coef: np.ndarray):
        """Per site, head and pair of texts (t, u) on the pair region: ``P[s, h, t, u]`` = Σ r^t_ij r^u_ij, the
        products of the full fit's residuals at the same (i, j), and ``V[s, h, t, u]`` = ½ Σ ((c^t_ij)² + (c^u_ij)²)
        over the pairs (i, j) both texts have (c: row-centred scores)."""
        design: Design = res["design"]
        pair, regions, gk = res["pair"], res["regions"], res["gram_key"]
        n, S, H, R, _ = pair.shape
        pD = design.n_dist + 1
        P = np.zeros((S, H, n, n))
        V = np.zeros((S, H, n, n))
        for si in range(S):
            r = np.zeros((n, H, R, R))
            A = np.zeros((n, R, R))
            co = coef[si]                                                   # (p, H)
            for t in range(n):
                reg = regions[gk[t, si]]
                Rt = reg["R"]
                i, j = np.arange(Rt)[:, None], np.arange(Rt)[None, :]
                dist = reg["FD"] @ co[:pD]                                  # (2Rt − 1, H)
                key = reg["FJ"] @ co[pD:]                                   # (Rt, H)
                row = (reg["C"] @ co) / np.maximum(reg["n_i"], 1.0)[:, None]
                fitted = dist[i - j + Rt - 1] + key[None, :, :] - row[:, None, :]     # (Rt, Rt, H)
                At = reg["allowed"]
                A[t, :Rt, :Rt] = At
                r[t, :, :Rt, :Rt] = (pair[t, si, :, :Rt, :Rt] - np.moveaxis(fitted, -1, 0)) * At
            c2 = pair[:, si].astype(np.float64) ** 2                          # (n, H, R, R)
            rf = np.ascontiguousarray(np.moveaxis(r.reshape(n, H, -1), 1, 0))    # (H, n, K)
            P[si] = rf @ rf.transpose(0, 2, 1)
            v1 = np.moveaxis(c2.reshape(n, H, -1), 1, 0) @ A.reshape(n, -1).T    # (H, n, n): Σ (c^t)² on u's pairs
            V[si] = 0.5 * (v1 + v1.transpose(0, 2, 1))
        return P, V

    @staticmethod
    def _pair_products_blocks(res: dict, coef: np.ndarray):
        """:meth:`_pair_products` when the resampling units are blocks of windows (``res["pair_groups"]``, see
        :class:`attnpos.reducers._BlockSums`): ``P`` and ``V`` (S, H, units, units) between blocks, plus what the
        different windows *within* a block share, ``Pw`` and ``Vw`` (S, H, units) — a block's products with itself
        less each window's own. With these, every weighting of the blocks gives the same sums over pairs of
        different windows that :meth:`_pair_products` gives over texts."""
        design: Design = res["design"]
        groups, n_units = res["pair_groups"], res["b"].shape[0]
        S, H, R = res["b"].shape[1], res["b"].shape[2], groups[0]["pair"].shape[-1]
        pD = design.n_dist + 1
        nG = len(groups)
        M = np.zeros((n_units, nG))
        for q, g in enumerate(groups):
            M[g["unit"], q] = 1.0
        P = np.zeros((S, H, n_units, n_units))
        V = np.zeros((S, H, n_units, n_units))
        Pw = np.zeros((S, H, n_units))
        Vw = np.zeros((S, H, n_units))
        for si in range(S):
            co = coef[si]                                                   # (p, H)
            r = np.zeros((nG, H, R, R))
            A = np.zeros((nG, R, R))
            own = np.zeros((nG, H))                                         # Σ over a group's windows of Σ r²
            for q, g in enumerate(groups):
                reg = g["regions"][g["slot"][si]]
                Rt, m = reg["R"], g["m"]
                i, j = np.arange(Rt)[:, None], np.arange(Rt)[None, :]
                dist = reg["FD"] @ co[:pD]                                  # (2Rt − 1, H)
                key = reg["FJ"] @ co[pD:]                                   # (Rt, H): summed over the windows
                row = reg["Cn"] @ co                                        # (Rt, H): summed over the windows
                fitted = m * dist[i - j + Rt - 1] + key[None, :, :] - row[:, None, :]
                At = reg["allowed"]
                A[q, :Rt, :Rt] = m * At
                r[q, :, :Rt, :Rt] = g["pair"][si, :, :Rt, :Rt] - np.moveaxis(fitted, -1, 0) * At
                own[q] = (g["cc"][si] - 2.0 * np.einsum("hp,ph->h", g["Fc"][si], co)
                          + np.einsum("ph,pq,qh->h", co, reg["FtF"], co))
            rf = r.reshape(nG, H, -1).transpose(1, 0, 2)                    # (H, nG, K)
            Pg = rf @ rf.transpose(0, 2, 1)                                 # (H, nG, nG)
            c2 = np.stack([g["pair_sq"][si] for g in groups]).reshape(nG, H, -1).transpose(1, 0, 2)
            v1 = c2 @ A.reshape(nG, -1).T
            Vg = 0.5 * (v1 + v1.transpose(0, 2, 1))
            P[si] = M @ Pg @ M.T
            V[si] = M @ Vg @ M.T
            Pw[si] = np.diagonal(P[si], axis1=-2, axis2=-1) - own.T @ M.T
            Vw[si] = np.diagonal(V[si], axis1=-2, axis2=-1) - np.stack([g["cc"][si] for g in groups]).T @ M.T
        return P, V, Pw, Vw

    @staticmethod
    def _with_pair(shares4: np.ndarray, P: np.ndarray, V: np.ndarray, w: np.ndarray,
                   within: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
        """Shares of the five parts: the position-pair part is the fraction of the within-row variance that the
        full fit's residual shares between different texts at the same (i, j) (pairs of copies of one text left
        out), at most the residual; the residual keeps the rest. ``within``: with blocks of windows as units, what
        different windows of one block share (:meth:`_pair_products_blocks`), counted w² times."""
        W = np.outer(w, w) - np.diag(w * w)
        num = np.einsum("shtu,tu->sh", P, W)
        den = np.einsum("shtu,tu->sh", V, W)
        if within is not None:
            num = num + np.einsum("sht,t->sh", within[0], w * w)
            den = den + np.einsum("sht,t->sh", within[1], w * w)
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        rest = shares4[..., 3]
        pair = np.clip(frac, 0.0, rest)
        return np.stack([shares4[..., 0], shares4[..., 1], shares4[..., 2], pair, rest - pair], axis=-1)

    def fit(self, recording) -> SplitResult:
        res = recording.results["split"] if hasattr(recording, "results") else recording
        with blas_one_thread():
            return self._fit(res)

    def _fit(self, res: dict) -> SplitResult:
        n = res["b"].shape[0]                   # resampling units: texts, or blocks of windows (pair_groups)
        shares4, prof, slope, coef = (x[0] for x in self._fit_weights(res, np.ones((1, n))))
        within = None
        if "pair_groups" in res:
            P, V, Pw, Vw = self._pair_products_blocks(res, coef)
            within = (Pw, Vw)
        else:
            P, V = self._pair_products(res, coef)
        shares = self._with_pair(shares4, P, V, np.ones(n), within)
        lo = lambda a: np.full_like(a, np.nan)  # noqa: E731
        out = dict(shares_lo=lo(shares), shares_hi=lo(shares), profile_lo=lo(prof), profile_hi=lo(prof),
                   slope_lo=lo(slope), slope_hi=lo(slope))
        if self.n_boot > 0 and n >= 2:
            rng = np.random.default_rng(self.seed)
            weights = np.stack([np.bincount(rng.integers(0, n, n), minlength=n).astype(float)
                                for _ in range(self.n_boot)])
            # a resample drawn again (likely with few units) is not refitted; all others are solved together
            distinct, which = np.unique(weights, axis=0, return_inverse=True)
            s4, p_, l_, _ = self._fit_weights(res, distinct)
            sh = np.stack([self._with_pair(s4[u], P, V, distinct[u], within) for u in range(len(distinct))])
            which = np.asarray(which).reshape(-1)
            bs = {"shares": sh[which], "profile": p_[which], "slope": l_[which]}
            for k, arr in bs.items():
                out[f"{k}_lo"], out[f"{k}_hi"] = _nan_percentiles(arr, (5, 95))
            out["boot_weights"] = weights
            out["boot_shares"] = bs["shares"]
            out["boot_slope"] = bs["slope"]
        design: Design = res["design"]
        return SplitResult(keys=res["keys"], distance=design.bucket_delta(), shares=shares, profile=prof, slope=slope,
                        n_texts=int(res.get("n_windows", n)), n_boot=max(self.n_boot, 0) if n >= 2 else 0, **out)
