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


# ------------------------------------------------------------------ ALBERT: one layer shared across depth
# transformers' AlbertTransformer applies num_hidden_groups groups of inner_group_num layers over
# num_hidden_layers depths, stored once as albert.encoder.albert_layer_groups.G.albert_layers.L.*; its task models
# (AlbertForMaskedLM …) build the body with add_pooling_layer=False, so their checkpoints hold no pooler
# (modeling_albert in transformers)

@pytest.fixture(scope="module")
def albert_dirs(tmp_path_factory):
    """An ALBERT masked-LM and a bare ALBERT, random weights, 12 depths over one shared layer."""
    import transformers as tf

    root = tmp_path_factory.mktemp("albert")
    cfg = tf.AlbertConfig(num_hidden_layers=12, num_attention_heads=4, hidden_size=32, embedding_size=16,
                          intermediate_size=64, max_position_embeddings=128, vocab_size=tiny.tokenizer().vocab_size)
    out = {}
    for name, cls in (("mlm", tf.AlbertForMaskedLM), ("bare", tf.AlbertModel)):
        torch.manual_seed(0)
        model = cls(cfg).eval()
        model.save_pretrained(root / name)
        tiny.tokenizer().save_pretrained(root / name)
        out[name] = (root / name, model)
    return out


def test_albert_masked_lm_checkpoint_loads_and_scans(albert_dirs):
    folder, mlm = albert_dirs["mlm"]
    s = attnpos.load(folder)
    assert s.n_layers == 12 and len(s.sites) == 12 and s.missing_weights == []
    assert len({id(site.module) for site in s.sites}) == 1              # one module, applied at every depth
    assert any("no pooler" in n for n in s.notes)
    ids = tiny.tokenizer()("The tide turned at four and the boats came in.", return_tensors="pt")["input_ids"]
    with torch.no_grad():                    # the loaded body computes what the saved model's body computes
        want = mlm.albert(ids).last_hidden_state
        got = s.model(ids).last_hidden_state
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-5)
    scan = attnpos.scan(s, ["The tide turned at four and the boats came in one by one."], n_boot=0, shift=False,
                        induction=False)
    assert len(scan.heads) == 48 and scan.heads["mass_previous"].notna().all()


@pytest.mark.parametrize("name,drop", [
    ("mlm", "albert.encoder.albert_layer_groups.0.albert_layers.0.attention.query.weight"),
    ("bare", "pooler.weight"),               # a pooler that is only partly there is a damaged checkpoint
])
def test_albert_tensor_removed_is_refused_naming_it_alone(albert_dirs, tmp_path, name, drop):
    import shutil

    from safetensors.torch import load_file, save_file

    folder = tmp_path / "holes"
    shutil.copytree(albert_dirs[name][0], folder)
    weights = load_file(folder / "model.safetensors")
    del weights[drop]
    save_file(weights, folder / "model.safetensors", metadata={"format": "pt"})
    with pytest.raises(attnpos.AttnposError, match="1 tensor") as err:
        attnpos.load(folder)
    assert drop.removeprefix("albert.") in str(err.value)


def test_albert_depth_is_not_its_stored_layers_but_its_groups_are(albert_dirs, tmp_path):
    from attnpos.sizes import check_checkpoint

    folder = albert_dirs["bare"][0]
    cfg = json.loads((folder / "config.json").read_text())
    check_checkpoint(folder, cfg)            # 12 depths over one stored layer: what ALBERT is
    assert locate(folder).config["num_hidden_layers"] == 12
    for key in ("num_hidden_groups", "inner_group_num"):
        with pytest.raises(attnpos.AttnposError, match=f"claims 3 .*{key}.*hold only 1"):
            check_checkpoint(folder, {**cfg, key: 3})
