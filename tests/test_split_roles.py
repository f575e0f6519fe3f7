"""The score split, slopes, the shift test and roles, checked against published formulas and planted heads."""

import numpy as np
import pytest
import torch

import attnpos
from attnpos.capture import record
from attnpos.reducers import SplitStats
from attnpos.split import Split

import tiny

TEXTS = [
    "The ferry to the north island leaves at seven and returns at noon on most days.",
    "Row three of the seed tray holds basil; row four holds thyme and a tag that says thyme.",
    "Entry 12: wind from the west, gusting. Entry 13: wind easing, rain by evening.",
    "Order 41: two rye loaves, one seeded. Order 42: four rolls, no seeds, pick up at eight.",
    "The keeper lit the lamp at dusk, wound the clock, and wrote the hour in the log.",
    "Hive two was quiet; hive three swarmed at noon and settled in the old pear tree.",
]


def _zero_qk_bloom(heads=4):
    m = tiny.build("bloom", heads=heads, layers=2, hidden=8 * heads)
    with torch.no_grad():
        for blk in m.transformer.h:
            att = blk.self_attention
            d = att.head_dim
            att.query_key_value.weight.view(heads, 3, d, -1)[:, :2] = 0
            att.query_key_value.bias.view(heads, 3, d)[:, :2] = 0
    return attnpos.from_model(m, tiny.tokenizer())


def _zero_qk_mpt(heads=4):
    m = tiny.build("mpt", heads=heads, layers=2, hidden=8 * heads)
    with torch.no_grad():
        for blk in m.transformer.blocks:
            d_model = blk.attn.Wqkv.weight.shape[1]
            blk.attn.Wqkv.weight[: 2 * d_model] = 0        # fused [q; k; v] rows: q and k
    s = attnpos.from_model(m, tiny.tokenizer())
    assert set(s.schemes) == {"alibi"}                      # detected from attn_config.alibi
    return s


@pytest.mark.parametrize("arch", ["bloom", "mpt"])
@pytest.mark.parametrize("heads", [4, 8])
def test_alibi_slopes_recovered(heads, arch):
    # Press, Smith & Lewis 2022 (ICLR), ALiBi: for n heads (a power of two) the slopes are the geometric sequence
    # starting at 2^(-8/n) with ratio 2^(-8/n). With q = k = 0 the scores are the ALiBi bias alone.
    s = _zero_qk_bloom(heads) if arch == "bloom" else _zero_qk_mpt(heads)
    rec = record(s, TEXTS[:3], [SplitStats()])
    fit = Split(n_boot=10).fit(rec)
    expected = np.array([2 ** (-8 / heads * (k + 1)) for k in range(heads)])
    for si in range(2):
        np.testing.assert_allclose(fit.slope[si], expected, rtol=0.02)
        assert (fit.shares[si, :, 0] > 0.99).all()          # distance share ≈ 1


def test_shares_sum_to_one_and_in_range():
    s = tiny.subject("llama")
    rec = record(s, TEXTS, [SplitStats()])
    fit = Split(n_boot=0).fit(rec)
    sh = fit.shares.reshape(-1, fit.shares.shape[-1])
    assert np.all(sh >= -1e-12) and np.all(sh <= 1 + 1e-12)
    np.testing.assert_allclose(sh.sum(1), 1.0, atol=1e-9)


def test_log_weights_give_the_same_split_as_scores():
    # the row constant is absorbed by a_i, so log-weights (scores minus the row's log-sum-exp) split identically
    s = tiny.subject("llama")
    a = Split(n_boot=0).fit(record(s, TEXTS[:3], [SplitStats()]))
    from attnpos.capture import LayerCapture

    class AsLogWeights(SplitStats):
        def update(self, cap: LayerCapture):
            lw = torch.log(cap.weights.clamp_min(1e-30)).masked_fill(~cap.allowed, float("-inf"))
            cap.scores = lw
            super().update(cap)

    b = Split(n_boot=0).fit(record(s, TEXTS[:3], [AsLogWeights()]))
    np.testing.assert_allclose(a.shares, b.shares, atol=1e-4)
    np.testing.assert_allclose(a.slope, b.slope, atol=1e-4)


