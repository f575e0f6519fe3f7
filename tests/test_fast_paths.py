"""The scan's faster paths against the paths they replace, on the same recordings: the batched shift and induction
passes against one-text-per-pass recordings, the shift test's unshifted pass shared with the scan's recording
against its own pass, the role support decided for all heads and resamples at once against the per-head,
per-resample reference (the previous implementation, kept below), and the split's bootstrap solved for all
resamples at once against one resample at a time.

No external check here but one: each fast path is compared with the package's own reference path (the statistics
must not change beyond float tolerance); the induction test's token pool is checked against transformers' own
``batch_decode`` of every id (the tokenizer's decode, a function of the general-purpose library).
"""

from collections import Counter

import numpy as np
import pandas as pd
import pytest
import torch

import attnpos
from attnpos import _batch, induction, roles, shift
from attnpos.capture import record
from attnpos.core import columns, roles as core_roles, thresholds as core_th
from attnpos.reducers import SplitStats, WeightStats, weight_summary
from attnpos.split import Split
from attnpos.texts import as_raw, prepare

import tiny

TEXTS = [
    "The night ferry keeps two lamps lit on the rail, one red and one green, and the pilot counts the buoys aloud.",
    "Basil goes in the third tray, thyme in the fourth; the tags are written twice because the rain washes them.",
    "Entry nine: the wind came round to the west at dusk. Entry ten: calm by midnight, frost on the rope.",
    "A copper kettle hung over the fire while the shutters rattled and the dog slept under the long bench.",
    "Short one.",
]


def _tiny(arch, **kw):
    return attnpos.from_model(tiny.build(arch, **kw), tiny.tokenizer())


def _subjects():
    return {"ref:rope": attnpos.load("ref:rope"), "ref:learned-absolute": attnpos.load("ref:learned-absolute"),
            "llama-gqa": _tiny("llama", heads=4, num_key_value_heads=2), "gpt2": _tiny("gpt2"), "bert": _tiny("bert")}


@pytest.fixture(scope="module")
def subjects():
    return _subjects()


# ------------------------------------------------------------------------------------------------ induction

