"""Odd checkpoints and odd attention: clear errors for what cannot be read, exact captures for what can."""

from __future__ import annotations

import json
import shutil
import warnings

import numpy as np
import pytest
import torch

import attnpos
from attnpos import texts
from attnpos.capture import CaptureNotice, Reducer, record
from attnpos.errors import AttnposError
from attnpos.reducers import SplitStats, WeightStats
from attnpos.split import Split

import tiny
from hostile_kit import FERRY, HARBOUR, assert_clean_error, save_checkpoint

pytestmark = pytest.mark.hostile


def Keep():
    return tiny.keep_reducer()


def eager_attentions(model, ids):
    """transformers' own eager attention with output_attentions: the reference implementation."""
    impl = model.config._attn_implementation
    model.set_attn_implementation("eager")
    try:
        with torch.no_grad():
            return model(input_ids=torch.tensor([ids], device=model.device), output_attentions=True).attentions
    finally:
        model.set_attn_implementation(impl)


# ------------------------------------------------------------------------------------------ folders that are not models

def test_folder_without_config_is_refused(tmp_path, llama_dir, cli):
    d = tmp_path / "weights-only"
    d.mkdir()
    shutil.copy(llama_dir / "model.safetensors", d / "model.safetensors")
    with pytest.raises(AttnposError, match="no config.json"):
        attnpos.load(d)
    code, _, err = cli("scan", d, "--boot", "0")
    assert_clean_error(code, err, "config.json", "save_pretrained")


def test_missing_model_path_is_refused(tmp_path, cli):
    code, _, err = cli("scan", tmp_path / "no-such-model", "--boot", "0")
    assert_clean_error(code, err, "no model folder", "no-such-model")


def _copy_with_config(src, dst, config_bytes: bytes):
    shutil.copytree(src, dst)
    (dst / "config.json").write_bytes(config_bytes)
    return dst


def test_unknown_architecture_is_refused(tmp_path, llama_dir, cli):
    cfg = json.loads((llama_dir / "config.json").read_text(encoding="utf-8"))
    cfg["model_type"] = "ferrywheel"
    cfg["architectures"] = ["FerrywheelForCausalLM"]
    d = _copy_with_config(llama_dir, tmp_path / "ferrywheel", json.dumps(cfg).encode())
    with pytest.raises(AttnposError, match="ferrywheel"):
        attnpos.load(d)
    code, _, err = cli("scan", d, "--boot", "0")
    assert_clean_error(code, err, "does not know the architecture", "ferrywheel")


def test_config_without_model_type_is_refused(tmp_path, llama_dir):
    cfg = json.loads((llama_dir / "config.json").read_text(encoding="utf-8"))
    cfg.pop("model_type")
    cfg.pop("architectures", None)
    d = _copy_with_config(llama_dir, tmp_path / "anon", json.dumps(cfg).encode())
    with pytest.raises(AttnposError, match="architecture"):
        attnpos.load(d)


@pytest.mark.parametrize("body", [b'{"model_type": "llama", "hidden_size": 3', b"[1, 2, 3]", b"\xff\xfe{\x00}\x00"],
                         ids=["truncated-json", "json-list", "not-utf8"])
def test_unreadable_config_is_refused(tmp_path, llama_dir, cli, body):
    d = _copy_with_config(llama_dir, tmp_path / "broken-config", body)
    with pytest.raises(AttnposError, match="config.json"):
        attnpos.load(d)
    code, _, err = cli("scan", d, "--boot", "0")
    assert_clean_error(code, err, "config.json")


