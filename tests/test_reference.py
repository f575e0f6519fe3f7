"""Reference models (issue #3): position schemes checked against their published definitions, training, shipping.

Every check against the outside world names its source beside it.
"""

import os

os.environ["HF_HUB_OFFLINE"] = "1"

import json
import math
from pathlib import Path

import numpy as np
import pytest
import torch

import attnpos.reference as ref
from attnpos.errors import AttnposError
from attnpos.reference import corpus
from attnpos.reference.models import build_model
from attnpos.reference.tokenizer import BOS_ID, VOCAB_SIZE
from attnpos.reference.train import train



@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    # one torch thread for this file: on a busy 2-core machine two OpenMP threads spin-wait on each other and a
    # forward pass gets several times slower (see attnpos/reference/TRAINING.md); restored afterwards
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)

EXPECTED_CLASS = {
    "learned-absolute": "GPT2LMHeadModel",
    "sinusoidal": "GPT2LMHeadModel",
    "relative-bias": "RelativeBiasForCausalLM",
    "alibi": "BloomForCausalLM",
    "rope": "LlamaForCausalLM",
    "none": "SmolLM3ForCausalLM",
}


def _ids(n=48, seed=0, batch=2):
    g = torch.Generator().manual_seed(seed)
    ids = torch.randint(32, 127, (batch, n), generator=g)
    ids[:, 0] = BOS_ID
    return ids


def _zero_qk(model, scheme):
    """Zero the query and key projections so the scores are exactly what the position scheme adds."""
    with torch.no_grad():
        if scheme == "alibi":
            for block in model.transformer.h:
                w, b = block.self_attention.query_key_value.weight, block.self_attention.query_key_value.bias
                h, d = model.config.n_head, model.config.hidden_size // model.config.n_head
                # Bloom packs q, k, v per head as [heads, 3, head_dim]
                w.view(h, 3, d, -1)[:, :2].zero_()
                b.view(h, 3, d)[:, :2].zero_()
        elif scheme == "relative-bias":
            for block in model.transformer.block:
                block.layer[0].SelfAttention.q.weight.zero_()
                block.layer[0].SelfAttention.k.weight.zero_()


