"""What a checkpoint or an input would cost in memory, checked before anything is allocated (no torch here).

A ``config.json`` is only a claim: ``num_hidden_layers = 1000000`` over two layers of weights, or a position table
of 10⁸ rows, would otherwise be allocated (and randomly initialised) before transformers noticed that the weights
do not fill it. :func:`check_checkpoint` compares the config with the tensors the safetensors files hold (their
headers only: a few kB, never the weights) and with the memory the machine has, and refuses with the estimate.

>>> human_bytes(3 * 2**30)
'3.0 GiB'
>>> layers_in_names(["model.layers.0.q.weight", "model.layers.1.q.weight", "lm_head.weight"])
2
"""

from __future__ import annotations

import json
import os
import re
import struct
from pathlib import Path

from .errors import AttnposError

BYTES_PER_VALUE = 4
"""attnpos loads every model as float32."""

HEADER_LIMIT = 100 * 2**20
"""The largest safetensors header read (a real header is a few kB per thousand tensors)."""

HEAD_NAMES = ("num_attention_heads", "n_head", "num_heads", "n_heads")
LAYER_NAMES = ("num_hidden_layers", "n_layer", "num_layers", "n_layers", "num_decoder_layers", "encoder_layers",
               "decoder_layers")
WIDTH_NAMES = ("hidden_size", "n_embd", "d_model", "dim")
POSITION_NAMES = ("max_position_embeddings", "n_positions", "n_ctx", "max_seq_len")
FFN_NAMES = ("intermediate_size", "n_inner", "d_ff", "ffn_dim", "encoder_ffn_dim", "hidden_dim")

_LAYER_RE = re.compile(r"(?:^|\.)(?:layers?|h|blocks?)\.(\d+)\.")
# ALBERT shares its layers across depth: num_hidden_layers applications of num_hidden_groups groups of
# inner_group_num layers each (transformers' AlbertTransformer), stored once as
# albert_layer_groups.G.albert_layers.L.* — depth is not a count of stored layers, the groups and layers are
_SHARED_RE = re.compile(r"(?:^|\.)albert_layer_groups\.(\d+)\.albert_layers\.(\d+)\.")
_TABLE_RE = re.compile(r"(?:^|\.)(?:wpe|position_embeddings|embed_positions)\.weight\Z")


