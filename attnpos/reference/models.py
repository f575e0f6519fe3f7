"""Build the six (untrained) reference models, one per position scheme, all the same size.

Every scheme uses a model class that ships with transformers, except ``relative-bias``, which wraps
transformers' own ``T5Stack`` (see ``relbias.py``):

=================  ===========================  ==================================================================
scheme             class                        where position enters
=================  ===========================  ==================================================================
learned-absolute   GPT2LMHeadModel              trained ``wpe`` table added to the token embeddings
sinusoidal         GPT2LMHeadModel              ``wpe`` = Vaswani et al. 2017 §3.5 table, frozen
relative-bias      RelativeBiasForCausalLM      T5 bucketed bias on the scores (Raffel et al. 2020)
alibi              BloomForCausalLM             per-head linear bias on the scores (Press et al. 2022)
rope               LlamaForCausalLM             rotary queries and keys (Su et al., RoFormer)
none               SmolLM3ForCausalLM           nowhere: every layer rope-free (``no_rope_layers`` all 0)
=================  ===========================  ==================================================================

Size: 4 layers, hidden 128, 4 heads of 32, feed-forward 512 (gated feed-forwards use 344 so their three matrices
hold about as many weights as two of 512), tied input/output embeddings over the 259-token byte vocabulary
(except ``sinusoidal``, see ``build_model``), no dropout. Each model has 0.82-0.93 M parameters.
"""

from __future__ import annotations

import math

import torch

from ..core import schemes, settings
from ..errors import AttnposError
from .tokenizer import BOS_ID, EOS_ID, PAD_ID, VOCAB_SIZE

#: the schemes that have a reference model: every built-in scheme of :mod:`attnpos.core.schemes`
SCHEMES = ("learned-absolute", "sinusoidal", "relative-bias", "alibi", "rope", "none")
assert set(SCHEMES) <= set(schemes.names()), "every reference model's scheme is a scheme of the core"

#: hard context limit for the schemes that have one (absolute tables); the others get the same nominal value
CONTEXT_LIMIT = 512
DEFAULT_CONTEXT = settings.REFERENCE_CONTEXT

#: initial std of the sinusoidal model's token table, and the learning-rate multiplier the trainer gives it
#: (0.5 / 0.02, GPT-2's initializer range: the same relative step size as a normally initialised table)
SINUSOIDAL_TOKEN_STD = 0.5
SINUSOIDAL_TOKEN_LR_SCALE = 25.0

_COMMON_TOKENS = dict(vocab_size=VOCAB_SIZE, bos_token_id=BOS_ID, eos_token_id=EOS_ID, pad_token_id=PAD_ID)


def sinusoidal_table(n_positions: int, d_model: int) -> torch.Tensor:
    """The fixed encoding of Vaswani et al. 2017 §3.5 (:func:`attnpos.core.schemes.sinusoidal_table`), as float32."""
    if d_model % 2:
        raise AttnposError(f"the sinusoidal table needs an even hidden size, got {d_model}")
    return torch.from_numpy(schemes.sinusoidal_table(n_positions, d_model)).to(torch.float32)


def freeze_sinusoidal(model) -> None:
    """Keep the sinusoidal table fixed during training (requires_grad is not saved, so call after loading too)."""
    model.transformer.wpe.weight.requires_grad_(False)


def _check(scheme: str) -> None:
    if scheme not in SCHEMES:
        raise AttnposError(f"unknown position scheme {scheme!r}; choose one of: {', '.join(SCHEMES)}")


