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
from .locate import head_count_problem, locate, position_config_problem, position_tensor_problem

ENCODER_TYPES = {"bert", "roberta", "distilbert", "electra", "xlm-roberta", "camembert", "mpnet", "deberta",
                 "albert", "ernie", "modernbert"}


@dataclass
class AttentionSite:
    """One self-attention module the capture watches."""

    stack: str          # "main", "encoder" or "decoder"
    layer: int          # index within its stack (for a shared module: the application, in the order they run)
    name: str           # dotted module name inside the model
    module: torch.nn.Module
    causal: bool
    scheme: str
    application: int = 0    # which call of ``module`` within one forward pass this site is (0 unless shared)
    shared: int = 1         # how many sites the module serves (ALBERT-style sharing across depth: > 1)


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
    excluded: list[str] = field(default_factory=list)   # attention modules left out (cross-attention), by name
    rope_fraction: float | None = None  # the share of each head's dimensions RoPE rotates, when below 1

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
            "excluded": list(self.excluded), "rope_fraction": self.rope_fraction, "dtype": self.dtype,
            "missing_weights": list(self.missing_weights),
        }

    @property
    def dtype(self) -> str:
        """The dtype the weights are kept in (attention scores are computed in float32 regardless)."""
        p = next(iter(self.model.parameters()), None)
        return str(p.dtype).replace("torch.", "") if p is not None else "float32"

    def __repr__(self) -> str:
        return (f"Subject({self.name!r}, {self.architecture}, scheme={self.scheme}, layers={self.n_layers}, "
                f"heads={self.n_heads}, causal={self.causal}, fingerprint={self.fingerprint[:12]})")


# ---------------------------------------------------------------------------------------------------- loading

def load(path_or_name: str | os.PathLike, *, scheme: str | list[str] | None = None, allow_pickle: bool = False,
         trust_remote_code: bool = False, training_length: int | None = None, dtype: str = "float32",
         allow_missing_weights: bool = False) -> Subject:
    """Load a local checkpoint (or ``"ref:<scheme>"``) as a :class:`Subject`.

    Args:
        path_or_name: a folder with ``config.json`` and weights, ``ref:learned-absolute`` … ``ref:none``, a hub id
            ``org/name`` already in the local hub cache, or a ``.gguf`` file (dequantised while loading).
        scheme: state the position scheme by hand (one name for all layers, or one per layer) when detection
            cannot tell; names: ``learned-absolute``, ``sinusoidal``, ``relative-bias``, ``alibi``, ``rope``,
            ``none``.
        allow_pickle: also accept ``*.bin`` pickle weights (loaded with ``weights_only``).
        trust_remote_code: run modelling code shipped inside the folder. Off by default; only for folders you trust.
        training_length: the context length the model was trained on, if its config does not record it.
        dtype: ``"float32"`` (default), ``"bfloat16"`` or ``"float16"``: the weights are kept in it; attention
            scores are always computed and reduced in float32.
        allow_missing_weights: load a checkpoint whose weights lack tensors the model needs (or hold them in
            another shape): those stay randomly initialised, the subject's ``missing_weights`` names them, every
            result records them in its model section, and a notice says so. Off by default: such a load is refused
            (see :func:`check_loaded_tensors`).
    """
    torch_dtype = weights_dtype(dtype)
    loc = locate(path_or_name, allow_pickle=allow_pickle, trust_remote_code=trust_remote_code)
    if loc.gguf:
        return _load_gguf(loc, torch_dtype, scheme=scheme, training_length=training_length,
                          allow_missing_weights=allow_missing_weights)
    p, name, cfg_raw, use_safetensors = loc.path, loc.name, loc.config, loc.safetensors
    reader = None
    if use_safetensors:
        problem = position_tensor_problem(p)
        if problem:
            raise AttnposError(f"{p}: {problem}")
        # the weight files are hashed and checked for NaN/inf in a thread of their own while transformers is
        # imported and builds the model (see WeightFiles; files read before and unchanged since are not read
        # again, see ReadCache); the result is awaited below
        reader = WeightFiles.for_files(weight_files(p))
    try:
        return _load_folder(loc, torch_dtype, reader, scheme=scheme, trust_remote_code=trust_remote_code,
                            training_length=training_length, allow_missing_weights=allow_missing_weights)
    finally:
        if reader is not None:
            reader.stop()


