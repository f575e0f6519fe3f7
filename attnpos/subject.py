"""Load the model under study (the *subject*) safely and detect how each layer encodes position.

Example::

    >>> import attnpos
    >>> s = attnpos.load("ref:rope")          # a shipped reference model   # doctest: +SKIP
    >>> s = attnpos.load("/models/my-ckpt")   # any local folder with config.json + safetensors   # doctest: +SKIP
    >>> s.schemes, s.causal, s.fingerprint[:12]                                                   # doctest: +SKIP

Safe by default: only ``*.safetensors`` weights are read unless ``allow_pickle=True`` (then torch loads them with
``weights_only``), and a folder that ships its own modelling code is refused unless ``trust_remote_code=True``.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from .errors import AttnposError

SCHEMES = ("learned-absolute", "sinusoidal", "relative-bias", "alibi", "rope", "none")

ENCODER_TYPES = {"bert", "roberta", "distilbert", "electra", "xlm-roberta", "camembert", "mpnet", "deberta",
                 "albert", "ernie", "modernbert"}


@dataclass
class AttentionSite:
    """One self-attention module the capture watches."""

    stack: str          # "main", "encoder" or "decoder"
    layer: int          # index within its stack
    name: str           # dotted module name inside the model
    module: torch.nn.Module
    causal: bool
    scheme: str


@dataclass
class Subject:
    """The model under study with its tokenizer and detected position scheme (see DEVELOPERS.md)."""

    model: Any
    tokenizer: Any
    name: str
    path: str
    architecture: str
    sites: list[AttentionSite]
    causal: bool
    context_limit: int | None
    training_length: int | None
    fingerprint: str
    uses_position_ids: bool
    n_heads: int
    is_encoder_decoder: bool = False
    notes: list[str] = field(default_factory=list)

    @property
    def schemes(self) -> list[str]:
        """Scheme per layer of the main (or encoder) stack."""
        first = self.sites[0].stack
        return [s.scheme for s in self.sites if s.stack == first]

    @property
    def scheme(self) -> str:
        names = {s.scheme for s in self.sites}
        return names.pop() if len(names) == 1 else "mixed"

    @property
    def stacks(self) -> list[tuple[str, int]]:
        out: dict[str, int] = {}
        for s in self.sites:
            out[s.stack] = out.get(s.stack, 0) + 1
        return list(out.items())

    @property
    def n_layers(self) -> int:
        return self.stacks[0][1]

    def describe(self) -> dict:
        """Facts about the subject for JSON and reports."""
        per_layer = self.schemes
        return {
            "path": self.path, "name": self.name, "architecture": self.architecture,
            "scheme": per_layer[0] if len(set(per_layer)) == 1 else per_layer,
            "layers": self.n_layers, "heads": self.n_heads, "causal": self.causal,
            "stacks": [list(s) for s in self.stacks], "fingerprint": self.fingerprint,
            "context_limit": self.context_limit, "training_length": self.training_length,
            "uses_position_ids": self.uses_position_ids, "notes": list(self.notes),
        }

    def __repr__(self) -> str:
        return (f"Subject({self.name!r}, {self.architecture}, scheme={self.scheme}, layers={self.n_layers}, "
                f"heads={self.n_heads}, causal={self.causal}, fingerprint={self.fingerprint[:12]})")


# ---------------------------------------------------------------------------------------------------- loading

def _resolve(path_or_name: str | os.PathLike) -> tuple[Path, str]:
    text = str(path_or_name)
    if text.startswith("ref:"):
        from . import reference  # the shipped reference models

        return Path(reference.weights_dir(text[4:])), text
    p = Path(text).expanduser()
    if not p.exists():
        raise AttnposError(f"No model folder at {p}. attnpos loads local checkpoints only (nothing is downloaded): "
                           "give the folder that holds config.json and the weights, or a reference model such as "
                           "'ref:rope' (choices: " + ", ".join("ref:" + s for s in SCHEMES) + ").")
    if p.is_file():
        p = p.parent
    if not (p / "config.json").exists():
        raise AttnposError(f"The folder {p} has no config.json, so it is not a transformers checkpoint. Point "
                           "attnpos at the folder that `save_pretrained` wrote (config.json + *.safetensors).")
    generic = {"model", "models", "checkpoint", "weights", "final", "hf"}
    name = f"{p.parent.name}/{p.name}" if p.name.lower() in generic or p.name.startswith("checkpoint-") else p.name
    return p, name


def _check_weights(p: Path, allow_pickle: bool) -> bool:
    """Return use_safetensors; refuse pickle-only folders unless allowed."""
    safe = list(p.glob("*.safetensors"))
    pickled = [f for f in p.iterdir() if f.suffix in (".bin", ".pt", ".pth", ".ckpt")]
    if safe:
        return True
    if pickled and not allow_pickle:
        raise AttnposError(f"The folder {p} holds only pickle weights ({', '.join(f.name for f in pickled[:3])}). "
                           "Pickle files can run code when loaded, so attnpos refuses them by default. Convert the "
                           "checkpoint to safetensors, or pass allow_pickle=True (CLI: --allow-pickle) if you trust "
                           "the file; it is then loaded with torch's weights_only restriction.")
    if not pickled:
        raise AttnposError(f"The folder {p} has a config.json but no weights (*.safetensors). Save the model "
                           "with `model.save_pretrained(folder)`.")
    return False


def load(path_or_name: str | os.PathLike, *, scheme: str | list[str] | None = None, allow_pickle: bool = False,
         trust_remote_code: bool = False, training_length: int | None = None) -> Subject:
    """Load a local checkpoint (or ``"ref:<scheme>"``) as a :class:`Subject`.

    Args:
        path_or_name: a folder with ``config.json`` and weights, or ``ref:learned-absolute`` … ``ref:none``.
        scheme: state the position scheme by hand (one name for all layers, or one per layer) when detection
            cannot tell; names: ``learned-absolute``, ``sinusoidal``, ``relative-bias``, ``alibi``, ``rope``,
            ``none``.
        allow_pickle: also accept ``*.bin`` pickle weights (loaded with ``weights_only``).
        trust_remote_code: run modelling code shipped inside the folder. Off by default; only for folders you trust.
        training_length: the context length the model was trained on, if its config does not record it.
    """
    p, name = _resolve(path_or_name)
    from transformers import AutoConfig, AutoTokenizer

    try:
        cfg_raw = json.loads((p / "config.json").read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise AttnposError(f"{p}/config.json cannot be read as JSON ({exc}); the file is damaged or is not a "
                           "transformers config. Re-save the checkpoint with `model.save_pretrained(folder)`.") from None
    if not isinstance(cfg_raw, dict):
        raise AttnposError(f"{p}/config.json holds a JSON {type(cfg_raw).__name__}, not the object a transformers "
                           "config is. Re-save the checkpoint with `model.save_pretrained(folder)`.")
    if (cfg_raw.get("auto_map") or any(f.suffix == ".py" for f in p.iterdir())) and not trust_remote_code:
        raise AttnposError(f"The folder {p} ships its own modelling code (auto_map / *.py). attnpos never runs code "
                           "from a model folder unless you ask: pass trust_remote_code=True (CLI: "
                           "--trust-remote-code) only if you trust its author.")
    use_safetensors = _check_weights(p, allow_pickle)
    if str(path_or_name).startswith("ref:"):
        from . import reference  # noqa: F401  (registers the reference architectures)
    try:
        config = AutoConfig.from_pretrained(p, trust_remote_code=trust_remote_code)
    except (ValueError, KeyError) as exc:
        raise AttnposError(f"transformers does not know the architecture in {p}/config.json "
                           f"(model_type={cfg_raw.get('model_type')!r}): {_one_line(exc)}. attnpos can only load "
                           "architectures transformers implements (or a folder with its own code and "
                           "trust_remote_code=True).") from None
    model_cls = _model_class(config)
    from transformers.utils import logging as hf_logging

    bars = hf_logging.is_progress_bar_enabled()
    hf_logging.disable_progress_bar()   # a few-MB checkpoint does not need a loading bar in every notebook cell
    try:
        model = model_cls.from_pretrained(p, config=config, attn_implementation="eager", dtype=torch.float32,
                                          use_safetensors=use_safetensors, weights_only=True,
                                          trust_remote_code=trust_remote_code)
    except Exception as exc:  # noqa: BLE001 - wrap with context
        if "weights only load failed" in str(exc).lower():
            raise AttnposError(f"Refused the pickle weights in {p}: they hold objects other than tensors (such a file "
                               "can run code when loaded), and torch's weights_only loader would not read them. "
                               "attnpos will not load them another way. Convert the checkpoint to safetensors in an "
                               "environment you trust, or ask its author for safetensors weights.") from None
        raise AttnposError(f"Could not load the weights in {p}: {type(exc).__name__}: {_one_line(exc)}. The weight "
                           "files may be truncated or saved for a different config; re-save the checkpoint with "
                           "`model.save_pretrained(folder)`.") from exc
    finally:
        if bars:
            hf_logging.enable_progress_bar()
    model.eval()
    try:
        tokenizer = AutoTokenizer.from_pretrained(p, trust_remote_code=trust_remote_code)
    except Exception as exc:  # noqa: BLE001
        raise AttnposError(f"Could not load a tokenizer from {p} ({type(exc).__name__}: {_one_line(exc)}). Save the "
                           "tokenizer into the model folder with `tokenizer.save_pretrained(folder)`.") from None
    subj = from_model(model, tokenizer, name=name, path=str(p), scheme=scheme, training_length=training_length,
                      _fingerprint_files=None)
    return subj


def _one_line(exc: BaseException, limit: int = 400) -> str:
    """An exception's text as one short line (no terminal colour codes, no line breaks) for an error paragraph."""
    import re

    text = re.sub(r"\x1b\[[0-9;]*[A-Za-z]", "", str(exc))
    text = " ".join(text.split())
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _model_class(config):
    from transformers import AutoModel, AutoModelForCausalLM, AutoModelForSeq2SeqLM
    from transformers.models.auto.modeling_auto import (MODEL_FOR_CAUSAL_LM_MAPPING,
                                                        MODEL_FOR_SEQ_TO_SEQ_CAUSAL_LM_MAPPING)

    if getattr(config, "is_encoder_decoder", False) and type(config) in MODEL_FOR_SEQ_TO_SEQ_CAUSAL_LM_MAPPING:
        return AutoModelForSeq2SeqLM
    if config.model_type not in ENCODER_TYPES and type(config) in MODEL_FOR_CAUSAL_LM_MAPPING:
        return AutoModelForCausalLM
    return AutoModel


