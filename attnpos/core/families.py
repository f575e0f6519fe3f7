"""The architecture families attnpos supports, and what it refuses: the README's families table comes from here.

A :class:`FamilySpec` states, for one family, the scheme attnpos detects, the kind of scores the reducers see
(``scores``: the true pre-softmax scores, computed by attnpos through transformers' attention registry;
``log-weights``: log of the model's own weights, where the architecture computes attention inside its module) and
what is left out or refused, with the reason. ``tests/test_exact.py`` builds a tiny model of every family and
checks each row against what attnpos does on it, and the README table against :func:`readme_table`.

>>> spec = get("bart")
>>> spec.kind, spec.scheme, spec.score_kind
('encoder-decoder', 'learned-absolute', 'scores')
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class FamilySpec:
    """One supported family: ``name`` (the tiny test model's name), ``model_type`` (transformers'), ``kind``
    (causal, encoder, encoder-decoder), ``scheme`` as detected (``rope/none`` for a per-layer mix), ``score_kind``,
    ``rope_fraction`` (the share of each head's dimensions RoPE rotates in the test configuration, if below 1),
    ``notes`` (what is left out or how it is recorded)."""

    name: str
    model_type: str
    kind: str
    scheme: str
    score_kind: str
    notes: str = ""
    rope_fraction: float | None = None


FAMILIES: tuple[FamilySpec, ...] = (
    FamilySpec("gpt2", "gpt2", "causal", "learned-absolute", "scores"),
    FamilySpec("gpt_neox", "gpt_neox", "causal", "rope", "scores",
               "partial rotary factor read from `rope_parameters`; 0 → `none`, below 1 recorded with the scheme",
               rope_fraction=0.25),
    FamilySpec("llama", "llama", "causal", "rope", "scores", "grouped-query heads repeated as the model does"),
    FamilySpec("mistral", "mistral", "causal", "rope", "scores"),
    FamilySpec("qwen2", "qwen2", "causal", "rope", "scores"),
    FamilySpec("smollm3", "smollm3", "causal", "rope/none", "scores", "rope-free layers (`no_rope_layers`) are `none`"),
    FamilySpec("codegen", "codegen", "causal", "rope", "scores", "partial rotary (`rotary_dim`) recorded",
               rope_fraction=0.5),
    FamilySpec("opt", "opt", "causal", "learned-absolute", "scores"),
    FamilySpec("bloom", "bloom", "causal", "alibi", "log-weights", "attention computed inside the module"),
    FamilySpec("mpt", "mpt", "causal", "alibi", "log-weights", "ALiBi flag in the nested `attn_config`"),
    FamilySpec("falcon", "falcon", "causal", "rope", "scores",
               "multi-query heads repeated as the model does; before transformers 5.25 its attention was computed "
               "inside the module (log-weights)"),
    FamilySpec("bert", "bert", "encoder", "learned-absolute", "scores"),
    FamilySpec("distilbert", "distilbert", "encoder", "learned-absolute", "scores"),
    FamilySpec("albert", "albert", "encoder", "learned-absolute", "scores",
               "one layer shared across depth: each application is its own layer (module named); no ablation"),
    FamilySpec("t5", "t5", "encoder-decoder", "relative-bias", "scores",
               "encoder and decoder self-attention; cross-attention (`EncDecAttention`) left out by name"),
    FamilySpec("bart", "bart", "encoder-decoder", "learned-absolute", "scores",
               "encoder and decoder self-attention; cross-attention (`encoder_attn`) left out by name"),
)

REFUSED: tuple[tuple[str, str], ...] = (
    ("cross-attention (BART `encoder_attn`, T5 `EncDecAttention`, BERT `crossattention`)",
     "left out by name with a notice, runs unchanged with the model's own mask: queries and keys come from two "
     "sequences, so distances and slots have no common meaning; a cross-attention module that slips past the names "
     "is refused at run time, never recorded as self-attention"),
    ("BERT `position_embedding_type` `relative_key` / `relative_key_query`, or `distance_embedding` tensors",
     "transformers 5 ignores the field and drops the tensors, so the model it runs is not the trained one"),
    ("DeBERTa's disentangled attention (`rel_embeddings`)",
     "a learned relative-position embedding inside attention is none of the six schemes"),
    ("key/value heads that do not divide the query heads; a hidden size the heads do not divide (no `head_dim`)",
     "transformers' own forward rejects such a config (or runs it wrong); refused before loading"),
    ("learned attention sinks (extra logits, e.g. gpt-oss)", "no capture for them yet"),
    ("a module shared across depth in a way attnpos does not know",
     "refused at run time rather than mixing its applications into one layer"),
)


def names() -> tuple[str, ...]:
    return tuple(f.name for f in FAMILIES)


def get(name: str) -> FamilySpec | None:
    return next((f for f in FAMILIES if f.name == name), None)


def readme_table() -> str:
    """The README's families table (Markdown): supported families, then what is refused and why."""
    rows = ["| family (`model_type`) | kind | scheme detected | score kind | notes |", "|---|---|---|---|---|"]
    for f in FAMILIES:
        scheme = " / ".join(f"`{s}`" for s in f.scheme.split("/"))
        rows.append(f"| `{f.model_type}` | {f.kind} | {scheme} | {f.score_kind} | {f.notes} |")
    rows += ["", "| refused or left out | why |", "|---|---|"]
    rows += [f"| {what} | {why} |" for what, why in REFUSED]
    return "\n".join(rows)
