"""Where a model argument points, checked before anything heavy starts (no torch, no transformers).

:func:`locate` turns what a user typed — a folder written by ``save_pretrained`` or a shipped reference model
``ref:<scheme>`` — into a :class:`Located` checkpoint: its folder, its display name, its raw config, and whether the
weights are safetensors. Every problem a folder can have that needs no model to see (missing, no config, a config
that is not JSON, modelling code shipped inside, pickle-only weights, no weights) is an
:class:`~attnpos.errors.AttnposError` here, so the command line refuses it in well under a second.

>>> loc = locate("ref:rope")
>>> loc.name, loc.config["attnpos_scheme"], loc.safetensors
('ref:rope', 'rope', True)
"""

from __future__ import annotations

import json
import os
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
           trust_remote_code: bool = False) -> Located:
    """Find and check the checkpoint ``path_or_name`` refers to (see the module doc)."""
    text = str(path_or_name)
    if text.startswith("ref:"):
        p, name, ref = reference_dir(text[4:]), text, True
    else:
        (p, name), ref = _folder(text), False
    cfg = read_config(p)
    if (cfg.get("auto_map") or any(f.suffix == ".py" for f in p.iterdir())) and not trust_remote_code:
        raise AttnposError(f"The folder {p} ships its own modelling code (auto_map / *.py). attnpos never runs code "
                           "from a model folder unless you ask: pass trust_remote_code=True (CLI: "
                           "--trust-remote-code) only if you trust its author.")
    safe = weights_are_safetensors(p, allow_pickle)
    if safe:
        sizes.check_checkpoint(p, cfg)       # config against the weights' headers and the machine, before allocation
    else:
        sizes.refuse_zero_sizes(p, cfg)
        sizes.refuse_if_too_big(sizes.estimate_config_bytes(cfg), f"The model in {p} (as its config.json describes "
                                "it, in float32)", "Check the sizes in config.json, or load it on a machine with "
                                "more memory.")
    return Located(path=p, name=name, config=cfg, safetensors=safe, reference=ref)
