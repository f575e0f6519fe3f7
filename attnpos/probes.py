"""Ridge probes: can absolute position be read off each layer's hidden states?

For every hidden-state layer (layer 0 = the embeddings output, layer ``l`` = the output of block ``l``), a ridge
regression maps the hidden vector of each ordinary token (special tokens such as BOS/CLS/SEP are left out) to

* its absolute position (the token's index in the sequence the model saw), and
* its log-position, ``log(1 + position)``.

**Held out by text.** Tokens of one text are never split between fitting and scoring: the outer split is a
``GroupKFold`` over texts (the windows of one long text form one group), and the ridge penalty is chosen from a
small grid by an inner ``GroupKFold`` over the training texts only. R² is pooled over the held-out predictions.

**Control** (Hewitt & Liang 2019, control tasks): the same probe fitted to positions shuffled within each text.
The shuffled label no longer depends on the hidden state, so its held-out R² stays near zero unless the
procedure leaks; ``selectivity = r2 − control_r2``.

**Untrained copy.** Causal attention alone makes position decodable: a query that spreads its weight evenly over
its prefix averages over more tokens the later it sits, so even random weights carry position (Kazemnejad et al.
2023; Zuo et al. 2025). ``untrained_r2`` is the same probe on an untrained copy of the same architecture (same
config, fresh random initialisation from ``seed``); "learned position" means clearly above it.

**Counting check** (causal models): which attention layers have ``counting`` heads (near-uniform over the causal
prefix, the criterion of :mod:`attnpos.roles`), in the trained model and in its untrained copy, and the first
hidden layer where the probe beats the untrained copy (Haviv et al. 2022; Kazemnejad et al. 2023).

A probe shows that position is *decodable* from a layer, not that the model *uses* it.

Example::

    >>> res = attnpos.probes.probe(attnpos.load("ref:none"))            # doctest: +SKIP
    >>> res.table()[["layer", "r2", "control_r2", "untrained_r2"]]       # doctest: +SKIP
    >>> res.counting["first_layer_above_untrained"]                      # doctest: +SKIP

Command line: ``attnpos probe ref:none --json probe.json``.
"""

from __future__ import annotations

import copy
from typing import Any, Sequence

import numpy as np
import torch

from .core import progress as _progress, settings
from .errors import AttnposError
from .results.probe import CAUTION, ProbeResult  # noqa: F401  (CAUTION: this stage's caution)


#: ridge penalties tried (on standardised features), chosen per target on the training texts only
ALPHAS = tuple(float(a) for a in np.logspace(-2, 5, 8))
#: outer folds (over texts) and inner folds (over training texts, for the penalty)
FOLDS = settings.PROBE_FOLDS
INNER_FOLDS = 4
#: the probe "beats the untrained copy" at a layer when its held-out R² is higher by at least this much. A judgement
#: call: fold-to-fold differences of pooled R² on a few thousand tokens are a few hundredths.
ABOVE_UNTRAINED = 0.05
#: a layer counts as "position decodable" when the held-out R² is at least this (judgement call: half the variance).
DECODABLE_R2 = 0.5


# --------------------------------------------------------------------------------------------------- the fit

class _Sums:
    """Sums of the features and targets of a set of rows — count, Σx, Σxxᵀ, Σy, Σxyᵀ — after centring every
    column on its mean over all rows (so the sums stay small and a column that is constant everywhere is exactly 0).
    A fold's training sums are the sums of all rows less those of its held-out rows: each row is read once per
    fold it is held out of, not once per fold it is trained on, and nothing of size n × d is copied."""

    __slots__ = ("n", "sx", "sxx", "sy", "sxy")

    def __init__(self, n, sx, sxx, sy, sxy):
        self.n, self.sx, self.sxx, self.sy, self.sxy = n, sx, sxx, sy, sxy

    @classmethod
    def of(cls, Xc: np.ndarray, Yc: np.ndarray, rows=None) -> "_Sums":
        x, y = (Xc, Yc) if rows is None else (Xc[rows], Yc[rows])
        return cls(len(x), x.sum(0), x.T @ x, y.sum(0), x.T @ y)

    def __sub__(self, other: "_Sums") -> "_Sums":
        return _Sums(self.n - other.n, self.sx - other.sx, self.sxx - other.sxx, self.sy - other.sy,
                     self.sxy - other.sxy)

    def standardised(self):
        """What ridge on these rows needs after standardising them (each feature to mean 0 and standard deviation
        1 over the rows; a feature with no spread, below 1e-8 of the largest, is only centred): the features' means
        and standard deviations, the targets' mean, the standardised Gram matrix X̃ᵀX̃ and X̃ᵀ(y − ȳ)."""
        n = self.n
        mu, ym = self.sx / n, self.sy / n
        C = self.sxx - n * np.outer(mu, mu)
        sd = np.sqrt(np.clip(np.diag(C) / n, 0.0, None))
        sd = np.where(sd > 1e-8 * max(float(sd.max()), 1e-30), sd, 1.0)
        G = C / sd[:, None] / sd[None, :]
        B = (self.sxy - n * np.outer(mu, ym)) / sd[:, None]
        return mu, sd, ym, G, B


