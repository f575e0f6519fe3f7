"""Faults that would lose work or measure the wrong model (loading, outputs, findings, interrupts, tampered files).

Each test was written against the behaviour before the fix and failed there. No external check here: the
package's own safety rules.
"""

from __future__ import annotations

import json
import shutil
import warnings
from pathlib import Path

import pytest

import tiny
import torch

from attnpos.errors import AttnposError
from hostile_kit import FERRY, assert_clean_error


# ------------------------------------------------------------------------------------------ 1. missing weights

def _edited_copy(src: Path, dst: Path, edit=None, config=None) -> Path:
    """A copy of checkpoint ``src`` whose tensors went through ``edit(dict) -> dict`` and config through
    ``config(dict)``."""
    from safetensors.torch import load_file, save_file

    shutil.copytree(src, dst)
    if edit is not None:
        tensors = edit(load_file(dst / "model.safetensors"))
        save_file(tensors, dst / "model.safetensors", metadata={"format": "pt"})
    if config is not None:
        cfg = json.loads((dst / "config.json").read_text())
        config(cfg)
        (dst / "config.json").write_text(json.dumps(cfg))
    return dst


def _drop_layer1_qk(t):
    return {k: v for k, v in t.items() if ".h.1.attn.c_attn." not in k}


def test_missing_tensors_are_refused_and_named(gpt2_dir, tmp_path):
    import attnpos

    d = _edited_copy(gpt2_dir, tmp_path / "holes", _drop_layer1_qk)
    with pytest.raises(AttnposError, match=r"missing.*h\.1\.attn\.c_attn\.weight") as err:
        attnpos.load(d)
    assert "allow_missing_weights" in str(err.value) and "above report" not in str(err.value)


def test_allow_missing_weights_proceeds_and_is_stamped(gpt2_dir, tmp_path):
    import attnpos

    d = _edited_copy(gpt2_dir, tmp_path / "holes", _drop_layer1_qk)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        s = attnpos.load(d, allow_missing_weights=True)
    assert any("c_attn.weight" in str(w.message) for w in caught)
    assert "transformer.h.1.attn.c_attn.weight" in s.missing_weights
    facts = s.describe()                       # the model section every result carries
    assert "transformer.h.1.attn.c_attn.weight" in facts["missing_weights"]
    assert any("randomly initialised" in n for n in facts["notes"])
    assert attnpos.load(gpt2_dir).describe()["missing_weights"] == []


def test_cli_allow_missing_weights_prints_a_notice_and_stamps_the_json(gpt2_dir, tmp_path, cli):
    d = _edited_copy(gpt2_dir, tmp_path / "holes", _drop_layer1_qk)
    text = tmp_path / "t.txt"
    text.write_text(FERRY)
    code, _, err = cli("scan", d, "--text", text, "--no-shift", "--no-induction", "--boot", "0")
    assert_clean_error(code, err, "missing", "h.1.attn.c_attn", "--allow-missing-weights")
    out = tmp_path / "scan.json"
    code, _, err = cli("scan", d, "--text", text, "--no-shift", "--no-induction", "--boot", "0", "--json", out,
                       "--allow-missing-weights")
    assert code == 0, err
    assert "notice:" in err and "c_attn" in err
    model = json.loads(out.read_text())["model"]
    assert "transformer.h.1.attn.c_attn.weight" in model["missing_weights"]


def test_a_tensor_of_another_shape_is_named(gpt2_dir, tmp_path):
    import attnpos

    def reshape(t):
        t["transformer.h.0.attn.c_proj.weight"] = torch.zeros(32, 16)
        return t

    d = _edited_copy(gpt2_dir, tmp_path / "shape", reshape)
    with pytest.raises(AttnposError, match=r"another shape.*h\.0\.attn\.c_proj\.weight"):
        attnpos.load(d)