def test_intervals_shrink_with_more_texts():
    s = _zero_qk_bloom(4)
    # add content noise so intervals are not degenerate: random q/k again in layer 1
    torch.manual_seed(1)
    with torch.no_grad():
        att = s.model.transformer.h[1].self_attention
        att.query_key_value.weight.normal_(0, 0.5)
    many = [f"Crate {i} holds {['pears', 'plums', 'figs', 'apples'][i % 4]} and crate {i + 1} holds "
            f"{['rye', 'oats', 'barley'][i % 3]} for the {['north', 'south'][i % 2]} market." for i in range(24)]
    w_small = Split(n_boot=60, seed=3).fit(record(s, many[:4], [SplitStats()]))
    w_large = Split(n_boot=60, seed=3).fit(record(s, many, [SplitStats()]))
    width = lambda f: np.nanmean(f.shares_hi[1, :, 0] - f.shares_lo[1, :, 0])  # noqa: E731
    assert width(w_large) < width(w_small)


def test_rope_shift_is_relative_and_absolute_model_is_not(minilm):
    # Su et al. (RoFormer): RoPE scores depend only on the offset, so shifting all position ids changes nothing
    s = tiny.subject("llama")
    units = attnpos.texts.prepare(s, attnpos.texts.from_strings(TEXTS[:3]))
    res = attnpos.ShiftTest(offset=40).run(s, units)
    for key, change in res.change.items():
        assert np.all(change <= 1e-3)
        assert set(res.verdict[key]) == {"relative"}
    assert res.shift_kind == "position-ids"
    # the real MiniLM (learned absolute positions) is not shift-invariant: at least one head is `absolute`
    units = attnpos.texts.prepare(minilm, attnpos.texts.from_strings(TEXTS[:3]))
    res = attnpos.ShiftTest(offset=32).run(minilm, units)
    assert any("absolute" in v for v in res.verdict.values())


def test_prefix_shift_for_schemes_without_position_ids():
    s = tiny.subject("smollm3-nope")
    assert not s.uses_position_ids
    units = attnpos.texts.prepare(s, attnpos.texts.from_strings(TEXTS[:2]))
    res = attnpos.ShiftTest(offset=8).run(s, units)
    assert res.shift_kind == "prefix"
    assert all(np.isfinite(v).all() for v in res.change.values())


# ------------------------------------------------------------------------------------------ planted heads

def _planted_gpt2():
    """GPT-2, 1 layer, 4 heads of 32 dims, positions one-hot, token embeddings zero.

    head 0: previous-token (q_i matches k_{i-1}); head 1: anchor on slot 0; head 2: uniform (q = k = 0);
    head 3: random.
    """
    import transformers as tf

    torch.manual_seed(0)
    E, H, d, P = 128, 4, 32, 32
    cfg = tf.GPT2Config(n_layer=1, n_head=H, n_embd=E, n_positions=P, vocab_size=tiny.VOCAB, bos_token_id=101,
                        eos_token_id=102, pad_token_id=0, attn_pdrop=0.0, resid_pdrop=0.0, embd_pdrop=0.0)
    m = tf.GPT2LMHeadModel(cfg).eval()
    c = 8.0
    with torch.no_grad():
        m.transformer.wte.weight.zero_()
        m.transformer.wpe.weight.zero_()
        m.transformer.wpe.weight[:, :P] = torch.eye(P)
        W = torch.zeros(E, 3 * E)
        b = torch.zeros(3 * E)
        for p in range(P):                      # head 0: q(p) = c·e_p, k(p) = e_{p+1}
            W[p, p % d] = c
            if p + 1 < P:
                W[p, E + (p + 1) % d] = c
        for p in range(P):                      # head 1: q constant, k large only at slot 0
            b[d] = 1.0
        W[0, E + d] = 3 * c
        W[:, 2 * d:3 * d] = 0                   # head 2: q = 0 → uniform
        W[:, 3 * d:4 * d] = torch.randn(E, d)   # head 3: random q and k
        W[:, E + 3 * d:E + 4 * d] = torch.randn(E, d)
        W[:, 2 * E:] = torch.randn(E, E) * 0.1
        m.transformer.h[0].attn.c_attn.weight.copy_(W)
        m.transformer.h[0].attn.c_attn.bias.copy_(b)
        m.transformer.h[0].ln_1.weight.fill_(1.0)
        m.transformer.h[0].ln_1.bias.zero_()
    return attnpos.from_model(m, tiny.tokenizer(), name="planted")