def _ridge_weights(G: np.ndarray, B: np.ndarray, alpha: float) -> np.ndarray:
    """(G + αI)⁻¹ B by a Cholesky factorisation (G a Gram matrix, α > 0); an eigen-decomposition if rounding makes
    the factorisation fail. torch's LAPACK calls release the GIL, so the layers' probes in two threads run on two
    cores (scipy's wrappers hold it: measured 1.2× from a second thread against 1.9× here)."""
    M = torch.from_numpy(G).clone()
    M.diagonal().add_(alpha)
    L, info = torch.linalg.cholesky_ex(M)
    if int(info) == 0:
        return torch.cholesky_solve(torch.from_numpy(np.ascontiguousarray(B)), L).numpy()
    lam, V = np.linalg.eigh(G)
    return V @ ((V.T @ B) / (np.clip(lam, 0.0, None) + alpha)[:, None])


def _centred(X: np.ndarray, Y: np.ndarray):
    return X - X.mean(0), Y - Y.mean(0)


def _choose_alpha(X: np.ndarray, Y: np.ndarray, groups: np.ndarray, alphas: Sequence[float]) -> np.ndarray:
    """Per target column, the penalty with the lowest pooled squared error over an inner GroupKFold (on
    standardised features; see :func:`_choose_alpha_in`)."""
    Xc, Yc = _centred(np.asarray(X, dtype=np.float64), np.asarray(Y, dtype=np.float64))
    return _choose_alpha_in(Xc, Yc, groups, np.arange(len(Xc)), _Sums.of(Xc, Yc), alphas)


