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

from typing import Any

import torch

from .core import schemes
from .errors import AttnposError
from .files import safe_text
from .locate import locate

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
    missing_weights: list[str] = field(default_factory=list)   # tensors left randomly initialised (opt-in only)
    capture_path: str | None = None     # "registry" or "eager-weights", once a recording has found out which works

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
            "missing_weights": list(self.missing_weights),
        }

    def __repr__(self) -> str:
        return (f"Subject({self.name!r}, {self.architecture}, scheme={self.scheme}, layers={self.n_layers}, "
                f"heads={self.n_heads}, causal={self.causal}, fingerprint={self.fingerprint[:12]})")


# ---------------------------------------------------------------------------------------------------- loading

def load(path_or_name: str | os.PathLike, *, scheme: str | list[str] | None = None, allow_pickle: bool = False,
         trust_remote_code: bool = False, training_length: int | None = None,
         allow_missing_weights: bool = False) -> Subject:
    """Load a local checkpoint (or ``"ref:<scheme>"``) as a :class:`Subject`.

    Args:
        path_or_name: a folder with ``config.json`` and weights, or ``ref:learned-absolute`` … ``ref:none``.
        scheme: state the position scheme by hand (one name for all layers, or one per layer) when detection
            cannot tell; names: ``learned-absolute``, ``sinusoidal``, ``relative-bias``, ``alibi``, ``rope``,
            ``none``.
        allow_pickle: also accept ``*.bin`` pickle weights (loaded with ``weights_only``).
        trust_remote_code: run modelling code shipped inside the folder. Off by default; only for folders you trust.
        training_length: the context length the model was trained on, if its config does not record it.
        allow_missing_weights: load a checkpoint whose weights lack tensors the model needs (or hold them in
            another shape): those stay randomly initialised, the subject's ``missing_weights`` names them, every
            result records them in its model section, and a notice says so. Off by default: such a load is refused
            (see :func:`check_loaded_tensors`).
    """
    loc = locate(path_or_name, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
    p, name, cfg_raw, use_safetensors = loc.path, loc.name, loc.config, loc.safetensors
    from transformers import AutoConfig, AutoTokenizer

    if loc.reference or str(cfg_raw.get("model_type", "")).startswith("attnpos-"):
        from .reference import register_architectures  # the reference models' own architecture

        register_architectures()
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
        model, info = model_cls.from_pretrained(p, config=config, attn_implementation="eager", dtype=torch.float32,
                                                use_safetensors=use_safetensors, weights_only=True,
                                                trust_remote_code=trust_remote_code, output_loading_info=True,
                                                ignore_mismatched_sizes=True)   # mismatches are named below
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
    random_init, unused = check_loaded_tensors(model, info, where=str(p), allow_missing=allow_missing_weights)
    try:
        tokenizer = AutoTokenizer.from_pretrained(p, trust_remote_code=trust_remote_code)
    except Exception as exc:  # noqa: BLE001
        raise AttnposError(f"Could not load a tokenizer from {p} ({type(exc).__name__}: {_one_line(exc)}). Save the "
                           "tokenizer into the model folder with `tokenizer.save_pretrained(folder)`.") from None
    if getattr(tokenizer, "vocab_size", 1) == 0:
        raise AttnposError(f"The tokenizer in {p} has an empty vocabulary, so no text can be turned into tokens. Save "
                           "the model's tokenizer into the folder again with `tokenizer.save_pretrained(folder)`.")
    subject = from_model(model, tokenizer, name=safe_text(name), path=safe_text(str(p)), scheme=scheme,
                         training_length=training_length)
    subject.missing_weights = random_init
    if random_init:
        subject.notes.append(f"{len(random_init)} tensor(s) missing from the weights or of another shape were left "
                             f"randomly initialised ({_names(random_init)}); loaded with allow_missing_weights.")
    if unused:
        subject.notes.append(f"the weights hold {len(unused)} tensor(s) the loaded model does not use "
                             f"({_names(unused)}).")
    return subject


def _names(names: list[str], n: int = 6) -> str:
    return ", ".join(names[:n]) + (f", … ({len(names) - n} more)" if len(names) > n else "")


def check_loaded_tensors(model, info: dict, *, where: str, allow_missing: bool = False) -> tuple[list[str], list[str]]:
    """Check what a loader reports about the tensors it read (transformers' ``output_loading_info``: a dict with
    ``missing_keys``, ``unexpected_keys`` and ``mismatched_keys``); every loader of attnpos calls this.

    A missing tensor or one of another shape would be randomly initialised and then measured as if trained; an
    unexpected tensor inside the model's own modules means the weights were saved for another config (more layers,
    another layout). Either is an :class:`AttnposError` naming the tensors, unless ``allow_missing`` (then a
    warning says so). Unexpected tensors outside the model's modules (the task head of a fuller checkpoint, such
    as ``cls.predictions.*`` beside a BERT encoder) are never used and only noted.

    ``model`` may be None (a loader that has not built one yet): every unexpected tensor then counts.

    Returns ``(randomly_initialised, unused)``: sorted tensor names (missing or reshaped; unexpected).

    >>> check_loaded_tensors(None, {"missing_keys": [], "unexpected_keys": [], "mismatched_keys": []}, where="x")
    ([], [])
    """
    def names(key) -> list[str]:
        out = []
        for item in info.get(key) or ():
            out.append(str(item[0]) if isinstance(item, (tuple, list)) else str(item))
        return sorted(set(out))

    missing, mismatched, unexpected = names("missing_keys"), names("mismatched_keys"), names("unexpected_keys")
    own = set() if model is None else ({n for n, _ in model.named_children()} |
                                       {n for n, _ in model.named_parameters(recurse=False)})
    prefix = getattr(model, "base_model_prefix", "") or ""

    def inside(name: str) -> bool:
        if model is None:
            return True             # no model to tell a task head from the body: every extra tensor counts
        first = name.split(".")[0]
        if first == prefix and first not in own:
            first = (name.split(".") + [""])[1]
        return first in own

    wrong = [n for n in unexpected if inside(n)]
    problems = []
    if missing:
        problems.append(f"{len(missing)} tensor(s) the model needs are missing ({_names(missing)})")
    if mismatched:
        problems.append(f"{len(mismatched)} tensor(s) have another shape than the config implies "
                        f"({_names(mismatched)})")
    if wrong:
        problems.append(f"{len(wrong)} tensor(s) do not belong to the model the config describes ({_names(wrong)})")
    if problems and not allow_missing:
        raise AttnposError(f"The weights in {where} do not match its config: {'; '.join(problems)}. Loading would "
                           "fill the gaps with random values and measure them as if trained. Re-save the checkpoint "
                           "with `model.save_pretrained(folder)`, fix config.json, or pass allow_missing_weights=True "
                           "(CLI: --allow-missing-weights) to go on anyway; the results then record which tensors "
                           "were random.")
    if problems:
        import warnings

        warnings.warn(f"loading {where} with allow_missing_weights: {'; '.join(problems)}; these stay "
                      "random and every result records them.", stacklevel=2)
    return sorted(set(missing) | set(mismatched)), unexpected


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
               training_length: int | None = None) -> Subject:
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
    if scheme is not None:
        wanted = [scheme] * len(sites) if isinstance(scheme, str) else list(scheme)
        for w in wanted:
            if schemes.get(w) is None:
                raise AttnposError(f"Unknown scheme {w!r}; choose from {', '.join(schemes.names())}.")
        if len(wanted) != len(sites):
            n_first = sum(1 for s in sites if s.stack == sites[0].stack)
            if len(wanted) == n_first:
                wanted = (wanted * (len(sites) // n_first + 1))[:len(sites)]
            else:
                raise AttnposError(f"--scheme lists {len(wanted)} names but the model has {len(sites)} "
                                   "attention layers; give one name, or one per layer.")
        detected = wanted
    else:
        try:
            detected = _detect_schemes(model, sites)
        except schemes.Undetectable as exc:
            detected, clue = [None] * len(sites), str(exc)
        else:
            clue = None
    if any(d is None for d in detected):
        found = _scheme_clues(model) + (f", {clue}" if scheme is None and clue else "")
        raise AttnposError(
            f"Could not tell how {type(model).__name__} (model_type={getattr(config, 'model_type', '?')}) encodes "
            f"position. Found: {found}. State it by hand: attnpos.load(path, scheme='rope') or "
            f"`--scheme rope` (one of {', '.join(schemes.names())}; a comma-separated list gives one per layer).")
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

def _detect_schemes(model, sites) -> list[str | None]:
    """The scheme of each attention site, by the detectors of :mod:`attnpos.core.schemes`. Sites are numbered per
    stack; detectors see the layers of one stack (every stack of a model shares its scheme)."""
    n_first = sum(1 for s in sites if s.stack == sites[0].stack)
    per_layer = schemes.detect(model, n_first)
    return [per_layer[s.layer] if s.layer < n_first else per_layer[-1] for s in sites]


def _scheme_clues(model) -> str:
    config = model.config
    clues = [f"model_type={getattr(config, 'model_type', '?')}"]
    t = schemes.position_table(model)
    clues.append("a position table" if t is not None else "no position table")
    clues.append("rotary modules" if any("rotary" in n.lower() for n, _ in model.named_modules()) else "no rotary modules")
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
    return schemes.uses_position_ids([s.scheme for s in sites])


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

