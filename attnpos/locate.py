"""Where a model argument points, checked before anything heavy starts (no torch, no transformers).

:func:`locate` turns what a user typed — a folder written by ``save_pretrained``, a shipped reference model
``ref:<scheme>``, a hub id ``org/name`` already in the local hub cache (``HF_HUB_CACHE``, else ``HF_HOME/hub``, else
``~/.cache/huggingface/hub``; nothing is downloaded), or a ``.gguf`` file — into a :class:`Located` checkpoint: its
folder, its display name, its raw config, and whether the weights are safetensors. Every problem a folder can have that needs no model to see (missing, no config, a config
that is not JSON, modelling code shipped inside, pickle-only weights, no weights) is an
:class:`~attnpos.errors.AttnposError` here, so the command line refuses it in well under a second.

>>> loc = locate("ref:rope")
>>> loc.name, loc.config["attnpos_scheme"], loc.safetensors
('ref:rope', 'rope', True)
"""

from __future__ import annotations

import json
import os
import re
import struct
from dataclasses import dataclass
from pathlib import Path

from . import sizes
from .errors import AttnposError

REFERENCE_ROOT = Path(__file__).resolve().parent / "reference" / "weights"
"""Where the shipped reference models live (one folder per scheme)."""

PICKLE_SUFFIXES = (".bin", ".pt", ".pth", ".ckpt")
GENERIC_NAMES = {"model", "models", "checkpoint", "weights", "final", "hf"}


@dataclass(frozen=True)
class Located:
    """A checkpoint on disk: ``path`` (the folder), ``name`` (for display), ``config`` (config.json as a dict),
    ``safetensors`` (False: pickle weights, allowed by the caller), ``reference`` (a shipped reference model)."""

    path: Path
    name: str
    config: dict
    safetensors: bool
    reference: bool = False
    gguf: str | None = None         # the file name inside ``path`` of a GGUF checkpoint


def reference_names() -> list[str]:
    """The shipped reference models (``ref:<name>``)."""
    if not REFERENCE_ROOT.is_dir():
        return []
    return sorted(p.name for p in REFERENCE_ROOT.iterdir() if (p / "config.json").is_file())


def reference_dir(name: str) -> Path:
    """The folder of a shipped reference model; a clear error for a name that is not one or a damaged install."""
    names = reference_names()
    if name not in names:
        raise AttnposError(f"There is no reference model called {name!r}; the reference models are: "
                           f"{', '.join('ref:' + n for n in names) or 'none (reinstall attnpos)'}.")
    folder = REFERENCE_ROOT / name
    missing = [n for n in ("config.json", "model.safetensors", "tokenizer.json") if not (folder / n).is_file()]
    if missing:
        raise AttnposError(f"The reference model {name!r} is incomplete: {', '.join(missing)} missing in {folder}. "
                           f"Reinstall attnpos, or train it again with: attnpos train {name} --out {folder}")
    return folder


def _folder(text: str) -> tuple[Path, str]:
    p = Path(text).expanduser()
    if not p.exists():
        raise AttnposError(f"No model folder at {p}. attnpos loads local checkpoints only (nothing is downloaded): "
                           "give the folder that holds config.json and the weights, or a reference model such as "
                           "'ref:rope' (choices: " + ", ".join("ref:" + s for s in reference_names()) + ").")
    if p.is_file():
        p = p.parent
    gguf_files = sorted(p.glob("*.gguf")) if not (p / "config.json").exists() else []
    if gguf_files:
        raise AttnposError(f"The folder {p} holds a GGUF file but no config.json; give the .gguf file itself "
                           f"(e.g. attnpos scan {gguf_files[0]}).")
    if not (p / "config.json").exists():
        raise AttnposError(f"The folder {p} has no config.json, so it is not a transformers checkpoint. Point "
                           "attnpos at the folder that `save_pretrained` wrote (config.json + *.safetensors).")
    name = f"{p.parent.name}/{p.name}" if p.name.lower() in GENERIC_NAMES or p.name.startswith("checkpoint-") else p.name
    return p, name


