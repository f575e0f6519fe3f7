"""Texts of similar length share one forward pass (right-padded, with the padding mask). Padding must be invisible:
every reducer still gets one capture per text, computed on that text's own tokens, so a batched recording equals
the one-text-per-pass recording within float tolerance — the captured scores and weights, the statistics of
WeightStats and SplitStats, on causal RoPE models, a learned-absolute causal model and encoders.

External check: the one-text-per-pass recording, itself checked against transformers' eager attention in
tests/test_exact.py and tests/test_row_blocks.py, is the reference here; and transformers' own eager
``output_attentions`` of each text alone (no padding) checks the batched maps directly.
"""

import numpy as np
import pytest
import torch

import attnpos.capture as capture
from attnpos.capture import Reducer, batches, forward, record
from attnpos.reducers import SplitStats, WeightStats

import tiny

# different lengths (texts within a batch are padded to the longest), one much shorter (its own pass)
TEXTS = [
    "The ferry to the north island leaves at seven, stops twice, and returns at noon.",
    "The harbour office posts the tide table at six, then the ferry waits for the bell.",
    "The ferry to the north island leaves at seven and returns at noon.",
    "Fog.",
    "Gulls circled the pier while the keeper counted the crates on the cart.",
]
# registry-path families without a decoder stack (the ones attnpos batches)
BATCHED = ["llama", "mistral", "qwen2", "smollm3", "gpt2", "gpt_neox", "opt", "codegen", "bert", "distilbert",
           "albert"]


class Keep(Reducer):
    """Keeps every capture whole (and the order they came in); takes any order of texts."""
    name = "keep"
    any_order = True

    def begin(self, subject, units):
        self.d, self.order = {}, []

    def update(self, cap):
        key = (cap.text, cap.site.stack, cap.site.layer, cap.head0)
        self.order.append(key)
        rot = None if cap.rotary is None else tuple(r.clone() for r in cap.rotary)
        self.d[key] = (cap.zeroed_scores().clone(), cap.weights.clone(), cap.allowed.clone(),
                       None if cap.query is None else cap.query.clone(), rot)

    def result(self):
        return {"maps": self.d, "order": self.order}


def _close(a, b, what):
    scale = max(float(np.nan_to_num(np.abs(b)).max()), 1e-12)
    np.testing.assert_allclose(a, b, rtol=2e-5, atol=2e-6 * scale, err_msg=what, equal_nan=True)


def _compare(one, many):
    for k in ("entropy_ratio", "slot_mean", "near_mean", "anchor_weight", "anchor_slot"):
        _close(many["weights"][k], one["weights"][k], k)
    for k in one["weights"]["mass"]:
        _close(many["weights"]["mass"][k], one["weights"]["mass"][k], f"mass {k}")
    for k in ("mass_n", "slot_n", "entropy_n"):
        a, b = one["weights"]["per_text"][k], many["weights"]["per_text"][k]
        if isinstance(a, dict):
            for n in a:
                np.testing.assert_array_equal(b[n], a[n])
        else:
            np.testing.assert_array_equal(b, a)
    for k in ("b", "ssw", "pair"):
        _close(many["split"][k], one["split"][k], f"split {k}")
    # the Gram matrix (mask pattern) of each text and site: the same, wherever it sits in the list
    k1, k2 = one["split"]["gram_key"], many["split"]["gram_key"]
    for t, si in np.ndindex(k1.shape):
        np.testing.assert_allclose(many["split"]["grams"][k2[t, si]], one["split"]["grams"][k1[t, si]],
                                   rtol=1e-12, atol=1e-9)
        np.testing.assert_array_equal(many["split"]["dist_counts"][k2[t, si]], one["split"]["dist_counts"][k1[t, si]])


def test_batches_group_similar_lengths_within_the_budget():
    lengths = [100, 30, 90, 100, 80, 60]
    groups = batches(lengths, budget=400)
    assert sorted(i for g in groups for i in g) == list(range(6))        # every text once
    for g in groups:
        lens = [lengths[i] for i in g]
        assert len(g) * max(lens) <= 400
        assert min(lens) >= capture.BATCH_PADDING * max(lens)
    assert groups == [[0, 3, 2, 4], [5], [1]]           # longest first, ties in text order; 60 < 0.75 × 100


