"""The score split, slopes, the shift test and roles, checked against published formulas and planted heads."""

import math

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
    res = attnpos.ShiftTest(offset=40, kinds=("position-ids",)).run(s, units)
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
    assert j["schema"] == "attnpos.scan/3"
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


# ------------------------------------------------------------------------------------------ shift test on every scheme

def _planted_rope(seed: int = 0):
    """Llama (RoPE), 2 layers × 4 heads of 8 dims, MLPs off. Every token embeds as 10·e0; the first token ([CLS])
    also carries e1.

    Layer 0, head 0: q = k = 0 (uniform over the causal prefix) with its value reading e1 into e2, so e2 is
    4/(i + 1) wherever the first token was seen — largest at the first slot, which can see only itself. Layer 1,
    head 0 (a sink): keys read e2 in the slowest rotary pair (θ = 10⁻³, so the rotation barely matters), queries the
    constant e0: weight on the first slot. Layer 1, head 1 (previous token): constant q and k in the three fastest
    pairs with k rotated by +θ_m, so q·k = Σ_m a² cos(θ_m (δ − 1)) — a peak at δ = 1, by RoPE's relative property
    (Su et al.). Layer 1, head 3: a large, nearly constant product in the slowest pair (most of its q·k energy, no
    effect on the weights — softmax ignores a row constant) beside a cosine in the fastest pair that shapes them.
    Every other head has q = k = 0 (uniform)."""
    import transformers as tf

    torch.manual_seed(seed)
    hd, H, E = 8, 4, 32
    cfg = tf.LlamaConfig(num_hidden_layers=2, num_attention_heads=H, num_key_value_heads=H, hidden_size=E,
                         head_dim=hd, intermediate_size=64, max_position_embeddings=256, vocab_size=tiny.VOCAB,
                         bos_token_id=101, eos_token_id=102, pad_token_id=0, rope_theta=10000.0)
    m = tf.LlamaForCausalLM(cfg).eval()
    with torch.no_grad():
        emb = m.model.embed_tokens.weight
        emb.zero_()
        emb[:, 0] = 10.0
        emb[101, 1] = 1.0                                  # [CLS], the first token of every text
        for blk in m.model.layers:
            for lin in (blk.self_attn.q_proj, blk.self_attn.k_proj, blk.self_attn.v_proj, blk.self_attn.o_proj,
                        blk.mlp.down_proj):
                lin.weight.zero_()
        a0 = m.model.layers[0].self_attn
        a0.v_proj.weight[0, 1] = 1.0                       # head 0's value dim 0 reads e1 …
        a0.o_proj.weight[2, 0] = 7.0                       # … and writes it into e2
        a1 = m.model.layers[1].self_attn
        a1.q_proj.weight[3, 0] = 2.0                       # head 0, pair 3 (θ = 10⁻³): q from e0, k from e2
        a1.k_proj.weight[3, 2] = 40.0
        for p, th in enumerate([1.0, 0.1, 0.01]):          # head 1, pairs 0–2 (dims p, p + 4)
            a = 8.0
            a1.q_proj.weight[hd + p, 0] = a / 5.6
            a1.k_proj.weight[hd + p, 0] = a * math.cos(th) / 5.6
            a1.k_proj.weight[hd + p + 4, 0] = a * math.sin(th) / 5.6
        a1.q_proj.weight[3 * hd + 3, 0] = a1.k_proj.weight[3 * hd + 3, 0] = 1.2        # head 3, pair 3: constant
        a1.q_proj.weight[3 * hd + 0, 0] = 4.0 / 5.6                                    # head 3, pair 0: cos(δ − 1)
        a1.k_proj.weight[3 * hd + 0, 0] = 4.0 * math.cos(1.0) / 5.6
        a1.k_proj.weight[3 * hd + 4, 0] = 4.0 * math.sin(1.0) / 5.6
    return attnpos.from_model(m, tiny.tokenizer(), name="planted-rope")