@pytest.mark.parametrize("name", ["ref:rope", "llama-gqa", "gpt2", "bert"])
def test_batched_induction_equals_one_sequence_per_pass(subjects, name, monkeypatch):
    s = subjects[name]
    assert _batch.usable(s)
    calls = []
    real = induction._batched
    monkeypatch.setattr(induction, "_batched", lambda *a: calls.append(1) or real(*a))
    fast = induction.induction_scores(s, repeats=6)
    assert calls
    monkeypatch.setattr(induction, "_batched", lambda *a: None)
    ref = induction.induction_scores(s, repeats=6)
    assert fast.per_sequence.keys() == ref.per_sequence.keys()
    for k in ref.per_sequence:
        np.testing.assert_allclose(fast.per_sequence[k], ref.per_sequence[k], rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(fast.stderr[k], ref.stderr[k], rtol=1e-4, atol=1e-6)


def test_batched_pass_declines_what_it_cannot_measure_exactly():
    # bfloat16 weights: the model's eager weights are rounded, a recording computes float32 ones beside them;
    # ALiBi in Bloom computes attention in its own module (no registry); T5 has cross-attention
    assert not _batch.usable(attnpos.from_model(tiny.build("llama").to(torch.bfloat16), tiny.tokenizer()))
    assert not _batch.usable(_tiny("bloom"))
    assert not _batch.usable(_tiny("t5"))
    got = induction.induction_scores(_tiny("bloom"), repeats=3)        # falls back to the recording
    assert got.per_sequence[("main", 0)].shape == (3, 4)


# ------------------------------------------------------------------------------------------------ shift test

def _old_shift(s, units, st):
    """The shift test as it ran before: its own unshifted pass and one recording per shifted text."""
    real = shift._compare_batched
    shift._compare_batched = lambda *a, **k: None
    try:
        return st.run(s, units)
    finally:
        shift._compare_batched = real


def _assert_same_shift(a, b):
    assert a.kinds == b.kinds and a.verdicts == b.verdicts
    for kind in b.changes:
        for key in b.changes[kind]:
            np.testing.assert_allclose(a.changes[kind][key], b.changes[kind][key], rtol=1e-4, atol=1e-5)
    for key in b.spread:
        np.testing.assert_allclose(a.spread[key], b.spread[key], rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("name", ["ref:rope", "ref:learned-absolute", "llama-gqa", "gpt2"])
def test_shift_shared_base_and_batched_pass_equal_the_separate_passes(subjects, name, monkeypatch):
    s = subjects[name]
    units = prepare(s, as_raw(TEXTS))
    # both kinds where the model takes ids; texts of different lengths (the batches group equal lengths), one of
    # them longer than the test's window (its base is the first rows of the scan's full-length recording)
    st = shift.ShiftTest(kinds=("position-ids", "prefix") if s.uses_position_ids else ("prefix",), max_texts=5,
                         max_tokens=24)
    red = st.base_reducer(s, units)
    assert red is not None
    rec = record(s, units=units, reducers=[WeightStats(), red])
    base = rec.results["shift-base"]
    assert base["shared"] and len(base["limits"]) == 5 and max(base["limits"]) == 24 > min(base["limits"])
    ran = []
    real = shift._compare_batched
    monkeypatch.setattr(shift, "_compare_batched", lambda *a, **k: ran.append(real(*a, **k)) or ran[-1])
    fast = st.run(s, units, base=base)
    assert ran and all(r is not None for r in ran)          # the batched pass ran, once per kind
    monkeypatch.setattr(shift, "_compare_batched", real)
    _assert_same_shift(fast, _old_shift(s, units, st))


def test_shift_base_is_not_shared_where_a_layer_reads_later_tokens(subjects):
    s = subjects["bert"]                                   # an encoder: its first rows see the whole text
    units = prepare(s, as_raw(TEXTS[:3]))
    st = shift.ShiftTest(max_tokens=12)
    assert st.base_reducer(s, units) is None
    # a causal site whose mask lets early rows see later keys is caught while recording
    keep = shift._Keep(limits=[6])
    s2 = subjects["llama-gqa"]
    u2 = prepare(s2, as_raw(TEXTS[:1]))

    class Wide:                                            # the capture's view with a full mask
        def __init__(self, cap):
            self.cap = cap

        def __getattr__(self, k):
            if k == "allowed":
                return torch.ones_like(self.cap.allowed)
            return getattr(self.cap, k)

    class Feed(shift.Reducer):
        name = "feed"

        def begin(self, subject, units):
            keep.begin(subject, units)

        def update(self, cap):
            keep.update(Wide(cap))

    record(s2, units=u2, reducers=[Feed()])
    got = keep.result()
    assert got["shared"] is False and got["maps"] == {}
    _assert_same_shift(st.run(s2, u2, base=got), _old_shift(s2, u2, st))    # falls back to its own pass
    # and the bert test itself matches the old path
    _assert_same_shift(st.run(s, units), _old_shift(s, units, st))


def test_scan_with_the_shared_base_has_the_shift_columns_of_the_separate_test(subjects):
    s = subjects["ref:rope"]
    sc = attnpos.scan(s, TEXTS, n_boot=0, induction=False)
    units = prepare(s, as_raw(TEXTS), max_tokens=s.training_length)
    old = _old_shift(s, units, shift.ShiftTest())
    for key in old.changes["prefix"]:
        got = sc.heads[(sc.heads["stack"] == key[0]) & (sc.heads["layer"] == key[1])].sort_values("head")
        np.testing.assert_allclose(got["shift_change"].to_numpy(float), old.changes["prefix"][key], atol=1e-5)
        assert list(got["shift_verdict"]) == [old.verdict_of(key, h) for h in range(s.n_heads)]


# ------------------------------------------------------------------------------------------------ role support

def _ref_resampled_rows(weights, fit, induction_res, seed=1):
    """The previous implementation (per resample, per head, one dict row each), kept as the reference."""
    if fit is None or getattr(fit, "boot_weights", None) is None or "per_text" not in weights:
        return []
    parts = columns.PART_NAMES
    per_seq = getattr(induction_res, "per_sequence", None) or {}
    rng = np.random.default_rng(seed)
    out = []
    for b, w in enumerate(fit.boot_weights):
        ws = weight_summary(weights["per_text"], w)
        ind = {}
        if per_seq:
            R = len(next(iter(per_seq.values())))
            pick = rng.integers(0, R, R)
            ind = {k: v[pick].mean(0) for k, v in per_seq.items()}
        out.append((ws, fit.boot_shares[b], fit.boot_slope[b], ind))

    def row_of(sample, si, key, h, base):
        ws, shares, slope, ind = sample
        r = dict(base)
        roles._weight_values(r, ws, si, h)
        for k, part in enumerate(parts):
            r[f"share_{part}"] = shares[si, h, k]
        r["slope"] = slope[si, h]
        if ind:
            r["induction"] = float(ind[key][h])
        return r

    return [(s, row_of) for s in out]


def _ref_decide(r, causal, samples, si, key, h):
    role, tags, ev = core_roles.assign(r, causal)
    r["role"], r["tags"], r["evidence"] = role, tags, ev
    r["role_support"], r["role_between"], r["tag_support"] = np.nan, [], {}
    if not samples:
        return
    holds, primaries = Counter(), Counter()
    for sample, row_of in samples:
        found = core_roles.criteria(row_of(sample, si, key, h, r), causal)
        names = list(found) or [core_roles.FALLBACK]
        holds.update(names)
        primaries[names[0]] += 1
    # the counting above is the per-resample reference; the rule that settles a role from the counts is shared
    roles.settle(r, holds, primaries, len(samples), causal)


def _ref_head_table(subject, weights, fit, sh, ind):
    """head_table with the reference decision: the new table's point columns, the old per-row support."""
    table = roles.head_table(subject, weights, fit, sh, ind)
    samples = _ref_resampled_rows(weights, fit, ind)
    rows = []
    for _, row in table.iterrows():
        r = row.to_dict()
        key, h = (r["stack"], r["layer"]), int(r["head"])
        site = weights["keys"].index(key)
        causal = {(x.stack, x.layer): x.causal for x in subject.sites}.get(key, subject.causal)
        _ref_decide(r, causal, samples, site, key, h)
        rows.append(r)
    return table, pd.DataFrame(rows, columns=table.columns)


DECIDED = ["role", "tags", "evidence", "role_support", "role_between", "tag_support"]


def _assert_same_decisions(new, ref):
    for c in DECIDED:
        a, b = list(new[c]), list(ref[c])
        if c == "role_support":
            np.testing.assert_array_equal(np.array(a, float), np.array(b, float))
        else:
            assert a == b, (c, [(x, y) for x, y in zip(a, b) if x != y][:3])


@pytest.mark.parametrize("name", ["ref:rope", "ref:learned-absolute"])
def test_role_support_for_all_heads_at_once_equals_the_per_head_reference(subjects, name, monkeypatch):
    s = subjects[name]
    units = prepare(s, as_raw(TEXTS[:4]))
    rec = record(s, units=units, reducers=[WeightStats(), SplitStats()])
    fit = Split(n_boot=40).fit(rec)
    sh = shift.ShiftTest().run(s, units)
    ind = induction.induction_scores(s, repeats=8)
    new, ref = _ref_head_table(s, rec.results["weights"], fit, sh, ind)
    _assert_same_decisions(new, ref)
    # thresholds moved so that heads sit near them (the support is then neither 0 nor 1 for many of them)
    t = new
    monkeypatch.setattr(core_th, "NEIGHBOUR_MASS", float(np.nanmedian(t["mass_previous"])))
    monkeypatch.setattr(core_th, "LOCAL_SLOPE", float(np.nanmedian(t["slope"])))
    monkeypatch.setattr(core_th, "INDUCTION_SCORE", float(np.nanmedian(t["induction"])))
    monkeypatch.setattr(core_th, "POSITIONAL_PAIR_SHARE", float(np.nanmedian(t["share_pair"])))
    monkeypatch.setattr(core_th, "COUNTING_ENTROPY", float(np.nanmedian(t["entropy_ratio"])))
    new, ref = _ref_head_table(s, rec.results["weights"], fit, sh, ind)
    _assert_same_decisions(new, ref)
    supports = [v for d in new["tag_support"] for v in d.values()]
    assert any(0 < v < 1 for v in supports)


def test_role_arrays_agree_with_the_row_checks_on_edge_values():
    rng = np.random.default_rng(3)
    n = 4000
    picks = {
        "mass_previous": [core_th.NEIGHBOUR_MASS, np.nextafter(core_th.NEIGHBOUR_MASS, 0), np.nan, np.inf, None, 0.9],
        "mass_next": [core_th.NEIGHBOUR_MASS, 0.1, np.nan, -np.inf, "n/a"],
        "induction": [core_th.INDUCTION_SCORE, 0.0, np.nan, 0.95],
        "anchor_weight": [core_th.ANCHOR_WEIGHT, 0.1, np.nan, 0.99],
        "anchor_slot": [0.0, 3.0, np.nan],
        "slope": [core_th.LOCAL_SLOPE, -0.2, np.nan, 1.0, np.inf],
        "share_distance": [core_th.LOCAL_SHARE, 0.05, np.nan, 0.9],
        "share_slot": [0.0, 0.1, np.nan],
        "share_pair": [core_th.POSITIONAL_PAIR_SHARE, 0.0, np.nan, None, 0.8],
        "share_content": [0.5, 0.1, np.nan],
        "share_residual": [0.4, core_th.CONTENT_MIN_SHARE, np.nan],
        "entropy_ratio": [core_th.COUNTING_ENTROPY, 0.5, np.nan, 0.99],
        "shift_verdict": ["absolute", "relative", None, "mixed", "no-position"],
        "shift_change": [0.5, np.nan, None],
        "shift_kind": ["prefix", None],
    }
    rows = [{k: v[rng.integers(len(v))] for k, v in picks.items()} for _ in range(n)]
    for r in rows[::7]:
        r.pop("share_pair")                                # a column missing from the row
    causal = rng.random(n) < 0.5
    cols = {k: np.array([r.get(k) for r in rows] + [None], dtype=object)[:-1] for k in picks}
    cols = {k: v for k, v in cols.items() if k != "share_pair"}
    cols["share_pair"] = np.array([r.get("share_pair") for r in rows] + [None], dtype=object)[:-1]
    names, holds = core_roles.criteria_arrays(cols, causal)
    for i, r in enumerate(rows):
        found = core_roles.criteria(r, bool(causal[i]))
        assert [nm for k, nm in enumerate(names) if holds[i, k]] == list(found), (r, causal[i])


def test_a_role_without_an_array_form_is_checked_row_by_row():
    spec = core_roles.RoleSpec(name="planted-self", rule="mass.self ≥ 0.5", about="own token",
                               check=lambda row, ctx: "self" if (row.get("mass_self") or 0) >= 0.5 else None,
                               colour="#117733", short="self", code="Sf", strength="mass_self", rank=15)
    rows = [{"mass_self": x, "mass_previous": 0.7} for x in (0.2, 0.5, 0.9)]
    cols = {"mass_self": np.array([0.2, 0.5, 0.9]), "mass_previous": np.full(3, 0.7)}
    with core_roles.registered(spec):
        with pytest.raises(ValueError):
            core_roles.criteria_arrays(cols, np.ones(3, bool))
        names, holds = core_roles.criteria_arrays(cols, np.ones(3, bool), row_at=lambda idx: rows[idx[0]])
        assert [list(np.array(names)[h]) for h in holds] == [list(core_roles.criteria(r)) for r in rows]


# ------------------------------------------------------------------------------------------------ the split

@pytest.mark.parametrize("name,workers", [("ref:rope", 2), ("gpt2", 1), ("bert", 2), ("qwen2-window", 1)])
def test_split_bootstrap_solved_together_equals_one_resample_at_a_time(subjects, name, workers, monkeypatch):
    import split_reference
    from attnpos import split as split_mod

    if name == "qwen2-window":                              # one full and one sliding-window layer: two mask patterns
        s = _tiny("qwen2", layer_types=["full_attention", "sliding_attention"], use_sliding_window=True,
                  sliding_window=6)
        assert len(set(record(s, TEXTS[:1], [SplitStats()]).results["split"]["gram_key"][0])) == 2
    else:
        s = subjects[name]
    monkeypatch.setattr(split_mod, "_workers", lambda: workers)
    rec = record(s, TEXTS, [SplitStats()])
    new = Split(n_boot=30, seed=4).fit(rec)
    ref = split_reference.Split(n_boot=30, seed=4).fit(rec)
    for k in ("shares", "profile", "slope", "shares_lo", "shares_hi", "profile_lo", "profile_hi", "slope_lo",
              "slope_hi", "boot_weights", "boot_shares", "boot_slope"):
        a, b = getattr(new, k), getattr(ref, k)
        assert a.shape == b.shape, k
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=k)
        np.testing.assert_allclose(np.nan_to_num(a), np.nan_to_num(b), rtol=1e-7, atol=1e-8, err_msg=k)
    assert new.n_texts == ref.n_texts and new.n_boot == ref.n_boot


def test_weight_summary_of_stacked_resamples_equals_one_at_a_time(subjects):
    s = subjects["ref:rope"]
    rec = record(s, TEXTS, [WeightStats()])
    per_text = rec.results["weights"]["per_text"]
    W = np.random.default_rng(0).integers(0, 3, (7, len(TEXTS))).astype(float)
    W[2] = 0                                             # nothing drawn: NaN statistics
    stacked = weight_summary(per_text, W)
    for b, w in enumerate(W):
        one = weight_summary(per_text, w)
        for k in ("entropy_ratio", "slot_mean", "slot_n", "anchor_slot", "anchor_weight"):
            np.testing.assert_allclose(stacked[k][b], one[k], rtol=1e-12, atol=0, equal_nan=True, err_msg=k)
        for m in one["mass"]:
            np.testing.assert_allclose(stacked["mass"][m][b], one["mass"][m], rtol=1e-12, equal_nan=True)


def test_head_table_shift_columns_equal_the_result_lookups(subjects):
    s = subjects["ref:learned-absolute"]
    units = prepare(s, as_raw(TEXTS[:3]))
    rec = record(s, units=units, reducers=[WeightStats()])
    sh = shift.ShiftTest(kinds=("position-ids", "prefix")).run(s, units)
    t = roles.head_table(s, rec.results["weights"], shift=sh)
    for _, r in t.iterrows():
        key, h = (r["stack"], r["layer"]), int(r["head"])
        assert r["shift_change"] == sh.change_of(key, h) and r["shift_verdict"] == sh.verdict_of(key, h)
        assert r["shift_change_ids"] == sh.change_of(key, h, "position-ids")
        assert r["shift_verdict_prefix"] == sh.verdict_of(key, h, "prefix")


# ------------------------------------------------------------------ the induction test's pool of ordinary tokens

def _pool_by_batch_decode(tok):
    """The pool as first written: every non-special id decoded by the tokenizer's own ``batch_decode``."""
    special = set(tok.all_special_ids) | set(tok.added_tokens_decoder)
    ids = [i for i in range(min(len(tok), 50000)) if i not in special]
    texts = tok.batch_decode([[i] for i in ids])
    return [i for i, t in zip(ids, texts)
            if t.strip() and t.isprintable() and "\ufffd" not in t and not induction._UNUSED.match(t.strip())]


def _byte_level_tokenizer():
    """A byte-level BPE trained here on the bundled sample texts: its single bytes decode to partial UTF-8."""
    from pathlib import Path

    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers
    from transformers import PreTrainedTokenizerFast

    corpus = [p.read_text() for p in sorted((Path(__file__).parent.parent / "sample_text").glob("*.txt"))]
    bpe = Tokenizer(models.BPE())
    bpe.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    bpe.decoder = decoders.ByteLevel()
    bpe.train_from_iterator(corpus + ["naïve café — 東京"], trainers.BpeTrainer(
        vocab_size=600, special_tokens=["<s>", "</s>"], initial_alphabet=pre_tokenizers.ByteLevel.alphabet()))
    return PreTrainedTokenizerFast(tokenizer_object=bpe, bos_token="<s>", eos_token="</s>")


@pytest.mark.parametrize("which", ["wordpiece", "byte-level"])
def test_ordinary_pool_from_the_backend_equals_batch_decode(which, monkeypatch):
    import copy

    tok = copy.deepcopy(tiny.tokenizer()) if which == "wordpiece" else _byte_level_tokenizer()   # changed below
    induction._POOLS.pop(tok, None)
    # reference: transformers' PreTrainedTokenizer.batch_decode of each id alone (the library's own decode)
    want = _pool_by_batch_decode(tok)
    assert 100 < len(want) < len(tok)               # something is left out, most is kept
    assert induction.ordinary_pool(tok, 48) == want
    # the second call in the process reads the cache and decodes nothing
    monkeypatch.setattr(induction, "_decode_each", lambda *a: pytest.fail("decoded the vocabulary again"))
    assert induction.ordinary_pool(tok, 48) == want
    # a tokenizer whose special tokens changed is decoded again
    tok.add_special_tokens({"additional_special_tokens": [tok.convert_ids_to_tokens(want[0])]})
    monkeypatch.undo()
    again = induction.ordinary_pool(tok, 48)
    assert want[0] not in again and again == want[1:]
