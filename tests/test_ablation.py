"""Head ablation, checked against the definition of multi-head attention: removing head h's slice before W^O is the
same as zeroing the rows of W^O that read it (Vaswani et al. 2017, §3.2.2: MultiHead = Concat(head_1..h) W^O)."""

import copy
import json

import numpy as np
import pytest
import torch

import attnpos
from attnpos.ablation import _final_hidden, ablate, output_projection
from attnpos.capture import forward, next_token_loss
from attnpos.cli import main as cli_main
from attnpos.texts import as_raw, prepare

import tiny

TEXTS = ["The ferry to the north island leaves at seven, stops twice, and returns at noon.",
         "Row three of the seed tray holds basil; row four holds thyme and a tag that says thyme."]


def _zero_rows_of_wo(subject, stack, layer, head, *more):
    """A copy of the model with the rows of W^O that read the given heads set to 0 (the reference route);
    ``more``: further (stack, layer, head) triples."""
    model = copy.deepcopy(subject.model)
    twin = attnpos.from_model(model, subject.tokenizer, name="twin")
    for stack, layer, head in [(stack, layer, head), *more]:
        site = next(s for s in twin.sites if (s.stack, s.layer) == (stack, layer))
        proj = output_projection(twin, site)
        with torch.no_grad():
            if isinstance(proj, torch.nn.Linear):               # weight (out, in): columns read the input
                d = proj.in_features // twin.n_heads
                proj.weight[:, head * d:(head + 1) * d] = 0
            else:                                               # GPT-2 Conv1D: weight (in, out)
                d = proj.weight.shape[0] // twin.n_heads
                proj.weight[head * d:(head + 1) * d, :] = 0
    return twin


def _loss_and_change(clean, ablated, units):
    d_loss, change, n = [], [], []
    for u in units:
        with torch.no_grad():
            a = forward(clean, list(u.ids), offset=0, want_weights=False, hidden=True)
            b = forward(ablated, list(u.ids), offset=0, want_weights=False, hidden=True)
        la, lb = next_token_loss(a, list(u.ids)), next_token_loss(b, list(u.ids))
        if la is not None:
            d_loss.append(float(lb.mean() - la.mean()))
            n.append(len(la))
        h0, h = _final_hidden(a), _final_hidden(b)
        ordinary = torch.from_numpy(~np.asarray(u.special, dtype=bool))
        change.append(float(((h - h0).norm(dim=-1) / h0.norm(dim=-1))[ordinary].mean()))
    dl = float(np.average(d_loss, weights=n)) if d_loss else float("nan")
    return dl, float(np.mean(change))


@pytest.mark.parametrize("arch,key", [("gpt2", "L1.H2"), ("llama", "L0.H1"), ("gpt_neox", "L1.H0"),
                                      ("bloom", "L0.H3"), ("mpt", "L1.H1"), ("bert", "L1.H0"),
                                      ("t5", "decoder:L1.H2"), ("t5", "encoder:L0.H1")])
def test_zero_ablation_equals_zeroing_the_rows_of_wo(arch, key):
    s = tiny.subject(arch)
    stack, layer, head = attnpos.core.keys.parse_key(key)
    if arch != "t5":
        stack = s.sites[0].stack
    result = ablate(s, [key if arch == "t5" else f"L{layer}.H{head}"], TEXTS, how="zero", n_boot=0)
    row = result.table().iloc[0]
    units = prepare(s, as_raw(TEXTS))
    ref_loss, ref_change = _loss_and_change(s, _zero_rows_of_wo(s, stack, layer, head), units)
    assert row["output_change"] == pytest.approx(ref_change, rel=1e-4, abs=1e-6)
    assert row["output_change"] > 1e-4                           # the head did something
    if np.isfinite(ref_loss):
        assert row["delta_loss"] == pytest.approx(ref_loss, rel=1e-3, abs=1e-6)
    else:
        assert np.isnan(row["delta_loss"]) and "no language-model head" in " ".join(result.notes)


@pytest.mark.parametrize("arch", ["gpt2", "llama"])
def test_heads_together_equal_zeroing_all_their_rows_of_wo(arch):
    s = tiny.subject(arch)
    keys = ["L0.H1", "L0.H3", "L1.H0"]
    row = ablate(s, keys, TEXTS, how="zero", together=True, n_boot=0).table().iloc[0]
    assert row["key"] == "L0.H1+L0.H3+L1.H0" and row["heads"] == 3
    units = prepare(s, as_raw(TEXTS))
    ref_loss, ref_change = _loss_and_change(s, _zero_rows_of_wo(s, "main", 0, 1, ("main", 0, 3), ("main", 1, 0)),
                                            units)
    assert row["output_change"] == pytest.approx(ref_change, rel=1e-4)
    assert row["delta_loss"] == pytest.approx(ref_loss, rel=1e-3, abs=1e-6)
    # one head "together" is that head alone
    alone = ablate(s, ["L1.H0"], TEXTS, n_boot=0).table().iloc[0]
    one = ablate(s, ["L1.H0"], TEXTS, together=True, n_boot=0).table().iloc[0]
    assert one["delta_loss"] == pytest.approx(alone["delta_loss"], abs=1e-9)


