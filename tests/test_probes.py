"""Ridge probes for absolute position, the counting check, and RoPE frequency bands.

Numbers that the reference models give are printed (run with ``-s`` to see them); assertions are qualitative
facts from the papers, with margins wide enough for a small CPU-trained model.
"""

import json

import numpy as np
import pytest
import torch

import attnpos
from attnpos.cli import main as cli_main
from attnpos import probes, texts as texts_mod
from attnpos.core import thresholds
from attnpos import bands as bands_mod
from attnpos.bands import BandEnergy, rope_bands

import tiny


_reference = tiny.reference


@pytest.fixture(scope="module")
def corpus_texts():
    """Held-out documents in the reference corpus scenarios (a seed the training corpus does not use)."""
    from attnpos.reference import corpus

    docs = corpus.generate_documents(seed=corpus.CORPUS_SEED + 17, target_bytes=12000)
    return [d[:1000] for d in docs[:6]]


@pytest.fixture(scope="module")
def none_probe(corpus_texts):
    s = _reference("none")
    return probes.probe(s, corpus_texts, seed=0)


# ------------------------------------------------------------------------------------------- the fit itself

def test_alpha_choice_matches_sklearn_ridge():
    # the closed-form inner search must pick the penalty that scikit-learn's Ridge (the reference implementation)
    # scores best on the same group folds
    from sklearn.linear_model import Ridge
    from sklearn.model_selection import GroupKFold

    rng = np.random.default_rng(0)
    X = rng.normal(size=(300, 12))
    y = X @ rng.normal(size=12) + rng.normal(scale=3.0, size=300)
    groups = np.repeat(np.arange(6), 50)
    alphas = [0.1, 10.0, 300.0, 3000.0]
    got = probes._choose_alpha(X, y[:, None], groups, alphas)[0]
    sse = []
    for a in alphas:
        s = 0.0
        for tr, te in GroupKFold(n_splits=4).split(X, y, groups):
            mu, sd = X[tr].mean(0), X[tr].std(0)
            m = Ridge(alpha=a).fit((X[tr] - mu) / sd, y[tr])
            s += ((m.predict((X[te] - mu) / sd) - y[te]) ** 2).sum()
        sse.append(s)
    assert got == alphas[int(np.argmin(sse))]