def read_config(p: Path) -> dict:
    try:
        cfg = json.loads((p / "config.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise AttnposError(f"{p}/config.json cannot be read as JSON ({exc}); the file is damaged or is not a "
                           "transformers config. Re-save the checkpoint with `model.save_pretrained(folder)`.") from None
    if not isinstance(cfg, dict):
        raise AttnposError(f"{p}/config.json holds a JSON {type(cfg).__name__}, not the object a transformers "
                           "config is. Re-save the checkpoint with `model.save_pretrained(folder)`.")
    return cfg


def weights_are_safetensors(p: Path, allow_pickle: bool) -> bool:
    """True for safetensors weights; False for pickle weights the caller allowed; else a clear refusal."""
    if any(p.glob("*.safetensors")):
        return True
    pickled = [f for f in p.iterdir() if f.suffix in PICKLE_SUFFIXES]
    if pickled and not allow_pickle:
        raise AttnposError(f"The folder {p} holds only pickle weights ({', '.join(f.name for f in pickled[:3])}). "
                           "Pickle files can run code when loaded, so attnpos refuses them by default. Convert the "
                           "checkpoint to safetensors, or pass allow_pickle=True (CLI: --allow-pickle) if you trust "
                           "the file; it is then loaded with torch's weights_only restriction.")
    if not pickled:
        raise AttnposError(f"The folder {p} has a config.json but no weights (*.safetensors). Save the model "
                           "with `model.save_pretrained(folder)`.")
    return False


def locate(path_or_name: str | os.PathLike, *, allow_pickle: bool = False,
           trust_remote_code: bool = False, check_weights: bool = True) -> Located:
    """Find and check the checkpoint ``path_or_name`` refers to (see the module doc). ``check_weights=False`` leaves
    out the check of the config against the weights' headers and the machine's memory (for listing checkpoints that
    are loaded, and checked, later and elsewhere — a sweep's workers)."""
    text = str(path_or_name)
    if text.lower().endswith(".gguf"):
        return locate_gguf(Path(text).expanduser())
    if text.startswith("ref:"):
        p, name, ref = reference_dir(text[4:]), text, True
    elif looks_like_hub_id(text) and not Path(text).expanduser().exists():
        p, name, ref = hub_snapshot(text), text, False
    else:
        (p, name), ref = _folder(text), False
    cfg = read_config(p)
    if (cfg.get("auto_map") or any(f.suffix == ".py" for f in p.iterdir())) and not trust_remote_code:
        raise AttnposError(f"The folder {p} ships its own modelling code (auto_map / *.py). attnpos never runs code "
                           "from a model folder unless you ask: pass trust_remote_code=True (CLI: "
                           "--trust-remote-code) only if you trust its author.")
    problem = head_count_problem(cfg)
    if problem:
        raise AttnposError(f"{p}/config.json has {problem}. transformers' own forward pass rejects such a config (or "
                           "runs it wrong); fix the head counts in config.json, or re-save the model that works.")
    problem = position_config_problem(cfg)
    if problem:
        raise AttnposError(f"{p}/config.json: {problem}")
    safe = weights_are_safetensors(p, allow_pickle)
    if check_weights and safe:
        sizes.check_checkpoint(p, cfg)       # config against the weights' headers and the machine, before allocation
    elif check_weights:
        sizes.refuse_zero_sizes(p, cfg)
        sizes.refuse_if_too_big(sizes.estimate_config_bytes(cfg), f"The model in {p} (as its config.json describes "
                                "it, in float32)", "Check the sizes in config.json, or load it on a machine with "
                                "more memory.")
    return Located(path=p, name=name, config=cfg, safetensors=safe, reference=ref)


# ------------------------------------------------------------------------------- config and tensor checks
# (each one a function of its own: what a config or a weights file says that transformers would silently run
# differently or reject later; the capture and load call them again on a model built in memory)

_HEADS = ("num_attention_heads", "n_head", "num_heads", "n_heads", "encoder_attention_heads", "decoder_attention_heads")
_KV_HEADS = ("num_key_value_heads", "num_kv_heads", "n_head_kv", "n_kv_heads")
_HIDDEN = ("hidden_size", "n_embd", "d_model", "dim")
_HEAD_DIM = ("head_dim", "d_kv", "attention_head_size", "kv_channels")
RELATIVE_KEY_TYPES = ("relative_key", "relative_key_query")


def _sub_configs(cfg: dict) -> list[dict]:
    """The config and the configs nested in it (text_config, encoder, decoder, …)."""
    out, todo = [], [cfg]
    while todo:
        c = todo.pop()
        out.append(c)
        todo.extend(v for v in c.values() if isinstance(v, dict) and ("model_type" in v or any(h in v for h in _HEADS)))
    return out


def _int(v) -> int | None:
    return v if isinstance(v, int) and not isinstance(v, bool) else None


def head_count_problem(cfg: dict) -> str | None:
    """What is wrong with a config's head counts that transformers' own forward would reject (or silently run
    wrong), or None: key/value heads that do not divide the query heads (the grouped-query repeat factor would be
    fractional or 0), or a hidden size the heads do not divide where the head width is derived from it."""
    for c in _sub_configs(cfg):
        key = next((k for k in _HEADS if _int(c.get(k)) is not None), None)
        if key is None:
            continue
        heads = _int(c.get(key))
        if heads <= 0:
            return f"{key} = {heads} attention heads; a model needs at least one"
        kv = next((_int(c.get(k)) for k in _KV_HEADS if _int(c.get(k)) is not None), None)
        if kv is not None and (kv <= 0 or kv > heads or heads % kv):
            return (f"{kv} key/value heads for {heads} query heads; grouped-query attention shares each key/value "
                    "head among a whole number of query heads, so the key/value heads must divide the query heads")
        hidden = next((_int(c.get(k)) for k in _HIDDEN if _int(c.get(k)) is not None), None)
        explicit = any(_int(c.get(k)) for k in _HEAD_DIM)
        if hidden is not None and not explicit and hidden % heads:
            return (f"a hidden size of {hidden} split into {heads} heads; with no head_dim given, each head's width "
                    "is hidden size / heads, so the heads must divide the hidden size")
    return None


def position_config_problem(cfg: dict) -> str | None:
    """A position encoding the config asks for that transformers 5 no longer implements, or None. BERT-family
    ``position_embedding_type`` ``relative_key``/``relative_key_query`` (Shaw et al. 2018; Huang et al. 2020) is kept
    in the config but ignored by transformers 5, which runs the model with its absolute table only."""
    for c in _sub_configs(cfg):
        pet = c.get("position_embedding_type")
        if pet in RELATIVE_KEY_TYPES:
            return (f"position_embedding_type={pet!r} asks for learned relative-position embeddings inside "
                    "attention, which transformers 5 no longer implements: it would run this checkpoint with its "
                    "absolute position table only and drop the relative weights, so attnpos would measure a model "
                    "that was never trained. attnpos refuses it; analyse a checkpoint with absolute positions "
                    "(position_embedding_type='absolute'), or one of the schemes attnpos knows.")
    return None


POSITION_TENSOR_NAMES = ("distance_embedding",)
"""Weight names of position encodings transformers 5 drops as unexpected when it loads the checkpoint."""


def safetensors_names(file: Path) -> list[str]:
    """The tensor names in a safetensors file, read from its JSON header (no tensor is loaded)."""
    with open(file, "rb") as fh:
        head = fh.read(8)
        if len(head) < 8:
            return []
        n = int.from_bytes(head, "little")
        if n <= 0 or n > 100 * 2**20:
            return []
        try:
            header = json.loads(fh.read(n).decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError):
            return []
    return [k for k in header if k != "__metadata__"] if isinstance(header, dict) else []


def position_tensor_problem(p: Path) -> str | None:
    """Tensors of a position encoding transformers would drop while loading the folder's safetensors, or None."""
    found = []
    for f in sorted(Path(p).glob("*.safetensors")):
        found += [n for n in safetensors_names(f) if any(t in n.split(".") for t in POSITION_TENSOR_NAMES)]
    if not found:
        return None
    return (f"the weights hold {len(found)} relative-position tensor(s) ({', '.join(found[:2])}"
            f"{', …' if len(found) > 2 else ''}), learned relative-position embeddings inside attention (BERT's "
            "relative_key variants). transformers 5 no longer implements them and would drop these weights "
            "while loading, so attnpos would measure a model that was never trained; it refuses the checkpoint. "
            "Analyse a checkpoint with absolute positions or one of the schemes attnpos knows.")


# ------------------------------------------------------------------------------- the local hub cache

HUB_ID_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,95}/[A-Za-z0-9][A-Za-z0-9._-]{0,95}(@[A-Za-z0-9._/-]{1,100})?\Z")


