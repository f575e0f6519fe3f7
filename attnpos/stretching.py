r"""What-if context extension: a RoPE checkpoint rerun under each published scaling, head by head.

For a causal RoPE language model trained at length L and a longer length ``to``, the model is rebuilt once per
variant (:mod:`attnpos.core.scalings`: linear position interpolation — Chen et al. 2023; dynamic NTK-style — common
practice; YaRN — Peng et al. 2024; the Llama 3 rule) with the variant's ``rope_parameters`` in its config, so
transformers' own rotary code applies the variant, and with the checkpoint's weights unchanged. The unscaled model
is always measured too. Every variant reads the same sequences of exactly ``to`` tokens (cut as
:func:`attnpos.length.sequences` cuts them).

Measured per variant:

* **per-position loss** — next-token cross-entropy by position with 90% bootstrap intervals (sequences
  resampled), as :func:`attnpos.length.length` measures it.
* **per head, on the queries past L** — previous-token mass (weight on key i − 1), first-token (sink) weight
  (weight on slot 0, Xiao et al. 2024), entropy ratio (entropy over log of the visible keys; 1 = uniform), slope
  (within-row least-squares fit of the scores over distances 0 … D, D = min(L/2, 64), positive when scores fall with
  distance), the distance profile (mean weight per key at distances 0, 1, 2–3, 4–7, …) and the weight-based role
  (:func:`attnpos.length.role_rows`).

The **reference** of every head is the same head on the queries *inside* L of the unscaled model: in a causal model
those queries see only keys inside L, so this is the model at its training length. A head **breaks** under a
variant when its role changes, or when a statistic moves by at least its threshold
(:mod:`attnpos.core.thresholds`, ``STRETCH_*``) with non-overlapping 90% intervals (sequences resampled).

**Bands** (Barbero et al. 2025): on the unscaled model at length L, :func:`attnpos.bands.rope_bands` gives each
head's share of q·k energy per rotary pair and its band (high / low / spread). For each variant and pair: the ratio
of its frequency to the original (1 = untouched, 1/F = interpolated) and whether it reaches rotation angles never
seen in training (its angle at ``to`` − 1 exceeds its angle at L − 1, for a pair that had not completed a turn
within L). Per head: the energy-weighted change of rotation speed (``exposure``, in octaves) and the energy share
in pairs with unseen angles. The verdict per variant compares the break rate of low-band and high-band heads.

Example::

    >>> import attnpos
    >>> res = stretch(attnpos.load("ref:rope"), to=256, scalings=["linear:2", "yarn:2"], n_sequences=3, n_boot=20)
    >>> [v["name"] for v in res.variants], len(res.heads), res.training_length
    (['unscaled', 'linear:2', 'yarn:2'], 16, 128)

Command line: ``attnpos stretch ref:rope --to 512 --scaling linear:4 --scaling dynamic --scaling yarn:4``.
"""

from __future__ import annotations

import copy
import dataclasses
import math
import sys
import warnings
from typing import Any

import numpy as np
import torch

from .capture import LayerCapture, Reducer
from .core import keys, scalings, settings, thresholds
from .errors import AttnposError
from .length import RangeWeights, bin_edges, loss_summary, loss_table, role_rows, sequences, training_length_of
from .results.stretch import CAUTION, StretchResult  # noqa: F401  (CAUTION: this stage's caution)

SEQUENCES = settings.STRETCH_SEQUENCES
BOOT = settings.STRETCH_BOOT
DEFAULT_SCALINGS = ("linear", "dynamic", "yarn")
#: the slope is fitted over distances 0 … D with D = min(L // 2, SLOPE_MAX_DISTANCE): the near distances where local
#: patterns live, the same window inside and past the training length
SLOPE_MAX_DISTANCE = 64
#: with no head in the low or the high band, the verdict compares the mean low-band energy share of broken and kept
#: heads; a gap under 5 points is within what a different set of texts moves it (judgement call)
LOW_SHARE_GAP = 0.05
STATS = ("previous", "first", "entropy", "slope")
THRESHOLD = {"previous": thresholds.STRETCH_MASS, "first": thresholds.STRETCH_MASS,
             "entropy": thresholds.STRETCH_ENTROPY, "slope": thresholds.STRETCH_SLOPE}