def _choose_alpha_in(Xc, Yc, groups, rows, sums: "_Sums", alphas: Sequence[float]) -> np.ndarray:
    """The penalty per target column chosen on the rows ``rows`` (whose sums are ``sums``) by an inner GroupKFold
    over their groups: exact ridge for every penalty, fitted on each inner fold's standardised training rows and
    scored on its held-out rows."""
    from sklearn.model_selection import GroupKFold

    alphas = np.asarray(alphas, dtype=float)
    k = Yc.shape[1]
    if len(alphas) == 1:
        return np.full(k, alphas[0])
    g = groups[rows]
    n_groups = len(np.unique(g))
    if n_groups < 2:
        return np.full(k, alphas[len(alphas) // 2])
    sse = np.zeros((len(alphas), k))
    for _, te in GroupKFold(n_splits=min(INNER_FOLDS, n_groups)).split(rows, rows, g):
        te_rows = rows[te]
        mu, sd, ym, G, B = (sums - _Sums.of(Xc, Yc, te_rows)).standardised()
        Xte = (Xc[te_rows] - mu) / sd
        for a_i, a in enumerate(alphas):
            pred = Xte @ _ridge_weights(G, B, a) + ym
            sse[a_i] += ((Yc[te_rows] - pred) ** 2).sum(0)
    return alphas[sse.argmin(0)]


def cross_validated(X: np.ndarray, Y: np.ndarray, groups: np.ndarray, *, alphas: Sequence[float] = ALPHAS,
                    folds: int = FOLDS) -> dict:
    """Held-out ridge predictions of the columns of ``Y`` from ``X``, split by ``groups``.

    Returns ``{"pred": (n, k), "r2": (k,), "alpha": (k,) median chosen penalty}``. R² is pooled over all held-out
    predictions: 1 − Σ(y − ŷ)² / Σ(y − ȳ)²; it is negative when the probe does worse than the mean."""
    from .reducers import blas_one_thread

    # small matrices: one BLAS thread is faster, and much faster on a busy machine (scoped to this call)
    with blas_one_thread():
        return _cross_validated(X, Y, groups, alphas, folds)


def _cross_validated(X, Y, groups, alphas, folds) -> dict:
    """The outer GroupKFold: per fold, the penalty chosen on the training texts only, then ridge on the
    standardised training rows (what scikit-learn's ``Ridge(fit_intercept=True)`` fits on them, solved here from
    the fold's sums) predicts the held-out rows."""
    from sklearn.model_selection import GroupKFold

    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim == 1:
        Y = Y[:, None]
    groups = np.asarray(groups)
    n_groups = len(np.unique(groups))
    if n_groups < 2:
        raise AttnposError("The probe needs at least two texts to hold one out; pass more texts.")
    y_mean = Y.mean(0)
    Xc, Yc = X - X.mean(0), Y - y_mean
    del X
    total = _Sums.of(Xc, Yc)
    pred = np.zeros_like(Yc)
    chosen = []
    for tr, te in GroupKFold(n_splits=min(folds, n_groups)).split(Xc, Yc, groups):
        train = total - _Sums.of(Xc, Yc, te)
        a = _choose_alpha_in(Xc, Yc, groups, tr, train, alphas)
        chosen.append(a)
        mu, sd, ym, G, B = train.standardised()
        Xte = (Xc[te] - mu) / sd
        for value in np.unique(a):
            cols = np.flatnonzero(a == value)
            pred[np.ix_(te, cols)] = Xte @ _ridge_weights(G, B[:, cols], float(value)) + ym[cols]
    pred += y_mean
    sst = ((Y - Y.mean(0)) ** 2).sum(0)
    r2 = 1.0 - ((Y - pred) ** 2).sum(0) / np.where(sst > 0, sst, np.nan)
    return {"pred": pred, "r2": r2, "alpha": np.median(np.stack(chosen), axis=0)}


# --------------------------------------------------------------------------------------------------- data

def _group_keys(units) -> tuple[np.ndarray, int, list[str]]:
    """Group id per unit: the windows of one source text share a group."""
    notes = []
    keys = []
    for u in units:
        base = u.name.rsplit("#", 1)[0] if u.window is not None else u.name
        keys.append((u.source, base))
    uniq = {k: i for i, k in enumerate(dict.fromkeys(keys))}
    g = np.array([uniq[k] for k in keys])
    n_texts = len(uniq)
    if n_texts < 2 and len(units) >= 2:
        notes.append("Only one text was given, so its windows are held out one from another; they share the "
                     "text's style, so R² may be optimistic. Pass two or more texts.")
        g = np.arange(len(units))
    return g, n_texts, notes


def _dataset(units, hidden: list[np.ndarray], seed: int):
    """Stack ordinary tokens: X per layer, position, log-position, shuffled position, group per token. The
    entries of ``hidden`` are released (set to None) as they are copied into X."""
    rng = np.random.default_rng(seed)
    pos, shuf, unit_of, keep_idx = [], [], [], []
    for k, (u, h) in enumerate(zip(units, hidden)):
        T = min(len(u), h.shape[1])
        idx = np.flatnonzero(~np.asarray(u.special[:T], dtype=bool))
        keep_idx.append(idx)
        if len(idx) == 0:
            continue
        pos.append(idx)
        shuf.append(rng.permutation(idx))           # positions shuffled within the text (control)
        unit_of.append(np.full(len(idx), k))
    if not pos:
        raise AttnposError("The texts have no ordinary tokens (all special) to probe.")
    first = next(h for h in hidden if h is not None)
    X = np.empty((first.shape[0], sum(len(i) for i in keep_idx), first.shape[2]), dtype=first.dtype)  # (layers+1, n, d)
    at = 0
    for k, idx in enumerate(keep_idx):
        X[:, at: at + len(idx)] = hidden[k][:, idx]
        at += len(idx)
        hidden[k] = None
    return X, np.concatenate(pos), np.concatenate(shuf), np.concatenate(unit_of)


def untrained_copy(subject, seed: int = 0, *, table=None):
    """The same architecture with fresh random weights (same config, same tokenizer), as a Subject.

    Built with the model's own class from a copy of its config under a fixed torch seed. A sinusoidal position
    table is part of the architecture, not learned, so it is copied over (``table``: that table, when the
    subject's own weights were released before, see :func:`release_weights`)."""
    from .subject import from_model

    model = subject.model
    config = copy.deepcopy(model.config)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed))
        try:
            fresh = type(model)(config)
        except Exception as exc:  # noqa: BLE001 - wrap with context
            raise AttnposError(f"Could not build an untrained copy of {type(model).__name__} from its config "
                               f"({type(exc).__name__}: {exc}). Pass untrained=False to skip that baseline.") from exc
    fresh.to(torch.float32).eval()
    if "sinusoidal" in subject.schemes:
        from .core.schemes import position_table

        src, dst = (position_table(model) if table is None else table), position_table(fresh)
        if src is not None and dst is not None and src.shape == dst.shape and src.device.type != "meta":
            with torch.no_grad():
                dst.copy_(src)
    return from_model(fresh, subject.tokenizer, name=f"{subject.name} (untrained copy, seed {seed})",
                      scheme=[s.scheme for s in subject.sites], training_length=subject.training_length)