def test_unexpected_tensors_inside_the_model_are_refused_outside_only_noted(gpt2_dir, tmp_path):
    import attnpos

    def extra_inside(t):
        t["transformer.h.0.attn.surplus"] = torch.zeros(3)
        return t

    def extra_outside(t):
        t["cls.predictions.bias"] = torch.zeros(3)
        return t

    with pytest.raises(AttnposError, match=r"do not belong.*surplus"):
        attnpos.load(_edited_copy(gpt2_dir, tmp_path / "inside", extra_inside))
    s = attnpos.load(_edited_copy(gpt2_dir, tmp_path / "outside", extra_outside))
    assert s.missing_weights == [] and any("cls.predictions.bias" in n for n in s.notes)


def _no_allocation(monkeypatch):
    """Make any model construction fail loudly: a refusal must come before it."""
    import transformers

    def boom(*a, **k):
        raise AssertionError("a model was built before the refusal")

    monkeypatch.setattr(transformers.PreTrainedModel, "from_pretrained", classmethod(boom))


@pytest.mark.parametrize("key, value, words", [
    ("n_layer", 2000, ("2000 layers", "only 2")),
    ("n_positions", 10**8, ("100000000 positions", "40 rows")),
])
def test_a_config_claiming_more_than_the_weights_hold_is_refused_before_allocation(gpt2_dir, tmp_path, monkeypatch,
                                                                                   cli, key, value, words):
    import attnpos

    d = _edited_copy(gpt2_dir, tmp_path / "big", config=lambda c: c.update({key: value}))
    _no_allocation(monkeypatch)
    with pytest.raises(AttnposError) as err:
        attnpos.load(d)
    for w in words:
        assert w in str(err.value)
    code, _, err = cli("scan", d)
    assert_clean_error(code, err, *words)


def test_a_model_bigger_than_the_memory_available_is_refused_with_the_estimate(monkeypatch):
    import attnpos
    from attnpos import sizes

    monkeypatch.setattr(sizes, "available_memory", lambda: 2**20)
    _no_allocation(monkeypatch)
    with pytest.raises(AttnposError, match=r"would need about [\d.]+ MiB of memory.*1\.0 MiB available"):
        attnpos.load("ref:rope")


# ------------------------------------------------------------------------------------------ 2. outputs over inputs

@pytest.fixture
def notes(tmp_path) -> Path:
    from attnpos.findings import Findings

    path = tmp_path / "notes.json"
    Findings(path).add("L0.H1", "anchors on the first token")
    return path


def _notes_intact(path: Path) -> None:
    from attnpos.findings import Findings

    assert [f.body for f in Findings(path).all()] == ["anchors on the first token"]


@pytest.mark.parametrize("argv", [
    ["scan", "ref:rope", "--json", "{notes}", "--findings", "{notes}"],
    ["scan", "ref:rope", "--json", "{notes}", "--findings", "{notes}", "--html", "{tmp}/r.html"],
    ["scan", "ref:rope", "--html", "{tmp}/r.html", "--json", "{tmp}/sub/../notes.json", "--findings", "{notes}"],
    ["scan", "ref:rope", "--json", "{notes}"],                    # a findings file not named as --findings
    ["scan", "ref:rope", "--html", "{notes}"],
    ["probe", "ref:rope", "--json", "{notes}"],
    ["length", "ref:rope", "--to", "256", "--json", "{notes}"],
    ["ablate", "ref:rope", "--json", "{notes}"],
    ["compare", "ref:rope", "ref:none", "--json", "{notes}"],
])
def test_an_output_over_a_findings_file_is_refused_before_any_work(argv, notes, tmp_path, cli, monkeypatch):
    (tmp_path / "sub").mkdir()
    _no_allocation(monkeypatch)
    code, _, err = cli(*[a.format(notes=notes, tmp=tmp_path) for a in argv])
    assert_clean_error(code, err, "notes.json")
    _notes_intact(notes)


