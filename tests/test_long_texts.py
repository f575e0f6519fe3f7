"""Long inputs: past BOOT_UNITS windows the split's and the weight statistics' per-text sums are kept per block of
consecutive windows, and only the windows with kept maps carry display tokens.

Outside reference: resampling non-overlapping blocks of consecutive observations is the block bootstrap for
dependent data (Carlstein 1986, Ann. Statist. 14; Künsch 1989, Ann. Statist. 17 — cited from memory). Every check
here compares the block path with the per-window path of the same code (sums must agree to float precision), or
counts what is kept; none needs an outside value.
"""

from __future__ import annotations

import numpy as np
import pytest

import attnpos
from attnpos import texts
from attnpos.capture import record
from attnpos.reducers import SplitStats, WeightStats
from attnpos.roles import head_table
from attnpos.split import Split

# invented notes of a lighthouse keeper, long enough to be cut into many windows
LOG = ("Tuesday. Fog until ten, then a light wind from the south-west. The supply boat came at noon with lamp oil, "
       "two crates of tinned pears and a letter from the harbour office about the new bell. Wednesday. Clear. "
       "Painted the railing on the north side and found a gull's nest behind the water tank; left it alone. "
       "Thursday. Rain all day. Wound the clock twice, checked the lens for salt, wrote up the shipping seen: "
       "three trawlers, one tanker far out, a yacht that anchored in the bay and left before dark. ")
SHORT = ["Tide at six.", "The bell rang once at dusk, then twice.", "Oil: four cans left."]


@pytest.fixture(scope="module")
def rope():
    return attnpos.load("ref:rope")


@pytest.fixture(scope="module")
def units(rope):
    """26 windows: long ones, the short last window of each long text, and three short texts (their pair
    regions are smaller than PAIR_MAX), so blocks mix windows of several sizes."""
    raw = texts.from_strings([LOG * 2, SHORT[0], LOG, SHORT[1], SHORT[2]])
    out = texts.prepare(rope, raw, max_tokens=72, warn=False)
    assert len(out) == 26 and len({len(u) for u in out}) > 3
    return out


def _record(rope, units, max_units):
    # one text per forward pass on both sides (blocks of windows never batch texts), so the sums are the same
    # arithmetic; batched against one-at-a-time is tests/test_batching.py's question
    return record(rope, units=units, reducers=[WeightStats(max_units=max_units), SplitStats(max_units=max_units)],
                  progress=False, batch=False)


def test_blocks_of_windows_keep_every_point_estimate(rope, units):
    from attnpos.reducers import windows_per_unit

    per_window = _record(rope, units, 64)
    blocks = _record(rope, units, 5)
    res = blocks.results["split"]
    assert windows_per_unit(26, 5) == (6, 5) and res["b"].shape[0] == 5 and "pair_groups" in res
    assert per_window.results["split"]["b"].shape[0] == 26 and "pair_groups" not in per_window.results["split"]
    a, b = Split(n_boot=0).fit(per_window), Split(n_boot=0).fit(blocks)
    assert a.n_texts == b.n_texts == 26
    # the sums are exact: the shares (the position pair included: products of *different* windows only), the
    # profile and the slope agree to float precision
    assert np.nanmax(a.shares[..., 3]) > 0.01                  # a pair part that is not trivially 0
    np.testing.assert_allclose(b.shares, a.shares, rtol=0, atol=1e-9)
    np.testing.assert_allclose(b.profile, a.profile, rtol=0, atol=1e-8)
    np.testing.assert_allclose(b.slope, a.slope, rtol=1e-9, atol=1e-12)
    wa, wb = per_window.results["weights"], blocks.results["weights"]
    assert wb["per_text"]["entropy"].shape[0] == 5
    for k in ("entropy_ratio", "anchor_slot", "anchor_weight", "near_mean"):
        np.testing.assert_allclose(wb[k], wa[k], rtol=1e-12, atol=1e-12, equal_nan=True)
    for k in wa["mass"]:
        np.testing.assert_allclose(wb["mass"][k], wa["mass"][k], rtol=1e-12, atol=1e-12, equal_nan=True)
    ta = head_table(rope, wa, a)
    tb = head_table(rope, wb, b)
    assert ta["role"].tolist() == tb["role"].tolist()