def threshold(stat: str, reference: float) -> float:
    """How far a statistic must move to count as a break (the slope's depends on the head's own slope)."""
    if stat == "slope":
        return max(thresholds.STRETCH_SLOPE, thresholds.STRETCH_SLOPE_RATIO * abs(reference))
    return THRESHOLD[stat]


def profile_edges(to: int) -> list[int]:
    """Distance buckets of the profile: 0, 1, 2–3, 4–7, … (edges; the last one ≥ ``to``)."""
    edges = [0, 1]
    while edges[-1] < to:
        edges.append(edges[-1] * 2)
    return edges


# --------------------------------------------------------------------------------------------------- reducers

class HeadRangeStats(Reducer):
    """Per text, site, head and query range (inside / past ``split``): sums and counts of the previous-token mass,
    first-token weight, entropy ratio, per-row score slope over distances 0 … D, and weight per distance bucket."""

    name = "stretch-stats"

    def __init__(self, split: int, edges, fit_distance: int):
        self.split, self.edges, self.D = int(split), [int(e) for e in edges], int(fit_distance)

    def begin(self, subject, units) -> None:
        self.keys = [(s.stack, s.layer) for s in subject.sites]
        self.index = {k: i for i, k in enumerate(self.keys)}
        N, S, H, B = len(units), len(self.keys), subject.n_heads, len(self.edges) - 1
        self.sums = {k: np.zeros((N, S, H, 2)) for k in STATS}
        self.counts = {k: np.zeros((N, S, 2)) for k in STATS}
        self.prof = np.zeros((N, S, H, 2, B))
        self.prof_n = np.zeros((N, S, 2, B))

    def update(self, cap: LayerCapture) -> None:
        w, A = cap.weights, cap.allowed
        n, T, _ = w.shape
        si, t = self.index[(cap.site.stack, cap.site.layer)], cap.text
        hs = slice(cap.head0, cap.head0 + n)
        i = torch.arange(T)
        ordinary = torch.from_numpy(~np.asarray(cap.unit.special[:T], dtype=bool))
        beyond = i >= self.split
        n_allowed = A.sum(-1)
        rows: dict[str, tuple[torch.Tensor, torch.Tensor]] = {}
        # previous-token mass and first-token weight (queries at index ≥ 1 that may see those keys)
        prev = torch.zeros(n, T)
        if T > 1:
            prev[:, 1:] = torch.diagonal(w, offset=-1, dim1=-2, dim2=-1)
        ok_prev = ordinary & (i >= 1) & torch.cat([torch.zeros(1, dtype=torch.bool),
                                                   torch.diagonal(A, offset=-1)]) if T > 1 else ordinary & False
        rows["previous"] = (prev, ok_prev)
        rows["first"] = (w[:, :, 0], ordinary & (i >= 1) & A[:, 0])
        ent = torch.special.entr(w).sum(-1) / torch.log(n_allowed.clamp_min(2).float())
        rows["entropy"] = (ent, ordinary & (n_allowed >= 2))
        # slope: queries with the whole window 0 … D visible
        D = self.D
        slope = torch.zeros(n, T)
        ok_slope = torch.zeros(T, dtype=torch.bool)
        if T > D:
            r = torch.arange(D, T)
            cols = r[:, None] - torch.arange(0, D + 1)[None, :]
            visible = A[r[:, None], cols].all(-1)
            s = cap.zeroed_scores()[:, r[:, None], cols].double()          # (n, R, D+1)
            c = torch.arange(0, D + 1, dtype=torch.float64) - D / 2
            slope[:, D:] = (-(s * c).sum(-1) / (c * c).sum()).float()
            ok_slope[D:] = visible
        rows["slope"] = (slope, ordinary & ok_slope)
        for k, (vals, ok) in rows.items():
            for part, sel in ((0, ok & ~beyond), (1, ok & beyond)):
                self.sums[k][t, si, hs, part] += vals[:, sel].double().sum(-1).numpy()
                if cap.head0 == 0:
                    self.counts[k][t, si, part] += float(sel.sum())
        # weight per distance bucket: C[i, k] = Σ_{j ≥ k} w[i, j]; weight at distance < e = C[i, max(i − e + 1, 0)]
        C = w.flip(-1).cumsum(-1).flip(-1)
        below = []
        for e in self.edges:
            if e == 0:
                below.append(torch.zeros(n, T))
                continue
            k = (i - e + 1).clamp_min(0)
            below.append(C[:, i, k])
        ok_q = ordinary
        for b in range(len(self.edges) - 1):
            mass = below[b + 1] - below[b]
            pairs = (torch.minimum(torch.tensor(self.edges[b + 1]), i + 1)
                     - torch.minimum(torch.tensor(self.edges[b]), i + 1)).double()
            for part, sel in ((0, ok_q & ~beyond), (1, ok_q & beyond)):
                self.prof[t, si, hs, part, b] += mass[:, sel].double().sum(-1).numpy()
                if cap.head0 == 0:
                    self.prof_n[t, si, part, b] += float(pairs[sel].sum())

    def result(self) -> "HeadRangeStats":
        return self