# ------------------------------------------------------------------------------------------ sinusoidal
def _vaswani_table(n_pos, d):
    # Vaswani et al. 2017 §3.5: PE(pos, 2i) = sin(pos / 10000^(2i/d)), PE(pos, 2i+1) = cos(pos / 10000^(2i/d))
    pe = np.zeros((n_pos, d))
    for pos in range(n_pos):
        for i in range(d // 2):
            angle = pos / (10000 ** (2 * i / d))
            pe[pos, 2 * i] = math.sin(angle)
            pe[pos, 2 * i + 1] = math.cos(angle)
    return pe


def test_sinusoidal_table_is_the_formula_and_stays_frozen_through_training(tmp_path):
    model = build_model("sinusoidal")
    table = model.transformer.wpe.weight.detach().numpy()
    formula = _vaswani_table(*table.shape)  # Vaswani et al. 2017 §3.5
    assert table.shape == (512, 128)
    np.testing.assert_allclose(table, formula, atol=1e-6)
    assert not model.transformer.wpe.weight.requires_grad

    before_tok = model.transformer.wte.weight.detach().clone()
    trained, rec = train("sinusoidal", tmp_path / "sin", steps=4, minutes=None, val_windows=8, progress=False)
    np.testing.assert_allclose(trained.transformer.wpe.weight.detach().numpy(), formula, atol=1e-6)
    # the run did train something else (otherwise "unchanged" would prove nothing)
    assert not torch.equal(trained.transformer.wte.weight.detach(), before_tok)
    reloaded = _auto(tmp_path / "sin")
    np.testing.assert_allclose(reloaded.transformer.wpe.weight.detach().numpy(), formula, atol=1e-6)


# ------------------------------------------------------------------------------------------ ALiBi
def _press_slopes(n):
    # Press, Smith & Lewis 2022 (ALiBi), §3: for n heads (a power of two) the slopes are the geometric sequence
    # that starts at 2^(-8/n) and multiplies by 2^(-8/n): e.g. n=8 -> 1/2, 1/4, ..., 1/256
    assert n & (n - 1) == 0
    start = 2.0 ** (-8.0 / n)
    return np.array([start ** (k + 1) for k in range(n)])


@pytest.mark.parametrize("source", ["untrained", "shipped"])
def test_alibi_slopes_are_press_et_al(source):
    from transformers.models.bloom.modeling_bloom import build_alibi_tensor

    model = build_model("alibi") if source == "untrained" else _auto(ref.weights_dir("alibi"))
    n = model.config.n_head
    press = _press_slopes(n)  # Press et al. 2022
    np.testing.assert_allclose(press[:4], [2**-2, 2**-4, 2**-6, 2**-8])  # n=4: 1/4, 1/16, 1/64, 1/256 (from the rule)

    # transformers' own ALiBi tensor for the Bloom class: slope_h * key index
    L = 20
    alibi = build_alibi_tensor(torch.ones(1, L), n, torch.float32).view(n, L).numpy()
    np.testing.assert_allclose(alibi[:, 1], press, rtol=1e-6)
    np.testing.assert_allclose(alibi, press[:, None] * np.arange(L)[None, :], rtol=1e-6)

    # and what the model really adds: with queries and keys zeroed, every score is the bias alone, so in each row
    # log w(i, j) - log w(i, j-1) = slope (a later key is one step closer)
    _zero_qk(model, "alibi")
    model.set_attn_implementation("eager")
    with torch.no_grad():
        att = model(input_ids=_ids(L, batch=1), output_attentions=True, use_cache=False).attentions
    for layer in att:
        w = layer[0].double()  # heads × L × L
        i = L - 1
        steps = torch.log(w[:, i, 1:i + 1]) - torch.log(w[:, i, 0:i])
        np.testing.assert_allclose(steps.numpy(), np.repeat(press[:, None], i, axis=1), rtol=1e-4, atol=1e-5)
        assert torch.all(w[:, 0, 1:] == 0)  # causal


# ------------------------------------------------------------------------------------------ relative bias
def _t5_bucket_causal(delta, num_buckets=32, max_distance=128):
    # Raffel et al. 2020 (T5) bucketed relative position, one-directional (decoder) form, written out from the
    # paper's description (from memory): distances 0..num_buckets/2-1 get their own bucket, larger distances
    # share logarithmically wider buckets up to max_distance, everything beyond falls in the last bucket.
    n = max(delta, 0)
    exact = num_buckets // 2
    if n < exact:
        return n
    return min(num_buckets - 1, exact + int(math.log(n / exact) / math.log(max_distance / exact) * (num_buckets - exact)))


def test_relative_bias_buckets_agree_with_t5(tmp_path):
    from transformers.models.t5.modeling_t5 import T5Attention

    model = build_model("relative-bias")
    attn = model.relative_bias
    cfg = model.config
    assert cfg.model_type == "attnpos-relbias" and cfg.is_decoder and not cfg.is_encoder_decoder
    deltas = np.arange(0, 400)
    # transformers' T5 bucket function (reference implementation of Raffel et al. 2020), causal form: the relative
    # position it expects is key - query = -delta
    theirs = T5Attention._relative_position_bucket(
        -torch.tensor(deltas), bidirectional=False, num_buckets=cfg.relative_attention_num_buckets,
        max_distance=cfg.relative_attention_max_distance,
    ).numpy()
    ours = np.array([_t5_bucket_causal(int(d), cfg.relative_attention_num_buckets,
                                       cfg.relative_attention_max_distance) for d in deltas])
    np.testing.assert_array_equal(theirs, ours)
    assert theirs[:16].tolist() == list(range(16)) and theirs[128:].max() == 31  # exact near, capped far

    # the model's own bias module: bias(i, j) = table[bucket(i - j)] for every allowed pair
    L = 160
    bias = attn.compute_bias(L, L)[0].detach().numpy()  # heads × L × L
    table = attn.relative_attention_bias.weight.detach().numpy()  # buckets × heads
    i, j = np.tril_indices(L)
    np.testing.assert_allclose(bias[:, i, j], table[ours[i - j]].T, atol=1e-7)

    # and the forward pass really adds it: with q and k zeroed, each row's log-weight differences are bias differences
    _zero_qk(model, "relative-bias")
    model.set_attn_implementation("eager")
    with torch.no_grad():
        att = model(input_ids=_ids(40, batch=1), output_attentions=True, use_cache=False).attentions
    row = 39
    logw = torch.log(att[0][0, :, row, : row + 1].double()).numpy()
    expect = table[ours[row - np.arange(row + 1)]].T
    np.testing.assert_allclose(logw - logw[:, :1], expect - expect[:, :1], atol=1e-4)


# ------------------------------------------------------------------------------------------ RoPE / none
def _logits(model, ids, pos=None):
    # An explicit all-ones attention mask: without one, transformers reads position ids that do not step by 1 as
    # several sequences packed into one row and masks across them, which is not a position signal in the model.
    with torch.no_grad():
        return model(input_ids=ids, attention_mask=torch.ones_like(ids), position_ids=pos, use_cache=False).logits


@pytest.mark.parametrize("source", ["untrained", "shipped"])
def test_rope_logits_invariant_to_offsetting_position_ids(source):
    model = build_model("rope") if source == "untrained" else _auto(ref.weights_dir("rope"))
    ids = _ids(64)
    base = torch.arange(64)[None].expand(2, -1)
    ref_logits = _logits(model, ids, base)
    for k in (1, 37, 300):
        # Su et al. (RoFormer): q·k depends only on the relative offset, so shifting every position id by k
        # leaves scores, and so logits, unchanged (up to float error)
        torch.testing.assert_close(_logits(model, ids, base + k), ref_logits, atol=1e-4, rtol=1e-4)
    # control: the positions do matter when the relative offsets change
    assert (_logits(model, ids, base * 2) - ref_logits).abs().max() > 1e-3


def test_learned_absolute_logits_do_depend_on_offset():
    # control for the invariance tests: an absolute table is not shift-invariant (common-practice fact)
    model = build_model("learned-absolute")
    ids = _ids(64)
    base = torch.arange(64)[None].expand(2, -1)
    assert (_logits(model, ids, base + 37) - _logits(model, ids, base)).abs().max() > 1e-3


@pytest.mark.parametrize("source", ["untrained", "shipped"])
def test_none_model_ignores_position_ids(source):
    model = build_model("none") if source == "untrained" else _auto(ref.weights_dir("none"))
    assert list(model.config.no_rope_layers) == [0] * model.config.num_hidden_layers
    assert all(not layer.self_attn.use_rope for layer in model.model.layers)
    ids = _ids(64)
    base = torch.arange(64)[None].expand(2, -1)
    ref_logits = _logits(model, ids, base)
    g = torch.Generator().manual_seed(3)
    scrambled = torch.stack([torch.randperm(500, generator=g)[:64] for _ in range(2)])
    for pos in (base + 123, scrambled, torch.zeros_like(base)):
        assert torch.equal(_logits(model, ids, pos), ref_logits)
    # the same model with rope switched on in every layer does react to them (so the check above can fail)
    for layer in model.model.layers:
        layer.self_attn.use_rope = True
    assert (_logits(model, ids, scrambled) - _logits(model, ids, base)).abs().max() > 1e-3


# ------------------------------------------------------------------------------------------ training
def _auto(folder):
    from transformers import AutoModelForCausalLM

    model = AutoModelForCausalLM.from_pretrained(folder)
    model.eval()
    return model


def test_short_training_lowers_validation_loss_and_reloads_identically(tmp_path):
    model, rec = train("relative-bias", tmp_path / "rb", steps=12, minutes=None, val_windows=16, progress=False)
    assert rec["steps"] == 12
    assert rec["val_loss_per_byte"] < rec["val_loss_per_byte_untrained"] - 0.3
    reloaded = _auto(tmp_path / "rb")
    assert type(reloaded).__name__ == "RelativeBiasForCausalLM"
    ids = _ids(50)
    torch.testing.assert_close(_logits(reloaded, ids), _logits(model.eval(), ids), atol=0, rtol=0)
    cfg = json.loads((tmp_path / "rb" / "config.json").read_text())
    assert cfg["attnpos_scheme"] == "relative-bias" and cfg["attnpos_training_length"] == 128
    assert cfg["attnpos_training"]["steps"] == 12
    assert not list((tmp_path / "rb").glob("*.bin"))  # safetensors only


def test_training_is_deterministic_given_seed(tmp_path):
    kw = dict(steps=3, minutes=None, val_windows=4, progress=False, n_layers=1)
    a, ra = train("rope", None, seed=5, **kw)
    b, rb = train("rope", None, seed=5, **kw)
    c, rc = train("rope", None, seed=6, **kw)
    sa, sb, sc = a.state_dict(), b.state_dict(), c.state_dict()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)
    assert ra["train_loss_per_byte"] == rb["train_loss_per_byte"]
    assert not all(torch.equal(sa[k], sc[k]) for k in sa)


