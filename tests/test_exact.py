"""The capture never changes the model: on every family attnpos claims, the outputs under capture equal a plain run
and the kept weight maps equal transformers' eager ``output_attentions``.

External check: transformers' own eager forward pass (logits, hidden states, ``output_attentions``) is the
reference implementation. Every matrix of the tiny models is drawn from N(0, 0.15), so attention is far from
uniform and a wrong mask, a mixed-up layer or a sum over shared applications shows.
"""

import numpy as np
import pytest
import torch

import attnpos
from attnpos.capture import forward, next_token_loss, record

import tiny

TEXT = "The lighthouse keeper counted nine gulls, then eleven, then none at all."
WIDE = 0.15
TOL = 1e-5
KV = {"llama": 2, "mistral": 2, "qwen2": 1}     # grouped-query / multi-query variants where the config allows


def _subject(arch):
    over = {"num_key_value_heads": KV[arch]} if arch in KV else {}
    model = tiny.build(arch, wide=WIDE, seed=3, **over)
    return attnpos.subject.from_model(model, tiny.tokenizer(), name=f"wide-{arch}")


def _tensors(out, prefix=""):
    """Every float tensor of a model output, by a dotted name (attention maps left out)."""
    items = out.items() if hasattr(out, "items") else enumerate(out)
    found = {}
    for k, v in items:
        name = f"{prefix}{k}"
        if "attentions" in str(k) or v is None:
            continue
        if isinstance(v, torch.Tensor):
            if v.is_floating_point():
                found[name] = v
        elif isinstance(v, (tuple, list)):
            found.update(_tensors(v, name + "."))
    return found


def _eager_maps(subject, out):
    """Eager output_attentions per stack, in the order of the subject's sites."""
    if subject.is_encoder_decoder:
        return {"encoder": list(out.encoder_attentions), "decoder": list(out.decoder_attentions)}
    return {"main": list(out.attentions)}


def _recorded_outputs(s, **kw):
    """The recording's own forward output (the last forward pass: an architecture that never calls the registry is
    run again on the eager-weights path) and the recording."""
    grabbed = []
    hook = s.model.register_forward_hook(lambda m, a, out: grabbed.append(out))
    try:
        rec = record(s, [TEXT], keep="all", hidden_states=True, **kw)
    finally:
        hook.remove()
    assert 1 <= len(grabbed) <= 2
    return _tensors(grabbed[-1]), rec


@pytest.mark.parametrize("arch", tiny.FAMILIES)
def test_capture_never_changes_the_model(arch):
    s = _subject(arch)
    got, rec = _recorded_outputs(s)
    ids = rec.units[0].ids
    with torch.no_grad():
        plain = forward(s, ids, offset=0, want_weights=False, hidden=True)
        eager = forward(s, ids, offset=0, want_weights=True, hidden=False)
    ref = _tensors(plain)
    assert set(ref) <= set(got) and any("hidden_states" in k for k in ref)
    for name, r in ref.items():
        g = got[name]
        if name == "logits" and g.shape != r.shape:
            # a recording that reads no logits asks a causal LM for the last position's only (logits_to_keep)
            assert g.shape[1] == 1 and g.shape[0] == r.shape[0] and g.shape[2:] == r.shape[2:], (arch, g.shape)
            r = r[:, -1:]
        diff = float((g - r).abs().max())
        assert diff <= TOL, f"{arch}: {name} moved by {diff:.3g} under capture"
    # with token losses asked for, every position's logits are computed, and they are the plain run's
    full, rec_tl = _recorded_outputs(s, token_loss=True)
    if "logits" in ref:
        assert full["logits"].shape == ref["logits"].shape
        assert float((full["logits"] - ref["logits"]).abs().max()) <= TOL
        np.testing.assert_allclose(rec_tl.token_loss[0], next_token_loss(plain, list(ids)), atol=1e-5)
    maps = _eager_maps(s, eager)
    for stack, n in s.stacks:
        assert len(maps[stack]) == n, f"{arch}: {len(maps[stack])} eager maps for {n} {stack} sites"
    spread = []
    for site in s.sites:
        att = maps[site.stack][site.layer][0].float()
        for h in range(att.shape[0]):
            kept = torch.from_numpy(rec.maps[(0, site.stack, site.layer, h)])
            diff = float((kept - att[h]).abs().max())
            assert diff <= TOL, f"{arch}: {site.stack}:L{site.layer}.H{h} map off by {diff:.3g}"
        # largest weight of a row against the uniform weight over the row's allowed keys
        uniform = 1.0 / (att[0] > 0).sum(-1).clamp_min(1).float()
        spread.append(float(att.max(-1).values.mean() / uniform.mean()))
    # the check means something: on average the largest weight of a row is well above uniform
    assert max(spread) > 1.3, f"{arch}: attention is near uniform ({max(spread):.2f}× uniform)"