def test_an_output_into_the_model_folder_or_over_a_text_is_refused(gpt2_dir, tmp_path, cli, monkeypatch):
    d = shutil.copytree(gpt2_dir, tmp_path / "model")
    config = (d / "config.json").read_bytes()
    texts = tmp_path / "texts"
    texts.mkdir()
    (texts / "a.txt").write_text(FERRY)
    _no_allocation(monkeypatch)
    for argv in (["scan", d, "--json", d / "config.json"], ["probe", d, "--json", d / "model.safetensors"],
                 ["scan", d, "--text", texts, "--html", texts / "a.txt"],
                 ["compare", d, "ref:rope", "--json", d / "config.json"]):
        code, _, err = cli(*argv)
        assert_clean_error(code, err, "input")
    assert (d / "config.json").read_bytes() == config and (texts / "a.txt").read_text() == FERRY


def test_a_read_only_output_is_refused_up_front(tmp_path, cli, monkeypatch):
    out = tmp_path / "old.json"
    out.write_text("{}")
    out.chmod(0o444)
    _no_allocation(monkeypatch)
    code, _, err = cli("scan", "ref:rope", "--json", out)
    assert_clean_error(code, err, "read-only")
    assert out.read_text() == "{}"


def test_reference_corpus_out_is_checked(tmp_path, cli, notes):
    code, _, err = cli("reference", "corpus", "--out", notes)
    assert_clean_error(code, err, "findings file")
    _notes_intact(notes)


# ------------------------------------------------------------------------------------------ 3. and 5. findings

def test_recover_keeps_every_note_that_is_still_readable(tmp_path):
    from attnpos.findings import Findings

    path = tmp_path / "notes.json"
    store = Findings(path)
    for n in range(3):
        store.add(f"L{n}.H0", f"note {n}")
    doc = json.loads(path.read_text())
    doc["findings"][1]["layer"] = 10**6            # one entry made unreadable by hand
    path.write_text(json.dumps(doc))
    with pytest.raises(AttnposError, match="corrupt"):
        store.all()
    backup = store.recover()
    assert [f.body for f in store.all()] == ["note 0", "note 2"]
    assert json.loads(backup.read_text()) == doc
    store.add("L5.H1", "after recovery")               # the store works again
    assert len(store.all()) == 3


def test_add_and_update_never_write_what_the_reader_refuses(tmp_path):
    from attnpos.findings import Findings

    store = Findings(tmp_path / "notes.json")
    for bad in ("L1000000.H0", {"kind": "head", "layer": 10**6, "head": 0}, {"kind": "layer", "layer": -1}):
        with pytest.raises(AttnposError):
            store.add(bad, "x")
    f = store.add("L3.H2", "ok")
    with pytest.raises(AttnposError):
        store.update(f.id, status="maybe")
    store.remove(f.id)                                  # the store still works: nothing bricked it
    assert store.all() == []


def test_a_symlinked_findings_path_is_announced_and_never_written_through_by_recover(tmp_path):
    from attnpos.findings import Findings, LinkNotice

    target_dir, link_dir = tmp_path / "system", tmp_path / "mine"
    target_dir.mkdir()
    link_dir.mkdir()
    target = target_dir / "passwd"
    target.write_text("root:x:0:0:root:/root:/bin/sh\n")
    link = link_dir / "notes.json"
    link.symlink_to(target)
    with pytest.warns(LinkNotice, match="symbolic link"):
        store = Findings(link)
    with pytest.raises(AttnposError, match="corrupt"):
        store.all()
    with pytest.raises(AttnposError, match="corrupt"):
        store.add("model", "x")
    with pytest.raises(AttnposError, match="symbolic link"):
        store.recover()
    assert target.read_text() == "root:x:0:0:root:/root:/bin/sh\n"
    assert sorted(p.name for p in target_dir.iterdir()) == ["passwd"]     # no backup or lock beside the target
    assert link.is_symlink() and any(".corrupt-" in p.name for p in link_dir.iterdir())