def human_bytes(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if abs(n) < 1024 or unit == "PiB":
            return f"{n:.1f} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1024
    return f"{n:.1f} PiB"  # pragma: no cover


def available_memory() -> int | None:
    """Bytes of memory available to a new allocation (``MemAvailable`` of /proc/meminfo, else free pages from
    ``os.sysconf``); None when the platform says neither."""
    try:
        with open("/proc/meminfo", "rb") as fh:
            for line in fh:
                if line.startswith(b"MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def refuse_if_too_big(estimate: int, what: str, advice: str) -> None:
    """An :class:`AttnposError` when ``estimate`` bytes exceed the memory available now."""
    free = available_memory()
    if free is not None and estimate > free:
        raise AttnposError(f"{what} would need about {human_bytes(estimate)} of memory, and this machine has "
                           f"{human_bytes(free)} available. {advice}")


def _int(value) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) and value >= 0 else None


def _first(cfg: dict, names) -> int | None:
    for n in names:
        v = _int(cfg.get(n))
        if v is not None:
            return v
    return None


def config_layers(cfg: dict) -> int | None:
    """The most layers any stack of the config claims."""
    found = [v for v in (_int(cfg.get(n)) for n in LAYER_NAMES) if v is not None]
    return max(found) if found else None


def estimate_config_bytes(cfg: dict) -> int:
    """A rough size of the model the config describes, in float32: embeddings, position table, and per layer
    four width² projections plus the two feed-forward matrices (the usual transformer layout; common practice)."""
    cfgs = [cfg] + [v for k, v in cfg.items() if k.endswith("_config") and isinstance(v, dict)]
    total = 0
    for c in cfgs:
        width = _first(c, WIDTH_NAMES) or 0
        ffn = _first(c, FFN_NAMES) or 4 * width
        layers = config_layers(c) or 0
        vocab = _int(c.get("vocab_size")) or 0
        positions = _first(c, POSITION_NAMES) or 0
        total += (vocab + positions) * width + layers * (4 * width * width + 2 * width * ffn)
    return total * BYTES_PER_VALUE


def read_header(path: Path) -> dict:
    """The tensor table of a safetensors file (name → {"dtype", "shape", ...}), read from its first bytes only."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
            if len(head) != 8:
                raise ValueError("shorter than a safetensors header")
            (n,) = struct.unpack("<Q", head)
            if n > HEADER_LIMIT or n > os.fstat(fh.fileno()).st_size:
                raise ValueError(f"header length {n} is impossible")
            table = json.loads(fh.read(n).decode("utf-8"))
    except (OSError, ValueError, UnicodeDecodeError, RecursionError) as exc:
        raise AttnposError(f"The weights file {path} is not a readable safetensors file ({exc}); it may be "
                           "truncated or damaged. Re-save the checkpoint with `model.save_pretrained(folder)`.") from None
    if not isinstance(table, dict):
        raise AttnposError(f"The weights file {path} has a damaged safetensors header. Re-save the checkpoint.")
    table.pop("__metadata__", None)
    return table


def layers_in_names(names) -> int | None:
    """How many layers the tensor names hold (the largest ``layers.N.`` / ``h.N.`` / ``block.N.`` index + 1 over
    every stack), or None when no name is numbered that way (a shared-layer model such as ALBERT)."""
    best = None
    for name in names:
        for m in _LAYER_RE.finditer(name):
            i = int(m.group(1)) + 1
            best = i if best is None or i > best else best
    return best


def shared_layers_in_names(names) -> tuple[int, int] | None:
    """(layer groups, layers per group) that ALBERT-style shared-layer tensor names hold
    (``albert_layer_groups.G.albert_layers.L.``: the largest G + 1 and L + 1), or None when no name is laid out
    that way.

    >>> shared_layers_in_names(["albert.encoder.albert_layer_groups.0.albert_layers.0.attention.query.weight"])
    (1, 1)
    """
    groups = inner = None
    for name in names:
        for m in _SHARED_RE.finditer(name):
            g, i = int(m.group(1)) + 1, int(m.group(2)) + 1
            groups = g if groups is None or g > groups else groups
            inner = i if inner is None or i > inner else inner
    return None if groups is None else (groups, inner)


def _refuse_missing_shared_layers(folder, cfg: dict, tables: dict) -> None:
    """A shared-layer config (ALBERT) may apply one stored layer at every depth, so its num_hidden_layers is not
    compared with the stored layers; its layer groups and layers per group are."""
    held = shared_layers_in_names(tables)
    if held is None:
        return
    for what, key, have in (("layer groups", "num_hidden_groups", held[0]),
                            ("layers per group", "inner_group_num", held[1])):
        claimed = cfg.get(key, 1)
        if isinstance(claimed, int) and not isinstance(claimed, bool) and claimed > have:
            raise AttnposError(f"{folder}/config.json claims {claimed} {what} ({key}), but the weights hold only "
                               f"{have}; the missing ones would be filled with random values and measured as if "
                               f"trained. Fix {key} in config.json, or re-save the checkpoint.")


def refuse_zero_sizes(folder, cfg: dict) -> None:
    """A config with no attention heads, no width, no layers or an empty vocabulary describes no model to study."""
    for what, names in (("attention heads", HEAD_NAMES), ("hidden width", WIDTH_NAMES), ("layers", LAYER_NAMES),
                        ("vocabulary entries", ("vocab_size",))):
        for n in names:
            if n in cfg and cfg[n] == 0 and not isinstance(cfg[n], bool):
                raise AttnposError(f"{folder}/config.json says {n} = 0: a model with no {what} has nothing attnpos "
                                   "could measure. Fix config.json (the checkpoint's weights show the real size), "
                                   "or re-save the checkpoint with `model.save_pretrained(folder)`.")


def check_checkpoint(folder: Path, cfg: dict) -> None:
    """Refuse a config that claims more layers or positions than the safetensors weights in ``folder`` hold, or a
    model bigger than the memory available, before anything is allocated."""
    refuse_zero_sizes(folder, cfg)
    tables = {}
    numel = 0
    for f in sorted(Path(folder).glob("*.safetensors")):
        for name, info in read_header(f).items():
            shape = info.get("shape") if isinstance(info, dict) else None
            if not isinstance(shape, list) or not all(_int(s) is not None for s in shape):
                raise AttnposError(f"The weights file {f} lists tensor {name!r} with a damaged shape {shape!r}. "
                                   "Re-save the checkpoint with `model.save_pretrained(folder)`.")
            tables[name] = shape
            size = 1
            for s in shape:
                size *= s
            numel += size
    if tables:
        _refuse_missing_shared_layers(folder, cfg, tables)
        claimed, held = config_layers(cfg), layers_in_names(tables)
        if claimed is not None and held is not None and claimed > held:
            raise AttnposError(f"{folder}/config.json claims {claimed} layers, but the weights hold only {held}; "
                               "the missing layers would be filled with random values and measured as if trained. "
                               "Fix num_hidden_layers (or n_layer) in config.json, or re-save the checkpoint.")
        positions = _first(cfg, POSITION_NAMES)
        for name, shape in tables.items():
            if _TABLE_RE.search(name) and len(shape) == 2 and positions is not None \
                    and positions > shape[0]:
                raise AttnposError(f"{folder}/config.json claims {positions} positions, but the weights' position "
                                   f"table {name} holds {shape[0]} rows; the rest would be random. Fix "
                                   "max_position_embeddings (or n_positions) in config.json, or re-save the "
                                   "checkpoint.")
    estimate = max(estimate_config_bytes(cfg), numel * BYTES_PER_VALUE)
    refuse_if_too_big(estimate, f"The model in {folder} (as its config.json describes it, in float32)",
                      "Check the sizes in config.json (num_hidden_layers, hidden_size, vocab_size, "
                      "max_position_embeddings), or load it on a machine with more memory.")


CAPTURE_CHUNK_BYTES = 256 * 2**20
"""Bytes one chunk of (heads, T, T) float32 may take in the capture (``attnpos.capture.CHUNK_BYTES``)."""

PROCESS_BYTES = 512 * 2**20
"""Python, torch and transformers themselves, before any model: about 0.5 GB (measured: ``attnpos length ref:rope
--to 1024`` peaks at 0.56 GB, see bench/README.md)."""


def heads_per_chunk(n_heads: int, T: int, chunk_bytes: int = CAPTURE_CHUNK_BYTES) -> int:
    """How many heads the capture handles at once for a sequence of ``T`` tokens (its own rule, repeated here
    without torch)."""
    n_heads = max(1, n_heads)
    per_head = BYTES_PER_VALUE * T * T
    n_chunks = -(-n_heads // max(1, min(n_heads, chunk_bytes // max(per_head, 1))))
    return -(-n_heads // n_chunks)


def estimate_sequence_bytes(cfg: dict, T: int, chunk_bytes: int = CAPTURE_CHUNK_BYTES) -> int:
    """Peak memory of recording one sequence of ``T`` tokens (``attnpos length --to T``): the process and the
    model, then (5 × heads per chunk + 4) float32 arrays of T × T — the capture's score, weight and block
    buffers, the reducers' temporaries, the masks — and the logits of the token loss.

    An upper bound fitted to measured peaks of ``attnpos length ref:rope --sequences 1`` at T = 1024 … 8192
    (bench/README.md): it is 1.1–1.5× the measured peak there.
    """
    heads = _first(cfg, HEAD_NAMES) or 1
    vocab = _int(cfg.get("vocab_size")) or 0
    arrays = 5 * heads_per_chunk(heads, T, chunk_bytes) + 4
    return (PROCESS_BYTES + estimate_config_bytes(cfg) + arrays * BYTES_PER_VALUE * T * T
            + 2 * BYTES_PER_VALUE * T * vocab)


def refuse_long_sequence(cfg: dict, T: int, what: str) -> None:
    """Refuse a sequence length whose recording would need more memory than is available, with the estimate."""
    refuse_if_too_big(estimate_sequence_bytes(cfg, T), f"{what} (sequences of {T} tokens)",
                      "Choose a smaller --to (memory grows with its square), or run it on a machine with more "
                      "memory.")