def test_mean_ablation_of_a_head_with_constant_output_changes_nothing():
    # a head whose value projection is 0 outputs its value bias at every position (the weights sum to 1): mean
    # ablation replaces it by itself, zero ablation removes it
    s = tiny.subject("gpt2")
    att = s.model.transformer.h[0].attn
    E, H = att.c_attn.weight.shape[0], s.n_heads
    d, h = E // H, 2
    with torch.no_grad():
        att.c_attn.weight[:, 2 * E + h * d:2 * E + (h + 1) * d] = 0
        att.c_attn.bias[2 * E + h * d:2 * E + (h + 1) * d] = torch.linspace(-1, 1, d)
    mean = ablate(s, ["L0.H2"], TEXTS, how="mean", n_boot=0).table().iloc[0]
    zero = ablate(s, ["L0.H2"], TEXTS, how="zero", n_boot=0).table().iloc[0]
    assert mean["output_change"] < 1e-5 and abs(mean["delta_loss"]) < 1e-5
    assert zero["output_change"] > 1e-3


def test_real_minilm_has_no_loss_but_every_head_moves_the_output(minilm):
    # the real pretrained encoder (no language-model head loaded): output change only, and it agrees with zeroing
    # the rows of W^O (BERT keeps W^O in the sibling output block)
    table = ablate(minilm, "L0", TEXTS, how="zero", n_boot=0).table()
    assert set(table["key"]) == {f"L0.H{h}" for h in range(minilm.n_heads)}
    assert table["delta_loss"].isna().all()
    assert (table["output_change"] > 0).all()
    top = table.iloc[0]
    units = prepare(minilm, as_raw(TEXTS))
    _, ref = _loss_and_change(minilm, _zero_rows_of_wo(minilm, "main", 0, int(top["head"])), units)
    assert top["output_change"] == pytest.approx(ref, rel=1e-4)


def test_previous_token_head_of_ref_rope_is_needed(capsys):
    # measured with the shipped weights (reproducible bit for bit): ref:rope's L0.H1 is its previous-token head
    # (attnpos scan) and mean-ablating it costs far more loss than any other head of layer 0
    s = tiny.reference("rope")
    texts = [p.read_text(encoding="utf-8")[:1500] for p in sorted(attnpos.texts.SAMPLE_DIR.glob("*.txt"))[:3]]
    table = ablate(s, "L0", texts, n_boot=200).table()
    # captured (shown with the test's report on failure), never into the progress dots
    print("ref:rope layer 0 mean ablation: " + ", ".join(
        f"{r.key} {r.delta_loss:+.3f} [{r.delta_loss_lo:+.3f}, {r.delta_loss_hi:+.3f}]" for r in table.itertuples()))
    top = table.iloc[0]
    assert top["key"] == "L0.H1" and top["delta_loss_lo"] > 0
    assert top["delta_loss"] > 3 * table.iloc[1]["delta_loss"]


def test_command_line(tmp_path, capsys):
    f = tmp_path / "t.txt"
    f.write_text(" ".join(TEXTS), encoding="utf-8")
    out = tmp_path / "abl.json"
    code = cli_main(["ablate", "ref:rope", "--heads", "L0.H1,L3.H0", "--text", str(f), "--json", str(out),
                     "--how", "zero", "--boot", "20"])
    printed = capsys.readouterr().out
    assert code == 0 and "L0.H1" in printed and "L3.H0" in printed
    data = json.loads(out.read_text())
    assert data["schema"] == "attnpos.ablation/1" and data["how"] == "zero"
    assert [h["key"] for h in data["heads"]][0] in ("L0.H1", "L3.H0") and len(data["heads"]) == 2
    assert set(data["heads"][0]["delta_loss"]) == {"value", "low", "high"}
    assert data["together"] is False and len(data["heads"][0]["heads"]) == 1
    code = cli_main(["ablate", "ref:rope", "--heads", "L0.H1,L3.H0", "--text", str(f), "--json", str(out),
                     "--together", "--boot", "20"])
    data = json.loads(out.read_text())
    assert code == 0 and data["together"] is True and data["heads"][0]["key"] == "L0.H1+L3.H0"
    assert data["heads"][0]["heads"] == [{"stack": "main", "layer": 0, "head": 1},
                                         {"stack": "main", "layer": 3, "head": 0}]
    capsys.readouterr()
    code = cli_main(["ablate", "ref:rope", "--heads", "L9.H0", "--text", str(f)])
    err = capsys.readouterr().err
    assert code == 2 and "has no head L9.H0" in err and "Traceback" not in err
    code = cli_main(["ablate", "ref:rope", "--heads", "first", "--text", str(f)])
    assert code == 2 and "L0.H1" in capsys.readouterr().err