def test_a_read_only_findings_file_is_not_rewritten(tmp_path):
    from attnpos.findings import Findings

    path = tmp_path / "notes.json"
    store = Findings(path)
    f = store.add("model", "keep")
    before = path.read_bytes()
    path.chmod(0o444)
    for change in (lambda: store.add("L0", "new"), lambda: store.update(f.id, body="changed"),
                   lambda: store.remove(f.id)):
        with pytest.raises(AttnposError, match="read-only"):
            change()
    assert path.read_bytes() == before and (path.stat().st_mode & 0o777) == 0o444
    assert [g.body for g in store.all()] == ["keep"]


# ------------------------------------------------------------------------------------------ 4. atomic writes

def _no_temporaries(folder: Path) -> bool:
    return not [p for p in folder.iterdir() if p.name.endswith(".tmp")]


@pytest.mark.parametrize("fault", ["fsync", "replace"])
def test_a_failure_part_way_leaves_the_old_file_and_no_temporary(tmp_path, monkeypatch, fault):
    import os

    from attnpos import files
    from attnpos.report import write_report
    from attnpos.views.synthetic import synthetic_scan

    scan = synthetic_scan(2, 2, seed=0)
    for save in (scan.save, lambda p: write_report(scan, p)):
        out = tmp_path / "out.file"
        out.write_text("the old file")

        def full_disk(*a, **k):
            raise OSError(28, "No space left on device")

        monkeypatch.setattr(files.os, fault, full_disk)
        with pytest.raises(OSError):
            save(out)
        monkeypatch.setattr(files.os, fault, getattr(os, fault))
        assert out.read_text() == "the old file" and _no_temporaries(tmp_path)


def test_raced_writers_to_one_path_all_succeed(tmp_path):
    from attnpos.files import write_atomic

    out = tmp_path / "report.html"

    def writer(k):
        for n in range(15):
            write_atomic(out, f"writer {k} pass {n}\n" * 200)

    assert tiny.in_threads(writer, 4) == []
    lines = set(out.read_text().splitlines())
    assert len(lines) == 1 and _no_temporaries(tmp_path)


# ------------------------------------------------------------------------------------------ 8. names not in UTF-8

def test_file_names_that_are_not_utf8_reach_json_report_and_markdown(tmp_path):
    import os

    from attnpos import texts
    from attnpos.findings import Findings
    from attnpos.report import write_report
    from attnpos.views.synthetic import synthetic_scan

    folder = Path(os.fsdecode(bytes(tmp_path) + b"/caf\xe9"))
    folder.mkdir()
    (folder / os.fsdecode(b"r\xe9cit.txt")).write_text(FERRY)
    [raw] = texts.read([folder])
    assert raw.name == "r\\xe9cit" and "caf\\xe9" in raw.source
    scan = synthetic_scan(2, 2, seed=0)
    scan.texts[0]["name"], scan.texts[0]["source"] = raw.name, raw.source
    scan.save(folder / "scan.json")
    write_report(scan, folder / "r.html")
    store = Findings(folder / "notes.json")
    store.add("model", "a note")
    assert "caf\\\\xe9" in store.export(folder / "notes.md").read_text()      # a Markdown-escaped backslash


def test_a_lone_surrogate_in_a_result_is_a_clear_error_and_the_old_file_stays(tmp_path):
    from attnpos.views.synthetic import synthetic_scan

    scan = synthetic_scan(2, 2, seed=0)
    out = tmp_path / "scan.json"
    out.write_text("old")
    scan.texts[0]["name"] = "bad\udce9"
    with pytest.raises(AttnposError, match="not valid UTF-8"):
        scan.save(out)
    assert out.read_text() == "old" and _no_temporaries(tmp_path)


# ------------------------------------------------------------------------------------------ 7. Ctrl-C during setup

