"""The six reference models: one small causal byte-level LM per position scheme, trained on our own corpus.

Importing this package registers the ``attnpos-relbias`` model type with transformers' auto classes, so every
shipped folder loads with ``AutoModelForCausalLM.from_pretrained(weights_dir(scheme))`` and
``AutoTokenizer.from_pretrained(...)``, offline and without remote code.

Each saved ``config.json`` carries ``attnpos_scheme`` (one of ``SCHEMES``), ``attnpos_training_length`` (the
training context in tokens) and ``attnpos_training`` (steps, minutes, losses per byte, corpus hash, seed,
library versions, the command). See ``TRAINING.md`` beside this file for how the shipped weights were made.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import AttnposError
from . import relbias as _relbias
from .models import CONTEXT_LIMIT, DEFAULT_CONTEXT, SCHEMES, build_model

_relbias.register()

WEIGHTS_ROOT = Path(__file__).resolve().parent / "weights"


def weights_dir(scheme: str) -> Path:
    """Folder of the shipped, trained model for ``scheme`` (``config.json``, ``model.safetensors``, tokenizer)."""
    if scheme not in SCHEMES:
        raise AttnposError(
            f"there is no reference model called {scheme!r}; the reference models are: {', '.join(SCHEMES)}"
        )
    folder = WEIGHTS_ROOT / scheme
    missing = [n for n in ("config.json", "model.safetensors", "tokenizer.json") if not (folder / n).is_file()]
    if missing:
        raise AttnposError(
            f"the reference model {scheme!r} is incomplete: {', '.join(missing)} missing in {folder}. "
            f"Reinstall attnpos, or train it again with: attnpos train {scheme} --out {folder}"
        )
    return folder


__all__ = ["SCHEMES", "CONTEXT_LIMIT", "DEFAULT_CONTEXT", "WEIGHTS_ROOT", "build_model", "weights_dir"]