def build_config(scheme: str, context: int = DEFAULT_CONTEXT, n_layers: int = 4, hidden: int = 128, heads: int = 4):
    """The transformers config for ``scheme`` (untrained), with ``attnpos_scheme`` and ``attnpos_training_length``."""
    _check(scheme)
    if hidden % heads:
        raise AttnposError(f"hidden size {hidden} is not divisible by {heads} heads")
    context = int(context)
    if context < 2:
        raise AttnposError(f"training context must be at least 2 tokens, got {context}")
    limit = max(CONTEXT_LIMIT, context)
    ff = 4 * hidden
    gated_ff = int(round(2 * ff / 3 / 8)) * 8  # three gated matrices ≈ two plain ones
    extra = dict(attnpos_scheme=scheme, attnpos_training_length=context)

    if scheme in ("learned-absolute", "sinusoidal"):
        from transformers import GPT2Config

        cfg = GPT2Config(
            n_positions=limit, n_embd=hidden, n_layer=n_layers, n_head=heads, n_inner=ff,
            resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0,
            # sinusoidal: the token table must be on the scale of the fixed position table (see build_model),
            # which a tied output head cannot share, so that one model keeps a separate head
            tie_word_embeddings=(scheme == "learned-absolute"),
            use_cache=False, **_COMMON_TOKENS, **extra,
        )
    elif scheme == "relative-bias":
        from .relbias import RelativeBiasConfig

        cfg = RelativeBiasConfig(
            d_model=hidden, d_kv=hidden // heads, d_ff=ff, num_layers=n_layers, num_heads=heads,
            relative_attention_num_buckets=32, relative_attention_max_distance=128,
            dropout_rate=0.0, feed_forward_proj="relu", **_COMMON_TOKENS, **extra,
        )
    elif scheme == "alibi":
        from transformers import BloomConfig

        cfg = BloomConfig(
            hidden_size=hidden, n_layer=n_layers, n_head=heads, hidden_dropout=0.0, attention_dropout=0.0,
            tie_word_embeddings=True, use_cache=False, **_COMMON_TOKENS, **extra,
        )
    elif scheme == "rope":
        from transformers import LlamaConfig

        cfg = LlamaConfig(
            hidden_size=hidden, intermediate_size=gated_ff, num_hidden_layers=n_layers, num_attention_heads=heads,
            num_key_value_heads=heads, max_position_embeddings=limit, tie_word_embeddings=True, use_cache=False,
            **_COMMON_TOKENS, **extra,
        )
    else:  # none
        from transformers import SmolLM3Config

        cfg = SmolLM3Config(
            hidden_size=hidden, intermediate_size=gated_ff, num_hidden_layers=n_layers, num_attention_heads=heads,
            num_key_value_heads=heads, max_position_embeddings=limit, tie_word_embeddings=True, use_cache=False,
            no_rope_layers=[0] * n_layers,  # 0 = this layer applies no rotary embedding
            use_sliding_window=False, **_COMMON_TOKENS, **extra,
        )
    return cfg


def model_class(scheme: str):
    """The causal-LM class used for ``scheme``."""
    _check(scheme)
    if scheme in ("learned-absolute", "sinusoidal"):
        from transformers import GPT2LMHeadModel as cls
    elif scheme == "relative-bias":
        from .relbias import RelativeBiasForCausalLM as cls
    elif scheme == "alibi":
        from transformers import BloomForCausalLM as cls
    elif scheme == "rope":
        from transformers import LlamaForCausalLM as cls
    else:
        from transformers import SmolLM3ForCausalLM as cls
    return cls


def build_model(scheme: str, context: int = DEFAULT_CONTEXT, seed: int = 0, n_layers: int = 4, hidden: int = 128,
                heads: int = 4):
    """An untrained reference model for ``scheme`` (float32, CPU, eval mode), initialised from ``seed``."""
    cfg = build_config(scheme, context=context, n_layers=n_layers, hidden=hidden, heads=heads)
    cls = model_class(scheme)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed))
        model = cls(cfg)
    if scheme == "sinusoidal":
        with torch.no_grad():
            model.transformer.wpe.weight.copy_(sinusoidal_table(cfg.n_positions, cfg.n_embd))
            # Vaswani et al. scale token embeddings by sqrt(d) so they are not drowned by the table (whose entries
            # have variance 1/2); GPT-2 has no such multiplier, so the token table starts at that scale instead
            # and the trainer gives it a matching learning-rate multiplier (SINUSOIDAL_TOKEN_LR_SCALE)
            g = torch.Generator().manual_seed(int(seed) + 1)
            model.transformer.wte.weight.copy_(
                torch.randn(model.transformer.wte.weight.shape, generator=g) * SINUSOIDAL_TOKEN_STD)
        freeze_sinusoidal(model)
    model.to(torch.float32)
    model.eval()
    return model


def count_parameters(model) -> int:
    """Distinct trainable-or-not parameters (tied weights counted once)."""
    seen, total = set(), 0
    for p in model.parameters():
        if id(p) not in seen:
            seen.add(id(p))
            total += p.numel()
    return total


def alibi_slopes_press(n_heads: int) -> list[float]:
    """Press et al. 2022's slopes: geometric sequence starting at 2^(-8/n) with ratio 2^(-8/n) for n a power of two;
    otherwise the paper's rule (slopes of the nearest lower power of two, then every other slope of the next one).
    Kept here for documentation and for the loader; tests recompute it independently."""
    def power_of_two(n):
        start = 2.0 ** (-8.0 / n)
        return [start ** (k + 1) for k in range(n)]

    if math.log2(n_heads).is_integer():
        return power_of_two(n_heads)
    lower = 2 ** math.floor(math.log2(n_heads))
    return power_of_two(lower) + power_of_two(2 * lower)[0::2][: n_heads - lower]