def _interrupt_at(real, k: int, calls: list):
    """``real`` wrapped: the ``k``-th call registers for real and then raises KeyboardInterrupt (the interrupt lands
    just after the registration, before any bookkeeping)."""

    def wrapped(*a, **kw):
        calls.append(1)
        out = real(*a, **kw)
        if len(calls) == k:
            raise KeyboardInterrupt
        return out

    return wrapped


def _logits(s, ids):
    with torch.no_grad():
        return s.model(input_ids=torch.tensor([ids])).logits


def _interrupt_each_registration(monkeypatch, target, attr, run, s, ids):
    """Interrupt ``run`` at every registration through ``target.attr`` in turn; returns how many there were."""
    from hostile_kit import assert_same_state, model_state

    run()      # transformers installs its own output-capturing hooks on the first such forward: not ours
    before, clean = model_state(s.model), _logits(s, ids)
    k = 0
    while True:
        k += 1
        with monkeypatch.context() as patch:
            patch.setattr(target, attr, _interrupt_at(getattr(target, attr), k, []))
            try:
                run()
                interrupted = False
            except KeyboardInterrupt:
                interrupted = True
        assert_same_state(before, model_state(s.model))
        assert torch.equal(_logits(s, ids), clean)
        if not interrupted:
            return k - 1


@pytest.mark.parametrize("arch", ["llama", "bloom"])     # the registry path and the eager-weights path
def test_an_interrupt_at_any_hook_registration_leaves_the_model_as_it_was(arch, monkeypatch):
    import tiny
    from attnpos.ablation import ablate
    from attnpos.capture import record
    from attnpos.reducers import WeightStats

    s = tiny.subject(arch)
    ids = s.tokenizer(FERRY)["input_ids"][:24]
    runs = [lambda: ablate(s, ["L0.H1", "L1.H0"], [FERRY], n_boot=0, progress=False),
            lambda: record(s, [FERRY], [WeightStats()])]
    for name in ("register_forward_pre_hook", "register_forward_hook"):
        total = sum(_interrupt_each_registration(monkeypatch, torch.nn.Module, name, run, s, ids) for run in runs)
        if name == "register_forward_pre_hook" or arch == "bloom":
            assert total > 0, name          # the injection really hit registrations


@pytest.mark.parametrize("which", ["fn", "mask"])
def test_an_interrupt_at_a_registry_entry_leaves_the_registries_as_they_were(which, monkeypatch):
    import tiny
    from transformers import AttentionInterface
    from transformers.masking_utils import AttentionMaskInterface
    from attnpos.capture import record
    from attnpos.reducers import WeightStats

    s = tiny.subject("llama")
    ids = s.tokenizer(FERRY)["input_ids"][:24]
    registry = AttentionInterface if which == "fn" else AttentionMaskInterface
    n = _interrupt_each_registration(monkeypatch, registry, "register",
                                     lambda: record(s, [FERRY], [WeightStats()]), s, ids)
    assert n >= 1


# ------------------------------------------------------------------------------------------ 8. raw exceptions

def _scan_json():
    from attnpos.views.synthetic import synthetic_scan

    return synthetic_scan(2, 2, seed=0).to_json()


def _tamper(name):
    d = _scan_json()
    if name == "layers-as-text":
        d["model"]["layers"] = "2"
    elif name == "no-fingerprint":
        del d["model"]["fingerprint"]
    elif name == "no-model":
        del d["model"]
    elif name == "n-tokens-as-text":
        d["texts"][0]["n_tokens"] = "89"
    elif name == "text-entry-not-an-object":
        d["texts"][0] = "text0"
    elif name == "ragged-profile":
        d["heads"][1]["profile"]["distance"] = d["heads"][1]["profile"]["distance"][:-1]
    elif name == "duplicate-heads":
        d["heads"][1] = d["heads"][0]
    elif name == "mass-as-text":
        d["heads"][0]["mass"]["previous"] = "high"
    elif name == "tokens-not-strings":
        d["tokens"][0] = [1, 2, 3]
    return d