def release_weights(subject):
    """Free the subject's weights (every parameter and buffer moves to torch's ``meta`` device, which holds no
    data): for a caller that owns the subject and needs nothing more of it, so that the probe's untrained copy
    never sits in memory beside the trained model. Returns a copy of the model's sinusoidal position table (part
    of the architecture, which the untrained copy keeps), or None. The subject cannot run afterwards."""
    table = None
    if "sinusoidal" in subject.schemes:
        from .core.schemes import position_table

        t = position_table(subject.model)
        table = None if t is None else t.detach().clone()
    subject.model.to("meta")
    subject.notes.append("its weights were released after the probe recorded its hidden states "
                         "(probe(..., release_model=True)); the subject cannot run any more.")
    return table


def _counting_heads(subject, weights) -> "Any":
    from .roles import head_table

    table = head_table(subject, weights)
    table["counting"] = table["tags"].apply(lambda t: "counting" in (t or []))
    return table


def _counting_check(subject, table, table_untrained, layers: list[dict]) -> dict:
    n_layers = subject.n_layers
    H = subject.n_heads
    first_stack = subject.sites[0].stack
    t = table[table["stack"] == first_stack]
    tu = table_untrained[table_untrained["stack"] == first_stack] if table_untrained is not None else None
    per_layer = []
    heads = []
    for layer in range(n_layers):
        rows = t[t["layer"] == layer]
        c = rows[rows["counting"]]
        entry = {"attention_layer": layer, "feeds_hidden_layer": layer + 1, "counting_heads": int(len(c)),
                 "heads": H, "mean_entropy_ratio": float(rows["entropy_ratio"].mean())}
        if tu is not None:
            ru = tu[tu["layer"] == layer]
            entry["untrained_counting_heads"] = int(ru["counting"].sum())
            entry["untrained_mean_entropy_ratio"] = float(ru["entropy_ratio"].mean())
        per_layer.append(entry)
        for _, r in c.iterrows():
            heads.append({"layer": int(r["layer"]), "head": int(r["head"]), "entropy_ratio": float(r["entropy_ratio"])})
    with_counting = [e["attention_layer"] for e in per_layer if e["counting_heads"]]
    above = None
    for r in layers:
        u = r.get("untrained_r2")
        if u is not None and np.isfinite(u) and np.isfinite(r["r2"]) and r["r2"] >= u + ABOVE_UNTRAINED:
            above = r["layer"]
            break
    decodable = next((r["layer"] for r in layers if np.isfinite(r["r2"]) and r["r2"] >= DECODABLE_R2), None)
    parts = []
    if with_counting:
        parts.append("counting heads (entropy ≥ 0.9 of uniform over the prefix) in attention layer"
                     + ("s " if len(with_counting) > 1 else " ") + ", ".join(str(x) for x in with_counting)
                     + " (" + ", ".join(f"L{e['attention_layer']}: {e['counting_heads']}/{H}"
                                        + (f" vs {e['untrained_counting_heads']}/{H} untrained"
                                           if "untrained_counting_heads" in e else "")
                                        for e in per_layer if e["counting_heads"]) + ")")
    else:
        parts.append("no counting heads")
    if decodable is not None:
        parts.append(f"position first decodable (R² ≥ {DECODABLE_R2}) at hidden layer {decodable}")
    else:
        parts.append(f"position never decodable at R² ≥ {DECODABLE_R2}")
    if above is not None:
        parts.append(f"the probe first beats the untrained copy (by ≥ {ABOVE_UNTRAINED} R²) at hidden layer {above}"
                     + (f", the output of attention block {above - 1}" if above > 0 else ""))
    elif any(r.get("untrained_r2") is not None for r in layers):
        parts.append("the probe never beats the untrained copy by a clear margin: the position it decodes is what "
                     "the causal architecture gives for free")
    return {"per_layer": per_layer, "heads": heads, "layers_with_counting_heads": with_counting,
            "first_layer_decodable": decodable, "first_layer_above_untrained": above,
            "margin": ABOVE_UNTRAINED, "decodable_r2": DECODABLE_R2, "summary": "; ".join(parts) + ".",
            "sources": "Haviv et al. 2022; Kazemnejad et al. 2023"}