@pytest.mark.parametrize("arch", BATCHED)
def test_batched_record_equals_one_text_per_pass(arch, monkeypatch):
    s = tiny.subject(arch, layers=2, heads=4)
    monkeypatch.setattr(capture, "ROW_BLOCK", 8)            # several row blocks per text, and rows of padding
    recs = {}
    for batch in (False, True):
        recs[batch] = record(s, TEXTS, [WeightStats(), SplitStats(), Keep()], batch=batch, keep="all")
    one, many = recs[False], recs[True]
    assert one.capture == many.capture == "registry"
    lengths = [len(u) for u in many.units]
    assert len(set(lengths)) > 2
    # the check means something: texts really shared a pass (layer 0 of its second text came before layer 1 of its
    # first), and in the per-text recording they did not
    g = next(g for g in batches(lengths) if len(g) > 1)
    st = s.sites[0].stack
    first_layer1 = (g[0], st, s.sites[1].layer, 0)
    assert many.results["keep"]["order"].index((g[1], st, 0, 0)) < many.results["keep"]["order"].index(first_layer1)
    assert one.results["keep"]["order"].index((g[1], st, 0, 0)) > one.results["keep"]["order"].index(first_layer1)
    assert set(one.results["keep"]["maps"]) == set(many.results["keep"]["maps"])
    for key, (s1, w1, a1, q1, r1) in one.results["keep"]["maps"].items():
        s2, w2, a2, q2, r2 = many.results["keep"]["maps"][key]
        T = len(many.units[key[0]])
        assert w2.shape[-1] == T and s2.shape[-1] == T          # the text's own tokens, no padding
        assert torch.equal(a1, a2)
        assert torch.allclose(w2, w1, atol=2e-6), key
        assert torch.allclose(s2, s1, atol=2e-5, rtol=1e-5), key
        if q1 is not None:
            assert torch.allclose(q2, q1, atol=2e-5, rtol=1e-5), key
        if r1 is not None:
            for x, y in zip(r1, r2):
                assert x.shape == y.shape and torch.allclose(x, y, atol=1e-6), key
    for key, m in one.maps.items():
        np.testing.assert_allclose(many.maps[key], m, atol=2e-6)
    _compare(one.results, many.results)


@pytest.mark.parametrize("arch", ["llama", "bert"])
def test_batched_maps_equal_eager_attention_of_each_text_alone(arch):
    # reference: transformers' eager attention with output_attentions, one text per call (the library's own
    # implementation)
    s = tiny.subject(arch, layers=2, heads=4)
    rec = record(s, TEXTS, [WeightStats()], keep="all", batch=True)
    assert any(len(g) > 1 for g in batches([len(u) for u in rec.units]))
    for t, unit in enumerate(rec.units):
        with torch.no_grad():
            out = forward(s, list(unit.ids), offset=0, want_weights=True, hidden=False)
        for site, att in zip(s.sites, out.attentions):
            for h in range(att.shape[1]):
                got = torch.from_numpy(rec.maps[(t, site.stack, site.layer, h)])
                assert got.shape == att[0, h].shape
                assert torch.allclose(got, att[0, h].float(), atol=1e-5), (arch, t, site.layer, h)


def test_batched_shifted_recording_equals_one_text_per_pass():
    # position offsets and a neutral prefix (the shift test's two kinds) batch too
    s = tiny.subject("llama", layers=2, heads=4)
    for kw in ({"position_offset": 7}, {"prefix": [5, 6, 7]}):
        one = record(s, TEXTS, [WeightStats(), Keep()], batch=False, **kw)
        many = record(s, TEXTS, [WeightStats(), Keep()], batch=True, **kw)
        for key, (s1, w1, *_rest) in one.results["keep"]["maps"].items():
            assert torch.allclose(many.results["keep"]["maps"][key][1], w1, atol=2e-6), (kw, key)
        for k in one.results["weights"]["mass"]:
            _close(many.results["weights"]["mass"][k], one.results["weights"]["mass"][k], f"{kw} mass {k}")
        _close(many.results["weights"]["entropy_ratio"], one.results["weights"]["entropy_ratio"], f"{kw} entropy")


def test_reducers_that_need_text_order_are_never_batched():
    s = tiny.subject("llama", layers=2, heads=4)

    class Ordered(Reducer):
        name = "ordered"

        def begin(self, subject, units):
            self.seen = []

        def update(self, cap):
            self.seen.append((cap.text, cap.site.layer, cap.head0))

        def result(self):
            return self.seen

    rec = record(s, TEXTS, [Ordered()])
    seen = rec.results["ordered"]
    assert seen == sorted(seen)                 # text by text, layer by layer
    with pytest.raises(Exception, match="batched"):
        record(s, TEXTS, [Ordered()], batch=True)