@pytest.mark.parametrize("name", ["layers-as-text", "no-fingerprint", "no-model", "n-tokens-as-text",
                                  "text-entry-not-an-object", "ragged-profile", "duplicate-heads", "mass-as-text",
                                  "tokens-not-strings"])
def test_a_tampered_scan_file_is_a_clear_error_in_compare(name, tmp_path, cli):
    good, bad = tmp_path / "good.json", tmp_path / "bad.json"
    good.write_text(json.dumps(_scan_json()))
    bad.write_text(json.dumps(_tamper(name)))
    code, _, err = cli("compare", good, bad)
    assert_clean_error(code, err, "scan")


@pytest.mark.parametrize("raw", [b"[" * 100_000 + b"]" * 100_000,
                                 b'{"format": "attnpos.findings/1", "findings": [{"layer": ' + b"9" * 5000 + b"}]}"],
                         ids=["deeply-nested", "5000-digits"])
def test_a_hostile_findings_file_is_a_clear_error(raw, tmp_path, cli):
    from attnpos.findings import Findings

    path = tmp_path / "notes.json"
    path.write_bytes(raw)
    with pytest.raises(AttnposError, match="corrupt"):
        Findings(path).all()
    code, _, err = cli("scan", "ref:rope", "--findings", path, "--html", tmp_path / "r.html")
    assert_clean_error(code, err, "corrupt")
    assert Findings(path).recover() is not None and Findings(path).all() == []


@pytest.mark.parametrize("key", ["n_head", "vocab_size", "n_embd"])
def test_a_config_with_a_zero_size_is_a_clear_error(gpt2_dir, tmp_path, cli, key):
    d = _edited_copy(gpt2_dir, tmp_path / "zero", config=lambda c: c.update({key: 0}))
    code, _, err = cli("scan", d)
    assert_clean_error(code, err, f"{key} = 0")


def test_an_empty_tokenizer_vocabulary_is_a_clear_error(gpt2_dir, tmp_path, cli):
    d = shutil.copytree(gpt2_dir, tmp_path / "tok")
    tj = json.loads((d / "tokenizer.json").read_text())
    tj["model"]["vocab"] = {}
    (d / "tokenizer.json").write_text(json.dumps(tj))
    code, _, err = cli("scan", d, "--no-shift", "--no-induction", "--boot", "0")
    assert_clean_error(code, err, "tokenizer")


# A property-based check (hypothesis): any tampering of a scan or a findings file ends in AttnposError or a working
# result, never in another exception.

_JUNK = ["7", "", None, True, -1, 1.5, 10**30, [], {}, [1, "a"], {"a": None}, "nan"]


def _paths(x, p=()):
    yield p
    if isinstance(x, dict):
        for k, v in x.items():
            yield from _paths(v, p + (k,))
    elif isinstance(x, list):
        for i, v in enumerate(x[:2]):
            yield from _paths(v, p + (i,))


def _apply(doc, edits):
    import copy

    doc = copy.deepcopy(doc)
    for path, junk, drop in edits:
        target = doc
        try:
            for k in path[:-1]:
                target = target[k]
            if drop and isinstance(target, dict):
                target.pop(path[-1], None)
            else:
                target[path[-1]] = copy.deepcopy(junk)
        except (KeyError, IndexError, TypeError):
            pass
    return doc


def _edits(doc):
    from hypothesis import strategies as st

    import random

    places = [p for p in _paths(doc) if p and p[0] != "schema"]
    random.Random(0).shuffle(places)      # hypothesis favours the first choices: spread them over the document
    return st.lists(st.tuples(st.sampled_from(places), st.sampled_from(_JUNK), st.booleans()), min_size=1,
                    max_size=3)


