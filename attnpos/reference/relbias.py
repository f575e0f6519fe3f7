"""A decoder-only language model with T5's bucketed relative position bias (Raffel et al. 2020).

transformers has no decoder-only T5 class, so this is a thin wrapper: transformers' own ``T5Stack`` in decoder
mode (causal mask, T5's ``T5Attention`` with its relative-bias buckets computed one-directionally), with the
unused cross-attention sub-layers removed, plus a language-model head. The bias reaches the attention kernel
through transformers' attention-function registry as the ``position_bias`` keyword, exactly as in T5 itself, so
anything that hooks that registry sees the same scores it would see in a T5 checkpoint.

Importing ``attnpos.reference`` registers the config (model type ``attnpos-relbias``) and the model with
``AutoConfig`` / ``AutoModelForCausalLM``, so ``AutoModelForCausalLM.from_pretrained(folder)`` works without
remote code.
"""

from __future__ import annotations

import torch
from huggingface_hub.dataclasses import strict
from torch import nn
from transformers import T5Config
from transformers.generation import GenerationMixin
from transformers.modeling_outputs import CausalLMOutputWithPast
from transformers.utils.deprecation import deprecate_kwarg
from transformers.utils.generic import can_return_tuple
from transformers.models.t5.modeling_t5 import T5Attention, T5LayerCrossAttention, T5PreTrainedModel, T5Stack

MODEL_TYPE = "attnpos-relbias"


@strict
class RelativeBiasConfig(T5Config):
    """``T5Config`` for a single causal stack (decoder mode, no encoder, no cross-attention)."""

    model_type = MODEL_TYPE
    is_decoder: bool = True
    is_encoder_decoder: bool = False
    use_cache: bool = False


class RelativeBiasForCausalLM(T5PreTrainedModel, GenerationMixin):
    """Causal LM: embeddings → ``T5Stack`` (decoder, self-attention only) → RMS norm → tied LM head.

    ``position_ids`` are accepted and ignored: position enters only as the bucketed bias on the scores.
    As in T5 with tied embeddings, the final hidden state is scaled by ``d_model ** -0.5`` before the head.
    """

    config_class = RelativeBiasConfig
    config: RelativeBiasConfig
    base_model_prefix = "transformer"
    _tied_weights_keys = {"lm_head.weight": "transformer.embed_tokens.weight"}
    _keys_to_ignore_on_load_unexpected = None

    def __init__(self, config: RelativeBiasConfig):
        super().__init__(config)
        self.transformer = T5Stack(config)
        for block in self.transformer.block:
            # T5Block always builds a cross-attention sub-layer in decoder mode; a decoder-only model never uses it
            # (T5Block only calls layer[1] when encoder states are given, and takes the feed-forward as layer[-1]).
            kept = [sub for sub in block.layer if not isinstance(sub, T5LayerCrossAttention)]
            block.layer = nn.ModuleList(kept)
        self.lm_head = nn.Linear(config.d_model, config.vocab_size, bias=False)
        self.post_init()

    def _init_weights(self, module):
        super()._init_weights(module)
        if isinstance(module, RelativeBiasForCausalLM):
            # T5's convention for its shared embedding (std = initializer_factor); outputs are rescaled in forward
            nn.init.normal_(module.transformer.embed_tokens.weight, mean=0.0, std=self.config.initializer_factor)

    def get_input_embeddings(self):
        return self.transformer.embed_tokens

    def set_input_embeddings(self, new_embeddings):
        self.transformer.set_input_embeddings(new_embeddings)

    def get_output_embeddings(self):
        return self.lm_head

    def set_output_embeddings(self, new_embeddings):
        self.lm_head = new_embeddings

    @property
    def relative_bias(self) -> T5Attention:
        """The one attention module that owns the bias table (T5 computes it in block 0 and shares it)."""
        return self.transformer.block[0].layer[0].SelfAttention

    @deprecate_kwarg("past_key_values", "5.40.0", new_name="cache")
    @can_return_tuple
    def forward(
        self,
        input_ids: torch.LongTensor | None = None,
        attention_mask: torch.Tensor | None = None,
        position_ids: torch.LongTensor | None = None,  # accepted and ignored: position enters only as the bias
        cache=None,
        inputs_embeds: torch.Tensor | None = None,
        labels: torch.LongTensor | None = None,
        use_cache: bool | None = None,
        logits_to_keep: int = 0,
        **kwargs,
    ) -> CausalLMOutputWithPast:
        kwargs.pop("cache_position", None)
        out = self.transformer(
            input_ids=input_ids,
            attention_mask=attention_mask,
            inputs_embeds=inputs_embeds,
            cache=cache,
            use_cache=use_cache,
            **kwargs,
        )
        hidden = out.last_hidden_state
        if logits_to_keep:
            hidden = hidden[:, -logits_to_keep:, :]
        if getattr(self.config, "scale_decoder_outputs", True):
            hidden = hidden * (self.config.d_model**-0.5)  # T5's rescaling for a tied output head
        logits = self.lm_head(hidden)
        loss = None
        if labels is not None:
            loss = self.loss_function(logits=logits, labels=labels, vocab_size=self.config.vocab_size, **kwargs)
        return CausalLMOutputWithPast(
            loss=loss,
            logits=logits,
            cache=out.cache if use_cache else None,
            hidden_states=out.hidden_states,
            attentions=out.attentions,
        )


_REGISTERED = False


def register() -> None:
    """Make ``AutoConfig`` / ``AutoModelForCausalLM`` know the ``attnpos-relbias`` model type (idempotent)."""
    global _REGISTERED
    if _REGISTERED:
        return
    from transformers import AutoConfig, AutoModelForCausalLM

    try:
        AutoConfig.register(MODEL_TYPE, RelativeBiasConfig)
    except ValueError:  # already registered (e.g. module reloaded)
        pass
    try:
        AutoModelForCausalLM.register(RelativeBiasConfig, RelativeBiasForCausalLM)
    except ValueError:
        pass
    _REGISTERED = True