def from_model(model, tokenizer, *, name: str = "in-memory model", path: str = "", scheme: str | list[str] | None = None,
               training_length: int | None = None, _fingerprint_files=None) -> Subject:
    """Wrap a model already in memory (e.g. built from a config in a test) as a :class:`Subject`."""
    model.eval()
    config = model.config
    devices = sorted({str(t.device) for t in list(model.parameters()) + list(model.buffers())} - {"cpu"})
    if devices:
        raise AttnposError(f"The model's weights are on {', '.join(devices)}; attnpos records on the CPU (float32). "
                           "Move the model first with `model.to('cpu')`, or load it with attnpos.load(folder).")
    bad = has_nonfinite_weights(model)
    if bad:
        raise AttnposError(f"The checkpoint holds NaN or infinite values in {len(bad)} parameter(s) "
                           f"({', '.join(bad[:4])}{', …' if len(bad) > 4 else ''}), so its attention cannot be "
                           "measured. Repair or re-export the checkpoint (a NaN often comes from a diverged "
                           "training run or a failed conversion).")
    sites = _find_sites(model)
    if not sites:
        raise AttnposError(f"Found no self-attention modules in {type(model).__name__}. attnpos looks for "
                           "modules whose class name ends in 'Attention'.")
    detected = _detect_schemes(model, sites)
    if scheme is not None:
        wanted = [scheme] * len(sites) if isinstance(scheme, str) else list(scheme)
        for w in wanted:
            if w not in SCHEMES:
                raise AttnposError(f"Unknown scheme {w!r}; choose from {', '.join(SCHEMES)}.")
        if len(wanted) != len(sites):
            n_first = sum(1 for s in sites if s.stack == sites[0].stack)
            if len(wanted) == n_first:
                wanted = (wanted * (len(sites) // n_first + 1))[:len(sites)]
            else:
                raise AttnposError(f"--scheme lists {len(wanted)} names but the model has {len(sites)} "
                                   "attention layers; give one name, or one per layer.")
        detected = wanted
    if any(d is None for d in detected):
        found = _scheme_clues(model)
        raise AttnposError(
            f"Could not tell how {type(model).__name__} (model_type={getattr(config, 'model_type', '?')}) encodes "
            f"position. Found: {found}. State it by hand: attnpos.load(path, scheme='rope') or "
            f"`--scheme rope` (one of {', '.join(SCHEMES)}; a comma-separated list gives one per layer).")
    for site, sch in zip(sites, detected):
        site.scheme = sch
    causal_main = all(s.causal for s in sites if s.stack != "encoder")
    is_ed = bool(getattr(config, "is_encoder_decoder", False))
    causal = False if is_ed else causal_main
    n_heads = int(_cfg(config, "num_attention_heads", "n_head", "num_heads", "n_heads") or 0)
    limit = _cfg(config, "max_position_embeddings", "n_positions", "n_ctx", "seq_length")
    if limit is None:
        tl = getattr(tokenizer, "model_max_length", None)
        limit = tl if tl and tl < 10**7 else None
    train_len = training_length or getattr(config, "attnpos_training_length", None)
    uses_pos = _uses_position_ids(model, sites)
    return Subject(model=model, tokenizer=tokenizer, name=name, path=path,
                   architecture=type(model).__name__, sites=sites, causal=causal,
                   context_limit=int(limit) if limit else None,
                   training_length=int(train_len) if train_len else None,
                   fingerprint=fingerprint(model), uses_position_ids=uses_pos, n_heads=n_heads,
                   is_encoder_decoder=is_ed)


def _cfg(config, *names):
    for n in names:
        v = getattr(config, n, None)
        if v is not None:
            return v
    return None


# ---------------------------------------------------------------------------------------------------- sites

def _find_sites(model) -> list[AttentionSite]:
    """Innermost modules named *Attention, in order; cross-attention is left out."""
    named = list(model.named_modules())
    attn = [(n, m) for n, m in named if type(m).__name__.endswith("Attention")]
    inner = []
    for n, m in attn:
        has_child = any(type(c).__name__.endswith("Attention") for c in m.modules() if c is not m)
        if not has_child:
            inner.append((n, m))
    is_ed = bool(getattr(model.config, "is_encoder_decoder", False))
    sites: list[AttentionSite] = []
    counters: dict[str, int] = {}
    for n, m in inner:
        low = n.lower()
        if "encdec" in low or "cross" in low or getattr(m, "is_cross_attention", False):
            continue
        if is_ed:
            stack = "decoder" if "decoder" in low.split(".") else "encoder"
        else:
            stack = "main"
        causal = _is_causal_module(model, m, stack)
        idx = counters.get(stack, 0)
        counters[stack] = idx + 1
        sites.append(AttentionSite(stack=stack, layer=idx, name=n, module=m, causal=causal, scheme=""))
    return sites


def _is_causal_module(model, module, stack) -> bool:
    if stack == "decoder":
        return True
    if stack == "encoder":
        return False
    v = getattr(module, "is_causal", None)
    if isinstance(v, bool):
        return v
    config = model.config
    if getattr(config, "is_decoder", False):
        return True
    if getattr(config, "model_type", "") in ENCODER_TYPES:
        return False
    # an architecture with no causal-LM class in transformers is an encoder (DeBERTa-v2, …)
    from transformers.models.auto.modeling_auto import MODEL_FOR_CAUSAL_LM_MAPPING

    return type(config) in MODEL_FOR_CAUSAL_LM_MAPPING


# ---------------------------------------------------------------------------------------------------- schemes

def sinusoidal_table(n_positions: int, dim: int) -> np.ndarray:
    """The fixed table of Vaswani et al. 2017, §3.5: PE[pos, 2i] = sin(pos / 10000^(2i/d)), PE[pos, 2i+1] = cos(...)."""
    pos = np.arange(n_positions, dtype=np.float64)[:, None]
    i = np.arange(0, dim, 2, dtype=np.float64)[None, :]
    angle = pos / np.power(10000.0, i / dim)
    out = np.zeros((n_positions, dim))
    out[:, 0::2] = np.sin(angle)
    out[:, 1::2] = np.cos(angle[:, : dim // 2])
    return out


def _is_sinusoidal(table: torch.Tensor) -> bool:
    w = table.detach().float().cpu().numpy()
    n, d = w.shape
    if d % 2:
        return False
    ref = sinusoidal_table(n, d)
    if np.allclose(w, ref, atol=1e-4):
        return True
    # the other common layout: all sines, then all cosines (common practice in some code bases)
    half = np.concatenate([ref[:, 0::2], ref[:, 1::2]], axis=1)
    return bool(np.allclose(w, half, atol=1e-4))


def _position_table(model):
    for n, m in model.named_modules():
        if isinstance(m, torch.nn.Embedding) and n.split(".")[-1] in ("wpe", "position_embeddings", "embed_positions"):
            return m.weight
    return None


def _detect_schemes(model, sites) -> list[str | None]:
    config = model.config
    mt = getattr(config, "model_type", "")
    declared = getattr(config, "attnpos_scheme", None)
    n = len(sites)
    if declared in SCHEMES:
        return [declared] * n
    if mt == "smollm3":
        flags = list(getattr(config, "no_rope_layers", None) or [1] * n)
        return ["rope" if flags[s.layer] else "none" for s in sites]
    if (mt == "bloom" or getattr(config, "alibi", False) or getattr(config, "position_embedding_type", "") == "alibi"
            or _attn_config_alibi(config)):
        return ["alibi"] * n
    if mt in ("t5", "mt5", "umt5", "longt5") or hasattr(config, "relative_attention_num_buckets"):
        return ["relative-bias"] * n
    # a learned relative-position embedding inside attention (older BERT-style "relative_key" variants; DeBERTa's
    # disentangled attention, with or without an absolute table beside it) is none of our schemes: say so rather
    # than report only the table
    if _relative_embedding(model):
        return [None] * n
    table = _position_table(model)
    if table is not None:
        return ["sinusoidal" if _is_sinusoidal(table) else "learned-absolute"] * n
    has_rotary = any("rotary" in nm.lower() for nm, _ in model.named_modules())
    if has_rotary or getattr(config, "rope_parameters", None) or getattr(config, "rope_theta", None):
        if mt == "gpt_neox" and float(getattr(config, "rotary_pct", 1.0) or 0) == 0.0:
            return ["none"] * n
        return ["rope"] * n
    return [None] * n


def _relative_embedding(model) -> str | None:
    """The name of a learned relative-position embedding module used inside attention, if there is one."""
    for nm, _ in model.named_modules():
        if nm.split(".")[-1] in ("distance_embedding", "rel_embeddings"):
            return nm
    return None


def _attn_config_alibi(config) -> bool:
    """MPT keeps its ALiBi flag in a nested attention config (an object, or a dict in older files)."""
    ac = getattr(config, "attn_config", None)
    flag = ac.get("alibi") if isinstance(ac, dict) else getattr(ac, "alibi", None)
    return flag is True


def _scheme_clues(model) -> str:
    config = model.config
    clues = [f"model_type={getattr(config, 'model_type', '?')}"]
    t = _position_table(model)
    clues.append("a position table" if t is not None else "no position table")
    clues.append("rotary modules" if any("rotary" in n.lower() for n, _ in model.named_modules()) else "no rotary modules")
    rel = _relative_embedding(model)
    if rel:
        clues.append(f"a learned relative-position embedding inside attention ({rel}), which is none of attnpos's "
                     "schemes (the nearest is relative-bias)")
    pet = getattr(config, "position_embedding_type", None)
    if pet:
        clues.append(f"position_embedding_type={pet}")
    return ", ".join(clues)


def _uses_position_ids(model, sites) -> bool:
    import inspect

    try:
        params = inspect.signature(model.forward).parameters
    except (TypeError, ValueError):
        return False
    if "position_ids" not in params:
        return False
    return any(s.scheme in ("learned-absolute", "sinusoidal", "rope") for s in sites)


# ---------------------------------------------------------------------------------------------------- fingerprint

def fingerprint(model) -> str:
    """blake2b over the config (as JSON, minus volatile fields) and every parameter and buffer's bytes."""
    h = hashlib.blake2b(digest_size=20)
    cfg = model.config.to_dict()
    for k in ("_name_or_path", "transformers_version", "_attn_implementation_autoset", "attn_implementation",
              "_attn_implementation", "dtype", "torch_dtype", "architectures"):
        cfg.pop(k, None)
    h.update(json.dumps(cfg, sort_keys=True, default=str).encode())
    for n, t in sorted(list(model.state_dict().items()), key=lambda kv: kv[0]):
        h.update(n.encode())
        a = t.detach().cpu().contiguous()
        if a.dtype == torch.bfloat16:
            a = a.float()
        h.update(a.numpy().tobytes())
    return h.hexdigest()


def has_nonfinite_weights(model) -> list[str]:
    """Names of parameters holding NaN or inf."""
    return [n for n, p in model.named_parameters() if not torch.isfinite(p).all()]