def test_a_block_resample_is_the_per_window_fit_with_its_windows_weighted(rope, units):
    # resampling a block = giving each of its windows the block's count: the block path's resampled shares (the
    # position pair's products of different windows included) equal the per-window fit under those weights
    per_window = _record(rope, units, 64).results["split"]
    blocks = _record(rope, units, 5)
    fit = Split(n_boot=12, seed=2).fit(blocks)
    assert fit.boot_weights.shape == (12, 5) and (fit.boot_weights.sum(1) == 5).all()
    m = blocks.results["split"]["windows_per_unit"]
    ref = Split()
    _, _, _, coef = (x[0] for x in ref._fit_weights(per_window, np.ones((1, 26))))   # one row per weighting
    P, V = ref._pair_products(per_window, coef)
    for k in range(12):
        w = fit.boot_weights[k][np.arange(26) // m]
        s4, _, slope, _ = (x[0] for x in ref._fit_weights(per_window, w[None]))
        np.testing.assert_allclose(fit.boot_shares[k], ref._with_pair(s4, P, V, w), rtol=0, atol=1e-9)
        np.testing.assert_allclose(fit.boot_slope[k], slope, rtol=1e-9, atol=1e-12)
    assert (fit.shares_hi - fit.shares_lo > 1e-3).any()
    table = head_table(rope, blocks.results["weights"], fit)       # weights and split resample the same blocks
    assert table["role_support"].between(0, 1).all()


def test_at_most_max_units_windows_are_their_own_units(rope, units):
    # the boundary: as many units as windows keeps the per-window layout, and its fit equals the default's bit
    # for bit (the code path of every scan of up to BOOT_UNITS windows)
    at = _record(rope, units, 26).results["split"]
    assert at["b"].shape[0] == 26 and "pair" in at and "pair_groups" not in at
    f26 = Split(n_boot=20, seed=1).fit(at)
    f64 = Split(n_boot=20, seed=1).fit(_record(rope, units, 64))
    for k in ("shares", "shares_lo", "shares_hi", "slope", "boot_shares"):
        assert np.array_equal(getattr(f26, k), getattr(f64, k), equal_nan=True), k
    assert _record(rope, units, 25).results["split"]["b"].shape[0] == 13


def _nbytes(x) -> int:
    if isinstance(x, np.ndarray):
        return x.nbytes
    if isinstance(x, dict):
        return sum(_nbytes(v) for v in x.values())
    if isinstance(x, (list, tuple)):
        return sum(_nbytes(v) for v in x)
    return 0


def test_what_the_statistics_keep_does_not_grow_with_the_windows(rope):
    # the same text three times longer: as many blocks, so the same arrays (per window it would be 3×)
    def kept(n_copies):
        u = texts.prepare(rope, texts.from_strings([LOG * n_copies]), max_tokens=72, warn=False)
        red = SplitStats(max_units=4)
        rec = record(rope, units=u, reducers=[WeightStats(max_units=4), red], progress=False)
        left = len(red.grams) + len(red.regions) + len(red._layer_gram)     # per-window state left behind
        return len(u), _nbytes(rec.results["split"]), _nbytes(rec.results["weights"]["per_text"]), left

    n1, split1, weights1, left1 = kept(2)
    n3, split3, weights3, left3 = kept(6)
    assert n3 > 2.5 * n1 and left1 == left3 == 0
    assert split3 <= 1.05 * split1 and weights3 == weights1


def test_long_scan_keeps_display_tokens_of_the_shown_windows_only(rope, tmp_path):
    from attnpos.report import write_report
    from attnpos.results.scan import Scan
    from attnpos.views import data

    with pytest.warns(texts.WindowNotice):
        scan = attnpos.scan(rope, [LOG * 4], max_tokens=24, n_boot=5, shift=False, induction=False)
    n = len(scan.texts)
    assert n > 64
    kept = sorted({k[0] for k in scan.maps})
    assert kept == [0, 1]
    assert all(scan.tokens[i] for i in kept) and not any(scan.tokens[i] for i in range(n) if i not in kept)
    assert scan.extra["tokens_left_out"] == n - 2 and scan.extra["split"]["n_texts"] == n
    assert scan.tokens[0] == texts.display_tokens(rope.tokenizer, texts.prepare(
        rope, texts.from_strings([LOG * 4]), max_tokens=24, warn=False)[0].ids)
    back = Scan.from_json(scan.to_json())
    assert back.tokens == scan.tokens
    card = data.map_payload(scan, "L0.H0", 1)
    assert card is not None and card["top_keys"][0]["token"] != "?"
    write_report(scan, tmp_path / "report.html")
    assert (tmp_path / "report.html").stat().st_size > 0


def test_prepare_decodes_no_display_tokens_until_read(rope, monkeypatch):
    calls = []
    real = rope.tokenizer.decode

    def counting(ids, *a, **kw):
        calls.append(len(ids))
        return real(ids, *a, **kw)

    monkeypatch.setattr(rope.tokenizer, "decode", counting)
    u = texts.prepare(rope, texts.from_strings([LOG]), max_tokens=40, warn=False)
    assert len(u) > 5 and calls == []
    assert list(u[2].tokens) == texts.display_tokens(rope.tokenizer, u[2].ids) and calls
    assert u[2].tokens[:3] == texts.display_tokens(rope.tokenizer, u[2].ids[:3])
    assert u[2].tokens[-1] == texts.display_tokens(rope.tokenizer, u[2].ids[-1:])[0] and len(u[2].tokens) == len(u[2])


class _Counting:
    """A tokenizer wrapper that records how many characters each call tokenises."""

    def __init__(self, tok, dummy_prefix=False):
        self.tok, self.sizes, self.dummy_prefix = tok, [], dummy_prefix

    def __call__(self, text, **kw):
        self.sizes.append(len(text))
        out = dict(self.tok(text, **kw))
        if self.dummy_prefix:                   # a SentencePiece-like tokenizer: every call starts with a marker
            out["input_ids"] = [7] + list(out["input_ids"])
        return out


@pytest.mark.parametrize("which", ["byte", "wordpiece"])
def test_a_long_text_is_tokenised_in_pieces_into_the_same_ids(rope, which):
    import tiny

    tok = rope.tokenizer if which == "byte" else tiny.tokenizer()
    text = LOG * 40                             # about 20 000 characters
    whole = texts._encode(tok, text)
    counting = _Counting(tok)
    assert texts.encode_long(counting, text, piece=2000) == whole
    assert max(counting.sizes) < 2000 + 4096 and len(counting.sizes) > 10


def test_a_tokenizer_that_changes_tokens_at_a_cut_gets_the_whole_text(rope):
    text = LOG * 40
    counting = _Counting(rope.tokenizer, dummy_prefix=True)
    whole = [7] + texts._encode(rope.tokenizer, text)
    assert texts.encode_long(counting, text, piece=2000) == whole
    assert max(counting.sizes) == len(text)