def _record(subject, units, want_weights: bool, progress: bool | None = None, bands=None):
    from .capture import record
    from .reducers import WeightStats

    reducers = ([WeightStats()] if want_weights else []) + ([bands] if bands is not None else [])
    return record(subject, units=units, reducers=reducers, hidden_states=True, progress=progress)


#: the RoPE bands are measured on the first texts only (up to this many windows)
BAND_TEXTS = 8


def _band_reducer(units):
    """A :class:`~attnpos.bands.BandEnergy` that reduces only the texts :func:`attnpos.bands.rope_bands` would be
    given (the first :data:`BAND_TEXTS` windows of two tokens or more), so the bands come from the probe's own
    recording instead of a second one; returns (reducer, number of those texts)."""
    from .bands import BandEnergy

    chosen = {t for t, u in enumerate(units[: max(2, min(len(units), BAND_TEXTS))]) if len(u) >= 2}

    class _SomeTexts(BandEnergy):
        def update(self, cap) -> None:
            if cap.text in chosen:
                super().update(cap)

    return _SomeTexts(), len(chosen)


#: the layers' probes run in this many threads (numpy's LAPACK releases the GIL; each thread's LAPACK on one core)
PROBE_THREADS = 2


def _probe_layers(X: np.ndarray, pos: np.ndarray, shuf: np.ndarray, groups: np.ndarray, alphas, folds: int,
                  with_targets: bool = True, desc: str = "ridge probes", show: bool | None = None) -> list[dict]:
    from concurrent.futures import ThreadPoolExecutor

    from .reducers import blas_one_thread

    Y = np.stack([pos, np.log1p(pos), shuf], axis=1).astype(np.float64) if with_targets else pos[:, None]

    def one(layer: int) -> dict:
        cv = _cross_validated(X[layer], Y, groups, alphas, folds)
        r = {"layer": layer, "r2": float(cv["r2"][0])}
        if with_targets:
            r.update(r2_log=float(cv["r2"][1]), control_r2=float(cv["r2"][2]),
                     selectivity=float(cv["r2"][0] - cv["r2"][2]),
                     mae=float(np.abs(cv["pred"][:, 0] - pos).mean()), alpha=float(cv["alpha"][0]))
        return r

    # one BLAS thread (numpy's and torch's) per worker, set once around the pool (the limits are process-wide:
    # nested limits in the workers would restore each other's setting)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        with blas_one_thread(), ThreadPoolExecutor(max_workers=PROBE_THREADS) as pool:
            return list(_progress.bar(pool.map(one, range(X.shape[0])), desc=desc, unit="layer", total=X.shape[0],
                                      show=show))
    finally:
        torch.set_num_threads(threads)


