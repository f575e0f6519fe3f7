"""Properties of the score split, on synthetic captures with random scores fed straight into SplitStats.

For any scores: shares lie in [0, 1] and sum to 1; adding a constant to a query's row changes nothing (the split
works within rows, which is what lets log-weights stand in for scores); the order of the texts does not matter.
And when scores are built exactly from the four named parts, nothing is left for the residual.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from attnpos.capture import LayerCapture
from attnpos.reducers import SplitStats
from attnpos.split import Split
from attnpos.subject import AttentionSite
from attnpos.texts import TextUnit

pytestmark = pytest.mark.hostile

SETTINGS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
N_HEADS = 3


def _site(causal: bool) -> AttentionSite:
    return AttentionSite(stack="main", layer=0, name="synthetic", module=torch.nn.Identity(), causal=causal,
                         scheme="none")


def _units(token_lists) -> list[TextUnit]:
    return [TextUnit(name=f"t{k}", source="<synthetic>", ids=list(ids), tokens=[str(i) for i in ids],
                     special=np.zeros(len(ids), dtype=bool)) for k, ids in enumerate(token_lists)]


def _allowed(T: int, causal: bool) -> torch.Tensor:
    full = torch.ones(T, T, dtype=torch.bool)
    return full.tril() if causal else full


def split_of(scores_per_text, token_lists, causal: bool):
    """Feed (H, T, T) score arrays (one per text) through SplitStats and fit the split (no bootstrap)."""
    site = _site(causal)
    subject = SimpleNamespace(sites=[site], n_heads=N_HEADS)
    units = _units(token_lists)
    red = SplitStats()
    red.begin(subject, units)
    for t, (sc, unit) in enumerate(zip(scores_per_text, units)):
        T = len(unit)
        A = _allowed(T, causal)
        s = torch.as_tensor(sc, dtype=torch.float32).masked_fill(~A, float("-inf"))
        w = torch.softmax(s, -1)
        red.update(LayerCapture(site=site, text=t, unit=unit, head0=0, n_heads=N_HEADS, scores=s, weights=w,
                                allowed=A, score_kind="scores"))
    return Split(n_boot=0).fit(red.result())


# scores on a 1/1024 grid and row constants that are whole numbers: adding them is exact in float32
grid = st.integers(-4096, 4096).map(lambda k: k / 1024.0)


@st.composite
def recordings(draw, max_texts=4, max_len=14):
    causal = draw(st.booleans())
    n_texts = draw(st.integers(1, max_texts))
    lengths = [draw(st.integers(3, max_len)) for _ in range(n_texts)]
    vocab = draw(st.integers(2, 6))
    tokens = [[draw(st.integers(0, vocab - 1)) for _ in range(T)] for T in lengths]
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    # a mix of structure and noise, with random strengths, so the parts' sizes vary widely between examples
    strengths = rng.uniform(0, 3, size=4) * (rng.random(4) < 0.8)
    scores = []
    for T, toks in zip(lengths, tokens):
        i, j = np.arange(T)[:, None], np.arange(T)[None, :]
        dist = rng.normal(size=2 * T)[i - j + T]                    # a free function of δ
        slot = rng.normal(size=T)[j]                                  # a free function of j
        cont = rng.normal(size=vocab)[np.asarray(toks)][None, :]      # a free function of the key token
        per_head = []
        for _ in range(N_HEADS):
            s = (strengths[0] * dist + strengths[1] * slot + strengths[2] * cont
                 + strengths[3] * rng.normal(size=(T, T)))
            per_head.append(np.round(s * 1024) / 1024)
        scores.append(np.stack(per_head))
    return scores, tokens, causal, rng


def _ok(fit):
    """Heads whose scores vary within rows (the others have no split: NaN shares)."""
    return np.isfinite(fit.shares[0]).all(-1)


@SETTINGS
@given(recordings())
def test_shares_lie_in_unit_interval_and_sum_to_one(rec):
    # Shapley 1953: the values of a game sum to the value of the whole (efficiency), and nested least-squares fits
    # never lose R² (textbook regression), so every increment, and every share, is ≥ 0
    scores, tokens, causal, _ = rec
    fit = split_of(scores, tokens, causal)
    sh = fit.shares[0]
    ok = _ok(fit)
    assert (sh[ok] >= -1e-12).all() and (sh[ok] <= 1 + 1e-12).all()
    np.testing.assert_allclose(sh[ok].sum(-1), 1.0, atol=1e-9)
    assert np.isnan(sh[~ok]).all()


@SETTINGS
@given(recordings(), st.integers(-64, 64))
def test_adding_a_constant_to_each_row_changes_nothing(rec, offset):
    # a free per-row effect a_i absorbs any row constant (Frisch–Waugh–Lovell: fitting with row fixed effects equals
    # fitting the within-row-demeaned data; textbook econometrics, common practice) — and softmax is invariant to it
    scores, tokens, causal, rng = rec
    base = split_of(scores, tokens, causal)
    shifted_scores = []
    for sc in scores:
        H, T, _ = sc.shape
        c = rng.integers(-64, 65, size=(H, T, 1)).astype(float) + offset     # c_i: one constant per head and row
        shifted_scores.append(sc + c)
    moved = split_of(shifted_scores, tokens, causal)
    ok = _ok(base)
    assert (_ok(moved) == ok).all()
    np.testing.assert_allclose(moved.shares[0][ok], base.shares[0][ok], atol=2e-4)
    pb, pm = base.profile[0][ok], moved.profile[0][ok]
    assert (np.isnan(pb) == np.isnan(pm)).all()
    scale = 1 + np.nanmax(np.abs(pb)) if np.isfinite(pb).any() else 1
    np.testing.assert_allclose(np.nan_to_num(pm), np.nan_to_num(pb), atol=2e-4 * scale)
    np.testing.assert_allclose(moved.slope[0][ok], base.slope[0][ok], atol=2e-4 * scale, equal_nan=True)


@SETTINGS
@given(recordings(max_texts=5), st.randoms(use_true_random=False))
def test_profile_does_not_depend_on_the_order_of_texts(rec, random):
    scores, tokens, causal, _ = rec
    order = list(range(len(scores)))
    random.shuffle(order)
    base = split_of(scores, tokens, causal)
    perm = split_of([scores[k] for k in order], [tokens[k] for k in order], causal)
    np.testing.assert_allclose(perm.profile, base.profile, atol=1e-9, rtol=1e-7, equal_nan=True)
    np.testing.assert_allclose(perm.shares, base.shares, atol=1e-9, equal_nan=True)
    np.testing.assert_allclose(perm.slope, base.slope, atol=1e-9, rtol=1e-7, equal_nan=True)


@SETTINGS
@given(recordings(max_len=15))
def test_scores_built_from_the_named_parts_leave_no_residual(rec):
    # a worked example: below 16 every distance and slot is its own bucket, so scores built as
    # a_i + d(δ) + g(j) + c(tok_j) lie in the model's span and least squares reproduces them exactly (R² = 1)
    _, tokens, causal, rng = rec
    scores = []
    vocab = max(max(t) for t in tokens) + 1
    d, g, c = rng.normal(size=40), rng.normal(size=20), rng.normal(size=vocab)
    for toks in tokens:
        T = len(toks)
        i, j = np.arange(T)[:, None], np.arange(T)[None, :]
        a = rng.normal(size=(T, 1))
        s = a + d[i - j + 20] + g[j] + c[np.asarray(toks)][None, :]
        scores.append(np.stack([s * (h + 1) for h in range(N_HEADS)]))
    fit = split_of(scores, tokens, causal)
    ok = _ok(fit)
    assert ok.any()
    np.testing.assert_allclose(fit.shares[0][ok][:, 3:], 0.0, atol=1e-4)   # neither pair nor residual