def looks_like_hub_id(text: str) -> bool:
    """``org/name`` (optionally ``@revision``): the way the hub names a model."""
    return bool(HUB_ID_RE.match(text)) and ".." not in text


def hub_cache() -> Path:
    """The hub cache folder as the hub's own client finds it: ``HF_HUB_CACHE``, else ``HF_HOME/hub``, else
    ``~/.cache/huggingface/hub`` (its documented layout: ``models--org--name/snapshots/<revision>/``, with
    ``refs/main`` naming the revision — common practice of the hub client, from its documentation)."""
    if os.environ.get("HF_HUB_CACHE"):
        return Path(os.environ["HF_HUB_CACHE"]).expanduser()
    home = os.environ.get("HF_HOME") or os.path.join(os.environ.get("XDG_CACHE_HOME", "~/.cache"), "huggingface")
    return Path(home).expanduser() / "hub"


def cached_models(cache: Path | None = None) -> list[str]:
    """The ``org/name`` ids of the models in the hub cache that have at least one snapshot."""
    cache = cache or hub_cache()
    if not cache.is_dir():
        return []
    out = []
    for d in sorted(cache.glob("models--*")):
        if (d / "snapshots").is_dir() and any((d / "snapshots").iterdir()):
            out.append(d.name[len("models--"):].replace("--", "/"))
    return out