def test_tampered_scan_json_only_ever_raises_attnpos_errors():
    from hypothesis import HealthCheck, given, settings

    from attnpos.compare import compare
    from attnpos.report import report_html
    from attnpos.results.scan import Scan

    base = _scan_json()
    reference = Scan.from_json(base)

    @settings(max_examples=100, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
    @given(_edits(base))
    def check(edits):
        try:
            scan = Scan.from_json(_apply(base, edits))
            scan.text()
            report_html(scan)
            compare(scan, reference)
        except AttnposError:
            pass

    check()


def test_tampered_findings_json_only_ever_raises_attnpos_errors(tmp_path):
    from hypothesis import HealthCheck, given, settings

    from attnpos.findings import Findings

    path = tmp_path / "notes.json"
    store = Findings(path)
    store.add("L1.H0", "looks back one token", fingerprint="fp", author="kim")
    store.add("model", "no position table")
    base = json.loads(path.read_text())

    @settings(max_examples=100, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
    @given(_edits(base))
    def check(edits):
        for p in tmp_path.iterdir():
            p.unlink()
        path.write_text(json.dumps(_apply(base, edits)))
        s = Findings(path)
        try:
            found = len(s.all())
        except AttnposError:
            try:
                s.recover()
            except AttnposError:
                pass
            found = None
        try:
            s.add("L0", "after the tampering")
            s.to_markdown("fp")
        except AttnposError:
            pass
        if found is not None:
            assert len(s.all()) >= found          # nothing readable was lost

    check()


# ------------------------------------------------------------------------------------------ 6. size sanity

def test_a_huge_binary_file_is_refused_from_its_first_bytes(tmp_path):
    import tracemalloc

    from attnpos import texts

    big = tmp_path / "disk.txt"
    with open(big, "wb") as fh:
        fh.truncate(1_500_000_000)          # 1.5 GB of NUL bytes, sparse: no disk space used
    tracemalloc.start()
    try:
        with pytest.raises(AttnposError, match="binary"):
            texts.read([big])
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 50 * 2**20                 # the file was not read whole


def test_a_text_too_big_for_memory_is_refused_before_it_is_read(tmp_path, monkeypatch):
    from attnpos import sizes, texts

    path = tmp_path / "long.txt"
    path.write_text(FERRY * 100)
    monkeypatch.setattr(sizes, "available_memory", lambda: 100_000)
    with pytest.raises(AttnposError, match=r"would need about .* of memory"):
        texts.read([path])


def test_length_to_beyond_the_memory_is_refused_up_front(cli, monkeypatch):
    from attnpos import sizes

    monkeypatch.setattr(sizes, "available_memory", lambda: 4 * 2**30)
    _no_allocation(monkeypatch)
    code, _, err = cli("length", "ref:rope", "--to", "20000")
    assert_clean_error(code, err, "--to 20000", "would need about 14.0 GiB", "4.0 GiB available", "smaller --to")
    import attnpos
    from attnpos.length import length

    monkeypatch.undo()
    s = attnpos.load("ref:rope")
    monkeypatch.setattr(sizes, "available_memory", lambda: 4 * 2**30)
    with pytest.raises(AttnposError, match="would need about 14.0 GiB"):
        length(s, to=20000, n_sequences=1, n_boot=0)


def test_saving_a_trained_model_fails_whole_or_not_at_all(tmp_path, monkeypatch):
    import tiny
    from attnpos.reference import train as train_mod

    out = tmp_path / "model"
    first = tiny.build("gpt2", seed=0)
    train_mod.save(first, out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}

    def full_disk(self, *a, **k):
        raise OSError(28, "No space left on device")

    import transformers

    monkeypatch.setattr(transformers.PreTrainedTokenizerFast, "save_pretrained", full_disk)
    with pytest.raises(OSError):
        train_mod.save(tiny.build("gpt2", seed=1), out)       # weights written, tokenizer fails
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before    # no half-new model, no staging folder
