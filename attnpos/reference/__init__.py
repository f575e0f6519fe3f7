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

from ..locate import REFERENCE_ROOT as WEIGHTS_ROOT, reference_dir
from . import relbias as _relbias
from .models import CONTEXT_LIMIT, DEFAULT_CONTEXT, SCHEMES, build_model


def register_architectures() -> None:
    """Register the ``attnpos-relbias`` model type with transformers' auto classes (idempotent)."""
    _relbias.register()


register_architectures()


def weights_dir(scheme: str) -> Path:
    """Folder of the shipped, trained model for ``scheme`` (``config.json``, ``model.safetensors``, tokenizer)."""
    return reference_dir(scheme)


__all__ = ["SCHEMES", "CONTEXT_LIMIT", "DEFAULT_CONTEXT", "WEIGHTS_ROOT", "build_model", "register_architectures",
           "weights_dir"]