def test_planted_heads_get_their_roles():
    s = _planted_gpt2()
    texts = [t[:120] for t in TEXTS]
    sc = attnpos.scan(s, texts, max_tokens=30, n_boot=0, shift=False, induction=False)
    roles = dict(zip(sc.heads["head"], sc.heads["role"]))
    assert roles[0] == "previous-token", sc.heads.loc[0, "evidence"]
    assert roles[1] == "anchor" and sc.heads.loc[1, "anchor_slot"] == 0
    assert roles[2] == "counting"
    assert roles[3] != "previous-token"
    assert sc.heads.loc[2, "entropy_ratio"] > 0.99      # exactly uniform up to float error


def test_scan_json_has_every_field():
    s = tiny.subject("gpt2")
    sc = attnpos.scan(s, TEXTS[:3], n_boot=5)
    j = sc.to_json()
    assert j["schema"] == "attnpos.scan/2"
    assert len(j["heads"]) == s.n_layers * s.n_heads
    for e in j["heads"]:
        for k in ("layer", "head", "stack", "mass", "role", "tags", "shares", "profile", "slope", "shift",
                  "induction", "evidence"):
            assert k in e
        assert set(e["mass"]) == {"previous", "next", "first", "self"}
        assert e["role"] in e["tags"]
    again = attnpos.Scan.from_json(j)
    assert list(again.heads["role"]) == list(sc.heads["role"])


def test_minilm_roles_agree_with_direct_statistics(minilm):
    # Clark et al. 2019 (BlackboxNLP) report previous/next-token heads and heavy attention on special tokens in
    # BERT-family encoders. We do not assert their numbers (from memory, and for a different model); we check that
    # the roles attnpos gives the real MiniLM agree with statistics computed here directly from transformers' weights.
    import attnpos.core.thresholds as th

    texts = TEXTS[:4]
    sc = attnpos.scan(minilm, texts, n_boot=0, shift=False, induction=False)
    units = attnpos.texts.prepare(minilm, attnpos.texts.from_strings(texts))
    L, H = 6, 12
    prev_sum, next_sum, n_q = np.zeros((L, H)), np.zeros((L, H)), 0
    cls_sum, cls_n = np.zeros((L, H)), 0
    for u in units:
        with torch.no_grad():
            out = minilm.model(input_ids=torch.tensor([u.ids]), output_attentions=True)
        T = len(u.ids)
        q = np.arange(1, T - 1)
        far = q[q >= th.ANCHOR_MIN_DISTANCE]
        for layer, att in enumerate(out.attentions):
            w = att[0].numpy()
            prev_sum[layer] += w[:, q, q - 1].sum(-1)
            next_sum[layer] += w[:, q, q + 1].sum(-1)
            cls_sum[layer] += w[:, far, 0].sum(-1)
        n_q += len(q)
        cls_n += len(far)
    prev, nxt, cls = prev_sum / n_q, next_sum / n_q, cls_sum / cls_n
    for _, r in sc.heads.iterrows():
        l, h = int(r["layer"]), int(r["head"])
        assert ("previous-token" in r["tags"]) == (prev[l, h] >= th.NEIGHBOUR_MASS)
        assert ("next-token" in r["tags"]) == (nxt[l, h] >= th.NEIGHBOUR_MASS)
        if "anchor" in r["tags"] and r["anchor_slot"] == 0:
            assert cls[l, h] >= th.ANCHOR_WEIGHT - 1e-6
    # what this model shows on our text (observed, not from memory): some heads are neighbour heads
    assert (prev >= th.NEIGHBOUR_MASS).any() or (nxt >= th.NEIGHBOUR_MASS).any()


