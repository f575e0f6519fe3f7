"""Loading, scheme detection and layer-by-layer capture, checked against transformers' own eager attention."""

import math

import numpy as np
import pytest
import torch

import attnpos
from attnpos.capture import FUNCTION_NAME, Reducer, record

import tiny

TEXT = ("The ferry to the north island leaves at seven, stops twice, and returns at noon. "
        "On stormy days the second stop is skipped.")


def Keep():
    return tiny.keep_reducer()


def _direct(subject, ids, attentions=True):
    x = torch.tensor([ids])
    kw = dict(input_ids=x, output_attentions=attentions)
    if subject.is_encoder_decoder:
        kw["decoder_input_ids"] = torch.tensor([[0] + ids[:-1]])
    with torch.no_grad():
        return subject.model(**kw)


@pytest.mark.parametrize("arch", tiny.ARCHS)
def test_scheme_detection(arch):
    # the scheme each architecture publishes: GPT-2 learned table, NeoX/Llama/Mistral/Qwen2 rotary, Bloom ALiBi,
    # BERT learned table, T5 bucketed relative bias, SmolLM3 rope with every 4th layer rope-free (its config doc)
    s = tiny.subject(arch)
    expected = tiny.EXPECTED_SCHEME[arch]
    if arch == "smollm3":
        flags = s.model.config.no_rope_layers
        assert s.schemes == ["rope" if f else "none" for f in flags]
        assert "none" in s.schemes and "rope" in s.schemes
    else:
        assert set(s.schemes) == {expected}
    assert s.causal == (arch not in ("bert", "t5"))


def test_sinusoidal_table_detected():
    # Vaswani et al. 2017 §3.5, computed here independently with math.sin/cos in plain loops
    model = tiny.build("gpt2", hidden=32)
    n, d = model.transformer.wpe.weight.shape
    table = torch.zeros(n, d)
    for pos in range(n):
        for i in range(0, d, 2):
            table[pos, i] = math.sin(pos / 10000 ** (i / d))
            table[pos, i + 1] = math.cos(pos / 10000 ** (i / d))
    with torch.no_grad():
        model.transformer.wpe.weight.copy_(table)
    s = attnpos.from_model(model, tiny.tokenizer())
    assert set(s.schemes) == {"sinusoidal"}


@pytest.mark.parametrize("arch", tiny.ARCHS)
def test_capture_matches_eager(arch):
    s = tiny.subject(arch)
    rec = record(s, [TEXT], [Keep()])
    ids = rec.units[0].ids
    out = _direct(s, ids)
    atts = (tuple(out.encoder_attentions or ()) + tuple(out.decoder_attentions or ())) if s.is_encoder_decoder \
        else tuple(out.attentions or ())
    kept = rec.results["keep"]
    if atts:
        # transformers' eager attention with output_attentions is the reference implementation
        assert len(atts) == len(s.sites)
        for site, att in zip(s.sites, atts):
            _, w, _, _ = kept[(0, site.stack, site.layer, 0)]
            assert torch.allclose(w, att[0].float(), atol=1e-5)
    # whatever the path, the model's outputs are unchanged by capturing (same computation)
    plain = _direct(s, ids, attentions=False)
    x = torch.tensor([ids])
    kw = dict(input_ids=x)
    if s.is_encoder_decoder:
        kw["decoder_input_ids"] = torch.tensor([[0] + ids[:-1]])
    from attnpos.capture import _registry_path
    if rec.capture == "registry":
        with _registry_path(s), torch.no_grad():
            captured = s.model(**kw)
        ref = plain.logits if hasattr(plain, "logits") else plain.last_hidden_state
        got = captured.logits if hasattr(captured, "logits") else captured.last_hidden_state
        assert torch.allclose(ref, got, atol=1e-4)
    for (t, stack, layer, h0), (sc, w, allowed, kind) in kept.items():
        if kind == "scores":
            assert torch.allclose(torch.softmax(sc, -1), w, atol=1e-6)
        site = next(x for x in s.sites if (x.stack, x.layer) == (stack, layer))
        if site.causal:
            assert not allowed.triu(1).any()
    assert rec.capture == ("eager-weights" if arch in ("bloom", "mpt") else "registry")