def test_planted_rope_sink_is_absolute_under_the_prefix_and_previous_token_relative_under_both():
    # Su et al. (RoFormer): RoPE's q·k depends on i − j only, so moving position ids changes no head; a neutral
    # prefix moves the first slot, where a sink head (Xiao et al. 2024) keeps looking: `absolute` under the prefix
    s = _planted_rope()
    assert s.schemes == ["rope", "rope"]
    units = attnpos.texts.prepare(s, attnpos.texts.from_strings(LONG[:3]))
    sc = attnpos.scan(s, LONG[:3], n_boot=0, induction=False)
    assert sc.heads["shift_kind"].iloc[0] == "prefix"              # informative for RoPE by default
    both = attnpos.ShiftTest(kinds=("position-ids", "prefix")).run(s, units)
    assert both.kinds == ["position-ids", "prefix"]
    sink, prev = ("main", 1), ("main", 1)
    assert sc.heads.loc[4, "mass_first"] > 0.9 and sc.heads.loc[5, "mass_previous"] > 0.5
    assert both.verdict_of(sink, 0, "prefix") == "absolute"
    assert both.verdict_of(sink, 0, "position-ids") == "relative"
    assert both.verdict_of(sink, 0) == "absolute"
    assert both.verdict_of(prev, 1, "prefix") == "relative" and both.verdict_of(prev, 1, "position-ids") == "relative"
    for key, ch in both.changes["position-ids"].items():          # no RoPE head moves with its ids
        assert (ch < 1e-3).all()
    # uniform heads (q = k = 0) use no position at all
    assert both.verdict_of(("main", 1), 2) == "no-position" and both.verdict_of(("main", 0), 0) == "no-position"
    row = sc.heads.loc[4]
    assert row["shift_verdict"] == "absolute" and row["role"] == "anchor" and "positional" in row["tags"]


def _zero_qk_t5():
    m = tiny.build("t5", layers=1)
    with torch.no_grad():
        for n, p in m.named_parameters():
            if n.endswith(("SelfAttention.q.weight", "SelfAttention.k.weight")):
                p.zero_()
            if n.endswith("relative_attention_bias.weight"):
                p.normal_(0, 2.0)
    return attnpos.from_model(m, tiny.tokenizer())


@pytest.mark.parametrize("which", ["alibi", "relative-bias"])
def test_alibi_and_relative_bias_heads_stay_relative_under_the_prefix(which):
    # Press et al. 2022 (ALiBi) and Raffel et al. 2020 (T5's relative bias): with q = k = 0 the scores are a
    # function of i − j alone, so a neutral prefix, once the weights are renormalised over the text, changes nothing
    s = _zero_qk_bloom(4) if which == "alibi" else _zero_qk_t5()
    units = attnpos.texts.prepare(s, attnpos.texts.from_strings(LONG[:2]))
    res = attnpos.ShiftTest().run(s, units)
    assert res.kinds == ["prefix"]
    words = [w for v in res.verdict.values() for w in v]
    assert set(words) <= {"relative", "no-position"} and "relative" in words
    for key, ch in res.changes["prefix"].items():
        assert (ch < 1e-3).all()