class _Tick(Reducer):
    """Moves a progress bar by one per text (on the first layer's first head chunk)."""

    name = "tick"

    def __init__(self, bar):
        self.bar = bar

    def begin(self, subject, units) -> None:
        self.first = (subject.sites[0].stack, subject.sites[0].layer)

    def update(self, cap: LayerCapture) -> None:
        if cap.head0 == 0 and (cap.site.stack, cap.site.layer) == self.first and self.bar is not None:
            self.bar.update(1)


# --------------------------------------------------------------------------------------------------- helpers

def _ratio(sums: np.ndarray, counts: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return sums / np.where(counts > 0, counts, np.nan)


def _boot_ratio(sums: np.ndarray, counts: np.ndarray, idx: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """90% interval of Σ sums / Σ counts over sequences resampled (axis 0) by ``idx`` (n_boot, n)."""
    shape = sums.shape[1:]
    if idx is None:
        nan = np.full(shape, np.nan)
        return nan, nan
    s = sums[idx].sum(1)                                  # (n_boot, …)
    c = counts[idx].sum(1)
    while c.ndim < s.ndim:
        c = c[..., None]
    r = _ratio(s, np.broadcast_to(c, s.shape))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanpercentile(r, 5, axis=0), np.nanpercentile(r, 95, axis=0)


def _range_stats(st: HeadRangeStats, part: int, idx) -> dict:
    """Per stat: (value, lo, hi) arrays of shape (sites, heads) for one query range."""
    out = {}
    for k in STATS:
        s, c = st.sums[k][..., part], st.counts[k][..., part]
        val = _ratio(s.sum(0), c.sum(0)[:, None])
        lo, hi = _boot_ratio(s, c, idx)
        out[k] = (val, lo, hi)
    prof = _ratio(st.prof[..., part, :].sum(0), st.prof_n[..., part, :].sum(0)[:, None, :])
    out["profile"] = prof
    return out


def _f(x) -> float | None:
    return None if x is None or not np.isfinite(x) else float(x)


def _rope_facts(config) -> tuple[float, int, dict]:
    rp = getattr(config, "rope_parameters", None) or {}
    if not isinstance(rp, dict) or any(isinstance(v, dict) for v in rp.values()):
        raise AttnposError("This checkpoint sets rope parameters per layer type; attnpos stretch handles one set of "
                           "rope parameters for the whole model only.")
    theta = rp.get("rope_theta", getattr(config, "rope_theta", None))
    if theta is None:
        raise AttnposError("The model config has no rope_theta, so the rotary frequencies cannot be rescaled.")
    head_dim = getattr(config, "head_dim", None) or config.hidden_size // config.num_attention_heads
    dim = int(head_dim * float(rp.get("partial_rotary_factor", getattr(config, "partial_rotary_factor", 1.0) or 1.0)))
    return float(theta), dim, dict(rp)


def variant_subject(subject, v: scalings.Variant, L: int):
    """The checkpoint rebuilt with the variant's rope parameters (transformers' own rotary code) and its weights
    unchanged, as a new :class:`~attnpos.subject.Subject`; the unscaled variant is the subject itself."""
    from .subject import from_model

    if v.kind == "none":
        return subject, {}
    model = subject.model
    cfg = copy.deepcopy(model.config)
    _, _, base = _rope_facts(cfg)
    rp, mpe = v.rope_parameters(base, L)
    cfg.rope_parameters = rp
    if mpe:
        cfg.max_position_embeddings = int(mpe)
    from transformers.utils import logging as hf_logging

    level = hf_logging.get_verbosity()
    hf_logging.set_verbosity_error()          # transformers' notes on the new rope parameters are not the user's
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            new = type(model)(cfg)
    finally:
        hf_logging.set_verbosity(level)
    weights = next(model.parameters(), None)
    if weights is not None:
        new = new.to(weights.dtype)           # the variant keeps the weights' dtype (--dtype), as the checkpoint does
    missing, unexpected = new.load_state_dict(model.state_dict(), strict=False)
    tied = set(getattr(new, "_tied_weights_keys", None) or [])
    missing = [m for m in missing if m not in tied]
    if missing or unexpected:
        raise AttnposError(f"Rebuilding {subject.name} with {v.name} left weights unmatched ({', '.join((missing + unexpected)[:4])}); "
                           "attnpos cannot stretch this architecture.")
    new.eval()
    vs = from_model(new, subject.tokenizer, name=f"{subject.name} [{v.name}]", path=subject.path,
                    scheme=subject.schemes, training_length=L)
    return vs, {"rope_parameters": rp, "max_position_embeddings": mpe}


def _model_frequencies(model) -> tuple[np.ndarray | None, float | None]:
    """The inverse frequencies and attention scaling the model's rotary module holds (after a forward pass)."""
    for _, m in model.named_modules():
        inv = getattr(m, "inv_freq", None)
        if isinstance(inv, torch.Tensor):
            return inv.detach().double().numpy(), float(getattr(m, "attention_scaling", 1.0))
    return None, None


def _truncated(units, L: int, k: int):
    out = []
    for u in units[:k]:
        out.append(dataclasses.replace(u, ids=list(u.ids[:L]), tokens=list(u.tokens[:L]),
                                       special=np.asarray(u.special[:L], dtype=bool)))
    return out


def _rotation(v: scalings.Variant, theta: float, dim: int, L: int, to: int) -> dict:
    base = scalings.default_inv_freq(theta, dim)
    new = scalings.inv_freq(v, theta, dim, L, to)
    ratio = new / base
    trained = base * (L - 1)
    reached = new * (to - 1)
    unseen = (reached > trained * (1 + 1e-9)) & (trained < 2 * math.pi)
    return {"ratio": ratio, "unseen": unseen, "octaves": np.abs(np.log2(ratio))}


def _band_verdict(heads: list[dict], vname: str) -> dict:
    counts: dict[str, list[int]] = {}
    exp_b, exp_k = [], []
    for h in heads:
        cell = h["variants"][vname]
        c = counts.setdefault(h.get("band") or "unknown", [0, 0])
        c[0] += int(cell["broken"])
        c[1] += 1
        if cell.get("exposure") is not None:          # heads of layers without RoPE have no bands
            (exp_b if cell["broken"] else exp_k).append(cell["exposure"])
    lo, hi = counts.get("low"), counts.get("high")
    rate = lambda c: c[0] / c[1] if c and c[1] else None  # noqa: E731
    rl, rh = rate(lo), rate(hi)
    low_b = [h["low_share"] for h in heads if h["variants"][vname]["broken"] and h.get("low_share") is not None]
    low_k = [h["low_share"] for h in heads if not h["variants"][vname]["broken"] and h.get("low_share") is not None]
    if rl is None or rh is None:
        # no head in one of the bands: compare the low-band energy share of broken and kept heads instead
        if not low_b or not low_k:
            follows, why = None, ("every head breaks" if low_b else "no head breaks") + ", nothing to compare"
        else:
            mb, mk = float(np.mean(low_b)), float(np.mean(low_k))
            follows = None if abs(mb - mk) < LOW_SHARE_GAP else mb > mk
            why = (f"no {'low' if rl is None else 'high'}-band head; broken heads hold {mb:.0%} of their energy in "
                   f"the low band on average, kept heads {mk:.0%}"
                   + (" (too close to tell)" if follows is None else ""))
    elif rl == rh:
        follows, why = None, "low-band and high-band heads break at the same rate"
    else:
        follows = rl > rh
        why = (f"low-band heads break at {rl:.0%} ({lo[0]}/{lo[1]}), high-band heads at {rh:.0%} ({hi[0]}/{hi[1]})")
    if exp_b and exp_k:
        why += (f"; energy-weighted change of rotation speed: broken heads {np.mean(exp_b):.2f} octaves, kept "
                f"{np.mean(exp_k):.2f}")
    return {"counts": {b: {"broken": c[0], "heads": c[1]} for b, c in counts.items()}, "follows": follows,
            "low_share_broken": _f(np.mean(low_b)) if low_b else None,
            "low_share_kept": _f(np.mean(low_k)) if low_k else None,
            "why": why, "exposure_broken": _f(np.mean(exp_b)) if exp_b else None,
            "exposure_kept": _f(np.mean(exp_k)) if exp_k else None}


# --------------------------------------------------------------------------------------------------- main

def stretch(subject, texts=None, *, to: int, scalings: Any = None,
            training_length: int | None = None, n_sequences: int = SEQUENCES, bins: int = settings.LENGTH_BINS,
            n_boot: int = BOOT, seed: int = 0, progress: bool | None = None) -> StretchResult:
    """Rerun a causal RoPE checkpoint under each scaling and see which heads keep their job past its training length.

    Args:
        subject: a :class:`~attnpos.subject.Subject`, a model folder or ``"ref:rope"``.
        texts: strings, Paths or RawTexts, joined and cut into sequences of exactly ``to`` tokens; None uses freshly
            generated documents of the reference corpus scenarios.
        to: sequence length in tokens, past the training length.
        scalings: variants as written for ``--scaling`` (``"linear:4"``, ``"dynamic"``, ``"yarn:4"``,
            ``"llama3:8"``) or :class:`~attnpos.core.scalings.Variant` objects; default linear, dynamic, yarn.
        training_length: the context the model was trained on, when the model does not record it.
        n_sequences: at most this many sequences (each variant reads all of them).
        bins: about this many position bins for the binned loss.
        n_boot: bootstrap resamples (over sequences) for every interval.
        progress: a progress bar on stderr (default: when stderr is a terminal).

    Returns a :class:`~attnpos.results.stretch.StretchResult`.
    """
    from .bands import rope_bands
    from .capture import record
    from .core import scalings as sc
    from .subject import Subject, load

    wanted = scalings
    if not isinstance(subject, Subject):
        subject = load(subject)
    rope_sites = [s for s in subject.sites if s.scheme == "rope"]
    if not rope_sites:
        raise AttnposError(sc.refusal(subject.scheme, subject.name))
    if not subject.causal or subject.is_encoder_decoder:
        raise AttnposError(f"{subject.name} is not a causal language model; attnpos stretch measures next-token loss "
                           "and needs one.")
    theta, dim, base = _rope_facts(subject.model.config)
    done = sc.already_scaled(base)
    if done:
        raise AttnposError(f"{subject.name} already uses {done} rope scaling; attnpos stretch starts from a plain "
                           "RoPE checkpoint (rope_type default).")
    L, source = training_length_of(subject, training_length)
    to = int(to)
    sc.check_request(to, L, source)
    stretch_by = to / L
    specs = [wanted] if isinstance(wanted, (str, sc.Variant)) else list(wanted or DEFAULT_SCALINGS)
    variants = [sc.UNSCALED]
    for w in specs:
        v = w if isinstance(w, sc.Variant) else sc.parse(w, stretch_by)
        if any(o.name == v.name for o in variants):
            raise AttnposError(f"The scaling {v.name} is given twice; name each variant once.")
        variants.append(v)
    units, notes = sequences(subject, texts, to, n_sequences)
    if any(v.kind == "dynamic" for v in variants):
        notes.append("dynamic: transformers rescales the frequencies from the length of the whole sequence read, so "
                     f"under it even the positions inside the training length are read with the {to}-token "
                     "frequencies (its loss there differs from the unscaled model's).")
    n = len(units)
    edges_loss = bin_edges(to, L, bins)
    D = max(1, min(L // 2, SLOPE_MAX_DISTANCE))
    pedges = profile_edges(to)
    at = tuple(k for k in (1, 2, 4, 8, 16, 32) if k * L <= to)
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, n, (n_boot, n)) if n >= 2 and n_boot else None
    if idx is None:
        notes.append("Fewer than two sequences or no resamples: no intervals, so only role changes count as breaks.")

    show = progress if progress is not None else sys.stderr.isatty()
    bar = None
    if show:
        from tqdm.auto import tqdm

        bar = tqdm(total=n * len(variants), desc=f"stretch {subject.name}", unit="seq", file=sys.stderr)
    runs: list[dict] = []
    try:
        for v in variants:
            if bar is not None:
                bar.set_postfix_str(v.name)
            vs, facts = variant_subject(subject, v, L)
            stats = HeadRangeStats(L, pedges, D)
            rec = record(vs, units=units, reducers=[stats, RangeWeights(L), _Tick(bar)], token_loss=True,
                         progress=False)
            tab = loss_table(units, rec.token_loss)
            if tab is None:
                raise AttnposError(f"{subject.name} gave no next-token loss (no language-model head).")
            loss, lo, hi, summ, lnotes = loss_summary(tab, edges_loss, to, L, n_boot, seed, at=at)
            for note in lnotes:
                if note not in notes:
                    notes.append(note)
            mine = sc.inv_freq(v, theta, dim, L, to)
            held, scaling = _model_frequencies(vs.model)
            err = None if held is None or len(held) != len(mine) else float(np.max(np.abs(held / mine - 1)))
            if err is not None and err > 1e-4:
                notes.append(f"{v.name}: the model's rotary frequencies differ from attnpos's formula by up to "
                             f"{err:.2g} (relative); the measurement used the model's own.")
            runs.append({"variant": v, "facts": facts, "loss": (loss, lo, hi, summ), "stats": rec.results["stretch-stats"],
                         "roles": rec.results["range-weights"], "subject": vs, "freq_error": err,
                         "attention_scaling": scaling})
            if vs is not subject:
                del vs, rec
    finally:
        if bar is not None:
            bar.close()

    # the bands of the unscaled model at its training length
    bands = rope_bands(subject, units=_truncated(units, L, settings.STRETCH_BAND_TEXTS))
    band_of = {(h["stack"], h["layer"], h["head"]): h for h in bands.heads}
    btheta = np.array([p["theta"] for p in bands.pairs], float)
    ours = sc.default_inv_freq(theta, dim)
    if len(btheta) == len(ours) and np.isfinite(btheta).all() and not np.allclose(btheta, ours, rtol=1e-3):
        notes.append("The frequencies read from the model's cos/sin differ from rope_theta's; the band rotation "
                     "table uses rope_theta's.")
    rotation = {r["variant"].name: _rotation(r["variant"], theta, dim, L, to) for r in runs}

    ref = _range_stats(runs[0]["stats"], 0, idx)
    ref_roles = role_rows(subject, runs[0]["roles"]["inside"])
    per_variant = []
    for r in runs:
        per_variant.append((_range_stats(r["stats"], 1, idx), role_rows(r["subject"], r["roles"]["beyond"])))
    sites = runs[0]["stats"].keys
    heads = []
    for k, row in enumerate(ref_roles):
        stack, layer, h = row["stack"], row["layer"], row["head"]
        si = sites.index((stack, layer))
        b = band_of.get((stack, layer, h))
        shares = np.asarray(b["shares"], float) if b else None
        rstats = {s: _f(ref[s][0][si, h]) for s in STATS}
        rint = {s: [_f(ref[s][1][si, h]), _f(ref[s][2][si, h])] for s in STATS}
        entry = {"stack": stack, "layer": layer, "head": h, "key": keys.head_key(stack, layer, h),
                 "band": b["band"] if b else None, "high_share": _f(b["high_share"]) if b else None,
                 "low_share": _f(b["low_share"]) if b else None,
                 "reference": {"stats": rstats, "intervals": rint, "role": row["stats"]["role"],
                               "profile": [_f(x) for x in ref["profile"][si, h]]},
                 "variants": {}}
        n_broken = 0
        for r, (vst, vroles) in zip(runs, per_variant):
            vname = r["variant"].name
            vrow = vroles[k]
            vals = {s: _f(vst[s][0][si, h]) for s in STATS}
            ints = {s: [_f(vst[s][1][si, h]), _f(vst[s][2][si, h])] for s in STATS}
            reasons = []
            if vrow["stats"]["role"] != row["stats"]["role"]:
                reasons.append(f"role {row['stats']['role']} → {vrow['stats']['role']}")
            for s in STATS:
                a, c = rstats[s], vals[s]
                if a is None or c is None or abs(c - a) < threshold(s, a):
                    continue
                (alo, ahi), (clo, chi) = rint[s], ints[s]
                if None in (alo, ahi, clo, chi):
                    continue
                if chi < alo or clo > ahi:
                    reasons.append(f"{s} {a:.3g} → {c:.3g}")
            rot = rotation[vname]
            exposure = float(np.dot(shares, rot["octaves"])) if shares is not None and len(shares) == len(rot["octaves"]) else None
            unseen = float(np.dot(shares, rot["unseen"])) if shares is not None and len(shares) == len(rot["unseen"]) else None
            broken = bool(reasons)
            n_broken += broken and r["variant"].kind != "none"
            entry["variants"][vname] = {"stats": vals, "intervals": ints, "role": vrow["stats"]["role"],
                                        "broken": broken, "reasons": reasons, "exposure": exposure,
                                        "unseen_share": unseen, "profile": [_f(x) for x in vst["profile"][si, h]]}
        entry["n_broken"] = int(n_broken)
        heads.append(entry)

    variants_out = []
    for r in runs:
        v = r["variant"]
        loss, lo, hi, summ = r["loss"]
        variants_out.append({**v.describe(), "rope_parameters": r["facts"].get("rope_parameters"),
                             "max_position_embeddings": r["facts"].get("max_position_embeddings"),
                             "attention_factor": sc.attention_factor(v), "model_attention_scaling": r["attention_scaling"],
                             "frequency_error": r["freq_error"], "loss": loss, "loss_lo": lo, "loss_hi": hi,
                             "loss_mean": summ.get("loss_mean"), "loss_at": summ.get("loss_at"),
                             "loss_at_interval": summ.get("loss_at_interval"), "bin_loss": summ.get("bin_loss"),
                             "broken": int(sum(h["variants"][v.name]["broken"] for h in heads))})
    pairs = []
    for m, p in enumerate(bands.pairs):
        pairs.append({"pair": m, "band": p["band"], "theta": _f(p["theta"]), "wavelength": _f(p["wavelength"]),
                      "ratio": {name: _f(rot["ratio"][m]) for name, rot in rotation.items()} if m < dim // 2 else {},
                      "unseen": {name: bool(rot["unseen"][m]) for name, rot in rotation.items()} if m < dim // 2 else {}})
    verdict = {r["variant"].name: _band_verdict(heads, r["variant"].name) for r in runs}
    settings_out = {"to": to, "n_sequences": n, "n_boot": n_boot, "seed": seed, "slope_distance": D,
                    "bins": len(edges_loss) - 1, "band_texts": min(settings.STRETCH_BAND_TEXTS, n),
                    "thresholds": {**THRESHOLD, "slope_ratio": thresholds.STRETCH_SLOPE_RATIO},
                    "reference": "the unscaled model on the queries inside the training length",
                    "measured": "queries past the training length under each variant",
                    "break": "role change, or a statistic moving by at least its threshold with non-overlapping 90% "
                             "intervals (sequences resampled)",
                    "position": "p = tokens read before the prediction = index of the predicted token (1 … to − 1)"}
    return StretchResult(model=subject.describe(), training_length=L, training_length_source=source, to=to,
                         position=list(range(1, to)), variants=variants_out, heads=heads, profile_edges=pedges,
                         pairs=pairs, band_verdict=verdict, settings=settings_out, notes=notes)