def _load_folder(loc, torch_dtype, reader, *, scheme, trust_remote_code, training_length,
                 allow_missing_weights) -> Subject:
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
        model, info = model_cls.from_pretrained(p, config=config, attn_implementation="eager", dtype=torch_dtype,
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
    no_pooler = _drop_absent_pooler(model, info)
    random_init, unused = check_loaded_tensors(model, info, where=str(p), allow_missing=allow_missing_weights)
    try:
        tokenizer = AutoTokenizer.from_pretrained(p, trust_remote_code=trust_remote_code)
    except Exception as exc:  # noqa: BLE001
        raise AttnposError(f"Could not load a tokenizer from {p} ({type(exc).__name__}: {_one_line(exc)}). Save the "
                           "tokenizer into the model folder with `tokenizer.save_pretrained(folder)`.") from None
    if getattr(tokenizer, "vocab_size", 1) == 0:
        raise AttnposError(f"The tokenizer in {p} has an empty vocabulary, so no text can be turned into tokens. Save "
                           "the model's tokenizer into the folder again with `tokenizer.save_pretrained(folder)`.")
    digest = None
    if reader is not None:
        files = reader.result()
        bad = sorted(set(files.nonfinite) - set(unused))     # a tensor the model does not use is never measured
        if bad:
            raise nonfinite_error(bad)
        digest = files.digest
        if not files.covers(torch_dtype):      # a narrower dtype than the files' can overflow to inf: check it
            _refuse_nonfinite(model)
    subject = _wrap(model, tokenizer, name=safe_text(name), path=safe_text(str(p)), scheme=scheme,
                    training_length=training_length, weights=digest)
    subject.missing_weights = random_init
    if random_init:
        subject.notes.append(f"{len(random_init)} tensor(s) missing from the weights or of another shape were left "
                             f"randomly initialised ({_names(random_init)}); loaded with allow_missing_weights.")
    if unused:
        subject.notes.append(f"the weights hold {len(unused)} tensor(s) the loaded model does not use "
                             f"({_names(unused)}).")
    if no_pooler:
        subject.notes.append(f"the weights hold no pooler ({_names(no_pooler)}; a masked-LM or other task "
                             "checkpoint), so the model was built without one: it reads only the last layer's output "
                             "and nothing attnpos measures.")
    return subject


def _drop_absent_pooler(model, info: dict) -> list[str]:
    """A BERT-style encoder (BERT, ALBERT, RoBERTa …) saved from a task model (masked LM, token classification)
    has no pooler: transformers builds those bodies with ``add_pooling_layer=False``, but the bare model class
    attnpos loads builds one and would fill it with random values. When *every* tensor of the pooler is missing,
    the pooler is removed (``pooler = None``, which those classes' forward skips) and its names taken out of the
    missing tensors; the pooler reads only the last layer's first position, so no attention changes. A pooler
    that is only partly missing stays missing (a damaged checkpoint). Returns the names taken out."""
    body = getattr(model, getattr(model, "base_model_prefix", "") or "", None) or model
    pooler = getattr(body, "pooler", None)
    if not isinstance(pooler, torch.nn.Module):
        return []
    prefix = "" if body is model else f"{model.base_model_prefix}."
    names = {f"{prefix}pooler.{n}" for n, _ in pooler.named_parameters()}
    missing = [str(k[0]) if isinstance(k, (tuple, list)) else str(k) for k in info.get("missing_keys") or ()]
    found = {n for n in missing if n in names or n.split(".", 1)[-1] in names}
    if not names or {n.split(".", 1)[-1] if n not in names else n for n in found} != names:
        return []
    body.pooler = None
    if hasattr(body, "pooler_activation"):
        body.pooler_activation = None
    info["missing_keys"] = [k for k in info.get("missing_keys") or ()
                            if (str(k[0]) if isinstance(k, (tuple, list)) else str(k)) not in found]
    return sorted(found)


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


def weights_dtype(name) -> torch.dtype:
    """The torch dtype of a ``--dtype`` name; a clear error for one the CPU cannot compute in."""
    from .core.settings import DTYPES

    if isinstance(name, torch.dtype):
        name = str(name).replace("torch.", "")
    if name not in DTYPES:
        raise AttnposError(f"Unknown dtype {name!r}; choose one of {', '.join(DTYPES)} (attention scores are computed "
                           "in float32 whatever the weights' dtype).")
    dt = getattr(torch, name)
    if dt != torch.float32:
        try:   # the matrix product every layer needs, tried once on tiny tensors
            a = torch.ones(4, 4, dtype=dt)
            torch.nn.functional.linear(a, a).sum().item()
            torch.nn.functional.layer_norm(a, (4,)).sum().item()
        except RuntimeError as exc:
            raise AttnposError(f"This CPU build of torch cannot compute in {name} ({_one_line(exc)}). Load the model "
                               "in float32 (--dtype float32), or bfloat16 if that works here.") from None
    return dt


def _load_gguf(loc, dtype, *, scheme=None, training_length=None, allow_missing_weights=False) -> Subject:
    """Load a GGUF file with transformers' GGUF loading (every tensor dequantised by the gguf package, then kept
    in ``dtype``). GGUF-loaded models refuse ``save_pretrained``; to keep one as safetensors, build a plain model
    from its config and copy the weights."""
    from transformers import AutoConfig, AutoTokenizer

    try:
        import accelerate  # noqa: F401 - transformers' GGUF loading needs it
        import gguf  # noqa: F401
    except ImportError:
        raise AttnposError("Loading a .gguf file needs the `gguf` and `accelerate` packages: "
                           "pip install 'attnpos[gguf]'.") from None
    p, f = loc.path, loc.gguf
    try:
        config = AutoConfig.from_pretrained(p, gguf_file=f)
        model, info = _model_class(config).from_pretrained(p, gguf_file=f, config=config, attn_implementation="eager",
                                                           dtype=dtype, output_loading_info=True)
        tokenizer = AutoTokenizer.from_pretrained(p, gguf_file=f)
    except (ValueError, NotImplementedError, KeyError, RuntimeError) as exc:
        raise AttnposError(f"transformers could not load {p / f} ({type(exc).__name__}: {_one_line(exc)}). Its GGUF "
                           "loading covers some architectures and quantisations only; convert the model to a "
                           "transformers folder (config.json + safetensors) where it was made.") from None
    model.eval()
    random_init, _ = check_loaded_tensors(model, info, where=str(p / f), allow_missing=allow_missing_weights)
    subject = from_model(model, tokenizer, name=loc.name, path=str(p / f), scheme=scheme,
                         training_length=training_length)
    subject.missing_weights = random_init
    packed = [n for n, t in model.named_parameters() if not t.is_floating_point()]
    if packed:    # transformers keeps some architectures' blocks packed when a GGUF matmul kernel is installed
        subject.notes.append(f"Loaded from GGUF ({f}): {len(packed)} weight(s) stay in their quantised blocks and are "
                             "dequantised by every matrix product; attnpos measures the model as it computes.")
    else:
        subject.notes.append(f"Loaded from GGUF ({f}): every tensor was dequantised while loading, so attnpos "
                             f"measures the dequantised weights in {str(dtype).replace('torch.', '')}.")
    return subject


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
    return _wrap(model, tokenizer, name=name, path=path, scheme=scheme, training_length=training_length)


def _wrap(model, tokenizer, *, name: str, path: str, scheme, training_length, weights: str | None = None) -> Subject:
    """:func:`from_model`; ``weights``: the digest of the weight files the model was loaded from, whose tensors
    were already checked for NaN/inf (:class:`WeightFiles`), else the parameters are checked and hashed here."""
    model.eval()
    config = model.config
    devices = sorted({str(t.device) for t in list(model.parameters()) + list(model.buffers())} - {"cpu"})
    if devices:
        raise AttnposError(f"The model's weights are on {', '.join(devices)}; attnpos records on the CPU. "
                           "Move the model first with `model.to('cpu')`, or load it with attnpos.load(folder).")
    if weights is None:
        _refuse_nonfinite(model)
    cfg_dict = config.to_dict()
    problem = position_config_problem(cfg_dict)
    if problem:
        raise AttnposError(f"The config of {type(model).__name__}: {problem}")
    problem = head_count_problem(cfg_dict)
    if problem:
        raise AttnposError(f"The config of {type(model).__name__} has {problem}. transformers' own forward pass "
                           "rejects such a config (or runs it wrong); fix the head counts in the config.")
    sites, excluded = _find_sites(model)
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
    notes = _site_notes(sites, excluded)
    fraction = schemes.rope_fraction(model) if "rope" in detected else None
    if fraction is not None and fraction < 1:
        notes.append(f"RoPE rotates {fraction:g} of each head's dimensions (partial_rotary_factor); the rest of each "
                     "query and key carries no position.")
    else:
        fraction = None
    return Subject(model=model, tokenizer=tokenizer, name=name, path=path,
                   architecture=type(model).__name__, sites=sites, causal=causal,
                   context_limit=int(limit) if limit else None,
                   training_length=int(train_len) if train_len else None,
                   fingerprint=fingerprint(model, weights=weights), uses_position_ids=uses_pos, n_heads=n_heads,
                   is_encoder_decoder=is_ed, notes=notes, excluded=excluded, rope_fraction=fraction)


def _cfg(config, *names):
    for n in names:
        v = getattr(config, n, None)
        if v is not None:
            return v
    return None


# ---------------------------------------------------------------------------------------------------- sites

def _find_sites(model) -> tuple[list[AttentionSite], list[str]]:
    """Innermost modules named *Attention, in the order they run, one site per application (a module shared across
    depth, ALBERT-style, gives one site per time it is applied); cross-attention is left out and returned by name."""
    named = list(model.named_modules())
    attn = [(n, m) for n, m in named if type(m).__name__.endswith("Attention")]
    inner = []
    for n, m in attn:
        has_child = any(type(c).__name__.endswith("Attention") for c in m.modules() if c is not m)
        if not has_child:
            inner.append((n, m))
    is_ed = bool(getattr(model.config, "is_encoder_decoder", False))
    excluded = [n for n, m in inner if is_cross_attention(n, m)]
    inner = _applications(model, [(n, m) for n, m in inner if n not in excluded])
    sites: list[AttentionSite] = []
    counters: dict[str, int] = {}
    calls: dict[int, int] = {}
    for n, m in inner:
        low = n.lower()
        if is_ed:
            stack = "decoder" if "decoder" in low.split(".") else "encoder"
        else:
            stack = "main"
        causal = _is_causal_module(model, m, stack)
        idx = counters.get(stack, 0)
        counters[stack] = idx + 1
        app = calls.get(id(m), 0)
        calls[id(m)] = app + 1
        sites.append(AttentionSite(stack=stack, layer=idx, name=n, module=m, causal=causal, scheme="",
                                   application=app))
    for site in sites:
        site.shared = calls[id(site.module)]
    return sites, excluded


CROSS_NAMES = ("encoder_attn", "crossattention", "cross_attn", "cross_attention", "encdecattention", "enc_dec_attn",
               "encoder_decoder_attention")
"""Last components of module names that hold cross-attention (BART, mBART, Marian, Pegasus, Whisper:
``encoder_attn``; BERT as a decoder: ``crossattention``; T5: ``EncDecAttention``)."""


def is_cross_attention(name: str, module) -> bool:
    """Whether the attention module ``name`` attends from one sequence to another (decoder → encoder)."""
    last = name.lower().rsplit(".", 1)[-1]
    if last in CROSS_NAMES or "cross" in last or "encdec" in last:
        return True
    return bool(getattr(module, "is_cross_attention", False))


def _applications(model, inner: list[tuple[str, Any]]) -> list[tuple[str, Any]]:
    """The self-attention modules in the order one forward pass applies them. ALBERT applies its layer groups
    ``num_hidden_layers`` times (group ``int(i / (num_hidden_layers / num_hidden_groups))`` at depth i, each group's
    ``inner_group_num`` layers in turn — transformers' AlbertTransformer.forward); every other architecture applies
    each module once. The capture checks at run time that no module is called more often than it has sites."""
    config = model.config
    groups = getattr(config, "num_hidden_groups", None)
    if getattr(config, "model_type", "") != "albert" or not groups:
        return inner
    depth = int(config.num_hidden_layers)
    by_group: dict[int, list[tuple[str, Any]]] = {}
    for n, m in inner:
        parts = n.split(".")
        if "albert_layer_groups" not in parts:
            return inner
        by_group.setdefault(int(parts[parts.index("albert_layer_groups") + 1]), []).append((n, m))
    order = []
    for i in range(depth):
        order.extend(by_group.get(int(i / (depth / groups)), []))
    return order


def _site_notes(sites: list[AttentionSite], excluded: list[str]) -> list[str]:
    notes = []
    if excluded:
        shown = ", ".join(excluded[:3]) + (", …" if len(excluded) > 3 else "")
        notes.append(f"Left out {len(excluded)} cross-attention module(s) ({shown}): they attend from decoder "
                     "positions to encoder positions, two different sequences, so distances and slots have no "
                     "common meaning there. attnpos measures self-attention only; the cross-attention runs "
                     "unchanged with the mask the model gives it.")
    shared: dict[str, list[AttentionSite]] = {}
    for site in sites:
        if site.shared > 1:
            shared.setdefault(site.name, []).append(site)
    for name, group in shared.items():
        layers = ", ".join(f"{s.stack}:L{s.layer}" if s.stack != "main" else f"L{s.layer}" for s in group)
        notes.append(f"One attention module ({name}) is applied {len(group)} times (layers shared across depth); "
                     f"each application is its own layer: {layers}.")
    return notes


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

def fingerprint(model, *, weights: str | None = None) -> str:
    """blake2b over the config (as JSON, minus volatile fields) and the weights: every parameter and buffer's bytes,
    or — for a model loaded from safetensors files — ``weights``, the digest of those files' bytes
    (:class:`WeightFiles`) and the dtype the model keeps them in."""
    h = hashlib.blake2b(digest_size=20)
    cfg = model.config.to_dict()
    for k in ("_name_or_path", "transformers_version", "_attn_implementation_autoset", "attn_implementation",
              "_attn_implementation", "dtype", "torch_dtype", "architectures"):
        cfg.pop(k, None)
    h.update(json.dumps(cfg, sort_keys=True, default=str).encode())
    if weights is not None:
        p = next(iter(model.parameters()), None)
        h.update(f"safetensors files {weights} kept in {p.dtype if p is not None else None}".encode())
        return h.hexdigest()
    for n, t in sorted(list(model.state_dict().items()), key=lambda kv: kv[0]):
        h.update(n.encode())
        a = t.detach().cpu().contiguous()
        if a.dtype == torch.bfloat16:
            a = a.float()
        h.update(memoryview(a.numpy().reshape(-1)).cast("B"))     # the bytes without a copy
    return h.hexdigest()


def has_nonfinite_weights(model) -> list[str]:
    """Names of parameters holding NaN or inf."""
    return [n for n, p in model.named_parameters() if p.is_floating_point() and not _all_finite(p.detach())]


def _all_finite(t: torch.Tensor) -> bool:
    # a sum is finite only if every term is (NaN and ±inf never cancel); an overflowing sum of finite values is
    # told apart by the exact check
    with torch.no_grad():
        return bool(torch.isfinite(t.sum())) or bool(torch.isfinite(t).all())


def nonfinite_error(bad: list[str]) -> AttnposError:
    return AttnposError(f"The checkpoint holds NaN or infinite values in {len(bad)} parameter(s) "
                        f"({', '.join(bad[:4])}{', …' if len(bad) > 4 else ''}), so its attention cannot be "
                        "measured. Repair or re-export the checkpoint (a NaN often comes from a diverged "
                        "training run or a failed conversion).")


def _refuse_nonfinite(model) -> None:
    bad = has_nonfinite_weights(model)
    if bad:
        raise nonfinite_error(bad)


def weight_files(folder) -> list:
    """The safetensors files transformers loads from ``folder``: those its index names, else ``model.safetensors``,
    else every ``*.safetensors`` file."""
    from pathlib import Path

    folder = Path(folder)
    for index in sorted(folder.glob("*.safetensors.index.json")):
        try:
            names = sorted(set(json.loads(index.read_text(encoding="utf-8"))["weight_map"].values()))
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            continue
        if names and all((folder / n).is_file() for n in names):
            return [folder / n for n in names]
    if (folder / "model.safetensors").is_file():
        return [folder / "model.safetensors"]
    return sorted(folder.glob("*.safetensors"))


# safetensors dtype → (numpy dtype of its bits, exponent mask or None for a float type checked by its sum)
_FLOATS = {"F64": ("<f8", None), "F32": ("<f4", None), "F16": ("<u2", 0x7C00), "BF16": ("<u2", 0x7F80)}
# dtypes a file's floats may be loaded into without a finite value becoming infinite (exact or wider range)
_COVERED_BY = {torch.float32: {"F32", "F16", "BF16"}, torch.bfloat16: {"F16", "BF16"}, torch.float16: {"F16"}}


@dataclass
class WeightsRead:
    digest: str                  # sha256 over the files' names and bytes
    nonfinite: list[str]         # tensors holding NaN or ±inf
    float_dtypes: set            # safetensors dtypes of the floating-point tensors

    def covers(self, dtype: torch.dtype) -> bool:
        """Whether the finite check of the files holds for the model's weights kept in ``dtype``."""
        return self.float_dtypes <= _COVERED_BY.get(dtype, set())


class WeightFiles:
    """Reads safetensors files once, in large chunks, in a thread of its own: the sha256 of their bytes (the
    fingerprint's weights part; any changed weight changes it) and the names of tensors holding NaN or ±inf. It
    runs beside transformers' own loading of the same files, so a load costs little more than transformers'
    ``from_pretrained``. A file that cannot be read is left to transformers' loading to report."""

    CHUNK = 8 << 20

    def __init__(self, files: list, *, cache: "ReadCache | None" = None, known: WeightsRead | None = None,
                 before: str | None = None) -> None:
        import threading

        self.files = list(files)
        self._stop = threading.Event()
        self._out: WeightsRead | None = known
        self._error: BaseException | None = None
        self._cache, self._before = cache, before       # before: the files' status key, taken before reading
        self._thread = None
        if known is None:
            self._thread = threading.Thread(target=self._run, name="attnpos-weights", daemon=True)
            self._thread.start()

    @classmethod
    def for_files(cls, files: list) -> "WeightFiles":
        """The reader of ``files``: the stored result when :data:`READ_CACHE` knows these files unchanged, else a
        thread that reads them (and stores what it found)."""
        key = READ_CACHE.key(files)
        known = READ_CACHE.get(files, key=key)
        return cls(files, known=known) if known is not None else cls(files, cache=READ_CACHE, before=key)

    @property
    def from_cache(self) -> bool:
        return self._thread is None

    def stop(self) -> None:
        self._stop.set()

    def result(self) -> WeightsRead:
        if self._thread is not None:
            self._thread.join()
        if self._error is not None:
            raise AttnposError(f"Could not read the weights: {type(self._error).__name__}: "
                               f"{_one_line(self._error)}. Re-save the checkpoint with "
                               "`model.save_pretrained(folder)`.")
        return self._out

    def _run(self) -> None:
        try:
            self._out = read_weight_files(self.files, stop=self._stop, chunk=self.CHUNK)
            if self._cache is not None and self._before is not None:
                self._cache.put(self.files, self._before, self._out)
        except BaseException as exc:  # noqa: BLE001 - handed to the caller by result()
            self._error = exc


class ReadCache:
    """What reading a set of weight files found (:class:`WeightsRead`: the sha256, the tensors holding NaN/±inf),
    kept against the files' identity and status — path, device, inode, size, modification and status-change times
    in nanoseconds — so that loading the same unchanged files again reads none of their bytes, the way a version
    control system trusts a file's status before hashing it again (common practice).

    Any write to a file changes its status-change time (which a program cannot set back), so a changed file is
    always read again. Files modified less than :attr:`SETTLE` seconds before they were read are not stored (they
    may still be being written). Kept in memory for the process and, unless ``ATTNPOS_WEIGHTS_CACHE=0``, in
    ``weights-read.json`` under ``ATTNPOS_CACHE_DIR`` (default ``$XDG_CACHE_HOME/attnpos``, else
    ``~/.cache/attnpos``) for later processes; a cache that cannot be read or written is ignored."""

    FORMAT = "attnpos.weights-read/1"
    SETTLE = 2.0
    KEEP = 256

    def __init__(self) -> None:
        import threading

        self._memory: dict[str, WeightsRead] = {}
        self._lock = threading.Lock()

    @staticmethod
    def enabled() -> bool:
        return os.environ.get("ATTNPOS_WEIGHTS_CACHE", "1").strip().lower() not in ("0", "off", "no", "false")

    @staticmethod
    def path():
        from pathlib import Path

        base = os.environ.get("ATTNPOS_CACHE_DIR") or os.path.join(
            os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"), "attnpos")
        return Path(base) / "weights-read.json"

    @staticmethod
    def _status(files) -> list | None:
        """Per file: path, device, inode, size, modification and status-change times in ns (None when a file
        cannot be looked at)."""
        try:
            return [[os.path.abspath(f), st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns]
                    for f, st in ((f, os.stat(f)) for f in files)]
        except OSError:
            return None

    @classmethod
    def key(cls, files) -> str | None:
        """The files' identity and status as one key (None when a file cannot be looked at)."""
        return cls._digest(cls._status(files))

    @staticmethod
    def _digest(status: list | None) -> str | None:
        return None if status is None else hashlib.sha256(json.dumps(status).encode()).hexdigest()

    def get(self, files, *, key: str | None = None) -> WeightsRead | None:
        """What reading ``files`` found, if they were read before and are unchanged (``key``: their
        :meth:`key`, when already at hand)."""
        if not self.enabled():
            return None
        k = key if key is not None else self.key(files)
        if k is None:
            return None
        with self._lock:
            if k in self._memory:
                return self._memory[k]
        entry = self._read_disk().get(k)
        if not isinstance(entry, dict):
            return None
        try:
            found = WeightsRead(digest=str(entry["digest"]), nonfinite=[str(x) for x in entry["nonfinite"]],
                                float_dtypes={str(x) for x in entry["float_dtypes"]})
        except (KeyError, TypeError):
            return None
        if len(found.digest) != 64:
            return None
        with self._lock:
            self._memory[k] = found
        return found

    def put(self, files, before: str, found: WeightsRead) -> None:
        """Store ``found`` if the files' status is the one taken before reading them (``before``) and they have
        settled."""
        import time

        status = self._status(files) if self.enabled() else None
        if not status or self._digest(status) != before:
            return
        newest = max(max(mtime, ctime) for *_, mtime, ctime in status) / 1e9
        if time.time() - newest < self.SETTLE:
            return
        with self._lock:
            self._memory[before] = found
        self._write_disk(before, found)

    def clear(self) -> None:
        """Forget what this process keeps in memory (the file is left as it is)."""
        with self._lock:
            self._memory.clear()

    def _read_disk(self) -> dict:
        try:
            data = json.loads(self.path().read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return {}
        if not isinstance(data, dict) or data.get("format") != self.FORMAT or not isinstance(data.get("entries"), dict):
            return {}
        return data["entries"]

    def _write_disk(self, k: str, found: WeightsRead) -> None:
        import time

        from .files import write_atomic

        try:
            entries = self._read_disk()
            entries[k] = {"digest": found.digest, "nonfinite": list(found.nonfinite),
                          "float_dtypes": sorted(found.float_dtypes), "stored": time.time()}
            if len(entries) > self.KEEP:        # the most recently stored ones
                keep = sorted(entries, key=lambda e: entries[e].get("stored", 0) if isinstance(entries[e], dict)
                              else 0)[-self.KEEP:]
                entries = {e: entries[e] for e in keep}
            path = self.path()
            path.parent.mkdir(parents=True, exist_ok=True)
            write_atomic(path, json.dumps({"format": self.FORMAT, "entries": entries}, indent=0))
        except Exception:  # noqa: BLE001 - a cache that cannot be written is only a slower next load
            pass


#: the process's :class:`ReadCache`
READ_CACHE = ReadCache()


def read_weight_files(files, *, stop=None, chunk: int = 8 << 20) -> WeightsRead:
    """sha256 over the names and bytes of safetensors ``files`` and the tensors among them holding NaN or ±inf,
    reading each file once from the start to the end (see :class:`WeightFiles`)."""
    from .sizes import read_header

    h = hashlib.sha256()
    bad: list[str] = []
    kinds: set = set()
    buf = bytearray(chunk)
    view = memoryview(buf)
    for path in files:
        h.update(f"{os.path.basename(path)}\0".encode())
        header = read_header(path)
        with open(path, "rb") as f:
            n = int.from_bytes(f.read(8), "little")
            h.update(n.to_bytes(8, "little"))
            h.update(f.read(n))
            start = 8 + n
            spans = sorted((int(v["data_offsets"][0]), int(v["data_offsets"][1]), k, v.get("dtype"))
                           for k, v in header.items() if k != "__metadata__" and isinstance(v, dict))
            at = 0                                            # position in the data section
            for b0, b1, name, dt in spans:
                kind = _FLOATS.get(dt)
                if kind is not None:
                    kinds.add(dt)
                if b0 > at:                                   # bytes between tensors: hashed all the same
                    _hash_span(f, h, view, b0 - at, None, stop)
                    at = b0
                if b1 > at:
                    if not _hash_span(f, h, view, b1 - at, kind, stop):
                        bad.append(name)
                    at = b1
            while True:                                       # anything after the last tensor
                got = f.readinto(view)
                if not got:
                    break
                h.update(view[:got])
    return WeightsRead(digest=h.hexdigest(), nonfinite=sorted(bad), float_dtypes=kinds)


def _hash_span(f, h, view, length: int, kind, stop) -> bool:
    """Read ``length`` bytes of ``f`` in chunks into ``view``, hash them, and (``kind`` given) check they hold no
    NaN or ±inf; False when they do."""
    import numpy as np

    finite = True
    size = np.dtype(kind[0]).itemsize if kind is not None else 1
    step = (len(view) // size) * size
    while length > 0:
        if stop is not None and stop.is_set():
            raise AttnposError("the weights reader was stopped")
        want = min(step, length)
        got = f.readinto(view[:want])
        if got != want:
            raise AttnposError("a weights file is shorter than its header says")
        h.update(view[:got])
        length -= got
        if kind is not None and finite:
            a = np.frombuffer(view[:got], dtype=kind[0])
            if kind[1] is None:
                with np.errstate(all="ignore"):
                    finite = bool(np.isfinite(a.sum())) or bool(np.isfinite(a).all())
            else:
                finite = not bool(((a & kind[1]) == kind[1]).any())
    return finite
