"""What-if context extension (attnpos stretch): the variants' frequencies against transformers' own
rope-initialisation functions, the linear-interpolation identity, the stage on the RoPE reference model, the view and
report, and bad input refused before any model loads."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import torch

import attnpos
from attnpos.core import scalings
from attnpos.errors import AttnposError

import tiny


# ------------------------------------------------------------------------------------------------ the grammar

def test_variant_grammar():
    v = scalings.parse("linear:4")
    assert (v.name, v.kind, v.factor) == ("linear:4", "linear", 4.0)
    assert scalings.parse("dynamic").factor == scalings.DYNAMIC_FACTOR
    assert scalings.parse("yarn", stretch=8.0).factor == 8.0           # default factor: the stretch asked
    y = scalings.parse("yarn:4:16:2")
    assert y.extra == {"beta_fast": 16.0, "beta_slow": 2.0} and y.name == "yarn:4:16:2"
    assert scalings.parse("llama3:8:1:4").extra == {"low_freq_factor": 1.0, "high_freq_factor": 4.0}


@pytest.mark.parametrize("spec,message", [
    ("wiggle:4", "Unknown scaling"), ("linear:1", "above 1"), ("yarn:0.5", "above 1"), ("linear:x", "not a number"),
    ("longrope", "short_factor"), ("yarn:4:1:32", "BETA_FAST > BETA_SLOW"), ("linear:4:2", "wrong number"),
    ("none", "always measured"),
])
def test_bad_variants_are_refused_with_a_reason(spec, message):
    with pytest.raises(AttnposError, match=message):
        scalings.parse(spec, stretch=4.0)


# ------------------------------------------------------------------------------------------------ transformers' own

CONFIGS = [(10000.0, 32, 128, 1.0), (500000.0, 64, 8192, 1.0), (10000.0, 128, 2048, 1.0), (10000.0, 64, 512, 0.5)]
SPECS = ["linear:4", "dynamic", "dynamic:3", "yarn:4", "yarn:8:16:2", "llama3:8", "llama3:4:2:8"]


@pytest.mark.parametrize("theta,head_dim,L,partial", CONFIGS)
@pytest.mark.parametrize("spec", SPECS)
def test_frequencies_and_attention_factor_equal_transformers_rope_init(theta, head_dim, L, partial, spec):
    # reference implementation: transformers.modeling_rope_utils.ROPE_INIT_FUNCTIONS, the functions the model's
    # rotary module calls for each rope_type, on a config carrying the rope_parameters attnpos builds
    from transformers import LlamaConfig
    from transformers.modeling_rope_utils import ROPE_INIT_FUNCTIONS

    v = scalings.parse(spec)
    base = {"rope_theta": theta, "rope_type": "default"}
    if partial != 1.0:
        base["partial_rotary_factor"] = partial
    rp, mpe = v.rope_parameters(base, L)
    cfg = LlamaConfig(hidden_size=head_dim * 4, num_attention_heads=4, head_dim=head_dim,
                      max_position_embeddings=mpe, rope_parameters=dict(rp))
    dim = int(head_dim * partial)
    for seq_len in (None, 2 * L, 4 * L):
        inv, att = ROPE_INIT_FUNCTIONS[v.kind](cfg, None, seq_len=seq_len)
        mine = scalings.inv_freq(v, theta, dim, L, seq_len or cfg.max_position_embeddings)
        np.testing.assert_allclose(inv.numpy(), mine, rtol=2e-6)
        assert att == pytest.approx(scalings.attention_factor(v), abs=1e-12)


def test_linear_interpolation_score_is_the_unscaled_score_at_divided_positions():
    # Chen et al. 2023 (position interpolation): with every frequency divided by s, the rotary score of (i, j) is
    # exactly the unscaled score at positions (i/s, j/s). Both sides through transformers' own Llama rotary module
    # and apply_rotary_pos_emb; the unscaled side is handed fractional positions.
    from transformers import LlamaConfig
    from transformers.models.llama.modeling_llama import LlamaRotaryEmbedding, apply_rotary_pos_emb

    s, T, d = 4.0, 96, 32
    base = LlamaConfig(hidden_size=4 * d, num_attention_heads=4, head_dim=d, max_position_embeddings=T,
                       rope_parameters={"rope_type": "default", "rope_theta": 10000.0})
    rp, mpe = scalings.parse("linear:4").rope_parameters(dict(base.rope_parameters), 24)
    scaled = LlamaConfig(hidden_size=4 * d, num_attention_heads=4, head_dim=d, max_position_embeddings=mpe,
                         rope_parameters=rp)
    g = torch.Generator().manual_seed(0)
    q = torch.randn(1, 1, T, d, generator=g, dtype=torch.float64)
    k = torch.randn(1, 1, T, d, generator=g, dtype=torch.float64)
    pos = torch.arange(T)[None]
    x = torch.zeros(1, T, d, dtype=torch.float64)

    def scores(cfg, positions):
        cos, sin = LlamaRotaryEmbedding(cfg)(x, positions)
        qr, kr = apply_rotary_pos_emb(q, k, cos.double(), sin.double())
        return (qr @ kr.transpose(-1, -2))[0, 0]

    a = scores(scaled, pos)
    b = scores(base, pos.double() / s)
    torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)
    assert not torch.allclose(a, scores(base, pos), atol=1e-3)        # the scaling does change the scores


# ------------------------------------------------------------------------------------------------ the stage

@pytest.fixture(scope="module")
def long_text():
    from attnpos.reference import corpus

    return corpus.generate_documents(seed=corpus.CORPUS_SEED + 41, target_bytes=6000)


@pytest.fixture(scope="module")
def result(long_text):
    from attnpos.stretching import stretch

    return stretch(tiny.reference("rope"), long_text, to=256, scalings=["linear:2", "yarn:2"], n_sequences=3,
                   n_boot=30)


def test_stage_on_the_reference_model(result):
    assert result.variant_names == ["unscaled", "linear:2", "yarn:2"]
    assert result.training_length == 128 and len(result.heads) == 16
    for v in result.variants:
        loss = np.array(v["loss"], float)
        assert len(loss) == 255 and np.isfinite(loss).all()
        assert np.all(np.array(v["loss_lo"]) <= loss + 1e-9) and np.all(loss <= np.array(v["loss_hi"]) + 1e-9)
        assert v["frequency_error"] is not None and v["frequency_error"] < 1e-5  # the model holds our frequencies
    assert result.variant("yarn:2")["rope_parameters"]["original_max_position_embeddings"] == 128
    assert result.variant("yarn:2")["model_attention_scaling"] == pytest.approx(0.1 * np.log(2) + 1)
    for h in result.heads:
        assert h["n_broken"] == sum(h["variants"][n]["broken"] for n in ("linear:2", "yarn:2"))
        for n, c in h["variants"].items():
            assert c["broken"] == bool(c["reasons"])
            role_changed = c["role"] != h["reference"]["role"]
            assert role_changed == any(r.startswith("role ") for r in c["reasons"])
            prof = np.array([np.nan if x is None else x for x in c["profile"]], float)
            assert np.all(prof[np.isfinite(prof)] >= -1e-7)
    t = result.table()
    assert list(t["n_broken"]) == sorted(t["n_broken"], reverse=True)
    json.dumps(result.to_json(), allow_nan=False)


def test_unscaled_variant_inside_the_training_length_is_the_model_at_its_training_length(result, long_text):
    # a causal model's queries before L see only keys before L: the unscaled loss at positions < L equals the loss of
    # the first L tokens read alone (the reference of every head is this)
    from attnpos import length as length_mod

    s = tiny.reference("rope")
    units, _ = length_mod.sequences(s, long_text, 256, 3)
    own = []
    with torch.no_grad():
        for u in units:
            ids = torch.tensor([u.ids[:128]])
            logits = s.model(input_ids=ids).logits[0, :-1]
            own.append(torch.nn.functional.cross_entropy(logits, ids[0, 1:], reduction="none").numpy())
    np.testing.assert_allclose(np.array(result.variants[0]["loss"][:127]), np.mean(own, axis=0), rtol=1e-4, atol=1e-5)


def test_measurement_leaves_the_model_alone(long_text):
    from attnpos.stretching import stretch

    s = tiny.reference("rope")
    ids = torch.tensor([list(range(60))])
    with torch.no_grad():
        before = s.model(input_ids=ids).logits.clone()
    stretch(s, long_text, to=192, scalings=["dynamic:2"], n_sequences=2, n_boot=0)
    with torch.no_grad():
        after = s.model(input_ids=ids).logits
    assert torch.equal(before, after) and s.model.config.rope_parameters["rope_type"] == "default"


def test_variant_keeps_the_weights_dtype():
    # --dtype bfloat16: the rebuilt variant must hold its weights in bfloat16 too, not silently upcast to float32
    from attnpos.stretching import variant_subject

    s = attnpos.load("ref:rope", dtype="bfloat16")
    v = scalings.parse_all(["linear:2"], 2.0)[0]
    vs, _ = variant_subject(s, v, 128)
    assert s.dtype == vs.dtype == "bfloat16"
    assert all(p.dtype == torch.bfloat16 for p in vs.model.parameters())


def test_stage_refuses_a_model_without_rope():
    from attnpos.stretching import stretch

    with pytest.raises(AttnposError, match="ALiBi needs no scaling"):
        stretch(tiny.reference("alibi"), to=256)
    with pytest.raises(AttnposError, match="does not go past the training length"):
        stretch(tiny.reference("rope"), to=128)


# ------------------------------------------------------------------------------------------------ view and report

def test_board_and_report(result, tmp_path):
    from attnpos.stretch_report import write_stretch_report
    from attnpos.views.stretch import StretchBoard, stretch_html

    board = StretchBoard(result)
    n = len(result.position)
    vals = np.frombuffer(board.loss_values, "<f4")
    assert vals.shape == (3 * 3 * n,)
    np.testing.assert_allclose(vals[:n], np.array(result.variants[0]["loss"], float), rtol=1e-6)
    assert board.meta["heads"][0]["key"] == result.ranked()[0]["key"] and board.selected
    page = stretch_html(result)
    assert page.count("class='st-line'") == 3 and "st-train" in page
    assert page.count("<td class='st-break'") + page.count("<td class='st-keep'") == 16 * 3
    assert "href='#st-L0-H0'" in page and "id='st-L0-H0'" in page
    path = write_stretch_report(result, tmp_path / "stretch.html")
    text = path.read_text()
    assert "Content-Security-Policy" in text and "<script" not in text and result.caution[:40] in text


# ------------------------------------------------------------------------------------------------ bad input first

BAD = [
    (["stretch", "ref:alibi", "--to", "512"], "ALiBi needs no scaling"),
    (["stretch", "ref:learned-absolute", "--to", "512"], "cannot be read past its length"),
    (["stretch", "ref:none", "--to", "512"], "no positional encoding"),
    (["stretch", "ref:relative-bias", "--to", "512"], "needs no scaling"),
    (["stretch", "ref:rope", "--to", "512", "--scaling", "wiggle:4"], "Unknown scaling"),
    (["stretch", "ref:rope", "--to", "512", "--scaling", "linear:1"], "above 1"),
    (["stretch", "ref:rope", "--to", "512", "--scaling", "yarn:0.9"], "above 1"),
    (["stretch", "ref:rope", "--to", "512", "--scaling", "longrope"], "LongRoPE"),
    (["stretch", "ref:rope", "--to", "128"], "does not go past the training length 128"),
    (["stretch", "ref:rope", "--to", "100"], "does not go past the training length 128"),
    (["stretch", "ref:rope", "--to", "512", "--report", "/no/such/folder/r.html"], "does not exist"),
]


@pytest.mark.parametrize("argv,message", BAD, ids=[f"{a[1]} {' '.join(a[3:])}" for a, _ in BAD])
def test_bad_input_is_refused_before_torch_loads(argv, message, tmp_path):
    tiny.refused_before_torch(argv, message, tmp_path)


def test_command_line_run_writes_json_and_report(tmp_path, capsys):
    from attnpos.cli import main
    from attnpos.core.protocol import load

    rc = main(["stretch", "ref:rope", "--to", "160", "--scaling", "linear:2", "--sequences", "2", "--boot", "5",
               "--quiet", "--json", str(tmp_path / "s.json"), "--report", str(tmp_path / "s.html")])
    assert rc == 0
    printed = capsys.readouterr().out
    assert "linear:2" in printed and "heads, most often broken first" in printed
    res = load(tmp_path / "s.json")
    assert res.result_kind == "stretch" and res.variant_names == ["unscaled", "linear:2"]
    assert "st-grid" in (tmp_path / "s.html").read_text()
    assert callable(attnpos.stretch)


@pytest.mark.parametrize("arch,over", [("qwen2", {"num_key_value_heads": 2}), ("gpt_neox", {}), ("smollm3", {})])
def test_other_rope_architectures_hold_the_variant_frequencies(arch, over, long_text):
    # grouped-query heads (qwen2), partial rotary (GPT-NeoX rotates a quarter of each head), RoPE and no-position
    # layers mixed (SmolLM3): the rebuilt model's rotary module holds exactly the frequencies of attnpos's formula
    from attnpos.stretching import stretch

    s = attnpos.from_model(tiny.build(arch, **over), tiny.tokenizer(), name=f"tiny-{arch}")
    res = stretch(s, long_text, to=96, training_length=32, scalings=["linear:3", "yarn:3"], n_sequences=2, n_boot=0)
    assert len(res.heads) == len(s.sites) * s.n_heads
    for v in res.variants:
        assert v["frequency_error"] is not None and v["frequency_error"] < 1e-5, (arch, v["name"])
        assert np.isfinite(np.array(v["loss"][:-1], float)).all()     # the last target is the tokenizer's [SEP]
