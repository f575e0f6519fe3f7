"""Causal layers are captured and reduced in row blocks (each block forms only the keys it may see). The blocked
path must give exactly what the whole-matrix path gives: the same weights as transformers' eager attention, zeros
beyond the blocks, and the same reducer statistics."""

import numpy as np
import pytest
import torch

import attnpos.capture as capture
from attnpos.capture import causal_blocks, record
from attnpos.reducers import SplitStats, WeightStats, diagonal_sums

import tiny

# three lengths, long–short–long, so the reused work buffers change shape between texts and back
TEXTS = [
    "The ferry to the north island leaves at seven, stops twice, and returns at noon. " * 2,
    "Fog delayed the ferry.",
    "The harbour office posts the tide table at six; the ferry waits for the second bell, then leaves. " * 2,
]


def test_causal_blocks_cover_every_row_once():
    for T, rows in ((1, 4), (7, 4), (8, 4), (9, 4), (600, 256)):
        blocks = causal_blocks(T, rows)
        assert blocks[0][0] == 0 and blocks[-1][1] == T
        assert all(a[1] == b[0] for a, b in zip(blocks, blocks[1:]))
        assert all(k1 == r1 for _, r1, k1 in blocks)


@pytest.mark.parametrize("T", [1, 2, 3, 17, 255, 256, 257, 600])
def test_diagonal_sums_match_torch_diagonal(T):
    # reference: torch.diagonal (common practice: the sum of diagonal δ of x is the sum of x[i, i − δ])
    g = torch.Generator().manual_seed(T)
    x = torch.randn(2, T, T, generator=g, dtype=torch.float64)
    for lower in (True, False):
        m = x.tril() if lower else x
        ref = torch.stack([torch.stack([torch.diagonal(m[h], offset=-d).sum() for d in range(-(T - 1), T)])
                           for h in range(2)])
        assert torch.allclose(diagonal_sums(m, lower=lower), ref, atol=1e-10)


def _direct_attentions(subject, ids):
    x = torch.tensor([ids])
    kw = dict(input_ids=x, output_attentions=True)
    if subject.is_encoder_decoder:
        kw["decoder_input_ids"] = torch.tensor([[0] + ids[:-1]])
    with torch.no_grad():
        out = subject.model(**kw)
    if subject.is_encoder_decoder:
        return tuple(out.encoder_attentions) + tuple(out.decoder_attentions)
    return tuple(out.attentions)


@pytest.mark.parametrize("arch", ["llama", "gpt2", "gpt_neox", "smollm3", "t5"])
def test_blocked_capture_matches_eager(arch, monkeypatch):
    # transformers' eager attention with output_attentions is the reference implementation
    monkeypatch.setattr(capture, "ROW_BLOCK", 8)         # many blocks, also on short texts
    s = tiny.subject(arch)
    rec = record(s, TEXTS, [tiny.keep_reducer()])
    assert rec.capture == "registry"
    kept = rec.results["keep"]
    for t, unit in enumerate(rec.units):
        atts = _direct_attentions(s, unit.ids)
        for site, att in zip(s.sites, atts):
            sc, w, allowed, _ = kept[(t, site.stack, site.layer, 0)]
            assert torch.allclose(w, att[0].float(), atol=1e-5)
            assert torch.allclose(torch.softmax(sc, -1), w, atol=1e-6)
            if site.causal:
                T = w.shape[-1]
                assert len(causal_blocks(T)) == -(-T // 8)
                assert not w.triu(1).any()


@pytest.mark.parametrize("arch", ["llama", "t5", "bert", "bloom"])      # bloom: the eager-weights path
def test_blocked_reducers_equal_whole_matrix(arch, monkeypatch):
    s = tiny.subject(arch)
    results = []
    for rows in (8, 10**6):                            # many blocks; one block (the whole matrix)
        monkeypatch.setattr(capture, "ROW_BLOCK", rows)
        rec = record(s, TEXTS, [WeightStats(), SplitStats()])
        results.append(rec.results)
    (a, b) = results
    for k in ("entropy_ratio", "slot_mean", "near_mean", "anchor_weight"):
        np.testing.assert_allclose(a["weights"][k], b["weights"][k], rtol=1e-5, atol=1e-7, equal_nan=True)
    for k in a["weights"]["mass"]:
        np.testing.assert_allclose(a["weights"]["mass"][k], b["weights"]["mass"][k], rtol=1e-5, atol=1e-7)
    # float32 sums in another order: differences scale with the largest feature sum, not with each entry
    scale = np.abs(b["split"]["b"]).max()
    np.testing.assert_allclose(a["split"]["b"], b["split"]["b"], rtol=1e-5, atol=1e-6 * scale)
    np.testing.assert_allclose(a["split"]["ssw"], b["split"]["ssw"], rtol=1e-5)
