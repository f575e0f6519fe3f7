"""Safety: pickle weights, code shipped in a model folder, hostile strings in HTML, and the findings file.

External checks, each named beside its test: torch.load's weights_only unpickler (PyTorch documentation) for pickle
weights; Python's html.parser (WHATWG HTML tokenising, as common practice for a stdlib parser) in ``assert_inert``
for the hostile strings; everything else is the package's own behaviour."""

from __future__ import annotations

import json
import os
import re
import threading
from html.parser import HTMLParser
from pathlib import Path

import pytest
import torch

import attnpos
from attnpos.errors import AttnposError
from attnpos.findings import Findings

import tiny
from hostile_kit import FERRY, assert_clean_error, run_subprocess, save_checkpoint, start_subprocess

pytestmark = pytest.mark.hostile


# ------------------------------------------------------------------------------------------ pickle weights

class _RunsCode:
    """Pickles as a call to exec: loading it writes the marker file (if the loader lets it run)."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (exec, (f"open({str(self.marker)!r}, 'w').write('pickle payload ran')",))


def _pickle_checkpoint(folder: Path, state: dict) -> Path:
    model = tiny.build("llama")
    folder.mkdir(parents=True)
    model.config.save_pretrained(folder)
    tiny.tokenizer().save_pretrained(folder)
    torch.save(state, folder / "pytorch_model.bin")
    return folder


@pytest.fixture(scope="module")
def llama_state():
    return tiny.build("llama").state_dict()


def test_pickle_only_folder_is_refused_without_opt_in(tmp_path, llama_state, cli):
    d = _pickle_checkpoint(tmp_path / "pickled", llama_state)
    with pytest.raises(AttnposError, match="allow_pickle"):
        attnpos.load(d)
    code, _, err = cli("scan", d, "--boot", "0")
    assert_clean_error(code, err, "pickle", "--allow-pickle")


def test_pickle_weights_load_with_opt_in_and_match(tmp_path, llama_state):
    d = _pickle_checkpoint(tmp_path / "pickled", llama_state)
    s = attnpos.load(d, allow_pickle=True)
    got = s.model.state_dict()
    assert set(got) == set(llama_state)
    for k, v in llama_state.items():
        assert torch.equal(got[k], v), k


def test_pickle_that_runs_code_never_runs_even_with_opt_in(tmp_path, llama_state, cli):
    marker = tmp_path / "pickle-ran.txt"
    state = dict(llama_state)
    state["lm_head.weight"] = _RunsCode(marker)
    d = _pickle_checkpoint(tmp_path / "evil-pickle", state)

    with pytest.raises(AttnposError, match="pickle"):
        attnpos.load(d)
    assert not marker.exists()
    # torch.load(weights_only=True) unpickles only tensors and plain containers and refuses other callables
    # (PyTorch documentation, torch.load; the default since torch 2.6)
    with pytest.raises(AttnposError, match="weights_only"):
        attnpos.load(d, allow_pickle=True)
    assert not marker.exists()
    code, _, err = cli("scan", d, "--allow-pickle", "--boot", "0")
    assert_clean_error(code, err, "refused the pickle", "safetensors")
    assert not marker.exists()

    # control: the payload is live; an unrestricted torch.load in a throw-away interpreter does run it (pickle
    # calls __reduce__ on load: Python documentation, "pickle — not secure against erroneous or malicious data")
    control = tmp_path / "control-ran.txt"
    state["lm_head.weight"] = _RunsCode(control)
    torch.save(state, tmp_path / "control.bin")
    run_subprocess(["-c", f"import torch; torch.load({str(tmp_path / 'control.bin')!r}, weights_only=False)"],
                   cwd=tmp_path)
    assert control.read_text() == "pickle payload ran"


# ------------------------------------------------------------------------------------------ code in the folder

CONFIG_PY = '''
open({marker!r}, "a").write("configuration imported\\n")
from transformers import LlamaConfig
class FerryConfig(LlamaConfig):
    model_type = "ferry-custom"
'''
MODEL_PY = '''
open({marker!r}, "a").write("modelling imported\\n")
from transformers import LlamaForCausalLM
from .configuration_ferry import FerryConfig
class FerryForCausalLM(LlamaForCausalLM):
    config_class = FerryConfig
'''


def _custom_code_folder(root: Path, marker: Path, *, auto_map=True, py=True) -> Path:
    d = save_checkpoint(tiny.build("llama"), root)
    cfg = json.loads((d / "config.json").read_text(encoding="utf-8"))
    if auto_map:
        cfg["model_type"] = "ferry-custom"
        cfg["auto_map"] = {"AutoConfig": "configuration_ferry.FerryConfig",
                           "AutoModelForCausalLM": "modeling_ferry.FerryForCausalLM"}
    (d / "config.json").write_text(json.dumps(cfg), encoding="utf-8")
    if py:
        (d / "configuration_ferry.py").write_text(CONFIG_PY.format(marker=str(marker)), encoding="utf-8")
        (d / "modeling_ferry.py").write_text(MODEL_PY.format(marker=str(marker)), encoding="utf-8")
    return d


@pytest.mark.parametrize("auto_map,py", [(True, True), (True, False), (False, True)],
                         ids=["auto_map+py", "auto_map-only", "py-only"])
def test_custom_code_is_refused_and_never_imported(tmp_path, monkeypatch, auto_map, py):
    monkeypatch.setenv("HF_MODULES_CACHE", str(tmp_path / "modules"))
    marker = tmp_path / "custom-code-ran.txt"
    d = _custom_code_folder(tmp_path / "custom", marker, auto_map=auto_map, py=py)
    with pytest.raises(AttnposError, match="trust_remote_code"):
        attnpos.load(d)
    with pytest.raises(AttnposError, match="trust_remote_code"):
        attnpos.scan(str(d), [FERRY], n_boot=0, shift=False, induction=False)
    assert not marker.exists()
    assert not (tmp_path / "modules").exists()


def test_custom_code_refused_by_the_real_command_line_and_runs_only_with_the_flag(tmp_path):
    marker = tmp_path / "custom-code-ran.txt"
    d = _custom_code_folder(tmp_path / "custom", marker)
    # control, in a second folder and interpreter running alongside: with the explicit flag the folder's code is
    # imported, so the marker of the refused run could have appeared
    control = tmp_path / "control-ran.txt"
    d2 = _custom_code_folder(tmp_path / "custom-control", control)
    env = {"HF_MODULES_CACHE": str(tmp_path / "modules")}
    refused = start_subprocess(["-m", "attnpos.cli", "scan", str(d), "--boot", "0", "--no-shift", "--no-induction"],
                               cwd=tmp_path, env_extra=env)
    trusted = start_subprocess(["-c", f"import attnpos; attnpos.load({str(d2)!r}, trust_remote_code=True)"],
                               cwd=tmp_path, env_extra={"HF_MODULES_CACHE": str(tmp_path / "modules-control")})
    _, err = refused.communicate(timeout=180)
    trusted.communicate(timeout=180)
    assert refused.returncode == 2
    assert "Traceback" not in err
    assert err.count("attnpos: error:") == 1 and "--trust-remote-code" in err
    assert not marker.exists()
    assert "configuration imported" in control.read_text()


# ------------------------------------------------------------------------------------------ hostile strings in HTML

HOSTILE_TOKENS = ["<script>alert(1)</script>", "\"><img src=x onerror=alert(1)>", "<svg/onload=alert(3)>"]


class _Elements(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def assert_inert(html: str, report: bool = False) -> None:
    """No element, attribute or control character came from user text. ``report``: the standalone report's own two
    script elements are there — its JSON data (never run; no "<" inside) and its script, the one the page's CSP
    allows by its SHA-256 (W3C CSP Level 3 hash-source) — and nothing else."""
    p = _Elements()
    p.feed(html)
    scripts = [a for t, a in p.tags if t == "script"]
    if report:
        import base64
        import hashlib

        assert [a.get("type") for a in scripts] == ["application/json", None], scripts
        assert html.count("<script") == 2
        data = html.split("<script type='application/json' id='rp-heads'>", 1)[1].split("</script>", 1)[0]
        assert "<" not in data
        code = html.split("<script>", 1)[1].split("</script>", 1)[0]
        digest = base64.b64encode(hashlib.sha256(code.encode("utf-8")).digest()).decode("ascii")
        assert f"script-src 'sha256-{digest}'" in html
        scripts = []
    assert not scripts, "a <script> element was created"
    assert not [a for t, a in p.tags if t == "img" and a.get("src") == "x"], "an injected <img> was created"
    assert not [t for t, a in p.tags for k in a if k.startswith("on")], "an event-handler attribute was created"
    assert not re.search(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]", html), "a raw control character is in the HTML"


@pytest.fixture(scope="module")
def hostile_scan(tmp_path_factory):
    """A real scan of a checkpoint whose folder, text file name and tokens are hostile strings."""
    import copy

    root = tmp_path_factory.mktemp("hostile-html")
    tok = copy.deepcopy(tiny.tokenizer())
    tok.add_tokens(HOSTILE_TOKENS)
    model = tiny.build("gpt2")
    model.resize_token_embeddings(len(tok))
    d = save_checkpoint(model, root / "\"><img src=x onerror=alert(2)>", tokenizer=tok)
    f = root / "<b onmouseover=alert(4)>\x1b[31m.txt"
    # short enough that every slot is among a card's top keys: [CLS] + three hostile tokens + ferry + [SEP]
    f.write_text(" ".join(HOSTILE_TOKENS) + " ferry", encoding="utf-8")
    s = attnpos.load(d)
    scan = attnpos.scan(s, [f], n_boot=0, shift=False, induction=False)
    assert {t for t in HOSTILE_TOKENS} <= set(scan.tokens[0])      # the tokens really are these strings
    scan.tokens[0][3] = "\x1b[2J\x00\x07<script>x</script>"       # control characters as a token, too
    return scan, root


def test_report_escapes_hostile_tokens_names_and_bodies(hostile_scan, tmp_path):
    from attnpos.report import write_report

    scan, _ = hostile_scan
    store = Findings(tmp_path / "notes.json")
    store.add("L0.H0", "note <script>alert(5)</script> \"><img src=x onerror=alert(6)> \x1b[31m\x00",
              fingerprint=scan.model["fingerprint"])
    html = write_report(scan, tmp_path / "r.html", findings=store).read_text(encoding="utf-8")
    assert_inert(html, report=True)
    # the hostile strings are there, shown as text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&quot;&gt;&lt;img src=x onerror=alert(2)&gt;" in html          # the model folder's name
    assert "&lt;b onmouseover=alert(4)&gt;" in html                         # the text's file name
    assert "note &lt;script&gt;alert(5)&lt;/script&gt;" in html             # the finding's body


def test_widget_static_html_escapes_hostile_tokens(hostile_scan, tmp_path):
    from attnpos.views import Atlas, Curves, FindingsPanel, HeadCard, Survey

    scan, _ = hostile_scan
    path = tmp_path / "notes.json"
    Findings(path).add("L1.H2", "<script>alert(7)</script>\x07", fingerprint=scan.model["fingerprint"])
    htmls = {"atlas": Atlas(scan, findings=path).to_html(), "card": HeadCard(scan, "L0.H0", findings=path).to_html(),
             "curves": Curves(scan).to_html(), "panel": FindingsPanel(path, scan=scan).to_html(),
             "survey": Survey(scan, findings=path, head="L1.H2").to_html()}
    for name, html in htmls.items():
        assert_inert(html)
    card = htmls["card"]
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in card                  # a hostile top-key token, as text
    assert "\\x1b[2J\\x00\\x07&lt;script&gt;x" in card                     # control characters made visible
    assert "&lt;script&gt;alert(7)&lt;/script&gt;" in htmls["panel"]


def test_command_line_report_of_a_hostile_scan_is_inert(hostile_scan, tmp_path, cli):
    scan, root = hostile_scan
    model_dir = root / "\"><img src=x onerror=alert(2)>"
    text = next(root.glob("*.txt"))
    out = tmp_path / "report.html"
    code, _, err = cli("scan", model_dir, "--text", text, "--html", out, "--boot", "0", "--no-shift",
                       "--no-induction")
    assert code == 0, err
    html = out.read_text(encoding="utf-8")
    assert_inert(html, report=True)
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


# ------------------------------------------------------------------------------------------ the findings file

def test_findings_write_is_atomic_when_the_rename_fails(tmp_path, monkeypatch):
    path = tmp_path / "notes.json"
    store = Findings(path)
    store.add("L0.H1", "first note")
    before = path.read_bytes()

    import attnpos.findings as fm

    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(fm.os, "replace", broken_replace)
    with pytest.raises(AttnposError, match="unchanged"):
        store.add("L0.H2", "second note")
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]        # no temp file left
    assert [f.body for f in store.all()] == ["first note"]


def test_findings_write_interrupted_mid_file_leaves_the_old_file(tmp_path, monkeypatch):
    path = tmp_path / "notes.json"
    store = Findings(path)
    store.add("model", "kept")
    before = path.read_bytes()

    import attnpos.findings as fm

    def interrupted_fsync(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(fm.os, "fsync", interrupted_fsync)
    with pytest.raises(KeyboardInterrupt):
        store.add("L1", "never saved")
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    assert [f.body for f in Findings(path).all()] == ["kept"]


def test_readers_never_see_a_partial_findings_file(tmp_path):
    path = tmp_path / "notes.json"
    store = Findings(path)
    store.add("model", "seed " * 200)
    errors = []
    done = threading.Event()

    def read_loop():
        reader = Findings(path)
        while not done.is_set():
            try:
                reader.all()
            except AttnposError as exc:        # a partial file would read as corrupt
                errors.append(str(exc))
                return

    t = threading.Thread(target=read_loop)
    t.start()
    try:
        for k in range(25):
            store.add(f"L{k}.H0", "body " * 300)
    finally:
        done.set()
        t.join()
    assert not errors
    assert len(Findings(path).all()) == 26
    assert not list(tmp_path.glob("*.corrupt-*"))


@pytest.mark.parametrize("garbage", [b'{"format": "attnpos.findings/1", "findings": [{"id": "ab',
                                     b"", b"\xff\xfe\x00not utf8", b'{"format": "something-else"}'],
                         ids=["truncated", "empty", "binary", "foreign"])
def test_corrupt_findings_file_is_reported_backed_up_and_never_overwritten(tmp_path, garbage):
    path = tmp_path / "notes.json"
    path.write_bytes(garbage)
    store = Findings(path)
    with pytest.raises(AttnposError) as exc:
        store.all()
    msg = str(exc.value)
    assert str(path) in msg and "copy" in msg
    backups = list(tmp_path.glob("notes.corrupt-*.json"))
    assert len(backups) == 1 and backups[0].read_bytes() == garbage
    assert backups[0].name in msg
    for attempt in (lambda: store.add("L0", "new"), lambda: store.all()):
        with pytest.raises(AttnposError):
            attempt()
    assert path.read_bytes() == garbage                               # never overwritten
    assert len(list(tmp_path.glob("notes.corrupt-*.json"))) == 1      # one copy, not one per attempt


def test_corrupt_findings_file_stops_the_command_line_report_cleanly(tmp_path, gpt2_dir, cli):
    notes = tmp_path / "notes.json"
    notes.write_bytes(b"{ not json")
    text = tmp_path / "t.txt"
    text.write_text(FERRY, encoding="utf-8")
    code, _, err = cli("scan", gpt2_dir, "--text", text, "--html", tmp_path / "r.html", "--findings", notes,
                       "--boot", "0", "--no-shift", "--no-induction")
    assert_clean_error(code, err, "corrupt", "notes.json")
    assert notes.read_bytes() == b"{ not json"


WRITER = """
import sys
from attnpos.findings import Findings
store = Findings(sys.argv[1])
for k in range(int(sys.argv[3])):
    store.add(f"L{k}.H0", f"{sys.argv[2]} note {k}", author=sys.argv[2])
"""


def test_two_processes_writing_findings_lose_nothing(tmp_path):
    import subprocess
    import sys

    from hostile_kit import ROOT

    path = tmp_path / "shared.json"
    n = 15
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    procs = [subprocess.Popen([sys.executable, "-c", WRITER, str(path), who, str(n)], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for who in ("kernel-a", "kernel-b")]
    for p in procs:
        _, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
    found = Findings(path).all()
    assert len(found) == 2 * n and len({f.id for f in found}) == 2 * n
    for who in ("kernel-a", "kernel-b"):
        bodies = [f.body for f in found if f.author == who]
        assert bodies == [f"{who} note {k}" for k in range(n)]     # each writer's notes, in its order