def test_cross_attention_is_left_out_by_name_and_runs_unchanged():
    s = _subject("bart")
    names = [site.name for site in s.sites]
    assert s.stacks == [("encoder", 2), ("decoder", 2)]
    assert all("encoder_attn" not in n for n in names)
    assert s.excluded == ["model.decoder.layers.0.encoder_attn", "model.decoder.layers.1.encoder_attn"]
    assert any("cross-attention" in note for note in s.notes)
    assert s.describe()["excluded"] == s.excluded


def test_unrecognised_cross_attention_is_refused_not_recorded_as_self_attention():
    # a cross-attention module that slipped through the name check (here: added by hand) is handed the encoder's
    # states at run time; the capture refuses it instead of masking it causally
    s = _subject("bart")
    module = s.model.get_submodule("model.decoder.layers.0.encoder_attn")
    s.sites.append(attnpos.subject.AttentionSite(stack="decoder", layer=2, name="model.decoder.layers.0.encoder_attn",
                                                 module=module, causal=True, scheme="learned-absolute"))
    with pytest.raises(attnpos.AttnposError, match="cross-attention"):
        record(s, [TEXT])


def test_shared_layer_recorded_per_application():
    s = _subject("albert")
    depth = s.model.config.num_hidden_layers
    assert s.n_layers == depth == 3
    assert {site.name for site in s.sites} == {"encoder.albert_layer_groups.0.albert_layers.0.attention"}
    assert [site.application for site in s.sites] == list(range(depth))
    assert all(site.shared == depth for site in s.sites)
    assert any("applied 3 times" in note for note in s.notes)
    # statistics per application, never summed: each layer's previous-token mass equals the mean of w[i, i-1] over
    # ordinary queries of that application's own map, and every entropy ratio is at most 1
    import numpy as np

    from attnpos.reducers import WeightStats

    rec = record(s, [TEXT], [WeightStats()], keep="all")
    res = rec.results[WeightStats.name]
    assert res["keys"] == [("main", i) for i in range(depth)]
    special = np.asarray(rec.units[0].special, dtype=bool)
    rows = [i for i in range(1, len(special)) if not special[i]]
    for layer in range(depth):
        for h in range(s.n_heads):
            w = rec.maps[(0, "main", layer, h)]
            expected = float(np.mean([w[i, i - 1] for i in rows]))
            assert res["mass"]["previous"][layer, h] == pytest.approx(expected, abs=1e-6)
    assert np.nanmax(res["entropy_ratio"]) <= 1.0 + 1e-6
    assert not np.allclose(res["mass"]["previous"][0], res["mass"]["previous"][1])


def test_shared_layer_groups_in_the_order_they_run():
    # ALBERT with 2 groups of 2 layers over 4 depths: depth i runs group int(i / 2) (transformers'
    # AlbertTransformer.forward), so 8 applications of 4 modules, each twice, in order; the maps equal eager's
    model = tiny.build("albert", layers=4, wide=WIDE, seed=3, num_hidden_groups=2, inner_group_num=2)
    s = attnpos.subject.from_model(model, tiny.tokenizer())
    order = [site.name.split("albert_layer_groups.")[1].split(".attention")[0] for site in s.sites]
    assert order == ["0.albert_layers.0", "0.albert_layers.1"] * 2 + ["1.albert_layers.0", "1.albert_layers.1"] * 2
    assert [site.application for site in s.sites] == [0, 0, 1, 1, 0, 0, 1, 1]
    rec = record(s, [TEXT], keep="all")
    with torch.no_grad():
        eager = forward(s, rec.units[0].ids, offset=0, want_weights=True, hidden=False)
    assert len(eager.attentions) == len(s.sites) == 8
    for site, att in zip(s.sites, eager.attentions):
        for h in range(s.n_heads):
            assert float((torch.from_numpy(rec.maps[(0, "main", site.layer, h)]) - att[0, h]).abs().max()) <= TOL


def test_shared_module_called_more_often_than_known_is_refused():
    s = _subject("albert")
    del s.sites[2:]                       # pretend attnpos knew only two of the three applications
    with pytest.raises(attnpos.AttnposError, match="ran 3 times"):
        record(s, [TEXT])


def test_shared_layers_refuse_ablation():
    from attnpos.ablation import ablate

    s = _subject("albert")
    with pytest.raises(attnpos.AttnposError, match="applied 3 times"):
        ablate(s, ["L0.H0"], [TEXT])