def test_build_model_sizes_match():
    sizes = {s: sum(p.numel() for p in {id(p): p for p in build_model(s).parameters()}.values()) for s in ref.SCHEMES}
    assert all(0.7e6 < n < 1.0e6 for n in sizes.values()), sizes
    assert max(sizes.values()) / min(sizes.values()) < 1.15, sizes


def test_unknown_scheme_is_a_clear_error():
    with pytest.raises(AttnposError, match="reference models are"):
        ref.weights_dir("sinusoid")
    with pytest.raises(AttnposError, match="unknown position scheme"):
        build_model("absolute")


# ------------------------------------------------------------------------------------------ shipped weights
@pytest.mark.parametrize("scheme", ref.SCHEMES)
def test_shipped_weights_load_and_meet_the_quality_bar(scheme):
    from transformers import AutoTokenizer

    from attnpos.reference.train import ByteStream, VAL_SEED, per_byte_loss

    folder = ref.weights_dir(scheme)
    weights = folder / "model.safetensors"
    assert weights.stat().st_size <= 5 * 1024 * 1024
    assert not list(folder.glob("*.bin")) and not list(folder.glob("*.pt"))
    model = _auto(folder)
    tok = AutoTokenizer.from_pretrained(folder)
    assert type(model).__name__ == EXPECTED_CLASS[scheme]
    cfg = model.config
    assert cfg.attnpos_scheme == scheme
    rec = cfg.attnpos_training
    assert isinstance(cfg.attnpos_training_length, int) and cfg.attnpos_training_length == rec["context"]
    for key in ("steps", "minutes", "train_loss_per_byte", "val_loss_per_byte", "corpus_sha256", "seed",
                "versions", "command", "unigram_entropy_per_byte"):
        assert key in rec, key
    assert rec["minutes"] <= 5.0
    # the quality bar of issue #3
    assert rec["val_loss_per_byte"] <= 0.6 * rec["unigram_entropy_per_byte"]

    # the recorded numbers are real: same corpus, same entropy, same validation loss when recomputed now
    docs = corpus.generate_documents()
    assert rec["corpus_sha256"] == corpus.corpus_sha256(docs)
    train_docs, val_docs = corpus.split_documents(docs)
    assert rec["unigram_entropy_per_byte"] == pytest.approx(corpus.unigram_entropy(train_docs), abs=1e-4)
    ids, labels = ByteStream(val_docs).windows(rec["val_windows"], rec["context"],
                                               torch.Generator().manual_seed(VAL_SEED))
    assert per_byte_loss(model, ids, labels) == pytest.approx(rec["val_loss_per_byte"], abs=2e-3)

    # causal: changing later bytes changes nothing before them (common practice for a causal LM)
    x = _ids(64, batch=1)
    y = x.clone()
    y[0, 40:] = (y[0, 40:] + 1 - 32) % 95 + 32
    lx, ly = _logits(model, x), _logits(model, y)
    torch.testing.assert_close(lx[0, :40], ly[0, :40], atol=1e-5, rtol=0)
    assert (lx[0, 40:] - ly[0, 40:]).abs().max() > 1e-2

    enc = tok("Entry 1. Day 3.")["input_ids"]
    assert enc[0] == BOS_ID and enc[1:] == list(b"Entry 1. Day 3.")