def probe(subject, texts=None, *, alpha: float | Sequence[float] | None = None, seed: int = 0, folds: int = FOLDS,
          untrained: bool = True, counting: bool = True, bands: bool = True, max_tokens: int | None = None,
          heads=None, release_model: bool = False, progress: bool | None = None) -> ProbeResult:
    """Fit ridge probes for absolute position on every hidden-state layer of ``subject``.

    Args:
        subject: a :class:`~attnpos.subject.Subject`, a model folder or ``"ref:<scheme>"``.
        texts: strings, Paths, RawTexts, or None for the bundled sample texts. At least two texts (the split is
            by text).
        alpha: one ridge penalty, a grid to choose from on the training texts, or None for :data:`ALPHAS`.
        seed: seed of the shuffled control and of the untrained copy's initialisation.
        folds: outer folds over texts (at most the number of texts).
        untrained: also probe an untrained copy of the same architecture (``untrained_r2``).
        counting: for causal models, link the probe to the counting heads (needs weight statistics).
        bands: for RoPE layers, add the frequency bands of :func:`attnpos.bands.rope_bands`.
        max_tokens: window length; by default the model's training length when known (positions the model was
            trained on), else its context limit.
        heads: a head table (e.g. ``attnpos.scan(...).heads``) to take the counting heads from; by default they
            are measured here with the same criterion (:mod:`attnpos.roles`) from weight statistics alone.
        release_model: free the subject's weights once its hidden states are recorded (:func:`release_weights`),
            so the untrained copy never sits beside them: the probe's peak memory drops by the model's size, and
            the subject cannot run afterwards. For a caller that owns the subject (the command line does this).
        progress: show progress bars (default: in a terminal or a notebook, see :mod:`attnpos.core.progress`).
    """
    from .subject import Subject, load
    from .texts import as_raw, prepare

    if not isinstance(subject, Subject):
        subject = load(subject)
    alphas = ALPHAS if alpha is None else ([float(alpha)] if np.isscalar(alpha) else [float(a) for a in alpha])
    if any(a <= 0 for a in alphas):
        raise AttnposError(f"Ridge penalties must be positive; got {alphas}.")
    notes: list[str] = []
    if max_tokens is None and subject.training_length:
        max_tokens = subject.training_length
        notes.append(f"Texts were cut into windows of the training length ({subject.training_length} tokens) so "
                     "the probe sees only positions the model was trained on; pass max_tokens (CLI --max-tokens) to change this.")
    units = prepare(subject, as_raw(texts), max_tokens=max_tokens, warn=False)
    groups_u, n_texts, gnotes = _group_keys(units)
    notes += gnotes
    if len(units) < 2:
        raise AttnposError("The probe holds texts out, so it needs at least two texts (or one text long enough to "
                           "be split into windows). Pass more texts with --text.")
    want_counting = counting and subject.causal
    _progress.note(f"probe: {len(units)} text windows; hidden states of {subject.name}", progress)
    band_run, band_texts = None, 0
    if bands and "rope" in subject.schemes:
        from .bands import rope_sites_of

        rope_sites_of(subject)
        band_run, band_texts = _band_reducer(units)
    rec = _record(subject, units, want_counting and heads is None, progress, bands=band_run)
    X, pos, shuf, unit_of = _dataset(units, rec.hidden, seed)
    table = release_weights(subject) if release_model else None
    groups = groups_u[unit_of]
    layers = _probe_layers(X, pos, shuf, groups, alphas, folds, desc="ridge probes", show=progress)
    del X
    table_u = None
    if untrained:
        _progress.note("probe: the same on an untrained copy (the baseline)", progress)
        fresh = untrained_copy(subject, seed=seed, table=table)
        rec_u = _record(fresh, units, want_counting, progress)
        Xu, _, _, _ = _dataset(units, rec_u.hidden, seed)
        for r, ru in zip(layers, _probe_layers(Xu, pos, shuf, groups, alphas, folds, with_targets=False,
                                               desc="ridge probes (untrained copy)", show=progress)):
            r["untrained_r2"] = ru["r2"]
        del Xu
        if want_counting:
            table_u = _counting_heads(fresh, rec_u.results["weights"])
        del fresh, rec_u
    else:
        for r in layers:
            r["untrained_r2"] = None
    counts = np.bincount(pos)
    span = counts[pos.min(): pos.max() + 1]
    positions = {"min": int(pos.min()), "max": int(pos.max()), "tokens_per_position_min": int(span.min()),
                 "tokens_per_position_median": float(np.median(span)), "tokens_per_position_max": int(span.max())}
    if span.min() < 10:
        notes.append(f"Some positions have fewer than 10 tokens ({int(span.min())} at least): the far end of the "
                     "range rests on few tokens. Longer or more texts fill it.")
    settings = {"alphas": list(alphas), "folds": int(min(folds, len(np.unique(groups)))), "inner_folds": INNER_FOLDS,
                "seed": seed, "n_texts": n_texts, "n_units": len(units), "n_tokens": int(len(pos)),
                "max_tokens": max_tokens, "control": "positions shuffled within each text (Hewitt & Liang 2019)",
                "untrained": ("same config, fresh random initialisation (torch seed "
                              f"{seed}), same tokenizer" if untrained else None),
                "r2": "pooled over held-out texts; position = token index in the window the model saw"}
    count_info = None
    if want_counting:
        if heads is not None:
            table = heads.copy()
            table["counting"] = table["tags"].apply(lambda t: "counting" in (t or []))
        else:
            table = _counting_heads(subject, rec.results["weights"])
        count_info = _counting_check(subject, table, table_u, layers)
    band_info = None
    if band_run is not None:
        from .bands import bands_from

        if not band_texts:
            raise AttnposError("The bands need texts of at least two tokens.")

        band_info = bands_from(subject, band_run, band_texts)
    return ProbeResult(model=subject.describe(), layers=layers, positions=positions, settings=settings,
                       counting=count_info, bands=band_info, notes=notes)
