"""Scheme detection from transformers 5 configs, and configs or checkpoints refused before anything is measured.

External checks: transformers' own configs and models (GPT-NeoX keeps ``rotary_pct`` in
``rope_parameters["partial_rotary_factor"]`` and rotates ``int(head_dim * factor)`` dimensions — its
modeling_gpt_neox; BERT's ``relative_key`` variants are Shaw et al. 2018 / Huang et al. 2020, no longer implemented
by transformers 5, which ignores the field).
"""

import json

import pytest
import torch

import attnpos
from attnpos.locate import head_count_problem, locate

import tiny


@pytest.mark.parametrize("factor,scheme,fraction", [(0.0, "none", None), (0.25, "rope", 0.25), (1.0, "rope", None)])
def test_partial_rotary_factor(factor, scheme, fraction):
    import transformers as tf

    cfg = tf.GPTNeoXConfig(num_hidden_layers=1, num_attention_heads=4, hidden_size=32, intermediate_size=64,
                           max_position_embeddings=64, vocab_size=tiny.VOCAB, rotary_pct=factor)
    assert cfg.rope_parameters["partial_rotary_factor"] == factor      # where transformers 5 keeps it
    model = tf.GPTNeoXForCausalLM(cfg)
    s = attnpos.subject.from_model(model, tiny.tokenizer())
    assert s.schemes == [scheme]
    assert s.rope_fraction == fraction
    assert s.describe()["rope_fraction"] == fraction
    assert any("partial_rotary_factor" in n for n in s.notes) == (fraction is not None)


def test_factor_rotating_no_whole_pair_is_none():
    # head_dim 8 × 0.1 → int(0.8) = 0 rotated dimensions (transformers' GPT-NeoX attention)
    import transformers as tf

    cfg = tf.GPTNeoXConfig(num_hidden_layers=1, num_attention_heads=4, hidden_size=32, intermediate_size=64,
                           vocab_size=tiny.VOCAB, rotary_pct=0.1)
    s = attnpos.subject.from_model(tf.GPTNeoXForCausalLM(cfg), tiny.tokenizer())
    assert s.schemes == ["none"]


@pytest.mark.parametrize("kind", ["relative_key", "relative_key_query"])
def test_bert_relative_key_config_refused(kind, tmp_path):
    import transformers as tf

    cfg = tf.BertConfig(num_hidden_layers=1, num_attention_heads=4, hidden_size=32, intermediate_size=64,
                        vocab_size=tiny.VOCAB, position_embedding_type=kind)
    model = tf.BertModel(cfg)
    with pytest.raises(attnpos.AttnposError, match="no longer implements"):
        attnpos.subject.from_model(model, tiny.tokenizer())
    model.save_pretrained(tmp_path / "m")
    with pytest.raises(attnpos.AttnposError, match=kind):
        locate(tmp_path / "m")                       # refused before torch or a model loads


def test_checkpoint_with_distance_embedding_tensors_refused(tmp_path):
    # an older relative_key checkpoint whose config no longer says so: the tensors give it away, and transformers
    # would drop them as unexpected while loading
    from safetensors.torch import load_file, save_file

    model = tiny.build("bert", layers=1)
    folder = tmp_path / "old"
    model.save_pretrained(folder)
    tiny.tokenizer().save_pretrained(folder)
    weights = load_file(folder / "model.safetensors")
    weights["encoder.layer.0.attention.self.distance_embedding.weight"] = torch.zeros(511, 8)
    save_file(weights, folder / "model.safetensors", metadata={"format": "pt"})
    with pytest.raises(attnpos.AttnposError, match="distance_embedding"):
        attnpos.load(folder)


@pytest.mark.parametrize("cfg,word", [
    ({"model_type": "llama", "num_attention_heads": 4, "num_key_value_heads": 8, "hidden_size": 32, "head_dim": 8},
     "key/value heads"),
    ({"model_type": "llama", "num_attention_heads": 6, "num_key_value_heads": 4, "hidden_size": 48, "head_dim": 8},
     "key/value heads"),
    ({"model_type": "bert", "num_attention_heads": 5, "hidden_size": 32}, "hidden size"),
    ({"model_type": "x", "text_config": {"model_type": "y", "num_attention_heads": 4, "num_key_value_heads": 3,
                                         "hidden_size": 32}}, "key/value heads"),
])
def test_head_counts_that_do_not_divide(cfg, word):
    assert word in head_count_problem(cfg)


def test_head_counts_that_divide_pass():
    assert head_count_problem({"num_attention_heads": 9, "num_key_value_heads": 3, "hidden_size": 576}) is None
    # an explicit head width need not divide the hidden size (e.g. Gemma-style configs)
    assert head_count_problem({"num_attention_heads": 3, "hidden_size": 32, "head_dim": 16}) is None


def test_more_kv_heads_than_query_heads_refused_in_memory_and_on_disk(tmp_path):
    # transformers' own repeat would use a factor of 0; attnpos refuses before it measures anything
    model = tiny.build("llama", layers=1, heads=4, num_key_value_heads=8)
    with pytest.raises(attnpos.AttnposError, match="key/value heads"):
        attnpos.subject.from_model(model, tiny.tokenizer())
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "config.json").write_text(json.dumps(model.config.to_dict()))
    (folder / "model.safetensors").write_bytes(b"")
    with pytest.raises(attnpos.AttnposError, match="8 key/value heads for 4 query heads"):
        locate(folder)