def test_position_dominated_gpt2_is_never_content():
    # GPT-2's learned absolute table (Radford et al. 2019) with position vectors 50× the token embeddings and random
    # q/k: scores are mostly p_iᵀ W p_j. The position-id shift moves them (`absolute`) and the split puts them in the
    # pair part; no head may read `content` (the split used to leave them in the residual, which counted as content)
    s = _position_only_gpt2(layers=2, seed=1)
    with torch.no_grad():
        s.model.transformer.wte.weight.normal_(0, 0.02)
    sc = attnpos.scan(s, LONG, n_boot=20, induction=False)
    assert sc.heads["shift_kind"].iloc[0] == "position-ids"
    assert "content" not in set(sc.heads["role"])
    assert not any("content" in t for t in sc.heads["tags"])
    assert (sc.heads["shift_verdict"] == "absolute").any()
    assert ((sc.heads["share_pair"] >= 0.4) | (sc.heads["shift_verdict"] == "absolute")).all()
    assert {"positional", "anchor", "previous-token", "local"} >= set(sc.heads["role"]) - {"mixed"}


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_random_init_heads_get_the_no_position_verdict(arch):
    # transformers' default initialisation (normal, std 0.02 — the library's documented initializer_range) leaves
    # q·k near 0, so every head is near-uniform: neither moved nor kept by any shift
    import transformers as tf

    torch.manual_seed(0)
    common = dict(vocab_size=tiny.VOCAB, bos_token_id=101, eos_token_id=102, pad_token_id=0)
    if arch == "gpt2":
        m = tf.GPT2LMHeadModel(tf.GPT2Config(n_layer=2, n_head=4, n_embd=32, n_positions=256, **common))
    else:
        m = tf.LlamaForCausalLM(tf.LlamaConfig(num_hidden_layers=2, num_attention_heads=4, hidden_size=32,
                                               intermediate_size=64, max_position_embeddings=256, **common))
    s = attnpos.from_model(m.eval(), tiny.tokenizer())
    units = attnpos.texts.prepare(s, attnpos.texts.from_strings(LONG[:2]))
    res = attnpos.ShiftTest().run(s, units)
    assert {w for v in res.verdict.values() for w in v} == {"no-position"}
    assert all((sp < 0.05).all() for sp in res.spread.values())


# ------------------------------------------------------------------------------------------ roles with support

def test_roles_carry_their_support_and_an_unsure_head_sits_between_two(monkeypatch):
    from attnpos.core import roles as core_roles
    from attnpos.core import thresholds as core_th

    s = _planted_gpt2()
    texts = [t[:120] for t in TEXTS]
    point = attnpos.scan(s, texts, max_tokens=30, n_boot=0, shift=False, induction=False)
    assert point.heads["role_support"].isna().all() and not any(point.heads["role_between"].map(len))
    # a role whose bar sits at head 3's own point estimate: about half the resamples over texts fall on each side
    bar = float(point.heads.loc[3, "mass_self"])
    spec = core_roles.RoleSpec(name="planted-bar", rule="mass.self ≥ the planted bar", about="test only",
                               check=lambda row, ctx: "bar" if row.get("mass_self", 0) >= bar else None,
                               colour="#000000", short="bar", code="Br", strength="mass_self", rank=5)
    with core_roles.registered(spec):
        sc = attnpos.scan(s, texts, max_tokens=30, n_boot=60, shift=False, induction=False)
        # head 3 (random q/k on one-hot positions: p_iᵀ W p_j) is `positional` in every resample: that, not the more
        # specific but unsure planted role, is its primary role
        h0, h3 = sc.heads.loc[0], sc.heads.loc[3]
        assert h0["role"] == "previous-token" and h0["role_support"] >= 0.9
        assert h0["tag_support"]["previous-token"] >= 0.9
        assert 0.1 < h3["tag_support"]["planted-bar"] < 0.9
        assert h3["role"] == "positional" and h3["role_support"] >= 0.9 and h3["role_between"] == []
        # without the positional role nothing holds in 90% of resamples: the head sits between two roles
        monkeypatch.setattr(core_th, "POSITIONAL_PAIR_SHARE", 2.0)
        sc = attnpos.scan(s, texts, max_tokens=30, n_boot=60, shift=False, induction=False)
    h3 = sc.heads.loc[3]
    assert len(h3["role_between"]) == 2 and "planted-bar" in h3["role_between"], dict(h3)
    assert h3["role_support"] < 0.9
    again = attnpos.Scan.from_json(sc.to_json())
    assert again.heads.loc[3, "role_between"] == list(h3["role_between"])
    assert again.heads.loc[0, "tag_support"]["previous-token"] == pytest.approx(sc.heads.loc[0, "tag_support"]["previous-token"])
    assert "between" in sc.text()
    from attnpos.views import data as view_data

    grid = view_data.atlas_data(sc)
    faded = grid["numbers"][:, grid["fields"].index("faded")]
    assert faded[3] == 1.0 and faded[0] == 0.0