def _reference_cross_validated(X, Y, groups, alphas, folds):
    """The probe's fit as it was first written (standardised copies of every fold, an eigen-decomposition per inner
    fold, scikit-learn's Ridge for the outer fit): the reference for the faster path from per-fold sums."""
    from sklearn.linear_model import Ridge
    from sklearn.model_selection import GroupKFold

    def standardise(Xtr, *others):
        mu, sd = Xtr.mean(0), Xtr.std(0)
        sd = np.where(sd > 1e-8 * max(float(sd.max()), 1e-30), sd, 1.0)
        return [(Xtr - mu) / sd] + [(o - mu) / sd for o in others]

    def choose(X, Y, groups):
        n_groups = len(np.unique(groups))
        if n_groups < 2:
            return np.full(Y.shape[1], alphas[len(alphas) // 2])
        sse = np.zeros((len(alphas), Y.shape[1]))
        for tr, te in GroupKFold(n_splits=min(probes.INNER_FOLDS, n_groups)).split(X, Y, groups):
            Xtr, Xte = standardise(X[tr], X[te])
            ym = Y[tr].mean(0)
            lam, V = np.linalg.eigh(Xtr.T @ Xtr)
            lam = np.clip(lam, 0.0, None)
            Vb = V.T @ (Xtr.T @ (Y[tr] - ym))
            P = Xte @ V
            for a_i, a in enumerate(alphas):
                sse[a_i] += ((Y[te] - (P @ (Vb / (lam + a)[:, None]) + ym)) ** 2).sum(0)
        return np.asarray(alphas)[sse.argmin(0)]

    pred, chosen = np.zeros_like(Y), []
    for tr, te in GroupKFold(n_splits=min(folds, len(np.unique(groups)))).split(X, Y, groups):
        a = choose(X[tr], Y[tr], groups[tr])
        chosen.append(a)
        Xtr, Xte = standardise(X[tr], X[te])
        pred[te] = Ridge(alpha=a, fit_intercept=True).fit(Xtr, Y[tr]).predict(Xte)
    sst = ((Y - Y.mean(0)) ** 2).sum(0)
    return {"pred": pred, "r2": 1.0 - ((Y - pred) ** 2).sum(0) / sst, "alpha": np.median(np.stack(chosen), 0)}


def _hidden_dataset():
    """Hidden states of a tiny Llama over a few invented texts of different lengths, with position targets."""
    s = tiny.subject("llama", layers=2, heads=4, hidden=64)
    units = texts_mod.prepare(s, texts_mod.from_strings(TEXTS + [
        "The lighthouse keeper logs each passing boat, its colour, its flag and the hour it went by.",
        "Two buckets of river clay, one of sand, and a spoon of ash make the glaze for the blue jars.",
        "At the market the cheese stall opens last and closes first, yet it sells out every week."]))
    rec = probes._record(s, units, False)
    X, pos, shuf, unit_of = probes._dataset(units, rec.hidden, 0)
    Y = np.stack([pos, np.log1p(pos), shuf], 1).astype(np.float64)
    return X, Y, unit_of


@pytest.mark.parametrize("layer", [0, 2])
def test_fit_from_sums_equals_the_reference_fit(layer):
    # the probe's fit (per-fold sums, Cholesky per penalty) against the first implementation: the same penalties
    # and the same held-out predictions to float tolerance, on hidden states of a real forward pass and on
    # features with a large common offset and a constant column (where sums lose digits first)
    X, Y, groups = _hidden_dataset()
    rng = np.random.default_rng(3)
    offset = np.concatenate([X[layer], np.full((len(Y), 1), 7.5)], 1) + 300.0 * rng.normal(size=X.shape[2] + 1)
    for feats in (X[layer], offset):
        for folds, alphas in ((5, probes.ALPHAS), (3, probes.ALPHAS[2:5]), (2, (1.0,))):
            want = _reference_cross_validated(feats.astype(np.float64), Y, groups, list(alphas), folds)
            got = probes.cross_validated(feats, Y, groups, alphas=alphas, folds=folds)
            np.testing.assert_array_equal(got["alpha"], want["alpha"])
            np.testing.assert_allclose(got["pred"], want["pred"], rtol=1e-6, atol=1e-6 * np.abs(Y).max())
            np.testing.assert_allclose(got["r2"], want["r2"], rtol=1e-7, atol=1e-9)


def test_cross_validated_signal_and_noise():
    rng = np.random.default_rng(1)
    groups = np.repeat(np.arange(5), 80)
    pos = np.tile(np.arange(80), 5).astype(float)
    X_signal = np.stack([pos + rng.normal(scale=2, size=400), rng.normal(size=400)], 1)
    X_noise = rng.normal(size=(400, 2))
    assert probes.cross_validated(X_signal, pos, groups)["r2"][0] > 0.95
    assert probes.cross_validated(X_noise, pos, groups)["r2"][0] < 0.02


def test_windows_of_one_text_share_a_group():
    s = tiny.subject("gpt2")
    units = texts_mod.prepare(s, texts_mod.from_strings(["word " * 120, "other text " * 10]),
                                  max_tokens=40, warn=False)
    g, n_texts, _ = probes._group_keys(units)
    assert n_texts == 2 and len(units) > 2
    assert len(set(g[:-1])) == 1 and g[-1] != g[0]


# ------------------------------------------------------------------------------------------- reference models

def test_learned_absolute_layer0_decodes_position(tmp_path, corpus_texts, capsys):
    # the learned position table is added to the token embeddings at the input (GPT-2 design), so the embeddings
    # output (layer 0) carries position linearly (common practice; Haviv et al. 2022 use it as the contrast)
    _reference("learned-absolute")
    folder = tmp_path / "texts"
    folder.mkdir()
    for i, d in enumerate(corpus_texts[:4]):
        (folder / f"doc{i}.txt").write_text(d, encoding="utf-8")
    out = tmp_path / "probe.json"
    code = cli_main(["probe", "ref:learned-absolute", "--text", str(folder), "--json", str(out),
                             "--no-untrained"])
    printed = capsys.readouterr().out
    assert code == 0
    data = json.loads(out.read_text())
    r0 = data["layers"][0]
    print("\nref:learned-absolute probe: " + ", ".join(f"L{r['layer']} R² {r['r2']:.3f} (control "
                                                     f"{r['control_r2']:.3f})" for r in data["layers"]))
    assert r0["r2"] > 0.8
    assert abs(r0["control_r2"]) < 0.05
    assert set(r0) >= {"layer", "r2", "r2_log", "control_r2", "selectivity", "mae", "untrained_r2"}
    assert set(data["positions"]) >= {"min", "max", "tokens_per_position_min", "tokens_per_position_median"}
    assert data["positions"]["min"] == 1          # the <bos> at position 0 is a special token, left out
    assert "not that the model uses it" in data["caution"] and "not that the model uses it" in printed
    assert "R² pos" in printed


def test_no_encoding_model_learns_position(none_probe):
    # Haviv et al. 2022: a causal LM without positional encoding carries no position in its token embeddings
    # (layer 0) but later layers do; Kazemnejad et al. 2023 / Zuo et al. 2025: untrained causal attention already
    # gives some, so the trained model must beat its untrained copy
    layers = none_probe.layers
    print("\nref:none probe (held-out R², control, untrained):")
    for r in layers:
        print(f"  layer {r['layer']}: r2 {r['r2']:.3f}  r2_log {r['r2_log']:.3f}  control {r['control_r2']:.3f}  "
              f"selectivity {r['selectivity']:.3f}  untrained {r['untrained_r2']:.3f}  mae {r['mae']:.1f}")
    assert abs(layers[0]["r2"]) < 0.05
    best = max(layers[1:], key=lambda r: r["r2"])
    assert best["r2"] > 0.5
    assert best["selectivity"] > 0.4
    assert any(r["r2"] > r["untrained_r2"] + 0.05 for r in layers[1:])


def test_shuffled_control_stays_near_zero(none_probe):
    # Hewitt & Liang 2019: labels that do not depend on the input cannot be predicted on held-out texts
    for r in none_probe.layers:
        assert abs(r["control_r2"]) < 0.05, r


def test_counting_check_is_consistent(none_probe):
    c = none_probe.to_json()["counting"]
    print("\ncounting check:", c["summary"])
    layers = none_probe.layers
    first = c["first_layer_above_untrained"]
    if first is not None:
        r = layers[first]
        assert r["r2"] >= r["untrained_r2"] + probes.ABOVE_UNTRAINED
        assert all(x["r2"] < x["untrained_r2"] + probes.ABOVE_UNTRAINED for x in layers[:first])
    assert [e["attention_layer"] for e in c["per_layer"]] == list(range(len(layers) - 1))
    for e in c["per_layer"]:
        assert 0 <= e["counting_heads"] <= e["heads"]
        assert (e["counting_heads"] > 0) == (e["attention_layer"] in c["layers_with_counting_heads"])
    for h in c["heads"]:
        assert h["entropy_ratio"] >= thresholds.COUNTING_ENTROPY


def test_minilm_probe(minilm):
    texts = ["The lighthouse keeper wound the clock at dusk and wrote the hour in the log, as every night.",
             "Bed seven holds basil and bed eight holds dill; both were watered twice before the frost came.",
             "The ferry leaves the quay at nine, stops at the point, and returns before the evening tide turns.",
             "Order forty-one: two rye loaves and a seeded batch, to be collected on Thursday after the market."]
    res = probes.probe(minilm, texts, bands=False, untrained=False)
    data = res.to_json()
    assert "counting" not in data                       # an encoder: no causal prefix to count
    assert len(data["layers"]) == minilm.n_layers + 1
    print("\nMiniLM probe: " + ", ".join(f"L{r['layer']} {r['r2']:.2f}" for r in data["layers"]))
    # BERT adds a learned absolute position table at the input (Devlin et al. 2019)
    assert data["layers"][0]["r2"] > 0.5
    assert all(abs(r["control_r2"]) < 0.1 for r in data["layers"])


@pytest.mark.parametrize("arch", ["bert", "gpt2"])
def test_untrained_copy_same_architecture_fresh_weights(arch):
    s = tiny.subject(arch)
    u = probes.untrained_copy(s, seed=3)
    assert type(u.model) is type(s.model) and u.model.config.to_dict() == s.model.config.to_dict()
    assert u.schemes == s.schemes and u.fingerprint != s.fingerprint
    assert u.fingerprint == probes.untrained_copy(s, seed=3).fingerprint          # fixed seed: reproducible


def test_probe_needs_two_texts():
    s = tiny.subject("llama")
    with pytest.raises(attnpos.AttnposError):
        probes.probe(s, ["just one short text"], untrained=False)


# ------------------------------------------------------------------------------------------- RoPE bands

TEXTS = ["The ferry to the north island leaves at seven and returns at noon on most days.",
         "Row three of the seed tray holds basil; row four holds thyme and a tag that says thyme."]


def test_band_shares_sum_to_one_and_frequencies_follow_su():
    s = tiny.subject("llama", layers=2, heads=4, hidden=64)
    out = rope_bands(s, TEXTS)
    d = 16
    assert out.layout == "half" and out.rotary_dims == d
    # Su et al. (RoFormer): pair m rotates by θ_m = base^(-2m/d) per position
    theta = [p["theta"] for p in out.pairs]
    np.testing.assert_allclose(theta, [10000.0 ** (-2 * m / d) for m in range(d // 2)], rtol=1e-4)
    assert len(out.heads) == 2 * 4
    for h in out.heads:
        assert abs(sum(h["shares"]) - 1.0) < 1e-6
        assert min(h["shares"]) >= 0
        assert h["band"] in ("high", "low", "spread")
    json.dumps(out.to_json())


def _energy_reference(s, ids, layer_q, layer_k, H, d, base=10000.0):
    """Pair energies recomputed independently (rotate-half RoPE written out here, Su et al.)."""
    T = len(ids)
    pos = torch.arange(T, dtype=torch.float64)[:, None]
    inv = base ** (-torch.arange(0, d, 2, dtype=torch.float64) / d)
    ang = pos * inv[None, :]
    cos, sin = torch.cos(ang)[:, None, :], torch.sin(ang)[:, None, :]

    def rot(x):
        a, b = x[..., : d // 2].double(), x[..., d // 2:].double()
        return a * cos - b * sin, a * sin + b * cos

    qa, qb = rot(layer_q.view(T, H, d))
    ka, kb = rot(layer_k.view(T, H, d))
    allowed = torch.ones(T, T, dtype=torch.bool).tril()
    e = torch.zeros(H, d // 2, dtype=torch.float64)
    for m in range(d // 2):
        c = torch.einsum("ih,jh->hij", qa[..., m], ka[..., m]) + torch.einsum("ih,jh->hij", qb[..., m], kb[..., m])
        e[:, m] = (c[:, allowed] ** 2).mean(-1)
    return (e / e.sum(1, keepdim=True)).numpy()


def test_band_shares_equal_independent_recomputation():
    s = tiny.subject("llama", layers=1, heads=4, hidden=32)
    units = texts_mod.prepare(s, texts_mod.from_strings(TEXTS[:1]))
    out = rope_bands(s, units=units)
    ids = units[0].ids
    m = s.model.model
    with torch.no_grad():
        x = m.layers[0].input_layernorm(m.embed_tokens(torch.tensor(ids)))
        att = m.layers[0].self_attn
        ref = _energy_reference(s, ids, att.q_proj(x), att.k_proj(x), 4, 8)
    got = np.array([h["shares"] for h in out.heads])
    np.testing.assert_allclose(got, ref, atol=1e-4)


@pytest.mark.parametrize("pair", [0, 3])
def test_single_live_pair_takes_all_energy(pair):
    # zero every query/key dimension except the two of one rotary pair (rotate-half layout: m and m + d/2)
    heads, hidden = 4, 32
    model = tiny.build("llama", layers=2, heads=heads, hidden=hidden, num_key_value_heads=2)
    d = hidden // heads
    keep = torch.zeros(d, dtype=torch.bool)
    keep[[pair, pair + d // 2]] = True
    with torch.no_grad():
        for layer in model.model.layers:
            for proj in (layer.self_attn.q_proj, layer.self_attn.k_proj):
                w = proj.weight.view(-1, d, proj.weight.shape[-1])
                w[:, ~keep] = 0.0
    s = attnpos.from_model(model, tiny.tokenizer())
    out = rope_bands(s, TEXTS)
    for h in out.heads:
        assert h["shares"][pair] > 0.999
        assert h["dominant_pair"] == pair
    expected = "high" if out.pairs[pair]["band"] == "high" else None
    if expected:
        assert all(h["band"] == "high" for h in out.heads)


def test_bands_refuse_models_without_rope():
    with pytest.raises(attnpos.AttnposError):
        rope_bands(tiny.subject("gpt2"), TEXTS)


class _PairLoopBands(BandEnergy):
    """The pair energies and band parts as the reducer first computed them: one (T, T) tensor per rotary pair (the
    reference for the faster products of :meth:`BandEnergy._pair_terms`; the rest of the reducer is shared)."""

    name = "bands-loop"

    @staticmethod
    def _pair_terms(q, k, pairs, member, A):
        n, T, _ = q.shape
        energy = np.zeros((n, len(pairs)))
        parts = {b: torch.zeros(n, T, T) for b in bands_mod.BANDS}
        for m, (a, b) in enumerate(pairs):
            c = q[:, :, a, None] * k[:, None, :, a] + q[:, :, b, None] * k[:, None, :, b]
            energy[:, m] = ((c * c) * A).sum((-1, -2)).double().numpy()
            parts[member[m]] += c
        return energy, parts


@pytest.mark.parametrize("rotary", [1.0, 0.5], ids=["full", "partial"])
def test_band_products_equal_the_pair_loop(rotary):
    # the same recording reduced twice: by the reducer and by the per-pair loop above; energies and the removal
    # statistics must agree to float tolerance
    from attnpos.capture import record

    model = tiny.build("llama", layers=2, heads=4, hidden=64, num_key_value_heads=2, partial_rotary_factor=rotary)
    s = attnpos.from_model(model, tiny.tokenizer())
    rec = record(s, TEXTS, [BandEnergy(), _PairLoopBands()])
    fast, loop = rec.results["bands"], rec.results["bands-loop"]
    assert fast.energy.keys() == loop.energy.keys() and fast.energy
    for key in fast.energy:
        np.testing.assert_allclose(fast.energy[key], loop.energy[key], rtol=1e-4, atol=1e-8)
        np.testing.assert_allclose(fast.removal[key], loop.removal[key], rtol=1e-4, atol=1e-6)
        assert fast.count[key] == loop.count[key]


def test_probe_bands_equal_a_recording_of_their_own():
    # the probe adds the band reducer to its own recording: the same result as rope_bands on the same texts
    s = tiny.subject("llama", layers=2, heads=4, hidden=64)
    texts = TEXTS + ["The kettle sang twice before the baker noticed the rising loaves by the window."]
    res = probes.probe(s, texts, untrained=False, counting=True)
    units = texts_mod.prepare(s, texts_mod.as_raw(texts), warn=False)
    alone = rope_bands(s, units=units)
    assert res.bands.to_json()["heads"] and len(res.bands.heads) == len(alone.heads)
    for a, b in zip(res.bands.heads, alone.heads):
        assert (a["layer"], a["head"], a["band"], a["used_band"]) == (b["layer"], b["head"], b["band"], b["used_band"])
        np.testing.assert_allclose(a["shares"], b["shares"], rtol=1e-6, atol=1e-9)
        for band in b["removal"]:
            np.testing.assert_allclose(list(a["removal"][band].values()), list(b["removal"][band].values()),
                                       rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("arch", ["llama", "sinusoidal"])
def test_released_weights_give_the_same_probe_and_free_the_model(arch):
    # no external check: compared with the probe that keeps the weights (itself checked against scikit-learn's
    # Ridge above). release_model frees the trained weights before the untrained copy is built: every number
    # equals the probe that keeps them (the copy is built from the config and the seed alone; a sinusoidal table is carried over)
    s = _reference("sinusoidal") if arch == "sinusoidal" else tiny.subject("llama", layers=2, heads=4, hidden=64)
    texts = TEXTS + ["The kettle sang twice before the baker noticed the rising loaves by the window."]
    kept = probes.probe(s, texts).to_json()
    released_subject = _reference("sinusoidal") if arch == "sinusoidal" else tiny.subject("llama", layers=2,
                                                                                         heads=4, hidden=64)
    released = probes.probe(released_subject, texts, release_model=True).to_json()
    assert all(p.device.type == "meta" for p in released_subject.model.parameters())
    for a, b in zip(kept["layers"], released["layers"]):
        assert a == b
    assert kept["counting"] == released["counting"]
    bands = [{k: v for k, v in (r.get("bands") or {}).items() if k != "model"} for r in (kept, released)]
    assert bands[0] == bands[1] and (arch == "sinusoidal" or bands[0])
    assert "weights were released" in " ".join(released["model"]["notes"])
    if arch == "sinusoidal":
        # the untrained copy keeps the fixed table: it equals what a copy built from the kept model carries
        from attnpos.core.schemes import position_table

        table = probes.release_weights(_reference("sinusoidal"))
        u = probes.untrained_copy(released_subject, seed=0, table=table)
        want = position_table(probes.untrained_copy(_reference("sinusoidal"), seed=0).model)
        assert torch.equal(position_table(u.model), want)