def hub_snapshot(hub_id: str) -> Path:
    """The snapshot folder of ``org/name[@revision]`` in the local hub cache; a clear error listing what is cached
    when it is not there (nothing is ever downloaded)."""
    repo, _, revision = hub_id.partition("@")
    cache = hub_cache()
    folder = cache / ("models--" + repo.replace("/", "--"))
    snapshots = folder / "snapshots"
    rev = revision or "main"
    ref = folder / "refs" / rev
    chosen = None
    if ref.is_file():
        chosen = snapshots / ref.read_text(encoding="utf-8").strip()
    elif revision and (snapshots / revision).is_dir():
        chosen = snapshots / revision
    elif not revision and snapshots.is_dir():
        found = [d for d in snapshots.iterdir() if d.is_dir()]
        if len(found) == 1:
            chosen = found[0]
    if chosen is None or not (chosen / "config.json").is_file():
        cached = cached_models(cache)
        listing = ", ".join(cached[:12]) + (f" and {len(cached) - 12} more" if len(cached) > 12 else "")
        what = f"revision {rev!r} of {repo}" if revision or folder.is_dir() else repo
        raise AttnposError(f"There is no folder {hub_id!r}, and {what} is not in the local hub cache at {cache} "
                           "(attnpos never downloads). "
                           + (f"Cached there: {listing}. " if cached else "Nothing is cached there. ")
                           + "Fetch it once where downloads are allowed (e.g. `hf download " + repo + "`), set "
                           "HF_HOME or HF_HUB_CACHE to the cache that holds it, or give the model's folder.")
    return chosen