def _rope_reference(x, n_heads, base=10000.0):
    """RoPE (Su et al., RoFormer) in the rotate-half layout: pairs (k, k + d/2) rotate by angle p·base^(-2k/d)."""
    T, d = x.shape[0], x.shape[-1]
    pos = torch.arange(T, dtype=torch.float64)[:, None]
    inv = base ** (-torch.arange(0, d, 2, dtype=torch.float64) / d)
    ang = pos * inv[None, :]                        # (T, d/2)
    cos, sin = torch.cos(ang)[:, None, :], torch.sin(ang)[:, None, :]
    a, b = x[..., : d // 2].double(), x[..., d // 2:].double()
    return torch.cat([a * cos - b * sin, a * sin + b * cos], -1)


def test_rope_scores_equal_independent_recomputation():
    s = tiny.subject("llama", layers=1, heads=4, hidden=32)
    rec = record(s, [TEXT], [Keep()])
    ids = rec.units[0].ids
    m = s.model.model
    with torch.no_grad():
        x = m.embed_tokens(torch.tensor(ids))
        x = m.layers[0].input_layernorm(x)
        att = m.layers[0].self_attn
        H, d = 4, 8
        q = att.q_proj(x).view(len(ids), H, d)
        k = att.k_proj(x).view(len(ids), H, d)
        qr, kr = _rope_reference(q, H), _rope_reference(k, H)
        ref = torch.einsum("ihd,jhd->hij", qr, kr) / math.sqrt(d)
    sc, _, allowed, kind = rec.results["keep"][(0, "main", 0, 0)]
    assert kind == "scores"
    assert torch.allclose(sc[:, allowed].double(), ref[:, allowed], atol=1e-4)


def test_model_restored_after_failure():
    from transformers import AttentionInterface
    from transformers.masking_utils import AttentionMaskInterface

    s = tiny.subject("llama")
    before = s.model.config._attn_implementation

    class Boom(Reducer):
        name = "boom"

        def update(self, cap):
            if cap.site.layer == 1:
                raise RuntimeError("fault in the middle of a run")

    with torch.no_grad():
        ref = s.model(input_ids=torch.tensor([[101, 2000, 2001, 102]])).logits
    with pytest.raises(RuntimeError):
        record(s, [TEXT], [Boom()])
    assert s.model.config._attn_implementation == before
    assert FUNCTION_NAME not in AttentionInterface._global_mapping
    assert FUNCTION_NAME not in AttentionMaskInterface._global_mapping
    assert all(not m._forward_hooks and not m._forward_pre_hooks for m in s.model.modules())
    with torch.no_grad():
        again = s.model(input_ids=torch.tensor([[101, 2000, 2001, 102]])).logits
    assert torch.equal(ref, again)


def test_bloom_hooks_removed_after_failure():
    s = tiny.subject("bloom")

    class Boom(Reducer):
        name = "boom"

        def update(self, cap):
            raise ValueError("stop")

    with pytest.raises(ValueError):
        record(s, [TEXT], [Boom()], path="eager-weights")
    assert all(not m._forward_hooks for m in s.model.modules())
    assert s.model.config._attn_implementation == "eager"


def test_long_text_is_windowed_with_notice():
    s = tiny.subject("gpt2")  # a table of 256 positions
    long = " ".join(f"crate {i} holds pears" for i in range(200))
    with pytest.warns(attnpos.texts.WindowNotice):
        units = attnpos.texts.prepare(s, attnpos.texts.from_strings([long]))
    assert len(units) > 1 and all(len(u) <= 256 for u in units)
    # nothing dropped: the windows cover the whole text
    n_body = len(s.tokenizer(long, add_special_tokens=False)["input_ids"])
    assert sum(u.window[1] - u.window[0] for u in units) == n_body
    assert [u.window[0] for u in units[1:]] == [u.window[1] for u in units[:-1]]


def test_special_tokens_marked():
    s = tiny.subject("bert")
    u = attnpos.texts.prepare(s, attnpos.texts.from_strings(["two words"]))[0]
    assert u.special[0] and u.special[-1] and not u.special[1:-1].any()   # [CLS] … [SEP]


def test_minilm_masses_match_direct_weights(minilm):
    # the real pretrained MiniLM; masses recomputed here from transformers' own eager weights
    text = ("Crate 14 holds pears. Crate 15 holds plums. The keeper counts the crates twice each morning, "
            "and the ledger lists every crate by number.")
    sc = attnpos.scan(minilm, [text], n_boot=0, shift=False, induction=False)
    ids = attnpos.texts.prepare(minilm, attnpos.texts.from_strings([text]))[0].ids
    with torch.no_grad():
        out = minilm.model(input_ids=torch.tensor([ids]), output_attentions=True)
    T = len(ids)
    q = np.arange(1, T - 1)          # ordinary queries: not [CLS], not [SEP]
    for layer, att in enumerate(out.attentions):
        w = att[0].numpy()
        prev = w[:, q, q - 1].mean(-1)
        nxt = w[:, q, q + 1].mean(-1)
        first = w[:, q, 0].mean(-1)
        self_ = w[:, q, q].mean(-1)
        rows = sc.heads[sc.heads.layer == layer].sort_values("head")
        np.testing.assert_allclose(rows.mass_previous, prev, atol=1e-5)
        np.testing.assert_allclose(rows.mass_next, nxt, atol=1e-5)
        np.testing.assert_allclose(rows.mass_first, first, atol=1e-5)
        np.testing.assert_allclose(rows.mass_self, self_, atol=1e-5)
    assert sc.model["scheme"] == "learned-absolute" and sc.model["causal"] is False
    assert len(sc.heads) == 6 * 12


@pytest.mark.parametrize("absolute_too", [True, False])
def test_relative_embedding_inside_attention_is_not_guessed(absolute_too):
    # DeBERTa's disentangled attention (He et al. 2021) adds learned relative-position terms inside attention,
    # with or without an absolute table beside it: none of the six schemes, so attnpos must not report the table
    import transformers as tf

    torch.manual_seed(0)
    cfg = tf.DebertaV2Config(num_hidden_layers=2, num_attention_heads=4, hidden_size=32, intermediate_size=64,
                             vocab_size=tiny.VOCAB, max_position_embeddings=128, relative_attention=True,
                             position_buckets=32, pos_att_type=["p2c", "c2p"], position_biased_input=absolute_too)
    model = tf.DebertaV2Model(cfg)
    with pytest.raises(attnpos.AttnposError, match="relative-position embedding inside attention"):
        attnpos.from_model(model, tiny.tokenizer())
    s = attnpos.from_model(model, tiny.tokenizer(), scheme="relative-bias")
    rec = record(s, [TEXT], [Keep()])
    out = _direct(s, rec.units[0].ids)
    # transformers' eager attention with output_attentions is the reference implementation
    for site, att in zip(s.sites, out.attentions):
        _, w, _, _ = rec.results["keep"][(0, site.stack, site.layer, 0)]
        assert torch.allclose(w, att[0].float(), atol=1e-5)
    assert not any(site.causal for site in s.sites)          # an encoder: no causal-LM class in transformers
    # were it taken for causal, the capture must stop rather than mask weights the model uses
    s.sites[0].causal = True
    with pytest.raises(attnpos.AttnposError, match="later tokens"):
        record(s, [TEXT], [Keep()])