# ------------------------------------------------------------------------------------------ the position pair

def _position_only_gpt2(scale: float = 1.0, layers: int = 1, seed: int = 0):
    """GPT-2 (a learned absolute position table, Radford et al. 2019) with the token embeddings zeroed: every
    score is LN(p_i)ᵀ W_q W_kᵀ LN(p_j) — a function of the two absolute positions only. ``scale`` multiplies the
    random q/k weights."""
    import transformers as tf

    torch.manual_seed(seed)
    cfg = tf.GPT2Config(n_layer=layers, n_head=4, n_embd=64, n_positions=128, vocab_size=tiny.VOCAB,
                        bos_token_id=101, eos_token_id=102, pad_token_id=0)
    m = tf.GPT2LMHeadModel(cfg).eval()
    with torch.no_grad():
        m.transformer.wte.weight.zero_()
        m.transformer.wpe.weight.normal_(0, 1.0)
        for blk in m.transformer.h:
            blk.attn.c_attn.weight[:, :2 * 64].normal_(0, scale / 8)
    return attnpos.from_model(m, tiny.tokenizer(), name="position-only")


LONG = [f"{t} {u}" for t, u in zip(TEXTS, TEXTS[1:] + TEXTS[:1])]


def test_position_pair_takes_scores_that_are_a_function_of_both_positions():
    # scores p_iᵀ W p_j only: neither a free function of δ nor of j, the same in every text → the pair part
    s = _position_only_gpt2()
    fit = Split(n_boot=20).fit(record(s, LONG, [SplitStats()]))
    k = list(attnpos.core.columns.PART_NAMES).index("pair")
    assert (fit.shares[0, :, k] >= 0.9).all(), fit.shares[0].round(3)
    np.testing.assert_allclose(fit.shares.sum(-1), 1.0, atol=1e-9)
    assert (fit.shares_lo[0, :, k] <= fit.shares[0, :, k] + 1e-9).all()
    assert (fit.shares_hi[0, :, k] >= fit.shares[0, :, k] - 1e-9).all()


def test_position_pair_leaves_alibi_to_distance():
    # Press et al. 2022, ALiBi: the bias −m·(i − j) is a function of the distance alone, so distance takes it and
    # the pair part stays near 0 (q = k = 0 leaves the bias alone)
    s = _zero_qk_bloom(4)
    fit = Split(n_boot=0).fit(record(s, TEXTS[:4], [SplitStats()]))
    k = list(attnpos.core.columns.PART_NAMES).index("pair")
    assert (fit.shares[..., k] <= 0.05).all()
    assert (fit.shares[..., 0] >= 0.95).all()
    np.testing.assert_allclose(fit.shares.sum(-1), 1.0, atol=1e-9)


def test_position_pair_is_zero_for_content_that_differs_between_texts():
    # a random-weight RoPE model: scores depend on the tokens and on relative position (Su et al.), nothing shared
    # by different texts at the same absolute pair beyond what distance explains
    s = tiny.subject("llama")
    fit = Split(n_boot=0).fit(record(s, LONG, [SplitStats()]))
    k = list(attnpos.core.columns.PART_NAMES).index("pair")
    assert (fit.shares[..., k] < 0.1).all(), fit.shares[..., k].round(3)
