"""The score split's fit as it was before the bootstrap was solved for all resamples at once (one resample, one
solve per subset of parts, at a time), kept to compare the current :mod:`attnpos.split` with
(``tests/test_fast_paths.py``). Not part of the package. No external check: the package's own previous
implementation, itself checked against published formulas in ``tests/test_split_roles.py``."""

from __future__ import annotations

from itertools import combinations

import numpy as np

from attnpos.core import columns
from attnpos.reducers import Design, blas_one_thread
from attnpos.results.split import SplitResult

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
        """One fit: G (p, p), B (p, m) feature sums for m heads, ssw (m,). Returns shares (m, 4: the three named
        parts and what they leave), profile (m, n_dist), slope (m,) and the full fit's coefficients (p, m) on the
        original features."""
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
        return shares, prof, slope, Tm @ coef

    def _fit_weights(self, res: dict, w: np.ndarray):
        """Fit every site with text weights w (n_texts,). Sites that share a mask pattern share one solve.
        Returns shares of the three named parts and what they leave (S, H, 4), profile, slope, and the full fit's
        coefficients (S, p, H)."""
        design: Design = res["design"]
        b, ssw, gk = res["b"], res["ssw"], res["gram_key"]
        grams, counts = res["grams"], res["dist_counts"]
        S, H = b.shape[1], b.shape[2]
        shares = np.zeros((S, H, 4))
        prof = np.zeros((S, H, design.n_dist))
        slope = np.zeros((S, H))
        coef = np.zeros((S, design.p, H))
        groups: dict = {}
        for si in range(S):
            groups.setdefault(tuple(gk[:, si]), []).append(si)
        for sig, sites in groups.items():
            G = sum(w[t] * grams[sig[t]] for t in range(len(w)) if w[t])
            dc = sum(w[t] * counts[sig[t]] for t in range(len(w)) if w[t])
            B = np.concatenate([np.tensordot(w, b[:, si], axes=(0, 0)) for si in sites])   # (len*H, p)
            ss = np.concatenate([w @ ssw[:, si] for si in sites])
            sh, pr, sl, co = self._solve(design, G, B.T, ss, dc)
            for k, si in enumerate(sites):
                part = slice(k * H, (k + 1) * H)
                shares[si], prof[si], slope[si], coef[si] = sh[part], pr[part], sl[part], co[:, part]
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
    def _with_pair(shares4: np.ndarray, P: np.ndarray, V: np.ndarray, w: np.ndarray) -> np.ndarray:
        """Shares of the five parts: the position-pair part is the fraction of the within-row variance that the
        full fit's residual shares between different texts at the same (i, j) (pairs of copies of one text left
        out), at most the residual; the residual keeps the rest."""
        W = np.outer(w, w) - np.diag(w * w)
        num = np.einsum("shtu,tu->sh", P, W)
        den = np.einsum("shtu,tu->sh", V, W)
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
        n = res["b"].shape[0]
        shares4, prof, slope, coef = self._fit_weights(res, np.ones(n))
        P, V = self._pair_products(res, coef)
        shares = self._with_pair(shares4, P, V, np.ones(n))
        lo = lambda a: np.full_like(a, np.nan)  # noqa: E731
        out = dict(shares_lo=lo(shares), shares_hi=lo(shares), profile_lo=lo(prof), profile_hi=lo(prof),
                   slope_lo=lo(slope), slope_hi=lo(slope))
        if self.n_boot > 0 and n >= 2:
            rng = np.random.default_rng(self.seed)
            bs = {"shares": [], "profile": [], "slope": []}
            weights = []
            seen: dict[bytes, tuple] = {}        # a resample drawn again (likely with few texts) is not refitted
            for _ in range(self.n_boot):
                w = np.bincount(rng.integers(0, n, n), minlength=n).astype(float)
                weights.append(w)
                key = w.tobytes()
                if key not in seen:
                    s4, p_, l_, _ = self._fit_weights(res, w)
                    seen[key] = (self._with_pair(s4, P, V, w), p_, l_)
                s_, p_, l_ = seen[key]
                bs["shares"].append(s_)
                bs["profile"].append(p_)
                bs["slope"].append(l_)
            for k, stack in bs.items():
                arr = np.stack(stack)
                out[f"{k}_lo"], out[f"{k}_hi"] = _nan_percentiles(arr, (5, 95))
            out["boot_weights"] = np.stack(weights)
            out["boot_shares"] = np.stack(bs["shares"])
            out["boot_slope"] = np.stack(bs["slope"])
        design: Design = res["design"]
        return SplitResult(keys=res["keys"], distance=design.bucket_delta(), shares=shares, profile=prof, slope=slope,
                        n_texts=n, n_boot=max(self.n_boot, 0) if n >= 2 else 0, **out)