def test_truncated_weights_are_refused(tmp_path, llama_dir, cli):
    d = tmp_path / "truncated"
    shutil.copytree(llama_dir, d)
    data = (d / "model.safetensors").read_bytes()
    (d / "model.safetensors").write_bytes(data[: len(data) // 3])
    code, _, err = cli("scan", d, "--boot", "0")
    assert_clean_error(code, err, "could not load the weights", "save_pretrained")


def test_weights_of_another_shape_are_refused(tmp_path, llama_dir):
    cfg = json.loads((llama_dir / "config.json").read_text(encoding="utf-8"))
    cfg["hidden_size"] = 64
    cfg["intermediate_size"] = 128
    d = _copy_with_config(llama_dir, tmp_path / "mismatch", json.dumps(cfg).encode())
    with pytest.raises(AttnposError, match=r"another shape .*model\.embed_tokens\.weight.*save_pretrained"):
        attnpos.load(d)          # the tensors are named (it was a generic "could not load" before)


def test_folder_without_tokenizer_is_refused(tmp_path):
    d = tmp_path / "no-tokenizer"
    tiny.build("llama").save_pretrained(d)
    with pytest.raises(AttnposError, match="tokenizer"):
        attnpos.load(d)


# ------------------------------------------------------------------------------------------ attention implementations

@pytest.mark.parametrize("arch", ["llama", "bert"])
def test_sdpa_model_is_captured_through_a_capturing_path_with_a_notice(tmp_path, arch):
    # loaded the way a user would, with PyTorch's fused attention, which exposes no weights
    from transformers import AutoModel

    d = save_checkpoint(tiny.build(arch), tmp_path / arch)
    model = AutoModel.from_pretrained(d, attn_implementation="sdpa").eval()
    assert model.config._attn_implementation == "sdpa"
    s = attnpos.from_model(model, tiny.tokenizer())
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rec = record(s, [FERRY], [Keep()])
    notices = [w for w in caught if issubclass(w.category, CaptureNotice)]
    assert len(notices) == 1 and "sdpa" in str(notices[0].message)
    assert any("sdpa" in n for n in s.notes)
    assert rec.capture == "registry"
    assert model.config._attn_implementation == "sdpa"         # restored
    ids = rec.units[0].ids
    # reference implementation: transformers' own eager attention with output_attentions
    atts = eager_attentions(model, ids)
    for site, att in zip(s.sites, atts):
        _, w, _, _ = rec.results["keep"][(0, site.stack, site.layer, 0)]
        torch.testing.assert_close(w, att[0].float(), atol=1e-5, rtol=1e-4)
    # a second recording gives no second notice
    with warnings.catch_warnings(record=True) as again:
        warnings.simplefilter("always")
        record(s, [HARBOUR], [])
    assert not [w for w in again if issubclass(w.category, CaptureNotice)]


def test_load_from_disk_always_captures_eagerly(tmp_path):
    d = save_checkpoint(tiny.build("llama"), tmp_path / "sdpa-config")
    cfg = json.loads((d / "config.json").read_text(encoding="utf-8"))
    cfg["attn_implementation"] = "sdpa"
    (d / "config.json").write_text(json.dumps(cfg), encoding="utf-8")
    s = attnpos.load(d)
    assert s.model.config._attn_implementation == "eager"


@pytest.mark.parametrize("kv_heads", [2, 1], ids=["grouped", "multi-query"])
def test_grouped_query_attention_matches_eager(kv_heads):
    s = tiny.subject("llama", heads=4, num_key_value_heads=kv_heads)
    assert s.model.config.num_key_value_heads == kv_heads and s.n_heads == 4
    rec = record(s, [FERRY], [Keep()])
    # reference implementation: transformers' own eager attention with output_attentions
    atts = eager_attentions(s.model, rec.units[0].ids)
    for site, att in zip(s.sites, atts):
        sc, w, allowed, _ = rec.results["keep"][(0, site.stack, site.layer, 0)]
        assert w.shape[0] == 4                                 # every query head, not one per key/value group
        torch.testing.assert_close(w, att[0].float(), atol=1e-5, rtol=1e-4)
        torch.testing.assert_close(torch.softmax(sc, -1), w, atol=1e-6, rtol=1e-5)
    # heads sharing a key/value group still differ (their queries differ): nothing was collapsed
    _, w, _, _ = rec.results["keep"][(0, "main", 0, 0)]
    assert not torch.allclose(w[0], w[1])


def test_sliding_window_mask_and_weights_match_eager():
    W = 5
    s = tiny.subject("mistral", sliding_window=W)
    rec = record(s, [FERRY], [Keep(), WeightStats(), SplitStats()])
    T = len(rec.units[0])
    assert T > 3 * W
    # the window rule of transformers' masking_utils.sliding_window_overlay: key j is visible from query i
    # when 0 <= i - j < W (common practice; rule read from that reference implementation)
    i = torch.arange(T)[:, None]
    j = torch.arange(T)[None, :]
    # sliding-window attention (Jiang et al. 2023, Mistral 7B): query i sees keys i - W < j <= i
    expected = (i - j >= 0) & (i - j < W)
    # reference implementation: transformers' own eager attention with output_attentions
    atts = eager_attentions(s.model, rec.units[0].ids)
    for site, att in zip(s.sites, atts):
        sc, w, allowed, _ = rec.results["keep"][(0, site.stack, site.layer, 0)]
        assert torch.equal(allowed, expected)
        torch.testing.assert_close(w, att[0].float(), atol=1e-5, rtol=1e-4)
        assert (w[:, ~expected] == 0).all() and torch.isinf(sc[:, ~expected]).all()
    ws = rec.results["weights"]
    assert np.isfinite(ws["mass"]["previous"]).all()
    fit = Split(n_boot=0).fit(rec)
    np.testing.assert_allclose(fit.shares.sum(-1), 1.0, atol=1e-9)
    assert np.isnan(fit.profile[..., s_dist_index(rec, W + 2)]).all()    # δ never seen → no profile value


def s_dist_index(rec, delta):
    design = rec.results["split"]["design"]
    return int(design.dist_b[delta])


# ------------------------------------------------------------------------------------------ pads and batches

class Shapes(Reducer):
    name = "shapes"

    def begin(self, subject, units):
        self.t = {}

    def update(self, cap):
        self.t.setdefault(cap.text, set()).add(tuple(cap.scores.shape[-2:]))

    def result(self):
        return self.t


def test_pad_strings_in_user_text_are_special_and_never_queries():
    s = tiny.subject("llama")
    text = "the [PAD] ferry [PAD] leaves at seven [PAD] and turns [PAD] back at noon"
    u = texts.prepare(s, texts.from_strings([text]))[0]
    pad = s.tokenizer.pad_token_id
    is_pad = np.asarray(u.ids) == pad
    assert is_pad.sum() == 4 and u.special[is_pad].all()
    rec = record(s, units=[u], reducers=[WeightStats()])
    # reference implementation: transformers' own eager attention with output_attentions
    w_all = eager_attentions(s.model, u.ids)
    ordinary = ~u.special
    q = np.flatnonzero(ordinary)
    q = q[q >= 1]
    for k, (site, att) in enumerate(zip(s.sites, w_all)):
        w = att[0].numpy()
        expect = w[:, q, q - 1].mean(-1)          # previous-token mass over ordinary queries only
        got = rec.results["weights"]["mass"]["previous"][k]
        np.testing.assert_allclose(got, expect, atol=1e-5)
        with_pads = w[:, np.arange(1, len(u)), np.arange(0, len(u) - 1)].mean(-1)
        assert not np.allclose(got, with_pads, atol=1e-4)     # the check above can tell the difference


def test_texts_of_different_lengths_run_one_at_a_time_without_padding():
    s = tiny.subject("gpt2")
    rec = record(s, ["a short note", FERRY, HARBOUR + " " + FERRY], [Shapes()])
    for t, u in enumerate(rec.units):
        assert rec.results["shapes"][t] == {(len(u), len(u))}
        assert s.tokenizer.pad_token_id not in u.ids


# ------------------------------------------------------------------------------------------ NaN and inf

@pytest.mark.parametrize("value", [float("nan"), float("inf")], ids=["nan", "inf"])
def test_nonfinite_weights_are_reported_at_load(tmp_path, cli, value):
    model = tiny.build("llama")
    with torch.no_grad():
        model.model.layers[1].self_attn.q_proj.weight[0, 0] = value
    d = save_checkpoint(model, tmp_path / "poisoned")
    with pytest.raises(AttnposError, match=r"layers\.1\.self_attn\.q_proj\.weight"):
        attnpos.load(d)
    with pytest.raises(AttnposError, match="NaN or infinite"):
        attnpos.from_model(model, tiny.tokenizer())
    code, out, err = cli("scan", d, "--boot", "0", "--no-shift", "--no-induction")
    assert_clean_error(code, err, "nan or infinite", "q_proj")
    assert "nan" not in out.lower()


@pytest.mark.parametrize("arch", ["llama", "bert", "bloom"])
def test_overflowing_scores_are_reported_not_turned_into_nan_shares(arch):
    # finite weights, but queries and keys so large that q·k overflows float32 to ±inf
    model = tiny.build(arch)
    with torch.no_grad():
        for n, p in model.named_parameters():
            leaf = n.split(".")[-2]
            if leaf in ("q_proj", "k_proj", "query", "key", "query_key_value"):
                p.mul_(1e21)
    s = attnpos.from_model(model, tiny.tokenizer())
    with pytest.raises(AttnposError, match="NaN or infinite"):
        record(s, [FERRY], [WeightStats(), SplitStats()])


# ------------------------------------------------------------------------------------------ devices

def test_model_on_the_meta_device_is_refused_clearly():
    model = tiny.build("llama").to("meta")
    with pytest.raises(AttnposError, match="meta"):
        attnpos.from_model(model, tiny.tokenizer())


def _accelerator():
    if torch.cuda.is_available():
        return "cuda"
    mps = getattr(torch.backends, "mps", None)
    if mps is not None and mps.is_available():
        return "mps"
    return None


@pytest.mark.skipif(_accelerator() is None, reason="no CUDA or MPS device on this machine")
def test_model_on_an_accelerator_is_refused_clearly_or_captured_exactly():
    dev = _accelerator()
    model = tiny.build("llama").to(dev)
    try:
        s = attnpos.from_model(model, tiny.tokenizer())
    except AttnposError as exc:
        assert dev in str(exc) and "cpu" in str(exc).lower()
        return
    rec = record(s, [FERRY], [Keep()])
    # reference implementation: transformers' own eager attention with output_attentions
    atts = eager_attentions(s.model, rec.units[0].ids)
    _, w, _, _ = rec.results["keep"][(0, "main", 0, 0)]
    torch.testing.assert_close(w.cpu(), atts[0][0].float().cpu(), atol=1e-4, rtol=1e-3)


def test_bloom_config_set_to_sdpa_is_recorded_eagerly_and_put_back():
    # Bloom computes attention inside its own module (eager-weights path); a config that names "sdpa" must not
    # stop the capture, and must be left as it was
    s = tiny.subject("bloom")
    s.model.config._attn_implementation_internal = "sdpa"
    with pytest.warns(CaptureNotice):
        rec = record(s, [FERRY], [Keep()])
    assert rec.capture == "eager-weights" and s.model.config._attn_implementation == "sdpa"
    s.model.config._attn_implementation_internal = "eager"
    # reference implementation: transformers' own eager attention with output_attentions
    atts = eager_attentions(s.model, rec.units[0].ids)
    for site, att in zip(s.sites, atts):
        _, w, _, _ = rec.results["keep"][(0, site.stack, site.layer, 0)]
        torch.testing.assert_close(w, att[0].float(), atol=1e-5, rtol=1e-4)


def test_unknown_or_miscounted_scheme_is_refused(llama_dir, cli):
    code, _, err = cli("scan", llama_dir, "--scheme", "spiral", "--boot", "0")
    assert_clean_error(code, err, "unknown scheme", "spiral")
    code, _, err = cli("scan", llama_dir, "--scheme", "rope,none,rope", "--boot", "0")
    assert_clean_error(code, err, "3 names", "2 attention layers")