# ------------------------------------------------------------------------------- GGUF files

GGUF_RENAMES = {"qwen2moe": "qwen2_moe", "qwen3moe": "qwen3_moe", "gpt-oss": "gpt_oss", "minimax-m2": "minimax_m2"}
"""GGUF architecture names transformers maps to another name (transformers' modeling_gguf_pytorch_utils)."""


def gguf_supported_architectures() -> list[str]:
    """The GGUF architectures transformers can load (its GGUF config mapping; torch is not imported)."""
    from transformers.integrations.ggml import GGUF_CONFIG_MAPPING

    return sorted(k for k in GGUF_CONFIG_MAPPING if k not in ("general", "tokenizer"))


def gguf_dequantisable() -> list[str]:
    """The GGML tensor types the ``gguf`` package dequantises (tried on one zero block of each type)."""
    import numpy as np
    from gguf import GGML_QUANT_SIZES, GGMLQuantizationType, dequantize

    ok = []
    for q in GGMLQuantizationType:
        block, size = GGML_QUANT_SIZES[q]
        data = (np.zeros(block, np.float32) if q == GGMLQuantizationType.F32 else
                np.zeros(block, np.float16) if q == GGMLQuantizationType.F16 else np.zeros(size, np.uint8))
        try:
            dequantize(data, q)
        except (NotImplementedError, ValueError, KeyError, TypeError):
            continue
        ok.append(q.name)
    return ok


def gguf_facts(file: Path) -> tuple[str, list[str]]:
    """The architecture and the tensor types of a GGUF file (read from its header; no tensor is dequantised).

    The header is walked by :func:`gguf_header` (about 0.05 s for a 49k-token vocabulary, where building the
    ``gguf`` package's reader, which decodes every metadata value, takes 2–3 s); anything it does not expect — a
    byte-swapped or older file, a damaged one — is read with the ``gguf`` package's ``GGUFReader`` instead, which
    also gives the error."""
    try:
        from gguf import GGMLQuantizationType, GGUFReader
    except ImportError:
        raise AttnposError("Reading a .gguf file needs the `gguf` package (and `accelerate`): "
                           "pip install 'attnpos[gguf]'.") from None
    try:
        arch, ids = gguf_header(file)
        return arch, sorted({GGMLQuantizationType(i).name for i in ids})
    except (ValueError, KeyError, OSError, UnicodeDecodeError, OverflowError):
        pass
    try:
        reader = GGUFReader(str(file))
        field = reader.fields["general.architecture"]
        arch = bytes(field.parts[field.data[0]]).decode("utf-8")
        types = sorted({t.tensor_type.name for t in reader.tensors})
    except (KeyError, ValueError, OSError, IndexError, UnicodeDecodeError) as exc:
        raise AttnposError(f"{file} cannot be read as a GGUF file ({type(exc).__name__}: {exc}); it is damaged or "
                           "not GGUF. Export it again, or give a folder with config.json + safetensors.") from None
    return arch, types


# GGUF metadata value types of fixed size (type id → bytes), per the GGUF file layout of the ggml project (from
# memory; tests/test_loading_paths.py checks the walk against the gguf package's reader)
_GGUF_FIXED = {0: 1, 1: 1, 2: 2, 3: 2, 4: 4, 5: 4, 6: 4, 7: 1, 10: 8, 11: 8, 12: 8}
_GGUF_STRING, _GGUF_ARRAY = 8, 9


