"""Comparing two checkpoints head by head."""

import copy
import json

import pytest
import torch

import attnpos
from attnpos.cli import main as cli_main
from attnpos.compare import compare, compare_scans

import tiny

TEXTS = [
    "The ferry to the north island leaves at seven and returns at noon on most days of the week.",
    "Row three of the seed tray holds basil; row four holds thyme and a tag that says thyme again.",
    "Entry 12: wind from the west, gusting. Entry 13: wind easing, rain by evening, lamp lit at six.",
    "Order 41: two rye loaves, one seeded. Order 42: four rolls, no seeds, to be picked up at eight.",
]

FAST = dict(n_boot=30, shift=False, induction=False)


_reference = tiny.reference


def test_model_against_itself_changes_nothing():
    s = tiny.subject("llama", layers=2)
    sa, sb = attnpos.scan(s, TEXTS, **FAST), attnpos.scan(s, TEXTS, **FAST)     # two separate scans
    result = compare_scans(sa, sb, all_heads=True)
    table = result.table()
    assert len(table) == 2 * 4
    assert not table["changed"].any()
    assert result.summary["judged_with_intervals"] == len(table)
    assert any("same fingerprint" in n for n in result.notes)
    assert len(compare_scans(sa, sb).table()) == 0


def test_planted_change_is_found():
    # the same architecture with different weights (another random seed, sharper attention): heads differ
    a = tiny.subject("llama", layers=2, seed=0)
    b = attnpos.from_model(tiny.build("llama", layers=2, seed=5), tiny.tokenizer(), name="other seed")
    table = compare(a, b, TEXTS, all_heads=True, **FAST).table()
    assert table["changed"].sum() >= 1
    for _, r in table[table["changed"]].iterrows():
        assert r["role_changed"] or r["changed_shares"] or r["slope_changed"]
        assert r["detail"]


def test_a_head_made_uniform_is_the_one_change_in_its_layer():
    # worked example with a known answer: zero a head's query projection and all its scores are 0, so its weights
    # are uniform over the visible keys (softmax of equal logits is uniform: common practice) — a `counting` head.
    # The other heads of that layer read the same inputs with the same weights, so nothing else there may change.
    a = _reference("rope")                        # its L0.H1 is a previous-token head
    model = copy.deepcopy(a.model)
    d = model.config.hidden_size // model.config.num_attention_heads
    with torch.no_grad():
        model.model.layers[0].self_attn.q_proj.weight[1 * d:2 * d] = 0
    b = attnpos.from_model(model, a.tokenizer, name="ref:rope with L0.H1 made uniform")
    table = compare(a, b, TEXTS, all_heads=True, **FAST).table().set_index(["layer", "head"])
    assert table.loc[(0, 1), "role_a"] == "previous-token"
    assert table.loc[(0, 1), "changed"] and table.loc[(0, 1), "role_b"] == "counting"
    assert not table.loc[[(0, 0), (0, 2), (0, 3)], "changed"].any()


def test_two_reference_schemes_differ_in_many_heads(tmp_path, capsys):
    _reference("alibi")
    _reference("rope")
    texts = tmp_path / "texts"
    texts.mkdir()
    for i, t in enumerate(TEXTS):
        (texts / f"t{i}.txt").write_text(t * 3)
    out = tmp_path / "cmp.json"
    code = cli_main(["compare", "ref:alibi", "ref:rope", "--text", str(texts), "--json", str(out), "--boot", "30",
                     "--no-shift", "--no-induction"])
    printed = capsys.readouterr().out
    assert code == 0
    data = json.loads(out.read_text())
    s = data["summary"]
    print(f"\nref:alibi vs ref:rope: {s}")
    assert s["heads"] == 16 and s["changed"] >= 8
    assert "heads changed" in printed and "evidence, not explanation" in data["caution"]


def test_different_grids_are_refused():
    a = tiny.subject("llama", layers=2)
    b = tiny.subject("llama", layers=3)
    with pytest.raises(attnpos.AttnposError) as err:
        compare(a, b, TEXTS, **FAST)
    assert "same heads" in str(err.value)


def test_compare_saved_scans_from_the_command_line(tmp_path, capsys):
    s = tiny.subject("gpt2", layers=2)
    scan = attnpos.scan(s, TEXTS, **FAST)
    pa = scan.save(tmp_path / "a.json")
    pb = scan.save(tmp_path / "b.json")
    out = tmp_path / "diff.json"
    assert cli_main(["compare", str(pa), str(pb), "--json", str(out)]) == 0
    data = json.loads(out.read_text())
    assert data["summary"]["changed"] == 0 and data["heads"] == []
    # without intervals only roles can be compared, and the result says so
    one = attnpos.scan(s, TEXTS[:1], **FAST)
    t = compare_scans(one, one)
    assert any("only roles" in n for n in t.notes)
    assert t.to_json()["summary"]["judged_with_intervals"] == 0