@pytest.mark.parametrize("arch,dtype", [("llama", "bfloat16"), ("bert", "bfloat16"), ("t5", "bfloat16"),
                                        ("bart", "bfloat16"), ("bloom", "bfloat16"), ("llama", "float16")])
def test_low_precision_weights_outputs_unchanged_scores_in_float32(arch, dtype):
    # the model's own eager attention (its modelling file's eager_attention_forward) produces the output it passes
    # on, with its own rounding; the reducers get float32 scores computed beside it
    s = _subject(arch)
    s.model.to(getattr(torch, dtype))
    assert s.dtype == dtype
    grabbed, keep = [], tiny.keep_reducer()

    class Rows(attnpos.capture.Reducer):
        name = "rows"

        def begin(self, subject, units):
            self.err = []

        def update(self, cap):
            if cap.query is not None and cap.site.stack != "decoder":
                # scores from the float32 queries and keys, recomputed in float64 (the scaling is 1/sqrt(d) here,
                # except T5, which does not scale — Raffel et al. 2020)
                q, k = cap.query.double(), cap.key.double()
                scale = 1.0 if arch == "t5" else q.shape[-1] ** -0.5
                ref = (q @ k.transpose(-1, -2)) * scale
                if arch != "t5":        # T5 adds its relative bias; compare the plain dot products elsewhere
                    got = cap.zeroed_scores().double()
                    self.err.append(float(((got - ref) * cap.allowed).abs().max()))

        def result(self):
            return self.err

    hook = s.model.register_forward_hook(lambda m, a, out: grabbed.append(out))
    try:
        # token_loss: every position's logits are computed (a recording without it asks for the last one only)
        rec = record(s, [TEXT], [keep, Rows()], hidden_states=True, token_loss=True)
    finally:
        hook.remove()
    with torch.no_grad():
        plain = forward(s, rec.units[0].ids, offset=0, want_weights=False, hidden=True)
    got, ref = _tensors(grabbed[-1]), _tensors(plain)
    for name, r in ref.items():
        assert torch.equal(got[name], r), f"{arch} in {dtype}: {name} changed under capture"
    for sc, w, _, _ in rec.results["keep"].values():
        assert sc.dtype == torch.float32 and w.dtype == torch.float32
    if rec.capture == "registry" and arch != "t5":
        assert rec.results["rows"] and max(rec.results["rows"]) < 1e-4


def test_dtype_names_checked():
    from attnpos.subject import weights_dtype

    assert weights_dtype("bfloat16") == torch.bfloat16
    with pytest.raises(attnpos.AttnposError, match="float32, bfloat16, float16"):
        weights_dtype("int8")


def test_dtype_the_cpu_cannot_compute_is_a_clear_error(monkeypatch):
    from attnpos.subject import weights_dtype

    real = torch.nn.functional.linear

    def no_half(x, w, b=None):
        if x.dtype == torch.float16:
            raise RuntimeError('"addmm_impl_cpu_" not implemented for \'Half\'')   # what older CPU builds said
        return real(x, w, b)

    monkeypatch.setattr(torch.nn.functional, "linear", no_half)
    with pytest.raises(attnpos.AttnposError, match="cannot compute in float16"):
        weights_dtype("float16")


# ------------------------------------------------------------------------------------------------ the README table

def test_families_table_matches_what_attnpos_does():
    # every row of attnpos.core.families is checked against a tiny model of that family
    from attnpos.core import families

    assert set(families.names()) == set(tiny.FAMILIES)
    for spec in families.FAMILIES:
        s = _subject(spec.name)
        assert s.model.config.model_type == spec.model_type
        kind = "encoder-decoder" if s.is_encoder_decoder else "causal" if s.causal else "encoder"
        assert kind == spec.kind, spec.name
        assert "/".join(sorted(set(s.schemes), key=spec.scheme.split("/").index)) == spec.scheme, spec.name
        assert s.rope_fraction == spec.rope_fraction, spec.name
        expected = spec.score_kind
        if spec.name == "falcon" and _transformers_before(5, 25):
            # transformers' own change: falcon reaches the attention functions from 5.25 on (its
            # modeling_falcon.py); before, it computed attention inside the module
            expected = "log-weights"
        assert record(s, [TEXT]).score_kind == expected, spec.name


def _transformers_before(major: int, minor: int) -> bool:
    import transformers

    got = tuple(int(x) for x in transformers.__version__.split(".")[:2])
    return got < (major, minor)


def test_readme_families_table_is_generated():
    from pathlib import Path

    from attnpos.core import families

    text = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    block = text[text.index("<!-- families:start -->") + len("<!-- families:start -->"):
                 text.index("<!-- families:end -->")]
    assert block.strip() == families.readme_table()