def gguf_header(file) -> tuple[str, list[int]]:
    """``general.architecture`` and the type id of every tensor of a little-endian GGUF file of version 2 or 3,
    read by walking its header: magic ``GGUF``, version (u32), tensor and key-value counts (u64); each key-value
    pair a string key (u64 length + bytes), a value type (u32) and the value (fixed-size scalars, strings, arrays
    of a u32 element type and u64 count); then per tensor its name, number of dimensions (u32), dimensions (u64
    each), type (u32) and offset (u64). Raises ValueError / struct.error on anything else."""
    try:
        return _walk_gguf_header(file)
    except struct.error as exc:
        raise ValueError(f"the header ends early ({exc})") from None


def _walk_gguf_header(file) -> tuple[str, list[int]]:
    import mmap

    with open(file, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as m:
        size = len(m)
        if size < 24 or m[:4] != b"GGUF":
            raise ValueError("no GGUF magic")
        (version,) = struct.unpack_from("<I", m, 4)
        if version not in (2, 3):
            raise ValueError(f"GGUF version {version}")
        n_tensors, n_kv = struct.unpack_from("<QQ", m, 8)
        unpack = struct.unpack_from

        def string_end(at: int) -> int:
            (n,) = unpack("<Q", m, at)
            end = at + 8 + n
            if end > size:
                raise ValueError("a string runs past the end of the file")
            return end

        def value_end(kind: int, at: int) -> int:
            if kind in _GGUF_FIXED:
                return at + _GGUF_FIXED[kind]
            if kind == _GGUF_STRING:
                return string_end(at)
            if kind == _GGUF_ARRAY:
                item, n = unpack("<IQ", m, at)
                at += 12
                if item in _GGUF_FIXED:
                    at += n * _GGUF_FIXED[item]
                elif item == _GGUF_STRING:
                    for _ in range(n):
                        at = string_end(at)
                else:
                    for _ in range(n):
                        at = value_end(item, at)
                if at > size:
                    raise ValueError("an array runs past the end of the file")
                return at
            raise ValueError(f"GGUF value type {kind}")

        at, arch = 24, None
        for _ in range(n_kv):
            key_end = string_end(at)
            key = m[at + 8:key_end]
            (kind,) = unpack("<I", m, key_end)
            end = value_end(kind, key_end + 4)
            if key == b"general.architecture" and kind == _GGUF_STRING:
                arch = m[key_end + 12:end].decode("utf-8")
            at = end
        types = []
        for _ in range(n_tensors):
            at = string_end(at)
            (dims,) = unpack("<I", m, at)
            at += 4 + 8 * dims
            (kind,) = unpack("<I", m, at)
            types.append(kind)
            at += 12
            if at > size:
                raise ValueError("the tensor list runs past the end of the file")
    if arch is None:
        raise KeyError("general.architecture")
    return arch, types


def locate_gguf(file: Path) -> Located:
    """A ``.gguf`` file transformers can load: an architecture it maps and tensor types ``gguf`` dequantises
    (transformers dequantises every tensor when it loads GGUF; the model then runs in the loading dtype)."""
    if not file.is_file():
        raise AttnposError(f"No GGUF file at {file}. Give the path of an existing .gguf file.")
    arch, types = gguf_facts(file)
    known = gguf_supported_architectures()
    if GGUF_RENAMES.get(arch, arch).replace("-", "_") not in known:
        raise AttnposError(f"{file.name} holds a {arch!r} model; transformers loads GGUF files of these "
                           f"architectures only: {', '.join(known)}. Convert the model to a transformers folder "
                           "(config.json + safetensors) where it was made, and give that folder.")
    ok = set(gguf_dequantisable())
    bad = [t for t in types if t not in ok]
    if bad:
        raise AttnposError(f"{file.name} holds tensors quantised as {', '.join(bad)}, which the gguf package cannot "
                           f"dequantise (it can: {', '.join(sorted(ok))}). Re-quantise the file to one of those "
                           "(e.g. Q8_0 or Q4_K), or give a transformers folder.")
    return Located(path=file.parent, name=file.name, config={"model_type": GGUF_RENAMES.get(arch, arch)},
                   safetensors=True, gguf=file.name)