# ------------------------------------------------------------------------------------------ tokenizer
def test_byte_tokenizer_round_trips_anything(tmp_path):
    from transformers import AutoTokenizer

    from attnpos.reference.tokenizer import build_tokenizer

    build_tokenizer().save_pretrained(tmp_path)
    assert not (tmp_path / "tokenizer_config.json").read_text().count("auto_map")  # no remote code
    tok = AutoTokenizer.from_pretrained(tmp_path)
    assert len(tok) == VOCAB_SIZE
    texts = ["plain ASCII, with  two spaces.", "naïve café — 日本語 и кириллица 🐝🌊", "\x00\x01\x07\t\r\n\x7f end",
             "<bos> looks special but is text <pad>", "", " leading and trailing "]
    for text in texts:
        ids = tok(text)["input_ids"]
        assert ids[0] == BOS_ID  # BOS prepended when encoding with special tokens
        assert ids[1:] == list(text.encode("utf-8"))  # one id per UTF-8 byte, id == byte value
        assert tok.decode(ids, skip_special_tokens=True) == text
    assert [tok.decode([i]) for i in b"Az0 ."] == ["A", "z", "0", " ", "."]
    assert tok(["ab", "abcd"], padding=True)["input_ids"][0][-1] == tok.pad_token_id


# ------------------------------------------------------------------------------------------ corpus
def test_corpus_is_deterministic_and_large_enough():
    a = corpus.generate_documents()
    b = corpus.generate_documents()
    assert corpus.corpus_sha256(a) == corpus.corpus_sha256(b)
    assert len(corpus.corpus_text(a).encode("utf-8")) >= 2_000_000
    other = corpus.generate_documents(seed=corpus.CORPUS_SEED + 1, target_bytes=50_000)
    assert corpus.corpus_sha256(other) != corpus.corpus_sha256(a[: len(other)])
    # planted slots: every document's header puts its fields at the same byte offsets
    assert {d.index("| no. ") for d in a} == {10}
    assert len({d.index("\n") for d in a}) == 1
    # planted counting and induction: numbered entries and passages repeated within a document
    assert sum("Entry 3." in d for d in a) > 50
    assert sum("Copied again from an earlier page" in d or "here it is again" in d for d in a) > 50
    train_docs, val_docs = corpus.split_documents(a)
    assert len(val_docs) == len(a) // corpus.VAL_EVERY and not set(train_docs) & set(val_docs)


def test_sample_texts_exist_and_are_sized():
    folder = Path(__file__).resolve().parents[1] / "sample_text"
    files = sorted(folder.glob("*.txt"))
    assert 4 <= len(files) <= 6
    for f in files:
        assert 1000 <= len(f.read_bytes()) <= 5 * 1024, f.name