def test_induction_score_has_a_standard_error_within_bound_on_a_reference_model():
    from attnpos.induction import induction_scores, ordinary_pool

    res = induction_scores(attnpos.load("ref:rope"))
    assert res.settings["repeats"] >= 16
    assert all(v.shape == (4,) for v in res.stderr.values())
    assert res.max_stderr() <= 0.02
    assert "induction_se" in res.table()
    again = type(res).from_json(res.to_json())
    np.testing.assert_allclose(again.stderr[("main", 1)], res.stderr[("main", 1)])
    # the draw keeps ordinary tokens: no special or unused slot of the WordPiece vocabulary
    tok = tiny.tokenizer()
    pool = set(ordinary_pool(tok, 48))
    assert not pool & set(tok.all_special_ids)
    assert tok.convert_tokens_to_ids("[unused5]") not in pool and tok.convert_tokens_to_ids("harbour") in pool


def test_bands_by_intervention_name_the_band_a_head_uses():
    # RoPE (Su et al.) splits q·k into one term per rotary pair. The sink head's scores come from one known pair (the
    # slowest): removing its band changes the weights, removing the others changes nothing. The head whose energy
    # sits in a constant slow pair but whose weights come from the fastest pair uses the high band, though its energy
    # says low (Barbero et al. 2025 draw this distinction).
    from attnpos.bands import rope_bands

    s = _planted_rope()
    res = rope_bands(s, LONG[:3])
    by = {(h["layer"], h["head"]): h for h in res.heads}
    sink, prev, slow = by[(1, 0)], by[(1, 1)], by[(1, 3)]
    assert sink["band"] == "low" and sink["used_band"] == "low"
    assert sink["removal"]["low"]["tv"] > 0.5 and sink["removal"]["low"]["first"] < -0.5
    assert sink["removal"]["high"]["tv"] < 1e-3 and sink["removal"]["middle"]["tv"] < 1e-3
    assert prev["used_band"] == "high" and prev["removal"]["high"]["previous"] < -0.3
    assert slow["band"] == "low" and slow["used_band"] == "high"
    assert slow["removal"]["low"]["tv"] < 0.05 < slow["removal"]["high"]["tv"]
    assert by[(1, 2)]["used_band"] is None                          # uniform: nothing to remove
    text = res.text()
    assert "used, by intervention" in text and "L1.H0" in text and "L0.H0–3" in text   # compact lists per layer
    t = res.table()
    assert {"used_band", "removal_low_tv", "removal_high_previous"} <= set(t.columns)
    again = type(res).from_json(res.to_json())
    assert again.heads[4]["used_band"] == "low"


def test_each_scheme_runs_the_shifts_its_facts_make_informative():
    # RoPE (Su et al.), ALiBi (Press et al. 2022) and T5's bias (Raffel et al. 2020) are relative by construction:
    # moving ids cannot change them, a prefix can; a learned or sinusoidal table is moved by its ids
    from attnpos.core import schemes

    got = {s.name: s.informative_shifts() for s in schemes.specs()}
    assert got["learned-absolute"] == got["sinusoidal"] == ("position-ids",)
    assert got["rope"] == got["alibi"] == got["relative-bias"] == got["none"] == ("prefix",)
    assert schemes.informative_shifts(["rope", "none"]) == ("prefix",)
    assert schemes.informative_shifts(["learned-absolute", "rope"]) == ("position-ids", "prefix")
    with pytest.raises(ValueError):
        attnpos.ShiftTest(kinds=("sideways",))
